"""Running sweeps: one run, batches of runs, and the backends that execute them.

A run is a pure function of its :class:`~propensim.experiments.plan.RunPlan` (configuration,
rounds, seed), so it gives the same numbers in this process, in a local process pool or on a Dask
worker; the runner only decides where runs execute and stores what comes back.

Backends
--------
- ``workers=1``: runs execute in this process, one after another.
- ``workers=N`` (default: the CPUs this process may use): a
  :class:`concurrent.futures.ProcessPoolExecutor` with a preloaded ``"forkserver"`` (``"spawn"``
  where there is none; both start workers from a fresh interpreter, safe with threads; the
  global start method is left alone). Worker processes start with
  ``OMP_NUM_THREADS``, ``OPENBLAS_NUM_THREADS`` and ``MKL_NUM_THREADS`` set to 1, so N workers use
  N cores and not N times the BLAS pool. Workers are not told the main script's path (see
  ``_main_script_hidden``), so a script that starts a sweep needs no ``if __name__ ==
  "__main__":`` guard. A worker that dies stops the sweep with how it ended (signal or exit
  code).
- ``scheduler="tcp://host:8786"``: a running Dask scheduler (``distributed.Client(address)``).
  ``dask_local=N`` starts a ``distributed.LocalCluster`` of N single-threaded worker processes.
  Every worker needs the same propensim (and plugins) installed.

On a batch system, start workers with dask-jobqueue and hand its scheduler to the runner::

    from dask_jobqueue import SLURMCluster
    cluster = SLURMCluster(cores=1, processes=1, memory="2GB", walltime="02:00:00")
    cluster.scale(jobs=32)                     # 32 single-core workers
    run_experiment("sweep.toml", scheduler=cluster.scheduler_address)

or from the shell, ``propensim run sweep.toml --scheduler tcp://HOST:8786`` against a scheduler
started with ``dask scheduler`` and workers started by the batch system (``dask worker HOST:8786
--nthreads 1``).

Batching. Sending one task costs about 3.5 ms on Dask here and a little less in a process pool, so
runs travel in batches of at least about 100 ms of work. The cost per run is estimated from the
first runs to finish (the first tasks hold one run each: a pilot), and batches shrink near the end
of a sweep so that the last tasks spread over all workers.

Failures. A run that raises is recorded with its error type, message and traceback, and the sweep
goes on. ``fail_fast=True`` stops at the first failure. If the first five runs to finish all failed
with the same exception type the sweep stops: the spec is probably wrong.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import math
import os
import socket
import sys
import time
import traceback as _traceback
import warnings
from collections import deque
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from propensim.experiments.plan import RunPlan
from propensim.experiments.store import Store, plans_fingerprint

#: Aim for tasks of at least this much work (seconds): amortises ~3.5 ms of task overhead.
TARGET_TASK_SECONDS = 0.1
#: The same for Dask, whose scheduler and client share the machine's cores with the workers on a
#: local cluster: fewer, larger tasks leave the workers more of them.
DASK_TARGET_TASK_SECONDS = 0.5
#: Stop the sweep if this many first finished runs all failed with one exception type.
EARLY_FAILURES = 5
#: Environment variables that pin BLAS/OpenMP pools of worker processes to one thread.
THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


class SweepStopped(RuntimeError):
    """A sweep stopped early (fail-fast, repeated failures, a dead worker).

    Results so far are stored; ``store`` is the results folder.
    """

    def __init__(self, message: str, store: Store | None = None) -> None:
        super().__init__(message)
        self.store = store


class BackendError(ValueError):
    """A backend that cannot be used as asked (bad worker count, unreachable scheduler)."""


# -- one run -------------------------------------------------------------------------------
@dataclass
class RunResult:
    """What one run returns.

    Attributes
    ----------
    run_id, index : str, int
        The plan's identity.
    status : str
        ``"ok"`` or ``"failed"``.
    summary : dict of str to float
        One number per metric (empty when failed).
    rounds, traders, ledger : pandas.DataFrame or None
        Round table, sampled trader states and trades, when the plan collects them. (On their
        way back from a worker they travel as column dicts, name -> array, so that workers never
        import pandas; a sweep hands them to the store as they are, which writes them with
        pyarrow, and :meth:`Batch.wait` turns them into DataFrames.)
    error_type, error_message, traceback : str or None
        For a failed run: the exception's class name, its message, the formatted traceback.
    duration : float
        Wall-clock seconds, building the market included.
    worker : str
        ``host:pid`` of the process that ran it.
    finished : str
        UTC time the run ended (ISO 8601).
    warnings : tuple of str
        Distinct warning messages the run raised.
    """

    run_id: str
    index: int
    status: str
    summary: dict[str, float] = field(default_factory=dict)
    rounds: Any = None
    traders: Any = None
    ledger: Any = None
    totals: Any = None
    meetings: Any = None
    error_type: str | None = None
    error_message: str | None = None
    traceback: str | None = None
    duration: float = 0.0
    worker: str = ""
    finished: str = ""
    warnings: tuple[str, ...] = ()

    @property
    def ok(self) -> bool:
        """True if the run finished without an error."""
        return self.status == "ok"

    def _to_frames(self) -> RunResult:
        """Turn tables that arrived as column dicts into pandas DataFrames (in place)."""
        for name in ("rounds", "traders", "ledger", "totals", "meetings"):
            table = getattr(self, name)
            if isinstance(table, dict):
                import pandas as pd

                setattr(self, name, pd.DataFrame(table))
        return self


def _market_config(plan: RunPlan) -> dict[str, Any]:
    """The plan's configuration with what ``collect`` asks for turned into market options."""
    config = dict(plan.config)
    market = dict(config.get("market") or {})
    collect = plan.collect or {}
    market["traders_every"] = int(collect.get("traders_every", 0) or 0)
    # What is kept is decided by [collect]: the ledger costs memory and nothing reads it otherwise.
    market["keep_ledger"] = bool(collect.get("ledger", False))
    market["keep_totals"] = bool(collect.get("totals", False))
    market["keep_meetings"] = bool(collect.get("meetings", False))
    config["market"] = market
    return config


