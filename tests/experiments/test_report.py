"""The HTML report: self-contained, the same bytes on a rerun, honest about what is missing."""

import json
import re
import subprocess
import sys

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

pytest.importorskip("matplotlib")

from _report_helpers import SPEC, tiny_store  # noqa: E402

from propensim.experiments import load_spec, run_experiment  # noqa: E402
from propensim.experiments.cli import main  # noqa: E402
from propensim.experiments.report import ReportError, write_report  # noqa: E402
from propensim.experiments.store import StoreError  # noqa: E402
from propensim.experiments.tables import point_table  # noqa: E402
from propensim.plugins import registry  # noqa: E402


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    return tiny_store(tmp_path_factory.mktemp("report") / "tiny")


@pytest.fixture(scope="module")
def report(store, tmp_path_factory):
    out = tmp_path_factory.mktemp("out") / "report.html"
    result = write_report(store, out)
    return result, out.read_text()


def test_report_is_self_contained(report):
    result, text = report
    assert "<script" not in text.lower()
    # nothing to fetch: no http(s) URL in any src, href, CSS url() or @import
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", text, re.I)
    assert not re.search(r"url\(|@import", text, re.I)
    assert "Content-Security-Policy" in text and "default-src 'none'" in text
    images = re.findall(r'<img [^>]*src="([^"]+)"', text)
    assert len(images) == len(result.figures) >= 5
    assert all(src.startswith("data:image/svg+xml;base64,") for src in images)


def test_report_holds_what_was_run_tables_cautions_and_stress(report, store):
    result, text = report
    manifest = json.loads((store / "manifest.json").read_text())
    assert manifest["fingerprint"] in text
    assert "SeedSequence(root, spawn_key=(point, replicate))" in text
    assert f"numpy={manifest['versions']['numpy']}" in text
    assert "not investment or policy advice" in text
    assert "STRESS checklist" in text and "Monks et al." in text
    for heading in (
        "1 Objectives",
        "2 Logic",
        "3 Data",
        "4 Experimentation",
        "5 Implementation",
        "6 Code access",
    ):
        assert heading in text
    assert set(result.figures) >= {"pair", "paths", "sweep", "forest", "gains", "network"}
    assert "matches the stored one exactly" in text  # the re-run reproduced the stored run
    assert "Nothing: every planned run finished" in text
    # plain-language comparison sentences, one per compared metric
    assert text.count("paired runs (95% interval of the difference") == 5


def test_report_tables_are_written_as_csv(report, store):
    result, _ = report
    points_csv = result.path.parent / "points.csv"
    assert points_csv in result.tables
    written = pd.read_csv(points_csv)
    from propensim.experiments import load

    runs = load(store).runs
    expected = point_table(runs, SPEC["collect"]["metrics"], ["population.sigma"], bootstrap=500)
    np.testing.assert_allclose(written["mean"], expected["mean"])
    diffs = pd.read_csv(result.path.parent / "point-differences.csv")
    assert set(diffs["arm"]) == {"matching"} and set(diffs["baseline"]) == {"auction"}


def test_report_is_the_same_bytes_when_rerun(report, store, tmp_path):
    first = report[0].path.read_bytes()
    again = write_report(store, tmp_path / "report.html")
    assert again.path.read_bytes() == first


class FailsAtWideCurves:
    description = "test metric: fails at the second design point"
    aggregate = "last"

    def measure(self, state, outcome):
        if float(state.population.sigma[0]) > 5:
            raise RuntimeError("wide curves refused")
        return 1.0


