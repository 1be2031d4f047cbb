"""Propensity curves: the probability ``P(x)`` that a trader accepts a trade at price ``x``.

Four families share one contract (:class:`Curve`). Every curve object is a *batch*: its parameters
are arrays that broadcast together to the batch shape (one curve per trader), and every method
broadcasts prices against that shape by numpy's rules. For a batch of ``n`` traders, prices of
shape ``(m, 1)`` give an ``(m, n)`` table; prices of shape ``(n,)`` give one value per trader.

All families work in log space: ``log_value`` is computed directly (never as ``log(value)``),
so far tails of the normal and oscillator families stay finite instead of underflowing to
``-inf``. The entropic force is ``F(x) = gamma d/dx ln P(x)`` and the energy of moving a price is
``E = -gamma ln(P(x1) / P(x0))``.

==============  =============================================  ===================================
family          ``P(x)``                                       parameters
==============  =============================================  ===================================
normal          ``a exp(-(x - mu)**2 / (2 sigma**2))``          ``mu, sigma, activity``
oscillator      ``a sum_n w_n psi_n(xi)**2 / max``              ``mu, sigma, weights, activity``
logistic        buyer ``a / (1 + exp((x - mu) / tau))``         ``mu, tau, side, activity``
tabulated       values on a price grid, linear in between       ``grid, values``
==============  =============================================  ===================================

References
----------
.. [1] P. A. Bromiley, "Products and Convolutions of Gaussian Probability Density Functions",
   Tina Memo 2003-003, University of Manchester (normal curves).
.. [2] D. J. Griffiths, *Introduction to Quantum Mechanics*, section 2.3.2 (oscillator levels).
.. [3] Entropic force ``F = T dS/dx`` with ``S = k ln P``: standard statistical mechanics (the
   stationary density of overdamped Langevin motion in the potential ``-kT ln P`` is ``P``).
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from dataclasses import dataclass, fields
from functools import cached_property
from typing import Any, ClassVar

import numpy as np

from propensim.agents._checks import (
    as_float_array,
    check_nonnegative,
    check_positive,
    check_unit_interval,
)
from propensim.agents.oscillator import log_hermite_functions

__all__ = ["Curve", "LogisticCurve", "NormalCurve", "OscillatorCurve", "TabulatedCurve"]

_SQRT2 = math.sqrt(2.0)
_PI_M14 = math.pi**-0.25
#: Cells processed at once by the oscillator's per-row searches (grid points x rows).
_CHUNK_CELLS = 1 << 20


# -- helpers -----------------------------------------------------------------------------------
def _roles(name: str, value) -> np.ndarray:
    """``"buyer"``/``"seller"`` or an integer array of 0 (buyer) and 1 (seller), as int8."""
    if isinstance(value, str):
        if value not in ("buyer", "seller"):
            raise ValueError(f"{name} must be 'buyer', 'seller' or an array of 0/1, got {value!r}")
        return np.array(0 if value == "buyer" else 1, dtype=np.int8)
    arr = as_float_array(name, value)
    if np.any((arr != 0) & (arr != 1)):
        raise ValueError(f"{name} must contain only 0 (buyer) and 1 (seller)")
    return arr.astype(np.int8)


def _logsumexp0(a: np.ndarray) -> np.ndarray:
    """``log(sum(exp(a), axis=0))`` without overflow; ``-inf`` where every term is ``-inf``."""
    m = np.max(a, axis=0)
    m_safe = np.where(np.isfinite(m), m, 0.0)
    with np.errstate(divide="ignore"):
        return m_safe + np.log(np.sum(np.exp(a - m_safe), axis=0))


def _unknown(family: str, params: dict) -> None:
    if params:
        raise ValueError(f"unknown parameter {sorted(params)[0]!r} for the {family} curve family")


class Curve(ABC):
    """A batch of propensity curves ``P(x)`` in ``[0, 1]`` (abstract base of every family).

    Subclasses are dataclasses whose constructors only store their parameters, broadcast to one
    batch shape after validation (``ValueError`` naming the parameter). Methods never change the
    object.

    Methods
    -------
    value(x)
        ``P(x)`` in ``[0, 1]``.
    log_value(x)
        ``ln P(x)``, computed in log space.
    force(x, gamma)
        Entropic force ``gamma d/dx ln P(x)`` (energy per price unit).
    energy(x0, x1, gamma)
        ``-gamma (ln P(x1) - ln P(x0))``: the work to move the price from ``x0`` to ``x1``.
    reservation_price(threshold=0.5, side=None)
        The outermost price accepted with probability ``>= threshold`` on the trader's side.
    from_population(mu, sigma, activity, role, **params)
        Classmethod: a batch built from population columns.
    """

    #: One line saying what the family is (shown by the plugin listing).
    description: ClassVar[str] = ""
    #: Fields whose last axis is not a batch axis (level weights, a price grid).
    _trailing: ClassVar[tuple[str, ...]] = ()

    # -- batch shape ---------------------------------------------------------------------------
    @property
    def shape(self) -> tuple[int, ...]:
        """Batch shape: one curve per entry."""
        shapes = []
        for f in fields(self):
            arr = getattr(self, f.name)
            if arr is None:
                continue
            shapes.append(arr.shape[:-1] if f.name in self._trailing else arr.shape)
        return np.broadcast_shapes(*shapes)

    def __len__(self) -> int:
        shape = self.shape
        if not shape:
            raise TypeError("len() of a single (0-d) curve")
        return shape[0]

    def _map(self, fn) -> Curve:
        """A new curve of the same family with ``fn(array, trailing)`` applied to each field."""
        kwargs = {}
        for f in fields(self):
            arr = getattr(self, f.name)
            kwargs[f.name] = None if arr is None else fn(arr, f.name in self._trailing)
        return type(self)(**kwargs)

    def __getitem__(self, key) -> Curve:
        """The sub-batch ``key`` (indexes the batch axes, like a numpy array of shape ``shape``)."""
        shape = self.shape

        def take(arr, trailing):
            if trailing and arr.ndim == 1:
                return arr  # one table shared by the whole batch
            tail = arr.shape[-1:] if trailing else ()
            return np.broadcast_to(arr, shape + tail)[key]

        return self._map(take)

    def _flat(self, shape: tuple[int, ...]) -> Curve:
        """The batch broadcast to ``shape`` and flattened to one axis."""

        def flat(arr, trailing):
            if trailing and arr.ndim == 1:
                return arr  # one table shared by the whole batch
            tail = arr.shape[-1:] if trailing else ()
            return np.broadcast_to(arr, shape + tail).reshape(-1, *tail)

        return self._map(flat)

    # -- the contract --------------------------------------------------------------------------
    @abstractmethod
    def log_value(self, x) -> np.ndarray:
        """``ln P(x)`` (``-inf`` only where the family is exactly 0)."""

    @abstractmethod
    def force(self, x, gamma) -> np.ndarray:
        """Entropic force ``gamma d/dx ln P(x)``."""

    @abstractmethod
    def _crossings(self, threshold: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Lowest and highest price with ``P >= threshold`` (NaN where there is none)."""

    @abstractmethod
    def _span(self) -> tuple[np.ndarray, np.ndarray]:
        """A price interval holding all but a negligible part of the curve's mass."""

    @classmethod
    @abstractmethod
    def from_population(cls, mu, sigma, activity, role, **params) -> Curve:
        """Build a batch from population columns (each of shape ``(n,)``)."""

    def _own_role(self):
        return getattr(self, "role", None)

    def value(self, x) -> np.ndarray:
        """Acceptance probability ``P(x) = exp(log_value(x))`` in ``[0, 1]``.

        Parameters
        ----------
        x : array_like
            Prices (price units, finite), broadcast against the batch shape.

        Returns
        -------
        ndarray
            Probabilities, shape ``broadcast(x.shape, self.shape)``.
        """
        return np.exp(self.log_value(x))

    def energy(self, x0, x1, gamma) -> np.ndarray:
        """Energy to move the price from ``x0`` to ``x1``: ``-gamma (ln P(x1) - ln P(x0))``.

        Positive when moving to a less acceptable price; additive along a path.

        Parameters
        ----------
        x0, x1 : array_like
            Start and end prices (price units).
        gamma : array_like
            Energy scale (energy units, > 0).

        Returns
        -------
        ndarray
            Energy (energy units).

        References
        ----------
        .. [1] Entropic force ``F = T dS/dx`` with ``S = k ln P`` (standard statistical
           mechanics): the work against it is ``-kT ln(P(x1)/P(x0))``.
        """
        gamma = check_positive("gamma", gamma)
        lv1 = self.log_value(as_float_array("x1", x1))
        lv0 = self.log_value(as_float_array("x0", x0))
        with np.errstate(invalid="ignore"):  # NaN between two prices where P = 0
            return -gamma * (lv1 - lv0)

    def reservation_price(self, threshold=0.5, side=None) -> np.ndarray:
        """Price where the curve crosses ``threshold`` on the side that matters.

        For a buyer: the highest price accepted with probability ``>= threshold`` (the upper
        crossing). For a seller: the lowest such price (the lower crossing).

        Parameters
        ----------
        threshold : array_like
            Acceptance probability in ``(0, 1]`` (default 1/2).
        side : {"buyer", "seller"} or array_like of int, optional
            Roles (0 buyer, 1 seller) broadcasting with the batch. Default: the curve's own role
            (``role`` given at construction, or the logistic ``side``).

        Returns
        -------
        ndarray
            Prices (price units), NaN where the curve never reaches ``threshold`` (activity too
            low). A one-sided family asked for its open side gives ``+inf`` or ``-inf``.
        """
        threshold = check_unit_interval("threshold", threshold)
        if side is None:
            side = self._own_role()
            if side is None:
                raise ValueError(
                    "side must be 'buyer', 'seller' or an array of 0/1 roles: this curve has "
                    "no role of its own"
                )
        roles = _roles("side", side)
        lower, upper = self._crossings(threshold)
        is_buyer = roles == 0
        return np.where(is_buyer, upper, lower)

    def _x(self, x, name: str = "x") -> np.ndarray:
        return as_float_array(name, x)


