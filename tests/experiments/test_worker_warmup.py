"""The workers' forkserver loads numba's compiled kernels once, before any worker starts."""

import multiprocessing
from concurrent.futures import ProcessPoolExecutor

import pytest

from propensim.experiments import runner
from propensim.plugins import acceleration

# Evaluated in a worker, before it has run anything: how many kernels of numba_loops hold
# compiled code (KeyError if the module was never imported there).
LOADED_KERNELS = (
    "sum(bool(getattr(f, 'overloads', None)) for f in "
    "vars(__import__('sys').modules['propensim.plugins.numba_loops']).values())"
)


@pytest.mark.skipif(
    "forkserver" not in multiprocessing.get_all_start_methods(), reason="no forkserver here"
)
def test_a_fresh_worker_starts_with_the_kernels_loaded():
    if not acceleration.choose():
        pytest.skip("numba not importable, or PROPENSIM_KERNELS=numpy")
    with runner.pinned_threads(), runner._main_script_hidden():
        pool = ProcessPoolExecutor(max_workers=1, mp_context=runner._worker_context())
        try:
            loaded = pool.submit(eval, LOADED_KERNELS).result(timeout=120)
        finally:
            pool.shutdown()
    assert loaded >= 3  # ou_noise, settle, start_round, the matching kernels ...


def test_importing_the_warmup_elsewhere_does_nothing(monkeypatch):
    # Outside the forkserver the module neither builds markets nor ends the process at exit.
    import atexit
    import importlib
    import sys

    registered = []
    monkeypatch.setattr(atexit, "register", lambda *a, **k: registered.append(a))
    sys.modules.pop("propensim.experiments._worker_warmup", None)
    warmup = importlib.import_module("propensim.experiments._worker_warmup")
    assert not warmup._in_forkserver() and registered == []
