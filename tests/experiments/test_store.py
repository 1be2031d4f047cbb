"""Results folder: layout, atomic writes, resume, refusal of changed or corrupt folders, queries."""

import json
import random
import warnings
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from _runner_helpers import METRICS, make_plans

from propensim.experiments.runner import run_plans
from propensim.experiments.store import StoreError, load, query
from propensim.plugins.registry import get_plugin, register, unregister


def _snapshot(folder):
    files = sorted(p for p in folder.rglob("*") if p.is_file() and p.name != ".lock")
    return {p.relative_to(folder): p.read_bytes() for p in files}


@pytest.fixture(scope="module")
def done(tmp_path_factory):
    """A finished sweep: 2 points x 2 replicates x 2 arms, rounds and ledger collected."""
    folder = tmp_path_factory.mktemp("store") / "sweep"
    plans = make_plans(collect={"ledger": True})
    run_plans(plans, folder, name="sweep", workers=1, progress=False)
    return folder, plans


def test_layout_and_runs_columns(done):
    folder, plans = done
    names = {p.name for p in folder.iterdir()}
    assert {"manifest.json", "runs.parquet", "timings.parquet", "rounds", "ledger"} <= names
    assert not any(n.startswith(".tmp-") for n in names)  # atomic writes leave no temp files
    runs = pq.read_table(folder / "runs.parquet")
    assert runs.schema.names == [
        *("run_id", "index", "arm", "point", "replicate", "seed_entropy", "seed_key"),
        "population.sigma",
        *METRICS,
        *("status", "error_type", "error_message"),
    ]
    assert runs.schema.metadata is None  # no pandas metadata: bytes depend on the data only
    assert "duration_s" not in runs.schema.names  # wall-clock times live in timings.parquet
    frame = runs.to_pandas()
    assert list(frame["index"]) == list(range(8))
    assert list(frame["run_id"]) == [p.run_id for p in plans]
    assert [list(k) for k in frame["seed_key"]] == [list(p.seed_key) for p in plans]
    assert (frame["status"] == "ok").all() and frame["error_type"].isna().all()
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["fingerprint"] and manifest["root_seed"] == 20261201
    assert set(manifest["versions"]) >= {
        "propensim",
        "numpy",
        "scipy",
        "mesa",
        "networkx",
        "pandas",
        "pyarrow",
    }
    assert manifest["counts"] == {"runs": 8, "distinct": 8, "ok": 8, "failed": 0, "pending": 0}
    assert manifest["started"] <= manifest["finished"] and manifest["status"] == "complete"


def test_load_joins_timings_and_reads_parts(done):
    folder, plans = done
    res = load(folder)
    assert "duration_s" in res.runs and (res.runs["duration_s"] > 0).all()
    assert len(res.rounds) == 8 * 5 and list(res.rounds.columns[:2]) == ["run_id", "round"]
    # Round tables come back in run order, each run's rounds in order.
    assert list(res.rounds["run_id"][::5]) == [p.run_id for p in plans]
    assert not res.rounds.duplicated(["run_id", "round"]).any()
    assert len(list((folder / "rounds").glob("part-*.parquet"))) < 8  # batched, not one per run
    vol = res.ledger.groupby("run_id")["quantity"].sum()
    assert vol.to_dict() == res.rounds.groupby("run_id")["volume"].sum().astype(int).to_dict()
    assert res.traders.empty


def test_query_with_duckdb(done):
    folder, _ = done
    out = query(
        folder,
        "SELECT arm, count(*) AS n, avg(efficiency) AS e FROM runs GROUP BY arm ORDER BY arm",
    )
    runs = load(folder).runs
    assert list(out["arm"]) == ["auction", "match"] and list(out["n"]) == [4, 4]
    expected = runs.groupby("arm")["efficiency"].mean().sort_index().to_numpy()
    assert out["e"].to_numpy() == pytest.approx(expected)
    n_rounds = query(folder, "SELECT count(*) AS n FROM rounds JOIN runs USING (run_id)")
    assert int(n_rounds["n"].iloc[0]) == 40
    sig = query(folder, 'SELECT DISTINCT "population.sigma" AS s FROM runs ORDER BY s')
    assert list(sig["s"]) == [3.0, 6.0]
    with pytest.raises(StoreError, match="query failed"):
        query(folder, "SELECT nothing FROM nowhere")


def test_resume_skips_completed_runs(done, tmp_path):
    folder, plans = done
    before = _snapshot(folder)
    store = run_plans(plans, folder, name="sweep", workers=1, progress=False)
    after = _snapshot(folder)
    for name in ("runs.parquet", "timings.parquet", "rounds/part-00000.parquet"):
        assert after[Path(name)] == before[Path(name)]  # nothing was run again
    assert sorted(after) == sorted(before)
    assert store.manifest["sessions"] == 2


