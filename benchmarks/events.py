"""Event mode benchmark: events per second of the whole engine against a plain Python loop.

Usage::

    python benchmarks/events.py [--quick] [--repeats N] [--json OUT] [--no-memory]

Side by side in one run, at 1e3 and 1e5 channels (complete buyer-seller networks of 40 x 25 and
500 x 200 traders):

``engine tree`` / ``engine direct``
    :class:`propensim.markets.events.EventMarket` end to end: event selection, the trade, updates
    of the touched channels, the checked and settled ledger (kept), per-window metrics. Built
    first (not timed), warmed up once (loading the compiled code), then timed over a run of about
    ``--seconds`` of work; the median over repeats is reported, wall clock and process CPU
    (the sides are timed in turns, repeat by repeat, so a busy spell hits all of them).
``plain``
    Gillespie's direct method as a user would write it in Python: one ``random`` call per
    choice, the total rate recomputed with ``sum`` every event, a walk over the rate list, stock
    and cash in lists, a ledger of tuples.
``sell-out``
    The engine tree with each seller holding its share of the run's events, run until every
    seller has sold out and every channel has left the sum (touched channels updated).

Memory: peak resident memory (``VmHWM``) of a fresh process that builds a market of 1e6 channels
(2000 x 500 traders, ledger kept) and runs 1e6 events; ``tracemalloc``'s peak of the build and
run beside it (numpy reports its buffers to tracemalloc).

Targets (issue 11): >= 2e6 events/s at 1e3 channels, >= 1e6 at 1e5, >= 100x the plain loop at
1e3, < 500 MB at 1e6 channels. Nothing fails for being slow: the numbers are printed, and written
to ``--json OUT`` if given. The machine is shared: run it two or three times and take the median.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import statistics
import subprocess
import sys
import textwrap
import time

SIZES = {1_000: (40, 25), 100_000: (500, 200)}
POPULATION = {"value": [80.0, 120.0], "cost": [60.0, 100.0], "shade": 10.0, "sigma": 8.0}


def config(nb: int, ns: int, method: str, horizon: float, stock: int = 10**12) -> dict:
    """An event market of ``nb x ns`` channels (complete network), ledger kept."""
    return {
        "population": {"n_buyers": nb, "n_sellers": ns, "stock": stock, **POPULATION},
        "network": {"name": "complete"},
        "metrics": ["volume", "mean_price"],
        "market": {"keep_ledger": True},
        "events": {"rate": 1.0, "method": method, "horizon": horizon, "window": horizon / 4},
    }


def time_engine(nb, ns, method, seconds, repeats, sell_out=False):
    """Median events/s (wall and CPU) of whole runs sized to take about ``seconds``.

    ``sell_out``: each seller holds about its share of the run's events, and the run lasts until
    every seller has sold out (every channel has left the sum).
    """
    from propensim.markets.events import build_event_market

    build_event_market(config(2, 2, method, 1.0), 0).run()  # load the compiled code
    rate = build_event_market(config(nb, ns, method, 1.0), 1).total_rate
    pilot = build_event_market(config(nb, ns, method, 2e4 / rate), 2)  # about 2e4 events
    t0 = time.perf_counter()
    pilot.run()
    guess = max(pilot.events / max(time.perf_counter() - t0, 1e-6), 1.0)  # events/s
    horizon, stock = seconds * guess / rate, 10**12
    if sell_out:
        stock = max(1, int(seconds * guess / ns))
        horizon = 1e6 * ns * stock / rate  # far beyond the last sale: the run ends sold out
    wall, cpu, events = [], [], []
    for r in range(repeats):
        market = build_event_market(config(nb, ns, method, horizon, stock), 10 + r)
        t0, c0 = time.perf_counter(), time.process_time()
        market.run()
        dt, dc = time.perf_counter() - t0, time.process_time() - c0
        if sell_out and market.total_rate != 0:
            raise RuntimeError("sell-out run ended with live channels")
        wall.append(market.events / dt)
        cpu.append(market.events / dc)
        events.append(market.events)
    return {
        "events_per_s": statistics.median(wall),
        "events_per_s_cpu": statistics.median(cpu),
        "events": int(statistics.median(events)),
        "repeats": wall,
        "rate_total": rate,
    }


def plain_direct_method(rates, buyer, seller, mean, sd, stock, cash, by_seller, n_events, seed):
    """Gillespie's direct method in plain Python, one ``random`` call per choice."""
    rng = random.Random(seed)
    t = 0.0
    ledger = []
    for _ in range(n_events):
        total = sum(rates)  # recomputed every event
        if total <= 0:
            break
        t += rng.expovariate(total)
        target = rng.random() * total
        acc = 0.0
        e = 0
        for r in rates:
            acc += r
            if target < acc:
                break
            e += 1
        b, s = buyer[e], seller[e]
        price = rng.gauss(mean[e], sd[e])
        if price > cash[b]:
            continue
        stock[s] -= 1
        stock[b] += 1
        cash[b] -= price
        cash[s] += price
        ledger.append((t, b, s, price))
        if stock[s] == 0:
            for j in by_seller[s]:
                rates[j] = 0.0
    return ledger


