"""Price-change distributions: oscillator-level mixtures against the normal and the Student-t.

A return series ``r_1 .. r_n`` (log returns, ``r_t = ln(p_t / p_{t-1})``) is fitted by maximum
likelihood, each return taken as an independent draw from one law:

==================  ==========================================================  ==============
model               density                                                     parameters
==================  ==========================================================  ==============
``oscillator 0..k``  ``sum_n w_n psi_n(xi)**2 / (sqrt(2) sigma)``, n = 0..k        mu, sigma, w_n
``thermal 0..K``     the same with Boltzmann weights ``w_n ~ exp(-2 n / T)``          mu, sigma, T
``normal``           ``N(mu, sigma**2)``                                             mu, sigma
``student-t``        location-scale t                                                loc, scale, df
==================  ==========================================================  ==============

``xi = (r - mu) / (sqrt(2) sigma)``; ``psi_n`` are the harmonic-oscillator levels of
:mod:`propensim.agents.oscillator`: level 0 is the normal law of variance ``sigma**2``, level
``n`` has variance ``(2n + 1) sigma**2``. The mixture weights live on the simplex through a
softmax. ``T`` is the temperature in units of the curve's energy scale ``gamma`` (levels are
``2 gamma`` apart). With all levels the Boltzmann mixture would be exactly normal (of variance
``sigma**2 coth(1 / T)``) and add nothing; cut at level ``K`` it is a one-parameter family between
the ground state (``T -> 0``) and equal weights (``T -> inf``).

Fits are reproducible: several starts (the first deterministic, the rest from a seeded
generator), an exact gradient, L-BFGS-B; the best start is checked (optimiser success and a small
gradient) and the number of starts that reached the same maximum is reported. Standard errors come
from the observed information (numerical Hessian of the exact gradient), mapped to the reported
parameters by the delta method.

References
----------
.. [1] D. J. Griffiths, *Introduction to Quantum Mechanics*, section 2.3.2 (``psi_n``).
.. [2] R. P. Feynman, *Statistical Mechanics* (1972), eq. 2.84 (the thermal mixture is normal).
.. [3] R. Cont, "Empirical properties of asset returns: stylized facts and statistical issues",
   Quantitative Finance 1(2):223-236 (2001) (heavy tails of returns).
.. [4] H. Akaike (1974), IEEE Trans. Autom. Control 19:716 (AIC); G. Schwarz (1978), Ann.
   Statist. 6:461 (BIC).
"""

from __future__ import annotations

import math
import time
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from propensim.experiments.calibrate_base import (
    Z95,
    CalibrationError,
    caution,
    covariance,
    observed_information,
    read_frame,
    write_folder,
)

__all__ = ["ModelFit", "ReturnsFit", "fit_returns", "load_series", "mixture_cdf"]

#: Highest level ``K`` a mixture may use.
MAX_LEVEL = 8
#: Observations needed per parameter of the largest model (a rule of thumb: common practice,
#: no source).
PER_PARAMETER = 10
#: Default seed of the starting points (any fixed number: reruns give the same fits).
DEFAULT_SEED = 20261202
#: Two starts "agree" if their maximised log-likelihoods differ by less than this.
AGREE_TOL = 1e-6
#: Largest |gradient| of the mean log-likelihood (standardised units) accepted as converged.
GRAD_TOL = 1e-5
#: A level weight below this is at the edge of the simplex (reported without a standard error).
EDGE_WEIGHT = 1e-4

_SQRT2 = math.sqrt(2.0)
_LOG_SQRT2 = 0.5 * math.log(2.0)


# -- data ----------------------------------------------------------------------------------
def load_series(data, column: str, *, returns: bool = False) -> tuple[np.ndarray, dict[str, Any]]:
    """Read one column of a CSV or Parquet file (or a DataFrame) and return log returns.

    Parameters
    ----------
    data : str, Path or pandas.DataFrame
        A ``.csv`` or ``.parquet`` file, or a table already in memory.
    column : str
        The column holding prices (default) or returns (``returns=True``).
    returns : bool
        The column already holds log returns; they are used as they are.

    Returns
    -------
    (ndarray, dict)
        The log returns, and a description of the source (file, column, rows, sha256).

    Raises
    ------
    CalibrationError
        Unreadable file, no such column, missing, non-numeric or (prices) non-positive values.
    """
    import pandas as pd

    info: dict[str, Any] = {"column": column, "input": "returns" if returns else "prices"}
    frame, src = read_frame(data)
    info.update(src)
    if column not in frame.columns:
        known = ", ".join(map(str, frame.columns[:12])) + (", ..." if frame.shape[1] > 12 else "")
        raise CalibrationError(f"--column {column!r}: no such column; the data has: {known}")
    raw = frame[column]
    values = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(values)
    what = "return" if returns else "price"
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise CalibrationError(
            f"--column {column!r}: missing or non-numeric {what} in data row {i + 1} "
            f"({str(raw.iloc[i])!r}; {int(bad.sum())} such rows)"
        )
    info["rows"] = int(values.size)
    if returns:
        r = values
    else:
        nonpos = values <= 0
        if nonpos.any():
            i = int(np.flatnonzero(nonpos)[0])
            raise CalibrationError(
                f"--column {column!r}: non-positive price {values[i]:g} in data row {i + 1} "
                f"({int(nonpos.sum())} such rows); log returns need prices > 0"
            )
        r = np.diff(np.log(values))
    return r, info


