"""The plugin registry: entry points, lazy loading, warnings for broken or duplicate plugins."""

import subprocess
import sys
import textwrap

import pytest

from propensim.plugins import registry
from propensim.plugins.registry import (
    KINDS,
    UnknownPluginError,
    describe,
    get_plugin,
    make_plugin,
    names,
    register,
    unregister,
)

BUILT_IN = {
    "clearing": {
        "propensity",
        "propensity_per_agent",
        "call_auction",
        "double_auction",
        "bargaining",
    },
    "drift": {"none", "anchor", "outcome", "social", "width"},
    "curves": {"normal", "oscillator", "logistic", "tabulated"},
    "networks": {
        "complete",
        "erdos_renyi",
        "small_world",
        "scale_free",
        "bipartite",
        "regions",
        "edge_list",
        "graphml",
    },
    "metrics": {
        "volume",
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
        "total_surplus",
        "tax_revenue",
        "deadweight_loss",
        "fixed_efficiency",
        "unmet_demand",
        "unmet_supply",
        "buyer_price",
        "seller_price",
    },
    "interventions": {
        "remove_hubs",
        "remove_traders",
        "cut_regions",
        "cap_degree",
        "switch_clearing",
        "price_ceiling",
        "price_floor",
        "unit_tax",
        "unit_subsidy",
        "entry",
        "value_shock",
    },
}


def test_every_built_in_registers_through_entry_points_with_a_one_line_description():
    for kind in KINDS:
        assert BUILT_IN[kind] <= set(names(kind))
    rows = describe()
    described = {(k, n) for k, n, _ in rows}
    for kind, expected in BUILT_IN.items():
        assert {(kind, n) for n in expected} <= described
    for _, _, text in rows:
        assert text and "\n" not in text and len(text) < 120


def test_loading_is_lazy():
    code = textwrap.dedent(
        """
        import sys
        from propensim.plugins import names
        names("clearing"); names("metrics")
        heavy = [m for m in ("propensim.plugins.clearing", "propensim.plugins.metrics", "mesa")
                 if m in sys.modules]
        print(heavy)
        """
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_unknown_name_lists_the_known_ones_and_the_closest():
    with pytest.raises(UnknownPluginError) as err:
        get_plugin("clearing", "double_auctoin")
    msg = str(err.value)
    assert "did you mean 'double_auction'" in msg and "known: bargaining, call_auction" in msg
    assert "\n" not in msg
    with pytest.raises(
        UnknownPluginError, match="unknown plugin kind 'clearings'; allowed: clearing"
    ):
        names("clearings")


def test_make_plugin_checks_names_and_ranges_of_parameters():
    with pytest.raises(UnknownPluginError, match="unknown parameter 'meeting'.*allowed: meetings"):
        make_plugin("clearing", "propensity", meeting=2)
    with pytest.raises(ValueError, match="meetings"):
        make_plugin("clearing", "propensity", meetings=-1)
    rule = make_plugin("clearing", "call_auction", k=0.25)
    assert rule.k == 0.25 and rule.plugin_name == "call_auction"


class _Quiet:
    description = "does nothing at all"

    def clear(self, state, rng):  # pragma: no cover - never run
        raise NotImplementedError


def test_runtime_registration_and_duplicates_warn_not_crash():
    try:
        register("clearing", "quiet_rule")(_Quiet)
        assert get_plugin("clearing", "quiet_rule") is _Quiet
        with pytest.warns(RuntimeWarning, match="duplicate clearing plugin 'quiet_rule' skipped"):
            register("clearing", "quiet_rule")(type("Other", (), {"description": "x"}))
        assert get_plugin("clearing", "quiet_rule") is _Quiet  # the first keeps the name
        with pytest.raises(TypeError, match="description"):
            register("clearing", "nameless")(type("Nameless", (), {}))
    finally:
        unregister("clearing", "quiet_rule")
    assert "quiet_rule" not in names("clearing")


def test_a_broken_plugin_is_skipped_with_a_warning():
    table = registry._table()["clearing"]
    table["broken_rule"] = registry._Entry("broken_rule", "propensim.no_such_module:Rule")
    try:
        with pytest.warns(RuntimeWarning, match="'broken_rule'.*failed to load and is skipped"):
            with pytest.raises(UnknownPluginError):
                get_plugin("clearing", "broken_rule")
        assert "broken_rule" not in names("clearing")
        assert "propensity" in names("clearing")  # the others still load
    finally:
        table.pop("broken_rule", None)


def test_duplicate_entry_points_keep_the_first(monkeypatch):
    class EP:
        def __init__(self, name, value):
            self.name, self.value = name, value

    def fake_entry_points(group):
        if group == "propensim.drift":
            return [
                EP("anchor", "propensim.plugins.drift:AnchorDrift"),
                EP("anchor", "someone_else.rules:Anchor"),
            ]
        return []

    monkeypatch.setattr(registry, "_TABLE", None)
    monkeypatch.setattr(registry.metadata, "entry_points", fake_entry_points)
    with pytest.warns(RuntimeWarning, match="duplicate drift plugin 'anchor' from someone_else"):
        table = registry._table()
    assert table["drift"]["anchor"].target == "propensim.plugins.drift:AnchorDrift"
    monkeypatch.setattr(registry, "_TABLE", None)


def test_parameters_are_read_once_per_class_and_for_unhashable_factories(monkeypatch):
    class Rule:
        def __init__(self, rate: float = 0.5, *, label: str = "x") -> None: ...

    class Factory:  # defines __eq__ without __hash__: unhashable
        def __eq__(self, other):
            return self is other

        def __call__(self, size: int = 3): ...

    monkeypatch.setattr(registry, "get_plugin", lambda kind, name: Rule)
    first = registry.parameters("clearing", "rule")
    first["rate"] = 9.0  # a caller's change must not reach the kept copy
    assert registry.parameters("clearing", "rule") == {"rate": 0.5, "label": "x"}
    monkeypatch.setattr(registry, "get_plugin", lambda kind, name: Factory())
    assert registry.parameters("clearing", "factory") == {"size": 3}