def time_plain(nb, ns, seconds, repeats):
    """Median events/s of the plain loop on the same market (lists built from the engine's)."""
    from propensim.markets.events import build_event_market

    m = build_event_market(config(nb, ns, "direct", 1.0), 1)
    n_e = m.network.n_edges
    rates = [float(x) for x in m._rates[:n_e]]
    buyer, seller = m._buyer.tolist(), m._seller.tolist()
    mean, sd = m._chan[:, 0].tolist(), m._chan[:, 1].tolist()
    by_seller = {}
    for e, s in enumerate(seller):
        by_seller.setdefault(s, []).append(e)
    t0 = time.perf_counter()
    plain_direct_method(list(rates), buyer, seller, mean, sd, m.population.stock.tolist(),
                        m.population.cash.tolist(), by_seller, 20, 0)  # fmt: skip
    per_event = (time.perf_counter() - t0) / 20
    n_events = max(20, int(seconds / per_event))
    wall, cpu = [], []
    for r in range(repeats):
        stock, cash = m.population.stock.tolist(), m.population.cash.tolist()
        t0, c0 = time.perf_counter(), time.process_time()
        done = plain_direct_method(list(rates), buyer, seller, mean, sd, stock, cash, by_seller,
                                   n_events, r)  # fmt: skip
        dt, dc = time.perf_counter() - t0, time.process_time() - c0
        wall.append(len(done) / dt)
        cpu.append(len(done) / dc)
    return {"events_per_s": statistics.median(wall), "events_per_s_cpu": statistics.median(cpu),
            "events": n_events, "repeats": wall}  # fmt: skip


MEMORY_CHILD = textwrap.dedent(
    """
    import json, sys, time, tracemalloc
    def vmhwm():
        for line in open("/proc/self/status"):
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    import numpy as np
    from propensim.markets.events import build_event_market
    sys.path.insert(0, sys.argv[1])
    from events import config
    build_event_market(config(2, 2, "tree", 1.0), 0).run()
    base = vmhwm()
    tracemalloc.start()
    probe = build_event_market(config(2000, 500, "tree", 1.0), 1)
    horizon = 1e6 / probe.total_rate
    del probe
    t0 = time.perf_counter()
    m = build_event_market(config(2000, 500, "tree", horizon), 1)
    built = time.perf_counter() - t0
    after_build = vmhwm()
    t0 = time.perf_counter()
    m.run()
    ran = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    print(json.dumps({"channels": int(m.network.n_edges), "events": int(m.events),
                      "rss_after_imports_mb": base, "rss_after_build_mb": after_build,
                      "peak_rss_mb": vmhwm(), "tracemalloc_peak_mb": peak / 2**20,
                      "build_s": built, "run_s": ran}))
    """
)


def memory(here: str) -> dict:
    """Peak memory of a fresh process with 1e6 channels (see the module docstring)."""
    out = subprocess.run([sys.executable, "-c", MEMORY_CHILD, here], capture_output=True,
                         text=True, check=True)  # fmt: skip
    return json.loads(out.stdout.strip().splitlines()[-1])


