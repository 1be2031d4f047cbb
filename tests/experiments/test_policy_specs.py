"""Policy scenarios from a spec and the command line: interventions, totals, plain comparisons."""

from __future__ import annotations

from pathlib import Path

import pytest

from propensim.experiments.cli import main
from propensim.experiments.compare import likelihood_term
from propensim.experiments.spec import load_spec

EXAMPLE = Path(__file__).parents[2] / "experiments" / "examples" / "policy_scenarios.toml"

BASE = """
[experiment]
name = "policy-check"
seed = 7
rounds = 5
replicates = 2

[population]
n_buyers = 20
n_sellers = 20

[network]
name = "complete"
"""


def _write(tmp_path, text: str) -> Path:
    path = tmp_path / "spec.toml"
    path.write_text(BASE + text)
    return path


@pytest.mark.parametrize(
    ("extra", "field"),
    [
        ('[[interventions]]\nname = "price_ceiling"\nprice = -1.0\n', "interventions[0].price"),
        ('[[interventions]]\nname = "unit_tax"\namount = inf\n', "interventions[0].amount"),
        ('[[interventions]]\nname = "unit_tax"\namount = "five"\n', "interventions[0].amount"),
        ('[[interventions]]\nname = "remove_hubs"\nk = 500\n', "interventions[0].k"),
        ('[[interventions]]\nname = "price_floor"\nprice = 5.0\nstart = 9\n', "start"),
        ('[[interventions]]\nname = "unit_tax"\nuntil = 99\n', "until"),
        ('[[interventions]]\nname = "cut_regions"\n', "attribute"),
        ('[[interventions]]\nname = "remove_traders"\nids = [3, 77]\n', "ids"),
        ('[[interventions]]\nname = "lower_taxes"\n', "interventions[0].name"),
        (
            '[[arms]]\nname = "a"\n[[arms]]\nname = "b"\n'
            'interventions = [{ name = "remove_traders", attribute = "town", equals = 1 }]\n',
            "arms[1].interventions[0]",
        ),
    ],
)
def test_bad_interventions_exit_2_with_one_line_naming_the_field(tmp_path, capsys, extra, field):
    spec = _write(tmp_path, extra)
    code = main(["check", str(spec)])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert len(err.splitlines()) == 1 and "Traceback" not in err
    assert field in err, err


def test_a_ceiling_below_a_floor_in_force_is_refused_before_the_run(tmp_path, capsys):
    spec = _write(
        tmp_path,
        '[[interventions]]\nname = "price_floor"\nprice = 100.0\n'
        '[[interventions]]\nname = "price_ceiling"\nprice = 90.0\n',
    )
    code = main(["check", str(spec)])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "interventions[1]" in err and "below the price floor" in err


def test_the_example_spec_runs_and_compare_says_who_gains_and_who_loses(tmp_path, capsys):
    out = tmp_path / "ferries"
    sets = ["--set", "experiment.replicates=3", "--set", "experiment.rounds=12"]
    assert main(["run", str(EXAMPLE), "--out", str(out), "--quiet", *sets]) == 0
    printed = capsys.readouterr().out
    assert "not investment or policy advice" in printed  # run prints the caution
    assert (out / "totals").is_dir()
    assert main(["compare", str(out)]) == 0
    text = capsys.readouterr().out
    assert "Who gains and who loses" in text and "left=left" in text
    assert "of resamples" in text and "not investment or policy advice" in text
    # vwap has no better direction: no "better" and no win share on its rows
    vwap_rows = [line for line in text.splitlines() if line.startswith("vwap ")]
    assert vwap_rows and all(line.split()[-2:] == ["-", "-"] for line in vwap_rows)


def test_arm_interventions_follow_the_top_level_ones_and_enter_the_fingerprint(tmp_path):
    spec = load_spec(EXAMPLE)
    tax = spec.config(0, "tax")
    assert [i["name"] for i in tax["interventions"]] == ["unit_tax"]
    assert "interventions" not in spec.config(0, "baseline")
    ids = {p.arm: p.run_id for p in spec.runs() if p.replicate == 0}
    assert len(set(ids.values())) == len(ids)  # every scenario is its own run


@pytest.mark.parametrize(
    ("p", "term"),
    [
        (0.995, "virtually certain"),
        (0.95, "very likely"),
        (0.70, "likely"),
        (0.50, "about as likely as not"),
        (0.20, "unlikely"),
        (0.05, "very unlikely"),
        (0.001, "exceptionally unlikely"),
    ],
)
def test_likelihood_terms_follow_the_calibrated_scale(p, term):
    # Mastrandrea et al. (2010), IPCC guidance note on the consistent treatment of uncertainties.
    assert likelihood_term(p) == term
