"""ODD descriptions: the seven elements of Grimm et al. (2020) in order, all eleven concepts."""

import re
from pathlib import Path

import pytest

from propensim.experiments import load_spec
from propensim.experiments.cli import main
from propensim.experiments.describe import CONCEPTS, ELEMENTS, describe_spec, plugin_notes
from propensim.plugins import registry

DEMO = Path(__file__).resolve().parents[2] / "experiments" / "examples" / "demo.toml"

# Grimm et al. (2020), JASSS 23(2):7, the protocol's element names and design concepts
ODD_2020 = [
    "Purpose and patterns",
    "Entities, state variables, and scales",
    "Process overview and scheduling",
    "Design concepts",
    "Initialization",
    "Input data",
    "Submodels",
]
CONCEPTS_2020 = [
    "Basic principles",
    "Emergence",
    "Adaptation",
    "Objectives",
    "Learning",
    "Prediction",
    "Sensing",
    "Interaction",
    "Stochasticity",
    "Collectives",
    "Observation",
]


def test_the_protocol_wording_is_kept():
    assert list(ELEMENTS) == ODD_2020
    assert list(CONCEPTS.values()) == CONCEPTS_2020


def test_demo_description_has_the_elements_in_order_and_every_concept():
    text = describe_spec(load_spec(DEMO))
    heads = re.findall(r"^## \d+\. (.+)$", text, re.M)
    assert heads == ODD_2020
    concepts = re.findall(r"^### 4\.\d+ (.+)$", text, re.M)
    assert concepts == CONCEPTS_2020
    # each concept is addressed or marked not applicable: no empty sub-section
    blocks = re.split(r"^### 4\.\d+ .+$", text.split("## 5.")[0], flags=re.M)[1:]
    assert all(b.strip() for b in blocks)
    assert "Not applicable" in text
    assert "growers and kitchens" in text.lower() or "growers" in text
    assert "`regions`" in text and "`call_auction`" in text  # the arm's clearing rule too


def test_plugins_without_notes_get_a_placeholder():
    text = describe_spec(load_spec(DEMO))
    assert "No design-concept notes (`odd_notes`) from:" in text
    assert "clearing rule `propensity`" in text


class NotedMetric:
    description = "test metric with design-concept notes"
    aggregate = "mean"
    odd_notes = {"Observation": "counts the rounds it saw", "sensing": "sees nothing"}

    def measure(self, state, outcome):
        return 0.0


@pytest.fixture
def noted():
    registry.register("metrics", "noted_test")(NotedMetric)
    yield "noted_test"
    registry.unregister("metrics", "noted_test")


def test_plugin_notes_are_read_and_placed_under_their_concepts(noted):
    assert plugin_notes(NotedMetric) == {
        "observation": "counts the rounds it saw",
        "sensing": "sees nothing",
    }
    assert plugin_notes(object()) is None
    spec = load_spec(
        {
            "experiment": {"name": "noted", "seed": 1, "rounds": 2},
            "population": {"n_buyers": 2, "n_sellers": 2},
            "collect": {"metrics": ["volume", noted]},
        }
    )
    text = describe_spec(spec)
    observation = text.split("### 4.11 Observation")[1].split("## 5.")[0]
    assert "- metric `noted_test`: counts the rounds it saw" in observation
    sensing = text.split("### 4.7 Sensing")[1].split("### 4.8")[0]
    assert "sees nothing" in sensing
    placeholder = text.split("No design-concept notes")[1].split("]*")[0]
    assert "noted_test" not in placeholder and "metric `volume`" in placeholder


def test_cli_describe_writes_markdown(tmp_path, capsys):
    out = tmp_path / "odd.md"
    assert main(["describe", str(DEMO), "--out", str(out)]) == 0
    assert out.read_text().startswith("# growers-and-kitchens: model description")
    assert main(["describe", str(tmp_path / "missing.toml")]) == 2
    assert "no such spec file" in capsys.readouterr().err
