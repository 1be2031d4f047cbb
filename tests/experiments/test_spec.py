import tomllib
import warnings
from pathlib import Path

import numpy as np
import pytest
import tomli_w

import propensim.experiments as experiments_pkg
from propensim.experiments.spec import (
    SpecError,
    _Locator,
    format_path,
    load_spec,
    parse_override,
)
from propensim.markets.build import build_market
from propensim.markets.engine import DEFAULT_METRICS

EXAMPLES = Path(experiments_pkg.__file__).parent / "examples"
DEMO = EXAMPLES / "demo.toml"


def tiny(**extra):
    """A small valid spec as a dict (notebook form)."""
    spec = {
        "experiment": {"name": "tiny", "seed": 5, "rounds": 3, "replicates": 2},
        "population": {"n_buyers": 6, "n_sellers": 6, "sigma": 5.0},
    }
    spec.update(extra)
    return spec


def two_arms():
    return tiny(
        clearing={"name": "propensity", "meetings": 2},
        design={"kind": "grid", "parameters": {"population.sigma": [3.0, 9.0]}},
        arms=[
            {"name": "matching"},
            {"name": "auction", "set": {"clearing.name": "call_auction"}},
        ],
    )


# -- shipped examples ------------------------------------------------------------------------
@pytest.mark.parametrize("path", sorted(EXAMPLES.glob("*.toml")), ids=lambda p: p.name)
def test_every_shipped_example_loads(path):
    with warnings.catch_warnings():
        warnings.simplefilter("error", UserWarning)
        spec = load_spec(path)
    assert spec.n_runs == len(spec.runs()) > 0
    assert spec.source == path
    assert len(spec.fingerprint()) == 64


def test_examples_folder_has_the_demo_and_others():
    names = {p.name for p in EXAMPLES.glob("*.toml")}
    assert "demo.toml" in names and len(names) >= 2


def test_demo_spec_shape():
    spec = load_spec(DEMO)
    assert spec.name == "growers-and-kitchens"
    assert spec.arm_names == ["matching", "call-auction"]
    assert spec.network["name"] == "regions"
    assert spec.design["parameters"] == {"population.sigma": [3.0, 6.0, 12.0]}
    assert spec.n_runs == 3 * 8 * 2
    assert spec.compare.baseline == "call-auction"
    assert set(spec.compare.metrics) <= set(spec.metrics)
    configs = {r.arm: r.config for r in spec.runs()[:2]}
    assert configs["call-auction"]["clearing"]["name"] == "call_auction"
    assert configs["matching"]["clearing"]["meetings"] == 3
    # a call auction has no meetings: a changed plugin name starts its table afresh
    assert "meetings" not in configs["call-auction"]["clearing"]


# -- runs ------------------------------------------------------------------------------------
def test_runs_order_seeds_and_common_random_numbers():
    spec = load_spec(two_arms())
    runs = spec.runs()
    assert spec.n_runs == len(runs) == 2 * 2 * 2
    assert [r.index for r in runs] == list(range(8))
    # order: design point, then replicate, then arm
    assert [(r.point, r.replicate, r.arm) for r in runs[:4]] == [
        (0, 0, "matching"),
        (0, 0, "auction"),
        (0, 1, "matching"),
        (0, 1, "auction"),
    ]
    for a, b in zip(runs[::2], runs[1::2], strict=True):
        assert a.seed_key == b.seed_key == (a.point, a.replicate)
        assert a.seed_entropy == b.seed_entropy == 5
        assert a.run_id != b.run_id
    assert len({r.seed_key for r in runs}) == 4
    assert runs[0].params == {"population.sigma": 3.0}
    assert runs[0].config["population"]["sigma"] == 3.0
    assert runs[-1].config["population"]["sigma"] == 9.0
    assert runs[0].collect == {"rounds": True, "traders_every": 0, "ledger": False}


