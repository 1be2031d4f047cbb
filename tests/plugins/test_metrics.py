"""Metrics and their kernels: surplus, efficiency, equilibrium, Gini, Smith's alpha, energy."""

from __future__ import annotations

import itertools
import math

import networkx as nx
import numpy as np
import pytest

from propensim.agents.population import Population, build_population
from propensim.plugins import metrics as M
from propensim.plugins.contracts import Metric
from propensim.plugins.metrics import (
    AllocativeEfficiency,
    BuyerSurplus,
    EntropicEnergy,
    MeanPrice,
    PreferenceGap,
    PriceDispersion,
    SellerSurplus,
    SmithAlpha,
    SurplusGini,
    Volume,
    VolumeWeightedPrice,
    competitive_equilibrium,
    gini,
    max_surplus,
)
from propensim.plugins.registry import get_plugin, make_plugin, register, unregister
from propensim.plugins.types import MarketState, RoundOutcome, Trades, TradingNetwork


def unit_market(values, costs) -> Population:
    return build_population(
        len(values),
        len(costs),
        value={"values": np.asarray(values, float)},
        cost={"values": np.asarray(costs, float)},
        rng=0,
    )


def complete_network(pop: Population) -> TradingNetwork:
    b, s = pop.buyers, pop.sellers
    return TradingNetwork(
        n=len(pop), buyer=np.repeat(b, s.size), seller=np.tile(s, b.size), complete=True
    )


def after_round(pop: Population, net: TradingNetwork, trades: Trades, **kw):
    """State and outcome at the end of a round: sellers' stock already reduced by their sales."""
    outcome = RoundOutcome.from_trades(trades, len(pop))
    pop = pop.copy()
    np.subtract.at(pop.stock, trades.seller, trades.quantity)
    np.add.at(pop.stock, trades.buyer, trades.quantity)
    return MarketState(population=pop, network=net, **kw), outcome


# -- linear supply and demand ---------------------------------------------------------------------
def test_linear_supply_and_demand_worked_example():
    # Open business-calculus text (consumer and producer surplus chapter): P_d = 150 - 0.8 q,
    # P_s = 5.2 q -> q = 25, p = 130, consumer surplus 250, producer surplus 1625.
    # Approximated by unit traders, m per unit of quantity, at the midpoints of their steps.
    m = 10
    dq = 1.0 / m
    x = (np.arange(1, 40 * m + 1) - 0.5) * dq  # shape: (400,)
    values = 150.0 - 0.8 * x
    costs = 5.2 * x
    q, low, high = competitive_equilibrium(values, costs)
    assert q * dq == pytest.approx(25.0, abs=dq)
    assert low <= 130.0 <= high and high - low < 6.0 * dq  # discretisation tolerance
    assert max_surplus(values, costs) * dq == pytest.approx(250.0 + 1625.0, rel=1e-9)

    # trade the q cheapest seller units with the q keenest buyer units at p = 130
    pop = unit_market(values, costs)
    net = complete_network(pop)
    n_b = values.size
    trades = Trades(np.arange(q), n_b + np.arange(q), np.full(q, 130.0), np.ones(q, int))
    state, outcome = after_round(pop, net, trades, equilibrium_price=130.0)
    assert BuyerSurplus().measure(state, outcome) * dq == pytest.approx(250.0, rel=1e-9)
    assert SellerSurplus().measure(state, outcome) * dq == pytest.approx(1625.0, rel=1e-9)
    assert AllocativeEfficiency().measure(state, outcome) == pytest.approx(1.0)
    assert SmithAlpha().measure(state, outcome) == 0.0
    # leave out the marginal pair: efficiency drops by its surplus share
    part = Trades(
        np.arange(q - 1), n_b + np.arange(q - 1), np.full(q - 1, 130.0), np.ones(q - 1, int)
    )
    state2, outcome2 = after_round(pop, net, part)
    lost = values[q - 1] - costs[q - 1]
    expected = 1.0 - lost / max_surplus(values, costs)
    assert AllocativeEfficiency().measure(state2, outcome2) == pytest.approx(expected)


