"""A generated plugin of every kind, installed with no network access, found through its entry
point, passing its own tests and running from a spec on 2 workers (slow: a pip install).

The packages go into a throw-away virtual environment layered on this one (a ``.pth`` file
adds this environment's site-packages), so the environment the rest of the suite uses never
sees them. ``pip install --no-index --no-build-isolation --no-deps`` reaches no index: it builds
with the setuptools and wheel already installed (the ``test`` extra).
"""

from __future__ import annotations

import json
import subprocess
import sys
import sysconfig
import venv
from pathlib import Path

import pandas as pd
import pytest

from propensim.experiments.new_plugin import KIND_DETAILS, new_plugin

pytestmark = pytest.mark.slow

VARIANTS = [(kind, False) for kind in KIND_DETAILS] + [("clearing", True), ("drift", True)]


def _overlay(path: Path) -> Path:
    """A venv without pip whose interpreter also sees this environment's packages."""
    venv.EnvBuilder(with_pip=False).create(path)
    python = path / "bin" / "python"
    purelib = subprocess.run(
        [str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
        capture_output=True,
        text=True,
        check=True,
    ).stdout.strip()
    ours = sysconfig.get_paths()["purelib"]
    # an "import" line in a .pth file runs: addsitedir also runs this environment's own .pth
    # files (the editable install of propensim among them)
    Path(purelib, "_propensim_parent.pth").write_text(f"import site; site.addsitedir({ours!r})\n")
    return python


def _run(python: Path, *args: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(
        [str(python), *args], capture_output=True, text=True, cwd=cwd, timeout=900
    )


@pytest.fixture(scope="module")
def installed(tmp_path_factory):
    root = tmp_path_factory.mktemp("installed")
    python = _overlay(root / "venv")
    folders = {}
    for kind, per_agent in VARIANTS:
        name = f"inst14_{kind}{'_pa' if per_agent else ''}"
        folders[(kind, per_agent)] = new_plugin(
            kind, name, per_agent=per_agent, directory=root / name
        )
    pip = ["-m", "pip", "install", "--no-index", "--no-build-isolation", "--no-deps", "-q"]
    for folder in folders.values():
        pip += ["-e", str(folder)]
    done = _run(python, *pip)
    assert done.returncode == 0, done.stdout + done.stderr
    return python, folders


def test_every_generated_plugin_is_listed_by_propensim_plugins(installed):
    python, folders = installed
    listing = _run(python, "-m", "propensim.experiments.cli", "plugins")
    assert listing.returncode == 0, listing.stderr
    for (kind, _), folder in folders.items():
        assert any(kind in line and folder.name in line for line in listing.stdout.splitlines()), (
            folder.name,
            listing.stdout,
        )
    # the environment the suite runs in does not see them
    here = subprocess.run(
        [sys.executable, "-m", "propensim.experiments.cli", "plugins"],
        capture_output=True,
        text=True,
    )
    assert "inst14_" not in here.stdout


@pytest.mark.parametrize(("kind", "per_agent"), VARIANTS)
def test_the_installed_package_passes_its_own_tests(installed, kind, per_agent):
    python, folders = installed
    folder = folders[(kind, per_agent)]
    done = _run(python, "-m", "pytest", "-q", "-p", "no:cacheprovider", cwd=folder)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-2000:]
    assert "4 passed" in done.stdout  # the kit, check(), the entry point, a market


@pytest.mark.parametrize(("kind", "per_agent"), VARIANTS)
def test_the_example_spec_runs_on_two_workers(installed, kind, per_agent, tmp_path):
    python, folders = installed
    folder = folders[(kind, per_agent)]
    out = tmp_path / "results"
    args = ["run", "example.toml", "--workers", "2", "--out", str(out)]
    done = _run(python, "-m", "propensim.experiments.cli", *args, cwd=folder)
    assert done.returncode == 0, done.stdout + done.stderr
    runs = pd.read_parquet(out / "runs.parquet")
    assert len(runs) == 4 and (runs["status"] == "ok").all()
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["backend"]["kind"] == "local" and manifest["backend"]["workers"] == 2
    assert folder.name in json.dumps(manifest["spec"])
