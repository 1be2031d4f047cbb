"""Imported once by the workers' forkserver (see ``runner.WORKER_PRELOAD``), never elsewhere.

Importing it builds a small market of the common shape (propensity matching, anchor drift, the
default metrics but efficiency) and runs two rounds, one and two meetings per buyer. That imports
numba and loads the market's compiled kernels from the disk cache in the server, once; every
worker forked from it starts with them loaded instead of paying about 0.4 s (numba's import and
the cache loads) before its first run. Markets of other shapes load what they need when built,
as before. Nothing here can change a run: a market chooses its kernels when it is built, and
the warm-up draws only from its own seeded generators. Any failure is ignored (the forkserver
must start whatever happens; a real problem shows in the runs themselves).

The server then also ends without tearing its modules down (``os._exit`` at exit): with numba
loaded that took 0.25 s after the sweep had finished, and the server holds the sweep's stdout
and stderr, so a caller reading them waited that long for the end. It has nothing to flush, and
workers never run it (a forked worker leaves through ``os._exit`` of its own). Before forking,
the server freezes what it holds (``gc.freeze``).
"""

from __future__ import annotations

import atexit
import os
import sys


def warm() -> None:
    """Build and step the warm-up markets (errors and warnings swallowed)."""
    import warnings

    try:
        from propensim.plugins import acceleration

        if not acceleration.choose():  # PROPENSIM_KERNELS=numpy, or no numba: nothing to load
            return
        from propensim.markets.build import build_market
        from propensim.markets.engine import DEFAULT_METRICS

        metrics = [m for m in DEFAULT_METRICS if m != "efficiency"]  # scipy.optimize: 0.16 s
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for meetings in (1, 2):
                config = {
                    "population": {"n_buyers": 20, "n_sellers": 20},
                    "network": {"name": "erdos_renyi", "mean_degree": 4.0},
                    "clearing": {"name": "propensity", "meetings": meetings},
                    "drift": {"name": "anchor", "noise": 0.5},
                    "metrics": metrics,
                }
                build_market(config, 1, mesa=False).advance(2)
    except Exception:  # noqa: BLE001, S110 - a warm-up only; the runs report real problems
        pass


def _in_forkserver() -> bool:
    return sys.argv[:1] == ["-c"] and "multiprocessing.forkserver" in sys.modules


if _in_forkserver():
    warm()
    import gc

    # Common practice for a server that forks workers: what it holds moves out of the
    # collector's reach, so a worker's collections do not walk (and copy-on-write copy) the
    # inherited objects. Runs are unchanged (the collector frees, it never computes).
    gc.freeze()
    atexit.register(os._exit, 0)  # runs first at exit (last registered): no module teardown