def _worker_name() -> str:
    return f"{socket.gethostname()}:{os.getpid()}"


def _utc_now() -> str:
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="milliseconds")


def run_one(plan: RunPlan) -> RunResult:
    """Run one plan and return its result; never raises for a failing run.

    Builds the market with :func:`propensim.markets.build_market` (``mesa=False``: the array
    engine, unless a per-agent rule needs Mesa agents), runs ``plan.rounds`` rounds and keeps the
    summary, plus the round table, trader samples and ledger if ``plan.collect`` asks for them.

    Parameters
    ----------
    plan : RunPlan
        The run: configuration, rounds, seed and what to collect.

    Returns
    -------
    RunResult
        ``status`` ``"ok"``, or ``"failed"`` with the error type, message and traceback.
    """
    return _run(plan)._to_frames()


def _run(plan: RunPlan) -> RunResult:
    """:func:`run_one` with its tables as column dicts (name -> array): no pandas needed."""
    from propensim.markets.build import build_market

    t0 = time.perf_counter()
    collect = plan.collect or {}
    result = RunResult(run_id=plan.run_id, index=int(plan.index), status="ok")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            market = build_market(_market_config(plan), plan.seed, mesa=False)
            market.advance(int(plan.rounds))
            result.summary = {k: float(v) for k, v in market.summary().items()}
            if collect.get("rounds", True):
                result.rounds = market.rounds_columns()
            if int(collect.get("traders_every", 0) or 0) > 0:
                result.traders = market.traders_columns()
            if collect.get("ledger", False):
                result.ledger = market.ledger_columns()
            if collect.get("totals", False):
                result.totals = market.totals_columns()
            if collect.get("meetings", False):
                result.meetings = market.meetings_columns()
        except Exception as exc:  # a failing run is a result, not a crash of the sweep
            result.status = "failed"
            result.summary = {}
            result.rounds = result.traders = result.ledger = result.totals = None
            result.meetings = None
            result.error_type = type(exc).__name__
            result.error_message = str(exc)
            result.traceback = _traceback.format_exc()
    result.warnings = tuple(dict.fromkeys(_warning_text(w) for w in caught))
    result.duration = time.perf_counter() - t0
    result.worker = _worker_name()
    result.finished = _utc_now()
    return result


def _warning_text(w: warnings.WarningMessage) -> str:
    # re-raised later as a RuntimeWarning: name other categories only
    if issubclass(w.category, RuntimeWarning):
        return str(w.message)
    return f"{w.category.__name__}: {w.message}"


def run_batch(plans: Sequence[RunPlan]) -> list[RunResult]:
    """Run several plans one after another (as :func:`run_one` each)."""
    return [run_one(p) for p in plans]


def _run_batch(plans: Sequence[RunPlan], plugins: dict | None = None) -> list[RunResult]:
    """The unit of work sent to a worker: :func:`run_batch` with column-dict tables.

    A worker then never imports pandas (about 0.35 s of CPU at start-up, before the first run
    could begin); the sweep turns the tables into DataFrames when the results arrive.
    ``plugins``: the spec's plugin modules and the session's plugins, imported once per worker
    before its first run (:func:`propensim.experiments.local_plugins.payload`).
    """
    if plugins:
        from propensim.experiments.local_plugins import install

        install(plugins)
    return [_run(p) for p in plans]


def _plugin_payload(batch) -> tuple:
    from propensim.experiments.local_plugins import payload

    return payload(batch)


# -- backends ------------------------------------------------------------------------------
@contextlib.contextmanager
def pinned_threads() -> Iterator[None]:
    """Set the BLAS/OpenMP thread variables to 1 in this process's environment, then restore.

    Child processes started inside the block inherit them before they import numpy; an
    initializer in the child would be too late, since unpickling the task imports numpy first.
    """
    saved = {k: os.environ.get(k) for k in THREAD_VARIABLES}
    os.environ.update({k: "1" for k in THREAD_VARIABLES})
    try:
        yield
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


class _InProcess:
    kind = "in-process"
    n_workers = 1

    def submit(self, batch):
        from concurrent.futures import Future

        fut: Future = Future()
        try:
            fut.set_result(run_batch(batch))
        except BaseException as exc:  # noqa: BLE001 - delivered through the future
            if isinstance(exc, KeyboardInterrupt):
                raise
            fut.set_exception(exc)
        return fut

    def wait_any(self, futures):
        return list(futures)

    def close(self, cancel: bool = False) -> None:
        pass

    def describe(self) -> dict[str, Any]:
        return {"kind": self.kind, "workers": 1}


