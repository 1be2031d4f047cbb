"""Same runs table, byte for byte, whichever backend and however many workers ran it."""

import pytest
from _runner_helpers import write_spec

from propensim.experiments import load, run_experiment
from propensim.experiments.runner import BackendError


@pytest.fixture(scope="module")
def spec(tmp_path_factory):
    return write_spec(tmp_path_factory.mktemp("spec"), rounds=6, replicates=3)  # 12 runs


@pytest.fixture(scope="module")
def in_process(spec, tmp_path_factory):
    folder = tmp_path_factory.mktemp("one") / "r"
    store = run_experiment(spec, folder, workers=1, progress=False)
    assert store.manifest["backend"]["kind"] == "in-process"
    return folder


@pytest.mark.slow
def test_local_pool_of_two_matches_one_worker(spec, in_process, tmp_path):
    store = run_experiment(spec, tmp_path / "r", workers=2, progress=False)
    backend = store.manifest["backend"]
    assert backend["kind"] == "local" and backend["workers"] == 2
    assert backend["start_method"] in ("forkserver", "spawn")
    assert (tmp_path / "r/runs.parquet").read_bytes() == (in_process / "runs.parquet").read_bytes()
    assert len(set(load(tmp_path / "r").timings["worker"])) == 2  # both workers took part
    assert load(tmp_path / "r").rounds.equals(load(in_process).rounds)


@pytest.mark.slow
def test_dask_cluster_matches_one_worker(spec, in_process, tmp_path):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(
        n_workers=2, processes=True, threads_per_worker=1, dashboard_address=None
    ) as cluster:
        store = run_experiment(
            spec, tmp_path / "r", scheduler=cluster.scheduler_address, progress=False
        )
    assert store.manifest["backend"]["kind"] == "dask"
    assert store.manifest["backend"]["workers"] == 2
    assert (tmp_path / "r/runs.parquet").read_bytes() == (in_process / "runs.parquet").read_bytes()
    # the runner's own local cluster
    store = run_experiment(spec, tmp_path / "local", dask_local=2, progress=False)
    assert store.manifest["backend"]["kind"] == "dask-local"
    assert (tmp_path / "local/runs.parquet").read_bytes() == (
        in_process / "runs.parquet"
    ).read_bytes()


@pytest.mark.slow
def test_unreachable_scheduler_is_one_line(spec, tmp_path):
    dask = pytest.importorskip("dask")
    with dask.config.set({"distributed.comm.timeouts.connect": "1s"}):
        with pytest.raises(BackendError, match="cannot reach the Dask scheduler") as info:
            run_experiment(spec, tmp_path / "r", scheduler="tcp://127.0.0.1:9", progress=False)
    assert "\n" not in str(info.value)


def _worker_settings():
    import sys

    import dask

    return {
        "tick": dask.config.get("distributed.admin.tick.interval"),
        "profile": dask.config.get("distributed.worker.profile.enabled"),
        "engine_loaded": "propensim.markets.engine" in sys.modules,
    }


@pytest.mark.slow
def test_local_dask_workers_start_quiet_and_preloaded():
    pytest.importorskip("distributed")
    import multiprocessing

    from propensim.experiments.runner import _Dask

    backend = _Dask(local=1)
    try:
        (seen,) = backend._client.run(_worker_settings).values()
    finally:
        backend.close()
    assert seen["tick"] == "1s" and seen["profile"] is False  # our light settings reached it
    if "forkserver" in multiprocessing.get_all_start_methods():
        # forked from the preloaded server: the engine came with it, before any task ran
        assert seen["engine_loaded"]