# -- normal ------------------------------------------------------------------------------------
@dataclass(eq=False)
class NormalCurve(Curve):
    """Normal propensity curve ``P(x) = a exp(-(x - mu)**2 / (2 sigma**2))``.

    Parameters
    ----------
    mu : array_like
        Preferred price (price units): where the trader is most willing to trade.
    sigma : array_like
        Price uncertainty (price units, > 0).
    activity : array_like
        Height ``a`` in ``(0, 1]``.
    role : array_like of int or {"buyer", "seller"}, optional
        Role of each curve (0 buyer, 1 seller); the default side of :meth:`reservation_price`.

    Notes
    -----
    Force ``-gamma (x - mu) / sigma**2``: a linear spring of stiffness ``gamma / sigma**2``.
    Reservation price ``mu + sigma sqrt(2 ln(a / threshold))`` for a buyer, ``mu - ...`` for a
    seller.

    References
    ----------
    .. [1] P. A. Bromiley, "Products and Convolutions of Gaussian Probability Density
       Functions", Tina Memo 2003-003, University of Manchester.

    Examples
    --------
    >>> c = NormalCurve(mu=[100.0, 90.0], sigma=5.0, role=[0, 1])
    >>> c.value(100.0).round(4).tolist()
    [1.0, 0.1353]
    >>> c.reservation_price().round(3).tolist()
    [105.887, 84.113]
    """

    mu: Any
    sigma: Any
    activity: Any = 1.0
    role: Any = None

    description: ClassVar[str] = "normal curve a*exp(-(x-mu)^2/(2 sigma^2)) (the default family)"
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "A trader is its propensity curve: the probability of accepting a trade at each "
            "price, here a normal bell centred on the preferred price with the price "
            "uncertainty as its width."
        ),
    }

    def __post_init__(self) -> None:
        mu = as_float_array("mu", self.mu)
        sigma = check_positive("sigma", self.sigma)
        activity = check_unit_interval("activity", self.activity)
        arrays = [mu, sigma, activity]
        if self.role is not None:
            arrays.append(_roles("role", self.role))
        arrays = np.broadcast_arrays(*arrays)
        self.mu, self.sigma, self.activity = (np.array(a) for a in arrays[:3])
        self.role = np.array(arrays[3]) if self.role is not None else None

    @classmethod
    def from_population(cls, mu, sigma, activity, role, **params) -> NormalCurve:
        """Normal curves from population columns (no extra parameters)."""
        _unknown("normal", params)
        return cls(mu=mu, sigma=sigma, activity=activity, role=role)

    def log_value(self, x) -> np.ndarray:
        """``ln a - (x - mu)**2 / (2 sigma**2)``: finite however far out ``x`` is."""
        z = (self._x(x) - self.mu) / self.sigma
        return np.log(self.activity) - 0.5 * np.square(z)

    def force(self, x, gamma) -> np.ndarray:
        """``-gamma (x - mu) / sigma**2`` (a linear spring)."""
        gamma = check_positive("gamma", gamma)
        return -gamma * (self._x(x) - self.mu) / np.square(self.sigma)

    def _crossings(self, threshold):
        reach = self.activity >= threshold
        with np.errstate(invalid="ignore", divide="ignore"):
            half_width = self.sigma * np.sqrt(2.0 * np.log(self.activity / threshold))
        half_width = np.where(reach, half_width, np.nan)
        return self.mu - half_width, self.mu + half_width

    def _span(self):
        return self.mu - 9.0 * self.sigma, self.mu + 9.0 * self.sigma


