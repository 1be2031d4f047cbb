"""propensim benchmark suite: one command, a table on screen, JSON on disk.

Usage::

    python benchmarks/run.py [--quick] [--only NAME[,NAME...]] [--json OUT] [--repeats N]
                             [--no-plain-million]
    python benchmarks/run.py --markdown benchmarks/results/latest.json

Benchmarks (``--only`` names):

``matching``  one round of propensity matching with anchor (exact Ornstein-Uhlenbeck) drift:
              plain per-agent Mesa (``plain_mesa.py``) against the propensim engine, side by side.
``auctions``  the same for the uniform-price call auction and the continuous double auction.
``memory``    peak resident memory of a fresh process that builds 1e6 traders / 1e7 edges and
              runs 10 rounds.
``sweeps``    the 320-run design with ``mesa.batch_run`` (2 processes) against ``propensim run``
              (local pool, 2 workers); 1 against 2 workers; local pool against a local Dask cluster.
``scaling``   engine cost against network edges, traders and rounds.
``round``     microseconds per round of a 1e3-trader market with the default metrics and anchor +
              outcome drift (compiled kernels and numpy alone, each in its own process).

Every timing is a median over repeats, the engine and the plain model timed in turns within the
same run (the machine is shared and noisy). Build time is measured apart from the per-round time.
Results of a full run go to ``benchmarks/results/latest.json``, of a ``--quick`` or ``--only`` run
to ``benchmarks/results/partial.json`` (and to ``--json OUT`` if given); see
``benchmarks/README.md`` for what each figure means.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import math
import os
import platform
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import textwrap
import time
import traceback
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))

#: The market every benchmark uses unless it says otherwise (invented numbers). Preferred prices
#: start ``shade`` inside the value/cost range so that a good share of meetings trade.
POPULATION = {"value": [80.0, 120.0], "cost": [60.0, 100.0], "shade": 10.0, "sigma": 5.0}
#: Anchor drift: exact Ornstein-Uhlenbeck step toward each trader's value or cost.
DRIFT = {"eta": 1.0, "noise": 0.5, "dt": 1.0, "strength": 1.0}
#: Metrics both sides record every round (the plain model's DataCollector records the same two).
METRICS = ["volume", "mean_price"]
MEAN_DEGREE = 10.0


# -- helpers --------------------------------------------------------------------------------------
def engine_config(n, clearing="propensity", mean_degree=MEAN_DEGREE, metrics=METRICS, ledger=False):
    """Configuration of ``build_market`` for ``n`` traders (half buyers, half sellers)."""
    return {
        "population": {"n_buyers": n // 2, "n_sellers": n - n // 2, **POPULATION},
        "network": {"name": "erdos_renyi", "mean_degree": mean_degree},
        "clearing": clearing if isinstance(clearing, dict) else {"name": clearing},
        "drift": {"name": "anchor", **DRIFT},
        "metrics": list(metrics),
        "market": {"keep_ledger": ledger},
    }


def plain_params(n, mean_degree=MEAN_DEGREE, **extra):
    """Keyword arguments of the plain Mesa models for the same market."""
    pop = dict(POPULATION)
    return {
        "n_buyers": n // 2,
        "n_sellers": n - n // 2,
        "value": tuple(pop["value"]),
        "cost": tuple(pop["cost"]),
        "shade": pop["shade"],
        "sigma": pop["sigma"],
        "mean_degree": mean_degree,
        **DRIFT,
        **extra,
    }


def _median(xs):
    return statistics.median(xs) if xs else math.nan


def time_block(step, min_time):
    """Run ``step`` repeatedly for at least ``min_time`` seconds.

    Returns ``(wall, cpu)`` seconds per call: wall clock, and this process's CPU time (less
    sensitive to other jobs on a shared machine, blind to time spent waiting).
    """
    calls, start, cpu0 = 0, time.perf_counter(), time.process_time()
    while True:
        step()
        calls += 1
        elapsed = time.perf_counter() - start
        if elapsed >= min_time:
            return elapsed / calls, (time.process_time() - cpu0) / calls


def _serve(conn, build, min_time):
    """Child process: build one market, then time blocks of rounds when the parent asks."""
    import warnings

    warnings.simplefilter("ignore")  # build warnings (traders who cannot trade) clutter the table
    t0 = time.perf_counter()
    model = build()
    build_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    model.step()
    first_round_s = time.perf_counter() - t0
    edges = int(model.network.n_edges) if hasattr(model, "network") else None
    conn.send((build_s, first_round_s, edges))
    while conn.recv() == "repeat":
        conn.send(time_block(model.step, min_time))
    conn.close()


class Timed:
    """A market under test, alive in a process of its own: build time, first round, repeats.

    Each side runs in its own process, as a user would run it: the plain model's hundreds of
    thousands of Python objects would otherwise sit in the engine's heap too, and every full
    garbage collection the engine's round triggers would walk them (a cost the engine does not
    have on its own). The parent only asks for timed blocks, one side at a time.
    """

    def __init__(self, label, build, min_time):
        import multiprocessing

        ctx = multiprocessing.get_context("spawn")
        self._conn, child = ctx.Pipe()
        self._proc = ctx.Process(target=_serve, args=(child, build, min_time), daemon=True)
        self._proc.start()
        child.close()
        self.build_s, self.first_round_s, self.edges = self._conn.recv()
        self.label = label
        self.rounds = []
        self.cpu = []

    def repeat(self):
        self._conn.send("repeat")
        wall, cpu = self._conn.recv()
        self.rounds.append(wall)
        self.cpu.append(cpu)

    def close(self):
        try:
            self._conn.send("quit")
        except OSError:
            pass
        self._proc.join(timeout=60)

    @property
    def round_s(self):
        return _median(self.rounds)

    @property
    def cpu_s(self):
        return _median(self.cpu)


def side_by_side(builders, repeats, min_time):
    """Build each market in its own process, time them in turns ``repeats`` times; return the
    Timed objects (their processes ended)."""
    timed = {}
    try:
        for label, build in builders.items():
            timed[label] = Timed(label, build, min_time)
        if max(t.first_round_s for t in timed.values()) > 2.0:
            repeats = min(repeats, 2)  # slow rounds (seconds each): two repeats are enough
        for _ in range(repeats):
            for t in timed.values():
                t.repeat()
    finally:
        for t in timed.values():
            t.close()
    return timed


def _build_engine(n, clearing, kw, kernels, full=False):
    from propensim.markets.build import build_market

    # The compiled kernels ("numba": what every market gets when numba imports), or numpy alone.
    os.environ["PROPENSIM_KERNELS"] = kernels
    config = engine_config(n, clearing, **kw)
    if full:  # the default metrics, anchor + outcome drift
        del config["metrics"]
        config["drift"] = {"rules": [{"name": "anchor"}, {"name": "outcome"}], "noise": 0.5}
    return build_market(config, seed=12345, mesa=False)


def _build_plain(model_cls_name, n, extra):
    import plain_mesa

    return getattr(plain_mesa, model_cls_name)(**plain_params(n, **extra), rng=12345)


def _engine_builder(n, clearing, kernels="numba", full=False, **kw):
    import functools

    return functools.partial(_build_engine, n, clearing, kw, kernels, full)


def _plain_builder(model_cls, n, **extra):
    import functools

    return functools.partial(_build_plain, model_cls.__name__, n, extra)


def _row_for(bench, n, timed, plain_label="plain", engine_label="engine", note=""):
    e, p = timed.get(engine_label), timed.get(plain_label)
    row = {"bench": bench, "traders": n}
    if e is not None:
        row.update(
            engine_build_s=e.build_s,
            engine_round_s=e.round_s,
            engine_agent_rounds_per_s=n / e.round_s,
        )
        if e.edges is not None:
            row["edges"] = e.edges
    if p is not None:
        row.update(
            plain_build_s=p.build_s,
            plain_round_s=p.round_s,
            plain_agent_rounds_per_s=n / p.round_s,
        )
    if e is not None and p is not None:
        row["ratio"] = p.round_s / e.round_s
        row["ratio_cpu"] = p.cpu_s / e.cpu_s
    numpy_only = timed.get("engine_numpy")
    if numpy_only is not None:
        row["engine_numpy_round_s"] = numpy_only.round_s
        if p is not None:
            row["ratio_numpy"] = p.round_s / numpy_only.round_s
    if note:
        row["note"] = note
    return row


def _compare_sizes(bench, clearing, plain_cls, sizes, plain_sizes, engine_only, cfg, plain_extra):
    """Shared driver of benchmarks 1 and 2."""
    rows, notes = [], []
    last_plain = None
    for n in sizes:
        builders = {
            "engine": _engine_builder(n, clearing),
            "engine_numpy": _engine_builder(n, clearing, kernels="numpy"),
        }
        if n in plain_sizes:
            builders["plain"] = _plain_builder(plain_cls, n, **plain_extra)
        repeats = cfg.repeats if n <= 10**5 else max(2, cfg.repeats // 2)
        timed = side_by_side(builders, repeats, cfg.min_time)
        row = _row_for(bench, n, timed)
        if "plain" in timed:
            last_plain = (n, timed["plain"])
        elif last_plain is not None and n in engine_only:
            # Per-agent cost is linear in traders: extrapolate from the largest plain size run.
            n0, p0 = last_plain
            row["plain_round_s"] = p0.round_s * n / n0
            row["plain_build_s"] = p0.build_s * n / n0
            row["plain_agent_rounds_per_s"] = n0 / p0.round_s
            row["ratio"] = row["plain_round_s"] / row["engine_round_s"]
            row["ratio_numpy"] = row["plain_round_s"] / row["engine_numpy_round_s"]
            row["note"] = f"plain extrapolated linearly from {n0:.0e}"
            notes.append(f"{bench}: plain Mesa at {n:.0e} extrapolated linearly from {n0:.0e}")
        rows.append(row)
        _progress(row)
        del timed
    return rows, notes


def _progress(row):
    parts = [f"{k}={_fmt(v)}" for k, v in row.items()]
    print("  " + " ".join(parts), file=sys.stderr, flush=True)


# -- 1. propensity matching -----------------------------------------------------------------------
def bench_matching(cfg):
    import plain_mesa

    if cfg.quick:
        sizes, plain_sizes = (10**3, 10**4, 10**5), (10**3, 10**4, 10**5)
    else:
        sizes, plain_sizes = (10**3, 10**4, 10**5, 10**6), (10**3, 10**4, 10**5)
        if not cfg.no_plain_million:
            plain_sizes = (*plain_sizes, 10**6)
    rows, notes = _compare_sizes(
        "matching",
        {"name": "propensity", "meetings": 1},
        plain_mesa.PlainPropensityMarket,
        sizes,
        plain_sizes,
        engine_only=(10**6,),
        cfg=cfg,
        plain_extra={"meetings": 1},
    )
    notes.append(
        "one round = propensity matching (1 meeting per buyer) + anchor drift (exact OU) + "
        "volume and mean price; Erdos-Renyi bipartite network, mean degree 10"
    )
    notes.append(
        "engine = compiled kernels (what every market gets when numba imports, chosen at build); "
        "engine_numpy_round_s and ratio_numpy = numpy alone (PROPENSIM_KERNELS=numpy). Both "
        "give identical numbers"
    )
    startup = _kernels_startup()
    notes.append(
        f"compiled loops, one-off cost per process (import numba, load the cached code): "
        f"{startup:.2f} s"
    )
    return {
        "rows": rows,
        "notes": notes,
        "targets": {"ratio_at_1e3": 50, "ratio_at_1e5": 150},
        "kernels_startup_s": startup,
    }


KERNELS_STARTUP_CHILD = r"""
import os, time
os.environ["PROPENSIM_KERNELS"] = "numba"
import numpy as np
from propensim.markets.build import build_market
m = build_market({"population": {"n_buyers": 50, "n_sellers": 50},
                  "drift": {"name": "anchor", "noise": 0.5}}, seed=1, mesa=False)
