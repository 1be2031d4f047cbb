"""What the first users tripped over (issue 15): input files, growing experiments, scoped arms.

Every test here failed before the change it covers.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import pytest
from _checksums import tree_checksums as folder_checksums

from propensim.experiments.runner import run_experiment
from propensim.experiments.spec import SpecError, load_spec
from propensim.experiments.store import StoreError, load

EDGES = "0 3\n1 4\n2 5\n0 4\n"

NETWORK_SPEC = """
[experiment]
name = "files"
seed = 5
rounds = 3

[population]
n_buyers = 3
n_sellers = 3

[network]
name = "edge_list"
path = "data/edges.txt"

[collect]
metrics = ["volume"]
"""


def _write_network_spec(folder: Path) -> Path:
    (folder / "data").mkdir(parents=True)
    (folder / "data" / "edges.txt").write_text(EDGES)
    spec = folder / "spec.toml"
    spec.write_text(NETWORK_SPEC)
    return spec


# -- input files -------------------------------------------------------------------------------
def test_spec_file_paths_resolve_against_the_spec_folder(tmp_path, monkeypatch):
    spec_path = _write_network_spec(tmp_path / "study")
    monkeypatch.chdir(tmp_path)  # not the spec's folder: data/edges.txt is not here
    spec = load_spec(spec_path)
    path = spec.config()["network"]["path"]
    assert Path(path) == (tmp_path / "study" / "data" / "edges.txt").resolve()
    store = run_experiment(spec, tmp_path / "out", workers=1, progress=False)
    assert store.counts()["ok"] == 1


def test_a_missing_input_file_is_a_located_spec_error(tmp_path):
    spec_path = _write_network_spec(tmp_path)
    (tmp_path / "data" / "edges.txt").unlink()
    with pytest.raises(SpecError) as info:
        load_spec(spec_path)
    msg = str(info.value)
    assert msg.startswith(f"{spec_path}:13: network.path: no such file")
    assert "spec file's folder" in msg


def test_input_file_content_enters_run_ids_and_a_changed_file_is_refused(tmp_path):
    spec_path = _write_network_spec(tmp_path)
    first = load_spec(spec_path).runs()[0].run_id
    run_experiment(spec_path, tmp_path / "out", workers=1, progress=False)
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    assert list(manifest["inputs"].values())[0]  # the sha256 is recorded
    (tmp_path / "data" / "edges.txt").write_text(EDGES + "1 3\n")
    assert load_spec(spec_path).runs()[0].run_id != first
    before = folder_checksums(tmp_path / "out")
    with pytest.raises(StoreError) as info:
        run_experiment(spec_path, tmp_path / "out", workers=1, progress=False)
    assert "edges.txt (content changed)" in str(info.value)
    assert folder_checksums(tmp_path / "out") == before  # nothing stored is lost


# -- growing an experiment ---------------------------------------------------------------------
GROW_SPEC = """
[experiment]
name = "grow"
seed = 11
rounds = 3
replicates = {replicates}

[population]
n_buyers = 4
n_sellers = 4

[design]
kind = "{kind}"
samples = {samples}

[design.parameters]
"population.sigma" = {{ low = 2.0, high = 8.0 }}

[[arms]]
name = "match"

[[arms]]
name = "auction"
set = {{ "clearing.name" = "call_auction" }}

