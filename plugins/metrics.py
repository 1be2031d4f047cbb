"""What is measured each round: prices, volume, surplus, efficiency, convergence, energy.

Every metric is a :class:`~propensim.plugins.contracts.Metric`: a class with a one-line
``description``, an ``aggregate`` saying how a run's rounds become one number, and
``measure(state, outcome) -> float`` (NaN where undefined, e.g. a price in a round without trades).
Prices are per unit; a trade of ``q`` units counts ``q`` times in weighted quantities (VWAP,
dispersion, Smith's alpha, surpluses). The public functions :func:`max_surplus`,
:func:`competitive_equilibrium` and :func:`gini` are the kernels behind them.

Surplus conventions (MODEL.md section 7): a buyer's unit is worth its ``value``, a seller's unit
costs its ``value`` column (the population's value-or-cost column); a trade of ``q`` units at
price ``p`` gives the buyer ``(v_b - p) q`` and the seller ``(p - c_s) q``, their sum
``(v_b - c_s) q``.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np

from propensim.agents.population import BUYER, SELLER
from propensim.plugins import acceleration, welfare
from propensim.plugins.types import MarketState, RoundOutcome

__all__ = [
    "AllocativeEfficiency",
    "BuyerSurplus",
    "EntropicEnergy",
    "MeanPrice",
    "PreferenceGap",
    "PriceDispersion",
    "SellerSurplus",
    "SmithAlpha",
    "SurplusGini",
    "Volume",
    "VolumeWeightedPrice",
    "TotalSurplus",
    "TaxRevenue",
    "DeadweightLoss",
    "FixedEfficiency",
    "UnmetDemand",
    "UnmetSupply",
    "BuyerPrice",
    "SellerPrice",
    "competitive_equilibrium",
    "describe_metric",
    "gini",
    "max_surplus",
    "trade_surplus",
    "MetricBatch",
    "measure_row",
]

_NAN = float("nan")


# -- kernels -------------------------------------------------------------------------------------
def max_surplus(
    values,
    costs,
    edges=None,
    *,
    units_b=None,
    units_s=None,
    method: str = "auto",
    open_buyers: bool = False,
) -> float:
    """Largest total surplus ``sum (v_b - c_s)`` the traders can realise.

    Parameters
    ----------
    values : array-like, shape (n_b,)
        Buyers' values per unit (price units).
    costs : array-like, shape (n_s,)
        Sellers' costs per unit (price units).
    edges : tuple of two arrays, list of pairs or array of shape (m, 2), optional
        The pairs that may trade, as indices into ``values`` and ``costs``: a ``tuple``
        ``(buyer_idx, seller_idx)`` of two 1-D arrays, or a ``list`` of ``(buyer, seller)`` pairs
        (or an (m, 2) array), one edge per row. The container decides, never the sizes; other
        forms raise ``ValueError``. ``None``: every buyer may trade with every seller.
    units_b, units_s : array-like of int, optional
        Units each buyer may buy and each seller may sell (default 1 each; 0 excludes a trader).
        Multi-unit traders are expanded into unit traders.
    method : {"auto", "dense", "sparse", "lp"}
        Solver for a restricted market (see Notes).
    open_buyers : bool
        Buyers may buy any number of units (``units_b`` is not used): each seller unit then goes
        to its best-valued partner, ``sum_j u_j max(0, max_i v_i - c_j)``. The benchmark of event
        mode, where capacity does not limit a window's trades.

    Returns
    -------
    float
        The maximum surplus (price units), ``>= 0``.

    Notes
    -----
    *Complete market*: the sorting rule -- values in descending order against costs in ascending
    order, summing the positive differences. ``O(U log U)`` in units ``U``; no size limit beyond
    memory.

    *Restricted market*: a maximum-weight bipartite matching with weights ``max(0, v_i - c_j)``
    on the edges (the assignment game). Only edges with positive weight and the units they touch
    are kept. ``"dense"`` fills a matrix over those units and calls
    ``scipy.optimize.linear_sum_assignment(maximize=True)`` (memory ``8 n_r n_c`` bytes, time
    about cubic; ``"auto"`` uses it up to ``n_r n_c <= 1e6``); ``"sparse"`` gives every buyer unit a
    private dummy seller (weight ``2**-40 max w``) so that a matching covering all buyer units
    exists, and calls ``scipy.sparse.csgraph.min_weight_full_bipartite_matching(maximize=True)``
    (LAPJVsp; memory linear in edges; about 2 s for 2e4 buyers and 1e5 edges here). The dense
    path is exact; the sparse one is exact up to ``n_units * 2**-40 max w`` (below float noise
    for realistic sizes). Multi-unit expansion multiplies an edge into ``u_i u_j`` unit edges;
    above 1e6 units (complete) or unit edges (restricted) nothing is expanded: the complete
    market is summed from counts (weighted crossing of the sorted steps) and the restricted one
    solved as a transportation problem (``"lp"``: HiGHS; integral because a bipartite incidence
    matrix is totally unimodular), so memory grows with traders and edges, not units.

    References
    ----------
    L. S. Shapley and M. Shubik, "The assignment game I: The core", Int. J. Game Theory
    1:111-130 (1971); the sorting rule for unit traders is the standard textbook result
    (the competitive equilibrium attains it, first welfare theorem).

    Examples
    --------
    >>> max_surplus([10, 8, 6], [5, 7, 9])
    6.0
    >>> max_surplus([10, 8], [5, 7], edges=([1], [0]))
    3.0
    >>> max_surplus([10, 8], [5, 7], edges=[(0, 0), (1, 1)])
    6.0
    """
    if open_buyers:
        return welfare.max_surplus_open_buyers(values, costs, edges, units_s=units_s)
    return welfare.max_surplus(
        values, costs, edges, units_b=units_b, units_s=units_s, method=method
    )


def competitive_equilibrium(values, costs) -> tuple[int, float, float]:
    """Competitive quantity and clearing price interval of unit demand and supply.

    Parameters
    ----------
    values : array-like, shape (n_b,)
        One value per buyer unit (repeat a trader's value for several units).
    costs : array-like, shape (n_s,)
        One cost per seller unit.

    Returns
    -------
    quantity : int
        ``q* = max k`` with ``v_(k) >= c_(k)`` (values sorted down, costs up).
    price_low, price_high : float
        Every price in ``[max(c_(q*), v_(q*+1)), min(v_(q*), c_(q*+1))]`` clears the market
        (demand = supply = ``q*``); NaN when supply and demand do not cross (``q* = 0``).

    References
    ----------
    Standard textbook result for unit demand and supply (e.g. V. L. Smith, J. Political Economy
    70(2):111-137, 1962, for its use in market experiments).

    Examples
    --------
    >>> competitive_equilibrium([10, 9, 8, 7], [6, 7, 8, 9])
    (3, 8.0, 8.0)
    """
    return welfare.competitive_equilibrium(values, costs)


def gini(x) -> float:
    """Population Gini coefficient ``sum_ij |x_i - x_j| / (2 n^2 mean(x))``.

    Computed from the sorted values in ``O(n log n)``. NaN for an empty array or a non-positive
    total. Negative entries are allowed (the coefficient may then exceed 1).

    References
    ----------
    C. Gini, "Variabilità e mutabilità" (1912); the sorted-values form as in A. Sen,
    On Economic Inequality (1973).

    Examples
    --------
    >>> gini([1, 1, 1, 1]), gini([0, 0, 0, 1])
    (0.0, 0.75)
    """
    return welfare.gini(x)


def trade_surplus(state: MarketState, outcome: RoundOutcome) -> tuple[np.ndarray, np.ndarray]:
    """Buyer and seller surplus of each trade, shape (n_trades,) each.

    ``((v_b - p_b) q, (p_s - c_s) q)`` with ``p_b`` what the buyer paid and ``p_s`` what the
    seller received per unit (both the trade price unless a tax or subsidy is in force).
    """
    tr = outcome.trades
    value = state.population.value
    q = tr.quantity.astype(float)
    paid = tr.price if outcome.buyer_pays is None else outcome.buyer_pays
    got = tr.price if outcome.seller_gets is None else outcome.seller_gets
    return (value[tr.buyer] - paid) * q, (got - value[tr.seller]) * q


def _surplus_sums(state: MarketState, outcome: RoundOutcome) -> tuple[float, float]:
    """Buyers' and sellers' surplus of the round: :func:`trade_surplus`, summed.

    Three default metrics read them (efficiency, buyer and seller surplus): worked out once per
    round and kept on the outcome, with the value column they were computed from.
    """
    value = state.population.value
    kept = outcome.__dict__.get("_surplus_sums")
    if kept is not None and kept[0] is value:
        return kept[1]
    fused = acceleration.kernel("surplus_sums")
    if fused is None:
        gain_b, gain_s = trade_surplus(state, outcome)
        sums = float(gain_b.sum()), float(gain_s.sum())
    else:
        tr = outcome.trades
        paid = tr.price if outcome.buyer_pays is None else outcome.buyer_pays
        got = tr.price if outcome.seller_gets is None else outcome.seller_gets
        gain_b, gain_s = fused(value, tr.buyer, tr.seller, tr.quantity, paid, got)
        sums = float(gain_b), float(gain_s)
    outcome.__dict__["_surplus_sums"] = (value, sums)
    return sums


def _weighted_prices(outcome: RoundOutcome) -> tuple[np.ndarray, np.ndarray]:
    tr = outcome.trades
    return tr.price, tr.quantity.astype(float)


# -- metrics -------------------------------------------------------------------------------------
class Volume:
    """Units traded this round."""

    description: ClassVar[str] = "units traded in the round"
    aggregate: ClassVar[str] = "sum"
    better: ClassVar[str | None] = "higher"

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Total quantity of the round's trades."""
        return float(outcome.trades.quantity.sum())


class MeanPrice:
    """Plain mean of the round's trade prices (each trade once); NaN without trades."""

    description: ClassVar[str] = "mean price of the round's trades (each trade counted once)"
    aggregate: ClassVar[str] = "mean"
    better: ClassVar[str | None] = None

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Mean of ``trades.price``."""
        price = outcome.trades.price
        fused = acceleration.kernel("mean_of")
        if fused is not None:  # one compiled pass, numpy's rounding
            return float(fused(price))
        return float(price.mean()) if price.size else _NAN


class VolumeWeightedPrice:
    """Volume-weighted average price ``sum p q / sum q``; NaN without trades."""

    description: ClassVar[str] = "volume-weighted average price of the round's trades"
    aggregate: ClassVar[str] = "mean"
    better: ClassVar[str | None] = None

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """``sum(p q) / sum(q)``."""
        fused = acceleration.kernel("weighted_price")
        if fused is not None:  # one compiled pass, numpy's rounding
            return float(fused(outcome.trades.price, outcome.trades.quantity))
        price, q = _weighted_prices(outcome)
        return float((price * q).sum() / q.sum()) if q.sum() > 0 else _NAN


class PriceDispersion:
    """Standard deviation of the round's prices per unit (population sd, weights = quantity).

    0 for a single trade, NaN without trades.
    """

    description: ClassVar[str] = "standard deviation of the round's trade prices (per unit)"
    aggregate: ClassVar[str] = "mean"
    better: ClassVar[str | None] = "lower"

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Quantity-weighted population standard deviation."""
        fused = acceleration.kernel("price_spread")
        if fused is not None:  # one compiled pass, numpy's rounding
            return float(fused(outcome.trades.price, outcome.trades.quantity, 0.0, False))
        price, q = _weighted_prices(outcome)
        if q.sum() <= 0:
            return _NAN
        mean = (price * q).sum() / q.sum()
        return float(np.sqrt((q * (price - mean) ** 2).sum() / q.sum()))


class PreferenceGap:
    """Mean sellers' preferred price minus mean buyers' preferred price.

    ``mean(mu_s) - mean(mu_b)``: positive when sellers on average want more than buyers offer
    (the gap the joint curve must bridge, MODEL.md section 3); NaN without buyers or sellers.
    """

    description: ClassVar[str] = "mean sellers' preferred price minus mean buyers' preferred price"
    aggregate: ClassVar[str] = "last"
    better: ClassVar[str | None] = None

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """``mean(mu[sellers]) - mean(mu[buyers])``."""
        pop = state.population
        fused = acceleration.kernel("preference_gap")
        if fused is not None and pop.role.shape == pop.mu.shape:  # one compiled pass
            return float(fused(pop.mu, pop.role))
        is_buyer = pop.role == BUYER  # shape: (n,)
        is_seller = pop.role == SELLER  # shape: (n,)
        if not is_buyer.any() or not is_seller.any():
            return _NAN
        return float(pop.mu[is_seller].mean() - pop.mu[is_buyer].mean())


class BuyerSurplus:
    """Buyers' surplus this round, ``sum (v_b - p) q`` (price units)."""

    description: ClassVar[str] = "buyers' surplus of the round, sum of (value - price) x quantity"
    aggregate: ClassVar[str] = "sum"
    better: ClassVar[str | None] = "higher"

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Sum over trades."""
        return _surplus_sums(state, outcome)[0]


class SellerSurplus:
    """Sellers' surplus this round, ``sum (p - c_s) q`` (price units)."""

    description: ClassVar[str] = "sellers' surplus of the round, sum of (price - cost) x quantity"
    aggregate: ClassVar[str] = "sum"
    better: ClassVar[str | None] = "higher"

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Sum over trades."""
        return _surplus_sums(state, outcome)[1]


class AllocativeEfficiency:
    """Realised surplus over the largest achievable surplus this round.

    ``sum (v_b - c_s) q`` over the round's trades divided by :func:`max_surplus` of the traders'
    values and costs, restricted to the network's edges unless ``network.complete``. Units per
    trader: its capacity, and for a seller no more than the stock it held at the start of the
    round (stock now plus units sold). In event mode (``state.round_capacity`` False: capacity
    does not limit a window) buyers may buy any number of units and a seller's units are the
    stock it held at the window's start, so each of them goes to its best-valued partner.
    Budgets are ignored in the benchmark. The benchmark is kept in ``state.cache`` under the
    plugin's name and recomputed only when values, units or the network change (checked in
    linear time each round). NaN when no surplus is achievable.

    References
    ----------
    V. L. Smith, J. Political Economy 70(2):111-137 (1962) and D. K. Gode and S. Sunder,
    J. Political Economy 101(1):119-137 (1993) (efficiency as realised over maximum surplus);
    Shapley and Shubik, Int. J. Game Theory 1:111-130 (1971) (the restricted maximum).
    """

    description: ClassVar[str] = "realised surplus / largest achievable surplus on the network"
    aggregate: ClassVar[str] = "mean"
    better: ClassVar[str | None] = "higher"

    def benchmark(self, state: MarketState, outcome: RoundOutcome) -> float:
        """The largest achievable surplus for this round's traders (cached)."""
        pop = state.population
        net = state.network
        key = getattr(self, "plugin_name", "efficiency")
        cached = state.cache.get(key)
        open_buyers = not state.round_capacity  # event mode: no capacity per window
        same = None if open_buyers else acceleration.kernel("same_units")
        if cached is not None and same is not None and cached["network"] is net:
            traded = np.asarray(outcome.traded)
            columns = (pop.capacity, pop.stock, traded, pop.value, cached["value"], cached["units"])
            if all(c.shape == pop.role.shape for c in columns) and same(pop.role, *columns):
                return cached["max_surplus"]  # one compiled pass instead of the checks below
        is_buyer = pop.role == BUYER  # shape: (n,)
        start_stock = pop.stock + np.asarray(outcome.traded)  # shape: (n,): before this round
        if open_buyers:  # buyers' units are not limited (0 here: not used)
            units = np.where(is_buyer, 0, start_stock)
        else:
            units = np.where(is_buyer, pop.capacity, np.minimum(pop.capacity, start_stock))
        if (
            cached is not None
            and cached["network"] is net
            and np.array_equal(cached["value"], pop.value)
            and np.array_equal(cached["units"], units)
        ):
            return cached["max_surplus"]
        buyers = np.flatnonzero(is_buyer)
        sellers = np.flatnonzero(~is_buyer)
        if net.complete:
            edges = None
        else:
            slot = np.empty(len(pop), dtype=np.int64)  # row -> index among its role
            slot[buyers] = np.arange(buyers.size)
            slot[sellers] = np.arange(sellers.size)
            edges = (slot[net.buyer], slot[net.seller])
        best = max_surplus(
            pop.value[buyers],
            pop.value[sellers],
            edges,
            units_b=units[buyers],
            units_s=units[sellers],
            open_buyers=open_buyers,
        )
        state.cache[key] = {
            "network": net,
            "value": pop.value.copy(),
            "units": units,
            "max_surplus": best,
        }
        return best

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Realised over maximum surplus (a fraction, 1 = fully efficient)."""
        best = self.benchmark(state, outcome)
        if not best > 0:
            return _NAN
        gain_b, gain_s = _surplus_sums(state, outcome)
        return float((gain_b + gain_s) / best)


class SurplusGini:
    """Gini coefficient of the traders' surplus this round (all traders, non-traders at 0).

    A trader's surplus sums its trades' ``(v_b - p) q`` (buyer) or ``(p - c_s) q`` (seller).
    A trade at a loss gives a negative entry (the coefficient may then exceed 1). NaN when the
    total surplus is not positive (for example a round without trades).

    References
    ----------
    C. Gini (1912); see :func:`gini`.
    """

    description: ClassVar[str] = "Gini coefficient of per-trader surplus in the round"
    aggregate: ClassVar[str] = "mean"
    better: ClassVar[str | None] = "lower"

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Gini of the per-trader surplus, shape (n,)."""
        n = len(state.population)
        tr = outcome.trades
        fused = acceleration.kernel("surplus_gini")
        if fused is not None:  # one compiled pass (bounds checked), numpy's rounding
            paid = tr.price if outcome.buyer_pays is None else outcome.buyer_pays
            got = tr.price if outcome.seller_gets is None else outcome.seller_gets
            value = state.population.value
            return float(fused(value, tr.buyer, tr.seller, tr.quantity, paid, got, n))
        gain_b, gain_s = trade_surplus(state, outcome)
        per_trader = np.bincount(tr.buyer, weights=gain_b, minlength=n) + np.bincount(
            tr.seller, weights=gain_s, minlength=n
        )  # shape: (n,)
        return gini(per_trader)


