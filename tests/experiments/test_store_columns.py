"""A sweep's tables arrive as column dicts and are written with pyarrow: same folder contents."""

import pandas as pd
import pyarrow.parquet as pq
from _runner_helpers import METRICS, make_plans

from propensim.experiments import runner
from propensim.experiments.store import TABLES, Store, load

COLLECT = {"traders_every": 2, "ledger": True, "totals": True, "meetings": True}


def _store(path, plans, results):
    store = Store.create(path, plans=plans, metrics=METRICS, fingerprint="f", name="cols")
    for r in results:
        store.add(r)
    store.finish()
    return load(path)


def test_column_dicts_are_stored_as_dataframes_would_be(tmp_path):
    plans = make_plans(rounds=4, collect=COLLECT, replicates=1)
    as_dicts = runner._run_batch(plans)  # what a worker sends back
    assert all(isinstance(r.rounds, dict) and r.ok for r in as_dicts)
    as_frames = [runner.run_one(p) for p in plans]
    new = _store(tmp_path / "dicts", plans, as_dicts)
    old = _store(tmp_path / "frames", plans, as_frames)
    for name in TABLES:
        got, want = getattr(new, name), getattr(old, name)
        assert len(want), name  # every table is collected here
        pd.testing.assert_frame_equal(got, want, obj=name)
        # the same arrow types on disk as the pandas path writes (run_id a large_string)
        (part,) = sorted((tmp_path / "dicts" / name).glob("part-*.parquet"))
        (ref,) = sorted((tmp_path / "frames" / name).glob("part-*.parquet"))
        assert pq.read_schema(part).remove_metadata() == pq.read_schema(ref).remove_metadata()
    assert (tmp_path / "dicts" / "runs.parquet").read_bytes() == (
        tmp_path / "frames" / "runs.parquet"
    ).read_bytes()
