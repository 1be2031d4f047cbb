"""Recover traders' curves from the meetings of a propensity-matching market, traded or not.

In propensity matching (normal curves, MODEL.md section 3) a meeting between buyer ``b`` and
seller ``s`` trades with the peak of their joint curve and, when it trades, at a price drawn from
the normalised joint curve:

    P(trade) = a_b a_s exp(-(mu_b - mu_s)^2 / (2 (s_b^2 + s_s^2)))
    price | trade ~ N((mu_b s_s^2 + mu_s s_b^2) / (s_b^2 + s_s^2), s_b^2 s_s^2 / (s_b^2 + s_s^2))

(Bromiley 2003 for the product of two normal curves). A market that keeps its meetings
(``collect.meetings = true``, or ``keep_meetings=True``) records every meeting with its outcome
and the price of those that traded, so the likelihood of the curves' parameters is the product of
a Bernoulli term per meeting and a normal term per traded price. :func:`recover_matching` fits it
by maximum likelihood, one centre per group of traders (by default all buyers, all sellers), one
width per side, heights fixed at 1, with standard errors from the observed information.

The trade chance alone is symmetric in ``mu_b - mu_s``; the traded prices fix the centres' sum
and so break the symmetry only together with the widths: with one width for both sides the sign
of the gap is not identified (the fit reports the solution with buyers' centres above sellers'
unless told otherwise). A meeting that agreed but was refused because a side had no units left
is recorded as not traded: recover from markets whose capacity does not bind, or expect a bias.

References
----------
P. A. Bromiley, "Products and Convolutions of Gaussian Probability Density Functions", Tina Memo
2003-003, University of Manchester (2003).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


class RecoveryError(ValueError):
    """Unusable meetings (missing columns, no variation, too few meetings)."""


@dataclass
class MatchingRecovery:
    """Fitted centres per group and widths per side, with standard errors.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per parameter: ``parameter``, ``estimate``, ``se``, ``ci_low``, ``ci_high``
        (95%, normal approximation).
    log_likelihood : float
    n_meetings, n_traded : int
    converged : bool
    message : str
    """

    table: object
    log_likelihood: float
    n_meetings: int
    n_traded: int
    converged: bool
    message: str

    def estimate(self, name: str) -> float:
        """The estimate of one parameter by name (e.g. ``mu[buyer]``, ``sigma_buyer``)."""
        rows = self.table[self.table["parameter"] == name]
        if rows.empty:
            raise KeyError(name)
        return float(rows["estimate"].iloc[0])


def recover_matching(
    meetings,
    role=None,
    *,
    groups=None,
    shared_width: bool = True,
    buyers_above: bool = True,
) -> MatchingRecovery:
    """Fit group centres and side widths to the meetings of a propensity-matching market.

    Parameters
    ----------
    meetings : pandas.DataFrame
        Columns ``buyer``, ``seller``, ``traded`` (0/1) and ``price`` (NaN where not traded), as
        stored by ``collect.meetings``.
    role : ignored
        Kept for symmetry with other fits (buyer and seller columns already say the side).
    groups : mapping or array, optional
        Group label of every trader row (``groups[row]``); default: one group of buyers and one
        of sellers.
    shared_width : bool
        One width for both sides (default) or one per side.
    buyers_above : bool
        With one shared width the sign of the gap is not identified: start from (and report) the
        solution with buyers' centres above sellers' (True) or below (False).

    Returns
    -------
    MatchingRecovery
    """
    import pandas as pd
    from scipy.optimize import minimize

    del role
    for col in ("buyer", "seller", "traded", "price"):
        if col not in getattr(meetings, "columns", ()):
            raise RecoveryError(
                f"meetings: no column {col!r}; expected buyer, seller, price, traded"
            )
    b = meetings["buyer"].to_numpy(np.int64)
    s = meetings["seller"].to_numpy(np.int64)
    y = meetings["traded"].to_numpy().astype(float)
    price = meetings["price"].to_numpy(float)
    if y.size < 20:
        raise RecoveryError(f"meetings: {y.size} rows are too few (need at least 20)")
    if y.min() == y.max():
        raise RecoveryError("traded: every meeting had the same outcome; nothing to fit")
    if np.any(y == 1) and not np.isfinite(price[y == 1]).all():
        raise RecoveryError("price: a traded meeting has no finite price")
    if groups is None:
        gb = np.zeros(b.size, dtype=np.int64)
        gs = np.ones(s.size, dtype=np.int64)
        names = ["buyer", "seller"]
    else:
        labels = np.asarray(groups)
        lb, ls = labels[b], labels[s]
        names = list(pd.unique(np.concatenate([lb, ls])))
        index = {g: i for i, g in enumerate(names)}
        gb = np.array([index[g] for g in lb], dtype=np.int64)
        gs = np.array([index[g] for g in ls], dtype=np.int64)
    k = len(names)
    traded = y == 1
    p_obs = price[traded]

    def unpack(theta):
        mu = theta[:k]
        if shared_width:
            vb = vs = np.exp(2 * theta[k])
        else:
            vb, vs = np.exp(2 * theta[k]), np.exp(2 * theta[k + 1])
        return mu, vb, vs

    def nll(theta):
        mu, vb, vs = unpack(theta)
        mb, ms = mu[gb], mu[gs]
        vsum = vb + vs
        log_p = -((mb - ms) ** 2) / (2 * vsum)  # shape: (n_meetings,)
        log_p = np.minimum(log_p, -1e-12)
        ll = log_p[traded].sum() + np.log(-np.expm1(log_p[~traded])).sum()
        mean = (mb[traded] * vs + ms[traded] * vb) / vsum
        var = vb * vs / vsum
        ll += -0.5 * (np.log(2 * np.pi * var) * p_obs.size + ((p_obs - mean) ** 2).sum() / var)
        return -ll

    centre = float(np.nanmean(p_obs)) if p_obs.size else 0.0
    spread = float(np.nanstd(p_obs)) if p_obs.size > 1 else 1.0
    rate = float(traded.mean())
    width = max(spread * np.sqrt(2.0), 1e-3)  # price sd = width / sqrt(2) with one width
    gap = width * 2.0 * np.sqrt(max(-np.log(max(rate, 1e-6)), 0.0))  # rate = exp(-d^2 / 4 w^2)
    mu0 = np.array(
        [centre + (0.5 if i == 0 else -0.5) * gap * (1 if buyers_above else -1) for i in range(k)]
        if groups is None
        else [centre] * k
    )
    theta0 = np.concatenate([mu0, [np.log(width)] * (1 if shared_width else 2)])
    fit = minimize(nll, theta0, method="BFGS", options={"gtol": 1e-8, "maxiter": 5000})
    if not fit.success:  # polish from where BFGS stopped; say so if that fails too
        fit = minimize(nll, fit.x, method="Nelder-Mead", options={"maxiter": 20000, "xatol": 1e-8})
    hess = _hessian(nll, fit.x)
    try:
        cov = np.linalg.inv(hess)
        se = np.sqrt(np.clip(np.diag(cov), 0, np.inf))
    except np.linalg.LinAlgError:
        se = np.full(fit.x.size, np.nan)
    mu, vb, vs = unpack(fit.x)
    rows = []
    for i, name in enumerate(names):
        rows.append(("mu[" + str(name) + "]", mu[i], se[i]))
    if shared_width:
        w = np.sqrt(vb)
        rows.append(("sigma", w, w * se[k]))  # delta method: d sigma = sigma d log sigma
    else:
        rows.append(("sigma_buyer", np.sqrt(vb), np.sqrt(vb) * se[k]))
        rows.append(("sigma_seller", np.sqrt(vs), np.sqrt(vs) * se[k + 1]))
    table = pd.DataFrame(rows, columns=["parameter", "estimate", "se"])
    table["ci_low"] = table["estimate"] - 1.959964 * table["se"]
    table["ci_high"] = table["estimate"] + 1.959964 * table["se"]
    return MatchingRecovery(
        table=table,
        log_likelihood=float(-fit.fun),
        n_meetings=int(y.size),
        n_traded=int(traded.sum()),
        converged=bool(fit.success),
        message=str(fit.message),
    )


def _hessian(f, x: np.ndarray) -> np.ndarray:
    """Central-difference Hessian of a scalar function (step scaled to each coordinate)."""
    n = x.size
    h = 1e-4 * np.maximum(1.0, np.abs(x))
    out = np.empty((n, n))
    for i in range(n):
        for j in range(i, n):
            e_i = np.zeros(n)
            e_j = np.zeros(n)
            e_i[i] = h[i]
            e_j[j] = h[j]
            val = (f(x + e_i + e_j) - f(x + e_i - e_j) - f(x - e_i + e_j) + f(x - e_i - e_j)) / (
                4 * h[i] * h[j]
            )
            out[i, j] = out[j, i] = val
    return out