class SmithAlpha:
    """Smith's convergence coefficient ``alpha = 100 sigma_0 / P_0``.

    ``sigma_0`` is the root-mean-square deviation of the round's prices (per unit) from the
    competitive equilibrium price ``P_0 = state.equilibrium_price``. In percent; NaN without
    trades or without a positive equilibrium price.

    References
    ----------
    V. L. Smith, "An experimental study of competitive market behavior", J. Political Economy
    70(2):111-137 (1962) (from memory).
    """

    description: ClassVar[str] = "Smith's alpha: RMS deviation of prices from equilibrium, % of it"
    aggregate: ClassVar[str] = "final_half_mean"
    better: ClassVar[str | None] = "lower"

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """``100 sqrt(sum q (p - P0)^2 / sum q) / P0``."""
        p0 = float(state.equilibrium_price)
        fused = acceleration.kernel("price_spread")
        if fused is not None:  # one compiled pass, numpy's rounding
            if not np.isfinite(p0) or p0 <= 0:
                return _NAN
            tr = outcome.trades
            return float(100.0 * fused(tr.price, tr.quantity, p0, True) / p0)
        price, q = _weighted_prices(outcome)
        if q.sum() <= 0 or not np.isfinite(p0) or p0 <= 0:
            return _NAN
        return float(100.0 * np.sqrt((q * (price - p0) ** 2).sum() / q.sum()) / p0)


