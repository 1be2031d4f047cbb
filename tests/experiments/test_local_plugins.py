"""Spec ``plugins = [...]``: local plugin modules in the main process and in every worker.

Also: plugins registered in the session reach pool workers when their class lives in an
importable module, and stop the sweep with one line when it lives in ``__main__``.
"""

from __future__ import annotations

import json
import shutil
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from propensim.experiments import local_plugins
from propensim.experiments.cli import main
from propensim.experiments.runner import run_experiment
from propensim.experiments.spec import SpecError, load_spec
from propensim.plugins import registry

METRIC = """
from propensim.plugins import register


@register("metrics", "top_price")
class TopPrice:
    description = "Highest price paid this round (NaN with no trade)."
    aggregate = "mean"

    def measure(self, state, outcome):
        p = outcome.trades.price
        return float(p.max()) + OFFSET if p.size else float("nan")


OFFSET = 0.0
"""

SPEC = """
plugins = [{entries}]

[experiment]
name = "local"
seed = 3
rounds = 4
replicates = 4

[population]
n_buyers = 8
n_sellers = 8

[collect]
metrics = ["volume", "top_price"]
"""


@pytest.fixture(autouse=True)
def clean_registry():
    """Forget every plugin module and runtime registration a test made."""
    before = {(k, n) for k, n, _ in registry.runtime_plugins()}
    by_sha, by_entry = dict(local_plugins._BY_SHA), dict(local_plugins._BY_ENTRY)
    yield
    for kind, name, _ in registry.runtime_plugins():
        if (kind, name) not in before:
            registry.unregister(kind, name)
    local_plugins._BY_SHA.clear()
    local_plugins._BY_SHA.update(by_sha)
    local_plugins._BY_ENTRY.clear()
    local_plugins._BY_ENTRY.update(by_entry)


def _project(tmp_path: Path, source: str = METRIC, entries: str = '"rules/top.py"') -> Path:
    (tmp_path / "rules").mkdir(exist_ok=True)
    (tmp_path / "rules" / "top.py").write_text(source)
    spec = tmp_path / "spec.toml"
    spec.write_text(SPEC.format(entries=entries))
    return spec


def test_a_spec_loads_its_plugin_file_relative_to_itself(tmp_path, monkeypatch):
    spec_file = _project(tmp_path)
    monkeypatch.chdir("/")  # the path is relative to the spec, not to the working directory
    spec = load_spec(spec_file)
    assert registry.get_plugin("metrics", "top_price").__name__ == "TopPrice"
    [rec] = spec.plugin_sources
    assert rec.registered == (("metrics", "top_price"),)
    assert spec.resolved()["plugins"] == [str((tmp_path / "rules" / "top.py").resolve())]
    # every run's configuration carries the file name and content hash, which enter the run id
    cfg = spec.runs()[0].config
    assert cfg["plugins"] == [{"module": "top.py", "sha256": rec.sha256}]


def test_a_changed_plugin_file_changes_run_ids_and_fingerprint(tmp_path):
    spec_file = _project(tmp_path)
    first = load_spec(spec_file)
    (tmp_path / "rules" / "top.py").write_text(METRIC.replace("OFFSET = 0.0", "OFFSET = 1.0"))
    second = load_spec(spec_file)
    assert first.fingerprint() != second.fingerprint()
    assert {p.run_id for p in first.runs()}.isdisjoint(p.run_id for p in second.runs())
    # the new version replaced the old one in the registry, without a duplicate warning
    cls = registry.get_plugin("metrics", "top_price")
    assert cls.__module__ == second.plugin_sources[0].module


def test_the_fingerprint_does_not_depend_on_where_the_project_is(tmp_path):
    (tmp_path / "a").mkdir()
    a = _project(tmp_path / "a")
    b_dir = tmp_path / "b"
    shutil.copytree(tmp_path / "a", b_dir)
    spec_a, spec_b = load_spec(a), load_spec(b_dir / "spec.toml")
    assert spec_a.fingerprint() == spec_b.fingerprint()
    assert [p.run_id for p in spec_a.runs()] == [p.run_id for p in spec_b.runs()]


def test_the_resolved_spec_loads_back(tmp_path):
    spec = load_spec(_project(tmp_path))
    stored = tmp_path / "elsewhere" / "spec.toml"
    stored.parent.mkdir()
    stored.write_text(spec.to_toml())  # as a results folder keeps it
    again = load_spec(stored)
    assert again.fingerprint() == spec.fingerprint()


