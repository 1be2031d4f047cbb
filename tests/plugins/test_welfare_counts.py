"""max_surplus edges, and equilibrium and surplus from counts for traders with many units.

Issue 15: ``max_surplus(values, costs, edges=[(0, 0), (1, 1)])`` read a list of pairs as
(buyers, sellers); ``build_market`` with 1e6 units per trader repeated every value once per unit.
The reference for restricted markets is networkx's maximum-weight matching (Galil 1986, as
implemented in ``networkx.max_weight_matching``) on the unit-expanded bipartite graph.
"""

from __future__ import annotations

import tracemalloc
import warnings

import networkx as nx
import numpy as np
import pytest

from propensim.plugins import welfare
from propensim.plugins.metrics import competitive_equilibrium, max_surplus


def _nx_surplus(values, costs, pairs, units_b=None, units_s=None) -> float:
    """Maximum surplus by networkx max_weight_matching on the unit-expanded graph."""
    units_b = [1] * len(values) if units_b is None else units_b
    units_s = [1] * len(costs) if units_s is None else units_s
    g = nx.Graph()
    for i, j in pairs:
        w = values[i] - costs[j]
        if w <= 0:
            continue
        for a in range(units_b[i]):
            for b in range(units_s[j]):
                g.add_edge(("b", i, a), ("s", j, b), weight=w)
    match = nx.max_weight_matching(g)
    return float(sum(g[u][v]["weight"] for u, v in match))


# -- edges: a list of pairs is a list of pairs --------------------------------------------------
def test_list_of_two_pairs_is_two_edges():
    values, costs = [60.0, 10.0], [10.0, 60.0]
    # Edges 0-0 (surplus 50) and 1-1 (none). Read as (buyers [0, 0], sellers [1, 1]) it was 0.
    assert max_surplus(values, costs, edges=[(0, 0), (1, 1)]) == 50.0
    assert max_surplus(values, costs, edges=np.array([[0, 0], [1, 1]])) == 50.0
    # the documented tuple form keeps its meaning: (buyer_idx, seller_idx)
    assert max_surplus(values, costs, edges=([0, 1], [0, 1])) == 50.0
    assert max_surplus(values, costs, edges=([0, 0], [1, 1])) == 0.0


def test_list_of_three_pairs_is_accepted():
    values, costs = [10.0, 8.0, 6.0], [5.0, 7.0, 9.0]
    pairs = [(0, 0), (1, 1), (2, 2)]
    assert max_surplus(values, costs, edges=pairs) == pytest.approx(
        _nx_surplus(values, costs, pairs)
    )


@pytest.mark.parametrize(
    "edges",
    [
        [(0, 0, 1)],  # triples
        np.array([[0, 1, 0], [1, 0, 1]]),  # shape (2, 3): neither (m, 2) nor a tuple
        ([0, 1], [0]),  # different lengths
        ([0.5], [0]),  # not whole numbers
        ([[0, 1]], [[0, 1]]),  # 2-D inside the tuple
        {0: 0},  # a mapping
    ],
)
def test_other_edge_shapes_are_refused_with_the_allowed_forms(edges):
    with pytest.raises(ValueError, match="edges") as info:
        max_surplus([10.0, 8.0], [5.0, 7.0], edges=edges)
    assert "\n" not in str(info.value)


@pytest.mark.parametrize("seed", range(8))
@pytest.mark.parametrize("method", ["dense", "sparse", "lp"])
def test_restricted_surplus_matches_networkx(seed, method):
    rng = np.random.default_rng(seed)
    n_b, n_s = rng.integers(2, 7, size=2)
    values = rng.integers(1, 30, size=n_b).astype(float)
    costs = rng.integers(1, 30, size=n_s).astype(float)
    ub = rng.integers(0, 3, size=n_b)
    us = rng.integers(0, 3, size=n_s)
    pairs = [(i, j) for i in range(n_b) for j in range(n_s) if rng.random() < 0.5]
    if not pairs:
        pairs = [(0, 0)]
    got = max_surplus(values, costs, edges=pairs, units_b=ub, units_s=us, method=method)
    assert got == pytest.approx(_nx_surplus(values, costs, pairs, ub, us), abs=1e-9)


