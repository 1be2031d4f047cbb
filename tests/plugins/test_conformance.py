"""The conformance kit: built-in rules pass it, broken ones fail it with a named invariant."""

from __future__ import annotations

import numpy as np
import pytest

from propensim.plugins import registry
from propensim.plugins.testing import (
    check_clearing_rule,
    check_drift_rule,
    check_metric,
    kit_markets,
)
from propensim.plugins.types import Trades, TradingNetwork

CLEARING = ["propensity", "propensity_per_agent", "call_auction", "double_auction", "bargaining"]


@pytest.mark.parametrize("name", CLEARING)
def test_builtin_clearing_rules_pass_the_kit(name):
    rule = registry.make_plugin("clearing", name)
    volume = check_clearing_rule(rule, seeds=range(2))
    assert volume["complete"] > 0 and volume["multi_unit"] > 0  # the rule did trade
    assert volume["empty"] == 0


@pytest.mark.parametrize(
    "params",
    [
        {"name": "propensity", "meetings": 3},
        {"name": "call_auction", "quotes": "value", "k": 1.0},
        {"name": "double_auction", "strategy": "zi_u"},
        {"name": "double_auction", "strategy": "curve"},
    ],
)
def test_builtin_variants_pass_the_kit(params):
    params = dict(params)
    rule = registry.make_plugin("clearing", params.pop("name"), **params)
    check_clearing_rule(rule, seeds=[0], rounds=2)


def test_kit_accepts_a_handmade_network():
    # 3 buyers (rows 0-2), 3 sellers (rows 3-5): a path b0-s3-b1-s4-b2-s5
    net = TradingNetwork(6, [0, 1, 1, 2, 2], [3, 3, 4, 4, 5])
    rule = registry.make_plugin("clearing", "bargaining")
    assert check_clearing_rule(rule, n_buyers=3, n_sellers=3, network=net, seeds=[0])["sparse"] > 0
    with pytest.raises(ValueError, match="network"):
        kit_markets(0, 4, 4, network=net)


# -- broken clearing rules ----------------------------------------------------------------------
class _Base:
    description = "a deliberately broken rule"


class CrossesMissingEdges(_Base):
    def clear(self, state, rng):
        b, s = state.population.buyers, state.population.sellers
        k = min(b.size, s.size)
        return Trades(b[:k], s[::-1][:k], np.full(k, 90.0), np.ones(k))  # ignores the network


class TwoBuyers(_Base):
    def clear(self, state, rng):
        net = state.network
        if net.n_edges == 0:
            return Trades.empty()
        return Trades(net.buyer[:1], net.buyer[:1] + 1, [90.0], [1])


class IgnoresCapacity(_Base):
    def clear(self, state, rng):
        net = state.network
        return Trades(net.buyer, net.seller, np.full(net.n_edges, 90.0), np.ones(net.n_edges))


class IgnoresCash(_Base):
    def clear(self, state, rng):
        net, rem = state.network, state.remaining
        open_ = np.flatnonzero((rem[net.buyer] > 0) & (rem[net.seller] > 0))
        first = open_[np.unique(net.buyer[open_], return_index=True)[1]]  # one edge per buyer
        sellers, k = np.unique(net.seller[first], return_index=True)  # one buyer per seller
        b = net.buyer[first][k]
        return Trades(b, sellers, np.full(b.size, 1e6), np.ones(b.size))  # units ok, too dear


class UsesGlobalRandomness(_Base):
    def clear(self, state, rng):
        net = state.network
        if net.n_edges == 0:
            return Trades.empty()
        e = np.random.default_rng().integers(net.n_edges)  # not the generator it was handed
        return Trades(net.buyer[e : e + 1], net.seller[e : e + 1], [90.0], [1])


class WritesState(_Base):
    def clear(self, state, rng):
        state.population.mu += 1.0
        return Trades.empty()


class NanPrice(_Base):
    def clear(self, state, rng):
        net = state.network
        if net.n_edges == 0:
            return Trades.empty()
        return Trades(net.buyer[:1], net.seller[:1], [np.nan], [1])