def first_use_seconds() -> float:
    """A fresh process's first tiny run: numba import and loading the cached compiled code."""
    code = (
        "import time; t = time.perf_counter();"
        "from propensim.markets.events import build_event_market;"
        "build_event_market({'population': {'n_buyers': 2, 'n_sellers': 2},"
        "'events': {'horizon': 1.0}}, 0).run(); print(time.perf_counter() - t)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return float(out.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="shorter timings (about 20 s)")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--seconds", type=float, default=None, help="work per timed run")
    parser.add_argument("--json", default=None, help="also write the results here")
    parser.add_argument("--no-memory", action="store_true", help="skip the 1e6-channel process")
    args = parser.parse_args(argv)
    seconds = args.seconds or (0.3 if args.quick else 1.0)
    here = os.path.dirname(os.path.abspath(__file__))
    load = os.getloadavg()
    rows = []
    for n, (nb, ns) in SIZES.items():
        row = {"channels": n}
        sides = {
            "plain": (time_plain, ()),
            "tree": (time_engine, ("tree",)),
            "direct": (time_engine, ("direct",)),
            "sell_out": (time_engine, ("tree",)),
        }
        runs = {key: [] for key in sides}
        for _ in range(args.repeats):  # the sides in turns: a noisy machine hits all alike
            for key, (timed, extra) in sides.items():
                kw = {"sell_out": True} if key == "sell_out" else {}
                runs[key].append(timed(nb, ns, *extra, seconds, 1, **kw))
        for key, got in runs.items():
            row[key] = {
                "events_per_s": statistics.median(g["events_per_s"] for g in got),
                "events_per_s_cpu": statistics.median(g["events_per_s_cpu"] for g in got),
                "events": int(statistics.median(g["events"] for g in got)),
                "repeats": [g["events_per_s"] for g in got],
            }
        for key in ("tree", "direct", "sell_out"):
            row[f"ratio_{key}"] = row[key]["events_per_s"] / row["plain"]["events_per_s"]
            row[f"ratio_{key}_cpu"] = (
                row[key]["events_per_s_cpu"] / row["plain"]["events_per_s_cpu"]
            )
        rows.append(row)
    out = {
        "sizes": rows,
        "first_use_s": first_use_seconds(),
        "load_before": load,
        "load_after": os.getloadavg(),
        "targets": {
            "events_per_s_1e3": 2e6,
            "events_per_s_1e5": 1e6,
            "ratio_1e3": 100,
            "peak_rss_mb_1e6": 500,
        },  # fmt: skip
        "command": " ".join([os.path.basename(sys.executable), *sys.argv]),
        "date": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
    }
    if not args.no_memory:
        out["memory"] = memory(here)
    print(
        f"{'channels':>9} {'side':>9} {'events/s':>11} {'cpu ev/s':>11} {'x plain':>9} "
        f"{'x plain cpu':>12}"
    )
    for row in rows:
        for key in ("plain", "tree", "direct", "sell_out"):
            r = row[key]
            ratio = "" if key == "plain" else f"{row[f'ratio_{key}']:9.1f}"
            ratio_cpu = "" if key == "plain" else f"{row[f'ratio_{key}_cpu']:12.1f}"
            print(f"{row['channels']:>9} {key:>9} {r['events_per_s']:11.3g} "
                  f"{r['events_per_s_cpu']:11.3g} {ratio:>9} {ratio_cpu:>12}")  # fmt: skip
    if "memory" in out:
        mem = out["memory"]
        print(f"memory at {mem['channels']:.0f} channels, {mem['events']} events: peak RSS "
              f"{mem['peak_rss_mb']:.0f} MB (after imports {mem['rss_after_imports_mb']:.0f} MB), "
              f"tracemalloc peak {mem['tracemalloc_peak_mb']:.0f} MB")  # fmt: skip
    print(f"first use in a fresh process: {out['first_use_s']:.2f} s; load {load[0]:.2f}")
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(out, fh, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