class _LocalPool:
    kind = "local"

    def __init__(self, n_workers: int) -> None:
        from concurrent.futures import ProcessPoolExecutor

        self.n_workers = n_workers
        # Workers start on demand while tasks are submitted, so the variables stay set for the
        # pool's lifetime and are restored in close().
        self._env = pinned_threads()
        self._env.__enter__()
        self._seen: dict[int, Any] = {}  # pid -> worker process, to tell how one ended
        try:
            self._pool = ProcessPoolExecutor(max_workers=n_workers, mp_context=_worker_context())
        except BaseException:
            self._env.__exit__(None, None, None)
            raise

    def submit(self, batch):
        # Worker processes start here, on demand; they need nothing from the main script (plans
        # are plain data, plugins travel with them), so they do not run it again: a script that
        # calls run_experiment works without an ``if __name__ == "__main__":`` guard.
        with _main_script_hidden():
            fut = self._pool.submit(_run_batch, batch, *_plugin_payload(batch))
        self._seen.update(getattr(self._pool, "_processes", None) or {})
        return fut

    def death_cause(self) -> str | None:
        """How a worker process ended, when one did (exit code or signal), else None."""
        import signal

        # The pool sends SIGTERM to the other workers once one has died: name the first cause.
        ended = [p.exitcode for p in self._seen.values() if p.exitcode not in (None, 0)]
        ended.sort(key=lambda code: code == -signal.SIGTERM)
        for code in ended:
            if code < 0:
                name = signal.Signals(-code).name if -code in signal.valid_signals() else -code
                why = " (the kernel's out-of-memory killer sends it)" if -code == 9 else ""
                return f"a worker process was killed by signal {name}{why}"
            return f"a worker process exited with code {code} (its error is printed above)"
        return None

    def wait_any(self, futures):
        from concurrent.futures import FIRST_COMPLETED, wait

        return list(wait(futures, return_when=FIRST_COMPLETED).done)

    def close(self, cancel: bool = False) -> None:
        try:
            self._pool.shutdown(wait=True, cancel_futures=cancel)
        finally:
            self._env.__exit__(None, None, None)

    def describe(self) -> dict[str, Any]:
        method = self._pool._mp_context.get_start_method()
        return {"kind": self.kind, "workers": self.n_workers, "start_method": method}


@contextlib.contextmanager
def _main_script_hidden() -> Iterator[None]:
    """While worker processes start: they are not told the main script's path.

    Started with "forkserver" or "spawn", a child imports the parent's main script (as
    ``__mp_main__``) so that objects pickled from it can be found; a script without an
    ``if __name__ == "__main__":`` guard would then start its sweep again in every worker, which
    multiprocessing refuses, and the pool breaks. Runs never need the script (their plans are
    plain data), so its ``__file__`` is hidden from ``multiprocessing.spawn.get_preparation_data``
    while a worker starts, then restored. A main module run with ``-m`` (``__spec__`` set) is
    left alone.
    """
    main = sys.modules.get("__main__")
    hide = main is not None and main.__dict__.get("__spec__") is None and hasattr(main, "__file__")
    if not hide:
        yield
        return
    path = main.__file__
    del main.__file__
    try:
        yield
    finally:
        main.__file__ = path


#: Modules a worker needs for any run; a forkserver imports them once, so each worker starts
#: in milliseconds instead of paying their imports itself. Not pandas: workers send their tables
#: as column dicts (see _run_batch), and the 0.35 s of importing pandas would delay the server,
#: and with it the first run. Not scipy.optimize (0.16 s): only the efficiency metric of small
#: markets needs it, and a worker that does imports it then. Last, the warm-up: numba and the
#: compiled kernels of a common market, loaded from the disk cache once in the server instead
#: of in every worker before its first run (about 0.4 s each; see _worker_warmup).
WORKER_PRELOAD = (
    "numpy",
    "scipy.sparse.csgraph",
    "propensim.experiments.runner",
    "propensim.markets.engine",
    "propensim.plugins.clearing",
    "propensim.plugins.drift",
    "propensim.plugins.metrics",
    "propensim.plugins.networks",
    "propensim.experiments._worker_warmup",
)


def _worker_context(dask: bool = False):
    """The multiprocessing context for worker processes: a preloaded forkserver where available.

    A forkserver is a fresh interpreter (nothing of the parent's state is inherited, as with
    "spawn") that imports :data:`WORKER_PRELOAD` once and forks each worker from itself; with
    ``dask=True`` it also imports ``distributed``, for the workers of a local Dask cluster.
    There is one forkserver per process: the preload list counts only until it starts.
    Elsewhere (Windows, macOS without it) plain "spawn".
    """
    import multiprocessing

    if "forkserver" not in multiprocessing.get_all_start_methods():
        return multiprocessing.get_context("spawn")
    ctx = multiprocessing.get_context("forkserver")
    ctx.set_forkserver_preload([*WORKER_PRELOAD, *(("distributed",) if dask else ())])
    return ctx


def prestart_workers(workers: int | None, dask_local: int | None = None) -> bool:
    """Start the preloaded forkserver now, in the background, if worker processes will follow.

    The forkserver spends 0.3-0.4 s importing :data:`WORKER_PRELOAD`; started before the
    spec is read and checked, that work overlaps the parent's own start-up instead of delaying
    the first run. Serves the local pool and, with ``dask_local``, the workers of a local Dask
    cluster. Returns True if a forkserver was started (or already ran). Harmless when no
    workers follow: the server exits with this process.
    """
    if dask_local is None and (workers == 1 or (workers is None and available_cpus() < 2)):
        return False
    import multiprocessing
    from multiprocessing import forkserver

    if "forkserver" not in multiprocessing.get_all_start_methods():
        return False
    _worker_context(dask=dask_local is not None)  # registers the preload list before the start
    with pinned_threads():  # the server, and every worker forked from it, keep these
        forkserver.ensure_running()
    return True


