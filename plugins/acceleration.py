"""Compiled loops (numba) that give exactly the numbers of the numpy code they stand in for.

A round of a large market is bound by memory traffic and by the normal draws of the drift: numpy
makes one pass over a column per operation, and its standard-normal sampler costs about 9 ns a
draw on the machines we measure on. A round of a small market is bound by the fixed cost of each
numpy call (about a microsecond): one compiled pass per rule replaces many of them. numba
compiles NumPy's own ziggurat for ``Generator.standard_normal`` (same tables, same use of the bit
stream), so one loop can draw and combine in a single pass and still give the same numbers, bit
for bit, and leave the generator in the same state. Each kernel here has a numpy twin (the code
that runs without it) and the tests check that the two agree exactly; the operations keep
numpy's order, so rounding is the same too (numba does not contract ``a * b + c`` into a fused
multiply-add unless asked).

When the kernels run: whenever numba imports, at every size, unless ``PROPENSIM_KERNELS=numpy``
(``=numba`` or ``=auto``, the default, use them). A market makes the choice once, when it is
built (:func:`choose`), so a run is the same code from its first round to its last; nothing
counts work or switches mid-run. The compiled code is cached on disk (``cache=True``): a fresh
process loads it (about 0.3 s for importing numba, once per process, paid at the first build)
and never compiles it again. Without numba (not installed, or failing to import) everything runs
on numpy, with the same results.
"""

from __future__ import annotations

import os

import numpy as np

#: Kept for callers that still pass a length: columns of every length use the kernels now.
MIN_LENGTH = 0

_state = {"module": None, "failed": False}
_UNSET = object()
#: The kernels of the market whose round is running (its build-time choice), else unset.
_active = [_UNSET]


def mode() -> str:
    """``numpy``, ``numba`` or ``auto``, from ``PROPENSIM_KERNELS`` (default ``auto``)."""
    value = os.environ.get("PROPENSIM_KERNELS", "auto").strip().lower() or "auto"
    if value not in ("numpy", "numba", "auto"):
        raise ValueError(f"PROPENSIM_KERNELS must be numpy, numba or auto, got {value!r}")
    return value


def _load():
    """The kernels module, imported once per process (None if numba is missing or broken)."""
    module = _state["module"]
    if module is None and not _state["failed"]:
        try:
            from propensim.plugins import numba_loops as module
        except Exception:  # numba missing or broken: numpy does the same work
            _state["failed"] = True
            return None
        _state["module"] = module
    return module


def choose() -> bool:
    """Whether a market built now runs the compiled kernels (it asks once, when built).

    Importing numba and the cached kernels happens here, at build time, not in a first round.
    """
    return mode() != "numpy" and _load() is not None


def compiled(length: int = 0):
    """The compiled kernels module, or None when numpy is to do the work.

    Inside a market's round: that market's choice, made when it was built (see
    :func:`activate`). Elsewhere (a rule called by hand): ``PROPENSIM_KERNELS`` and whether
    numba imports. ``length`` is ignored (kernels serve columns of every length).
    """
    active = _active[0]
    if active is not _UNSET:
        return active
    if _state["failed"] or mode() == "numpy":
        return None
    return _load()


def activate(use: bool | None):
    """Run the kernels (True) or numpy (False) until the next call; None: back to the default.

    A market calls it around each round with the choice it made when built, so that its rules
    run the same code from the first round to the last, whatever other markets do.
    """
    _active[0] = _UNSET if use is None else (_load() if use else None)


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
    module.ou_noise(  # the same draws, in row order, from rng's own bit generator
        np.ascontiguousarray(mu, dtype=float), *(x for c in columns for x in c), _bits(rng), out
    )
    return True


def _bits(rng) -> np.ndarray:
    """The addresses a kernel draws from ``rng`` through (handing over a Generator costs ~10 us)."""
    bits_of = _state.get("bits_of")
    if bits_of is None:  # imported once (an import statement here costs ~1 us a call)
        from propensim.plugins.numba_bits import bits_of

        _state["bits_of"] = bits_of
    return bits_of(rng)


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
    # False for a row out of range (no bounds checks in the loop): numpy's ufunc.at raises.
    return module.settle(buyer, seller, quantity, buyer_pays, seller_gets, stock, cash)


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
    frac, arg = np.empty(k), np.empty(k)  # frac: the uniforms' fractional parts
    partner, edge = np.empty(k, dtype=np.int64), np.empty(k, dtype=np.int64)
    module.meet_one_width(
        _bits(rng), deg, start, seller, mu, int(first_row), float(scale), frac, partner, edge, arg
    )
    return frac, partner, edge, arg


