"""The Python examples in README.md and DEVELOPERS.md run as written."""

import re
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def _blocks(name: str) -> list[str]:
    text = (ROOT / name).read_text()
    return re.findall(r"```python\n(.*?)```", text, flags=re.S)


def test_readme_tour_runs():
    tour = _blocks("README.md")[0]
    scope: dict = {}
    exec(compile(tour, "README.md", "exec"), scope)
    pair = scope["pair"]
    # product of two normal curves (Bromiley 2003): mean (95*64 + 105*36)/100 = 98.6
    assert np.isclose(pair.mean, 98.6)
    assert len(scope["rounds"]) == 50
    assert len(scope["market"].agents) == 1000


def test_developers_plugin_example_passes_the_conformance_kit():
    from propensim.plugins.testing import check_clearing_rule

    example = next(b for b in _blocks("DEVELOPERS.md") if "class NearestNeighbourDeal" in b)
    scope: dict = {}
    exec(compile(example, "DEVELOPERS.md", "exec"), scope)
    rule = scope["NearestNeighbourDeal"](markup=1.0)
    volumes = check_clearing_rule(rule)  # dict: units traded per kit scenario
    assert sum(volumes.values()) > 0
