import math
import warnings

import numpy as np
import pytest
from scipy.stats import chisquare, qmc

from propensim.experiments.designs import DesignError, design_points, n_points, unit_sample

RANGES = {
    "population.sigma": {"low": 2.0, "high": 8.0},
    "clearing.meetings": {"low": 1, "high": 4, "integer": True},
    "drift.noise": {"low": 0.01, "high": 1.0, "log": True},
}


# -- grid and points -------------------------------------------------------------------------
def test_grid_is_full_factorial_first_parameter_slowest():
    pts = design_points("grid", {"a": [1, 2, 3], "b": ["x", "y"], "c": [True, False]})
    assert len(pts) == 3 * 2 * 2  # full factorial: product of the level counts
    assert pts[0] == {"a": 1, "b": "x", "c": True}
    assert pts[1] == {"a": 1, "b": "x", "c": False}
    assert pts[-1] == {"a": 3, "b": "y", "c": False}
    assert len({tuple(p.values()) for p in pts}) == 12  # every combination exactly once
    assert n_points("grid", {"a": [1, 2, 3], "b": ["x", "y"], "c": [True, False]}) == 12


def test_grid_levels_may_be_tables_and_lists():
    pts = design_points("grid", {"population.value": [[80.0, 120.0], {"normal": [100.0, 5.0]}]})
    assert [p["population.value"] for p in pts] == [[80.0, 120.0], {"normal": [100.0, 5.0]}]


def test_grid_without_parameters_is_one_point():
    assert design_points("grid", {}) == [{}]


def test_points_are_used_as_given():
    given = [{"population.sigma": 2.0}, {"population.sigma": 4.0, "clearing.meetings": 2}]
    assert design_points("points", given) == given
    assert design_points("points", given) is not given


@pytest.mark.parametrize(
    ("kind", "params", "kwargs", "text"),
    [
        ("factorial", {}, {}, "unknown design kind"),
        ("grid", {"a": []}, {}, "empty list of levels"),
        ("grid", {"a": {"low": 1, "high": 2}}, {}, "list of levels"),
        ("points", [], {}, "points is empty"),
        ("random", {"a": {"low": 3.0, "high": 1.0}}, {"samples": 4}, "reversed"),
        ("random", {"a": [1.0, 2.0]}, {"samples": 4}, "range table"),
        ("random", {"a": {"low": 1.0}}, {"samples": 4}, "a.high is required"),
        ("random", {"a": {"low": "x", "high": 2.0}}, {"samples": 4}, "finite number"),
        ("lhs", {"a": {"low": 0.0, "high": 2.0, "log": True}}, {"samples": 4}, "low > 0"),
        ("lhs", {"a": {"low": 1.5, "high": 4, "integer": True}}, {"samples": 4}, "whole"),
        ("lhs", {"a": {"low": 1.0, "high": 2.0, "step": 1}}, {"samples": 4}, "unknown range key"),
        ("sobol", {"a": {"low": 1.0, "high": 2.0}}, {"samples": 0}, "samples must be >= 1"),
        ("sobol", {"a": {"low": 1.0, "high": 2.0}}, {}, "samples must be a whole number"),
    ],
)
def test_bad_designs_raise_one_line_value_errors(kind, params, kwargs, text):
    with pytest.raises(ValueError, match=text) as info:
        design_points(kind, params, **kwargs)
    assert isinstance(info.value, DesignError)
    assert "\n" not in str(info.value)


# -- sampled designs -------------------------------------------------------------------------
@pytest.mark.parametrize("kind", ["random", "lhs", "sobol"])
def test_sampled_designs_are_reproducible_and_within_ranges(kind):
    a = design_points(kind, RANGES, samples=32, seed=11)
    b = design_points(kind, RANGES, samples=32, seed=11)
    c = design_points(kind, RANGES, samples=32, seed=12)
    assert a == b
    assert a != c
    sig = np.array([p["population.sigma"] for p in a])
    meet = [p["clearing.meetings"] for p in a]
    noise = np.array([p["drift.noise"] for p in a])
    assert np.all((sig >= 2.0) & (sig <= 8.0))
    assert all(type(m) is int and 1 <= m <= 4 for m in meet)
    assert np.all((noise >= 0.01) & (noise <= 1.0))


