"""The round's fused kernels agree with their numpy references, bit for bit.

Each fused kernel (numba_loops) stands in for a chain of numpy operations in one rule; the
numpy chain is the reference, run here with the kernels off (``PROPENSIM_KERNELS=numpy``) on
the same inputs. Whole markets with the kernels on and off are compared in
test_acceleration.py.
"""

from __future__ import annotations

import numpy as np
import pytest

from propensim.markets.build import build_market
from propensim.plugins import acceleration, metrics
from propensim.plugins.drift import OutcomeDrift
from propensim.plugins.trade_checks import check_trades
from propensim.plugins.types import RoundOutcome, Trades

pytest.importorskip("numba")
from propensim.plugins import numba_loops  # noqa: E402


def _same(a, b) -> bool:
    return np.array_equal(np.asarray(a), np.asarray(b), equal_nan=True)


@pytest.mark.parametrize("n", [*range(0, 300, 7), 1000, 4096, 8191, 65537, 10**6])
def test_pairwise_sum_is_numpys(n):
    rng = np.random.default_rng(n)
    x = rng.normal(size=n) * 10.0 ** rng.integers(-4, 4, n)
    assert numba_loops.np_sum(x) == x.sum()
    assert str(numba_loops.np_sum(np.array([-0.0]))) == str(np.array([-0.0]).sum())


def test_compiled_permutation_is_numpys():
    # accept_one_width draws the buyers' turns with numba's Generator.permutation
    import numba

    @numba.njit
    def perm(rng, k):
        return rng.permutation(k)

    for k in (0, 1, 2, 7, 1000, 70000):
        g1, g2 = np.random.default_rng(k), np.random.default_rng(k)
        assert np.array_equal(perm(g1, k), g2.permutation(k))
        assert g1.bit_generator.state == g2.bit_generator.state


def _market(seed=3, **population):
    pop = {"n_buyers": 400, "n_sellers": 350, "value": [80.0, 120.0], "cost": [60.0, 100.0]}
    pop.update(population)
    cfg = {
        "population": pop,
        "network": {"name": "erdos_renyi", "mean_degree": 6.0},
        "drift": {"rules": [{"name": "anchor"}, {"name": "outcome"}], "noise": 0.5},
    }
    return build_market(cfg, seed=seed, mesa=False)


def _outcomes():
    """States and outcomes of real rounds: unit traders, budgets and several units, a tax."""
    out = []
    for extra in ({}, {"cash": 120.0, "capacity": 3, "stock": 2}, {"sigma": [3.0, 8.0]}):
        market = _market(**extra)
        market.run(3)
        state = market.state
        trades = market.clearing.clear(state, np.random.default_rng(1))
        outcome = RoundOutcome.from_trades(trades, len(market.population))
        out.append((state, outcome))
        wedge = RoundOutcome.from_trades(
            trades, len(market.population), trades.price + 1.5, trades.price - 0.5, 2.0
        )
        out.append((state, wedge))
    return out


METRICS = [
    "mean_price",
    "vwap",
    "price_sd",
    "preference_gap",
    "efficiency",
    "buyer_surplus",
    "seller_surplus",
    "surplus_gini",
    "smith_alpha",
    "energy",
]


@pytest.mark.filterwarnings("ignore::RuntimeWarning")
@pytest.mark.parametrize("name", METRICS)
def test_metric_kernels_match_numpy(monkeypatch, name):
    from propensim.plugins.registry import make_plugin

    cases = _outcomes()
    empty = (cases[0][0], RoundOutcome.from_trades(Trades.empty(), len(cases[0][0].population)))
    for state, outcome in [*cases, empty]:
        got = {}
        for how in ("numpy", "numba"):
            monkeypatch.setenv("PROPENSIM_KERNELS", how)
            state.cache.clear()
            metric = make_plugin("metrics", name)
            got[how] = metric.measure(state, outcome)
            got[how + " again"] = metric.measure(state, outcome)  # cached benchmarks too
        assert _same(got["numpy"], got["numba"]), (name, got)
        assert _same(got["numpy again"], got["numba again"]), (name, got)