def prices_one_width(rng, mu, buyer, seller, sd: float, rows: int):
    """Joint-curve prices for traders of one width, or None when not compiled here.

    See ``numba_loops.prices_one_width``.
    """
    module = compiled(rows)
    if module is None:
        return None
    if buyer.shape != seller.shape or not (
        module.within(buyer, mu.size) and module.within(seller, mu.size)
    ):
        raise ValueError("prices_one_width: rows outside mu")
    return module.prices_one_width(_bits(rng), mu, buyer, seller, float(sd))


def is_uniform(values: np.ndarray) -> bool:
    """True if a non-empty column holds one value (``min == max``), in one pass when compiled."""
    if values.size == 0:
        return False
    module = compiled(values.size) if values.ndim == 1 else None
    if module is None:
        return bool(values.min() == values.max())
    return bool(module.is_uniform(values))


def all_live(remaining, rows, span) -> bool:
    """Whether every buyer of the meetings table has units left: ``(remaining[rows] > 0).all()``.

    ``span`` is the table's slice of consecutive rows, or None; with a span, one compiled pass.
    """
    module = compiled() if span is not None else None
    if module is None or remaining.shape[0] < span.stop:
        return bool((remaining[rows if span is None else span] > 0).all())
    return bool(module.all_positive(remaining, span.start, span.stop))


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


def double_auction_book(who, is_bid, quote, rem, cash, partners, bounded, floor, ceiling):
    """The double auction's arrival loop, compiled (see ``numba_loops.double_auction_book``).

    ``partners`` is ``(sellers, b_ptr, buyers, s_ptr, comp)`` as int64 arrays. Updates ``rem``
    and ``cash`` in place; returns ``(buyer, seller, price)`` arrays, or None when not compiled.
    """
    module = compiled()
    if module is None:
        return None
    sellers, b_ptr, buyers, s_ptr, comp = partners
    n = rem.shape[0]
    if (
        cash.shape != (n,)
        or comp.shape != (n,)
        or b_ptr.shape != (n + 1,)
        or s_ptr.shape != (n + 1,)
        or who.shape != is_bid.shape
        or who.shape != quote.shape
        or not module.within(who, n)
    ):
        raise ValueError("double_auction_book: columns of different lengths")  # no bounds checks
    n_comp = int(comp.max()) + 1 if n else 1
    return module.double_auction_book(
        who,
        is_bid,
        quote,
        rem,
        cash,
        sellers,
        b_ptr,
        buyers,
        s_ptr,
        comp,
        n_comp,
        bool(bounded),
        float(floor),
        float(ceiling),
    )


def outcome_offset(pop, traded, step: float):
    """``OutcomeDrift``'s offset column in one compiled pass, or None when not compiled here.

    See ``numba_loops.outcome_offset``.
    """
    module = compiled()
    if module is None:
        return None
    n = pop.role.shape[0]
    traded = np.asarray(traded)
    columns = (pop.stock, pop.cash, pop.capacity, traded)
    if any(c.shape != (n,) for c in columns) or traded.dtype.kind not in "iu":
        return None
    out = np.empty(n)
    module.outcome_offset(pop.role, pop.stock, pop.cash, pop.capacity, traded, step, out)
    return out


