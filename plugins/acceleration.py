"""Compiled loops (numba) that give exactly the numbers of the numpy code they stand in for.

A round of a large market is bound by memory traffic and by the normal draws of the drift: numpy
makes one pass over a column per operation, and its standard-normal sampler costs about 9 ns a
draw on the machines we measure on. numba compiles NumPy's own ziggurat for
``Generator.standard_normal`` (same tables, same use of the bit stream), so one loop can draw and
combine in a single pass and still give the same numbers, bit for bit, and leave the generator
in the same state. Each kernel here has a numpy twin (the code that runs without it) and the
tests check that the two agree exactly; the operations keep numpy's order, so rounding is the
same too (numba does not contract ``a * b + c`` into a fused multiply-add unless asked).

When the kernels run:

* Only for columns of at least :data:`MIN_LENGTH` rows (below that numpy is as fast).
* ``PROPENSIM_KERNELS=numpy``: never. ``=numba``: from the first round. ``=auto`` (the default):
  once this process has stepped :data:`WORK_BEFORE_COMPILED` trader-rounds. Importing numba and
  loading the compiled code costs about 0.3 s once per process; small or short runs never pay
  it, long large ones earn it back many times. Because the results are identical either way,
  switching mid-run changes nothing but the speed.
* Without numba (not installed, or failing to import) everything runs on numpy.
"""

from __future__ import annotations

import os

import numpy as np

#: Shortest column worth a compiled call (a call costs a few microseconds of dispatch).
MIN_LENGTH = 4096
#: Trader-rounds this process steps on numpy before ``auto`` mode compiles: ~0.5 s of one-off
#: import and load against ~13 ns saved per trader-round.
WORK_BEFORE_COMPILED = 20_000_000

_state = {"work": 0, "module": None, "failed": False}


def mode() -> str:
    """``numpy``, ``numba`` or ``auto``, from ``PROPENSIM_KERNELS`` (default ``auto``)."""
    value = os.environ.get("PROPENSIM_KERNELS", "auto").strip().lower() or "auto"
    if value not in ("numpy", "numba", "auto"):
        raise ValueError(f"PROPENSIM_KERNELS must be numpy, numba or auto, got {value!r}")
    return value


def count_work(trader_rounds: int) -> None:
    """Record work done on numpy (``auto`` mode compiles once enough has been done)."""
    _state["work"] += int(trader_rounds)


def compiled(length: int):
    """The compiled kernels module if a column of ``length`` rows should use it, else None."""
    if length < MIN_LENGTH or _state["failed"]:  # small markets never read the setting
        return None
    how = mode()
    if how == "numpy":
        return None
    if how == "auto" and _state["work"] < WORK_BEFORE_COMPILED:
        return None
    module = _state["module"]
    if module is None:
        try:
            from propensim.plugins import numba_loops as module
        except Exception:  # numba missing or broken: numpy does the same work
            _state["failed"] = True
            return None
        _state["module"] = module
    return module


def ou_apply(mu, offset, decay, gain, sd, rng, out) -> bool:
    """``out = mu decay + offset gain + sd xi`` with ``xi`` standard normals drawn from ``rng``.

    The same numbers as :func:`propensim.plugins.drift._ou_apply` (one normal per row, in row
    order). ``offset``, ``decay``, ``gain`` and ``sd`` are scalars or columns. Returns False,
    doing nothing, when the compiled kernel is not to be used (the caller then uses numpy).
    """
    module = compiled(mu.shape[0])
    if module is None:
        return False
    n = mu.shape[0]
    columns = [_strided(c) for c in (offset, decay, gain, sd)]
    if out.shape != (n,) or any(step and c.shape != (n,) for c, step in columns):
        raise ValueError("ou_apply: every column must have as many rows as mu")  # no bounds checks
    module.ou_noise(
        np.ascontiguousarray(mu, dtype=float), *(x for c in columns for x in c), rng, out
    )
    return True


def _strided(values) -> tuple[np.ndarray, int]:
    """A float column and its step: 0 repeats a scalar's single entry, 1 walks a column."""
    arr = np.asarray(values, dtype=float)
    if arr.ndim == 0:
        return arr.reshape(1), 0
    return np.ascontiguousarray(arr), 1


def settle(buyer, seller, quantity, buyer_pays, seller_gets, stock, cash) -> bool:
    """Compiled :meth:`~propensim.agents.population.Population.settle` (same order, same sums).

    Returns False, doing nothing, when not compiled here.
    """
    n = stock.shape[0]
    module = compiled(n)
    if module is None or stock.dtype != np.int64 or cash.dtype != np.float64 or cash.shape != (n,):
        return False
    b, s = buyer, seller
    if b.size and (min(b.min(), s.min()) < 0 or max(b.max(), s.max()) >= n):
        return False  # no bounds checks in the loop: numpy's ufunc.at raises the IndexError
    module.settle(b, s, quantity, buyer_pays, seller_gets, stock, cash)
    return True


def meet_one_width(rng, deg, start, seller, mu, first_row, scale):
    """Compiled first half of a propensity-matching round (see ``numba_loops.meet_one_width``).

    Returns ``(frac, partner, edge, arg)`` or None when not compiled here.
    """
    k = deg.shape[0]
    module = compiled(k)
    if module is None:
        return None
    if start.shape != (k,) or first_row < 0 or first_row + k > mu.shape[0]:
        raise ValueError("meet_one_width: buyer rows outside the population")  # no bounds checks
    frac, arg = np.empty(k), np.empty(k)
    partner, edge = np.empty(k, dtype=np.int64), np.empty(k, dtype=np.int64)
    module.meet_one_width(
        rng, deg, start, seller, mu, int(first_row), float(scale), frac, partner, edge, arg
    )
    return frac, partner, edge, arg


def prices_one_width(rng, mu, buyer, seller, sd: float, rows: int):
    """Joint-curve prices for traders of one width, or None when not compiled here.

    See ``numba_loops.prices_one_width``.
    """
    module = compiled(rows)
    if module is None:
        return None
    if buyer.shape != seller.shape or (buyer.size and max(buyer.max(), seller.max()) >= mu.size):
        raise ValueError("prices_one_width: rows outside mu")
    return module.prices_one_width(rng, mu, buyer, seller, float(sd))


def is_uniform(values: np.ndarray) -> bool:
    """True if a non-empty column holds one value (``min == max``), in one pass when compiled."""
    if values.size == 0:
        return False
    module = compiled(values.size) if values.ndim == 1 else None
    if module is None:
        return bool(values.min() == values.max())
    return bool(module.is_uniform(values))


def start_round(replenish, stock0, cash0, stock, cash, capacity, is_seller):
    """The units each trader may trade this round (None when not compiled here).

    Restores stock and cash first when ``replenish`` (see ``numba_loops.start_round``).
    """
    n = stock.shape[0]
    module = compiled(n)
    columns = (stock0, cash0, cash, capacity, is_seller)
    if module is None or any(c.shape != (n,) for c in columns):
        return None
    if stock.dtype != np.int64 or capacity.dtype != np.int64 or cash.dtype != np.float64:
        return None
    remaining = np.empty(n, dtype=np.int64)
    module.start_round(bool(replenish), stock0, cash0, stock, cash, capacity, is_seller, remaining)
    return remaining