# -- the densities -------------------------------------------------------------------------
def _scaled_psi(nmax: int, xi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``psi_0..psi_nmax`` at ``xi`` divided by a common per-point factor ``exp(c)``.

    Ratios of sums of products of levels are unchanged by the factor, and nothing underflows.
    """
    from propensim.agents.oscillator import log_hermite_functions

    log_abs, sign = log_hermite_functions(nmax, xi)  # shape: (nmax+1, n)
    c = np.max(log_abs, axis=0)  # shape: (n,); finite: neighbouring levels share no zero
    return sign * np.exp(log_abs - c), c


def _mixture_terms(z, mu, log_s, logits, want_grad: bool):
    """Log-density of a level mixture at ``z`` and, optionally, its derivatives.

    Returns ``logf`` (n,), and with ``want_grad`` the derivatives of ``logf`` with respect to
    ``mu`` and ``log sigma`` (n,) each, and the responsibilities minus weights (k+1, n).
    """
    k = logits.size - 1
    s = math.exp(log_s)
    xi = (z - mu) / (_SQRT2 * s)
    ps, c = _scaled_psi(k + 1 if want_grad else k, xi)  # shape: (k+2, n) or (k+1, n)
    log_w = logits - np.logaddexp.reduce(logits)
    w = np.exp(log_w)[:, None]  # shape: (k+1, 1)
    sq = w * np.square(ps[: k + 1])  # shape: (k+1, n); w_n psi_n**2 (scaled)
    total = sq.sum(axis=0)  # shape: (n,)
    logf = np.log(total) + 2.0 * c - _LOG_SQRT2 - log_s
    if not want_grad:
        return logf, None, None, None
    n_idx = np.arange(k + 1)[:, None]
    # psi_n' = sqrt(n/2) psi_{n-1} - sqrt((n+1)/2) psi_{n+1}  (Griffiths 2.3.2, ladder operators)
    lower = np.vstack([np.zeros_like(ps[:1]), ps[:k]])  # psi_{n-1}, shape: (k+1, n)
    dps = np.sqrt(n_idx / 2.0) * lower - np.sqrt((n_idx + 1) / 2.0) * ps[1 : k + 2]
    dlog_dxi = (2.0 * w * ps[: k + 1] * dps).sum(axis=0) / total  # shape: (n,)
    d_mu = -dlog_dxi / (_SQRT2 * s)
    d_logs = -dlog_dxi * xi - 1.0
    resp_minus_w = sq / total - w  # shape: (k+1, n); d logf / d logit_n
    return logf, d_mu, d_logs, resp_minus_w


def mixture_cdf(x, mu: float, sigma: float, weights) -> np.ndarray:
    """Distribution function of an oscillator-level mixture, exact.

    Uses ``F_n(xi) = F_{n-1}(xi) - psi_n(xi) psi_{n-1}(xi) / sqrt(2 n)`` with
    ``F_0(xi) = erfc(-xi) / 2``, which follows from the ladder relations of the levels
    (``d/dxi (psi_n psi_{n-1}) = sqrt(2 n) (psi_{n-1}**2 - psi_n**2)``; derived here, checked
    against numerical integration in the tests).

    Parameters
    ----------
    x : array_like
        Points (price-change units).
    mu, sigma : float
        Centre and ground-state width.
    weights : array_like, shape (k+1,)
        Level weights (sum 1).
    """
    from scipy.special import erfc

    from propensim.agents.oscillator import hermite_functions

    w = np.asarray(weights, dtype=float)
    xi = (np.asarray(x, dtype=float) - mu) / (_SQRT2 * sigma)
    psi = hermite_functions(w.size - 1, xi)  # shape: (k+1, *x.shape)
    f = 0.5 * erfc(-xi)
    out = w[0] * f
    for n in range(1, w.size):
        f = f - psi[n] * psi[n - 1] / math.sqrt(2.0 * n)
        out = out + w[n] * f
    return np.clip(out, 0.0, 1.0)


# -- the models ----------------------------------------------------------------------------
class _Model:
    """One model: unconstrained parameters ``theta`` on standardised data ``z``."""

    name: str
    n_theta: int
    names: tuple[str, ...]

    def loglik(self, theta, z) -> float:  # pragma: no cover - abstract
        raise NotImplementedError

    def grad(self, theta, z) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def starts(self, rng, n: int) -> list[np.ndarray]:  # pragma: no cover - abstract
        raise NotImplementedError

    def bounds(self) -> list[tuple[float, float]]:  # pragma: no cover - abstract
        raise NotImplementedError

    def natural(self, theta, m: float, s0: float) -> tuple[np.ndarray, np.ndarray]:
        """Reported parameters (original units) and their Jacobian with respect to theta."""
        raise NotImplementedError  # pragma: no cover

    def at_edge(self, theta, interior) -> tuple[np.ndarray, list[str]]:
        """Which theta are at the edge of the parameter space, and the reported names hit."""
        edge = ~interior
        return edge, [self.names[i] for i in np.flatnonzero(edge)]

    def cdf(self, params: dict[str, float]):  # pragma: no cover - abstract
        raise NotImplementedError

    def pdf(self, params: dict[str, float], x):  # pragma: no cover - abstract
        raise NotImplementedError


class _Mixture(_Model):
    """Levels 0..k with free weights (softmax logits, the ground state's fixed at 0)."""

    def __init__(self, k: int) -> None:
        self.k = k
        self.name = f"oscillator 0..{k}"
        self.n_theta = 2 + k
        self.names = ("mu", "sigma", *(f"w{n}" for n in range(k + 1)))

    def _logits(self, theta):
        return np.concatenate([[0.0], theta[2:]])

    def loglik(self, theta, z):
        logf, *_ = _mixture_terms(z, theta[0], theta[1], self._logits(theta), False)
        return float(logf.sum())

    def grad(self, theta, z):
        _, d_mu, d_logs, rmw = _mixture_terms(z, theta[0], theta[1], self._logits(theta), True)
        return np.concatenate([[d_mu.sum(), d_logs.sum()], rmw[1:].sum(axis=1)])

    def starts(self, rng, n):
        first = np.concatenate([[0.0, math.log(0.6)], np.zeros(self.k)])
        out = [first]
        for _ in range(n - 1):
            out.append(
                np.concatenate(
                    [
                        [rng.normal(0.0, 0.1), math.log(rng.uniform(0.25, 1.0))],
                        rng.normal(0.0, 1.5, self.k),
                    ]
                )
            )
        return out

    def bounds(self):
        return [(-5.0, 5.0), (-8.0, 3.0)] + [(-30.0, 30.0)] * self.k

    def weights(self, theta):
        a = self._logits(theta)
        return np.exp(a - np.logaddexp.reduce(a))

    def natural(self, theta, m, s0):
        w = self.weights(theta)
        s = math.exp(theta[1])
        values = np.concatenate([[m + s0 * theta[0], s0 * s], w])
        jac = np.zeros((len(values), self.n_theta))
        jac[0, 0] = s0
        jac[1, 1] = s0 * s
        # d w_i / d a_j = w_i (delta_ij - w_j), for the free logits j = 1..k
        dw = np.diag(w) - np.outer(w, w)
        jac[2:, 2:] = dw[:, 1:]
        return values, jac

    def at_edge(self, theta, interior):
        w = self.weights(theta)
        edge = ~interior
        edge[2:] |= w[1:] < EDGE_WEIGHT
        names = [f"w{j}" for j in range(1, self.k + 1) if edge[1 + j]]
        names += [self.names[i] for i in np.flatnonzero(edge[:2])]
        return edge, names

    def _w(self, p):
        return np.array([p[f"w{n}"] for n in range(self.k + 1)])

    def cdf(self, p):
        return lambda x: mixture_cdf(x, p["mu"], p["sigma"], self._w(p))

    def pdf(self, p, x):
        from propensim.agents.oscillator import oscillator_density

        w = self._w(p)
        return sum(w[n] * oscillator_density(n, x, p["mu"], p["sigma"]) for n in range(w.size))


class _Thermal(_Mixture):
    """Levels 0..k with Boltzmann weights ``exp(-2 n / T)``; theta = (mu, log sigma, log T)."""

    def __init__(self, k: int) -> None:
        super().__init__(k)
        self.name = f"thermal 0..{k}"
        self.n_theta = 3
        self.names = ("mu", "sigma", "temperature")

    def _logits(self, theta):
        return -2.0 * np.arange(self.k + 1) / math.exp(theta[2])

    def grad(self, theta, z):
        _, d_mu, d_logs, rmw = _mixture_terms(z, theta[0], theta[1], self._logits(theta), True)
        temp = math.exp(theta[2])
        da = 2.0 * np.arange(self.k + 1) / temp  # d logit_n / d log T
        return np.array([d_mu.sum(), d_logs.sum(), float(da @ rmw.sum(axis=1))])

    def starts(self, rng, n):
        out = [np.array([0.0, math.log(0.6), 0.0])]
        for _ in range(n - 1):
            out.append(
                np.array(
                    [
                        rng.normal(0.0, 0.1),
                        math.log(rng.uniform(0.25, 1.0)),
                        rng.normal(0.0, 1.0),
                    ]
                )
            )
        return out

    def bounds(self):
        return [(-5.0, 5.0), (-8.0, 3.0), (-6.0, 8.0)]

    def natural(self, theta, m, s0):
        s, temp = math.exp(theta[1]), math.exp(theta[2])
        values = np.array([m + s0 * theta[0], s0 * s, temp])
        return values, np.diag([s0, s0 * s, temp])

    def at_edge(self, theta, interior):
        edge = ~interior
        # T -> 0 is the ground state: below this, every excited weight is negligible
        edge[2] |= self.weights(theta)[1] < EDGE_WEIGHT
        return edge, [self.names[i] for i in np.flatnonzero(edge)]

    def _w(self, p):
        a = -2.0 * np.arange(self.k + 1) / p["temperature"]
        return np.exp(a - np.logaddexp.reduce(a))


class _Normal(_Model):
    name = "normal"
    n_theta = 2
    names = ("mu", "sigma")

    def loglik(self, theta, z):
        s = math.exp(theta[1])
        u = (z - theta[0]) / s
        return float(-0.5 * np.sum(u * u) - z.size * (theta[1] + 0.5 * math.log(2 * math.pi)))

    def grad(self, theta, z):
        s = math.exp(theta[1])
        u = (z - theta[0]) / s
        return np.array([np.sum(u) / s, np.sum(u * u) - z.size])

    def starts(self, rng, n):
        return [np.array([0.0, 0.0])]  # concave in (mu, log sigma): one start is enough

    def bounds(self):
        return [(-5.0, 5.0), (-8.0, 3.0)]

    def natural(self, theta, m, s0):
        s = math.exp(theta[1])
        return np.array([m + s0 * theta[0], s0 * s]), np.diag([s0, s0 * s])

    def cdf(self, p):
        from scipy.stats import norm

        return lambda x: norm.cdf(x, p["mu"], p["sigma"])

    def pdf(self, p, x):
        from scipy.stats import norm

        return norm.pdf(x, p["mu"], p["sigma"])


class _StudentT(_Model):
    name = "student-t"
    n_theta = 3
    names = ("loc", "scale", "df")

    def _parts(self, theta, z):
        nu = math.exp(theta[2])
        s = math.exp(theta[1])
        u = (z - theta[0]) / s
        return nu, s, u

    def loglik(self, theta, z):
        from scipy.special import gammaln

        nu, s, u = self._parts(theta, z)
        const = gammaln((nu + 1) / 2) - gammaln(nu / 2) - 0.5 * math.log(nu * math.pi) - theta[1]
        return float(z.size * const - (nu + 1) / 2 * np.sum(np.log1p(u * u / nu)))

    def grad(self, theta, z):
        from scipy.special import digamma

        nu, s, u = self._parts(theta, z)
        q = nu + u * u
        d_loc = np.sum((nu + 1) * u / q) / s
        d_logs = np.sum((nu + 1) * u * u / q) - z.size
        d_nu = z.size * 0.5 * (digamma((nu + 1) / 2) - digamma(nu / 2) - 1.0 / nu) + np.sum(
            -0.5 * np.log1p(u * u / nu) + (nu + 1) * u * u / (2 * nu * q)
        )
        return np.array([d_loc, d_logs, nu * d_nu])

    def starts(self, rng, n):
        out = [np.array([0.0, math.log(0.7), math.log(4.0)])]
        for _ in range(n - 1):
            out.append(
                np.array(
                    [
                        rng.normal(0.0, 0.1),
                        math.log(rng.uniform(0.3, 1.0)),
                        math.log(rng.uniform(1.5, 30.0)),
                    ]
                )
            )
        return out

    def bounds(self):
        return [(-5.0, 5.0), (-8.0, 3.0), (math.log(0.05), math.log(1e4))]

    def natural(self, theta, m, s0):
        s, nu = math.exp(theta[1]), math.exp(theta[2])
        return np.array([m + s0 * theta[0], s0 * s, nu]), np.diag([s0, s0 * s, nu])

    def cdf(self, p):
        from scipy.stats import t

        return lambda x: t.cdf(x, p["df"], p["loc"], p["scale"])

    def pdf(self, p, x):
        from scipy.stats import t

        return t.pdf(x, p["df"], p["loc"], p["scale"])


# -- results -------------------------------------------------------------------------------
@dataclass
class ModelFit:
    """One fitted model.

    Attributes
    ----------
    model : str
        ``"oscillator 0..k"``, ``"thermal 0..K"``, ``"normal"`` or ``"student-t"``.
    params, se, ci_low, ci_high : dict of str to float
        Estimates in the data's units (weights and ``df``, ``temperature`` dimensionless),
        standard errors from the observed information (NaN where it is singular, e.g. a weight
        at 0), and Wald 95% intervals.
    n_params : int
        Free parameters (``k + 2`` for levels 0..k: the weights sum to 1).
    loglik, aic, bic, ks : float
        Maximised log-likelihood, ``2 p - 2 LL``, ``p ln n - 2 LL``, Kolmogorov-Smirnov
        distance of the fitted law from the data.
    converged : bool
        The best start ended with optimiser success and a gradient below tolerance.
    message : str
        The optimiser's message for the best start, or why it is not converged.
    starts, starts_agree : int
        Starts tried; starts within ``1e-6`` of the best log-likelihood.
    seconds : float
        Wall-clock time of the fit (not stored in tables: it differs on every run).
    information_ok : bool
        The observed information (of the parameters not at an edge) is positive definite.
    at_edge : tuple of str
        Parameters at the edge of their space (a weight below ``1e-4``, ``T`` at the ground
        state): reported without a standard error, held fixed for the others' errors.
    """

    model: str
    params: dict[str, float]
    se: dict[str, float]
    ci_low: dict[str, float]
    ci_high: dict[str, float]
    n_params: int
    loglik: float
    aic: float
    bic: float
    ks: float
    converged: bool
    message: str
    starts: int
    starts_agree: int
    seconds: float = 0.0
    information_ok: bool = True
    at_edge: tuple[str, ...] = ()


@dataclass
class ReturnsFit:
    """Every model fitted to one return series (what ``propensim calibrate`` prints and stores).

    Attributes
    ----------
    returns : ndarray
        The log returns fitted.
    fits : list of ModelFit
        Oscillator mixtures 0..1 .. 0..K, the thermal mixture 0..K, normal, Student-t.
    source : dict
        Where the data came from (file, column, rows, sha256).
    options : dict
        ``max_level``, ``starts``, ``seed``, ``max_iter``.
    path : Path or None
        The results folder, once written.
    """

    returns: np.ndarray
    fits: list[ModelFit]
    source: dict[str, Any]
    options: dict[str, Any]
    path: Path | None = None
    seconds: float = 0.0
    _models: dict[str, _Model] = field(default_factory=dict, repr=False)

    @property
    def n(self) -> int:
        """Number of returns."""
        return int(self.returns.size)

    @property
    def converged(self) -> bool:
        """True if every fit converged."""
        return all(f.converged for f in self.fits)

    def fit(self, model: str) -> ModelFit:
        """The fit of one model, by name."""
        for f in self.fits:
            if f.model == model:
                return f
        raise KeyError(f"no model {model!r}; have {[f.model for f in self.fits]}")

    def best(self, criterion: str = "aic") -> ModelFit:
        """The model with the lowest ``"aic"`` or ``"bic"`` (converged fits only)."""
        pool = [f for f in self.fits if f.converged] or self.fits
        return min(pool, key=lambda f: getattr(f, criterion))

    def table(self):
        """One row per model: n_params, loglik, aic, bic, ks, converged (pandas DataFrame)."""
        import pandas as pd

        return pd.DataFrame(
            [
                {
                    "model": f.model,
                    "n_params": f.n_params,
                    "loglik": f.loglik,
                    "aic": f.aic,
                    "bic": f.bic,
                    "ks": f.ks,
                    "converged": f.converged,
                    "starts_agree": f.starts_agree,
                    "starts": f.starts,
                }
                for f in self.fits
            ]
        )

    def parameters(self):
        """One row per model and parameter: estimate, se, ci_low, ci_high (DataFrame)."""
        import pandas as pd

        return pd.DataFrame(_param_rows(self.fits))

    def verdict(self) -> str:
        """Which model fits best, in plain words (by AIC, and BIC if it disagrees)."""
        a, b = self.best("aic"), self.best("bic")
        osc = [f for f in self.fits if f.model.startswith(("oscillator", "thermal"))]
        best_osc = min(osc, key=lambda f: f.aic) if osc else None
        base = (
            " (a baseline, not an oscillator model)" if a.model in ("normal", "student-t") else ""
        )
        text = f"Best fit by AIC: {a.model}{base}"
        text += "; BIC agrees." if b.model == a.model else f"; by BIC: {b.model}."
        if best_osc is not None and best_osc is not a:
            text += (
                f" The best oscillator model, {best_osc.model}, is worse by "
                f"{best_osc.aic - a.aic:.1f} in AIC."
            )
        normal = next((f for f in self.fits if f.model == "normal"), None)
        if best_osc is not None and normal is not None:
            gap = normal.aic - best_osc.aic
            word = "better" if gap > 0 else "worse"
            text += f" {best_osc.model} is {abs(gap):.1f} AIC {word} than the normal."
        return text

    def format(self) -> str:
        """The printed report: the table of fits, the parameters, the verdict, the caution."""
        lines = [
            f"{self.n} log returns from {self.source.get('source')} "
            f"(column {self.source.get('column')!r}, {self.source.get('input')}); "
            f"mean {np.mean(self.returns):.4g}, sd {np.std(self.returns):.4g}, "
            f"excess kurtosis {_excess_kurtosis(self.returns):.2f}",
            "",
            f"{'model':<16} {'p':>2} {'log-lik':>12} {'AIC':>12} {'BIC':>12} {'KS':>7}  converged",
        ]
        for f in self.fits:
            conv = "yes" if f.converged else "NO"
            conv += f" ({f.starts_agree}/{f.starts} starts agree)"
            lines.append(
                f"{f.model:<16} {f.n_params:>2} {f.loglik:>12.2f} {f.aic:>12.2f} "
                f"{f.bic:>12.2f} {f.ks:>7.4f}  {conv}"
            )
        lines += ["", "Parameters (estimate, standard error from the observed information):"]
        for f in self.fits:
            parts = []
            for k, v in f.params.items():
                se = f.se[k]
                parts.append(f"{k} {v:.4g}" + (f" ({se:.2g})" if np.isfinite(se) else " (-)"))
            lines.append(f"  {f.model:<16} " + ", ".join(parts))
            if f.at_edge:
                lines.append(
                    "  " + " " * 17 + f"({', '.join(f.at_edge)} at the edge of the parameter "
                    "space: no standard error; held fixed for the others)"
                )
            if not f.information_ok:
                lines.append(
                    "  " + " " * 17 + "(no standard errors: the observed information is "
                    "not positive definite here)"
                )
        lines += ["", self.verdict()]
        if self.path is not None:
            lines.append(f"results: {self.path}")
        lines.append(
            caution(
                "each return is an independent draw from one fixed law (no volatility "
                "clustering, no drift in time), the oscillator levels share one centre and "
                "width, and the likelihood is maximised numerically from seeded starts"
            )
        )
        return "\n".join(lines)

    def save(self, out) -> Path:
        """Write the results folder (see :func:`fit_returns`); returns its path."""
        self.path = _save(self, out)
        return self.path


def _excess_kurtosis(x: np.ndarray) -> float:
    d = x - x.mean()
    return float(np.mean(d**4) / np.mean(d**2) ** 2 - 3.0)


def _param_rows(fits: list[ModelFit]) -> list[dict[str, Any]]:
    return [
        {
            "model": f.model,
            "parameter": k,
            "estimate": v,
            "se": f.se[k],
            "ci_low": f.ci_low[k],
            "ci_high": f.ci_high[k],
        }
        for f in fits
        for k, v in f.params.items()
    ]


# -- fitting -------------------------------------------------------------------------------
def _fit_one(model: _Model, z, m, s0, rng, n_starts, max_iter) -> ModelFit:
    from scipy.optimize import minimize

    t0 = time.perf_counter()
    n = z.size

    def fun(theta):
        with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
            ll = model.loglik(theta, z)
            g = model.grad(theta, z)
        if not np.isfinite(ll) or not np.all(np.isfinite(g)):
            return 1e300, np.zeros_like(theta)
        return -ll / n, -g / n

    runs = []
    for start in model.starts(rng, n_starts):
        res = minimize(
            fun,
            start,
            jac=True,
            method="L-BFGS-B",
            bounds=model.bounds(),
            options={"maxiter": max_iter, "ftol": 1e-15, "gtol": 1e-9, "maxcor": 20},
        )
        runs.append(res)
    best = min(runs, key=lambda r: r.fun)
    theta = best.x
    ll = model.loglik(theta, z)
    agree = sum(1 for r in runs if abs(r.fun - best.fun) * n < AGREE_TOL)
    g = model.grad(theta, z) / n
    lo, hi = np.array(model.bounds()).T
    interior = (theta > lo + 1e-6) & (theta < hi - 1e-6)
    grad_ok = bool(np.all(np.abs(g[interior]) < GRAD_TOL))
    converged = bool(best.success) and grad_ok
    message = str(best.message)
    if not best.success:
        message = f"optimiser stopped: {message} after {best.nit} iterations"
    elif not grad_ok:
        message = f"gradient {np.max(np.abs(g[interior])):.2g} above {GRAD_TOL:g}"
    # A parameter at the edge of its space (a weight driven to 0, a temperature to 0) has no
    # Wald standard error: it is held fixed there and the others get theirs from the rest of
    # the information.
    values, jac = model.natural(theta, m, s0)
    names = model.names
    edge_theta, edge_names = model.at_edge(theta, interior)
    keep = np.flatnonzero(~edge_theta)
    info = observed_information(lambda th: model.grad(th, z), theta)
    cov_theta = np.zeros((theta.size, theta.size))
    sub, info_ok = covariance(info[np.ix_(keep, keep)])
    cov_theta[np.ix_(keep, keep)] = sub
    se = np.sqrt(np.clip(np.diag(jac @ cov_theta @ jac.T), 0.0, None))
    se[[names.index(k) for k in edge_names]] = np.nan
    se[se == 0.0] = np.nan  # fixed by the edge parameters alone (w0 when the rest are at 0)
    ll_raw = ll - n * math.log(s0)  # back to the data's units: density scales by 1/s0
    p = model.n_theta
    cdf = model.cdf(dict(zip(names, values, strict=True)))
    x = np.sort(m + s0 * z)
    fx = cdf(x)
    i = np.arange(1, n + 1)
    ks = float(max(np.max(i / n - fx), np.max(fx - (i - 1) / n)))
    return ModelFit(
        model=model.name,
        params={k: float(v) for k, v in zip(names, values, strict=True)},
        se={k: float(v) for k, v in zip(names, se, strict=True)},
        ci_low={k: float(v - Z95 * e) for k, v, e in zip(names, values, se, strict=True)},
        ci_high={k: float(v + Z95 * e) for k, v, e in zip(names, values, se, strict=True)},
        n_params=p,
        loglik=float(ll_raw),
        aic=float(2 * p - 2 * ll_raw),
        bic=float(p * math.log(n) - 2 * ll_raw),
        ks=ks,
        converged=converged,
        message=message,
        starts=len(runs),
        starts_agree=agree,
        seconds=time.perf_counter() - t0,
        information_ok=bool(info_ok),
        at_edge=tuple(edge_names),
    )


def _check_int(name: str, value, low: int, high: int | None = None) -> int:
    ok = isinstance(value, int | np.integer) and not isinstance(value, bool)
    if not ok or value < low or (high is not None and value > high):
        allowed = f"{low}..{high}" if high is not None else f">= {low}"
        raise CalibrationError(f"{name} must be a whole number in {allowed}, got {value!r}")
    return int(value)


def fit_returns(
    data,
    column: str | None = None,
    *,
    returns: bool = False,
    max_level: int = 2,
    starts: int = 8,
    seed: int = DEFAULT_SEED,
    max_iter: int = 2000,
    out=None,
) -> ReturnsFit:
    """Fit oscillator-level mixtures, the thermal mixture, the normal and the Student-t.

    Parameters
    ----------
    data : str, Path, pandas.DataFrame or array_like
        A CSV or Parquet file or a table (then ``column`` is required), or the log returns
        themselves as an array.
    column : str, optional
        Column holding prices (default) or log returns (``returns=True``).
    returns : bool
        The column holds log returns, used as they are; otherwise prices, turned into
        ``ln(p_t / p_{t-1})``.
    max_level : int
        ``K``: mixtures of levels 0..k are fitted for every k = 1..K, the thermal mixture with
        levels 0..K (1..8, default 2).
    starts : int
        Starting points per model (the first deterministic, the rest from ``seed``).
    seed : int
        Seed of the starting points.
    max_iter : int
        Iteration limit per start (a fit that reaches it is reported as not converged).
    out : str or Path, optional
        Results folder to write: ``fits.parquet``, ``parameters.parquet``, ``returns.parquet``,
        ``density.parquet`` (fitted densities and distribution functions on a grid),
        ``qq.parquet`` (sample against model quantiles) and ``manifest.json``.

    Returns
    -------
    ReturnsFit

    Raises
    ------
    CalibrationError
        Bad input: missing column or values, non-positive prices, too few returns for the
        largest model (10 per parameter), ``max_level`` out of range, no variation.

    Examples
    --------
    >>> import numpy as np
    >>> r = np.random.default_rng(1).standard_t(4, 2000) * 0.01
    >>> fit = fit_returns(r)  # doctest: +SKIP
    >>> fit.best().model  # doctest: +SKIP
    'student-t'
    """
    t0 = time.perf_counter()
    max_level = _check_int("--max-level", max_level, 1, MAX_LEVEL)
    starts = _check_int("--starts", starts, 1)
    max_iter = _check_int("--max-iter", max_iter, 1)
    seed = _check_int("--seed", seed, 0)
    if isinstance(data, np.ndarray | list | tuple):
        r = np.asarray(data, dtype=float).ravel()
        if not np.all(np.isfinite(r)):
            raise CalibrationError("returns: missing or non-finite values")
        source = {"source": "array", "column": None, "input": "returns", "rows": int(r.size)}
    else:
        if column is None:
            raise CalibrationError("--column: required (the column of prices or returns)")
        r, source = load_series(data, column, returns=returns)
    models: list[_Model] = [_Mixture(k) for k in range(1, max_level + 1)]
    models += [_Thermal(max_level), _Normal(), _StudentT()]
    p_max = max(mod.n_theta for mod in models)
    need = PER_PARAMETER * p_max
    if r.size < need:
        raise CalibrationError(
            f"--column {source.get('column')!r}: {r.size} returns are too few for {p_max} "
            f"parameters (need at least {need}: {PER_PARAMETER} per parameter)"
        )
    s0 = float(np.std(r))
    if not s0 > 0 or s0 <= 1e-12 * max(1.0, float(np.max(np.abs(r)))):
        raise CalibrationError(
            f"--column {source.get('column')!r}: the returns do not vary (all equal to "
            f"{r[0]:.6g}); nothing to fit"
        )
    m = float(np.median(r))
    z = (r - m) / s0
    fits = []
    by_name = {}
    for model in models:
        # one stream per model, so a changed K leaves the other models' starts alone
        key = zlib.crc32(model.name.encode())
        rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(key,)))
        fits.append(_fit_one(model, z, m, s0, rng, starts, max_iter))
        by_name[model.name] = model
    result = ReturnsFit(
        returns=r,
        fits=fits,
        source=source,
        options={"max_level": max_level, "starts": starts, "seed": seed, "max_iter": max_iter},
        _models=by_name,
    )
    result.seconds = time.perf_counter() - t0
    if out is not None:
        result.save(out)
    return result