def force_step(plan, pop, traded, rng):
    """The new ``mu`` of a drift sum of anchor and outcome forces, in one compiled pass.

    ``plan`` is ``(kinds, params, sum_from_zero, one_scale, coefficients, noisy)``, the
    arguments of ``numba_loops.force_step`` that do not change from round to round;
    ``traded`` the units each trader traded (None when no outcome force reads it). Returns
    None, doing nothing, when not compiled here, the columns do not fit the kernel or (with
    ``one_scale``) the traders' scales or widths differ.
    """
    module = compiled()
    if module is None:
        return None
    n = pop.mu.shape[0]
    traded = _NO_TRADES if traded is None else traded  # None: no outcome force
    if traded is not _NO_TRADES and (
        not isinstance(traded, np.ndarray) or traded.shape != (n,) or traded.dtype.kind not in "iu"
    ):
        return None
    if pop.stock.dtype != np.int64 or pop.capacity.dtype != np.int64:
        return None
    kinds, params, sum_from_zero, one_scale, coefficients, noisy = plan
    if noisy and rng is None:
        return None  # the numpy path names the missing generator
    out = np.empty(n)
    bits = _bits(rng) if noisy else _NO_BITS
    done = module.force_step(
        kinds,
        params,
        sum_from_zero,
        one_scale,
        pop.value,
        pop.role,
        pop.stock,
        pop.cash,
        pop.capacity,
        traded,
        pop.gamma,
        pop.sigma,
        pop.mu,
        coefficients,
        noisy,
        bits,
        out,
    )
    return out if done else None


#: What a kernel that draws nothing is handed for its bit generator.
_NO_BITS = np.zeros(4, dtype=np.int64)
#: What :func:`force_step` is handed for ``traded`` when no rule reads it.
_NO_TRADES = np.zeros(0, dtype=np.int64)


def accept_one_width(rng, meet, activity, lonely, threshold, first_row, remaining, cash, mu, sd):
    """Compiled second half of a one-meeting propensity round (``numba_loops.accept_one_width``).

    ``meet`` is ``(frac, partner, edge, peak)`` from :func:`meet_one_width` with ``peak``
    exponentiated. Returns ``(status, buyer, seller, price, edge)`` or None when not compiled.
    """
    module = compiled()
    if module is None:
        return None
    frac, partner, edge, peak = meet
    k, n = frac.shape[0], mu.shape[0]
    if (
        first_row < 0
        or first_row + k > n
        or remaining.shape != (n,)
        or cash.shape != (n,)
        or activity.shape != (n,)
        or not module.within(lonely, k)
    ):
        raise ValueError("accept_one_width: rows outside the population")  # no bounds checks
    heights = bool(module.min_below(activity, 1.0))  # activity.min() < 1.0, one pass
    use_threshold = threshold is not None
    return module.accept_one_width(
        _bits(rng),
        frac,
        partner,
        edge,
        peak,
        activity,
        heights,
        lonely,
        float(threshold) if use_threshold else 0.0,
        use_threshold,
        int(first_row),
        remaining,
        cash,
        mu,
        float(sd),
    )


def kernel(name: str):
    """The compiled kernel ``name`` of ``numba_loops``, or None when numpy is to do the work.

    For kernels whose wrapper needs no checks (equal-length columns, or compiled with bounds
    checks).
    """
    module = compiled()
    return None if module is None else getattr(module, name)


def meet_and_accept_rows(
    rng, rows, deg, start, seller, mu, scale, activity, threshold, remaining, cash, sd
):
    """A whole propensity round for meetings listed by buyer row, compiled, or None.

    ``numba_loops.meet_rows``, numpy's ``exp``, then ``numba_loops.accept_rows``. Returns
    ``(status, buyer, seller, price, edge)``; status 2: not fused (nothing drawn but the
    uniforms, which the caller passes on to the numpy path as ``frac, partner, edge, peak``).
    """
    module = compiled()
    if module is None:
        return None
    k, n = rows.shape[0], mu.shape[0]
    if (
        deg.shape != (k,)
        or start.shape != (k,)
        or remaining.shape != (n,)
        or cash.shape != (n,)
        or activity.shape != (n,)
        or not module.within(rows, n)
    ):
        raise ValueError("meet_and_accept_rows: rows outside the population")  # no bounds checks
    bits = _bits(rng)
    frac, arg = np.empty(k), np.empty(k)
    partner, edge = np.empty(k, dtype=np.int64), np.empty(k, dtype=np.int64)
    module.meet_rows(bits, deg, start, seller, mu, rows, float(scale), frac, partner, edge, arg)
    np.exp(arg, out=arg)
    use_threshold = threshold is not None
    out = module.accept_rows(
        bits,
        frac,
        partner,
        edge,
        arg,
        activity,
        bool(module.min_below(activity, 1.0)),  # activity.min() < 1.0
        rows,
        float(threshold) if use_threshold else 0.0,
        use_threshold,
        remaining,
        cash,
        mu,
        float(sd),
    )
    return out, (frac, partner, edge, arg)
