"""The kit for networks, curve families and interventions: built-ins pass, broken ones fail
with the broken invariant named. Also the registry's warnings for broken and duplicate
plugins as a student meets them."""

from __future__ import annotations

import re

import numpy as np
import pytest

from propensim.agents.curves import NormalCurve
from propensim.plugins import registry
from propensim.plugins.testing import (
    KitMarket,
    check_clearing_rule,
    check_curve_family,
    check_intervention,
    check_network_builder,
)
from propensim.plugins.types import Trades, TradingNetwork

# -- networks -------------------------------------------------------------------------------
NETWORKS = ["complete", "erdos_renyi", "small_world", "scale_free", "bipartite", "regions"]


@pytest.mark.parametrize("name", NETWORKS)
def test_builtin_network_builders_pass_the_kit(name):
    edges = check_network_builder(registry.make_plugin("networks", name), seeds=range(2))
    assert edges["buyers first"] > 0


class _Net:
    description = "a deliberately broken builder"

    def build(self, role, rng):
        b, s = np.flatnonzero(role == 0), np.flatnonzero(role == 1)
        return TradingNetwork(role.size, np.repeat(b, s.size), np.tile(s, b.size))


class BuyerToBuyer(_Net):
    def build(self, role, rng):
        b = np.flatnonzero(role == 0)
        return TradingNetwork(role.size, b[:-1], b[1:])


class SelfLoopSocial(_Net):
    def build(self, role, rng):
        net = super().build(role, rng)
        return TradingNetwork(net.n, net.buyer, net.seller, social=(np.array([0]), np.array([0])))


class DuplicateSocial(_Net):
    def build(self, role, rng):
        net = super().build(role, rng)
        u, v = np.array([0, 0]), np.array([1, 1])
        return TradingNetwork(net.n, net.buyer, net.seller, social=(u, v))


class Unseeded(_Net):
    def build(self, role, rng):
        net = super().build(role, rng)
        keep = np.random.default_rng().random(net.n_edges) < 0.5  # ignores rng
        return net.keep_edges(keep)


class GlobalRandom(_Net):
    def build(self, role, rng):
        np.random.random()  # noqa: NPY002 - the legacy global state, on purpose
        return super().build(role, rng)


class EditsRoles(_Net):
    def build(self, role, rng):
        role[:] = np.sort(role)
        return super().build(role, rng)


class WrongSize(_Net):
    def build(self, role, rng):
        net = super().build(role, rng)
        return TradingNetwork(net.n + 1, net.buyer, net.seller)


@pytest.mark.parametrize(
    ("builder", "invariant"),
    [
        (BuyerToBuyer(), "edges only between buyers and sellers"),
        (SelfLoopSocial(), "no self-loops"),
        (DuplicateSocial(), "no duplicate edges"),
        (Unseeded(), "same generator state gives the same network"),
        (GlobalRandom(), "draws only from rng"),
        (EditsRoles(), "role is read-only"),
        (WrongSize(), "same rows"),
    ],
)
def test_broken_network_builders_fail_with_the_invariant_named(builder, invariant):
    with pytest.raises(AssertionError, match=f"invariant '{invariant}' violated") as info:
        check_network_builder(builder, seeds=[0])
    assert type(builder).__name__ in str(info.value) and "seed 0" in str(info.value)


def test_a_correct_handmade_builder_passes():
    assert check_network_builder(_Net(), seeds=[0])["one of each"] == 1


# -- curve families -------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("name", "params"),
    [
        ("normal", {}),
        ("logistic", {}),
        ("oscillator", {"weights": [0.6, 0.3, 0.1]}),
        ("tabulated", {"grid": [-3.0, -1.0, 0.0, 1.0, 3.0], "values": [0.01, 0.5, 1, 0.5, 0.01]}),
    ],
)
def test_builtin_curve_families_pass_the_kit(name, params):
    check_curve_family(registry.get_plugin("curves", name), params=params, seeds=range(2))


class DoubleForce(NormalCurve):
    description = "force twice too strong"

    def force(self, x, gamma):
        return 2.0 * super().force(x, gamma)


class AboveOne(NormalCurve):
    description = "values up to 1.5"

    def value(self, x):
        return 1.5 * super().value(x)


class LogOff(NormalCurve):
    description = "log_value off by a constant"

    def log_value(self, x):
        return super().log_value(x) - 0.1

    def value(self, x):
        return np.exp(super().log_value(x))


@pytest.mark.parametrize(
    ("family", "invariant"),
    [
        (DoubleForce, "force = gamma d ln P/dx"),
        (AboveOne, "values in [0, 1]"),
        (LogOff, "log_value consistent"),
    ],
)
def test_broken_curve_families_fail_with_the_invariant_named(family, invariant):
    expected = re.escape(f"{family.__name__}: invariant '{invariant}'")
    with pytest.raises(AssertionError, match=expected):
        check_curve_family(family, seeds=[0])


def test_the_curve_kit_names_the_price_and_curve():
    with pytest.raises(AssertionError, match=r"force\([0-9.]+\) = .* finite differences give"):
        check_curve_family(DoubleForce, seeds=[1])


# -- interventions --------------------------------------------------------------------------
INTERVENTIONS = [
    ("remove_hubs", {"k": 2, "until": 3}),
    ("remove_traders", {"count": 3, "until": 4}),
    ("cut_regions", {}),
    ("cap_degree", {"max_degree": 2, "until": 3}),
    ("switch_clearing", {"rule": "call_auction", "until": 3}),
    ("price_ceiling", {"price": 95.0}),
    ("price_floor", {"price": 90.0}),
    ("unit_tax", {"amount": 2.0}),
    ("unit_subsidy", {"amount": 1.0}),
    ("entry", {"n_buyers": 2}),
    ("value_shock", {"shift": 3.0, "until": 5}),
]