class _Dask:
    kind = "dask"

    def __init__(self, scheduler: str | None = None, local: int | None = None) -> None:
        try:
            import distributed
        except ImportError:
            raise BackendError(
                "the Dask backend needs dask.distributed: pip install 'propensim[dask]'"
            ) from None
        self._cluster = None
        self.scheduler = scheduler
        try:
            if local is not None:
                import dask

                # Our own cluster shares the machine with its workers: keep the background work
                # of its servers small (the scheduler and the nannies live in this process and
                # the nannies hand this configuration to their workers). Off: the statistical
                # profiler, which samples each worker's threads every 10 ms. Slower: the ticks
                # that watch for a blocked event loop (every 20 ms in each server), the system
                # monitor (500 ms; feeds a dashboard we do not start) and the memory monitor
                # (100 ms; still acts on a runaway worker within a second). Each wake-up of a
                # worker's event loop also takes the GIL from the run. Idle for 10 s with two
                # workers, this process used 0.64 s of CPU with only the profiler off and
                # 0.08-0.10 s like this; each worker 0.22-0.26 s and 0.03-0.04 s (and 0.39-0.44 s
                # with Dask's defaults).
                light = {
                    "distributed.worker.profile.enabled": False,
                    "distributed.admin.tick.interval": "1s",
                    "distributed.admin.system-monitor.interval": "5s",
                    "distributed.worker.memory.monitor-interval": "1s",
                }
                # Workers forked from our preloaded forkserver (see prestart_workers) start with
                # distributed and propensim imported, instead of importing them (and pandas) in
                # a fresh interpreter each (spawn, Dask's default). A 320-run sweep on two
                # workers took 1.24-1.34x the pool's wall clock before these two changes, 1.17x
                # with the quieter servers alone and 1.02x with both (medians of back-to-back
                # pairs on a busy 2-core machine; see docs/performance.md).
                if prestart_workers(None, dask_local=int(local)):
                    light["distributed.worker.multiprocessing-method"] = "forkserver"
                with pinned_threads(), dask.config.set(light), _main_script_hidden():
                    self._cluster = distributed.LocalCluster(
                        n_workers=int(local),
                        threads_per_worker=1,
                        processes=True,
                        dashboard_address=None,
                    )
                self._client = distributed.Client(self._cluster)
                # our own workers write to our stderr: only errors, not the warnings of a
                # cancelled task when a sweep is interrupted; and Ctrl-C (sent to the whole
                # process group) is for this process to handle, which then closes them
                self._client.run(_quiet_dask_worker)
            else:
                self._client = distributed.Client(scheduler)
        except (OSError, TimeoutError) as exc:
            if self._cluster is not None:
                self._cluster.close()
            raise BackendError(
                f"cannot reach the Dask scheduler at {scheduler!r}: {type(exc).__name__}: "
                f"{' '.join(str(exc).split())}"
            ) from None
        self.n_workers = max(1, sum(self._client.nthreads().values()))

    def submit(self, batch):
        return self._client.submit(_run_batch, list(batch), *_plugin_payload(batch), pure=False)

    def wait_any(self, futures):
        import distributed

        return list(distributed.wait(futures, return_when="FIRST_COMPLETED").done)

    def close(self, cancel: bool = False) -> None:
        if cancel:  # interrupted or stopped: end as quietly as the pool, one line of our own
            _quiet_dask_logs()
        try:
            self._client.close()
        finally:
            if self._cluster is not None:
                self._cluster.close()

    def describe(self) -> dict[str, Any]:
        kind = "dask-local" if self._cluster is not None else "dask"
        return {"kind": kind, "workers": self.n_workers, "scheduler": self.scheduler}


def _quiet_dask_logs() -> None:
    """Log only errors from distributed (and tornado) in this process, from now on."""
    import logging

    for name in ("distributed", "tornado"):
        logging.getLogger(name).setLevel(logging.ERROR)


def _quiet_dask_worker() -> None:
    """On a worker of our local cluster: errors only, and leave Ctrl-C to the sweep."""
    import signal
    import threading

    _quiet_dask_logs()
    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGINT, signal.SIG_IGN)