class EntropicEnergy:
    """The market's total entropic energy: what it costs to move every preferred price home.

    ``E = sum_i -gamma_i ln(P_i(v_i) / P_i(mu_i))``: the energy to move trader ``i``'s price
    from its preferred price ``mu_i`` to its value or cost ``v_i`` on its own curve (MODEL.md
    section 2). For normal curves ``E = sum gamma (mu - v)^2 / (2 sigma^2)`` (the spring energy,
    computed inline); other families use the curve batch API
    ``population.curves().energy(mu, value, gamma)``. Energy units.

    References
    ----------
    The entropic force ``F = gamma d/dx ln P`` and its potential, MODEL.md section 2 (standard
    statistical mechanics: the stationary Fokker-Planck solution of overdamped Langevin dynamics).
    """

    description: ClassVar[str] = "total entropic energy to move every preferred price to its anchor"
    aggregate: ClassVar[str] = "last"
    better: ClassVar[str | None] = None

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Sum over traders."""
        pop = state.population
        fused = acceleration.kernel("spring_energy") if pop.curve == "normal" else None
        if fused is not None and pop.gamma.shape == pop.mu.shape == pop.sigma.shape:
            return float(fused(pop.gamma, pop.mu, pop.value, pop.sigma))
        if pop.curve == "normal":
            energy = pop.gamma * (pop.mu - pop.value) ** 2 / (2.0 * pop.sigma**2)  # shape: (n,)
        else:
            energy = np.asarray(pop.curves().energy(pop.mu, pop.value, pop.gamma), dtype=float)
        return float(np.sum(energy))


# -- welfare under interventions (MODEL.md section 9) -------------------------------------------
def fixed_benchmark(state: MarketState) -> float:
    """Largest achievable surplus per round of the market before any intervention (cached).

    The market leaves the pre-intervention roles, values, units and network in
    ``state._benchmark_source``; without it (a state built by hand) the current market is used.
    Price units per round (round mode only: the event market refuses the metrics that use it).
    """
    if np.isfinite(state.benchmark_surplus):
        return state.benchmark_surplus
    source = getattr(state, "_benchmark_source", None)
    if source is None:
        pop = state.population
        source = (pop.role, pop.value, state.remaining, state.network)
    role, value, units, net = source
    buyers = np.flatnonzero(role == BUYER)
    sellers = np.flatnonzero(role != BUYER)
    edges = None
    if net is not None and not net.complete:
        slot = np.empty(role.size, dtype=np.int64)
        slot[buyers] = np.arange(buyers.size)
        slot[sellers] = np.arange(sellers.size)
        edges = (slot[net.buyer], slot[net.seller])
    best = max_surplus(
        value[buyers], value[sellers], edges, units_b=units[buyers], units_s=units[sellers]
    )
    state.benchmark_surplus = float(best)
    return state.benchmark_surplus


def _total_surplus(state: MarketState, outcome: RoundOutcome) -> float:
    gain_b, gain_s = trade_surplus(state, outcome)
    return float(gain_b.sum() + gain_s.sum()) + float(outcome.tax_revenue)


class TotalSurplus:
    """Buyers' plus sellers' surplus plus tax revenue less subsidy cost, this round.

    The treasury's take is a transfer, not a loss: a tax moves surplus from traders to the
    treasury and loses only the trades it prevents (MODEL.md section 9).
    """

    description: ClassVar[str] = "buyers' + sellers' surplus + tax revenue - subsidy cost"
    aggregate: ClassVar[str] = "sum"
    better: ClassVar[str | None] = "higher"

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Price units."""
        return _total_surplus(state, outcome)