def test_every_builtin_intervention_is_in_the_list():
    assert sorted(n for n, _ in INTERVENTIONS) == registry.names("interventions")


@pytest.mark.parametrize(("name", "params"), INTERVENTIONS, ids=[n for n, _ in INTERVENTIONS])
def test_builtin_interventions_pass_the_kit(name, params):
    item = registry.make_plugin("interventions", name, **params)
    check_intervention(
        item, seeds=range(2), clearing=registry.make_plugin("clearing", "propensity")
    )


class _Iv:
    description = "a deliberately broken intervention"
    start, until = 0, None


class EditsInPlace(_Iv):
    def begin(self, market, rng):
        market.population.value[:] += 1.0  # without market.replace_population


class SwapsTheNetwork(_Iv):
    def begin(self, market, rng):
        market.network = market.network.keep_edges(rng.random(market.network.n_edges) < 0.5)


class SwapsTheRule(_Iv):
    def begin(self, market, rng):
        market.clearing = object()


class BadPolicy(_Iv):
    def begin(self, market, rng):
        market.policy.floor, market.policy.ceiling = 100.0, 90.0


class GlobalDraw(_Iv):
    def begin(self, market, rng):
        rows = np.random.choice(len(market.population), 2)  # noqa: NPY002 - on purpose
        market.remove_traders(rows)


class SellerBecomesBuyer(_Iv):
    def begin(self, market, rng):
        pop = market.population.copy()
        pop.role[-1] = 0
        market.replace_population(pop)


class Unseeded(_Iv):
    def begin(self, market, rng):
        market.remove_traders(np.random.default_rng().integers(0, 10, 3))


class BadWindow(_Iv):
    start = -1

    def begin(self, market, rng):
        pass


@pytest.mark.parametrize(
    ("item", "invariant"),
    [
        (EditsInPlace(), "changes the market only through its methods"),
        (SwapsTheNetwork(), "changes the market only through its methods"),
        (SwapsTheRule(), "changes the market only through its methods"),
        (BadPolicy(), "price policy valid"),
        (GlobalDraw(), "draws only from rng"),
        (Unseeded(), "same generator state gives the same market"),
        (BadWindow(), "window"),
    ],
)
def test_broken_interventions_fail_with_the_invariant_named(item, invariant):
    with pytest.raises(AssertionError, match=f"invariant '{invariant}' violated"):
        check_intervention(item, seeds=[0])


def test_a_role_change_is_refused_by_the_kit_market():
    with pytest.raises(ValueError, match="keep every existing trader's role"):
        check_intervention(SellerBecomesBuyer(), seeds=[0])


def test_the_kit_market_records_the_methods_called():
    pop_net = registry.make_plugin("networks", "complete").build(np.array([0, 0, 1, 1]), None)
    from propensim.agents.population import build_population

    market = KitMarket(build_population(2, 2, rng=0), pop_net)
    market.remove_traders([0])
    assert market.calls == ["remove_traders"] and not market.present[0]
    assert not (market.network.buyer == 0).any()


# -- what the checks name -----------------------------------------------------------
class AcrossMissingEdge:
    description = "trades buyer 0 with the last seller, linked or not"

    def clear(self, state, rng):
        pop = state.population
        s = int(pop.sellers[-1])
        if state.network.has_edge(0, s) or state.remaining[0] < 1 or state.remaining[s] < 1:
            return Trades.empty()
        return Trades([0], [s], [90.0], [1])


def test_a_trade_across_a_missing_edge_names_the_invariant_and_the_trade():
    with pytest.raises(AssertionError) as info:
        check_clearing_rule(AcrossMissingEdge(), seeds=[0])
    message = str(info.value)
    assert "invariant 'no trade across a missing edge' violated" in message
    assert "trade 0" in message and "buyer 0" in message, message


def test_a_plugin_that_raises_on_import_is_skipped_with_a_warning(monkeypatch):
    class EP:
        def __init__(self, name, value, dist):
            self.name, self.value, self.dist = name, value, type("D", (), {"name": dist})()

    def fake(group):
        if group == "propensim.metrics":
            return [EP("explodes", "no_such_student_package.rules:Rule", "student-a")]
        return []

    monkeypatch.setattr(registry, "_TABLE", None)
    monkeypatch.setattr(registry.metadata, "entry_points", fake)
    with pytest.warns(RuntimeWarning, match="metrics plugin 'explodes' .* failed to load"):
        assert registry.names("metrics") == ["explodes"]
        with pytest.raises(registry.UnknownPluginError):
            registry.get_plugin("metrics", "explodes")
    monkeypatch.setattr(registry, "_TABLE", None)


def test_two_plugins_with_one_name_warn_naming_both_packages(monkeypatch):
    class EP:
        def __init__(self, name, value, dist):
            self.name, self.value, self.dist = name, value, type("D", (), {"name": dist})()

    def fake(group):
        if group == "propensim.drift":
            return [
                EP("herding", "group_one.rules:Herding", "group-one"),
                EP("herding", "group_two.rules:Herding", "group-two"),
            ]
        return []

    monkeypatch.setattr(registry, "_TABLE", None)
    monkeypatch.setattr(registry.metadata, "entry_points", fake)
    with pytest.warns(RuntimeWarning) as caught:
        registry._table()
    message = str(caught[0].message)
    assert "duplicate drift plugin 'herding'" in message
    assert "(package group-two) skipped" in message and "(package group-one) keeps" in message
    monkeypatch.setattr(registry, "_TABLE", None)
