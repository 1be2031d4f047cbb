"""Propensity curves from accept/reject observations, by Bernoulli maximum likelihood.

One trader (or one group) was offered prices ``x_i`` and accepted (``y_i = 1``) or not
(``y_i = 0``); each answer is an independent Bernoulli draw with success probability ``P(x_i)``,
the trader's propensity curve. The log-likelihood is
``sum_i y_i ln P(x_i) + (1 - y_i) ln(1 - P(x_i))``, computed in log space (``ln(1 - P)`` as
``ln(-expm1(ln P))``).

Families (parameters in the curve's own terms, as :mod:`propensim.agents.curves` defines them):

- ``logistic``, one-sided: buyer ``a / (1 + exp((x - mu) / tau))``, seller with ``-(x - mu)``.
  With ``a = 1`` it is logistic regression of the outcome on price: ``logit P = b0 + b1 x`` with
  ``b1 = -1/tau`` (buyer) and ``b0 = mu / tau``.
- ``normal``: ``a exp(-(x - mu)**2 / (2 sigma**2))``.
- any object with ``names``, ``log_p(x, theta)``, ``start(x, y)`` and ``natural(theta)``
  (see :class:`AcceptanceFamily`): a family with a log-likelihood.

The activity ``a`` is fixed (default 1) or fitted (``activity="fit"``, through a logit).
Standard errors come from the observed information, mapped to the curve's parameters by the
delta method; 95% intervals are Wald intervals, on the log scale for the positive widths.

A second tool, :func:`recover_curves`, fits the curves of many traders (or groups) at once from a
table of meetings: each meeting offers a price to one buyer and one seller, each accepts by its
own curve, independently, and the meeting trades only if both accept:
``P(trade | x) = P_b(x) P_s(x)`` (MODEL.md section 3).

References
----------
.. [1] P. McCullagh and J. A. Nelder, *Generalized Linear Models*, 2nd ed. (1989), chapter 4
   (binary data, the logistic link, standard errors from the information).
.. [2] statsmodels ``Logit`` (reference implementation used in the tests).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from propensim.experiments.calibrate_base import (
    Z95,
    CalibrationError,
    covariance,
    observed_information,
)

__all__ = [
    "AcceptanceFamily",
    "AcceptanceFit",
    "CurveRecovery",
    "fit_acceptance",
    "recover_curves",
    "simulate_meetings",
]

#: Columns :func:`recover_curves` expects in a meetings table.
MEETING_COLUMNS = ("round", "buyer", "seller", "price", "traded")
_SIDES = {"buyer": 1.0, "seller": -1.0}


class AcceptanceFamily(Protocol):
    """A curve family that :func:`fit_acceptance` can fit.

    ``theta`` is unconstrained (e.g. ``log tau``); ``natural`` maps it to the reported
    parameters. ``grad_log_p`` is optional (central differences are used without it).
    """

    names: tuple[str, ...]

    def log_p(self, x: np.ndarray, theta: np.ndarray) -> np.ndarray:
        """``ln P(x)`` for every price, shape of ``x``."""
        ...

    def start(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """A starting ``theta`` from the data."""
        ...

    def natural(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray, tuple[bool, ...]]:
        """Reported parameters, their Jacobian in ``theta``, and which are positive."""
        ...


class _Builtin:
    """Logistic or normal curve; theta = (mu, log width[, logit activity])."""

    def __init__(self, family: str, side: str, activity) -> None:
        self.family = family
        self.side = side
        self.d = _SIDES[side]
        self.fit_activity = activity == "fit"
        self.activity = None if self.fit_activity else float(activity)
        width = "tau" if family == "logistic" else "sigma"
        self.names = ("mu", width, *(("activity",) if self.fit_activity else ()))

    def _log_a(self, theta):
        if not self.fit_activity:
            return math.log(self.activity), 0.0
        b = theta[2]
        return -np.logaddexp(0.0, -b), 1.0 / (1.0 + math.exp(b))  # log expit, d/db

    def log_p(self, x, theta):
        log_a, _ = self._log_a(theta)
        w = math.exp(theta[1])
        if self.family == "logistic":
            z = self.d * (x - theta[0]) / w
            return log_a - np.logaddexp(0.0, z)
        return log_a - 0.5 * np.square((x - theta[0]) / w)

    def grad_log_p(self, x, theta):
        """Derivatives of ``ln P`` in theta, shape (p, n)."""
        from scipy.special import expit

        _, dlog_a = self._log_a(theta)
        w = math.exp(theta[1])
        if self.family == "logistic":
            z = self.d * (x - theta[0]) / w
            e = expit(z)  # -d lnP / dz
            rows = [e * self.d / w, e * z]
        else:
            u = (x - theta[0]) / w
            rows = [u / w, u * u]
        if self.fit_activity:
            rows.append(np.full_like(x, dlog_a))
        return np.vstack(rows)

    def start(self, x, y):
        mu = float(np.median(x))
        sd = float(np.std(x)) or 1.0
        if self.family == "logistic" and 0 < y.mean() < 1:
            # the price where acceptance crosses its mean, and the spread of prices
            mu = float(np.quantile(x, 1 - y.mean() if self.d > 0 else y.mean()))
        elif self.family == "normal" and y.sum() > 0:
            mu = float(np.mean(x[y > 0]))
        theta = [mu, math.log(sd / 2)]
        if self.fit_activity:
            theta.append(2.0)
        return np.array(theta)

    def natural(self, theta):
        w = math.exp(theta[1])
        values = [theta[0], w]
        diag = [1.0, w]
        pos = [False, True]
        if self.fit_activity:
            a = 1.0 / (1.0 + math.exp(-theta[2]))
            values.append(a)
            diag.append(a * (1 - a))
            pos.append(False)
        return np.array(values), np.diag(diag), tuple(pos)

    def curve(self, params: dict[str, float]):
        """The fitted curve as a :mod:`propensim.agents.curves` object."""
        from propensim.agents.curves import LogisticCurve, NormalCurve

        a = params.get("activity", self.activity)
        if self.family == "logistic":
            return LogisticCurve(mu=params["mu"], tau=params["tau"], side=self.side, activity=a)
        return NormalCurve(mu=params["mu"], sigma=params["sigma"], activity=a)


def _log1m_exp(log_p: np.ndarray) -> np.ndarray:
    """``ln(1 - exp(log_p))`` accurately for ``log_p <= 0``."""
    with np.errstate(divide="ignore"):
        return np.where(log_p > -math.log(2.0), np.log(-np.expm1(log_p)), np.log1p(-np.exp(log_p)))


def _bernoulli(log_p: np.ndarray, y: np.ndarray) -> np.ndarray:
    return np.where(y > 0, log_p, _log1m_exp(log_p))


def _bernoulli_score(log_p: np.ndarray, y: np.ndarray) -> np.ndarray:
    """d(loglik_i) / d(ln P_i): 1 for an acceptance, ``-P / (1 - P)`` for a refusal."""
    with np.errstate(over="ignore", divide="ignore"):
        odds = np.exp(log_p - _log1m_exp(log_p))
    return np.where(y > 0, 1.0, -odds)


def _numeric_grad(f, theta, h=1e-6):
    g = np.empty_like(theta)
    for j in range(theta.size):
        step = h * max(1.0, abs(theta[j]))
        up, dn = theta.copy(), theta.copy()
        up[j] += step
        dn[j] -= step
        g[j] = (f(up) - f(dn)) / (2 * step)
    return g


@dataclass
class AcceptanceFit:
    """A curve fitted to accept/reject observations.

    Attributes
    ----------
    family, side : str
    params, se, ci_low, ci_high : dict of str to float
        Estimates, standard errors (observed information, delta method) and 95% intervals
        (Wald; for the positive width ``exp(ln w +- 1.96 se(ln w))``).
    loglik : float
    n : int
    covariance : ndarray
        Covariance of the reported parameters.
    converged : bool
    message : str
    seconds : float
    curve : Curve or None
        The fitted curve (built-in families).
    """

    family: str
    side: str
    params: dict[str, float]
    se: dict[str, float]
    ci_low: dict[str, float]
    ci_high: dict[str, float]
    loglik: float
    n: int
    covariance: np.ndarray
    converged: bool
    message: str
    seconds: float = 0.0
    curve: Any = None

    def table(self):
        """One row per parameter (DataFrame)."""
        import pandas as pd

        return pd.DataFrame(
            [
                {
                    "parameter": k,
                    "estimate": v,
                    "se": self.se[k],
                    "ci_low": self.ci_low[k],
                    "ci_high": self.ci_high[k],
                }
                for k, v in self.params.items()
            ]
        )


def _check_binary(prices, accepted) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(prices, dtype=float).ravel()
    y = np.asarray(accepted).ravel()
    if y.dtype == bool:
        y = y.astype(float)
    y = np.asarray(y, dtype=float)
    if x.size != y.size:
        raise CalibrationError(f"price and accepted differ in length ({x.size} != {y.size})")
    if not np.all(np.isfinite(x)):
        raise CalibrationError("price: missing or non-finite values")
    if not np.all((y == 0) | (y == 1)):
        raise CalibrationError("accepted: values must be 0/1 or true/false")
    return x, y


def _maximise(loglik, grad, theta0, max_iter):
    from scipy.optimize import minimize

    n = 1.0

    def fun(theta):
        ll = loglik(theta)
        if not np.isfinite(ll):
            return 1e300, np.zeros_like(theta)
        return -ll / n, -grad(theta) / n

    res = minimize(
        fun, theta0, jac=True, method="BFGS", options={"gtol": 1e-9, "maxiter": max_iter}
    )
    theta = res.x
    # Newton polish with the observed information: takes the optimum to machine precision.
    for _ in range(20):
        info = observed_information(grad, theta)
        try:
            step = np.linalg.solve(info, grad(theta))
        except np.linalg.LinAlgError:
            break
        new = theta + step
        if not loglik(new) >= loglik(theta) - 1e-9:
            break
        theta = new
        if np.max(np.abs(step)) < 1e-12 * max(1.0, np.max(np.abs(theta))):
            break
    return theta, res


def fit_acceptance(
    prices,
    accepted,
    *,
    family: str | AcceptanceFamily = "logistic",
    side: str = "buyer",
    activity: float | str = 1.0,
    max_iter: int = 1000,
) -> AcceptanceFit:
    """Fit a propensity curve to offered prices and whether each was accepted.

    Parameters
    ----------
    prices : array_like
        Offered prices (price units).
    accepted : array_like of bool or 0/1
        Whether each offer was accepted.
    family : {"logistic", "normal"} or AcceptanceFamily
        Curve family.
    side : {"buyer", "seller"}
        Whose curve (the logistic is one-sided: a buyer accepts low prices).
    activity : float or "fit"
        Fixed curve height ``a`` in (0, 1], or ``"fit"`` to estimate it.
    max_iter : int
        Optimiser iteration limit.

    Returns
    -------
    AcceptanceFit

    Raises
    ------
    CalibrationError
        Mismatched or non-finite input, no variation in the outcome, too few observations.

    References
    ----------
    .. [1] P. McCullagh and J. A. Nelder, *Generalized Linear Models* (1989), chapter 4.
    """
    t0 = time.perf_counter()
    x, y = _check_binary(prices, accepted)
    if side not in _SIDES:
        raise CalibrationError(f"side must be 'buyer' or 'seller', got {side!r}")
    if isinstance(family, str):
        if family not in ("logistic", "normal"):
            raise CalibrationError(
                f"family {family!r} is unknown; allowed: logistic, normal, or a family object"
            )
        if activity != "fit" and not (isinstance(activity, int | float) and 0 < activity <= 1):
            raise CalibrationError(f"activity must be in (0, 1] or 'fit', got {activity!r}")
        fam: Any = _Builtin(family, side, activity)
        fam_name = family
    else:
        fam = family
        fam_name = getattr(family, "name", type(family).__name__)
    p = len(fam.names)
    if x.size < 10 * p:
        raise CalibrationError(
            f"accepted: {x.size} observations are too few for {p} parameters (need {10 * p})"
        )
    if y.min() == y.max():
        raise CalibrationError(
            f"accepted: every offer was {'accepted' if y[0] else 'refused'}; no variation to fit"
        )

    def loglik(theta):
        with np.errstate(over="ignore", invalid="ignore"):
            return float(np.sum(_bernoulli(fam.log_p(x, theta), y)))

    if hasattr(fam, "grad_log_p"):

        def grad(theta):
            lp = fam.log_p(x, theta)
            return fam.grad_log_p(x, theta) @ _bernoulli_score(lp, y)

    else:

        def grad(theta):
            return _numeric_grad(loglik, np.asarray(theta, dtype=float))

    theta, res = _maximise(loglik, grad, fam.start(x, y), max_iter)
    g = grad(theta)
    info = observed_information(grad, theta)
    cov_theta, ok = covariance(info)
    values, jac, positive = fam.natural(theta)
    cov = jac @ cov_theta @ jac.T
    se = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    lo, hi = values - Z95 * se, values + Z95 * se
    for i, pos in enumerate(positive):
        if pos:  # interval on the log scale: se(ln w) = se(w) / w
            lo[i] = values[i] * math.exp(-Z95 * se[i] / values[i])
            hi[i] = values[i] * math.exp(Z95 * se[i] / values[i])
    scale = max(1.0, float(np.sqrt(np.diag(info)).max())) if ok else 1.0
    converged = bool(ok and np.all(np.isfinite(g)) and np.max(np.abs(g)) < 1e-6 * scale * x.size)
    names = fam.names
    params = {k: float(v) for k, v in zip(names, values, strict=True)}
    return AcceptanceFit(
        family=fam_name,
        side=side,
        params=params,
        se={k: float(v) for k, v in zip(names, se, strict=True)},
        ci_low={k: float(v) for k, v in zip(names, lo, strict=True)},
        ci_high={k: float(v) for k, v in zip(names, hi, strict=True)},
        loglik=loglik(theta),
        n=int(x.size),
        covariance=cov,
        converged=converged,
        message="converged" if converged else f"not converged: {res.message}",
        seconds=time.perf_counter() - t0,
        curve=fam.curve(params) if hasattr(fam, "curve") else None,
    )


# -- many traders from meetings ------------------------------------------------------------
@dataclass
class CurveRecovery:
    """Curves of many traders (or groups) recovered from a table of meetings.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per unit: ``side`` (buyer/seller), ``unit`` (trader id or group), ``meetings``,
        ``mu``, ``se_mu``, ``mu_low``, ``mu_high``, ``sigma``, ``se_sigma``, ``sigma_low``,
        ``sigma_high`` (for the logistic family ``sigma`` is the width ``tau``).
    loglik : float
    converged : bool
    message : str
    seconds : float
    """

    table: Any
    loglik: float
    converged: bool
    message: str
    family: str
    seconds: float = 0.0


def _units(frame, by, side):
    import pandas as pd

    ids = frame[side]
    if by == "trader":
        keys = ids
    elif isinstance(by, str):
        col = f"{side}_{by}"
        if col not in frame.columns:
            raise CalibrationError(f"by={by!r}: the meetings have no column {col!r}")
        keys = frame[col]
    else:
        mapping = dict(by)
        missing = sorted(set(ids) - set(mapping), key=str)
        if missing:
            raise CalibrationError(f"by: no group for {side} {missing[0]!r}")
        keys = ids.map(mapping)
    codes, uniques = pd.factorize(keys, sort=True)
    return codes, list(uniques)


def recover_curves(
    meetings,
    *,
    family: str = "logistic",
    by="trader",
    max_iter: int = 5000,
) -> CurveRecovery:
    """Recover buyers' and sellers' curves (``mu``, width) from meetings that did or did not trade.

    Parameters
    ----------
    meetings : pandas.DataFrame
        Columns ``round``, ``buyer``, ``seller``, ``price``, ``traded`` (bool or 0/1): one row per
        meeting, traded or not, with the price offered. (``round`` is carried along, not used.)
    family : {"logistic", "normal"}
        Curve family of both sides. The logistic (one-sided: buyers accept low prices, sellers
        high ones) identifies each side from the joint outcome; two normal curves do not (their
        product depends on each pair's sums of precisions and of precision-weighted centres
        only), so with ``"normal"`` expect wide intervals unless centres vary a lot.
    by : "trader", str or mapping
        One curve per trader id (default); or a column suffix: ``by="group"`` reads columns
        ``buyer_group`` and ``seller_group``; or a mapping trader id -> group.
    max_iter : int
        Optimiser iteration limit.

    Returns
    -------
    CurveRecovery

    Notes
    -----
    Activity is 1 on both sides. The likelihood of a meeting at price ``x`` is
    ``P_b(x) P_s(x)`` if it traded and ``1 - P_b(x) P_s(x)`` if not.
    """
    import pandas as pd

    t0 = time.perf_counter()
    if not isinstance(meetings, pd.DataFrame):
        raise CalibrationError("meetings must be a pandas DataFrame")
    for col in ("buyer", "seller", "price", "traded"):
        if col not in meetings.columns:
            raise CalibrationError(
                f"meetings: no column {col!r}; expected {', '.join(MEETING_COLUMNS)}"
            )
    if family not in ("logistic", "normal"):
        raise CalibrationError(f"family {family!r} is unknown; allowed: logistic, normal")
    x, y = _check_binary(meetings["price"].to_numpy(), meetings["traded"].to_numpy())
    cb, ub = _units(meetings, by, "buyer")
    cs, us = _units(meetings, by, "seller")
    nb, ns = len(ub), len(us)
    p = 2 * (nb + ns)
    if x.size < 10 * p:
        raise CalibrationError(
            f"meetings: {x.size} rows are too few for {p} parameters (need {10 * p})"
        )
    if y.min() == y.max():
        raise CalibrationError("traded: every meeting had the same outcome; no variation to fit")
    buyer = _Builtin(family, "buyer", 1.0)
    seller = _Builtin(family, "seller", 1.0)

    def split(theta):
        tb = theta[: 2 * nb].reshape(nb, 2)
        ts = theta[2 * nb :].reshape(ns, 2)
        return tb, ts

    def log_joint(theta):
        tb, ts = split(theta)
        return _side_log_p(buyer, x, tb[cb]) + _side_log_p(seller, x, ts[cs])

    def loglik(theta):
        with np.errstate(over="ignore", invalid="ignore"):
            return float(np.sum(_bernoulli(log_joint(theta), y)))

    def grad(theta):
        tb, ts = split(theta)
        score = _bernoulli_score(log_joint(theta), y)  # shape: (n,)
        gb = _side_grad(buyer, x, tb[cb]) * score  # shape: (2, n)
        gs = _side_grad(seller, x, ts[cs]) * score
        out_b = np.vstack([np.bincount(cb, gb[j], minlength=nb) for j in range(2)]).T
        out_s = np.vstack([np.bincount(cs, gs[j], minlength=ns) for j in range(2)]).T
        return np.concatenate([out_b.ravel(), out_s.ravel()])

    # start: every buyer at the lower quartile of traded prices, every seller at the upper
    traded_x = x[y > 0]
    q1, q3 = np.quantile(traded_x, [0.25, 0.75]) if traded_x.size else np.quantile(x, [0.25, 0.75])
    spread = max(float(np.std(x)), 1e-9)
    lw = math.log(spread / 4)
    if family == "logistic":  # a buyer accepts below its mu: start buyers high, sellers low
        theta0 = np.concatenate([np.tile([q3, lw], nb), np.tile([q1, lw], ns)])
    else:
        theta0 = np.concatenate([np.tile([q1, lw], nb), np.tile([q3, lw], ns)])
    theta, res = _maximise(loglik, grad, theta0, max_iter)
    info = observed_information(grad, theta)
    cov_theta, ok = covariance(info)
    se_mu = np.sqrt(np.clip(np.diag(cov_theta)[0::2], 0, None))
    se_logw = np.sqrt(np.clip(np.diag(cov_theta)[1::2], 0, None))
    mu, logw = theta[0::2], theta[1::2]
    w = np.exp(logw)
    counts = np.concatenate([np.bincount(cb, minlength=nb), np.bincount(cs, minlength=ns)])
    rows = []
    for i in range(nb + ns):
        rows.append(
            {
                "side": "buyer" if i < nb else "seller",
                "unit": ub[i] if i < nb else us[i - nb],
                "meetings": int(counts[i]),
                "mu": mu[i],
                "se_mu": se_mu[i],
                "mu_low": mu[i] - Z95 * se_mu[i],
                "mu_high": mu[i] + Z95 * se_mu[i],
                "sigma": w[i],
                "se_sigma": w[i] * se_logw[i],
                "sigma_low": w[i] * math.exp(-Z95 * se_logw[i]),
                "sigma_high": w[i] * math.exp(Z95 * se_logw[i]),
            }
        )
    g = grad(theta)
    converged = bool(ok and np.max(np.abs(g)) < 1e-6 * max(1.0, x.size))
    return CurveRecovery(
        table=pd.DataFrame(rows),
        loglik=loglik(theta),
        converged=converged,
        message="converged" if converged else f"not converged: {res.message}",
        family=family,
        seconds=time.perf_counter() - t0,
    )


def _side_log_p(fam: _Builtin, x, th):
    """``ln P`` with one (mu, log width) row per observation (``th`` shape (n, 2))."""
    w = np.exp(th[:, 1])
    if fam.family == "logistic":
        return -np.logaddexp(0.0, fam.d * (x - th[:, 0]) / w)
    return -0.5 * np.square((x - th[:, 0]) / w)


def _side_grad(fam: _Builtin, x, th):
    from scipy.special import expit

    w = np.exp(th[:, 1])
    if fam.family == "logistic":
        z = fam.d * (x - th[:, 0]) / w
        e = expit(z)
        return np.vstack([e * fam.d / w, e * z])
    u = (x - th[:, 0]) / w
    return np.vstack([u / w, u * u])


def simulate_meetings(
    buyers,
    sellers,
    *,
    rounds: int,
    price_low: float,
    price_high: float,
    family: str = "logistic",
    seed=None,
):
    """Meetings simulated straight from the curve functions (for tests and examples).

    Each round every buyer meets one seller drawn at random, a price is drawn uniformly from
    ``[price_low, price_high]``, each side accepts with its own curve
    (:class:`~propensim.agents.curves.LogisticCurve` or ``NormalCurve``), independently, and the
    meeting trades if both accept.

    Parameters
    ----------
    buyers, sellers : mapping with arrays ``mu`` and ``sigma``
        True curve parameters (``sigma`` is ``tau`` for the logistic).
    rounds : int
    price_low, price_high : float
    family : {"logistic", "normal"}
    seed : int or SeedSequence

    Returns
    -------
    pandas.DataFrame
        Columns ``round``, ``buyer``, ``seller``, ``price``, ``traded``.
    """
    import pandas as pd

    from propensim.agents.curves import LogisticCurve, NormalCurve

    rng = np.random.default_rng(seed)
    mb, sb = np.asarray(buyers["mu"], float), np.asarray(buyers["sigma"], float)
    ms, ss = np.asarray(sellers["mu"], float), np.asarray(sellers["sigma"], float)
    nb, ns = mb.size, ms.size
    buyer_id = np.tile(np.arange(nb), rounds)  # shape: (rounds * nb,)
    seller_id = rng.integers(0, ns, buyer_id.size)
    price = rng.uniform(price_low, price_high, buyer_id.size)
    if family == "logistic":
        pb = LogisticCurve(mu=mb[buyer_id], tau=sb[buyer_id], side="buyer").value(price)
        ps = LogisticCurve(mu=ms[seller_id], tau=ss[seller_id], side="seller").value(price)
    else:
        pb = NormalCurve(mu=mb[buyer_id], sigma=sb[buyer_id]).value(price)
        ps = NormalCurve(mu=ms[seller_id], sigma=ss[seller_id]).value(price)
    accept_b = rng.random(price.size) < pb
    accept_s = rng.random(price.size) < ps
    return pd.DataFrame(
        {
            "round": np.repeat(np.arange(rounds), nb),
            "buyer": buyer_id,
            "seller": seller_id,
            "price": price,
            "traded": accept_b & accept_s,
        }
    )