class TaxRevenue:
    """Taxes collected less subsidies paid this round (price units; negative: net subsidy)."""

    description: ClassVar[str] = "taxes collected less subsidies paid in the round"
    aggregate: ClassVar[str] = "sum"
    better: ClassVar[str | None] = None

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Price units."""
        return float(outcome.tax_revenue)


class DeadweightLoss:
    """The fixed benchmark's surplus less this round's total surplus (price units).

    Against the market as it stood before any intervention, so a tax or a removal shows the
    surplus it destroys (a tax's revenue is counted as surplus, not as a loss).
    """

    description: ClassVar[str] = "largest surplus before any intervention - total surplus"
    aggregate: ClassVar[str] = "sum"
    better: ClassVar[str | None] = "lower"

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Price units."""
        return fixed_benchmark(state) - _total_surplus(state, outcome)


class FixedEfficiency:
    """Total surplus over the largest achievable surplus of the market before any intervention.

    ``efficiency`` compares with the market as it now is, so a tax (costs shifted) or fewer
    traders (fewer possible pairs) can look like a gain there; against this fixed benchmark
    they cannot (MODEL.md section 9). NaN when the benchmark is not positive.
    """

    description: ClassVar[str] = "total surplus / largest surplus before any intervention"
    aggregate: ClassVar[str] = "mean"
    better: ClassVar[str | None] = "higher"

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """A fraction (1 = the pre-intervention maximum)."""
        best = fixed_benchmark(state)
        if not best > 0:
            return _NAN
        return _total_surplus(state, outcome) / best


class UnmetDemand:
    """Units buyers wanted at a binding price ceiling that did not trade this round.

    Buyers whose value is at least the ceiling want their units left at the ceiling; 0 when no
    ceiling is in force.
    """

    description: ClassVar[str] = "units wanted at the price ceiling that did not trade"
    aggregate: ClassVar[str] = "sum"
    better: ClassVar[str | None] = "lower"

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Units."""
        return float(outcome.unmet_demand)


class UnmetSupply:
    """Units sellers offered at a binding price floor that did not trade this round."""

    description: ClassVar[str] = "units offered at the price floor that did not trade"
    aggregate: ClassVar[str] = "sum"
    better: ClassVar[str | None] = "lower"

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Units."""
        return float(outcome.unmet_supply)


def _weighted(price: np.ndarray, q: np.ndarray) -> float:
    total = q.sum()
    return float((price * q).sum() / total) if total > 0 else _NAN


class BuyerPrice:
    """Volume-weighted price buyers paid per unit this round, taxes included; NaN without trade."""

    description: ClassVar[str] = "volume-weighted price buyers paid (tax included)"
    aggregate: ClassVar[str] = "mean"
    better: ClassVar[str | None] = None

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Price units."""
        return _weighted(outcome.buyer_pays, outcome.trades.quantity.astype(float))


class SellerPrice:
    """Volume-weighted price sellers received per unit this round, after tax; NaN without trade."""

    description: ClassVar[str] = "volume-weighted price sellers received (after tax)"
    aggregate: ClassVar[str] = "mean"
    better: ClassVar[str | None] = None

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Price units."""
        return _weighted(outcome.seller_gets, outcome.trades.quantity.astype(float))


# -- the built-in round metrics in one compiled call --------------------------------------------
#: The slot of each built-in metric in ``numba_loops.round_metrics``'s output.
_SLOTS = {
    Volume: 0,
    MeanPrice: 1,
    VolumeWeightedPrice: 2,
    PriceDispersion: 3,
    PreferenceGap: 4,
    BuyerSurplus: 5,
    SellerSurplus: 6,
    AllocativeEfficiency: 7,
    SurplusGini: 8,
    SmithAlpha: 9,
    EntropicEnergy: 10,
}
_EFFICIENCY, _ENERGY = 7, 10
_NO_FLOATS = np.zeros(0)
_NO_INTS = np.zeros(0, dtype=np.int64)


class MetricBatch:
    """A market's built-in round metrics measured in one compiled call, the same numbers.

    A round of a small market spends more on calling eleven metrics (each a Python call and a
    kernel dispatch) than on their passes over the traders; ``numba_loops.round_metrics``
    runs their kernels in one call. Only metrics whose class is exactly a built-in one are
    batched (a subclass may measure otherwise); the others are measured one by one, in their
    place in the row. :meth:`fill` returns False, filling nothing, when the kernels are not in
    use this round (the caller then measures every metric itself).

    Parameters
    ----------
    metrics : list of (name, Metric)
        The market's metrics, in column order.
    """

    def __init__(self, metrics) -> None:
        self.source = metrics  #: the list it was made for (a market that swaps it measures apart)
        self.metrics = list(metrics)
        self.slots = [_SLOTS.get(type(m), -1) for _, m in self.metrics]
        self.wanted = sum({1 << slot for slot in self.slots if slot >= 0})  # bit k: slot k
        if self.wanted & (1 << _EFFICIENCY):
            self._efficiency = self.metrics[self.slots.index(_EFFICIENCY)][1]
            self._efficiency_key = getattr(self._efficiency, "plugin_name", "efficiency")
        else:
            self._efficiency = None
        self._out = np.empty(len(_SLOTS))

    @classmethod
    def of(cls, metrics) -> MetricBatch | None:
        """A batch for ``metrics``, or None when fewer than two of them are built-in ones."""
        batch = cls(metrics)
        return batch if sum(slot >= 0 for slot in batch.slots) >= 2 else None

    def fill(self, row: dict, state: MarketState, outcome: RoundOutcome) -> bool:
        """Add every metric's value to ``row`` in column order; False if nothing was done."""
        fused = acceleration.kernel("round_metrics")
        if fused is None:
            return False
        pop = state.population
        shape = pop.role.shape
        # only efficiency's benchmark check reads the per-trader tally: reading it makes the
        # outcome count every trader's units, which volume and prices do not need
        traded = outcome.traded if self._efficiency is not None else _NO_INTS
        if not (
            pop.mu.shape == pop.sigma.shape == pop.gamma.shape == pop.value.shape == shape
            and pop.capacity.shape == pop.stock.shape == shape
            and isinstance(traded, np.ndarray)
            and (self._efficiency is None or traded.shape == shape)
        ):
            return False
        wanted = self.wanted
        normal = pop.curve == "normal"
        if not normal:  # energy through the curve batch API, by the metric itself
            wanted &= ~(1 << _ENERGY)
        tr = outcome.trades
        paid = tr.price if outcome.buyer_pays is None else outcome.buyer_pays
        got = tr.price if outcome.seller_gets is None else outcome.seller_gets
        best, old_value, old_units = _NAN, _NO_FLOATS, _NO_INTS
        if self._efficiency is not None and state.round_capacity:  # event mode: by the metric
            cached = state.cache.get(self._efficiency_key)
            if (
                cached is not None
                and cached["network"] is state.network
                and cached["value"].shape == cached["units"].shape == shape
            ):
                best, old_value, old_units = cached["max_surplus"], cached["value"], cached["units"]
        held = fused(
            wanted,
            tr.buyer,
            tr.seller,
            tr.quantity,
            tr.price,
            paid,
            got,
            pop.value,
            pop.mu,
            pop.sigma,
            pop.gamma,
            pop.role,
            pop.capacity,
            pop.stock,
            traded,
            old_value,
            old_units,
            float(best),
            float(state.equilibrium_price),
            self._out,
        )
        values = self._out.tolist()
        if not held:  # the efficiency benchmark is (re)computed and cached by the metric
            outcome.__dict__["_surplus_sums"] = (pop.value, (values[5], values[6]))
            values[_EFFICIENCY] = float(self._efficiency.measure(state, outcome))
        for (name, metric), slot in zip(self.metrics, self.slots, strict=True):
            if slot < 0 or (slot == _ENERGY and not normal):
                row[name] = float(metric.measure(state, outcome))
            else:
                row[name] = values[slot]
        return True


def measure_row(row: dict, metrics, batch, state: MarketState, outcome: RoundOutcome) -> dict:
    """Add every metric's value to ``row``, in one call through ``batch`` when it serves them.

    ``batch`` is the :class:`MetricBatch` made for ``metrics`` (or None); a list put in the
    place of the one it was made for is measured one metric at a time.
    """
    if batch is None or batch.source is not metrics or not batch.fill(row, state, outcome):
        for name, metric in metrics:
            row[name] = float(metric.measure(state, outcome))
    return row


# -- units and aggregation, for tables and listings ------------------------------------------
_PRICE, _MONEY, _GOODS = "price units", "money (price units x goods)", "units of goods"
#: The unit of each built-in metric (a round's value and a run's value share it). A third-party
#: metric may set its own ``unit`` class attribute; :func:`describe_metric` reads either.
_UNITS = {
    Volume: _GOODS,
    UnmetDemand: _GOODS,
    UnmetSupply: _GOODS,
    MeanPrice: _PRICE,
    VolumeWeightedPrice: _PRICE,
    PriceDispersion: _PRICE,
    PreferenceGap: _PRICE,
    BuyerPrice: _PRICE,
    SellerPrice: _PRICE,
    BuyerSurplus: _MONEY,
    SellerSurplus: _MONEY,
    TotalSurplus: _MONEY,
    TaxRevenue: _MONEY,
    DeadweightLoss: _MONEY,
    AllocativeEfficiency: "fraction of the largest achievable surplus (1 = all of it)",
    FixedEfficiency: "fraction of the largest surplus before any intervention",
    SurplusGini: "Gini coefficient (0 = equal)",
    SmithAlpha: "% of the equilibrium price",
    EntropicEnergy: "energy units of the curve family",
}
for _cls, _unit in _UNITS.items():
    _cls.unit = _unit

#: How a run's rounds become its one number, in words (the ``aggregate`` attribute).
AGGREGATE_WORDS = {
    "sum": "sum over its rounds",
    "mean": "mean over its rounds (rounds without a value left out)",
    "last": "value after its last round",
    "final_half_mean": "mean over the second half of its rounds",
}


def describe_metric(metric) -> str:
    """``description; unit: ...; a run: ...`` of a metric class or instance.

    Examples
    --------
    >>> describe_metric(Volume)
    'units traded in the round; unit: units of goods; a run: sum over its rounds'
    """
    text = str(getattr(metric, "description", "")).strip().splitlines()[0]
    unit = getattr(metric, "unit", None)
    agg = getattr(metric, "aggregate", None)
    if unit:
        text += f"; unit: {unit}"
    if agg:
        text += f"; a run: {AGGREGATE_WORDS.get(agg, agg)}"
    return text
