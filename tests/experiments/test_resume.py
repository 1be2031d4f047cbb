"""SIGKILL a sweep part-way, run it again into the same folder: same bytes, no duplicates."""

import os
import signal
import subprocess
import sys
import time

import pyarrow.parquet as pq
import pytest
from _runner_helpers import write_spec

from propensim.experiments import load, run_experiment

N = 80  # runs: 2 points x 20 replicates x 2 arms


def _stored_runs(folder) -> int:
    try:
        return pq.read_metadata(folder / "runs.parquet").num_rows
    except (FileNotFoundError, OSError):
        return 0


@pytest.mark.slow
@pytest.mark.parametrize("workers", [1, 2])
def test_sigkill_then_resume_equals_an_uninterrupted_sweep(tmp_path, workers):
    spec = write_spec(tmp_path, rounds=100, replicates=20, n=100)  # 80 runs of ~0.1 s
    clean = run_experiment(spec, tmp_path / "clean", workers=1, progress=False)
    assert clean.counts()["ok"] == N

    folder = tmp_path / "killed"
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "propensim.experiments.cli",
            "run",
            str(spec),
            "--out",
            str(folder),
            "--workers",
            str(workers),
            "--quiet",
        ],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        start_new_session=True,  # its own process group: the kill takes pool workers too
    )
    try:
        deadline = time.monotonic() + 120
        while _stored_runs(folder) < 1 and time.monotonic() < deadline:
            assert proc.poll() is None, "the sweep ended before it could be killed"
            time.sleep(0.01)
        assert proc.poll() is None, "the sweep ended before it could be killed"
        os.killpg(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(timeout=60)
    stored = _stored_runs(folder)
    assert 1 <= stored < N
    assert load(folder).manifest["status"] == "running"  # it never got to finish

    resumed = run_experiment(spec, folder, workers=workers, progress=False)
    assert resumed.counts() == {"runs": N, "distinct": N, "ok": N, "failed": 0, "pending": 0}
    assert resumed.manifest["sessions"] == 2
    assert (folder / "runs.parquet").read_bytes() == (tmp_path / "clean/runs.parquet").read_bytes()
    rounds = load(folder).rounds
    assert len(rounds) == N * 100
    assert not rounds.duplicated(["run_id", "round"]).any()
    clean_rounds = load(tmp_path / "clean").rounds
    assert rounds.equals(clean_rounds)