def test_gini_kernel_handles_losses_zeros_and_one_trader():
    value = np.array([10.0, 10.0, 10.0, 5.0, 5.0, 5.0])
    cases = [
        (np.array([0, 1]), np.array([3, 4]), np.array([12.0, 7.0])),  # a buyer at a loss
        (np.array([2]), np.array([5]), np.array([7.5])),
        (np.array([0, 1, 2]), np.array([3, 4, 5]), np.array([5.0, 10.0, 7.0])),  # zero gains
    ]
    for b, s, p in cases:
        q = np.ones(b.size, dtype=np.int64)
        fast = numba_loops.surplus_gini(value, b, s, q, p, p, 6)
        per = np.bincount(b, weights=(value[b] - p), minlength=6) + np.bincount(
            s, weights=(p - value[s]), minlength=6
        )
        assert _same(fast, metrics.gini(per))


def test_tally_matches_bincounts():
    rng = np.random.default_rng(5)
    n, m = 300, 900
    b, s = rng.integers(0, 150, m), rng.integers(150, 300, m)
    q, p = rng.integers(1, 4, m), rng.normal(90, 10, m)
    trades = Trades(b, s, p, q)
    ref = RoundOutcome.from_trades(trades, n)
    traded, mean = numba_loops.tally(trades.buyer, trades.seller, trades.quantity, p, n)
    assert traded.dtype == ref.traded.dtype and _same(traded, ref.traded)
    assert _same(mean, ref.mean_price)


def test_outcome_offset_matches_the_masks(monkeypatch):
    market = _market(cash=100.0, stock=1, capacity=2)
    market.run(2)
    state = market.state
    pop = state.population
    rng = np.random.default_rng(2)
    pop.stock[rng.random(len(pop)) < 0.2] = 0
    pop.cash[rng.random(len(pop)) < 0.2] = -1.0
    pop.capacity[rng.random(len(pop)) < 0.1] = 0
    trades = market.clearing.clear(state, np.random.default_rng(4))
    outcome = RoundOutcome.from_trades(trades, len(pop))
    out = {}
    for how in ("numpy", "numba"):
        monkeypatch.setenv("PROPENSIM_KERNELS", how)
        k, c = OutcomeDrift(step=0.37).terms(state, outcome)
        out[how] = (np.broadcast_to(k, c.shape), c)
    assert _same(out["numpy"][0], out["numba"][0]) and _same(out["numpy"][1], out["numba"][1])


def _checked(state, trades):
    try:
        check_trades(state, trades)
    except ValueError as err:
        return str(err)
    return None


@pytest.mark.filterwarnings("ignore::RuntimeWarning")
def test_trade_check_kernel_agrees_with_numpy_on_good_and_bad_batches(monkeypatch):
    market = _market(cash=150.0, capacity=2, stock=2)
    market.run(2)
    state = market.state
    good = market.clearing.clear(state, np.random.default_rng(9))
    assert len(good) > 5
    n = len(state.population)

    def variant(**change):
        cols = {
            k: getattr(good, k).copy() for k in ("buyer", "seller", "price", "quantity", "edge")
        }
        for key, (i, v) in change.items():
            cols[key][i] = v
        return Trades(**cols)

    batches = [
        good,
        variant(buyer=(0, n + 3)),
        variant(seller=(1, good.buyer[1])),
        variant(quantity=(2, 0)),
        variant(price=(3, np.inf)),
        variant(quantity=(0, 5)),
        variant(price=(1, 1e6)),
        variant(edge=(2, 0)),  # a wrong hint: numpy searches the edge and may accept
        Trades(good.buyer, good.seller, good.price, good.quantity),  # no hints at all
    ]
    for trades in batches:
        results = []
        for how in ("numpy", "numba"):
            monkeypatch.setenv("PROPENSIM_KERNELS", how)
            results.append(_checked(state, trades))
        assert results[0] == results[1]
    monkeypatch.setenv("PROPENSIM_KERNELS", "numba")
    assert _checked(state, batches[1]) is not None  # the checks can fail
    args = (good.buyer, good.seller, good.quantity, good.price, good.edge)
    net, pop = state.network, state.population
    tail = (pop.role, net.buyer_ptr, net.seller, state.remaining, pop.cash, 1e-9)
    assert numba_loops.trades_valid(*args, *tail)
    bad = variant(quantity=(0, 5))
    assert not numba_loops.trades_valid(
        bad.buyer, bad.seller, bad.quantity, bad.price, bad.edge, *tail
    )


def test_kernels_off_when_asked(monkeypatch):
    monkeypatch.setenv("PROPENSIM_KERNELS", "numpy")
    assert acceleration.kernel("np_sum") is None
    monkeypatch.setenv("PROPENSIM_KERNELS", "numba")
    assert acceleration.kernel("np_sum") is numba_loops.np_sum