t0 = time.perf_counter()
m.step()
print(time.perf_counter() - t0)
"""


def _kernels_startup():
    """Seconds a fresh process spends on its first round with the compiled loops (numba import
    and loading the cached code; compiling too, the very first time on a machine)."""
    subprocess.run([sys.executable, "-c", KERNELS_STARTUP_CHILD], capture_output=True, check=True)
    proc = subprocess.run(
        [sys.executable, "-c", KERNELS_STARTUP_CHILD],
        capture_output=True,
        text=True,
        check=True,
    )
    return float(proc.stdout.strip().splitlines()[-1])


# -- 2. auctions ----------------------------------------------------------------------------------
def bench_auctions(cfg):
    import plain_mesa

    rows, notes = [], []
    sizes = (10**3, 10**4) if cfg.quick else (10**3, 10**4, 10**5)
    r, n_ = _compare_sizes(
        "call_auction",
        {"name": "call_auction"},
        plain_mesa.PlainCallAuctionMarket,
        sizes,
        sizes,
        engine_only=(),
        cfg=cfg,
        plain_extra={},
    )
    rows += r
    notes += n_
    da_sizes = (10**3, 10**4) if cfg.quick else (10**3, 10**4, 10**5)
    da_plain = (10**3,) if cfg.quick else da_sizes
    r, n_ = _compare_sizes(
        "double_auction",
        {"name": "double_auction", "strategy": "zi_c"},
        plain_mesa.PlainDoubleAuctionMarket,
        da_sizes,
        da_plain,
        engine_only=da_sizes,
        cfg=cfg,
        plain_extra={"quotes_per_trader": 20, "strategy": "zi_c"},
    )
    rows += r
    notes += n_
    notes.append(
        "double auction: zi_c quotes, 20 quote arrivals per trader per round on both sides; "
        "the engine's book loop is compiled (numba_loops.double_auction_book)"
    )
    return {"rows": rows, "notes": notes, "targets": {"ratio_at_1e4": 30}}


# -- 1b. a small market's round -------------------------------------------------------------------
def bench_round(cfg):
    """Microseconds per round at 1e3 traders: default metrics, anchor + outcome drift."""
    n = 10**3
    builders = {
        "engine": _engine_builder(n, {"name": "propensity", "meetings": 1}, full=True),
        "engine_numpy": _engine_builder(
            n, {"name": "propensity", "meetings": 1}, kernels="numpy", full=True
        ),
    }
    repeats = max(cfg.repeats, 7)
    timed = side_by_side(builders, repeats, cfg.min_time)
    rows = []
    for label, t in timed.items():
        rows.append(
            {
                "bench": "round_1e3",
                "side": label,
                "traders": n,
                "round_us": t.round_s * 1e6,
                "round_us_min": min(t.rounds) * 1e6,
                "round_us_max": max(t.rounds) * 1e6,
                "cpu_us": t.cpu_s * 1e6,
                "build_s": t.build_s,
            }
        )
        _progress(rows[-1])
    return {
        "rows": rows,
        "notes": [
            "propensity matching (1 meeting per buyer) + anchor and outcome drift (noise 0.5) + "
            "the 11 default metrics, 1e3 traders, Erdos-Renyi mean degree 10, no ledger; "
            f"median of {repeats} blocks of >= {cfg.min_time} s (min and max beside it)"
        ],
        "targets": {"round_us": 60},
    }


# -- 3. memory ------------------------------------------------------------------------------------
MEMORY_CHILD = r"""
import json, resource, sys, time
def rss_mb():
    # VmHWM: peak resident set of this process image. ru_maxrss would also do, but on Linux it
    # keeps the parent's high-water mark across fork+exec, which a big harness inflates.
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
def maxrss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
n, degree, rounds = int(sys.argv[1]), float(sys.argv[2]), int(sys.argv[3])
config = json.loads(sys.argv[4])
import os
os.environ["PROPENSIM_KERNELS"] = sys.argv[5]
from propensim.markets.build import build_market
import numpy as np
base = rss_mb()
t0 = time.perf_counter()
m = build_market(config, seed=7, mesa=False)
build_s = time.perf_counter() - t0
after_build = rss_mb()
t0 = time.perf_counter()
m.run(rounds)
run_s = time.perf_counter() - t0
print(json.dumps({"traders": n, "edges": int(m.network.n_edges), "rounds": rounds,
                  "rss_after_imports_mb": base, "rss_after_build_mb": after_build,
                  "peak_rss_mb": rss_mb(), "ru_maxrss_mb": maxrss_mb(),
                  "build_s": build_s, "run_s": run_s}))