[collect]
metrics = ["volume", "mean_price"]
"""


def _grow(tmp_path, name, **fields) -> Path:
    path = tmp_path / f"{name}.toml"
    path.write_text(GROW_SPEC.format(**{"replicates": 2, "kind": "random", "samples": 2, **fields}))
    return path


@pytest.mark.parametrize("kind", ["random", "sobol"])
def test_more_replicates_and_samples_reuse_completed_runs(tmp_path, kind):
    out = tmp_path / "grown"
    small = _grow(tmp_path, "small", kind=kind, samples=2, replicates=2)
    run_experiment(small, out, workers=1, progress=False)
    done = set(load(out).runs["run_id"])
    big = _grow(tmp_path, "big", kind=kind, samples=4, replicates=3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # Sobol' sizes: powers of 2 here anyway
        plans = load_spec(big).runs()
        assert done <= {p.run_id for p in plans}  # the first points and replicates stay
        store = run_experiment(big, out, workers=1, progress=False)
    timings = load(out).timings
    assert store.counts() == {"runs": 24, "distinct": 24, "ok": 24, "failed": 0, "pending": 0}
    # runs that were done were not run again: their timings are the old ones, 8 new + 16 old
    assert len(timings) == 24
    # and the folder equals one that ran the big spec at once, byte for byte
    fresh = tmp_path / "fresh"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        run_experiment(big, fresh, workers=1, progress=False)
    assert (out / "runs.parquet").read_bytes() == (fresh / "runs.parquet").read_bytes()


def test_growing_runs_only_the_new_runs(tmp_path, monkeypatch):
    from propensim.experiments import runner

    out = tmp_path / "grown"
    run_experiment(_grow(tmp_path, "a", replicates=1), out, workers=1, progress=False)
    ran = []
    real = runner._run
    monkeypatch.setattr(runner, "_run", lambda plan: ran.append(plan.run_id) or real(plan))
    run_experiment(_grow(tmp_path, "b", replicates=2), out, workers=1, progress=False)
    assert len(ran) == 4  # 2 points x 1 new replicate x 2 arms


def test_a_changed_spec_is_refused_naming_the_fields(tmp_path):
    out = tmp_path / "out"
    run_experiment(_grow(tmp_path, "a"), out, workers=1, progress=False)
    changed = _grow(tmp_path, "b").read_text().replace("seed = 11", "seed = 12")
    changed = changed.replace("n_buyers = 4", "n_buyers = 5")
    (tmp_path / "b.toml").write_text(changed)
    before = folder_checksums(out)
    with pytest.raises(StoreError) as info:
        run_experiment(tmp_path / "b.toml", out, workers=1, progress=False)
    msg = str(info.value)
    assert "experiment.seed: 11 -> 12" in msg
    assert "population.n_buyers: 4 -> 5" in msg
    assert "\n" not in msg
    assert folder_checksums(out) == before


@pytest.mark.parametrize(
    ("fields", "expect"),
    [
        ({"replicates": 1}, "experiment.replicates: 2 -> 1 (fewer than stored)"),
        ({"kind": "lhs", "samples": 4}, "design.kind"),
    ],
)
def test_shrinking_or_resizing_an_unextendable_design_is_refused(tmp_path, fields, expect):
    out = tmp_path / "out"
    run_experiment(_grow(tmp_path, "a"), out, workers=1, progress=False)
    with pytest.raises(StoreError, match=expect.replace("(", r"\(").replace(")", r"\)")):
        run_experiment(_grow(tmp_path, "b", **fields), out, workers=1, progress=False)


# -- arm-scoped design parameters ----------------------------------------------------------------
SCOPED_SPEC = """
[experiment]
name = "meetings-vs-auction"
seed = 3
rounds = 4
replicates = 2

[population]
n_buyers = 6
n_sellers = 6

[design]
kind = "sobol"
samples = 4

[design.parameters]
"population.sigma" = { low = 2.0, high = 8.0 }
"clearing.meetings" = { low = 1, high = 4, integer = true }

[[arms]]
name = "matching"
parameters = ["clearing.meetings"]

[[arms]]
name = "auction"
set = { "clearing.name" = "call_auction" }

