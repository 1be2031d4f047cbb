"""The fast paths of the round (edge search, edge hints, greedy shortcut, cached OU step) agree
with their plain references."""

from __future__ import annotations

import numpy as np
import pytest

from propensim.agents.population import build_population
from propensim.plugins._matching import propensity_round
from propensim.plugins.drift import AnchorDrift, DriftSum, _ou_coefficients, ou_step
from propensim.plugins.sequential_accept import greedy_accept, greedy_accept_loop
from propensim.plugins.trade_checks import check_trades
from propensim.plugins.types import MarketState, RoundOutcome, Trades, TradingNetwork


def _searchsorted_has_edge(net: TradingNetwork, b: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Reference: membership of ``b * n + s`` in the sorted edge keys (rows in range only)."""
    inside = (b >= 0) & (b < net.n) & (s >= 0) & (s < net.n)
    key = np.where(inside, b, 0) * net.n + np.where(inside, s, 0)
    pos = np.minimum(np.searchsorted(net.edge_key, key), net.n_edges - 1)
    return inside & (net.edge_key[pos] == key)


@pytest.mark.parametrize("p", [0.02, 0.3, 1.0])
def test_has_edge_matches_a_search_of_the_sorted_keys(p):
    rng = np.random.default_rng(4)
    n_b, n_s = 60, 50
    keep = rng.random((n_b, n_s)) < p
    b, s = np.nonzero(keep)
    net = TradingNetwork(n_b + n_s, b, s + n_b)
    qb = rng.integers(-3, n_b + n_s + 3, 5000)
    qs = rng.integers(-3, n_b + n_s + 3, 5000)
    got = net.has_edge(qb, qs)
    assert got.sum() > 0 or p < 0.05
    assert np.array_equal(got, _searchsorted_has_edge(net, qb, qs))
    # every edge is found, in any shape
    assert net.has_edge(net.buyer, net.seller).all()
    assert net.has_edge(net.buyer.reshape(1, -1), net.seller.reshape(1, -1)).shape == (1, b.size)


def test_has_edge_on_an_empty_network():
    net = TradingNetwork(4, [], [])
    assert not net.has_edge(np.array([0, 1]), np.array([2, 3])).any()


@pytest.fixture
def state():
    pop = build_population(3, 3, value=100.0, cost=60.0, rng=0)
    net = TradingNetwork(6, [0, 0, 1, 2], [3, 4, 4, 5])  # edges 0..3 in this order
    return MarketState(pop, net)


def test_a_true_edge_hint_passes_and_a_wrong_one_is_searched(state):
    check_trades(state, Trades([0, 2], [4, 5], [80.0, 80.0], [1, 1], edge=[1, 3]))
    # wrong hints (pointing at other edges, or past the end) on valid edges: still valid
    check_trades(state, Trades([0, 2], [4, 5], [80.0, 80.0], [1, 1], edge=[0, 99]))


@pytest.mark.parametrize("hint", [None, [0], [2], [-1], [7]])
def test_an_edge_hint_never_lets_a_missing_edge_pass(state, hint):
    # buyer 1 - seller 3 is no edge, whatever the hint says
    with pytest.raises(ValueError, match="missing edge"):
        check_trades(state, Trades([1], [3], [80.0], [1], edge=hint))


def test_edge_hint_must_match_the_batch_length():
    with pytest.raises(ValueError, match="edge hint"):
        Trades([0, 1], [3, 4], [1.0, 2.0], [1, 1], edge=[0])


def test_concat_keeps_hints_only_when_every_part_has_them():
    a = Trades([0], [3], [1.0], [1], edge=[0])
    b = Trades([1], [4], [1.0], [1])
    assert np.array_equal(Trades.concat([a, a]).edge, [0, 0])
    assert Trades.concat([a, b]).edge is None


@pytest.mark.parametrize("seed", range(12))
def test_first_per_seller_shortcut_matches_the_loop(seed):
    rng = np.random.default_rng(seed)
    n, m = 40, 25
    buyer = rng.permutation(20)[: min(m, 20)]  # unique buyers (rows 0..19)
    m = buyer.size
    seller = rng.integers(20, 40, m)
    cap = rng.integers(0, 2, n)  # units of 0 or 1
    for order in (rng.permutation(m), rng.integers(0, 4, m), rng.random(m)):  # ties too
        fast = greedy_accept(order, buyer, seller, cap, cap, unique_buyers=True)
        assert np.array_equal(fast, greedy_accept_loop(order, buyer, seller, cap, cap))


def test_ou_coefficients_match_the_direct_formulas():
    # Gillespie 1996: decay exp(-x), gain (dt/eta) (1 - e^-x)/x, variance 2 D dt (1 - e^-2x)/(2x)
    k = np.array([0.0, 1e-12, 1e-6, 0.04, 1.0, 7.0, 50.0])
    eta, noise, dt = 2.0, 0.3, 0.5
    x = k * dt / eta
    decay, gain, sd = _ou_coefficients(k, eta, noise, dt)
    with np.errstate(divide="ignore", invalid="ignore"):
        phi = np.where(x > 0, -np.expm1(-x) / x, 1.0)
        phi2 = np.where(x > 0, -np.expm1(-2 * x) / (2 * x), 1.0)
    np.testing.assert_allclose(decay, np.exp(-x), rtol=1e-15)
    np.testing.assert_allclose(gain, dt / eta * phi, rtol=1e-12)
    np.testing.assert_allclose(sd, np.sqrt(2 * noise * dt * phi2), rtol=1e-12)
    assert _ou_coefficients(k, eta, 0.0, dt)[2] is None
    # one stiffness for every trader: the same numbers, as scalars
    one = _ou_coefficients(np.full(5, k[4]), eta, noise, dt)
    assert all(isinstance(c, float) for c in one)
    np.testing.assert_allclose(one, [decay[4], gain[4], sd[4]], rtol=1e-15)


def test_drift_cache_follows_changed_widths():
    pop = build_population(50, 50, sigma=5.0, rng=1)
    state = MarketState(pop, TradingNetwork(100, [], []))
    outcome = RoundOutcome.from_trades(Trades.empty(), 100)
    drift = AnchorDrift(noise=0.2)
    for sigma in (5.0, 5.0, 2.0):  # the second call reuses the cache, the third must not
        pop.sigma[:] = sigma
        mu, _ = drift.apply(state, outcome, np.random.default_rng(9))
        stiffness = pop.gamma / pop.sigma**2
        expect = ou_step(
            pop.mu, stiffness, stiffness * pop.value, noise=0.2, rng=np.random.default_rng(9)
        )
        np.testing.assert_allclose(mu, expect, rtol=1e-13)
    assert isinstance(drift.apply(state, outcome, np.random.default_rng(0))[1], np.ndarray)
    assert DriftSum(rules=[drift], noise=0.0).apply(state, outcome, None)[0].shape == (100,)


def test_lazy_outcome_tallies_on_first_read():
    out = RoundOutcome.from_trades(Trades([0, 0, 1], [2, 3, 3], [1.0, 3.0, 5.0], [1, 2, 1]), 5)
    assert out.traded.tolist() == [3, 1, 1, 3, 0]
    np.testing.assert_allclose(out.mean_price, [7 / 3, 5.0, 1.0, 11 / 3, np.nan])
    with pytest.raises(AttributeError):
        _ = out.nonexistent


def test_buyers_without_partners_never_trade_and_turns_cover_every_meeting():
    # rows 0-3 buyers (buyer 1 has no partner), rows 4-5 sellers with many units
    pop = build_population(4, 2, value=100.0, cost=99.9, shade=0.0, sigma=50.0, rng=0)
    pop.capacity[:] = 10
    pop.stock[:] = 10
    net = TradingNetwork(6, [0, 0, 2, 3], [4, 5, 5, 4])
    state = MarketState(pop, net)
    seen = set()
    for seed in range(40):
        for meetings in (1, 3):
            trades = propensity_round(state, np.random.default_rng(seed), meetings, None, 257)
            check_trades(state, trades)  # hints and edges agree
            assert 1 not in trades.buyer.tolist()
            seen.update(trades.buyer.tolist())
    assert seen == {0, 2, 3}