def available_cpus() -> int:
    """CPUs this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def _check_backend(workers, scheduler, dask_local) -> None:
    def whole(x) -> bool:
        return isinstance(x, int) and not isinstance(x, bool) and x >= 1

    if scheduler is not None and dask_local is not None:
        raise BackendError("give either scheduler or dask_local, not both")
    if dask_local is not None and not whole(dask_local):
        raise BackendError(f"dask_local must be a whole number >= 1, got {dask_local!r}")
    if workers is not None and not whole(workers):
        raise BackendError(f"workers must be a whole number >= 1, got {workers!r}")


def _backend(workers, scheduler, dask_local, n_tasks: int):
    _check_backend(workers, scheduler, dask_local)
    if scheduler is not None:
        return _Dask(scheduler=str(scheduler))
    if dask_local is not None:
        return _Dask(local=int(dask_local))
    workers = min(workers or available_cpus(), max(n_tasks, 1))
    return _InProcess() if workers == 1 else _LocalPool(workers)


# -- the public backend: open across batches -----------------------------------------------
class Batch:
    """Runs submitted together to an open :class:`Backend`; :meth:`wait` gives their results."""

    def __init__(self, tasks: list[tuple[Any, list[RunPlan]]]) -> None:
        self._tasks = tasks
        self._results: list[RunResult] | None = None

    def done(self) -> bool:
        """True once every run has finished (never blocks)."""
        if self._results is not None:
            return True
        return all(getattr(fut, "done", lambda: True)() for fut, _ in self._tasks)

    def wait(self) -> list[RunResult]:
        """Block until every run has finished; the results in the order the plans were given.

        A task that failed as a whole (a worker died) gives a failed result for each of its
        plans, as in a sweep; a run that raised is a failed result, never an exception here.
        """
        if self._results is None:
            out: list[RunResult] = []
            for fut, plans in self._tasks:
                try:
                    results = fut.result()
                except Exception as exc:  # the task itself failed
                    results = [_task_failure(plan, exc) for plan in plans]
                out.extend(r._to_frames() for r in results)
            self._results = out
        return self._results

    @property
    def results(self) -> list[RunResult]:
        """The same as :meth:`wait`."""
        return self.wait()


class Backend:
    """An open backend (this process, a local process pool or Dask) that runs many batches.

    Make one with :func:`open_backend`; use it as a context manager or call :meth:`close`.
    Workers start once and serve every batch, which is what iterative methods (calibration,
    sensitivity) need: :func:`run_plans` with ``backend=`` runs each batch into its own
    results folder (resumable) without closing it.
    """

    def __init__(self, impl) -> None:
        self._impl = impl
        self._closed = False

    @property
    def kind(self) -> str:
        """``"in-process"``, ``"local"`` or ``"dask"``."""
        return self._impl.kind

    @property
    def n_workers(self) -> int:
        """Workers (processes or Dask threads) that run tasks."""
        return int(self._impl.n_workers)

    def describe(self) -> dict[str, Any]:
        """Kind, workers and (pool) start method or (Dask) scheduler, as recorded in manifests."""
        return self._impl.describe()

    def _live(self):
        if self._closed:
            raise BackendError("this backend is closed; open a new one with open_backend()")
        return self._impl

    def submit(self, plans: Sequence[RunPlan]) -> Batch:
        """Send plans to the workers now, in tasks of several runs each; returns at once."""
        impl = self._live()
        plans = list(plans)
        if not plans:
            return Batch([])
        per_task = max(1, math.ceil(len(plans) / (2 * max(1, self.n_workers))))
        if isinstance(impl, _InProcess):
            per_task = len(plans)
        chunks = [plans[i : i + per_task] for i in range(0, len(plans), per_task)]
        return Batch([(impl.submit(chunk), chunk) for chunk in chunks])

    def run(self, plans: Sequence[RunPlan]) -> list[RunResult]:
        """:meth:`submit` then :meth:`Batch.wait`: the results in plan order."""
        return self.submit(plans).wait()

    def close(self, cancel: bool = False) -> None:
        """Stop the workers (``cancel=True`` drops tasks not yet started). Idempotent."""
        if not self._closed:
            self._closed = True
            self._impl.close(cancel=cancel)

    def __enter__(self) -> Backend:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        self.close(cancel=exc_type is not None)

    def __repr__(self) -> str:
        state = "closed" if self._closed else "open"
        return f"Backend(kind={self.kind!r}, workers={self.n_workers}, {state})"


def open_backend(
    workers: int | None = None, scheduler: str | None = None, dask_local: int | None = None
) -> Backend:
    """Open a backend that stays open across batches of runs.

    Parameters
    ----------
    workers : int, optional
        Local worker processes (default: the CPUs available; 1 runs in this process).
    scheduler : str, optional
        Address of a Dask scheduler (``"tcp://host:8786"``).
    dask_local : int, optional
        Start a local Dask cluster of this many worker processes.

    Returns
    -------
    Backend

    Examples
    --------
    >>> with open_backend(workers=2) as backend:  # doctest: +SKIP
    ...     first = backend.run(plans[:10])
    ...     store = run_plans(plans[10:], "results/next", backend=backend)
    """
    _check_backend(workers, scheduler, dask_local)
    if scheduler is not None:
        return Backend(_Dask(scheduler=str(scheduler)))
    if dask_local is not None:
        return Backend(_Dask(local=int(dask_local)))
    n = workers or available_cpus()
    return Backend(_InProcess() if n == 1 else _LocalPool(n))


# -- the sweep loop ------------------------------------------------------------------------
class _Batcher:
    """Batch sizes from the observed cost per run (median of the runs seen so far)."""

    def __init__(self, n_workers: int, inline: bool, target: float = TARGET_TASK_SECONDS) -> None:
        self.n_workers = n_workers
        self.inline = inline
        self.target = target
        self.durations: deque[float] = deque(maxlen=256)

    def observe(self, results: Sequence[RunResult]) -> None:
        self.durations.extend(r.duration for r in results)

    def size(self, remaining: int) -> int:
        if self.inline or not self.durations:
            return 1  # in-process there is no task overhead; elsewhere the first tasks are pilots
        cost = max(sorted(self.durations)[len(self.durations) // 2], 1e-6)
        wanted = math.ceil(self.target / cost)
        # Leave at least two tasks per worker for the rest of the sweep, so the end is balanced.
        balance = max(1, math.ceil(remaining / (2 * self.n_workers)))
        return max(1, min(wanted, balance, 10_000))


class _Progress:
    """Progress of a sweep on stderr: a rich bar on a terminal, plain lines elsewhere, or nothing.

    ``total`` counts every run of the experiment and ``done`` those already stored (a resumed
    or grown sweep starts there, and says so). Plain lines (batch jobs, logs) come every
    ``interval`` seconds from a background thread, so the elapsed clock ticks between runs too:
    ``propensim: NAME: 12/48 runs done, 0 failed, elapsed 0:00:30, ETA 0:01:30``.
    """

    def __init__(
        self,
        enabled: bool,
        total: int,
        label: str,
        *,
        done: int = 0,
        plain: bool = False,
        interval: float | None = None,
    ) -> None:
        import threading

        self._bar = None
        self._thread = None
        self.failed = 0
        self.total, self.done, self.already, self.label = total, done, done, label
        self.lines = 0
        self._t0 = time.monotonic()
        self._stop = threading.Event()
        if plain and not enabled:
            self.interval = progress_interval() if interval is None else float(interval)
            if done:
                self._line(
                    f"resuming: {done} of {total} runs already stored, {total - done} to run"
                )
            self._thread = threading.Thread(
                target=self._tick, name="propensim-progress", daemon=True
            )
            self._thread.start()
            return
        if not enabled:
            return
        from rich.console import Console
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeElapsedColumn,
            TimeRemainingColumn,
        )

        self._bar = Progress(
            TextColumn("[bold]{task.description}"),
            BarColumn(),
            MofNCompleteColumn(),
            TextColumn("failed {task.fields[failed]}"),
            TimeElapsedColumn(),
            TextColumn("ETA"),
            TimeRemainingColumn(),
            console=Console(stderr=True),
        )
        text = f"{label} ({done} already stored)" if done else label
        self._task = self._bar.add_task(text, total=total, completed=done, failed=0)
        self._bar.start()

    @staticmethod
    def _clock(seconds: float) -> str:
        s = int(round(seconds))
        return f"{s // 3600}:{s // 60 % 60:02d}:{s % 60:02d}"

    def _line(self, text: str) -> None:
        print(f"propensim: {self.label}: {text}", file=sys.stderr, flush=True)
        self.lines += 1

    def status(self) -> str:
        """``12/48 runs done, 0 failed, elapsed 0:00:30, ETA 0:01:30`` (ETA from this session)."""
        elapsed = time.monotonic() - self._t0
        new = self.done - self.already
        left = self.total - self.done
        eta = self._clock(elapsed / new * left) if new > 0 else "unknown"
        return (
            f"{self.done}/{self.total} runs done, {self.failed} failed, "
            f"elapsed {self._clock(elapsed)}, ETA {eta if left else '0:00:00'}"
        )

    def _tick(self) -> None:
        while not self._stop.wait(self.interval):
            self._line(self.status())

    def advance(self, n: int, failed: int) -> None:
        self.failed += failed
        self.done += n
        if self._bar is not None:
            self._bar.update(self._task, advance=n, failed=self.failed)

    def close(self) -> None:
        if self._thread is not None:
            self._stop.set()
            self._thread.join()
            self._thread = None
            if self.lines:
                self._line(self.status())
        if self._bar is not None:
            self._bar.stop()


def progress_interval() -> float:
    """Seconds between plain progress lines: ``PROPENSIM_PROGRESS_SECONDS``, default 30."""
    try:
        value = float(os.environ.get("PROPENSIM_PROGRESS_SECONDS", "30"))
    except ValueError:
        return 30.0
    return value if value > 0 else 30.0


def show_progress() -> bool:
    """Default for the progress bar: only when stderr is a terminal and ``CI`` is not set."""
    return bool(getattr(sys.stderr, "isatty", lambda: False)()) and not os.environ.get("CI")


def _first_line(text: str | None) -> str:
    lines = str(text or "").strip().splitlines()
    return lines[0] if lines else ""


def _sweep(
    backend, todo: list[RunPlan], store: Store, *, fail_fast, progress, flush_interval
) -> None:
    queue = deque(todo)
    inflight: dict[Any, list[RunPlan]] = {}
    target = DASK_TARGET_TASK_SECONDS if isinstance(backend, _Dask) else TARGET_TASK_SECONDS
    batcher = _Batcher(backend.n_workers, inline=isinstance(backend, _InProcess), target=target)
    max_inflight = 1 if isinstance(backend, _InProcess) else 2 * backend.n_workers
    early: list[RunResult] = []
    last_flush = time.monotonic()
    warmed = False
    while queue or inflight:
        while queue and len(inflight) < max_inflight:
            n = batcher.size(len(queue))
            batch = [queue.popleft() for _ in range(min(n, len(queue)))]
            inflight[backend.submit(batch)] = batch
        if not warmed:  # import what flushing needs while the first tasks run, not after
            import pyarrow.parquet  # noqa: F401

            warmed = True
        for fut in backend.wait_any(list(inflight)):
            batch = inflight.pop(fut)
            try:
                results = fut.result()
            except Exception as exc:  # the task itself failed: a worker died, cannot unpickle
                results = [_task_failure(plan, exc) for plan in batch]
                if type(exc).__name__ == "BrokenProcessPool":
                    for r in results:
                        store.add(r)
                    store.flush()
                    cause = getattr(backend, "death_cause", lambda: None)()
                    cause = cause or "a worker process ended abruptly (cause unknown)"
                    raise SweepStopped(
                        f"{cause}; completed runs are stored: run again into {store.path} to "
                        "resume",
                        store,
                    ) from None
            # Tables stay column dicts: the store writes them with pyarrow, without building a
            # DataFrame per run and concatenating them (most of a flush's time before).
            batcher.observe(results)
            n_rows = n_failed = 0
            for r in results:
                rows = store.add(r)
                n_rows += rows
                n_failed += 0 if r.ok else rows
            progress.advance(n_rows, n_failed)
            for r in results:
                if len(early) < EARLY_FAILURES:
                    early.append(r)
            first_failure = next((r for r in results if not r.ok), None)
            if fail_fast and first_failure is not None:
                store.flush()
                raise SweepStopped(
                    f"run {first_failure.index} failed ({first_failure.error_type}: "
                    f"{_first_line(first_failure.error_message)}); stopped (fail-fast); "
                    f"tracebacks in {store.path / 'failures.parquet'}",
                    store,
                )
            if (
                len(early) == EARLY_FAILURES
                and all(not r.ok for r in early)
                and len({r.error_type for r in early}) == 1
            ):
                store.flush()
                raise SweepStopped(
                    f"the first {EARLY_FAILURES} runs all failed with {early[0].error_type} "
                    f"({_first_line(early[0].error_message)}); the spec is probably wrong; "
                    f"tracebacks in {store.path / 'failures.parquet'}",
                    store,
                )
        # Rewriting runs.parquet costs more as it grows: never spend over ~1/6 of the time on it
        # (flush_interval=0 commits after every task, for tests).
        interval = max(flush_interval, 5 * store.last_flush_seconds) if flush_interval else 0.0
        if time.monotonic() - last_flush >= interval:
            store.flush()
            last_flush = time.monotonic()
    store.flush()


_NUMBER = r"-?\d+(?:\.\d+)?(?:e[-+]?\d+)?"


def merge_warnings(counts: Mapping[str, int]) -> dict[str, int]:
    """One line per kind of warning: messages that differ only in their numbers become one.

    Each number that differs is shown as its range over the runs (``3-12 of 40 traders ...``);
    the run counts add up. Messages with other differences stay apart.
    """
    import re

    groups: dict[str, list[str]] = {}
    for msg in counts:
        groups.setdefault(re.sub(_NUMBER, "#", msg), []).append(msg)
    out: dict[str, int] = {}
    for shape, msgs in groups.items():
        total = sum(counts[m] for m in msgs)
        if len(msgs) == 1:
            out[msgs[0]] = total
            continue
        columns = list(zip(*(re.findall(_NUMBER, m) for m in msgs), strict=True))
        pieces = shape.split("#")
        text = pieces[0]
        for piece, col in zip(pieces[1:], columns, strict=True):
            values = sorted({float(x) for x in col})
            shown = {float(x): x for x in col}
            lo, hi = shown[values[0]], shown[values[-1]]
            text += (lo if lo == hi else f"{lo}-{hi}") + piece
        out[text] = out.get(text, 0) + total
    return out


def _task_failure(plan: RunPlan, exc: BaseException) -> RunResult:
    return RunResult(
        run_id=plan.run_id,
        index=int(plan.index),
        status="failed",
        error_type=type(exc).__name__,
        error_message=str(exc),
        traceback="".join(_traceback.format_exception(exc)),
        worker="",
        finished=_utc_now(),
    )


def _metric_names(plans: Sequence[RunPlan]) -> list[str]:
    from propensim.markets.engine import DEFAULT_METRICS

    names: list[str] = []
    for plan in plans:
        listed = plan.config.get("metrics")
        for m in DEFAULT_METRICS if listed is None else listed:
            name = m.get("name") if isinstance(m, Mapping) else m
            if isinstance(name, str) and name not in names:
                names.append(name)
    return names


def run_plans(
    plans: Sequence[RunPlan],
    out,
    *,
    name: str = "experiment",
    metrics: Sequence[str] | None = None,
    fingerprint: str | None = None,
    spec: dict[str, Any] | None = None,
    spec_toml: str | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
    dask_local: int | None = None,
    fail_fast: bool = False,
    progress: bool | None = None,
    flush_interval: float = 1.0,
    command: Sequence[str] | None = None,
    backend: Backend | None = None,
) -> Store:
    """Run plans into a results folder, resuming what is already stored there.

    The lower-level form of :func:`run_experiment`, for plans built without a spec file.
    Runs already stored ``ok`` in ``out`` are skipped; failed ones are tried again. Plans with
    the same ``run_id`` are computed once.

    Parameters
    ----------
    plans : sequence of RunPlan
        Unique ``index`` values.
    out : str or Path
        Results folder (created if missing).
    name, metrics, fingerprint, spec, spec_toml
        Recorded in the manifest; ``metrics`` defaults to those the plans configure and
        ``fingerprint`` to a hash of the plans.
    workers, scheduler, dask_local, fail_fast, progress
        See :func:`run_experiment`.
    flush_interval : float
        Seconds between commits to the folder (at most this much work is lost to a crash).
    backend : Backend, optional
        An open backend (:func:`open_backend`) to run on instead of opening one from
        ``workers``/``scheduler``/``dask_local``; it is left open.

    Returns
    -------
    Store

    Raises
    ------
    SweepStopped
        After fail-fast, repeated identical failures, or a dead worker; results so far are stored.
    StoreError
        If ``out`` holds another experiment or unreadable files.
    """
    plans = sorted(plans, key=lambda p: p.index)
    shared = backend  # an open Backend, used and left open
    indices = [p.index for p in plans]
    if len(set(indices)) != len(indices):
        raise ValueError("plans must have distinct index values")
    _check_backend(workers, scheduler, dask_local)
    metrics = list(metrics) if metrics is not None else _metric_names(plans)
    fingerprint = fingerprint or plans_fingerprint(plans)
    store = Store.create(
        Path(out),
        plans=plans,
        metrics=metrics,
        fingerprint=fingerprint,
        name=name,
        spec=spec,
        spec_toml=spec_toml,
        root_seed=plans[0].seed_entropy if plans else None,
        command=command,
    )
    ok = store.ok_ids()
    todo: list[RunPlan] = []
    seen: set[str] = set()
    for plan in plans:  # one plan per distinct run_id, in index order
        if plan.run_id not in ok and plan.run_id not in seen:
            seen.add(plan.run_id)
            todo.append(plan)
    pending_rows = sum(1 for p in plans if p.run_id not in ok)
    backend = None
    status = "complete"
    enabled = (show_progress() if progress is None else bool(progress)) and bool(todo)
    # Not a terminal (a batch job, a log file): plain lines at a steady interval instead.
    plain = progress is None and not enabled and bool(todo)
    done = len(plans) - pending_rows
    bar = _Progress(enabled, len(plans), name, done=done, plain=plain)
    try:
        if todo:
            if shared is not None:
                backend = shared._live()
            else:
                backend = _backend(workers, scheduler, dask_local, len(todo))
            store.manifest["backend"] = backend.describe()
            from propensim.experiments.local_plugins import manifest_entries

            if used := manifest_entries(todo):  # the spec's plugin modules, by content
                store.manifest["plugins"] = used
            _sweep(
                backend,
                todo,
                store,
                fail_fast=fail_fast,
                progress=bar,
                flush_interval=flush_interval,
            )
    except SweepStopped:
        status = "stopped"
        raise
    except KeyboardInterrupt:
        status = "interrupted"
        raise
    except BaseException:
        status = "crashed"
        raise
    finally:
        bar.close()
        if backend is not None and shared is None:
            backend.close(cancel=status != "complete")
        if store.counts()["failed"] and status == "complete":
            status = "complete-with-failures"
        store.finish(status)
        for msg, count in merge_warnings(store.warnings).items():
            warnings.warn(f"{msg} ({count} run(s))", RuntimeWarning, stacklevel=3)
    return store


# -- experiments ---------------------------------------------------------------------------
def _as_spec(spec_or_path, overrides: Sequence[str]):
    from propensim.experiments.spec import load_spec

    if hasattr(spec_or_path, "runs") and hasattr(spec_or_path, "fingerprint"):
        if not overrides:
            return spec_or_path
        return load_spec(spec_or_path.resolved(), overrides)
    return load_spec(spec_or_path, overrides)


def default_out(name: str) -> Path:
    """Where an experiment's results go by default: ``./results/<name>``."""
    return Path("results") / name