[collect]
metrics = ["volume", "efficiency"]
"""


def test_a_parameter_only_one_arm_has_is_one_valid_spec(tmp_path):
    path = tmp_path / "scoped.toml"
    path.write_text(SCOPED_SPEC)
    spec = load_spec(path)
    meetings = {p["clearing.meetings"] for p in spec.points}
    assert len(meetings) > 1
    for p, point in enumerate(spec.points):
        matching, auction = spec.config(p, "matching"), spec.config(p, "auction")
        assert matching["clearing"]["meetings"] == point["clearing.meetings"]
        assert "meetings" not in auction["clearing"]
        # what the arms share applies to both: the pair differs only in the rule
        assert matching["population"] == auction["population"]
        assert matching["population"]["sigma"] == point["population.sigma"]
    store = run_experiment(spec, tmp_path / "out", workers=1, progress=False)
    table = store.comparison
    assert set(table["n_pairs"]) == {8}  # 4 points x 2 replicates, paired on seed and sigma


def test_without_the_arm_list_the_error_says_how_to_scope(tmp_path):
    path = tmp_path / "unscoped.toml"
    path.write_text(SCOPED_SPEC.replace('parameters = ["clearing.meetings"]\n', ""))
    with pytest.raises(SpecError, match=r'list it in their parameters = \["clearing.meetings"\]'):
        load_spec(path)


def test_an_arm_listing_a_name_that_is_not_a_design_parameter_is_refused(tmp_path):
    path = tmp_path / "typo.toml"
    path.write_text(SCOPED_SPEC.replace('["clearing.meetings"]', '["clearing.meeting"]'))
    with pytest.raises(SpecError) as info:
        load_spec(path)
    msg = str(info.value)
    assert msg.startswith(f"{path}:22: arms[0].parameters[0]: 'clearing.meeting' is not a design")
    assert "allowed: population.sigma, clearing.meetings" in msg


# -- the trading-network warning -----------------------------------------------------------------
def test_network_warning_is_one_line_with_the_traders_who_cannot_trade(tmp_path):
    from propensim.markets import build_market

    edges = tmp_path / "edges.txt"
    edges.write_text("0 3\n")  # traders 1, 2, 4, 5 are alone: four one-sided parts
    cfg = {
        "population": {"n_buyers": 3, "n_sellers": 3},
        "network": {"name": "edge_list", "path": str(edges)},
    }
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        build_market(cfg, seed=1, mesa=False)
    texts = [str(w.message) for w in caught if "trading partner" in str(w.message)]
    assert len(texts) == 1 and "\n" not in texts[0]
    assert texts[0].startswith("4 of 6 traders have no possible trading partner (in 4 part(s)")


def test_warnings_that_differ_only_in_numbers_merge_into_one_line():
    from propensim.experiments.runner import merge_warnings

    counts = {
        "3 of 40 traders have no possible trading partner (in 1 part(s) of it)": 2,
        "12 of 40 traders have no possible trading partner (in 3 part(s) of it)": 5,
        "another warning": 1,
    }
    assert merge_warnings(counts) == {
        "3-12 of 40 traders have no possible trading partner (in 1-3 part(s) of it)": 7,
        "another warning": 1,
    }


# -- numbers that tell the truth -----------------------------------------------------------------
def test_float_noise_is_zero_and_a_column_keeps_one_fixed_format():
    from propensim.experiments.compare import format_frame, format_numbers

    assert format_numbers([9.6e-15]) == ["0"]
    column = format_numbers([123456.0, 9.6e-15, 0.5])
    assert column == ["123456", "0", "0"]  # one format for the column; never 1.235e+05
    assert format_numbers([0.1234, -0.0001, 1e-16], sign=True) == ["+0.1234", "-0.0001", "0.0000"]
    import pandas as pd

    text = format_frame(pd.DataFrame({"price_sd": [0.25, 9.6e-15], "volume": [12.0, 3.0]}))
    assert "e-" not in text and "e+" not in text
    assert text.splitlines()[2].split() == ["0.0000", "3"]


def test_compare_table_shows_noise_as_zero_with_units_and_aggregation():
    import pandas as pd

    from propensim.experiments.compare import compare_arms, format_table, statements

    runs = pd.DataFrame(
        {
            "arm": ["a", "b"] * 3,
            "point": 0,
            "replicate": [0, 0, 1, 1, 2, 2],
            "index": range(6),
            "price_sd": [0.0, 9.6e-15, 0.0, 9.6e-15, 0.0, 9.6e-15],
            "volume": [10.0, 12.0, 11.0, 12.5, 9.0, 11.0],
        }
    )
    table = compare_arms(
        runs,
        ["price_sd", "volume"],
        "a",
        bootstrap=200,
        directions={"price_sd": "lower", "volume": "higher"},
    )
    text = format_table(table)
    assert "e-15" not in text and "e-1" not in text
    sd_row = next(line for line in text.splitlines() if line.startswith("price_sd "))
    assert sd_row.split()[4:7] == ["0", "0", "0"]
    assert (
        "volume: units traded in the round; unit: units of goods; a run: sum over its rounds"
        in text
    )
    assert "price_sd: standard deviation" in text and "a run: mean over its rounds" in text
    assert not any("e-15" in s for s in statements(table))


def test_plugins_listing_states_units_and_aggregation(capsys):
    from propensim.experiments.cli import main

    assert main(["plugins"]) == 0
    out = capsys.readouterr().out
    volume = next(line for line in out.splitlines() if line.strip().startswith("volume "))
    price_sd = next(line for line in out.splitlines() if line.strip().startswith("price_sd "))
    assert "unit: units of goods" in volume and "a run: sum over its rounds" in volume
    assert "unit: price units" in price_sd and "a run: mean over its rounds" in price_sd


def test_manifest_describes_metric_columns(tmp_path):
    path = _grow(tmp_path, "a")
    run_experiment(path, tmp_path / "out", workers=1, progress=False)
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    assert manifest["metric_descriptions"]["volume"].endswith("a run: sum over its rounds")


# -- query and compare leave the folder alone, and say what exists ---------------------------------
def test_query_on_a_table_not_collected_lists_the_tables(tmp_path, capsys):
    pytest.importorskip("duckdb")
    from propensim.experiments.cli import main

    out = tmp_path / "out"
    run_experiment(_grow(tmp_path, "a"), out, workers=1, progress=False)
    capsys.readouterr()
    assert main(["query", str(out), "SELECT * FROM ledger"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert "no table 'ledger' (not collected: set collect.ledger = true in the spec)" in err
    assert "tables in this folder: runs, timings, rounds" in err


def test_compare_with_a_metric_writes_nothing_into_the_folder(tmp_path, capsys):
    from propensim.experiments.cli import main

    out = tmp_path / "out"
    run_experiment(_grow(tmp_path, "a"), out, workers=1, progress=False)
    before = folder_checksums(out)
    assert main(["compare", str(out), "--metric", "volume"]) == 0
    assert folder_checksums(out) == before  # comparison.csv from `run` is not overwritten
    target = tmp_path / "elsewhere.csv"
    assert main(["compare", str(out), "--metric", "volume", "--csv", str(target)]) == 0
    assert folder_checksums(out) == before and target.exists()


def test_a_failed_atomic_write_leaves_no_temporary_file(tmp_path):
    from propensim.experiments.store import atomic_write_bytes

    (tmp_path / "target").mkdir()
    with pytest.raises(IsADirectoryError):
        atomic_write_bytes(tmp_path / "target", b"data")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["target"]
