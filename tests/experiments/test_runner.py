"""Runner: one run, batching, failure policy, progress switch, environment pinning."""

import os
import pickle
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from _runner_helpers import METRICS, make_plans

from propensim.experiments import runner
from propensim.experiments.runner import (
    BackendError,
    RunResult,
    SweepStopped,
    pinned_threads,
    run_one,
    run_plans,
    show_progress,
)
from propensim.markets.build import build_market


def test_run_one_ok_matches_the_engine_and_is_pure():
    plan = make_plans(rounds=4)[0]
    res = run_one(plan)
    assert res.status == "ok" and res.ok and res.error_type is None
    assert res.run_id == plan.run_id and res.index == 0
    assert list(res.summary) == METRICS
    assert list(res.rounds["round"]) == [0, 1, 2, 3]
    assert res.traders is None and res.ledger is None
    assert res.duration > 0 and ":" in res.worker and res.finished.endswith("+00:00")
    # A run is a pure function of its plan: the same numbers as the engine built by hand.
    market = build_market(plan.config, plan.seed, mesa=False)
    market.run(4)
    assert res.summary == market.summary()
    assert run_one(plan).summary == res.summary


def test_run_one_collects_traders_and_ledger_when_asked():
    plan = make_plans(rounds=4, collect={"traders_every": 2, "ledger": True})[1]
    res = run_one(plan)
    assert sorted(set(res.traders["round"])) == [0, 2]
    assert len(res.traders) == 2 * 20  # two samples of 10 buyers + 10 sellers
    assert set(res.ledger.columns) >= {"round", "buyer", "seller", "price", "quantity"}
    per_round = res.ledger.groupby("round")["quantity"].sum().reindex(range(4), fill_value=0)
    np.testing.assert_array_equal(per_round.to_numpy(), res.rounds["volume"].to_numpy())
    bare = run_one(make_plans(rounds=4, collect={"rounds": False})[1])
    assert bare.rounds is None and bare.traders is None and bare.ledger is None
    assert bare.summary == res.summary  # collecting more does not change the numbers


def test_run_one_never_raises_for_a_failing_run():
    plan = make_plans(bad_arms=("match",))[0]
    res = run_one(plan)
    assert res.status == "failed" and not res.ok
    assert res.error_type == "UnknownPluginError"
    assert "no_such_rule" in res.error_message
    assert res.traceback.startswith("Traceback") and "make_plugin" in res.traceback
    assert res.summary == {} and res.rounds is None


def test_batch_sizes_follow_the_measured_cost():
    b = runner._Batcher(n_workers=2, inline=False)
    assert b.size(10_000) == 1  # no cost known yet: pilot tasks of one run
    b.observe([RunResult("x", 0, "ok", duration=0.001)] * 9)
    assert b.size(10_000) == 100  # 100 ms / 1 ms per run
    assert b.size(40) == 10  # the end of a sweep: two tasks per worker for what is left
    assert b.size(1) == 1
    b.observe([RunResult("x", 0, "ok", duration=2.0)] * 30)
    assert b.size(10_000) == 1  # slow runs travel alone
    assert runner._Batcher(n_workers=1, inline=True).size(10_000) == 1


def test_pinned_threads_sets_and_restores(monkeypatch):
    monkeypatch.setenv("OMP_NUM_THREADS", "7")
    monkeypatch.delenv("MKL_NUM_THREADS", raising=False)
    with pinned_threads():
        assert [os.environ[k] for k in runner.THREAD_VARIABLES] == ["1", "1", "1"]
    assert os.environ["OMP_NUM_THREADS"] == "7"
    assert "MKL_NUM_THREADS" not in os.environ


def test_progress_only_on_a_terminal_outside_ci(monkeypatch):
    class Tty:
        def isatty(self):
            return True

    monkeypatch.setattr(sys, "stderr", Tty())
    monkeypatch.delenv("CI", raising=False)
    assert show_progress()
    monkeypatch.setenv("CI", "true")
    assert not show_progress()
    monkeypatch.delenv("CI")
    monkeypatch.setattr(sys, "stderr", object())  # no isatty: not a terminal
    assert not show_progress()


@pytest.mark.parametrize("bad", [0, -2, True, 1.5])
def test_bad_worker_count(tmp_path, bad):
    with pytest.raises(BackendError, match="workers must be a whole number >= 1"):
        run_plans(make_plans()[:2], tmp_path / "r", workers=bad, progress=False)
    assert not (tmp_path / "r").exists()  # checked before the folder is made
    with pytest.raises(BackendError, match="either scheduler or dask_local"):
        run_plans(make_plans()[:2], tmp_path / "r", scheduler="tcp://x:1", dask_local=2)


