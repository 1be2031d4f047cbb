"""README's Python example as a script with workers, and how a dead worker is reported (issue 15).

The script has no ``if __name__ == "__main__":`` guard on purpose: with "forkserver" or "spawn"
each worker used to import it again and start the sweep anew, which broke the pool.
"""

from __future__ import annotations

import subprocess
import sys
import textwrap

import pytest

SPEC = """
[experiment]
name = "script"
seed = 4
rounds = 3
replicates = 4

[population]
n_buyers = 5
n_sellers = 5
"""

SCRIPT = """
from propensim.experiments import run_experiment, load

store = run_experiment("my_sweep.toml", out="results/my_sweep", {backend})
results = load("results/my_sweep")  # pandas: results.runs, .rounds, .traders, .ledger
print(len(results.runs), "runs", store.counts()["ok"], "ok")
"""


def _run_script(tmp_path, backend: str):
    (tmp_path / "my_sweep.toml").write_text(SPEC)
    (tmp_path / "sweep.py").write_text(SCRIPT.format(backend=backend))
    return subprocess.run(
        [sys.executable, "sweep.py"], cwd=tmp_path, capture_output=True, text=True, timeout=300
    )


def test_readme_example_runs_as_an_unguarded_script_with_a_pool(tmp_path):
    res = _run_script(tmp_path, "workers=2")
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip() == "4 runs 4 ok"


@pytest.mark.slow
def test_readme_example_runs_as_an_unguarded_script_on_a_local_dask_cluster(tmp_path):
    res = _run_script(tmp_path, "dask_local=1")
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip() == "4 runs 4 ok"


KILLER = """
import os
import signal

from propensim.plugins import register
from propensim.plugins.registry import get_plugin

base = get_plugin("clearing", "call_auction")


@register("clearing", "dies_{how}")
class Dies(base):
    description = "a clearing rule whose worker process dies (test)"

    def clear(self, state, rng):
        if "{how}" == "signal":
            os.kill(os.getpid(), signal.SIGKILL)
        os._exit(3)
"""


@pytest.mark.parametrize(
    ("how", "expect"),
    [
        ("signal", "a worker process was killed by signal SIGKILL (the kernel's out-of-memory"),
        ("exit", "a worker process exited with code 3"),
    ],
)
def test_a_dead_worker_is_reported_by_its_real_cause(tmp_path, how, expect):
    (tmp_path / "killer.py").write_text(KILLER.replace("{how}", how))
    text = textwrap.dedent(
        f"""
        plugins = ["killer.py"]

        [experiment]
        name = "dies"
        seed = 1
        rounds = 2
        replicates = 2

        [population]
        n_buyers = 3
        n_sellers = 3

        [clearing]
        name = "dies_{how}"
        """
    )
    (tmp_path / "dies.toml").write_text(text)
    res = subprocess.run(
        [sys.executable, "-m", "propensim.experiments.cli", "run", "dies.toml", "--workers", "2"],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert res.returncode == 1
    last = res.stderr.strip().splitlines()[-1]
    assert last.startswith(f"propensim: error: {expect}"), res.stderr
    assert "out of memory?" not in res.stderr


def test_readme_first_command_installs_what_the_tour_uses():
    import re
    import tomllib
    from pathlib import Path

    root = Path(__file__).resolve().parents[2]
    readme = (root / "README.md").read_text()
    first = re.search(r"```bash\n(.*?)```", readme, re.S).group(1)
    extras = re.search(r"pip install -e '\.\[([a-z,]+)\]'", first).group(1).split(",")
    table = tomllib.loads((root / "pyproject.toml").read_text())["project"]
    wanted = [req for extra in extras for req in table["optional-dependencies"][extra]]
    names = {re.split(r"[\[<>=]", req)[0].lower() for req in wanted}
    # query (DuckDB), report and sensitivity (matplotlib, SALib), the Dask backend
    assert {"duckdb", "matplotlib", "salib", "dask"} <= names
    assert "propensim query" in readme and "propensim demo" in first
