"""The propensim command line: exit codes, one-line errors, fast start, every command."""

import json
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
from _runner_helpers import write_spec

from propensim.experiments.cli import CAUTION, main
from propensim.plugins.registry import get_plugin, register, unregister

MALFORMED = sorted((Path(__file__).parent / "malformed").glob("*.toml"))
DEMO = Path(__file__).resolve().parents[2] / "experiments" / "examples" / "demo.toml"


def _expect(path: Path) -> str:
    first = path.read_text().splitlines()[0]
    assert first.startswith("# expect:"), path
    return first.split(":", 1)[1].strip()


@pytest.mark.parametrize("path", MALFORMED, ids=[p.stem for p in MALFORMED])
def test_malformed_spec_is_one_line_exit_2(path, capsys):
    code = main(["check", str(path)])
    out, err = capsys.readouterr()
    assert code == 2
    assert err.endswith("\n") and err.count("\n") == 1, err
    assert err.startswith("propensim: error: ")
    assert _expect(path) in err
    assert "Traceback" not in err and out == ""


def test_malformed_corpus_is_there():
    assert len(MALFORMED) >= 45


def test_help_and_version_in_a_subprocess():
    res = subprocess.run(
        [
            sys.executable,
            "-c",
            "import sys; from propensim.experiments.cli import main; sys.exit(main(sys.argv[1:]))",
            "--help",
        ],
        capture_output=True,
        text=True,
        check=False,
    )
    assert res.returncode == 0
    for command in ("run", "check", "compare", "query", "plugins", "demo"):
        assert command in res.stdout
    from importlib.metadata import version

    res = subprocess.run(
        [sys.executable, "-m", "propensim.experiments.cli", "--version"],
        capture_output=True,
        text=True,
        check=False,
    )
    assert res.returncode == 0 and res.stdout.strip() == f"propensim {version('propensim')}"


def test_check_imports_neither_mesa_nor_dask_nor_numba():
    code = (
        "import json, sys\n"
        "from propensim.experiments.cli import main\n"
        f"rc = main(['check', {str(DEMO)!r}])\n"
        "print(json.dumps([rc, sorted(m for m in ('mesa', 'dask', 'distributed', 'numba') "
        "if m in sys.modules)]))\n"
    )
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    lines = res.stdout.strip().splitlines()
    assert "spec is valid; 48 runs" in lines[0]
    assert lines[1].startswith("estimated time: about")
    assert json.loads(lines[-1]) == [0, []]


@pytest.mark.parametrize(
    "argv, text",
    [
        (["run"], "the following arguments are required: spec"),
        (["frobnicate"], "invalid choice"),
        (["run", "x.toml", "--workers", "0"], "expected a whole number >= 1"),
        (["run", "x.toml", "--scheduler", "a", "--dask-local", "2"], "not allowed with"),
        (["check", "no/such/file.toml"], "no/such/file.toml"),
        (["compare", "no/such/folder"], "no such results folder"),
    ],
)
def test_bad_arguments_exit_2_with_one_line(argv, text, capsys):
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.startswith("propensim: error: ") and err.count("\n") == 1
    assert text in err


@pytest.fixture(scope="module")
def ran(tmp_path_factory):
    """``propensim run`` of a two-arm spec, in this process (workers 1)."""
    tmp = tmp_path_factory.mktemp("cli")
    spec = write_spec(tmp)
    out = tmp / "res"
    return spec, out