def test_order_of_completion_does_not_change_the_bytes(tmp_path):
    plans = make_plans(replicates=1)
    shuffled = plans[:]
    random.Random(3).shuffle(shuffled)
    run_plans(plans, tmp_path / "a", workers=1, progress=False)
    run_plans(shuffled, tmp_path / "b", workers=1, progress=False, flush_interval=0)
    assert (tmp_path / "a/runs.parquet").read_bytes() == (tmp_path / "b/runs.parquet").read_bytes()


FLAKY = {"fail": True}


def test_failed_runs_are_retried_on_resume(tmp_path):
    base = get_plugin("clearing", "call_auction")

    class Flaky(base):
        description = "call auction that fails while a test flag is set"

        def clear(self, state, rng):
            if FLAKY["fail"]:
                raise RuntimeError("flaky rule failed on purpose")
            return super().clear(state, rng)

    register("clearing", "flaky_for_store_test", replace=True)(Flaky)
    try:
        plans = make_plans(arms=(("m", "propensity"), ("f", "flaky_for_store_test")))
        FLAKY["fail"] = True
        first = run_plans(plans, tmp_path / "r", workers=1, progress=False)
        assert first.counts()["failed"] == 4
        assert len(pd.read_parquet(tmp_path / "r/failures.parquet")) == 4
        FLAKY["fail"] = False
        second = run_plans(plans, tmp_path / "r", workers=1, progress=False)
        assert second.counts() == {"runs": 8, "distinct": 8, "ok": 8, "failed": 0, "pending": 0}
        assert len(pd.read_parquet(tmp_path / "r/failures.parquet")) == 0
        fresh = run_plans(plans, tmp_path / "fresh", workers=1, progress=False)
        assert fresh.counts()["ok"] == 8
        assert (tmp_path / "r/runs.parquet").read_bytes() == (
            tmp_path / "fresh/runs.parquet"
        ).read_bytes()
    finally:
        unregister("clearing", "flaky_for_store_test")


def test_changed_spec_is_refused_and_nothing_changes(done):
    folder, plans = done
    before = _snapshot(folder)
    other = make_plans(rounds=6)
    with pytest.raises(StoreError, match="different spec.*new folder") as info:
        run_plans(other, folder, name="sweep", workers=1, progress=False)
    assert "\n" not in str(info.value)
    assert _snapshot(folder) == before


def test_corrupt_runs_parquet_is_named_and_untouched(tmp_path):
    plans = make_plans(replicates=1)
    folder = tmp_path / "r"
    run_plans(plans, folder, workers=1, progress=False)
    bad = b"PAR1 this is not a parquet file"
    (folder / "runs.parquet").write_bytes(bad)
    before = _snapshot(folder)
    with pytest.raises(StoreError) as info:
        run_plans(plans, folder, workers=1, progress=False)
    msg = str(info.value)
    assert "runs.parquet" in msg and "cannot read" in msg and "\n" not in msg
    assert _snapshot(folder) == before
    with pytest.raises(StoreError, match="runs.parquet"):
        _ = load(folder).runs


def test_corrupt_manifest_and_foreign_folders(tmp_path):
    plans = make_plans(replicates=1)
    folder = tmp_path / "r"
    run_plans(plans, folder, workers=1, progress=False)
    (folder / "manifest.json").write_text("{ not json")
    before = _snapshot(folder)
    with pytest.raises(StoreError, match=r"manifest\.json: cannot read"):
        run_plans(plans, folder, workers=1, progress=False)
    assert _snapshot(folder) == before
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("mine")
    with pytest.raises(StoreError, match="not a propensim results folder"):
        run_plans(plans, foreign, workers=1, progress=False)
    assert [p.name for p in foreign.iterdir()] == ["notes.txt"]
    (foreign / "manifest.json").write_text('{"format": "something-else"}')
    with pytest.raises(StoreError, match="not a propensim results manifest"):
        load(foreign)


