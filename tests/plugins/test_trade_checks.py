"""Trade invariants, applying trades, and the vectorised greedy acceptance."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from propensim.agents.population import build_population
from propensim.plugins.sequential_accept import greedy_accept, greedy_accept_loop
from propensim.plugins.trade_checks import check_trades, settle_trades
from propensim.plugins.types import MarketState, Trades, TradingNetwork


@pytest.fixture
def market():
    """3 buyers (rows 0-2), 3 sellers (rows 3-5); buyer 2 has cash 50; seller 5 has no stock."""
    pop = build_population(3, 3, value=100.0, cost=60.0, stock=1, capacity=1, rng=0)
    pop.cash[2] = 50.0
    pop.stock[5] = 0
    net = TradingNetwork(6, [0, 0, 1, 2, 2], [3, 4, 4, 3, 5])
    return MarketState(pop, net)


def _t(b, s, p, q):
    return Trades(np.array(b), np.array(s), np.array(p, dtype=float), np.array(q))


def test_valid_batch_passes(market):
    check_trades(market, _t([0, 1], [3, 4], [80.0, 90.0], [1, 1]))
    check_trades(market, Trades.empty())


@pytest.mark.parametrize(
    ("trades", "words"),
    [
        (_t([0], [1], [80.0], [1]), "is not a seller"),  # two buyers
        (_t([3], [4], [80.0], [1]), "is not a buyer"),  # two sellers
        (_t([1], [3], [80.0], [1]), "missing edge"),
        (_t([0, 0], [3, 4], [80.0, 80.0], [1, 1]), "may trade at most"),  # buyer capacity 1
        (_t([2], [5], [40.0], [1]), "may trade at most"),  # seller 5 has no stock
        (_t([0], [3], [np.nan], [1]), "non-finite price"),
        (_t([0], [3], [80.0], [0]), "quantity"),
        (_t([2], [3], [60.0], [1]), "has cash"),  # buyer 2 has 50
        (_t([9], [3], [60.0], [1]), "outside"),
    ],
)
def test_each_violation_is_one_line_value_error(market, trades, words):
    with pytest.raises(ValueError, match=words) as err:
        check_trades(market, trades)
    assert "\n" not in str(err.value)


def test_settle_trades_moves_goods_and_money_and_conserves(market):
    pop = market.population
    pop.cash[:] = [100.0, np.inf, 50.0, 0.0, 0.0, 0.0]
    stock0, finite0 = pop.stock.sum(), pop.cash[[0, 2, 3, 4, 5]].sum()
    settle_trades(pop, _t([0, 2, 1], [3, 3, 4], [80.0, 10.0, 5.0], [1, 2, 1]))
    assert pop.stock.tolist() == [1, 1, 2, -2, 0, 0]  # apply does not check; check_trades does
    assert pop.cash.tolist() == [20.0, np.inf, 30.0, 100.0, 5.0, 0.0]
    assert pop.stock.sum() == stock0
    # finite cash is conserved except for the 5 paid in by the buyer with unlimited cash
    assert pop.cash[[0, 2, 3, 4, 5]].sum() == pytest.approx(finite0 + 5.0)


# -- greedy acceptance --------------------------------------------------------------------
def _random_case(rng, budget, unit=False):
    nb, ns = int(rng.integers(1, 8)), int(rng.integers(1, 8))
    m = int(rng.integers(0, 50))
    b = rng.integers(0, nb, m)
    s = nb + rng.integers(0, ns, m)
    cap = rng.integers(0, 2 if unit else 4, nb + ns)  # unit: the one-unit fast path
    order = rng.integers(0, 12, m)  # ties exercise the by-position tie break
    if budget:
        price = rng.integers(1, 6, m).astype(float)  # whole numbers: sums are exact
        cash = np.where(rng.random(nb + ns) < 0.6, rng.integers(0, 10, nb + ns), np.inf)
        return order, b, s, cap, price, cash
    return order, b, s, cap, None, None


@pytest.mark.parametrize("unit", [False, True])
@pytest.mark.parametrize("budget", [False, True])
@pytest.mark.parametrize("max_passes", [32, 1])  # 1 forces the loop finish for the rest
def test_greedy_accept_equals_sequential_loop(budget, max_passes, unit):
    rng = np.random.default_rng(12345)
    for _ in range(300):
        order, b, s, cap, price, cash = _random_case(rng, budget, unit)
        fast = greedy_accept(order, b, s, cap, cap, price=price, cash=cash, max_passes=max_passes)
        slow = greedy_accept_loop(order, b, s, cap, cap, price=price, cash=cash)
        assert np.array_equal(fast, slow)


@settings(max_examples=60, deadline=None)
@given(
    pairs=st.lists(st.tuples(st.integers(0, 4), st.integers(0, 4), st.integers(0, 9)), max_size=40),
    caps=st.lists(st.integers(0, 3), min_size=10, max_size=10),
)
def test_greedy_accept_property(pairs, caps):
    b = np.array([p[0] for p in pairs], dtype=np.int64)
    s = np.array([5 + p[1] for p in pairs], dtype=np.int64)
    order = np.array([p[2] for p in pairs])
    cap = np.array(caps)
    got = greedy_accept(order, b, s, cap, cap)
    assert np.array_equal(got, greedy_accept_loop(order, b, s, cap, cap))
    # accepted units never exceed capacity, and the result is maximal: every rejected
    # candidate has a saturated side
    used = np.bincount(b[got], minlength=10) + np.bincount(s[got], minlength=10)
    assert np.all(used <= cap)
    rejected = ~got
    assert np.all((used[b[rejected]] >= cap[b[rejected]]) | (used[s[rejected]] >= cap[s[rejected]]))


def test_greedy_accept_long_chain_is_exact():
    # A chain b0-s0, b1-s0, b1-s1, b2-s1, ... with capacity 1 decides one link per pass:
    # the worst case, finished by the loop after max_passes.
    k = 200
    b = np.repeat(np.arange(k), 2)[1:]
    s = k + np.repeat(np.arange(k), 2)[:-1]
    order = np.arange(b.size)
    cap = np.ones(2 * k, dtype=np.int64)
    got = greedy_accept(order, b, s, cap, cap, max_passes=5)
    assert np.array_equal(got, greedy_accept_loop(order, b, s, cap, cap))
    assert got.sum() == k  # every other link


def test_greedy_accept_does_not_touch_inputs():
    cap = np.array([1, 1, 1])
    b, s = np.array([0, 0]), np.array([1, 2])
    greedy_accept(np.array([1, 0]), b, s, cap, cap)
    assert cap.tolist() == [1, 1, 1]
    assert greedy_accept(np.zeros(0), b[:0], s[:0], cap, cap).shape == (0,)