# -- oscillator levels -------------------------------------------------------------------------
@dataclass(eq=False)
class OscillatorCurve(Curve):
    """Mixture of oscillator levels: ``P(x) = a sum_n w_n psi_n(xi)**2 / max``.

    ``xi = (x - mu) / (sqrt(2) sigma)``; ``psi_n`` are the normalised Hermite functions (see
    :mod:`propensim.agents.oscillator`); ``max`` is the mixture's largest value over all prices,
    so the curve's height is exactly ``a``. Level 0 alone is the normal curve. Every level's
    density is even in ``xi``, so the curve is symmetric about ``mu``.

    Parameters
    ----------
    mu : array_like
        Centre (price units).
    sigma : array_like
        Width of the ground state (price units, > 0).
    weights : array_like, shape (..., K + 1)
        Non-negative level weights, level axis last; normalised to sum 1 per curve.
    activity : array_like
        Height ``a`` in ``(0, 1]``.
    role : array_like of int or {"buyer", "seller"}, optional
        Role of each curve (0 buyer, 1 seller).

    Notes
    -----
    ``ln P`` is assembled from ``ln |psi_n|`` by a log-sum-exp over levels, so it stays finite
    far in the tails. The maximum is found per distinct weight vector on a dense grid in
    ``xi >= 0`` refined by golden-section search, and cached on the object. Reservation prices
    come from bisection on the outer side of the outermost maximum.

    References
    ----------
    .. [1] D. J. Griffiths, *Introduction to Quantum Mechanics*, section 2.3.2.
    """

    mu: Any
    sigma: Any
    weights: Any
    activity: Any = 1.0
    role: Any = None

    description: ClassVar[str] = "mixture of harmonic-oscillator levels sum w_n |psi_n|^2, height a"
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "Propensity curves as mixtures of harmonic-oscillator levels: the ground level is "
            "the normal curve, excited levels give heavier tails and several preferred "
            "prices."
        ),
    }
    _trailing: ClassVar[tuple[str, ...]] = ("weights",)

    def __post_init__(self) -> None:
        mu = as_float_array("mu", self.mu)
        sigma = check_positive("sigma", self.sigma)
        activity = check_unit_interval("activity", self.activity)
        weights = check_nonnegative("weights", self.weights)
        if weights.ndim == 0:
            raise ValueError("weights must have a level axis (shape (..., K+1)), got a scalar")
        total = weights.sum(axis=-1, keepdims=True)
        if np.any(total <= 0):
            raise ValueError("weights must have a positive sum for every curve, got all zeros")
        arrays = [mu, sigma, activity]
        if self.role is not None:
            arrays.append(_roles("role", self.role))
        shape = np.broadcast_shapes(*(a.shape for a in arrays), weights.shape[:-1])
        arrays = [np.array(np.broadcast_to(a, shape)) for a in arrays]
        self.mu, self.sigma, self.activity = arrays[:3]
        self.role = arrays[3] if self.role is not None else None
        self.weights = np.array(np.broadcast_to(weights / total, (*shape, weights.shape[-1])))

    @classmethod
    def from_population(cls, mu, sigma, activity, role, weights=None, **params):
        """Oscillator curves from population columns and ``weights`` of shape ``(n, K+1)``."""
        _unknown("oscillator", params)
        if weights is None:
            raise ValueError("weights is required for the oscillator curve family")
        return cls(mu=mu, sigma=sigma, weights=weights, activity=activity, role=role)

    @property
    def nmax(self) -> int:
        """Highest level ``K``."""
        return self.weights.shape[-1] - 1

    def _log_w(self, ndim: int) -> np.ndarray:
        """Log weights, level axis first, padded to broadcast against ``ndim``-d prices."""
        with np.errstate(divide="ignore"):
            log_w = np.moveaxis(np.log(self.weights), -1, 0)  # shape: (K+1, *batch)
        pad = (1,) * (ndim - (log_w.ndim - 1))
        return log_w.reshape(log_w.shape[0], *pad, *log_w.shape[1:])  # shape: (K+1, ..., *batch)

    @staticmethod
    def _log_mix(log_w: np.ndarray, xi: np.ndarray) -> np.ndarray:
        """``ln sum_n w_n psi_n(xi)**2`` for level-first log weights ``(K+1, ...)``.

        Fast path: the plain Hermite-function recurrence where ``|xi| <= 30`` (``psi_0 >= 1e-196``,
        no subnormals) and the mixture is not tiny; elsewhere the log-space recurrence of
        :func:`~propensim.agents.oscillator.log_hermite_functions`.
        """
        k = log_w.shape[0] - 1
        xi = np.asarray(xi, dtype=float)
        out_shape = np.broadcast_shapes(log_w.shape[1:], xi.shape)
        w = np.exp(log_w)
        psi_prev = np.zeros(xi.shape)
        psi = _PI_M14 * np.exp(-0.5 * np.square(np.minimum(np.abs(xi), 30.0)))
        total = w[0] * np.square(psi)  # shape: out_shape
        for n in range(k):
            psi_prev, psi = (
                psi,
                (math.sqrt(2.0 / (n + 1)) * xi * psi - math.sqrt(n / (n + 1)) * psi_prev),
            )
            total = total + w[n + 1] * np.square(psi)
        total = np.broadcast_to(total, out_shape)
        with np.errstate(divide="ignore"):
            out = np.log(total)
        slow = (np.broadcast_to(np.abs(xi), out_shape) > 30.0) | ~(total > 1e-280)
        if np.any(slow):
            lw = np.broadcast_to(log_w, (k + 1, *out_shape))[:, slow]  # shape: (K+1, n_slow)
            xs = np.broadcast_to(xi, out_shape)[slow]
            log_psi, _ = log_hermite_functions(k, xs)
            out = np.array(out)
            out[slow] = _logsumexp0(lw + 2.0 * log_psi)
        return out

    @cached_property
    def _peak(self) -> tuple[np.ndarray, np.ndarray]:
        """``(ln max S, xi at the outermost maximum)`` per curve, batch shape."""
        rows = self.weights.reshape(-1, self.nmax + 1)  # shape: (B, K+1)
        uniq, inverse = np.unique(rows, axis=0, return_inverse=True)
        log_max, xi_max = _mixture_peak(uniq)
        inverse = inverse.reshape(-1)
        return log_max[inverse].reshape(self.shape), xi_max[inverse].reshape(self.shape)

    def log_value(self, x) -> np.ndarray:
        """``ln a + ln S(xi) - ln max S`` with ``S = sum_n w_n psi_n(xi)**2``."""
        xi = (self._x(x) - self.mu) / (_SQRT2 * self.sigma)
        log_max, _ = self._peak
        return np.log(self.activity) + self._log_mix(self._log_w(xi.ndim), xi) - log_max

    def force(self, x, gamma) -> np.ndarray:
        """``gamma d/dx ln S`` from ``psi_n' = sqrt(2n) psi_{n-1} - xi psi_n``.

        ``d ln S / d xi = -2 xi + 2 sum_n w_n sqrt(2n) psi_n psi_{n-1} / S``, divided by
        ``sqrt(2) sigma``; each term is formed in log space. NaN exactly at a zero of ``S``.
        """
        gamma = check_positive("gamma", gamma)
        xi = (self._x(x) - self.mu) / (_SQRT2 * self.sigma)
        log_w = self._log_w(xi.ndim)  # shape: (K+1, *xi.shape) after broadcasting
        k = log_w.shape[0] - 1
        log_psi, sign = log_hermite_functions(k, xi)  # shape: (K+1, *xi.shape)
        log_s = _logsumexp0(log_w + 2.0 * log_psi)
        if k == 0:
            ratio = np.zeros_like(log_s)
        else:
            levels = np.arange(1, k + 1).reshape(-1, *([1] * (log_psi.ndim - 1)))
            log_terms = log_w[1:] + 0.5 * np.log(2.0 * levels) + log_psi[1:] + log_psi[:-1]
            with np.errstate(invalid="ignore"):
                ratio = np.sum(sign[1:] * sign[:-1] * np.exp(log_terms - log_s), axis=0)
        dlog_dxi = -2.0 * xi + 2.0 * ratio
        return gamma * dlog_dxi / (_SQRT2 * self.sigma)

    def _crossings(self, threshold):
        _, xi_max = self._peak
        target = threshold / self.activity  # fraction of the maximum to reach
        shape = np.broadcast_shapes(self.shape, np.shape(target))
        target = np.broadcast_to(target, shape).reshape(-1)
        reach = target <= 1.0  # shape: (B,)
        rows = np.concatenate(
            [
                np.broadcast_to(self.weights, (*shape, self.nmax + 1)).reshape(-1, self.nmax + 1),
                np.broadcast_to(xi_max, shape).reshape(-1, 1),
                np.log(np.minimum(target, 1.0))[:, None],
            ],
            axis=1,
        )  # shape: (B, K+3): weights, xi of the maximum, log target
        xi_c = np.full(target.shape, np.nan)
        if np.any(reach):
            uniq, inverse = np.unique(rows[reach], axis=0, return_inverse=True)
            xi_c[reach] = _outer_crossing(uniq)[inverse.reshape(-1)]
        half_width = _SQRT2 * self.sigma * xi_c.reshape(shape)
        return self.mu - half_width, self.mu + half_width

    def _span(self):
        half = _SQRT2 * self.sigma * (math.sqrt(2 * self.nmax + 1) + 7.0)
        return self.mu - half, self.mu + half