def test_a_flush_killed_before_commit_is_undone(tmp_path):
    plans = make_plans()
    clean = tmp_path / "clean"
    run_plans(plans, clean, workers=1, progress=False)
    folder = tmp_path / "r"
    run_plans(plans, folder, workers=1, progress=False, flush_interval=0)  # one flush per run
    parts = sorted((folder / "rounds").glob("part-*.parquet"))
    assert len(parts) == 8
    # Pretend the last three flushes died after their part files, before runs.parquet:
    # runs.parquet then lists only the first five runs.
    table = pq.read_table(folder / "runs.parquet")
    pq.write_table(table.slice(0, 5), folder / "runs.parquet")
    (folder / ".tmp-runs.parquet-999").write_bytes(b"half a file")
    store = run_plans(plans, folder, workers=1, progress=False)
    assert store.counts()["ok"] == 8
    assert not (folder / ".tmp-runs.parquet-999").exists()
    rounds = load(folder).rounds
    assert len(rounds) == 8 * 5 and not rounds.duplicated(["run_id", "round"]).any()
    assert (folder / "runs.parquet").read_bytes() == (clean / "runs.parquet").read_bytes()
    assert len(load(folder).timings) == 8


def test_part_mixing_committed_and_uncommitted_runs_redoes_both(tmp_path):
    plans = make_plans(replicates=1)
    folder = tmp_path / "r"
    run_plans(plans, folder, workers=1, progress=False)  # one flush: one part of all 4 runs
    assert len(list((folder / "rounds").glob("part-*.parquet"))) == 1
    table = pq.read_table(folder / "runs.parquet")
    pq.write_table(table.slice(0, 2), folder / "runs.parquet")
    store = run_plans(plans, folder, workers=1, progress=False)
    assert store.counts()["ok"] == 4
    rounds = load(folder).rounds
    assert sorted(set(rounds["run_id"])) == sorted(p.run_id for p in plans)
    assert len(rounds) == 4 * 5


def test_parameter_types_are_kept(tmp_path):
    plans = make_plans(replicates=1)
    mixed = [
        type(p)(
            **{
                **p.to_dict(),
                "seed_key": p.seed_key,
                "params": {
                    **p.params,
                    "clearing.meetings": 2,
                    "network.name": "complete",
                    "flag": True,
                    "levels": [1, 2],
                },
            }
        )
        for p in plans
    ]
    run_plans(mixed, tmp_path / "r", workers=1, progress=False)
    schema = pq.read_schema(tmp_path / "r/runs.parquet")
    assert schema.field("clearing.meetings").type == pa.int64()
    assert schema.field("network.name").type == pa.string()
    assert schema.field("flag").type == pa.bool_()
    assert schema.field("levels").type == pa.string()  # lists stored as canonical JSON
    assert pq.read_table(tmp_path / "r/runs.parquet").column("levels")[0].as_py() == "[1,2]"


def test_two_sweeps_cannot_share_a_folder(tmp_path):
    from propensim.experiments.store import Store

    plans = make_plans(replicates=1)
    kwargs = dict(plans=plans, metrics=METRICS, fingerprint="f" * 64, name="x")
    first = Store.create(tmp_path / "r", **kwargs)
    with pytest.raises(StoreError, match="another propensim sweep is writing"):
        Store.create(tmp_path / "r", **kwargs)
    first.finish()
    second = Store.create(tmp_path / "r", **kwargs)  # free again once the first is done
    assert second.manifest["sessions"] == 2
    second.finish()


def test_manifest_is_plain_json(tmp_path):
    plans = make_plans(replicates=1)
    run_plans(
        plans,
        tmp_path / "r",
        workers=1,
        progress=False,
        spec={"population": {"cash": float("inf")}},
    )
    text = (tmp_path / "r/manifest.json").read_text()
    assert "Infinity" not in text
    assert json.loads(text)["spec"]["population"]["cash"] == "inf"


def test_resuming_under_another_propensim_version_warns_and_keeps_the_earlier(tmp_path):
    from propensim.experiments.store import Store

    plans = make_plans(replicates=1)
    kwargs = dict(plans=plans, metrics=METRICS, fingerprint="f" * 64, name="x")
    Store.create(tmp_path / "r", **kwargs).finish()
    mpath = tmp_path / "r/manifest.json"
    manifest = json.loads(mpath.read_text())
    manifest["versions"]["propensim"] = "0.0.1"  # as if an earlier version had started it
    mpath.write_text(json.dumps(manifest))
    with pytest.warns(RuntimeWarning, match="made with propensim 0.0.1 under") as caught:
        store = Store.create(tmp_path / "r", **kwargs)
    assert len(caught) == 1 and "\n" not in str(caught[0].message)
    assert store.manifest["earlier_versions"][0]["propensim"] == "0.0.1"
    store.finish()
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the same version again: no warning
        Store.create(tmp_path / "r", **kwargs).finish()
    assert json.loads(mpath.read_text())["earlier_versions"][0]["propensim"] == "0.0.1"
