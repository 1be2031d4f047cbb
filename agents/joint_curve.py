"""A buyer meets a seller: the joint curve ``J(x) = P_b(x) P_s(x)`` of a batch of pairs.

A pair trades at price ``x`` only if both accept, so ``J(x)`` is the chance that a meeting at
price ``x`` ends in a trade. Its maximum (:attr:`JointCurve.peak`) is the chance that the pair
trades at all under propensity matching, and the normalised ``J`` is the law of the price they
trade at.

Two normal curves give a scaled normal in closed form (product of Gaussians). Any other pair of
families is evaluated on a price grid per pair, in log space, vectorised over the batch.

References
----------
.. [1] P. A. Bromiley, "Products and Convolutions of Gaussian Probability Density Functions",
   Tina Memo 2003-003, University of Manchester (product of two Gaussians: mean, variance,
   scale).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from propensim.agents.curves import Curve, NormalCurve

__all__ = ["JointCurve", "grid_joint", "joint"]

#: log J below its maximum by more than this is treated as no mass (exp(-36) ~ 2e-16).
_CUT = 36.0
#: Grid cells (points x pairs) handled at once, to bound memory for large batches.
_CHUNK_CELLS = 1 << 20
#: Most zoom passes of the grid path.
_MAX_PASSES = 8


@dataclass(eq=False)
class JointCurve:
    """Joint acceptance ``J(x) = P_b(x) P_s(x)`` of a batch of buyer-seller pairs.

    Built by :func:`joint` (or :func:`grid_joint`); the attributes below are arrays of the batch
    shape (the buyer and seller batches broadcast together).

    Attributes
    ----------
    curve_b, curve_s : Curve
        The buyers' and sellers' curves.
    peak : ndarray
        ``max_x J(x)`` in ``[0, min(a_b, a_s)]``: the chance that a meeting trades.
    mean, sd : ndarray
        Mean and standard deviation of the price law ``J / integral(J)`` (price units);
        NaN where ``J`` is 0 everywhere.
    mass : ndarray
        ``integral J(x) dx`` (price units).
    lo, hi : ndarray or None
        For the grid path, the price interval of each pair's final grid; None when analytic.
    points : int
        Grid points per pair (grid path).
    """

    curve_b: Curve
    curve_s: Curve
    peak: np.ndarray
    mean: np.ndarray
    sd: np.ndarray
    mass: np.ndarray
    lo: np.ndarray | None = None
    hi: np.ndarray | None = None
    points: int = 513

    @property
    def shape(self) -> tuple[int, ...]:
        """Batch shape (one joint curve per buyer-seller pair)."""
        return np.shape(self.peak)

    @property
    def analytic(self) -> bool:
        """True when computed in closed form (two normal curves)."""
        return self.lo is None

    def log_value(self, x) -> np.ndarray:
        """``ln J(x) = ln P_b(x) + ln P_s(x)`` (exact for every family, no grid)."""
        return self.curve_b.log_value(x) + self.curve_s.log_value(x)

    def value(self, x) -> np.ndarray:
        """``J(x)``, the chance that a meeting at price ``x`` trades."""
        return np.exp(self.log_value(x))

    def sample_price(self, rng: np.random.Generator, size=None) -> np.ndarray:
        """Draw trade prices from the normalised joint curve.

        Parameters
        ----------
        rng : numpy.random.Generator
            The only source of randomness.
        size : int or tuple of int, optional
            Extra leading draws: the result has shape ``(*size, *self.shape)``. Default: one
            price per pair, shape ``self.shape``.

        Returns
        -------
        ndarray
            Prices (price units); NaN for a pair whose joint curve is 0 everywhere.

        Notes
        -----
        Analytic path: normal draws with the product-of-Gaussians mean and sd. Grid path: inverse
        CDF of the trapezoid-integrated grid density, linear within each grid cell.
        """
        lead = () if size is None else tuple(np.atleast_1d(size).astype(int).tolist())
        if self.analytic:
            z = rng.standard_normal((*lead, *self.shape))
            return self.mean + self.sd * z
        shape = self.shape
        n = int(np.prod(shape))
        u = rng.random((*lead, n))  # shape: (*size, B); drawn once, so chunking cannot matter
        out = np.full(u.shape, np.nan)
        cb = self.curve_b._flat(shape)
        cs = self.curve_s._flat(shape)
        lo, hi = self.lo.reshape(-1), self.hi.reshape(-1)
        for part in _chunks(n, self.points):
            x, lj = _grid_log_joint(cb[part], cs[part], lo[part], hi[part], self.points)
            out[..., part] = _inverse_cdf(x, lj, u[..., part])
        return out.reshape(*lead, *shape)


def joint(curve_b: Curve, curve_s: Curve) -> JointCurve:
    """The joint curve of buyer curves ``curve_b`` and seller curves ``curve_s``.

    Closed form for two :class:`~propensim.agents.curves.NormalCurve` batches; any other pair of
    families goes through :func:`grid_joint`.

    Parameters
    ----------
    curve_b, curve_s : Curve
        Batches whose shapes broadcast together (pair ``i`` is ``curve_b[i]`` with ``curve_s[i]``).

    Returns
    -------
    JointCurve

    Notes
    -----
    For two normal curves (Bromiley 2003)::

        mean = (mu_b s_s**2 + mu_s s_b**2) / (s_b**2 + s_s**2)
        var  = s_b**2 s_s**2 / (s_b**2 + s_s**2)
        peak = a_b a_s exp(-(mu_b - mu_s)**2 / (2 (s_b**2 + s_s**2)))

    References
    ----------
    .. [1] P. A. Bromiley, "Products and Convolutions of Gaussian Probability Density
       Functions", Tina Memo 2003-003, University of Manchester.

    Examples
    --------
    >>> from propensim.agents.curves import NormalCurve
    >>> j = joint(NormalCurve(100.0, 4.0), NormalCurve(94.0, 3.0))
    >>> round(float(j.mean), 3), round(float(j.sd), 3), round(float(j.peak), 4)
    (96.16, 2.4, 0.4868)
    """
    _check_curves(curve_b, curve_s)
    if type(curve_b) is NormalCurve and type(curve_s) is NormalCurve:
        return _normal_joint(curve_b, curve_s)
    return grid_joint(curve_b, curve_s)


def _check_curves(curve_b, curve_s) -> None:
    for name, c in (("curve_b", curve_b), ("curve_s", curve_s)):
        if not isinstance(c, Curve):
            raise ValueError(f"{name} must be a propensim Curve, got {type(c).__name__}")
    try:
        np.broadcast_shapes(curve_b.shape, curve_s.shape)
    except ValueError:
        raise ValueError(
            f"curve_b and curve_s batch shapes {curve_b.shape} and {curve_s.shape} do not "
            "broadcast together"
        ) from None


def _normal_joint(cb: NormalCurve, cs: NormalCurve) -> JointCurve:
    vb, vs = np.square(cb.sigma), np.square(cs.sigma)
    total = vb + vs  # variance of the gap mu_b - mu_s
    mean = (cb.mu * vs + cs.mu * vb) / total
    sd = np.sqrt(vb * vs / total)
    peak = cb.activity * cs.activity * np.exp(-np.square(cb.mu - cs.mu) / (2.0 * total))
    mass = peak * np.sqrt(2.0 * np.pi) * sd
    shape = np.broadcast_shapes(cb.shape, cs.shape)
    return JointCurve(
        curve_b=cb,
        curve_s=cs,
        peak=np.broadcast_to(peak, shape).copy(),
        mean=np.broadcast_to(mean, shape).copy(),
        sd=np.broadcast_to(sd, shape).copy(),
        mass=np.broadcast_to(mass, shape).copy(),
    )


def grid_joint(curve_b: Curve, curve_s: Curve, points: int = 513) -> JointCurve:
    """The joint curve on a price grid per pair (works for every family).

    Each pair gets ``points`` evenly spaced prices, first spanning both curves' mass, then zoomed
    (up to 8 passes) onto the interval where ``ln J`` is within 36 of its maximum, until that
    interval fills at least half the grid. On the final grid: ``peak`` is the largest value,
    refined by golden-section search in the two cells around it; ``mean`` and ``sd`` come from
    the trapezoid-integrated normalised density.

    Parameters
    ----------
    curve_b, curve_s : Curve
        Buyer and seller batches whose shapes broadcast together.
    points : int
        Grid points per pair (>= 16, default 513).

    Returns
    -------
    JointCurve

    Notes
    -----
    For two normal curves this agrees with :func:`joint`'s closed form to about 1e-12 relative
    in peak, mean and sd (measured in ``tests/agents/test_joint.py``). Memory is bounded by
    working on chunks of about 1e6 grid cells; the cost is a few grid passes per pair.
    """
    _check_curves(curve_b, curve_s)
    if isinstance(points, bool) or not isinstance(points, int | np.integer) or points < 16:
        raise ValueError(f"points must be a whole number >= 16, got {points!r}")
    points = int(points)
    shape = np.broadcast_shapes(curve_b.shape, curve_s.shape)
    n = int(np.prod(shape))
    cb = curve_b._flat(shape)
    cs = curve_s._flat(shape)
    out = {k: np.empty(n) for k in ("peak", "mean", "sd", "mass", "lo", "hi")}
    for part in _chunks(n, points):
        res = _grid_pass(cb[part], cs[part], points)
        for k in out:
            out[k][part] = res[k]
    return JointCurve(
        curve_b=curve_b,
        curve_s=curve_s,
        points=points,
        **{k: v.reshape(shape) for k, v in out.items()},
    )


def _chunks(n: int, points: int):
    step = max(1, _CHUNK_CELLS // points)
    for start in range(0, n, step):
        yield slice(start, min(start + step, n))


def _grid_log_joint(cb: Curve, cs: Curve, lo, hi, points: int):
    """Grid prices ``(G, B)`` from ``lo`` to ``hi`` and ``ln J`` on them."""
    t = np.linspace(0.0, 1.0, points)[:, None]  # shape: (G, 1)
    x = lo + (hi - lo) * t  # shape: (G, B)
    return x, cb.log_value(x) + cs.log_value(x)


def _grid_pass(cb: Curve, cs: Curve, points: int) -> dict[str, np.ndarray]:
    """Zoom a grid onto the mass of ``J`` for flat batches ``cb``, ``cs``; summarise it."""
    lo_b, hi_b = cb._span()
    lo_s, hi_s = cs._span()
    lo = np.minimum(lo_b, lo_s).astype(float)  # shape: (B,)
    hi = np.maximum(hi_b, hi_s).astype(float)
    cols = np.arange(lo.shape[0])
    for _ in range(_MAX_PASSES):
        x, lj = _grid_log_joint(cb, cs, lo, hi, points)  # shape: (G, B)
        top = np.max(lj, axis=0)  # shape: (B,)
        alive = np.isfinite(top)  # J > 0 somewhere on the grid
        heavy = lj >= (top - _CUT)  # shape: (G, B)
        first = np.maximum(np.argmax(heavy, axis=0) - 1, 0)
        last = np.minimum(points - np.argmax(heavy[::-1], axis=0), points - 1)
        new_lo, new_hi = x[first, cols], x[last, cols]
        shrink = alive & ((new_hi - new_lo) < 0.5 * (hi - lo))
        if not np.any(shrink):
            break
        lo = np.where(shrink, new_lo, lo)
        hi = np.where(shrink, new_hi, hi)
    else:
        x, lj = _grid_log_joint(cb, cs, lo, hi, points)
        top = np.max(lj, axis=0)
        alive = np.isfinite(top)

    top_safe = np.where(alive, top, 0.0)
    dens = np.exp(lj - top_safe)  # shape: (G, B); J / max J on the grid
    dens[:, ~alive] = 0.0
    with np.errstate(invalid="ignore", divide="ignore"):
        z = np.trapezoid(dens, x, axis=0)  # shape: (B,)
        mean = np.trapezoid(dens * x, x, axis=0) / z
        var = np.trapezoid(dens * np.square(x - mean), x, axis=0) / z
    # refine the maximum by golden-section search on ln J in the two cells around the grid
    # maximum (40 steps shrink the bracket by ~4e-9); never below the grid maximum
    i = np.argmax(lj, axis=0)
    a = x[np.maximum(i - 1, 0), cols]
    b = x[np.minimum(i + 1, points - 1), cols]
    log_peak = np.maximum(top, _golden_max(cb, cs, a, b))
    log_peak = np.where(alive, log_peak, -np.inf)
    return {
        "peak": np.exp(log_peak),
        "mean": np.where(alive, mean, np.nan),
        "sd": np.where(alive, np.sqrt(np.maximum(var, 0.0)), np.nan),
        "mass": np.where(alive, z * np.exp(top_safe), 0.0),
        "lo": lo,
        "hi": hi,
    }


def _golden_max(cb: Curve, cs: Curve, a: np.ndarray, b: np.ndarray, steps: int = 40):
    """Largest ``ln J`` found by golden-section search in ``[a, b]``, per pair."""
    ratio = (np.sqrt(5.0) - 1.0) / 2.0

    def log_j(p):
        with np.errstate(invalid="ignore"):
            return cb.log_value(p) + cs.log_value(p)

    c, d = b - ratio * (b - a), a + ratio * (b - a)
    fc, fd = log_j(c), log_j(d)
    for _ in range(steps):
        left = fc >= fd  # the maximum lies in [a, d]
        b = np.where(left, d, b)
        a = np.where(left, a, c)
        new = np.where(left, b - ratio * (b - a), a + ratio * (b - a))
        f_new = log_j(new)
        c, d = np.where(left, new, d), np.where(left, c, new)
        fc, fd = np.where(left, f_new, fd), np.where(left, fc, f_new)
    return np.maximum(fc, fd)


def _inverse_cdf(x: np.ndarray, lj: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Invert the trapezoid CDF of ``exp(lj)`` on grids ``x`` (G, B) at uniforms ``u`` (..., B)."""
    g, n = x.shape
    top = np.max(lj, axis=0)
    alive = np.isfinite(top)
    dens = np.exp(lj - np.where(alive, top, 0.0))  # shape: (G, B)
    cells = 0.5 * (dens[1:] + dens[:-1]) * np.diff(x, axis=0)  # shape: (G-1, B)
    cdf = np.concatenate([np.zeros((1, n)), np.cumsum(cells, axis=0)], axis=0)  # shape: (G, B)
    with np.errstate(invalid="ignore", divide="ignore"):
        cdf = cdf / cdf[-1]
    cdf[-1] = 1.0
    cdf[:, ~alive] = np.linspace(0.0, 1.0, g)[:, None]  # keeps the flat array sorted; NaN later
    # one sorted search for all pairs: offset each pair's CDF by 2 * its column index
    offset = 2.0 * np.arange(n)  # shape: (B,)
    flat = (cdf + offset).T.reshape(-1)  # shape: (B*G,)
    lead = u.shape[:-1]
    uu = u.reshape(-1, n)  # shape: (D, B)
    pos = np.searchsorted(flat, (uu + offset).reshape(-1), side="right").reshape(uu.shape)
    j = np.clip(pos - np.arange(n) * g, 1, g - 1)  # upper end of the cell within each pair
    cols = np.broadcast_to(np.arange(n), uu.shape)
    c0, c1 = cdf[j - 1, cols], cdf[j, cols]
    x0, x1 = x[j - 1, cols], x[j, cols]
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.clip((uu - c0) / (c1 - c0), 0.0, 1.0)
    out = x0 + frac * (x1 - x0)
    out[:, ~alive] = np.nan
    return out.reshape(*lead, n)
