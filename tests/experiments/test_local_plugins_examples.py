"""The two example plugins under experiments/examples/plugins: the kit passes, they do what
their docstrings say, and their specs run on pool workers."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from propensim.agents.population import build_population
from propensim.experiments import local_plugins
from propensim.experiments.runner import run_experiment
from propensim.plugins import registry
from propensim.plugins.testing import check_clearing_rule, check_drift_rule
from propensim.plugins.types import MarketState, RoundOutcome, Trades, TradingNetwork

EXAMPLES = Path(__file__).resolve().parents[2] / "experiments" / "examples" / "plugins"


@pytest.fixture(scope="module", autouse=True)
def examples():
    local_plugins.load_plugins(["imitate_best.py", "posted_price.py"], EXAMPLES)


def test_the_examples_are_not_built_in():
    from importlib import metadata

    names = {
        ep.name
        for g in ("clearing", "drift")
        for ep in metadata.entry_points(group=f"propensim.{g}")
    }
    assert not {"imitate_best", "posted_price"} & names


def test_both_pass_the_conformance_kit():
    volume = check_clearing_rule(registry.make_plugin("clearing", "posted_price"), seeds=range(3))
    assert volume["complete"] > 0 and volume["multi_unit"] > 0 and volume["empty"] == 0
    check_drift_rule(registry.make_plugin("drift", "imitate_best", rate=0.5))


def test_posted_price_declares_that_it_honours_price_bounds():
    rule = registry.make_plugin("clearing", "posted_price", markup=5.0)
    assert rule.honours_price_bounds is True
    rng = np.random.default_rng(3)
    pop = build_population(30, 30, sigma=8.0, rng=rng)
    b, s = np.divmod(np.arange(900), 30)
    net = TradingNetwork(60, b, 30 + s, complete=True)
    for ceiling in (95.0, 100.0):
        state = MarketState(pop, net, price_ceiling=ceiling, price_floor=70.0)
        trades = rule.clear(state, np.random.default_rng(1))
        assert len(trades) > 0
        assert trades.price.max() <= ceiling and trades.price.min() >= 70.0
        # every price is the seller's posted price: its preferred price plus the markup, clipped
        posted = np.clip(pop.mu[trades.seller] + 5.0, 70.0, ceiling)
        assert np.array_equal(trades.price, posted)
        assert (trades.price >= pop.value[trades.seller]).all()  # never below a seller's cost


def test_posted_price_buyers_accept_with_their_propensity():
    # one buyer, one seller, one visit: a trade happens with probability P_b(posted price)
    rule = registry.make_plugin("clearing", "posted_price", markup=0.0, visits=1)
    pop = build_population(1, 1, value=100.0, cost=92.0, shade=0.0, sigma=6.0, rng=0)
    net = TradingNetwork(2, [0], [1])
    state = MarketState(pop, net)
    p = float(pop.curves(np.array([0])).value(pop.mu[1])[0])  # P_b at the posted price (92)
    n = 4000
    traded = np.array([len(rule.clear(state, np.random.default_rng(k))) for k in range(n)])
    # binomial: mean within 4 standard errors (common practice for a seeded frequency check)
    assert abs(traded.mean() - p) < 4 * np.sqrt(p * (1 - p) / n), (traded.mean(), p)
    assert 0.05 < p < 0.95  # the check is not trivial


def _imitation_reference(pop, net, outcome, rate):
    """A plain loop over traders: who are the competitors, who did best, where mu goes."""
    n = len(pop)
    surplus = np.zeros(n)
    for b, s, price, q in zip(
        outcome.trades.buyer,
        outcome.trades.seller,
        outcome.trades.price,
        outcome.trades.quantity,
        strict=True,
    ):
        surplus[b] += q * (pop.value[b] - price)
        surplus[s] += q * (price - pop.value[s])
    edges = set(zip(net.buyer.tolist(), net.seller.tolist(), strict=True))
    mu = pop.mu.copy()
    for i in range(n):
        partners = {s for b, s in edges if b == i} | {b for b, s in edges if s == i}
        rivals = sorted(
            {
                j
                for p in partners
                for j in ({s for b, s in edges if b == p} | {b for b, s in edges if s == p})
            }
            - {i}
        )
        if not rivals:
            continue
        best = max(rivals, key=lambda j: (surplus[j], -j))
        if surplus[best] > surplus[i]:
            mu[i] = pop.mu[i] + rate * (pop.mu[best] - pop.mu[i])
    return mu


def test_imitate_best_moves_toward_the_most_successful_competitor():
    rng = np.random.default_rng(5)
    pop = build_population(6, 5, shade=(0.0, 15.0), rng=rng)
    linked = rng.random((6, 5)) < 0.5
    bi, sj = np.nonzero(linked)
    net = TradingNetwork(11, bi, 6 + sj)
    trades = Trades([0, 1, 2], [6, 7, 8], [95.0, 90.0, 85.0], [1, 1, 1])
    outcome = RoundOutcome.from_trades(trades, len(pop))
    rule = registry.make_plugin("drift", "imitate_best", rate=0.4)
    mu, sigma = rule.apply(MarketState(pop, net), outcome, np.random.default_rng(0))
    expected = _imitation_reference(pop, net, outcome, 0.4)
    assert np.allclose(mu, expected)
    assert not np.allclose(mu, pop.mu)  # someone moved
    assert np.array_equal(sigma, pop.sigma)


def test_imitate_best_with_rate_zero_changes_nothing():
    pop = build_population(4, 4, rng=1)
    b, s = np.divmod(np.arange(16), 4)
    net = TradingNetwork(8, b, 4 + s, complete=True)
    outcome = RoundOutcome.from_trades(Trades([0], [4], [90.0], [1]), 8)
    rule = registry.make_plugin("drift", "imitate_best", rate=0.0)
    mu, _ = rule.apply(MarketState(pop, net), outcome, np.random.default_rng(0))
    assert np.array_equal(mu, pop.mu)


@pytest.mark.parametrize("spec", ["imitate_best.toml", "posted_price.toml"])
def test_the_example_specs_run_on_two_pool_workers(spec, tmp_path):
    short = ["experiment.rounds=8", "experiment.replicates=2"]
    store = run_experiment(
        EXAMPLES / spec, tmp_path / "out", workers=2, progress=False, overrides=short
    )
    runs = pd.read_parquet(tmp_path / "out" / "runs.parquet")
    assert store.manifest["backend"]["kind"] == "local"
    assert (runs["status"] == "ok").all(), runs["error_message"].tolist()
    assert [e["module"] for e in store.manifest["plugins"]] == [spec.replace(".toml", ".py")]
    if spec == "imitate_best.toml":  # the drift ran in the workers: the two rates differ
        by_rate = runs.groupby("point")["preference_gap"].mean()
        assert by_rate.notna().all() and by_rate.nunique() == 2
    else:
        assert set(runs["arm"]) == {"posted", "matching"} and (runs["volume"] > 0).all()