def test_partial_store_gets_a_report_saying_what_is_missing(tmp_path):
    registry.register("metrics", "fails_wide")(FailsAtWideCurves)
    try:
        spec = json.loads(json.dumps(SPEC))
        spec["collect"]["metrics"] = ["volume", "fails_wide"]
        spec["compare"]["metrics"] = ["volume"]
        folder = tmp_path / "partial"
        run_experiment(load_spec(spec), folder, workers=1, progress=False)
        # and an interrupted sweep: drop the last stored run, mark the manifest stopped
        table = pq.read_table(folder / "runs.parquet")
        pq.write_table(table.slice(0, table.num_rows - 1), folder / "runs.parquet")
        manifest = json.loads((folder / "manifest.json").read_text())
        manifest["status"] = "stopped"
        (folder / "manifest.json").write_text(json.dumps(manifest))
        result = write_report(folder)
    finally:
        registry.unregister("metrics", "fails_wide")
    text = result.path.read_text()
    # 6 runs failed at the wide point; the dropped run was one of them
    assert any("5 of 12 runs failed" in m for m in result.missing)
    assert any("1 of 12 planned runs are not stored" in m for m in result.missing)
    assert any("'stopped'" in m for m in result.missing)
    assert "wide curves refused" in text  # the failures table
    assert {"pair", "paths", "forest"} <= set(result.figures)  # drawn from what is there


def test_bad_folders_are_refused(tmp_path, store):
    with pytest.raises(StoreError, match="no manifest.json"):
        write_report(tmp_path)
    empty = tmp_path / "empty"
    empty.mkdir()
    (empty / "manifest.json").write_text((store / "manifest.json").read_text())
    with pytest.raises(ReportError, match="no runs table"):
        write_report(empty)
    failed = tmp_path / "failed"
    failed.mkdir()
    (failed / "manifest.json").write_text((store / "manifest.json").read_text())
    runs = pq.read_table(store / "runs.parquet").to_pandas()
    runs["status"] = "failed"
    runs["error_message"] = "boom"
    pq.write_table(pa.Table.from_pandas(runs, preserve_index=False), failed / "runs.parquet")
    with pytest.raises(ReportError, match="every stored run failed .first error: boom"):
        write_report(failed)


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["report", "{tmp}"], "not a propensim results folder"),
        (["report", "{tmp}/nowhere"], "no such results folder"),
        (["sensitivity", "{demo}"], "needs ranges"),
        (["sensitivity", "{lhs}", "--metric", "nope"], "metric 'nope' is not collected"),
    ],
)
def test_cli_bad_input_is_one_line_exit_2(args, message, tmp_path, capsys):
    from pathlib import Path

    examples = Path(__file__).resolve().parents[2] / "experiments" / "examples"
    args = [
        a.format(tmp=tmp_path, demo=examples / "demo.toml", lhs=examples / "lhs_uncertainty.toml")
        for a in args
    ]
    code = main(args)
    out, err = capsys.readouterr()
    assert code == 2
    assert err.startswith("propensim: error: ") and err.count("\n") == 1
    assert message in err


def test_cli_report_prints_what_it_wrote(store, tmp_path, capsys):
    code = main(
        [
            "report",
            str(store),
            "--out",
            str(tmp_path / "r.html"),
            "--figures",
            str(tmp_path / "figs"),
        ]
    )
    out = capsys.readouterr().out
    assert code == 0
    assert f"report: {tmp_path / 'r.html'}" in out
    assert (tmp_path / "r-points.csv").exists()
    assert (tmp_path / "figs" / "forest.svg").exists() and (tmp_path / "figs" / "pair.png").exists()


def test_check_lists_the_design_points(tmp_path, capsys):
    from pathlib import Path

    demo = Path(__file__).resolve().parents[2] / "experiments" / "examples" / "demo.toml"
    assert main(["check", str(demo), "--points"]) == 0
    out = capsys.readouterr().out
    assert re.search(r"point\s+population.sigma\s+runs", out)
    assert re.search(r"2\s+12.0\s+16", out)


def test_check_says_what_the_sobol_design_is(tmp_path, capsys):
    from pathlib import Path

    lhs = Path(__file__).resolve().parents[2] / "experiments" / "examples" / "lhs_uncertainty.toml"
    spec = lhs.read_text().replace('kind = "lhs"', 'kind = "sobol"')
    path = tmp_path / "sobol.toml"
    path.write_text(spec)
    assert main(["check", str(path)]) == 0
    assert "not the sampling Sobol' sensitivity indices need" in capsys.readouterr().out