def test_runs_are_deterministic_across_loads():
    a = [r.run_id for r in load_spec(DEMO).runs()]
    b = [r.run_id for r in load_spec(DEMO).runs()]
    assert a == b
    assert len(set(a)) == len(a)


def test_arms_of_a_replicate_see_the_same_market_draws():
    # common random numbers: same seed_key -> same population and network for both arms
    runs = load_spec(two_arms()).runs()
    m1 = build_market(runs[0].config, runs[0].seed, mesa=False)
    m2 = build_market(runs[1].config, runs[1].seed, mesa=False)
    np.testing.assert_array_equal(m1.population.value, m2.population.value)
    np.testing.assert_array_equal(m1.population.mu, m2.population.mu)
    np.testing.assert_array_equal(m1.network.buyer, m2.network.buyer)
    m3 = build_market(runs[2].config, runs[2].seed, mesa=False)  # next replicate: new draws
    assert not np.array_equal(m1.population.value, m3.population.value)
    table = m1.run(runs[0].rounds)
    assert list(table.columns) == ["round", *DEFAULT_METRICS]
    assert len(table) == 3


def test_defaults_of_a_minimal_spec():
    spec = load_spec(tiny())
    assert spec.network == {"name": "complete"}
    assert spec.clearing["name"] == "propensity" and spec.clearing["meetings"] == 1
    assert spec.drift == {"name": "none"}
    assert spec.metrics == list(DEFAULT_METRICS)
    assert spec.arm_names == [] and spec.compare is None
    assert spec.population["value"] == [80.0, 120.0]  # build_population's default
    assert spec.population["cash"] == float("inf")
    assert spec.market == {"replenish": True, "keep_ledger": False}
    runs = spec.runs()
    assert [r.arm for r in runs] == ["", ""]
    assert runs[0].config["market"] == {"replenish": True, "keep_ledger": False, "traders_every": 0}


def test_shorthand_plugin_names_and_numpy_values():
    spec = load_spec(tiny(network="complete", clearing="call_auction"))
    assert spec.clearing == {
        "name": "call_auction",
        "k": 0.5,
        "quotes": "reservation",
        "threshold": 0.5,
    }
    spec = load_spec(tiny(design={"parameters": {"population.sigma": np.array([2.0, 4.0])}}))
    assert [p["population.sigma"] for p in spec.points] == [2.0, 4.0]
    assert type(spec.points[0]["population.sigma"]) is float


def test_sampled_design_follows_the_root_seed():
    path = EXAMPLES / "lhs_uncertainty.toml"
    a, b = load_spec(path), load_spec(path)
    assert a.points == b.points and len(a.points) == 16
    c = load_spec(path, overrides=["experiment.seed=7032"])
    assert c.points != a.points
    assert sorted(p["clearing.meetings"] for p in a.points) == [1] * 4 + [2] * 4 + [3] * 4 + [4] * 4


def test_sobol_size_warning_names_the_file(tmp_path):
    path = tmp_path / "s.toml"
    path.write_text(
        '[experiment]\nname = "s"\nseed = 1\nrounds = 2\n[population]\nn_buyers = 2\n'
        'n_sellers = 2\n[design]\nkind = "sobol"\nsamples = 6\n[design.parameters]\n'
        '"population.sigma" = { low = 1.0, high = 4.0 }\n'
    )
    with pytest.warns(UserWarning, match=f"{path}: design.samples = 6"):
        spec = load_spec(path)
    assert len(spec.points) == 6


def test_whole_section_override_in_an_arm():
    spec = load_spec(
        tiny(
            drift={"rules": [{"name": "anchor"}, {"name": "outcome", "step": 0.2}], "noise": 0.1},
            arms=[{"name": "drifting"}, {"name": "still", "set": {"drift": {"name": "none"}}}],
        )
    )
    runs = spec.runs()
    assert runs[0].config["drift"]["noise"] == 0.1
    assert runs[1].config["drift"] == {"name": "none"}