class NoDescription:
    def clear(self, state, rng):
        return Trades.empty()


class PerAgentOverdraws:
    description = "per-agent rule that sells units it does not have"
    per_agent = True

    def agent_trades(self, agent, state, rng):
        i = agent.index
        net = state.network
        if state.population.role[i] != 0 or net.buyer_ptr[i] == net.buyer_ptr[i + 1]:
            return []
        return [(i, int(net.seller[net.buyer_ptr[i]]), 90.0, 5)]


@pytest.mark.parametrize(
    ("rule", "invariant"),
    [
        (CrossesMissingEdges(), "no trade across a missing edge"),
        (TwoBuyers(), "seller is a seller"),
        (IgnoresCapacity(), "capacity and stock respected"),
        (IgnoresCash(), "cash respected"),
        (UsesGlobalRandomness(), "same generator state gives the same trades"),
        (WritesState(), "state is read-only"),
        (NanPrice(), "prices finite"),
        (NoDescription(), "description"),
        (PerAgentOverdraws(), "per-agent trades"),
    ],
)
def test_broken_rules_fail_the_kit_naming_the_invariant(rule, invariant):
    with pytest.raises(AssertionError, match=invariant) as err:
        check_clearing_rule(rule, seeds=[0, 1])
    assert "\n" not in str(err.value)


# -- drift rules and metrics --------------------------------------------------------------------
class GoodDrift:
    description = "noisy pull of mu toward value"

    def apply(self, state, outcome, rng):
        pop = state.population
        mu = pop.mu + 0.1 * (pop.value - pop.mu) + rng.normal(0.0, 0.1, len(pop))
        return mu, pop.sigma.copy()


class InPlaceDrift(GoodDrift):
    def apply(self, state, outcome, rng):
        state.population.mu *= 1.01
        return state.population.mu.copy(), state.population.sigma.copy()


class SameArrayDrift(GoodDrift):
    def apply(self, state, outcome, rng):
        return state.population.mu, state.population.sigma.copy()


class CollapsingDrift(GoodDrift):
    def apply(self, state, outcome, rng):
        return state.population.mu.copy(), state.population.sigma * 0.0


class GoodMetric:
    description = "mean trade price"
    aggregate = "mean"

    def measure(self, state, outcome):
        t = outcome.trades
        return float(np.mean(t.price)) if len(t) else float("nan")


class InfMetric(GoodMetric):
    def measure(self, state, outcome):
        return float("inf")


class StringMetric(GoodMetric):
    def measure(self, state, outcome):
        return "12"


class BadAggregate(GoodMetric):
    aggregate = "median"


class RandomMetric(GoodMetric):
    def measure(self, state, outcome):
        return float(np.random.default_rng().random())


def test_drift_kit_accepts_a_good_drift_and_rejects_broken_ones():
    check_drift_rule(GoodDrift())
    with pytest.raises(AssertionError, match="never edits the population"):
        check_drift_rule(InPlaceDrift())
    with pytest.raises(AssertionError, match="returns new arrays"):
        check_drift_rule(SameArrayDrift())
    with pytest.raises(AssertionError, match="sigma > 0"):
        check_drift_rule(CollapsingDrift())


def test_metric_kit_accepts_a_good_metric_and_rejects_broken_ones():
    check_metric(GoodMetric())
    for bad, invariant in (
        (InfMetric(), "finite or NaN"),
        (StringMetric(), "returns a float"),
        (BadAggregate(), "aggregate"),
        (RandomMetric(), "deterministic"),
    ):
        with pytest.raises(AssertionError, match=invariant):
            check_metric(bad)


@pytest.mark.parametrize("kind", ["drift", "metrics"])
def test_registered_drifts_and_metrics_pass_the_kit(kind):
    check = check_drift_rule if kind == "drift" else check_metric
    names = registry.names(kind)
    assert names
    for name in names:
        check(registry.make_plugin(kind, name), seeds=range(2))