def test_random_design_is_uniform_scaling_of_the_seeded_generator():
    # qmc.scale maps u in [0, 1) to low + u (high - low) (scipy.stats.qmc.scale docs)
    pts = design_points("random", {"a": {"low": 2.0, "high": 5.0}}, samples=6, seed=3)
    u = np.random.default_rng(3).random((6, 1))
    np.testing.assert_allclose([p["a"] for p in pts], 2.0 + 3.0 * u[:, 0])


def test_lhs_has_one_point_per_stratum_in_every_dimension():
    # McKay, Beckman and Conover (1979): each of the n equal strata of every input holds exactly
    # one sample point.
    n = 20
    params = {
        "x": {"low": -1.0, "high": 3.0},
        "y": {"low": 10.0, "high": 20.0},
        "z": {"low": 0.1, "high": 100.0, "log": True},
    }
    for seed in range(5):
        pts = design_points("lhs", params, samples=n, seed=seed)
        for name, r in params.items():
            x = np.array([p[name] for p in pts])
            lo, hi = r["low"], r["high"]
            if r.get("log"):
                x, lo, hi = np.log(x), math.log(lo), math.log(hi)
            strata = np.floor((x - lo) / (hi - lo) * n).astype(int)
            assert sorted(strata.tolist()) == list(range(n)), (seed, name)


def test_lhs_integer_range_with_one_sample_per_value_hits_every_value_once():
    # floor of [low, high + 1) keeps the hypercube stratified over the integers
    pts = design_points("lhs", {"m": {"low": 3, "high": 10, "integer": True}}, samples=8, seed=4)
    assert sorted(p["m"] for p in pts) == list(range(3, 11))


@pytest.mark.parametrize("kind", ["lhs", "sobol"])
def test_space_filling_designs_beat_random_on_discrepancy(kind):
    # Quasi-Monte Carlo and Latin hypercube designs have lower centred L2 discrepancy than plain
    # Monte Carlo samples of the same size (scipy.stats.qmc docs; Owen 1998; Hickernell 1998).
    n, d, seeds = 64, 3, range(6)
    disc = {
        k: np.mean([qmc.discrepancy(unit_sample(k, n, d, seed=s)) for s in seeds])
        for k in ("random", kind)
    }
    assert disc[kind] < 0.7 * disc["random"], disc


def test_integer_range_gives_each_value_the_same_share():
    # uniform over {1, 2, 3, 4}: the end values are as likely as the middle ones (common practice:
    # a rounded continuous draw would give them half the weight)
    pts = design_points("random", {"m": {"low": 1, "high": 4, "integer": True}}, samples=8000)
    counts = np.bincount([p["m"] for p in pts], minlength=5)[1:]
    assert chisquare(counts).pvalue > 1e-3
    assert counts.min() > 1800


def test_log_range_is_uniform_in_log_space():
    pts = design_points("random", {"s": {"low": 1.0, "high": 1000.0, "log": True}}, samples=6000)
    decade = np.floor(np.log10([p["s"] for p in pts])).astype(int)
    counts = np.bincount(decade, minlength=3)[:3]
    # each decade holds a third of the points when log10(s) is uniform on [0, 3)
    assert chisquare(counts).pvalue > 1e-3


def test_degenerate_range_is_a_constant():
    pts = design_points(
        "lhs", {"a": {"low": 2.5, "high": 2.5}, "b": {"low": 0.0, "high": 1.0}}, samples=4, seed=0
    )
    assert [p["a"] for p in pts] == [2.5] * 4


def test_sobol_warns_unless_power_of_two():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        design_points("sobol", RANGES, samples=16, seed=0)  # no warning
    with pytest.warns(UserWarning, match="power of 2"):
        pts = design_points("sobol", RANGES, samples=12, seed=0)
    assert len(pts) == 12


def test_sampled_design_without_parameters_repeats_the_base_point():
    assert design_points("lhs", {}, samples=3) == [{}, {}, {}]