"""


def bench_memory(cfg):
    n = 10**6  # the full size even with --quick: it takes about 20 s
    degree = 20.0  # 1e6 traders x mean degree 20 / 2 = 1e7 buyer-seller edges
    rounds = 10
    config = engine_config(
        n,
        {"name": "propensity"},
        mean_degree=degree,
        metrics=["volume", "mean_price", "vwap"],
        ledger=True,
    )
    rows = []
    for kernels in ("numba", "numpy"):
        proc = subprocess.run(
            [
                sys.executable,
                "-c",
                MEMORY_CHILD,
                str(n),
                str(degree),
                str(rounds),
                json.dumps(config),
                kernels,
            ],
            capture_output=True,
            text=True,
            cwd=str(ROOT),
        )
        if proc.returncode != 0:
            msg = proc.stderr.strip().splitlines()[-1] if proc.stderr else "child failed"
            raise RuntimeError(msg)
        row = {"bench": "memory", "kernels": kernels}
        row.update(json.loads(proc.stdout.strip().splitlines()[-1]))
        rows.append(row)
        _progress(row)
    return {
        "rows": rows,
        "notes": [
            "fresh subprocess; peak_rss_mb = VmHWM of the child (ru_maxrss_mb alongside: on "
            "Linux it can carry the parent's peak over fork+exec); propensity matching + anchor "
            "drift, ledger kept, metrics volume/mean_price/vwap; kernels=numba includes numba "
            "and its compiled code"
        ],
        "targets": {"peak_rss_mb": 1024},
    }


# -- 4. sweeps ------------------------------------------------------------------------------------
def _spec_text(name, n, rounds, sigmas, meetings, replicates, mean_degree=MEAN_DEGREE, seed=2026):
    """A propensim spec: a grid over curve width and meetings per buyer, replicated."""
    pop = POPULATION
    return textwrap.dedent(
        f"""\
        [experiment]
        name = "{name}"
        seed = {seed}
        rounds = {rounds}
        replicates = {replicates}

        [population]
        n_buyers = {n // 2}
        n_sellers = {n - n // 2}
        value = {pop["value"]}
        cost = {pop["cost"]}
        shade = {pop["shade"]}
        sigma = {pop["sigma"]}

        [network]
        name = "erdos_renyi"
        mean_degree = {mean_degree}

        [clearing]
        name = "propensity"
        meetings = 1

        [drift]
        name = "anchor"
        eta = {DRIFT["eta"]}
        noise = {DRIFT["noise"]}
        dt = {DRIFT["dt"]}
        strength = {DRIFT["strength"]}

        [collect]
        rounds = true
        metrics = {json.dumps(METRICS)}

        [design]
        kind = "grid"

        [design.parameters]
        "population.sigma" = {list(sigmas)}
        "clearing.meetings" = {list(meetings)}
        """
    )


BATCH_RUN_CHILD = r"""
import json, sys, time
sys.path.insert(0, sys.argv[1])
import mesa, plain_mesa
spec = json.loads(sys.argv[2])
t0 = time.perf_counter()
out = mesa.batch_run(plain_mesa.PlainPropensityMarket, parameters=spec["parameters"],
                     number_processes=spec["processes"], iterations=spec["iterations"],
                     max_steps=spec["rounds"] - 1, data_collection_period=-1,
                     display_progress=False)
print(json.dumps({"runs": len(out), "inner_s": time.perf_counter() - t0}))
"""


def _timed_subprocess(args, env=None):
    t0 = time.perf_counter()
    proc = subprocess.run(args, capture_output=True, text=True, cwd=str(ROOT), env=env)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        tail = (proc.stderr or proc.stdout).strip().splitlines()[-3:]
        raise RuntimeError(f"{' '.join(map(str, args[:3]))} failed: {' | '.join(tail)}")
    return wall, proc.stdout


def _propensim_cmd():
    exe = shutil.which("propensim", path=str(Path(sys.executable).parent))
    return [exe] if exe else [sys.executable, "-m", "propensim.experiments.cli"]


def _sweep_seconds(folder):
    """Seconds from the start of the first run to the end of the last (process start-up, imports
    and worker start-up excluded), from the store's timings table (millisecond times); the
    manifest's start and end (whole seconds) when that table cannot be read."""
    try:
        import pandas as pd

        t = pd.read_parquet(Path(folder) / "timings.parquet")
        end = pd.to_datetime(t["finished"], format="ISO8601")
        start = end - pd.to_timedelta(t["duration_s"], unit="s")
        return float((end.max() - start.min()).total_seconds())
    except Exception:  # an older store layout: fall back to the manifest
        pass
    try:
        manifest = json.loads((Path(folder) / "manifest.json").read_text())
    except (OSError, ValueError):
        return math.nan
    start, end = (
        manifest.get("started") or manifest.get("start_time"),
        manifest.get("finished") or manifest.get("end_time"),
    )
    try:
        return (_dt.datetime.fromisoformat(end) - _dt.datetime.fromisoformat(start)).total_seconds()
    except (TypeError, ValueError):
        return math.nan


SPIN = "import time\nt = time.perf_counter()\nx = 0\nfor i in range(8_000_000):\n    x += i\n"


def _parallel_capacity():
    """How many CPU-bound processes this machine really runs at once (ideal: the core count).

    Times one pure-Python loop alone, then two at the same time: ``2 * alone / together``.
    On a shared virtual machine this is often well below 2, and it bounds any 2-worker speed-up.
    """

    def spin(k):
        t0 = time.perf_counter()
        procs = [subprocess.Popen([sys.executable, "-c", SPIN]) for _ in range(k)]
        for p in procs:
            p.wait()
        return time.perf_counter() - t0

    alone = _median([spin(1) for _ in range(3)])
    together = _median([spin(2) for _ in range(3)])
    return 2.0 * alone / together


def _median_run_seconds(folder):
    """Median duration of one run, from the store's timings table (NaN if unreadable)."""
    try:
        import pandas as pd

        return float(pd.read_parquet(Path(folder) / "timings.parquet")["duration_s"].median())
    except Exception:  # an older or different store layout: the figure is optional
        return math.nan


def _propensim_run(spec_path, out, extra, env=None):
    wall, _ = _timed_subprocess(
        [*_propensim_cmd(), "run", str(spec_path), "--out", str(out), "--quiet", *extra],
        env=None if env is None else {**os.environ, **env},
    )
    return wall, _sweep_seconds(out)


def _pilot_rounds(n, target_s):
    """Rounds at which one engine run of ``n`` traders takes about ``target_s`` seconds."""
    from propensim.markets.build import build_market

    config = engine_config(n, "propensity")
    t0 = time.perf_counter()
    m = build_market(config, seed=1, mesa=False)
    m.step()
    build = time.perf_counter() - t0
    per_round = _median([time_block(m.step, 0.1)[0] for _ in range(3)])
    return max(10, int((target_s - build) / per_round))


def _calibrated_rounds(n, target_s, tmp):
    """Rounds at which one run of the workers benchmark takes about ``target_s`` in a sweep.

    A pilot in this process gives a first guess; three runs through ``propensim run`` (the way
    the benchmark runs them: metrics, store and all) then rescale it to the measured duration.
    """
    rounds = _pilot_rounds(n, target_s)
    spec = tmp / "calibrate.toml"
    spec.write_text(_spec_text("bench-calibrate", n, rounds, (5.0,), (1,), 3))
    _propensim_run(spec, tmp / "calibrate", ["--workers", "1"], env=WORKERS_ENV)
    measured = _median_run_seconds(tmp / "calibrate")
    if math.isfinite(measured) and measured > 0:
        rounds = max(10, round(rounds * target_s / measured))
    return rounds


#: The workers benchmark pins the compiled kernels (the default when numba imports), so that a
#: missing or broken numba shows as an error rather than as a slower machine.
WORKERS_ENV = {"PROPENSIM_KERNELS": "numba"}


def bench_sweeps(cfg):
    rows, notes = [], []
    if cfg.quick:
        sigmas, meetings, reps, rounds = (4.0, 6.0), (1, 2), 5, 50
    else:
        sigmas, meetings, reps, rounds = (3.0, 4.0, 5.0, 6.0), (1, 2, 3, 4), 20, 100
    n = 1000
    n_runs = len(sigmas) * len(meetings) * reps
    tmp = Path(tempfile.mkdtemp(prefix="propensim-bench-"))
    try:
        spec = tmp / "design.toml"
        spec.write_text(_spec_text("bench-design", n, rounds, sigmas, meetings, reps))
        batch = {
            "parameters": {**plain_params(n), "sigma": list(sigmas), "meetings": list(meetings)},
            "processes": 2,
            "iterations": reps,
            "rounds": rounds,
        }
        walls = {"batch_run": [], "pool": [], "dask": []}
        inner = {"pool": [], "dask": []}
        # batch_run takes minutes a time; the pool and Dask sides (seconds) run in more pairs,
        # each pair back to back, so that each Dask/pool ratio compares like moments.
        pairs = cfg.sweep_repeats + (1 if cfg.quick else 3)
        for i in range(pairs):
            if i < cfg.sweep_repeats:
                w, out = _timed_subprocess(
                    [sys.executable, "-c", BATCH_RUN_CHILD, str(HERE), json.dumps(batch)]
                )
                walls["batch_run"].append(w)
            w, s = _propensim_run(spec, tmp / f"pool{i}", ["--workers", "2"])
            walls["pool"].append(w)
            inner["pool"].append(s)
            w, s = _propensim_run(spec, tmp / f"dask{i}", ["--dask-local", "2"])
            walls["dask"].append(w)
            inner["dask"].append(s)
        b, p, d = (_median(walls[k]) for k in ("batch_run", "pool", "dask"))
        pair_ratios = [dw / pw for dw, pw in zip(walls["dask"], walls["pool"], strict=True)]
        sweep_ratios = [ds / ps for ds, ps in zip(inner["dask"], inner["pool"], strict=True)]
        rows.append(
            {
                "bench": "sweep_design",
                "runs": n_runs,
                "traders": n,
                "rounds": rounds,
                "batch_run_s": b,
                "propensim_pool_s": p,
                "propensim_dask_s": d,
                "ratio": b / p,
                "dask_over_pool": _median(pair_ratios),
                "dask_over_pool_min": min(pair_ratios),
                "dask_over_pool_max": max(pair_ratios),
                "pool_sweep_s": _median(inner["pool"]),
                "dask_sweep_s": _median(inner["dask"]),
                "dask_over_pool_sweep": _median(sweep_ratios),
            }
        )
        _progress(rows[-1])
        # 1 against 2 workers, runs of about 1 s (0.3 s in quick mode).
        n_big = 10**4
        target = 0.3 if cfg.quick else 1.0
        big_rounds = _calibrated_rounds(n_big, target, tmp)
        n_long = 8 if cfg.quick else 16
        spec2 = tmp / "long.toml"
        spec2.write_text(_spec_text("bench-long", n_big, big_rounds, (5.0,), (1,), n_long))
        w1, w2, capacity = [], [], []
        for i in range(cfg.sweep_repeats + 1):
            capacity.append(_parallel_capacity())
            w1.append(_propensim_run(spec2, tmp / f"w1_{i}", ["--workers", "1"], WORKERS_ENV))
            w2.append(_propensim_run(spec2, tmp / f"w2_{i}", ["--workers", "2"], WORKERS_ENV))
        one, two = _median([w for w, _ in w1]), _median([w for w, _ in w2])
        rows.append(
            {
                "bench": "workers",
                "runs": n_long,
                "traders": n_big,
                "rounds": big_rounds,
                "run_s": _median_run_seconds(tmp / "w1_0"),
                "one_worker_s": one,
                "two_workers_s": two,
                "speedup": one / two,
                "one_worker_sweep_s": _median([s for _, s in w1]),
                "two_workers_sweep_s": _median([s for _, s in w2]),
                "speedup_sweep": _median([s for _, s in w1]) / _median([s for _, s in w2]),
                "machine_capacity": _median(capacity),
            }
        )
        _progress(rows[-1])
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    notes.append(
        "end-to-end wall clock of fresh processes (interpreter start, imports, store writes "
        "included); *_sweep_s from the first run's start to the last run's end (store timings): "
        "the same without interpreter, import and worker start-up; speedup_sweep is their ratio"
    )
    notes.append(f"batch_run: max_steps=rounds-1 so both sides run {rounds} rounds per run")
    notes.append(
        "dask_over_pool: median over back-to-back pairs (pool run, then Dask run) of their wall "
        "clock ratio, with the smallest and largest; dask_over_pool_sweep: the same for the sweep "
        "itself"
    )
    notes.append(
        "workers: compiled loops on from the first round (PROPENSIM_KERNELS=numba) in every "
        "process, so that one and two workers do the same work"
    )
    notes.append(
        "machine_capacity: 2 x (one CPU-bound process alone) / (two at once); the best 2-worker "
        "speed-up this machine allowed at that moment"
    )
    return {
        "rows": rows,
        "notes": notes,
        "targets": {
            "ratio": 10,
            "speedup": 1.8,
            "dask_over_pool": 1.10,
            "propensim_pool_s": 3.0,
        },
    }


# -- 5. scaling -----------------------------------------------------------------------------------
def bench_scaling(cfg):
    previous = os.environ.get("PROPENSIM_KERNELS")
    os.environ["PROPENSIM_KERNELS"] = "numba"  # the steady state of long runs (as `matching`)
    try:
        return _scaling(cfg)
    finally:
        if previous is None:
            os.environ.pop("PROPENSIM_KERNELS", None)
        else:
            os.environ["PROPENSIM_KERNELS"] = previous


def _scaling(cfg):
    from propensim.markets.build import build_market

    build_market(engine_config(2000, "propensity"), seed=1, mesa=False).run(2)  # load kernels
    rows = []
    n = 2 * 10**4 if cfg.quick else 10**5
    for degree in (5.0, 10.0, 20.0, 40.0):
        t0 = time.perf_counter()
        m = build_market(engine_config(n, "propensity", mean_degree=degree), seed=3, mesa=False)
        build = time.perf_counter() - t0
        m.step()
        per = _median([time_block(m.step, cfg.min_time)[0] for _ in range(cfg.repeats)])
        e = m.network.n_edges
        rows.append(
            {
                "bench": "scale_edges",
                "traders": n,
                "edges": e,
                "build_s": build,
                "ns_per_edge_build": build / e * 1e9,
                "round_s": per,
            }
        )
        _progress(rows[-1])
    sizes = (10**4, 3 * 10**4, 10**5) if cfg.quick else (10**4, 10**5, 10**6)
    for size in sizes:
        m = build_market(engine_config(size, "propensity"), seed=3, mesa=False)
        m.step()
        per = _median([time_block(m.step, cfg.min_time)[0] for _ in range(cfg.repeats)])
        rows.append(
            {
                "bench": "scale_traders",
                "traders": size,
                "edges": m.network.n_edges,
                "round_s": per,
                "ns_per_trader_round": per / size * 1e9,
            }
        )
        _progress(rows[-1])
    for rounds in (10, 20, 40, 80):
        times = []
        for _ in range(cfg.repeats):
            m = build_market(engine_config(n, "propensity"), seed=3, mesa=False)
            t0 = time.perf_counter()
            m.run(rounds)
            times.append(time.perf_counter() - t0)
        t = _median(times)
        rows.append(
            {
                "bench": "scale_rounds",
                "traders": n,
                "rounds": rounds,
                "run_s": t,
                "ms_per_round": t / rounds * 1e3,
            }
        )
        _progress(rows[-1])
    return {
        "rows": rows,
        "notes": [
            "build cost grows with edges (network sampling); a round of 1-meeting matching costs "
            "per active buyer, not per edge, so round_s stays flat as edges grow",
            "linear growth shows as flat ns_per_edge_build, ns_per_trader_round, ms_per_round",
        ],
    }


BENCHMARKS = {
    "matching": bench_matching,
    "auctions": bench_auctions,
    "memory": bench_memory,
    "sweeps": bench_sweeps,
    "scaling": bench_scaling,
    "round": bench_round,
}


# -- output ---------------------------------------------------------------------------------------
def _fmt(v):
    if isinstance(v, float):
        if math.isnan(v):
            return "-"
        if v == 0 or 1e-2 <= abs(v) < 1e5:
            return f"{v:.3g}" if abs(v) < 100 else f"{v:.0f}"
        return f"{v:.2e}"
    return str(v)


def print_table(name, result, file=sys.stdout):
    print(f"\n== {name} ==", file=file)
    if "error" in result:
        print(f"  FAILED: {result['error']}", file=file)
        return
    rows = result.get("rows", [])
    groups = {}
    for row in rows:
        groups.setdefault(tuple(k for k in row if k != "note"), []).append(row)
    for keys, group in groups.items():
        widths = [max(len(k), *(len(_fmt(r.get(k, ""))) for r in group)) for k in keys]
        print("  " + "  ".join(k.rjust(w) for k, w in zip(keys, widths, strict=True)), file=file)
        for r in group:
            cells = [_fmt(r.get(k, "")).rjust(w) for k, w in zip(keys, widths, strict=True)]
            print("  " + "  ".join(cells) + (f"   ({r['note']})" if "note" in r else ""), file=file)
    for note in result.get("notes", []):
        print(f"  note: {note}", file=file)
    if "targets" in result:
        print(f"  targets: {result['targets']}", file=file)


def markdown(out):
    """Markdown tables of a results dict (as written to latest.json), for docs/performance.md."""
    lines = []
    for name, result in out["benchmarks"].items():
        lines.append(f"### {name}\n")
        if result.get("error"):
            lines.append(f"failed: {result['error']}\n")
            continue
        groups = {}
        for row in result.get("rows", []):
            groups.setdefault(tuple(k for k in row if k != "note"), []).append(row)
        for keys, group in groups.items():
            lines.append("| " + " | ".join(keys) + " |")
            lines.append("|" + "---|" * len(keys))
            for r in group:
                cells = ["-" if r.get(k) is None else _fmt(r.get(k)) for k in keys]
                lines.append("| " + " | ".join(cells) + " |")
            lines.append("")
        for note in result.get("notes", []):
            lines.append(f"- {note}")
        lines.append("")
    return "\n".join(lines)


def machine():
    cpu = platform.processor() or ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    try:
        mem_gib = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    except (ValueError, OSError):
        mem_gib = math.nan
    versions = {}
    for mod in ("numpy", "scipy", "mesa", "networkx", "pandas"):
        try:
            versions[mod] = __import__(mod).__version__
        except Exception:  # a missing optional module is not an error here
            versions[mod] = None
    try:
        from importlib.metadata import version

        versions["propensim"] = version("propensim")
    except Exception:
        versions["propensim"] = None
    return {
        "cpu": cpu,
        "cores": os.cpu_count(),
        "memory_gib": round(mem_gib, 1),
        "python": platform.python_version(),
        "platform": platform.platform(),
        "versions": versions,
    }


def _clean(obj):
    """JSON-safe copy: NaN and infinities become null, numpy scalars plain numbers."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_clean(v) for v in obj]
    if hasattr(obj, "item") and not isinstance(obj, str):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes (1-2 minutes in all)")
    parser.add_argument("--only", default="", help="comma-separated: " + ", ".join(BENCHMARKS))
    parser.add_argument("--json", default=None, help="also write the JSON results here")
    parser.add_argument("--repeats", type=int, default=None, help="timing repeats (median)")
    parser.add_argument(
        "--no-plain-million",
        action="store_true",
        help="skip plain Mesa at 1e6 traders (extrapolate from 1e5 instead)",
    )
    parser.add_argument(
        "--markdown",
        metavar="JSON",
        default=None,
        help="print the tables of a results file as Markdown and exit",
    )
    args = parser.parse_args(argv)
    if args.markdown:
        print(markdown(json.loads(Path(args.markdown).read_text())))
        return 0
    names = [s.strip() for s in args.only.split(",") if s.strip()] or list(BENCHMARKS)
    unknown = [s for s in names if s not in BENCHMARKS]
    if unknown:
        parser.error(f"--only: unknown benchmark {unknown[0]!r}; known: {', '.join(BENCHMARKS)}")
    cfg = argparse.Namespace(
        quick=args.quick,
        repeats=args.repeats or (3 if args.quick else 5),
        min_time=0.05 if args.quick else 0.2,
        sweep_repeats=1 if args.quick else 2,
        no_plain_million=args.no_plain_million,
    )
    started = _dt.datetime.now(_dt.UTC)
    out = {
        "command": " ".join(
            ["python benchmarks/run.py", *(sys.argv[1:] if argv is None else argv)]
        ),
        "date": started.isoformat(timespec="seconds"),
        "quick": args.quick,
        "machine": machine(),
        "benchmarks": {},
    }
    for name in names:
        print(f"[{name}] running ...", file=sys.stderr, flush=True)
        t0 = time.perf_counter()
        load_before = os.getloadavg()
        try:
            result = BENCHMARKS[name](cfg)
        except Exception as exc:  # one failing benchmark must not lose the others' figures
            result = {"error": f"{type(exc).__name__}: {exc}", "traceback": traceback.format_exc()}
            print(result["traceback"], file=sys.stderr)
        result["seconds"] = time.perf_counter() - t0
        # Load averages (1, 5, 15 min) before and after: how busy the shared machine was.
        result["load_before"] = [round(x, 2) for x in load_before]
        result["load_after"] = [round(x, 2) for x in os.getloadavg()]
        out["benchmarks"][name] = result
        print_table(name, result)
    out["seconds"] = (_dt.datetime.now(_dt.UTC) - started).total_seconds()
    out["peak_rss_mb_harness"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    text = json.dumps(_clean(out), indent=2)
    # Only a full run replaces latest.json (the figures the docs cite); a quick or partial run
    # goes to partial.json beside it.
    results = HERE / "results"
    results.mkdir(exist_ok=True)
    kept = results / ("partial.json" if args.quick or args.only else "latest.json")
    kept.write_text(text)
    if args.json:
        Path(args.json).write_text(text)
    print(f"\nwrote {kept}" + (f" and {args.json}" if args.json else ""))
    failed = [n for n, r in out["benchmarks"].items() if "error" in r]
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