def test_sorting_rule_and_equilibrium_on_a_hand_example():
    # Unit traders: sort values down and costs up; q* = max k with v_(k) >= c_(k)
    # (standard textbook result, REFERENCES.md "unit traders, call market").
    values, costs = [6, 10, 2, 8], [9, 3, 7, 5]
    assert max_surplus(values, costs) == 10.0  # (10 - 3) + (8 - 5)
    assert competitive_equilibrium(values, costs) == (2, 6.0, 7.0)
    assert competitive_equilibrium([10, 9, 8, 7], [6, 7, 8, 9]) == (3, 8.0, 8.0)
    q, lo, hi = competitive_equilibrium([1, 2], [5, 6])
    assert q == 0 and math.isnan(lo) and math.isnan(hi)
    assert max_surplus([1, 2], [5, 6]) == 0.0


# -- restricted networks: the assignment game -----------------------------------------------------
def brute_force(values, costs, edges):
    """Best set of disjoint edges by enumeration (tiny cases only)."""
    best = 0.0
    pairs = list(zip(*edges, strict=True))
    for r in range(1, len(pairs) + 1):
        for subset in itertools.combinations(pairs, r):
            b = [p[0] for p in subset]
            s = [p[1] for p in subset]
            if len(set(b)) == r and len(set(s)) == r:
                best = max(best, sum(max(0.0, values[i] - costs[j]) for i, j in subset))
    return best


def networkx_matching(values, costs, edges) -> int:
    g = nx.Graph()
    for i, j in zip(*edges, strict=True):
        w = int(values[i] - costs[j])
        if w > 0:
            g.add_edge(("b", int(i)), ("s", int(j)), weight=w)
    matching = nx.max_weight_matching(g)
    return sum(g.edges[e]["weight"] for e in matching)


@pytest.mark.parametrize("seed", range(8))
def test_restricted_max_surplus_agrees_with_networkx_and_both_solvers(seed):
    # Shapley and Shubik, Int. J. Game Theory 1:111-130 (1971): the maximum surplus on a network
    # is a maximum-weight bipartite matching with weights max(0, v_i - c_j).
    rng = np.random.default_rng(seed)
    n_b, n_s = rng.integers(5, 25, size=2)
    values = rng.integers(50, 150, n_b).astype(float)
    costs = rng.integers(40, 140, n_s).astype(float)
    m = int(rng.integers(n_b, 4 * n_b))
    edges = (rng.integers(0, n_b, m), rng.integers(0, n_s, m))
    expected = networkx_matching(values, costs, edges)
    assert max_surplus(values, costs, edges, method="dense") == expected
    assert max_surplus(values, costs, edges, method="sparse") == pytest.approx(expected, abs=1e-6)
    assert max_surplus(values, costs, edges) <= max_surplus(values, costs) + 1e-9


def test_restricted_max_surplus_on_a_hand_example():
    # buyer 0 (10) and buyer 1 (9) both reach only seller 0 (1); buyer 1 also reaches seller 1 (4)
    values, costs = [10.0, 9.0], [1.0, 4.0]
    edges = (np.array([0, 1, 1]), np.array([0, 0, 1]))
    assert brute_force(values, costs, edges) == 14.0  # 0-0 (9) + 1-1 (5)
    assert max_surplus(values, costs, edges) == 14.0
    assert max_surplus(values, costs, (np.array([0, 1]), np.array([0, 0]))) == 9.0


def test_complete_edges_equal_the_sorting_rule():
    rng = np.random.default_rng(1)
    values, costs = rng.uniform(0, 100, 30), rng.uniform(0, 100, 20)
    b, s = np.meshgrid(np.arange(30), np.arange(20), indexing="ij")
    full = max_surplus(values, costs, (b.ravel(), s.ravel()))
    assert full == pytest.approx(max_surplus(values, costs), rel=1e-12)


def test_multi_unit_traders_expand_into_units():
    values, costs = np.array([10.0, 6.0]), np.array([2.0, 5.0])
    units_b, units_s = np.array([2, 1]), np.array([1, 3])
    # complete: buyer units 10, 10, 6 against seller units 2, 5, 5, 5 -> 8 + 5 + 1
    assert max_surplus(values, costs, units_b=units_b, units_s=units_s) == 14.0
    edges = (np.array([0, 1]), np.array([1, 0]))  # buyer 0 only with seller 1, buyer 1 with 0
    # buyer 0's two units at seller 1 (cost 5): 10; buyer 1 at seller 0: 4
    assert max_surplus(values, costs, edges, units_b=units_b, units_s=units_s) == 14.0
    unit_edges = ([0, 0, 0, 1, 1, 1, 2], [1, 2, 3, 1, 2, 3, 0])  # the same, unit by unit
    expanded = max_surplus([10.0, 10.0, 6.0], [2.0, 5.0, 5.0, 5.0], unit_edges)
    assert expanded == 14.0
    assert max_surplus(values, costs, edges, units_b=[0, 1], units_s=[1, 3]) == 4.0