def test_failed_runs_are_recorded_and_the_sweep_goes_on(tmp_path):
    plans = make_plans(bad_arms=("auction",), replicates=3)  # every other run fails
    store = run_plans(plans, tmp_path / "r", workers=1, progress=False)
    assert store.counts() == {"runs": 12, "distinct": 12, "ok": 6, "failed": 6, "pending": 0}
    res = store.load()
    assert list(res.runs["status"]) == ["ok", "failed"] * 6
    failed = res.runs[res.runs["status"] == "failed"]
    assert set(failed["error_type"]) == {"UnknownPluginError"}
    assert failed["efficiency"].isna().all()
    assert len(res.failures) == 6 and res.failures["traceback"].str.contains("Traceback").all()
    assert res.manifest["status"] == "complete-with-failures"


def test_fail_fast_stops_at_the_first_failure(tmp_path):
    plans = make_plans(bad_arms=("auction",), replicates=3)
    with pytest.raises(SweepStopped, match=r"run 1 failed \(UnknownPluginError") as info:
        run_plans(plans, tmp_path / "r", workers=1, fail_fast=True, progress=False)
    assert "\n" not in str(info.value)
    counts = info.value.store.counts()
    assert counts["ok"] == 1 and counts["failed"] == 1 and counts["pending"] == 10
    runs = pd.read_parquet(tmp_path / "r" / "runs.parquet")
    assert list(runs["status"]) == ["ok", "failed"]  # what finished is stored


def test_identical_early_failures_stop_the_sweep(tmp_path):
    plans = make_plans(arms=(("x", "propensity"),), bad_arms=("x",), replicates=8)  # all bad
    with pytest.raises(SweepStopped, match="first 5 runs all failed with UnknownPluginError"):
        run_plans(plans, tmp_path / "r", workers=1, progress=False)
    runs = pd.read_parquet(tmp_path / "r" / "runs.parquet")
    assert len(runs) == 5 and (runs["status"] == "failed").all()
    manifest = pd.read_json(tmp_path / "r" / "manifest.json", typ="series")
    assert manifest["status"] == "stopped"


def test_identical_run_ids_run_once(tmp_path):
    arms = (("a", "call_auction"), ("b", "call_auction"))  # two arms, one configuration
    plans = make_plans(arms=arms, sigmas=(4.0,), replicates=2)
    assert plans[0].run_id == plans[1].run_id
    store = run_plans(plans, tmp_path / "r", workers=1, progress=False)
    res = store.load()
    assert store.counts()["distinct"] == 2 and len(res.timings) == 2
    a, b = res.runs[res.runs["arm"] == "a"], res.runs[res.runs["arm"] == "b"]
    np.testing.assert_array_equal(a["efficiency"].to_numpy(), b["efficiency"].to_numpy())
    assert len(res.rounds) == 2 * 5  # rounds stored once per distinct run


def test_plans_need_distinct_indices(tmp_path):
    p = make_plans()[:1]
    with pytest.raises(ValueError, match="distinct index"):
        run_plans(p + p, tmp_path / "r", progress=False)


def test_worker_runs_send_the_same_tables_without_pandas(tmp_path):
    # What a worker runs (_run_batch) gives run_one's tables once turned into DataFrames ...
    plans = make_plans(rounds=4, collect={"traders_every": 2, "ledger": True})[:2]
    sent = runner._run_batch(plans)
    assert all(isinstance(r.rounds, dict) for r in sent)  # column dicts on the way back
    for plan, result in zip(plans, sent, strict=True):
        expected, got = run_one(plan), result._to_frames()
        for name in ("rounds", "traders", "ledger"):
            pd.testing.assert_frame_equal(getattr(got, name), getattr(expected, name))
    # ... and needs no pandas: a fresh process with only the workers' preload runs them.
    (tmp_path / "plans.pkl").write_bytes(pickle.dumps(plans))
    child = (
        "import importlib, pickle, sys\n"
        "from propensim.experiments import runner\n"
        "for m in runner.WORKER_PRELOAD: importlib.import_module(m)\n"
        f"plans = pickle.loads(open({str(tmp_path / 'plans.pkl')!r}, 'rb').read())\n"
        "results = runner._run_batch(plans)\n"
        "assert all(r.ok for r in results), [r.error_message for r in results]\n"
        "print('pandas' in sys.modules)\n"
    )
    out = subprocess.run(
        [sys.executable, "-c", child], capture_output=True, text=True, check=True
    ).stdout
    assert out.strip() == "False"