# -- overrides -------------------------------------------------------------------------------
def test_parse_override_values():
    assert parse_override("population.sigma=4") == (("population", "sigma"), 4)
    assert parse_override("collect.metrics=['volume']") == (("collect", "metrics"), ["volume"])
    assert parse_override("clearing.name = call_auction") == (("clearing", "name"), "call_auction")
    assert parse_override('design.parameters."population.sigma"=[1.0, 2.0]') == (
        ("design", "parameters", "population.sigma"),
        [1.0, 2.0],
    )


def test_overrides_change_the_spec():
    base = load_spec(DEMO)
    spec = load_spec(
        DEMO,
        overrides=[
            "experiment.replicates=2",
            "population.n_buyers=10",
            'design.parameters."population.sigma"=[4.0]',
            "clearing.meetings=1",
        ],
    )
    assert spec.n_runs == 1 * 2 * 2
    assert spec.population["n_buyers"] == 10
    assert spec.clearing["meetings"] == 1
    assert spec.fingerprint() != base.fingerprint()
    spec = load_spec(DEMO, overrides=["clearing.name=call_auction"])
    assert spec.clearing == {
        "name": "call_auction",
        "k": 0.5,
        "quotes": "reservation",
        "threshold": 0.5,
    }


def test_override_errors():
    with pytest.raises(SpecError, match="unknown section 'populaton'"):
        load_spec(DEMO, overrides=["populaton.sigma=2.0"])
    with pytest.raises(SpecError, match="expected path=value"):
        load_spec(DEMO, overrides=["population.sigma"])
    with pytest.raises(SpecError) as info:
        load_spec(DEMO, overrides=["clearing.meetings=-1"])
    msg = str(info.value)
    # located in the command line, not in the file: the file is named, no line number
    assert msg.startswith(f"{DEMO}: clearing.meetings: ")
    assert "from --set clearing.meetings=-1" in msg and "\n" not in msg


# -- resolved, fingerprint, TOML round trip ----------------------------------------------------
@pytest.mark.parametrize("path", sorted(EXAMPLES.glob("*.toml")), ids=lambda p: p.name)
def test_resolved_round_trips_through_toml(path, tmp_path):
    spec = load_spec(path)
    out = tmp_path / "resolved.toml"
    out.write_text(tomli_w.dumps(spec.resolved()))
    again = load_spec(out)
    assert again.fingerprint() == spec.fingerprint()
    assert again.resolved() == spec.resolved()
    assert [r.run_id for r in again.runs()] == [r.run_id for r in spec.runs()]
    out.write_text(spec.to_toml())
    assert load_spec(out).fingerprint() == spec.fingerprint()


def test_dict_and_file_give_the_same_fingerprint():
    raw = tomllib.loads(DEMO.read_text())
    from_dict = load_spec(raw)
    assert from_dict.fingerprint() == load_spec(DEMO).fingerprint()
    assert from_dict.source is None


def test_fingerprint_changes_with_any_setting():
    a = load_spec(two_arms()).fingerprint()
    assert load_spec(two_arms(), overrides=["compare.bootstrap=500"]).fingerprint() != a
    assert load_spec(two_arms(), overrides=["experiment.seed=6"]).fingerprint() != a
    assert load_spec(two_arms()).fingerprint() == a


def test_resolved_is_a_copy():
    spec = load_spec(tiny())
    spec.resolved()["population"]["n_buyers"] = 99
    assert spec.resolved()["population"]["n_buyers"] == 6


# -- errors ----------------------------------------------------------------------------------
def test_spec_error_from_a_dict_has_no_file_or_line():
    bad = tiny()
    bad["population"]["n_sellers"] = -1
    with pytest.raises(SpecError) as info:
        load_spec(bad)
    err = info.value
    assert str(err).startswith("population.n_sellers: must be greater than or equal to 0")
    assert err.path == "population.n_sellers" and err.file is None and err.line is None