@pytest.mark.parametrize("method", ["dense", "sparse"])
def test_max_surplus_sparse_random_network_matches_dense(method):
    rng = np.random.default_rng(12)
    n_b = n_s = 300
    values, costs = rng.uniform(50, 150, n_b), rng.uniform(50, 150, n_s)
    edges = (rng.integers(0, n_b, 1500), rng.integers(0, n_s, 1500))
    ref = max_surplus(values, costs, edges, method="dense")
    assert max_surplus(values, costs, edges, method=method) == pytest.approx(ref, rel=1e-12)


@pytest.mark.parametrize("complete", [True, False])
def test_open_buyers_max_surplus_agrees_with_scipys_assignment(complete):
    # Buyers without a unit limit (event mode's benchmark): no buyer can use more units than
    # the sellers hold in all, so giving every buyer that many unit copies and solving the
    # assignment with scipy.optimize.linear_sum_assignment (maximize=True) gives the maximum.
    from scipy.optimize import linear_sum_assignment

    rng = np.random.default_rng(7 if complete else 8)
    for _ in range(20):
        n_b, n_s = int(rng.integers(1, 6)), int(rng.integers(1, 6))
        values, costs = rng.uniform(60, 120, n_b), rng.uniform(60, 120, n_s)
        units_s = rng.integers(0, 4, n_s)
        if complete:
            edges, pairs = None, [(i, j) for i in range(n_b) for j in range(n_s)]
        else:
            pairs = sorted({(int(rng.integers(n_b)), int(rng.integers(n_s))) for _ in range(6)})
            edges = (np.array([i for i, _ in pairs]), np.array([j for _, j in pairs]))
        copies = max(int(units_s.sum()), 1)
        seller_unit = np.repeat(np.arange(n_s), units_s)  # shape: (U,) one column per unit
        grid = np.zeros((n_b * copies, seller_unit.size))  # rows: buyer copies
        for i, j in pairs:
            gain = max(values[i] - costs[j], 0.0)
            grid[i * copies : (i + 1) * copies, seller_unit == j] = gain
        rows, cols = linear_sum_assignment(grid, maximize=True)
        expected = float(grid[rows, cols].sum())
        got = max_surplus(values, costs, edges, units_s=units_s, open_buyers=True)
        assert got == pytest.approx(expected, rel=1e-12, abs=1e-12)
        # and never below the capped market's maximum (one unit per buyer)
        assert got >= max_surplus(values, costs, edges, units_s=units_s) - 1e-9


def test_max_surplus_bad_input():
    with pytest.raises(ValueError, match="units_b"):
        max_surplus([1, 2], [1], units_b=[1, -1])
    with pytest.raises(ValueError, match="edges must index"):
        max_surplus([1, 2], [1], edges=([0], [3]))
    with pytest.raises(ValueError, match="values must be finite"):
        max_surplus([np.nan], [1])
    with pytest.raises(ValueError, match="method"):
        max_surplus([1], [1], edges=([0], [0]), method="fast")


# -- Gini, Smith's alpha, prices ------------------------------------------------------------------
def test_gini_hand_values_and_definition():
    # population Gini sum |x_i - x_j| / (2 n^2 mean): [1,1,1,1] -> 0, [0,0,0,1] -> 0.75
    # (Gini 1912; common practice)
    assert gini([1, 1, 1, 1]) == 0.0
    assert gini([0, 0, 0, 1]) == pytest.approx(0.75)
    assert gini([1, 2, 3, 4]) == pytest.approx(0.25)  # 20 / (2 * 16 * 2.5)
    x = np.random.default_rng(0).exponential(size=50)
    pairwise = np.abs(x[:, None] - x[None, :]).sum() / (2 * x.size**2 * x.mean())
    assert gini(x) == pytest.approx(pairwise)
    assert math.isnan(gini([0, 0])) and math.isnan(gini([]))