# -- counts: the textbook stepped market --------------------------------------------------------
# Stepped demand: 2 units worth 10, 3 worth 8, 1 worth 6. Stepped supply: 2 units costing 4,
# 2 costing 7, 3 costing 9. Units in order: demand 10 10 8 8 8 6, supply 4 4 7 7 9 9 9; the
# steps cross after 4 units (8 >= 7, then 8 < 9), the clearing price is
# [max(7, 8), min(8, 9)] = 8, and the surplus (10-4) x 2 + (8-7) x 2 = 14 (worked by hand).
VALUES, UNITS_B = np.array([8.0, 10.0, 6.0]), np.array([3, 2, 1])
COSTS, UNITS_S = np.array([9.0, 4.0, 7.0]), np.array([3, 2, 2])


def test_worked_example_by_counts():
    assert welfare.crossing(VALUES, UNITS_B, COSTS, UNITS_S) == (4, 8.0, 8.0)
    expanded = competitive_equilibrium(np.repeat(VALUES, UNITS_B), np.repeat(COSTS, UNITS_S))
    assert expanded == (4, 8.0, 8.0)
    assert welfare._crossing_surplus(VALUES, UNITS_B, COSTS, UNITS_S) == 14.0
    assert max_surplus(VALUES, COSTS, units_b=UNITS_B, units_s=UNITS_S) == 14.0


def test_worked_example_scaled_to_a_million_units_per_step():
    scale = 1_000_000
    q, lo, hi = welfare.crossing(VALUES, UNITS_B * scale, COSTS, UNITS_S * scale)
    assert (q, lo, hi) == (4 * scale, 8.0, 8.0)
    assert (
        max_surplus(VALUES, COSTS, units_b=UNITS_B * scale, units_s=UNITS_S * scale) == 14.0 * scale
    )


@pytest.mark.parametrize("seed", range(20))
def test_crossing_equals_the_expanded_equilibrium(seed):
    rng = np.random.default_rng(seed)
    n_b, n_s = rng.integers(1, 8, size=2)
    values = rng.integers(1, 12, size=n_b).astype(float)  # ties on purpose
    costs = rng.integers(1, 12, size=n_s).astype(float)
    ub, us = rng.integers(0, 4, size=n_b), rng.integers(0, 4, size=n_s)
    want = competitive_equilibrium(np.repeat(values, ub), np.repeat(costs, us))
    got = welfare.crossing(values, ub, costs, us)
    assert got[0] == want[0]
    np.testing.assert_array_equal(got[1:], want[1:])  # the same elements picked, NaN included
    full = max_surplus(np.repeat(values, ub), np.repeat(costs, us))
    assert welfare._crossing_surplus(values, ub, costs, us) == pytest.approx(full, abs=1e-9)


# -- memory does not grow with units (tracemalloc peak, not a timing) --------------------------
UNITS = 1_000_000
# An array of one float per unit of one side alone is 20 traders x 1e6 units x 8 bytes = 160 MB;
# the bound is far below it (a few MB of traders and networks, plus interpreter noise).
PEAK_BYTES = 40_000_000


def _peak(fn) -> int:
    tracemalloc.start()
    try:
        fn()
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


@pytest.mark.parametrize("network", [None, {"name": "small_world", "k": 4, "p": 0.1}])
def test_build_and_run_with_a_million_units_per_trader_stays_small(network):
    from propensim.markets import build_market

    cfg = {
        "population": {
            "n_buyers": 20,
            "n_sellers": 20,
            "value": [80, 120],
            "cost": [60, 100],
            "stock": UNITS,
            "capacity": UNITS,
        },
        "metrics": ["volume", "efficiency", "smith_alpha"],
    }
    if network:
        cfg["network"] = network

    def go():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            market = build_market(cfg, seed=3, mesa=False)
            market.advance(2)
            assert np.isfinite(market.state.equilibrium_price)
            assert np.isfinite(market.summary()["efficiency"])  # trades may lose surplus

    go()  # imports and caches outside the measurement
    assert _peak(go) < PEAK_BYTES


def test_max_surplus_paths_with_a_million_units_stay_small():
    rng = np.random.default_rng(0)
    values = rng.uniform(80, 120, 30)
    costs = rng.uniform(60, 100, 30)
    units = np.full(30, UNITS)
    pairs = [(i, (i + d) % 30) for i in range(30) for d in range(3)]
    assert _peak(lambda: max_surplus(values, costs, units_b=units, units_s=units)) < PEAK_BYTES
    assert (
        _peak(lambda: max_surplus(values, costs, edges=pairs, units_b=units, units_s=units))
        < PEAK_BYTES
    )