# -- the results folder --------------------------------------------------------------------
def _save(result: ReturnsFit, out) -> Path:
    r = result.returns
    fit_cols = {
        "model": "str",
        "n_params": "int",
        "loglik": "float",
        "aic": "float",
        "bic": "float",
        "ks": "float",
        "converged": "bool",
        "starts": "int",
        "starts_agree": "int",
        "message": "str",
    }
    fit_rows = [{c: getattr(f, c) for c in fit_cols} for f in result.fits]
    param_cols = {
        "model": "str",
        "parameter": "str",
        "estimate": "float",
        "se": "float",
        "ci_low": "float",
        "ci_high": "float",
    }
    param_rows = [
        {k: (None if isinstance(v, float) and not np.isfinite(v) else v) for k, v in row.items()}
        for row in _param_rows(result.fits)
    ]
    # Densities on a grid over the data's range (log-scale tail plots read them too).
    lo, hi = float(r.min()), float(r.max())
    pad = 0.05 * (hi - lo)
    grid = np.linspace(lo - pad, hi + pad, 801)
    dens_rows, qq_rows = [], []
    srt = np.sort(r)
    probs = (np.arange(1, r.size + 1) - 0.5) / r.size
    wide = np.linspace(lo - 2 * (hi - lo), hi + 2 * (hi - lo), 40_001)
    for f in result.fits:
        model = result._models[f.model]
        pdf = model.pdf(f.params, grid)
        cdf = model.cdf(f.params)
        dens_rows += [
            {"model": f.model, "x": float(x), "density": float(d), "cdf": float(c)}
            for x, d, c in zip(grid, pdf, cdf(grid), strict=True)
        ]
        qs = np.interp(probs, cdf(wide), wide)  # model quantiles by inverting the cdf
        qq_rows += [
            {"model": f.model, "p": float(p), "sample": float(s), "model_quantile": float(q)}
            for p, s, q in zip(probs, srt, qs, strict=True)
        ]
    tables = {
        "fits": (fit_rows, fit_cols),
        "parameters": (param_rows, param_cols),
        "returns": ([{"t": i, "r": float(v)} for i, v in enumerate(r)], {"t": "int", "r": "float"}),
        "density": (
            dens_rows,
            {"model": "str", "x": "float", "density": "float", "cdf": "float"},
        ),
        "qq": (
            qq_rows,
            {"model": "str", "p": "float", "sample": "float", "model_quantile": "float"},
        ),
    }
    manifest = {
        "source": result.source,
        "n": result.n,
        "options": result.options,
        "best_aic": result.best("aic").model,
        "best_bic": result.best("bic").model,
        "verdict": result.verdict(),
        "converged": result.converged,
        "seconds": {f.model: round(f.seconds, 3) for f in result.fits},
    }
    return write_folder(out, "returns", manifest, tables)
