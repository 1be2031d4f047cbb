"""Sensitivity analysis through the sweep machinery, checked on the Ishigami function.

Analytic indices for a = 7, b = 0.1 (Ishigami and Homma 1990; Saltelli et al. 2008, sec. 4.2):
S1 = (0.3139, 0.4424, 0), ST = (0.5576, 0.4424, 0.2437).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

pytest.importorskip("SALib")

from propensim.experiments import load_spec  # noqa: E402
from propensim.experiments.sensitivity import (  # noqa: E402
    SensitivityError,
    problem_from_spec,
    run_sensitivity,
    sensitivity_spec,
)
from propensim.plugins import registry  # noqa: E402

OFFSET = 10.0  # inputs are stored shifted into [10, 10 + 2 pi]: population fields stay positive
S1 = (0.3139, 0.4424, 0.0)
ST = (0.5576, 0.4424, 0.2437)


def ishigami(x1, x2, x3, a=7.0, b=0.1):
    return np.sin(x1) + a * np.sin(x2) ** 2 + b * x3**4 * np.sin(x1)


class IshigamiMetric:
    """Reads the three inputs from the population columns a design point set."""

    description = "Ishigami test function of the buyer's value, seller's cost and gamma"
    aggregate = "last"
    better = None

    def measure(self, state, outcome):
        pop = state.population
        buyer, seller = pop.role == 0, pop.role == 1
        x1 = float(pop.value[buyer][0]) - OFFSET - math.pi
        x2 = float(pop.value[seller][0]) - OFFSET - math.pi
        x3 = float(pop.gamma[0]) - OFFSET - math.pi
        return float(ishigami(x1, x2, x3))


@pytest.fixture
def ishigami_plugin():
    registry.register("metrics", "ishigami_test")(IshigamiMetric)
    yield "ishigami_test"
    registry.unregister("metrics", "ishigami_test")


def _spec(metric: str, kind: str = "random"):
    rng = {"low": OFFSET, "high": OFFSET + 2 * math.pi}
    params = {"population.value": rng, "population.cost": rng, "population.gamma": rng}
    if kind == "grid":
        params = {"population.value": [10.0, 11.0]}
    design = {"kind": kind, "parameters": params}
    if kind != "grid":
        design["samples"] = 4
    return load_spec(
        {
            "experiment": {"name": "ishigami", "seed": 5, "rounds": 1, "replicates": 1},
            "population": {"n_buyers": 1, "n_sellers": 1, "shade": 0.0},
            "collect": {"metrics": [metric], "rounds": False},
            "design": design,
        }
    )


def test_no_ranges_is_refused(ishigami_plugin):
    with pytest.raises(SensitivityError, match="needs ranges"):
        problem_from_spec(_spec(ishigami_plugin, kind="grid"))


def test_sample_is_mapped_into_the_ranges(ishigami_plugin):
    spec, settings = sensitivity_spec(_spec(ishigami_plugin), "sobol", samples=8)
    assert len(spec.points) == 8 * (3 + 2)  # N (D + 2) without second order
    values = np.array([p["population.value"] for p in spec.points])
    assert values.min() >= OFFSET and values.max() <= OFFSET + 2 * math.pi
    assert spec.design["kind"] == "points"
    u = np.asarray(settings["unit_sample"])
    np.testing.assert_allclose(values, OFFSET + 2 * math.pi * u[:, 0])


@pytest.mark.slow
def test_ishigami_indices_match_the_analytic_values(ishigami_plugin, tmp_path):
    # N = 1024 base samples: 5120 runs through spec, runner (in this process: the plugin is
    # registered here only) and store.
    folder, table = run_sensitivity(
        _spec(ishigami_plugin),
        tmp_path / "ishigami",
        method="sobol",
        samples=1024,
        workers=1,
        progress=False,
    )
    table = table.set_index("parameter")
    names = ["population.value", "population.cost", "population.gamma"]
    np.testing.assert_allclose(table.loc[names, "S1"], S1, atol=0.03)
    np.testing.assert_allclose(table.loc[names, "ST"], ST, atol=0.03)
    assert (folder / "sensitivity.csv").exists() and (folder / "sensitivity.json").exists()


def test_morris_screening_through_the_sweep(ishigami_plugin, tmp_path):
    # Morris (1991): N trajectories of D + 1 points each, every run stored in the folder;
    # mu* is the mean absolute elementary effect, so mu* >= |mu|; x3 acts on f only through
    # its interaction with x1, which shows as a spread (sigma > 0) of its effects.
    folder, table = run_sensitivity(
        _spec(ishigami_plugin),
        tmp_path / "m",
        method="morris",
        samples=40,
        workers=1,
        progress=False,
    )
    from propensim.experiments import load

    assert len(load(folder).runs) == 40 * (3 + 1)
    table = table.set_index("parameter")
    assert (table["mu_star"] >= np.abs(table["mu"]) - 1e-12).all()
    assert (table["mu_star"] > 0).all() and np.isfinite(table["mu_star_conf"]).all()
    assert table.loc["population.gamma", "sigma"] > 0