def test_every_design_point_and_arm_is_checked():
    spec = two_arms()
    spec["design"]["parameters"]["population.sigma"] = [3.0, 9.0, -1.0]
    with pytest.raises(SpecError, match=r"population.sigma: sigma must be > 0.*design point 2"):
        load_spec(spec)


def test_missing_file_and_wrong_source_type(tmp_path):
    with pytest.raises(SpecError, match="no such spec file"):
        load_spec(tmp_path / "nope.toml")
    with pytest.raises(SpecError, match="file path or a mapping"):
        load_spec(42)


# -- line locator ----------------------------------------------------------------------------
def test_locator_finds_tables_keys_and_array_elements():
    text = (
        "# header\n"  # 1
        "[experiment]\n"  # 2
        'name = "x"  # a comment with "quotes" and [brackets]\n'  # 3
        "[drift]\n"  # 4
        "rules = [\n"  # 5
        '  { name = "anchor" },\n'  # 6
        '  { name = "outcome", step = 0.3 },\n'  # 7
        "]\n"  # 8
        "[design.parameters]\n"  # 9
        '"population.sigma" = { low = 1.0, high = 2.0 }\n'  # 10
        "[[arms]]\n"  # 11
        'name = "a"\n'  # 12
        "[[arms]]\n"  # 13
        'description = """two\n'  # 14
        'lines"""\n'  # 15
        'name = "b"\n'  # 16
        "[arms.set]\n"  # 17
        '"clearing.name" = "call_auction"\n'  # 18
    )
    tomllib.loads(text)  # valid TOML
    loc = _Locator(text)
    assert loc.find(("experiment", "name")) == 3
    assert loc.find(("drift", "rules", 1, "step")) == 7
    assert loc.find(("drift", "rules", 0)) == 6
    assert loc.find(("design", "parameters", "population.sigma", "high")) == 10
    assert loc.find(("arms", 0, "name")) == 12
    assert loc.find(("arms", 1, "name")) == 16
    assert loc.find(("arms", 1, "set", "clearing.name")) == 18
    assert loc.find(("arms", 1, "missing")) == 13  # longest prefix: the table header
    assert loc.find(("nowhere",)) is None


def test_format_path():
    assert format_path(("design", "parameters", "population.sigma")) == (
        'design.parameters."population.sigma"'
    )
    assert format_path(("arms", 1, "name")) == "arms[1].name"


# -- plugins registered at run time -----------------------------------------------------------
def test_runtime_registered_plugin_is_checked_and_filled():
    from propensim.plugins import registry
    from propensim.plugins.types import Trades

    class NullRule:
        description = "trades nothing (test stub)"

        def __init__(self, patience=3, style="calm", extra=None):
            self.patience = patience
            self.style = style
            self.extra = extra

        def check(self):
            if self.patience < 0:
                raise ValueError(f"patience must be >= 0, got {self.patience}")

        def clear(self, state, rng):
            return Trades.empty()

    registry.register("clearing", "test_null_rule", replace=True)(NullRule)
    try:
        spec = load_spec(tiny(clearing={"name": "test_null_rule"}))
        # defaults written out; None cannot be written to TOML and is left out
        assert spec.clearing == {"name": "test_null_rule", "patience": 3, "style": "calm"}
        with pytest.raises(SpecError, match="^clearing.patience: patience must be >= 0, got -1$"):
            load_spec(tiny(clearing={"name": "test_null_rule", "patience": -1}))
    finally:
        registry.unregister("clearing", "test_null_rule")


def test_curve_parameter_errors_name_curve_params():
    pop = {
        "n_buyers": 3,
        "n_sellers": 3,
        "curve": "oscillator",
        "curve_params": {"weights": [-0.8, 0.0, 0.2]},
    }
    with pytest.raises(SpecError, match="^population.curve_params: weights"):
        load_spec(tiny(population=pop))
    pop["curve_params"]["weights"] = [0.8, 0.0, 0.2]
    assert load_spec(tiny(population=pop)).population["curve_params"] == {
        "weights": [0.8, 0.0, 0.2]
    }