def hand_state(prices, quantities, p0=100.0):
    pop = build_population(3, 3, value=120.0, cost=80.0, stock=3, capacity=3, rng=0)
    trades = Trades([0, 1, 2][: len(prices)], [3, 4, 5][: len(prices)], prices, quantities)
    return after_round(pop, complete_network(pop), trades, equilibrium_price=p0)


def test_smith_alpha_hand_example():
    # Smith, J. Political Economy 70(2):111-137 (1962) (from memory): alpha = 100 sigma_0 / P_0,
    # sigma_0 the RMS deviation from P_0. Prices 98, 102, 100, 100 around 100 -> sqrt(2) %.
    state, outcome = hand_state([98.0, 102.0, 100.0], [1, 1, 2])
    assert SmithAlpha().measure(state, outcome) == pytest.approx(math.sqrt(2.0))
    state.equilibrium_price = float("nan")
    assert math.isnan(SmithAlpha().measure(state, outcome))


def test_price_metrics_on_a_hand_batch():
    state, outcome = hand_state([10.0, 12.0, 14.0], [1, 1, 2])
    assert Volume().measure(state, outcome) == 4.0
    assert MeanPrice().measure(state, outcome) == pytest.approx(12.0)
    assert VolumeWeightedPrice().measure(state, outcome) == pytest.approx(12.5)
    # per-unit deviations -2.5, -0.5, 1.5, 1.5: variance 11 / 4
    assert PriceDispersion().measure(state, outcome) == pytest.approx(math.sqrt(2.75))
    empty_state, empty = hand_state([], [])
    assert Volume().measure(empty_state, empty) == 0.0
    for metric in (MeanPrice(), VolumeWeightedPrice(), PriceDispersion(), SurplusGini()):
        assert math.isnan(metric.measure(empty_state, empty))
    assert AllocativeEfficiency().measure(empty_state, empty) == 0.0


def test_surplus_split_and_gini_of_surplus():
    state, outcome = hand_state([100.0, 110.0], [1, 2])
    # buyers: (120 - 100) + 2 (120 - 110) = 40; sellers: (100 - 80) + 2 (110 - 80) = 80
    assert BuyerSurplus().measure(state, outcome) == pytest.approx(40.0)
    assert SellerSurplus().measure(state, outcome) == pytest.approx(80.0)
    per_trader = [20.0, 20.0, 0.0, 20.0, 60.0, 0.0]
    assert SurplusGini().measure(state, outcome) == pytest.approx(gini(per_trader))


def test_preference_gap():
    pop = build_population(2, 2, value=100.0, cost=90.0, rng=0)
    pop.mu = np.array([90.0, 94.0, 101.0, 105.0])
    state = MarketState(population=pop, network=complete_network(pop))
    outcome = RoundOutcome.from_trades(Trades.empty(), 4)
    assert PreferenceGap().measure(state, outcome) == pytest.approx(11.0)  # 103 - 92


# -- efficiency on a network, and its cache -------------------------------------------------------
def test_efficiency_uses_network_edges_and_caches(monkeypatch):
    values, costs = [10.0, 9.0], [1.0, 4.0]
    pop = unit_market(values, costs)
    net = TradingNetwork(n=4, buyer=[0, 1, 1], seller=[2, 2, 3])
    trades = Trades([1], [2], [5.0], [1])  # buyer 1 - seller 0: surplus 8 of the best 14
    state, outcome = after_round(pop, net, trades)
    metric = make_plugin("metrics", "efficiency")
    assert metric.measure(state, outcome) == pytest.approx(8.0 / 14.0)
    assert state.cache["efficiency"]["max_surplus"] == 14.0

    def refuse(*args, **kwargs):
        raise AssertionError("max_surplus recomputed although nothing changed")

    monkeypatch.setattr(M, "max_surplus", refuse)
    assert metric.measure(state, outcome) == pytest.approx(8.0 / 14.0)
    monkeypatch.undo()
    state.network = complete_network(pop)  # a new network: the benchmark is recomputed
    assert metric.measure(state, outcome) == pytest.approx(8.0 / 14.0)
    state.population.value[0] = 20.0  # values changed: recomputed (best now 19 + 5)
    assert AllocativeEfficiency().benchmark(state, outcome) == 24.0