def run_experiment(
    spec_or_path,
    out=None,
    *,
    workers: int | None = None,
    scheduler: str | None = None,
    dask_local: int | None = None,
    fail_fast: bool = False,
    overrides: Sequence[str] = (),
    progress: bool | None = None,
) -> Store:
    """Run every run of an experiment into its results folder.

    Parameters
    ----------
    spec_or_path : Spec, str, Path or mapping
        A loaded spec, a TOML spec file, or the same structure as a dict.
    out : str or Path, optional
        Results folder; default ``./results/<experiment name>``. Running the same spec into the
        same folder again resumes: completed runs are skipped, failed runs tried again. A changed
        spec is refused.
    workers : int, optional
        Local worker processes (default: the CPUs available; 1 runs in this process).
    scheduler : str, optional
        Address of a Dask scheduler to run on instead (``"tcp://host:8786"``).
    dask_local : int, optional
        Start a local Dask cluster of this many worker processes instead.
    fail_fast : bool
        Stop at the first failed run.
    overrides : sequence of str
        ``"dotted.path=value"`` changes to the spec (as ``--set`` on the command line).
    progress : bool, optional
        Show a progress bar; default only when stderr is a terminal and ``CI`` is not set.

    Returns
    -------
    Store
        The results folder; ``store.load()`` reads it back, ``store.counts()`` counts runs.

    Raises
    ------
    SpecError
        The spec is invalid (nothing is run).
    StoreError
        ``out`` holds another experiment, or unreadable files (nothing is changed).
    SweepStopped
        The sweep stopped early; what finished is stored.
    """
    spec = _as_spec(spec_or_path, overrides)
    plans = spec.runs()
    out = Path(out) if out is not None else default_out(spec.name)
    store = run_plans(
        plans,
        out,
        name=spec.name,
        metrics=list(spec.metrics),
        fingerprint=spec.fingerprint(),
        spec=spec.resolved(),
        spec_toml=spec.to_toml(),
        workers=workers,
        scheduler=scheduler,
        dask_local=dask_local,
        fail_fast=fail_fast,
        progress=progress,
    )
    if len(spec.arm_names) > 1:
        from propensim.experiments.compare import compare_folder

        store.comparison = compare_folder(store.path)
        store.write_text("comparison.csv", store.comparison.to_csv(index=False))
    return store