def test_run_then_resume_then_refuse_a_changed_spec(ran, capsys):
    spec, out = ran
    assert main(["run", str(spec), "--out", str(out), "--workers", "1", "--quiet"]) == 0
    stdout = capsys.readouterr().out
    assert "efficiency" in stdout and "match" in stdout and "auction" in stdout
    assert "8 runs: 8 ok, 0 failed" in stdout and f"results: {out}" in stdout
    table = pd.read_csv(out / "comparison.csv")
    assert list(table["metric"]) == ["efficiency", "volume"]
    assert set(table["n_pairs"]) == {4}
    runs_bytes = (out / "runs.parquet").read_bytes()
    # The same spec again: everything is stored already, nothing changes.
    assert main(["run", str(spec), "--out", str(out), "--workers", "1", "--quiet"]) == 0
    capsys.readouterr()
    assert (out / "runs.parquet").read_bytes() == runs_bytes
    # A changed spec into the same folder is refused.
    code = main(["run", str(spec), "--out", str(out), "--set", "experiment.rounds=5"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "different spec" in err and "--out" in err
    assert (out / "runs.parquet").read_bytes() == runs_bytes


def test_compare_and_query_commands(ran, capsys, tmp_path):
    spec, out = ran
    if not (out / "runs.parquet").exists():
        main(["run", str(spec), "--out", str(out), "--workers", "1", "--quiet"])
    capsys.readouterr()
    csv = tmp_path / "cmp.csv"
    code = main(
        [
            "compare",
            str(out),
            "--metric",
            "mean_price",
            "--baseline",
            "match",
            "--by-point",
            "--csv",
            str(csv),
        ]
    )
    stdout = capsys.readouterr().out
    assert code == 0 and "mean_price" in stdout and f"written: {csv}" in stdout
    table = pd.read_csv(csv)
    assert list(table["arm"]) == ["auction"] * 3 and list(table["n_pairs"]) == [4, 2, 2]
    assert main(["compare", str(out), "--baseline", "nobody"]) == 2
    assert "baseline must be one of the arms" in capsys.readouterr().err
    assert (
        main(["query", str(out), "SELECT arm, count(*) AS n FROM runs GROUP BY arm ORDER BY arm"])
        == 0
    )
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].split() == ["arm", "n"] and lines[1].split() == ["auction", "4"]
    assert main(["query", str(out), "SELECT * FROM nowhere"]) == 2
    assert "query failed" in capsys.readouterr().err


def test_corrupt_runs_parquet_exit_2_and_untouched(tmp_path, capsys):
    spec = write_spec(tmp_path, replicates=1)
    out = tmp_path / "res"
    assert main(["run", str(spec), "--out", str(out), "--workers", "1", "--quiet"]) == 0
    (out / "runs.parquet").write_bytes(b"garbage")
    capsys.readouterr()
    assert main(["run", str(spec), "--out", str(out), "--workers", "1", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and str(out / "runs.parquet") in err
    assert (out / "runs.parquet").read_bytes() == b"garbage"
    assert main(["compare", str(out)]) == 2
    assert "runs.parquet" in capsys.readouterr().err


def test_failing_runs_exit_1(tmp_path, capsys):
    base = get_plugin("clearing", "call_auction")

    class Broken(base):
        description = "a clearing rule that always fails (test)"

        def clear(self, state, rng):
            raise ArithmeticError("broken on purpose")

    register("clearing", "broken_for_cli_test", replace=True)(Broken)
    try:
        spec = write_spec(tmp_path, replicates=1)
        text = spec.read_text().replace(
            '"clearing.name" = "call_auction"', '"clearing.name" = "broken_for_cli_test"'
        )
        spec.write_text(text)
        # 4 runs, 2 of them fail: recorded, the sweep goes on, exit 1.
        code = main(["run", str(spec), "--out", str(tmp_path / "a"), "--workers", "1", "--quiet"])
        captured = capsys.readouterr()
        assert code == 1 and "4 runs: 2 ok, 2 failed" in captured.out
        # fail-fast stops at the first failure with one line.
        code = main(
            [
                "run",
                str(spec),
                "--out",
                str(tmp_path / "b"),
                "--workers",
                "1",
                "--quiet",
                "--fail-fast",
            ]
        )
        err = capsys.readouterr().err
        assert code == 1 and err.count("\n") == 1 and "ArithmeticError" in err
        assert "fail-fast" in err
    finally:
        unregister("clearing", "broken_for_cli_test")


def test_plugins_and_pair(capsys):
    assert main(["plugins"]) == 0
    out = capsys.readouterr().out
    for kind in ("clearing:", "drift:", "networks:", "metrics:"):
        assert kind in out
    assert "call_auction" in out and "efficiency" in out
    assert main(["pair", "--buyer-mu", "90"]) == 0
    out = capsys.readouterr().out
    assert "buyer" in out and "seller" in out and "90.00" in out


@pytest.mark.slow
def test_demo_runs_and_prints_the_caution(tmp_path):
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
        ],
        capture_output=True,
        text=True,
        check=False,
    )
    assert res.returncode == 0, res.stderr
    assert "efficiency" in res.stdout and "call-auction" in res.stdout
    assert f"results: {tmp_path / 'd'}" in res.stdout and CAUTION in res.stdout
    runs = pd.read_parquet(tmp_path / "d" / "runs.parquet")
    assert len(runs) == 48 and (runs["status"] == "ok").all()