def test_efficiency_counts_seller_stock_at_round_start():
    # a seller with stock 1 and capacity 3 offers one unit
    pop = build_population(2, 1, value=10.0, cost=2.0, stock=1, capacity=3, rng=0)
    trades = Trades([0], [2], [5.0], [1])
    state, outcome = after_round(pop, complete_network(pop), trades)
    assert state.population.stock[2] == 0
    assert AllocativeEfficiency().measure(state, outcome) == pytest.approx(1.0)  # 8 of 8


# -- entropic energy ------------------------------------------------------------------------------
def test_energy_normal_curves_hand_value():
    # E = gamma (mu - v)^2 / (2 sigma^2) per trader (MODEL.md section 2: spring energy of the
    # entropic force -gamma (x - mu) / sigma^2)
    pop = build_population(1, 1, value=100.0, cost=100.0, sigma=5.0, gamma=2.0, rng=0)
    pop.mu = np.array([90.0, 110.0])
    pop.sigma = np.array([5.0, 10.0])
    pop.gamma = np.array([2.0, 1.0])
    state = MarketState(population=pop, network=complete_network(pop))
    outcome = RoundOutcome.from_trades(Trades.empty(), 2)
    assert EntropicEnergy().measure(state, outcome) == pytest.approx(4.0 + 0.5)


def test_energy_other_families_use_the_curve_batch_api():
    calls = []

    class Flat:
        """Test family: energy is 1 per trader."""

        description = "test family"

        def __init__(self, mu):
            self.mu = mu

        @classmethod
        def from_population(cls, mu, sigma, activity, role, **params):
            return cls(mu)

        def energy(self, x0, x1, gamma):
            calls.append((np.asarray(x0).copy(), np.asarray(x1).copy()))
            return np.ones_like(self.mu)

    register("curves", "flat_h3_test")(Flat)
    try:
        pop = build_population(2, 1, curve="flat_h3_test", rng=0)
        state = MarketState(population=pop, network=complete_network(pop))
        outcome = RoundOutcome.from_trades(Trades.empty(), 3)
        assert EntropicEnergy().measure(state, outcome) == 3.0
        x0, x1 = calls[0]
        assert np.array_equal(x0, pop.mu) and np.array_equal(x1, pop.value)  # from mu to value
    finally:
        unregister("curves", "flat_h3_test")


def test_energy_normal_inline_agrees_with_curve_api():
    curves = pytest.importorskip("propensim.agents.curves")
    if not hasattr(curves, "NormalCurve"):
        pytest.skip("NormalCurve not available yet")
    rng = np.random.default_rng(3)
    pop = build_population(5, 5, sigma=(2.0, 6.0), gamma=(0.5, 2.0), shade=(0.0, 10.0), rng=rng)
    state = MarketState(population=pop, network=complete_network(pop))
    outcome = RoundOutcome.from_trades(Trades.empty(), 10)
    via_api = float(np.sum(pop.curves().energy(pop.mu, pop.value, pop.gamma)))
    assert EntropicEnergy().measure(state, outcome) == pytest.approx(via_api, rel=1e-9)


# -- registry -------------------------------------------------------------------------------------
NAMES = {
    "volume": Volume,
    "mean_price": MeanPrice,
    "vwap": VolumeWeightedPrice,
    "price_sd": PriceDispersion,
    "preference_gap": PreferenceGap,
    "efficiency": AllocativeEfficiency,
    "buyer_surplus": BuyerSurplus,
    "seller_surplus": SellerSurplus,
    "surplus_gini": SurplusGini,
    "smith_alpha": SmithAlpha,
    "energy": EntropicEnergy,
}


@pytest.mark.parametrize(("name", "cls"), NAMES.items())
def test_entry_points_resolve_and_follow_the_contract(name, cls):
    assert get_plugin("metrics", name) is cls
    metric = make_plugin("metrics", name)
    assert isinstance(metric, Metric)
    assert cls.aggregate in {"mean", "sum", "last", "final_half_mean"}
    assert cls.description and "\n" not in cls.description
    state, outcome = hand_state([95.0, 105.0], [1, 1])
    value = metric.measure(state, outcome)
    assert isinstance(value, float) and (math.isfinite(value) or math.isnan(value))