def _chunks(n_rows: int, n_points: int):
    step = max(1, _CHUNK_CELLS // max(n_points, 1))
    for start in range(0, n_rows, step):
        yield slice(start, min(start + step, n_rows))


def _mixture_peak(weights: np.ndarray, points: int = 1025) -> tuple[np.ndarray, np.ndarray]:
    """Largest value of ``ln S(xi)`` and where (outermost, ``xi >= 0``) for rows of weights.

    A dense grid on ``[0, sqrt(2K+1) + 4]`` (the mixture is even and every level has decayed
    beyond its classical turning point ``sqrt(2n+1)``), then golden-section search in the two
    cells around the grid maximum.
    """
    n_rows, n_levels = weights.shape
    with np.errstate(divide="ignore"):
        log_w = np.log(weights).T  # shape: (K+1, U)
    top = math.sqrt(2 * n_levels - 1) + 4.0
    grid = np.linspace(0.0, top, points)  # shape: (G,)
    h = grid[1] - grid[0]
    log_max = np.empty(n_rows)
    xi_max = np.empty(n_rows)
    for part in _chunks(n_rows, points):
        lw = log_w[:, part]  # shape: (K+1, U_chunk)
        vals = OscillatorCurve._log_mix(lw[:, None, :], grid[:, None])  # shape: (G, U_chunk)
        # outermost grid maximum: argmax of the reversed column
        i = points - 1 - np.argmax(vals[::-1], axis=0)  # shape: (U_chunk,)
        a = np.maximum(grid[i] - h, 0.0)
        b = np.minimum(grid[i] + h, top)
        best_x = grid[i]
        best_v = vals[i, np.arange(vals.shape[1])]
        ratio = (math.sqrt(5.0) - 1.0) / 2.0
        # golden section, one new evaluation per step: the bracket (2 cells, ~0.03 wide)
        # shrinks by 0.618 per step, to ~1e-9 after 45 steps; S is flat to O(dxi^2) there.
        c = b - ratio * (b - a)
        d = a + ratio * (b - a)
        fc = OscillatorCurve._log_mix(lw, c)
        fd = OscillatorCurve._log_mix(lw, d)
        for _ in range(45):
            left = fc >= fd  # the maximum lies in [a, d]
            b = np.where(left, d, b)
            a = np.where(left, a, c)
            new = np.where(left, b - ratio * (b - a), a + ratio * (b - a))
            f_new = OscillatorCurve._log_mix(lw, new)
            c, d = np.where(left, new, d), np.where(left, c, new)
            fc, fd = np.where(left, f_new, fd), np.where(left, fc, f_new)
        mid = 0.5 * (a + b)
        fm = OscillatorCurve._log_mix(lw, mid)
        better = fm > best_v
        log_max[part] = np.where(better, fm, best_v)
        xi_max[part] = np.where(better, mid, best_x)
    return log_max, xi_max


def _outer_crossing(rows: np.ndarray, points: int = 257) -> np.ndarray:
    """Largest ``xi`` with ``S(xi) / max S >= target`` for rows ``[weights..., xi_max, ln target]``.

    Searches outward from the outermost maximum (where the ratio is 1 >= target): a grid that is
    widened until its far end is below the target, then bisection in the last cell above it.
    """
    weights = rows[:, :-2]
    xi_max = rows[:, -2]
    log_target = rows[:, -1]
    n_levels = weights.shape[1]
    with np.errstate(divide="ignore"):
        log_w = np.log(weights).T  # shape: (K+1, U)
    log_max = OscillatorCurve._log_mix(log_w, xi_max)  # shape: (U,)
    out = np.empty(rows.shape[0])
    t = np.linspace(0.0, 1.0, points)[:, None]  # shape: (G, 1)
    for part in _chunks(rows.shape[0], points):
        lw = log_w[:, part]
        x0 = xi_max[part]
        lt = log_target[part]
        lm = log_max[part]
        width = math.sqrt(2 * n_levels - 1) + np.sqrt(-lt) + 4.0  # shape: (U_chunk,)
        for _ in range(60):
            far = OscillatorCurve._log_mix(lw, x0 + width) - lm
            short = far >= lt
            if not np.any(short):
                break
            width = np.where(short, 2.0 * width, width)
        xs = x0 + width * t  # shape: (G, U_chunk)
        above = (OscillatorCurve._log_mix(lw[:, None, :], xs) - lm) >= lt  # shape: (G, U_chunk)
        above[0] = True  # the maximum itself reaches any target <= 1
        i = points - 1 - np.argmax(above[::-1], axis=0)
        i = np.minimum(i, points - 2)
        cols = np.arange(xs.shape[1])
        a = xs[i, cols]
        b = xs[i + 1, cols]
        for _ in range(56):  # bisection: a stays above the target, b below (cell / 2**56)
            m = 0.5 * (a + b)
            up = (OscillatorCurve._log_mix(lw, m) - lm) >= lt
            a = np.where(up, m, a)
            b = np.where(up, b, m)
        out[part] = a
    return out


# -- logistic ----------------------------------------------------------------------------------
@dataclass(eq=False)
class LogisticCurve(Curve):
    """One-sided logistic curve: a smoothed reservation price.

    Buyer: ``P(x) = a / (1 + exp((x - mu) / tau))`` (accepts low prices); seller:
    ``P(x) = a / (1 + exp(-(x - mu) / tau))`` (accepts high prices). As ``tau -> 0`` the curve
    becomes the step of a classical reservation price at ``mu``: with ``a = 1`` and threshold 1/2
    the reservation price is exactly ``mu`` for any ``tau``.

    Parameters
    ----------
    mu : array_like
        Midpoint (price units): the price accepted with probability ``a / 2``.
    tau : array_like
        Softness (price units, > 0).
    side : {"buyer", "seller"} or array_like of int
        Which way the curve faces (0 buyer, 1 seller); also its role.
    activity : array_like
        Height ``a`` in ``(0, 1]``.

    Notes
    -----
    ``ln P = ln a - log(1 + exp(+-(x - mu)/tau))`` by ``numpy.logaddexp``; force
    ``-+ (gamma / tau) expit(+-(x - mu)/tau)``. The reservation price on the curve's own side is
    ``mu +- tau ln(a / threshold - 1)`` (NaN unless ``a > threshold``); its open side gives
    ``-inf`` (buyer curve, seller side) or ``+inf`` (seller curve, buyer side).

    References
    ----------
    .. [1] The logistic (Fermi) acceptance function; common practice in discrete-choice models.
    """

    mu: Any
    tau: Any
    side: Any
    activity: Any = 1.0

    description: ClassVar[str] = (
        "one-sided logistic step; tau -> 0 is a classical reservation price"
    )
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "A one-sided propensity curve: a buyer accepts low prices, a seller high ones, "
            "with a logistic fall-off of width tau."
        ),
    }

    def __post_init__(self) -> None:
        mu = as_float_array("mu", self.mu)
        tau = check_positive("tau", self.tau)
        activity = check_unit_interval("activity", self.activity)
        side = _roles("side", self.side)
        arrays = np.broadcast_arrays(mu, tau, activity, side)
        self.mu, self.tau, self.activity, self.side = (np.array(a) for a in arrays)

    @classmethod
    def from_population(cls, mu, sigma, activity, role, tau=None, **params):
        """Logistic curves facing each trader's role; ``tau`` defaults to ``sigma``."""
        _unknown("logistic", params)
        return cls(mu=mu, tau=sigma if tau is None else tau, side=role, activity=activity)

    def _own_role(self):
        return self.side

    def _z(self, x) -> np.ndarray:
        direction = np.where(self.side == 0, 1.0, -1.0)  # +1 buyer, -1 seller
        return direction * (self._x(x) - self.mu) / self.tau

    def log_value(self, x) -> np.ndarray:
        """``ln a - logaddexp(0, z)`` with ``z = +-(x - mu) / tau``."""
        return np.log(self.activity) - np.logaddexp(0.0, self._z(x))

    def force(self, x, gamma) -> np.ndarray:
        """``-(gamma / tau) expit(z)`` for a buyer, ``+(gamma / tau) expit(z)`` for a seller."""
        gamma = check_positive("gamma", gamma)
        z = self._z(x)
        expit = np.exp(-np.logaddexp(0.0, -z))  # 1 / (1 + exp(-z)) without overflow
        direction = np.where(self.side == 0, 1.0, -1.0)
        return -gamma * direction * expit / self.tau

    def _crossings(self, threshold):
        reach = self.activity > threshold
        with np.errstate(invalid="ignore", divide="ignore"):
            shift = self.tau * (np.log(self.activity - threshold) - np.log(threshold))
        shift = np.where(reach, shift, np.nan)
        is_buyer = self.side == 0
        upper = np.where(is_buyer, self.mu + shift, np.where(reach, np.inf, np.nan))
        lower = np.where(is_buyer, np.where(reach, -np.inf, np.nan), self.mu - shift)
        return lower, upper

    def _span(self):
        return self.mu - 40.0 * self.tau, self.mu + 40.0 * self.tau