def test_a_dotted_module_entry_is_imported_by_name(tmp_path, monkeypatch):
    pkg = tmp_path / "mypkg_local14"
    pkg.mkdir()
    (pkg / "__init__.py").write_text("")
    (pkg / "rules.py").write_text(METRIC.replace("top_price", "top_price_mod"))
    monkeypatch.syspath_prepend(str(tmp_path))
    spec_file = tmp_path / "spec.toml"
    spec_file.write_text(
        SPEC.format(entries='"mypkg_local14.rules"').replace('"top_price"]', '"top_price_mod"]')
    )
    spec = load_spec(spec_file)
    assert spec.plugin_sources[0].registered == (("metrics", "top_price_mod"),)
    assert spec.runs()[0].config["plugins"][0]["module"] == "mypkg_local14.rules"


@pytest.mark.parametrize(
    ("entries", "source", "expected"),
    [
        ('"rules/missing.py"', METRIC, "plugins[0]: no such plugin file 'rules/missing.py'"),
        ('"rules/top.py", "rules/top.py"', METRIC, "plugins[1]: 'rules/top.py' is listed twice"),
        ('"rules/top.py"', "raise RuntimeError('boom')\n", "plugins[0]: importing "),
        ('"rules/top.py"', "import numpy\n", "registers no plugin"),
        ('"rules/top.py"', "def broken(:\n", "SyntaxError"),
        ('"no_such_module_xyz"', METRIC, "plugins[0]: no module named 'no_such_module_xyz'"),
        ("42", METRIC, "plugins"),
        ('"not a module!"', METRIC, "neither a file path ending in .py nor a module name"),
    ],
)
def test_bad_plugins_entries_are_one_line_errors_naming_the_field(
    tmp_path, entries, source, expected, capsys
):
    spec_file = _project(tmp_path, source, entries)
    with pytest.raises(SpecError) as info:
        load_spec(spec_file)
    message = str(info.value)
    assert expected in message
    assert message.startswith(str(spec_file))
    assert "\n" not in message
    assert main(["check", str(spec_file)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("propensim: error: ") and err.count("\n") == 1, err
    assert "Traceback" not in err


def test_a_plugins_line_that_is_not_a_list(tmp_path):
    spec_file = _project(tmp_path)
    spec_file.write_text(
        spec_file.read_text().replace('plugins = ["rules/top.py"]', 'plugins = "x.py"')
    )
    with pytest.raises(SpecError, match=r"spec.toml:2: plugins: must be a list"):
        load_spec(spec_file)


def test_a_file_that_takes_a_built_in_name_names_the_clash(tmp_path):
    source = METRIC.replace('"top_price"', '"volume"')
    spec_file = _project(tmp_path, source)
    with pytest.warns(RuntimeWarning, match="duplicate metrics plugin 'volume'"):
        with pytest.raises(SpecError, match="registers no new plugin"):
            load_spec(spec_file)


def test_a_spec_with_a_plugin_file_runs_on_two_pool_workers(tmp_path):
    spec_file = _project(tmp_path)
    run_experiment(spec_file, tmp_path / "one", workers=1, progress=False)
    two = run_experiment(spec_file, tmp_path / "two", workers=2, progress=False)
    assert two.manifest["backend"]["kind"] == "local"
    a = pd.read_parquet(tmp_path / "one" / "runs.parquet").sort_values("run_id")
    b = pd.read_parquet(tmp_path / "two" / "runs.parquet").sort_values("run_id")
    assert (a["status"] == "ok").all() and (b["status"] == "ok").all()
    assert np.isfinite(a["top_price"]).all()
    cols = ["run_id", "volume", "top_price"]
    pd.testing.assert_frame_equal(a[cols].reset_index(drop=True), b[cols].reset_index(drop=True))
    manifest = json.loads((tmp_path / "two" / "manifest.json").read_text())
    [entry] = manifest["plugins"]
    assert entry["module"] == "top.py" and entry["registers"] == ["metrics:top_price"]
    assert manifest["spec"]["plugins"][0].endswith("top.py")


def test_install_in_a_worker_imports_each_file_once_and_replaces_an_old_version():
    # what a worker does with the payload of two tasks, the second after the file changed
    v1 = METRIC.replace("top_price", "worker_top")
    v2 = v1.replace("OFFSET = 0.0", "OFFSET = 5.0")
    files1 = [("propensim_local_w_1", "/nowhere/w.py", "sha-one", v1)]
    files2 = [("propensim_local_w_2", "/nowhere/w.py", "sha-two", v2)]
    local_plugins.install({"files": files1})
    cls1 = registry.get_plugin("metrics", "worker_top")
    local_plugins.install({"files": files1})  # again: nothing happens
    assert registry.get_plugin("metrics", "worker_top") is cls1
    local_plugins.install({"files": files2})
    cls2 = registry.get_plugin("metrics", "worker_top")
    assert cls2 is not cls1 and cls2.__module__ == "propensim_local_w_2"


# -- plugins registered in the session -------------------------------------------------------
class SessionMetric:
    description = "Units traded this round, registered at run time in a test module."
    aggregate = "sum"  # as the built-in volume

    def measure(self, state, outcome):
        return float(outcome.trades.volume)


def _session_spec(tmp_path: Path, metric: str) -> dict:
    return {
        "experiment": {"name": "session", "seed": 2, "rounds": 3, "replicates": 4},
        "population": {"n_buyers": 6, "n_sellers": 6},
        "collect": {"metrics": ["volume", metric]},
    }


def test_a_session_plugin_from_an_importable_module_reaches_pool_workers(tmp_path):
    registry.register("metrics", "session_units")(SessionMetric)
    store = run_experiment(
        _session_spec(tmp_path, "session_units"), tmp_path / "out", workers=2, progress=False
    )
    runs = pd.read_parquet(tmp_path / "out" / "runs.parquet")
    assert store.manifest["backend"]["kind"] == "local"
    assert (runs["status"] == "ok").all(), runs["error_message"].tolist()
    assert np.allclose(runs["session_units"], runs["volume"])


def test_a_session_plugin_defined_in_main_stops_before_any_run(tmp_path, capsys):
    cls = type("MainMetric", (SessionMetric,), {"__module__": "__main__"})
    registry.register("metrics", "main_units")(cls)
    spec = _session_spec(tmp_path, "main_units")
    with pytest.raises(local_plugins.LocalPluginError) as info:
        run_experiment(spec, tmp_path / "out", workers=2, progress=False)
    message = str(info.value)
    assert "metrics plugin 'main_units' was registered in this session in __main__" in message
    assert 'plugins = ["my_plugins.py"]' in message and "workers=1" in message
    runs = tmp_path / "out" / "runs.parquet"
    assert not runs.exists() or pd.read_parquet(runs).empty  # no run started
    # in this process it is fine
    run_experiment(spec, tmp_path / "here", workers=1, progress=False)
    assert (pd.read_parquet(tmp_path / "here" / "runs.parquet")["status"] == "ok").all()


def test_the_cli_gives_the_session_error_as_one_line(tmp_path, capsys, monkeypatch):
    cls = type("MainMetric2", (SessionMetric,), {"__module__": "__main__"})
    registry.register("metrics", "main_units2")(cls)
    spec_file = tmp_path / "s.toml"
    spec_file.write_text(
        textwrap.dedent(
            """
            [experiment]
            name = "s"
            seed = 1
            rounds = 2
            replicates = 4
            [population]
            n_buyers = 4
            n_sellers = 4
            [collect]
            metrics = ["main_units2"]
            """
        )
    )
    assert main(["run", str(spec_file), "--workers", "2", "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1].startswith("propensim: error: metrics plugin 'main_units2'"), err


@pytest.mark.slow
def test_a_local_plugin_file_gives_identical_runs_on_the_pool_and_on_dask(tmp_path):
    pytest.importorskip("distributed")
    spec_file = _project(tmp_path)
    run_experiment(spec_file, tmp_path / "pool", workers=2, progress=False)
    store = run_experiment(spec_file, tmp_path / "dask", dask_local=2, progress=False)
    assert store.manifest["backend"]["kind"] == "dask-local"
    a = pd.read_parquet(tmp_path / "pool" / "runs.parquet")
    b = pd.read_parquet(tmp_path / "dask" / "runs.parquet")
    assert (b["status"] == "ok").all(), b["error_message"].tolist()
    cols = [c for c in a.columns if c not in ("duration", "worker", "finished")]
    pd.testing.assert_frame_equal(
        a[cols].sort_values("run_id").reset_index(drop=True),
        b[cols].sort_values("run_id").reset_index(drop=True),
    )