def test_sensitivity_folder_report_draws_the_indices(tmp_path):
    pytest.importorskip("SALib")
    from propensim.experiments.sensitivity import run_sensitivity

    spec = json.loads(json.dumps(SPEC))
    spec["design"] = {
        "kind": "random",
        "samples": 2,
        "parameters": {
            "population.sigma": {"low": 2.0, "high": 12.0},
            "clearing.meetings": {"low": 1, "high": 3, "integer": True},
        },
    }
    spec["experiment"]["replicates"] = 1
    del spec["arms"], spec["compare"]
    folder, table = run_sensitivity(
        load_spec(spec),
        tmp_path / "s",
        method="morris",
        samples=4,
        metrics=["volume"],
        workers=1,
        progress=False,
    )
    assert set(table["parameter"]) == {"population.sigma", "clearing.meetings"}
    result = write_report(folder)
    assert "sensitivity" in result.figures
    assert "Sensitivity indices" in result.path.read_text()


@pytest.mark.slow
def test_demo_ends_by_writing_its_report(tmp_path):
    res = subprocess.run(
        [
            sys.executable,
            "-m",
            "propensim.experiments.cli",
            "demo",
            "--out",
            str(tmp_path / "d"),
            "--workers",
            "2",
            "--quiet",
        ],
        capture_output=True,
        text=True,
        check=False,
    )
    assert res.returncode == 0, res.stderr
    report = tmp_path / "d" / "report.html"
    assert f"report: {report}" in res.stdout
    size = report.stat().st_size
    assert 50_000 < size < 1_000_000  # the limit for the demo


def test_calibration_folder_gets_a_report_with_the_fitted_densities(tmp_path):
    # the layout propensim calibrate writes: manifest.json and one Parquet file per table
    folder = tmp_path / "cal"
    folder.mkdir()
    manifest = {
        "format": "propensim-calibration",
        "format_version": 1,
        "kind": "returns",
        "source": "prices.csv",
        "n": 200,
        "best_aic": "normal",
    }
    (folder / "manifest.json").write_text(json.dumps(manifest))
    x = np.linspace(-4, 4, 81)
    density = pd.DataFrame(
        {
            "model": np.repeat(["normal", "wide"], x.size),
            "x": np.tile(x, 2),
            "density": np.r_[np.exp(-(x**2) / 2), 0.5 * np.exp(-(x**2) / 8)] / np.sqrt(2 * np.pi),
            "cdf": 0.0,
        }
    )
    density.to_parquet(folder / "density.parquet")
    pd.DataFrame({"model": ["normal", "wide"], "aic": [10.0, 30.0]}).to_parquet(
        folder / "fits.parquet"
    )
    rng = np.random.default_rng(0)
    pd.DataFrame({"t": range(200), "r": rng.normal(size=200)}).to_parquet(
        folder / "returns.parquet"
    )
    result = write_report(folder)
    text = result.path.read_text()
    assert result.figures == ["calibration"]
    assert "Fitted densities against the data" in text and "not investment" in text
    assert "<td>prices.csv</td>" in text
    assert text == write_report(folder).path.read_text()  # the same bytes again


@pytest.mark.parametrize(
    ("p", "term"),
    [
        (0.995, "virtually certain"),
        (0.95, "very likely"),
        (0.70, "likely"),
        (0.50, "about as likely as not"),
        (0.20, "unlikely"),
        (0.05, "very unlikely"),
        (0.005, "exceptionally unlikely"),
        (0.0, "exceptionally unlikely"),
    ],
)
def test_likelihood_terms_follow_the_calibrated_scale(p, term):
    # Mastrandrea et al. (2010): >99%, >90%, >66%, 33-66%, <33%, <10%, <1%
    from propensim.experiments.report import likelihood_term

    assert likelihood_term(p) == term


def test_comparisons_say_how_likely_a_difference_is(report):
    _, text = report
    sentences = re.findall(r"In the model it is ([a-z ]+) \((\d+)% of bootstrap", text)
    assert len(sentences) == 5
    from propensim.experiments.report import likelihood_term

    for term, pct in sentences:
        assert term == likelihood_term(int(pct) / 100) or int(pct) in (1, 10, 33, 66, 90, 99)