# -- tabulated ---------------------------------------------------------------------------------
@dataclass(eq=False)
class TabulatedCurve(Curve):
    """Curve given by values on an increasing price grid, linear in between, 0 outside.

    Parameters
    ----------
    grid : array_like, shape (G,) or (..., G)
        Strictly increasing prices (price units), ``G >= 2``; one grid may serve the whole batch.
    values : array_like, shape (..., G)
        ``P`` at the grid points, in ``[0, 1]``.
    role : array_like of int or {"buyer", "seller"}, optional
        Role of each curve (0 buyer, 1 seller).

    Notes
    -----
    The *values* (not their logs) are interpolated linearly, so zeros in the table are allowed
    and the curve never exceeds its largest tabulated value. Outside ``[grid[0], grid[-1]]`` the
    curve is 0 (``log_value = -inf``): a trader never accepts a price it has no entry for. The
    force is ``gamma`` times the interpolant's slope over its value inside the grid, and 0 where
    the curve is 0. Reservation prices are exact crossings of the interpolant.

    :meth:`from_population` reads ``grid`` in standard units ``z = (x - mu) / sigma`` and scales
    ``values`` by ``activity``, so drifting ``mu`` and ``sigma`` move and stretch the table.

    References
    ----------
    .. [1] Piecewise-linear interpolation; common practice, no source.
    """

    grid: Any
    values: Any
    role: Any = None

    description: ClassVar[str] = "values on a price grid, linearly interpolated, zero outside"
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "A propensity curve given as values on a price grid (input data), linearly "
            "interpolated."
        ),
    }
    _trailing: ClassVar[tuple[str, ...]] = ("grid", "values")

    def __post_init__(self) -> None:
        grid = as_float_array("grid", self.grid)
        values = as_float_array("values", self.values)
        if grid.ndim == 0 or grid.shape[-1] < 2:
            raise ValueError("grid must have at least 2 points along its last axis")
        if np.any(np.diff(grid, axis=-1) <= 0):
            raise ValueError("grid must be strictly increasing along its last axis")
        if values.ndim == 0 or values.shape[-1] != grid.shape[-1]:
            raise ValueError(
                f"values must have {grid.shape[-1]} entries along its last axis (one per grid "
                f"point), got shape {values.shape}"
            )
        if np.any((values < 0) | (values > 1)):
            raise ValueError("values must be in [0, 1]")
        shapes = [grid.shape[:-1], values.shape[:-1]]
        if self.role is not None:
            role = _roles("role", self.role)
            shapes.append(role.shape)
        shape = np.broadcast_shapes(*shapes)
        self.grid = (
            grid if grid.ndim == 1 else np.array(np.broadcast_to(grid, (*shape, grid.shape[-1])))
        )
        self.values = np.array(np.broadcast_to(values, (*shape, values.shape[-1])))
        self.role = None if self.role is None else np.array(np.broadcast_to(role, shape))

    @classmethod
    def from_population(cls, mu, sigma, activity, role, values=None, grid=None, **params):
        """Tables from population columns: ``grid`` (standard units) and ``values``, each (n, G).

        Prices are ``mu + sigma * grid`` and heights ``activity * values``.
        """
        _unknown("tabulated", params)
        if values is None or grid is None:
            raise ValueError("grid and values are required for the tabulated curve family")
        mu = as_float_array("mu", mu)[..., None]
        sigma = check_positive("sigma", sigma)[..., None]
        activity = check_unit_interval("activity", activity)[..., None]
        return cls(
            grid=mu + sigma * as_float_array("grid", grid),
            values=activity * as_float_array("values", values),
            role=role,
        )

    def _cell(self, x):
        """Interpolation pieces at ``x``: left value, slope, offset, and the inside mask."""
        x = self._x(x)
        out_shape = np.broadcast_shapes(x.shape, self.shape)
        x = np.broadcast_to(x, out_shape)
        g = self.grid.shape[-1]
        grid = np.broadcast_to(self.grid, (*out_shape, g))  # shape: (*out, G)
        if self.grid.ndim == 1:
            i = np.searchsorted(self.grid, x, side="right") - 1
        else:
            i = np.sum(grid <= x[..., None], axis=-1) - 1
        inside = (x >= grid[..., 0]) & (x <= grid[..., -1])  # shape: out
        i = np.clip(i, 0, g - 2)[..., None]
        values = np.broadcast_to(self.values, (*out_shape, g))
        g0 = np.take_along_axis(grid, i, axis=-1)[..., 0]
        g1 = np.take_along_axis(grid, i + 1, axis=-1)[..., 0]
        v0 = np.take_along_axis(values, i, axis=-1)[..., 0]
        v1 = np.take_along_axis(values, i + 1, axis=-1)[..., 0]
        slope = (v1 - v0) / (g1 - g0)
        return v0, slope, x - g0, inside

    def value(self, x) -> np.ndarray:
        """Linear interpolation of the table; 0 outside the grid."""
        v0, slope, dx, inside = self._cell(x)
        return np.where(inside, np.clip(v0 + slope * dx, 0.0, 1.0), 0.0)

    def log_value(self, x) -> np.ndarray:
        """``ln`` of :meth:`value` (``-inf`` where the curve is 0)."""
        with np.errstate(divide="ignore"):
            return np.log(self.value(x))

    def force(self, x, gamma) -> np.ndarray:
        """``gamma * slope / P`` inside the grid where ``P > 0``; 0 elsewhere."""
        gamma = check_positive("gamma", gamma)
        v0, slope, dx, inside = self._cell(x)
        p = v0 + slope * dx
        positive = inside & (p > 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            return gamma * np.where(positive, slope / np.where(positive, p, 1.0), 0.0)

    def _crossings(self, threshold):
        shape = np.broadcast_shapes(self.shape, np.shape(threshold))
        g = self.values.shape[-1]
        values = np.broadcast_to(self.values, (*shape, g))
        grid = np.broadcast_to(self.grid, (*shape, g))
        c = np.broadcast_to(threshold, shape)[..., None]  # shape: (*shape, 1)
        above = values >= c  # shape: (*shape, G)
        reach = np.any(above, axis=-1)
        # highest price: the last grid point above, then down the next cell's slope
        last = g - 1 - np.argmax(above[..., ::-1], axis=-1)
        nxt = np.minimum(last + 1, g - 1)
        hi = _interp_cross(grid, values, last, nxt, c[..., 0])
        # lowest price: the first grid point above, then back along the previous cell
        first = np.argmax(above, axis=-1)
        prv = np.maximum(first - 1, 0)
        lo = _interp_cross(grid, values, first, prv, c[..., 0])
        return np.where(reach, lo, np.nan), np.where(reach, hi, np.nan)

    def _span(self):
        shape = self.shape
        return (
            np.broadcast_to(self.grid[..., 0], shape),
            np.broadcast_to(self.grid[..., -1], shape),
        )


def _interp_cross(grid, values, inner, outer, c):
    """Where the segment from grid point ``inner`` (value >= c) to ``outer`` falls to ``c``."""
    gi = np.take_along_axis(grid, inner[..., None], axis=-1)[..., 0]
    go = np.take_along_axis(grid, outer[..., None], axis=-1)[..., 0]
    vi = np.take_along_axis(values, inner[..., None], axis=-1)[..., 0]
    vo = np.take_along_axis(values, outer[..., None], axis=-1)[..., 0]
    crossing = (vo < c) & (vi > vo)  # else the table ends above c: the end point is the answer
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(crossing, (vi - c) / (vi - vo), 0.0)
    return gi + frac * (go - gi)


#: Built-in families by the names they are registered under (``propensim.curves``).
_BUILT_IN_FAMILIES = {
    "normal": NormalCurve,
    "oscillator": OscillatorCurve,
    "logistic": LogisticCurve,
    "tabulated": TabulatedCurve,
}
#: Finds a family by name beyond the built-ins; the plugin registry installs itself here when
#: imported, so third-party families resolve without this layer importing any other.
_family_resolver = None


def set_family_resolver(resolver) -> None:
    """Install ``resolver(name) -> family class`` for names that are not built in."""
    global _family_resolver
    _family_resolver = resolver


def curve_family(name: str):
    """The curve family class registered as ``name`` (built-in, or through the resolver)."""
    if _family_resolver is not None:
        return _family_resolver(name)
    try:
        return _BUILT_IN_FAMILIES[name]
    except KeyError:
        known = ", ".join(sorted(_BUILT_IN_FAMILIES))
        raise ValueError(f"unknown curve family {name!r}; known: {known}") from None
