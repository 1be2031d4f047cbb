"""Progress without a terminal, and Ctrl-C under Dask (issue 15).

No test here measures time: the plain lines are forced by a run that waits until the progress
thread has printed, and the interrupt test waits for a stored run before it signals.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from propensim.experiments import runner
from propensim.experiments.runner import run_experiment
from propensim.plugins.registry import get_plugin, register, unregister

SPEC = """
[experiment]
name = "progress"
seed = 2
rounds = 2
replicates = {replicates}

[population]
n_buyers = 3
n_sellers = 3

[clearing]
name = "{clearing}"

[collect]
metrics = ["volume"]
"""


@pytest.fixture
def waiting_rule():
    """A clearing rule whose first run blocks until two progress lines have been printed."""
    printed = threading.Event()
    base = get_plugin("clearing", "call_auction")
    state = {"blocked": False}

    class Waits(base):
        description = "waits for the progress thread (test)"

        def clear(self, market_state, rng):
            if not state["blocked"]:
                state["blocked"] = True
                assert printed.wait(30), "no progress line came while a run was going on"
            return super().clear(market_state, rng)

    register("clearing", "waits_for_progress_test", replace=True)(Waits)
    yield printed
    unregister("clearing", "waits_for_progress_test")


def test_plain_progress_lines_tick_while_a_run_goes_on(tmp_path, monkeypatch, capsys, waiting_rule):
    lines = []
    real = runner._Progress._line

    def line(self, text):
        real(self, text)
        lines.append(text)
        if len(lines) >= 2:
            waiting_rule.set()

    monkeypatch.setattr(runner._Progress, "_line", line)
    monkeypatch.setenv("PROPENSIM_PROGRESS_SECONDS", "0.01")
    spec = tmp_path / "s.toml"
    spec.write_text(SPEC.format(replicates=3, clearing="waits_for_progress_test"))
    run_experiment(spec, tmp_path / "out", workers=1)  # progress=None, stderr is not a terminal
    err = capsys.readouterr().err
    # two lines while the first run was still going: the clock ticks between runs
    assert lines[0].startswith("0/3 runs done, 0 failed, elapsed 0:00:0")
    assert "ETA unknown" in lines[0]
    assert lines[-1].startswith("3/3 runs done, 0 failed") and lines[-1].endswith("ETA 0:00:00")
    assert all(line.startswith("propensim: progress: ") for line in err.splitlines())


def test_a_resumed_sweep_says_what_was_already_done(tmp_path, monkeypatch, capsys):
    monkeypatch.setenv("PROPENSIM_PROGRESS_SECONDS", "3600")  # only the start line
    small = tmp_path / "small.toml"
    small.write_text(SPEC.format(replicates=2, clearing="call_auction"))
    run_experiment(small, tmp_path / "out", workers=1, progress=False)
    big = tmp_path / "big.toml"
    big.write_text(SPEC.format(replicates=5, clearing="call_auction"))
    capsys.readouterr()
    run_experiment(big, tmp_path / "out", workers=1)
    err = capsys.readouterr().err
    assert "propensim: progress: resuming: 2 of 5 runs already stored, 3 to run" in err


def test_progress_false_prints_nothing(tmp_path, monkeypatch, capsys):
    monkeypatch.setenv("PROPENSIM_PROGRESS_SECONDS", "0.001")
    spec = tmp_path / "s.toml"
    spec.write_text(SPEC.format(replicates=2, clearing="call_auction"))
    run_experiment(spec, tmp_path / "out", workers=1, progress=False)
    assert capsys.readouterr().err == ""


SLOW_SPEC = """
[experiment]
name = "slow"
seed = 1
rounds = 300
replicates = 60

[population]
n_buyers = 300
n_sellers = 300
"""


@pytest.mark.slow
@pytest.mark.parametrize("backend", [["--dask-local", "1"], ["--workers", "2"]])
def test_ctrl_c_ends_cleanly_with_one_line(tmp_path, backend):
    spec = tmp_path / "slow.toml"
    spec.write_text(SLOW_SPEC)
    out = tmp_path / "res"
    cmd = [sys.executable, "-m", "propensim.experiments.cli", "run", str(spec), "--out", str(out)]

    def own_group():  # as a terminal does: Ctrl-C goes to every process of the group
        signal.signal(signal.SIGINT, signal.SIG_DFL)
        os.setpgrp()

    proc = subprocess.Popen(
        [*cmd, *backend, "--quiet"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        preexec_fn=own_group,
    )
    try:
        deadline = time.monotonic() + 120
        while not (out / "runs.parquet").exists() and time.monotonic() < deadline:
            time.sleep(0.2)  # polling for the first stored runs, not a timing assertion
        os.killpg(proc.pid, signal.SIGINT)
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode in (130, 1)
    assert err.splitlines() == ["propensim: interrupted; run again to resume"], err
    assert Path(out / "manifest.json").exists()
