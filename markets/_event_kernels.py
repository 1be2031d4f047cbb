"""Compiled loops of the continuous-time engine (numba, cached on disk with ``cache=True``).

Private to :mod:`propensim.markets.events`. Two ways of choosing the next channel share one set
of helpers, selected by an integer ``method``:

``DIRECT`` (Gillespie's direct method)
    ``rates`` holds one propensity per channel and ``acc[0]`` their sum. A choice walks the
    cumulative sum until it passes ``u * a0``: O(n) per event. The sum is recomputed exactly
    (one pass) after any rate changes, so no rounding accumulates.
``TREE`` (a sum tree)
    ``rates`` holds the levels of a tree with :data:`FANOUT` (16) children per node, root first
    (see :func:`tree_layout`): the leaves are the channels' propensities, every inner node the
    sum of its children, the root the total. A choice descends from the root, walking at most
    16 contiguous sums per level, and a changed rate recomputes the sums on its path from their
    children (so rounding never accumulates either): O(log n) per event, with ``log16 n``
    dependent memory reads instead of a binary tree's ``log2 n``.

Both choose channel ``j`` with probability ``a_j / a0`` from one uniform, in the same channel
order (leaves left to right are channels 0, 1, ...), so for the same uniform they pick the same
channel up to rounding at interval ends. A zero rate is a zero-width interval: such channels are
never chosen, which is how an exhausted channel leaves the sum.

References
----------
D. T. Gillespie, "Exact stochastic simulation of coupled chemical reactions", J. Phys. Chem.
81:2340-2361 (1977) (the direct method). M. A. Gibson and J. Bruck, J. Phys. Chem. A
104:1876-1889 (2000) (O(log n) selection and dependency-limited updates).
"""

from __future__ import annotations

import numba
import numpy as np

DIRECT = 0
TREE = 1


# -- the channel sum ------------------------------------------------------------------------------
#: Children per node of the sum tree. With 16 a level's children fill two 64-byte cache lines,
#: and 1e6 channels need 5 levels (a binary tree: 20 dependent loads, most of them cache misses).
FANOUT = 16


def tree_layout(n: int) -> tuple[np.ndarray, np.ndarray]:
    """``(offsets, sizes)`` of the levels of a sum tree over ``n`` channels, root level first.

    Level ``L`` (the last) holds the ``n`` leaves; level ``l`` holds ``ceil(size[l + 1] / 16)``
    nodes; node ``i`` of level ``l`` is the sum of nodes ``16 i .. 16 i + 15`` of level ``l + 1``.
    All levels live in one array of about ``16 n / 15`` floats, level ``l`` from ``offsets[l]``.
    """
    sizes = [max(int(n), 1)]
    while sizes[-1] > 1:
        sizes.append(-(-sizes[-1] // FANOUT))
    sizes.reverse()
    offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64)
    return offsets, np.array(sizes, dtype=np.int64)


def sum_length(method: int, n: int) -> int:
    """Length of the ``rates`` array for ``n`` channels."""
    if method == TREE:
        _, sizes = tree_layout(n)
        return int(sizes.sum())
    return max(int(n), 1)


@numba.njit(cache=True, nogil=True)
def _node_sum(rates, off, size, level, i):
    """Sum of node ``i``'s children (level ``level + 1``), in child order."""
    lo = off[level + 1] + i * FANOUT
    hi = min(lo + FANOUT, off[level + 1] + size[level + 1])
    total = 0.0
    for c in range(lo, hi):
        total += rates[c]
    return total


@numba.njit(cache=True, nogil=True)
def build_sum(method, leaves, rates, off, size, acc):
    """Fill ``rates`` (and ``acc[0]``, the total) from the channel propensities ``leaves``."""
    n = leaves.shape[0]
    if method == TREE:
        depth = off.shape[0] - 1
        base = off[depth]
        for i in range(size[depth]):
            rates[base + i] = leaves[i] if i < n else 0.0
        for level in range(depth - 1, -1, -1):
            for i in range(size[level]):
                rates[off[level] + i] = _node_sum(rates, off, size, level, i)
        acc[0] = rates[0]
    else:
        total = 0.0
        for i in range(n):
            rates[i] = leaves[i]
            total += leaves[i]
        acc[0] = total


@numba.njit(cache=True, nogil=True)
def set_rate(method, rates, off, size, i, value):
    """Set channel ``i``'s propensity (tree: recompute the sums on its path from their children)."""
    if method == TREE:
        depth = off.shape[0] - 1
        rates[off[depth] + i] = value
        for level in range(depth - 1, -1, -1):
            i //= FANOUT
            rates[off[level] + i] = _node_sum(rates, off, size, level, i)
    else:
        rates[i] = value


@numba.njit(cache=True, nogil=True)
def refresh_total(method, rates, n, acc):
    """Bring ``acc[0]`` up to date after :func:`set_rate` calls (the direct method re-sums)."""
    if method == TREE:
        acc[0] = rates[0]
    else:
        total = 0.0
        for i in range(n):
            total += rates[i]
        acc[0] = total


@numba.njit(cache=True, nogil=True)
def rate_of(method, rates, off, i):
    """Channel ``i``'s current propensity."""
    if method == TREE:
        return rates[off[off.shape[0] - 1] + i]
    return rates[i]


@numba.njit(cache=True, nogil=True)
def pick(method, rates, off, size, n, target):
    """The channel whose interval of the cumulative propensities holds ``target`` (in [0, a0)).

    Returns -1 when rounding carried ``target`` past the last interval or onto a zero-width one;
    the caller then draws again (a rejection: the law of the chosen channel is unchanged).
    """
    if method == TREE:
        depth = off.shape[0] - 1
        i = 0
        for level in range(depth):
            lo = i * FANOUT
            hi = min(lo + FANOUT, size[level + 1])
            base = off[level + 1]
            j = -1
            for c in range(lo, hi):
                v = rates[base + c]
                if target < v:
                    j = c
                    break
                target -= v
            if j < 0:
                return -1
            i = j
        if i >= n or rates[off[depth] + i] <= 0.0:
            return -1
        return i
    c = 0.0
    for i in range(n):
        c += rates[i]
        if target < c and rates[i] > 0.0:
            return i
    return -1


@numba.njit(cache=True, nogil=True)
def _choose(method, rates, off, size, n, a0, rng):
    while True:
        i = pick(method, rates, off, size, n, rng.random() * a0)
        if i >= 0:
            return i


# -- the market -----------------------------------------------------------------------------------
@numba.njit(cache=True, nogil=True)
def run_market(
    method,
    rates,
    off,
    size,
    acc,
    chan,
    buyer_ptr,
    seller_ptr,
    seller_edges,
    stock,
    cash,
    with_cash,
    buyer_tax,
    seller_tax,
    t0,
    t_end,
    cap,
    rng,
    out_time,
    out_edge,
    out_price,
    counters,
):
    """Run trade events from time ``t0`` until ``t_end`` or ``cap`` trades, whichever first.

    ``chan`` holds one row per channel: price mean, price sd, buyer row, seller row (as floats,
    exact below 2**53), so that an event reads one 32-byte row rather than four columns.

    Each event: ``tau ~ Exp(a0)`` (one standard exponential over the total), a channel with
    probability ``rate / a0`` (one uniform), a price ``mean + sd * z`` (one standard normal).
    A buyer who cannot pay the price (plus ``buyer_tax``) refuses (``counters[0] += 1``; nothing
    changes). Otherwise one unit moves seller -> buyer, the buyer pays ``price + buyer_tax`` and
    the seller receives ``price - seller_tax`` (per-unit taxes; negative for subsidies), the
    trade is written to ``out_*``, and the channels that touch the two traders are updated: a
    seller out of stock takes all its channels out of the sum, as does a buyer out of cash.
    Rates depend on the curves only otherwise, which do not change between drift steps, so no
    other channel moves.

    ``with_cash`` False leaves ``cash`` alone (prices drawn later by the caller).

    Returns ``(trades, t, status)``: status 0 the clock reached ``t_end`` (``t = t_end``; by the
    memoryless property the next event may be drawn afresh from there), 1 ``cap`` trades were
    made (``t`` = the last trade's time), 2 every rate is zero (``t = t_end``).
    """
    n = chan.shape[0]
    t = t0
    k = 0
    while k < cap:
        a0 = acc[0]
        if not a0 > 0.0:
            return k, t_end, 2
        t_next = t + rng.standard_exponential() / a0
        if t_next >= t_end:
            return k, t_end, 0
        t = t_next
        e = _choose(method, rates, off, size, n, a0, rng)
        b = np.int64(chan[e, 2])
        s = np.int64(chan[e, 3])
        price = chan[e, 0] + chan[e, 1] * rng.standard_normal()
        pays = price + buyer_tax
        if with_cash and pays > cash[b]:
            counters[0] += 1
            continue
        stock[s] -= 1
        stock[b] += 1
        if with_cash:
            cash[b] -= pays
            cash[s] += price - seller_tax
        out_time[k] = t
        out_edge[k] = e
        out_price[k] = price
        k += 1
        changed = False
        if stock[s] <= 0:
            for j in range(seller_ptr[s], seller_ptr[s + 1]):
                edge = seller_edges[j]
                if rate_of(method, rates, off, edge) > 0.0:
                    set_rate(method, rates, off, size, edge, 0.0)
                    changed = True
        if with_cash and cash[b] <= 0.0:
            for edge in range(buyer_ptr[b], buyer_ptr[b + 1]):
                if rate_of(method, rates, off, edge) > 0.0:
                    set_rate(method, rates, off, size, edge, 0.0)
                    changed = True
        if changed:
            refresh_total(method, rates, n, acc)
    return k, t, 1


# -- a generic reaction network (the same selection and updates) ----------------------------------
@numba.njit(cache=True, nogil=True)
def _propensity(j, const, reactant, x):
    r = reactant[j]
    if r < 0:
        return const[j]
    return const[j] * x[r]


@numba.njit(cache=True, nogil=True)
def reaction_rates(const, reactant, x):
    """Propensities of every channel: ``const`` (zeroth order) or ``const * x[reactant]``."""
    out = np.empty(const.shape[0])
    for j in range(const.shape[0]):
        out[j] = _propensity(j, const, reactant, x)
    return out


@numba.njit(cache=True, nogil=True)
def run_reactions(
    method,
    rates,
    off,
    size,
    acc,
    const,
    reactant,
    change_ptr,
    change_species,
    change_amount,
    dep_ptr,
    dep_channel,
    x,
    t0,
    t_end,
    cap,
    rng,
    out_time,
    out_channel,
):
    """Gillespie's process for channels of order 0 or 1, with the market's selection code.

    Channel ``j`` fires at rate ``const[j]`` (``reactant[j] < 0``) or ``const[j] * x[r]``;
    firing adds ``change_amount[c]`` to ``x[change_species[c]]`` for ``c`` in
    ``change_ptr[j]:change_ptr[j + 1]``, then recomputes the channels listed in
    ``dep_channel[dep_ptr[j]:dep_ptr[j + 1]]`` only. Returns ``(events, t, status)`` as
    :func:`run_market`.
    """
    n = const.shape[0]
    t = t0
    k = 0
    while k < cap:
        a0 = acc[0]
        if not a0 > 0.0:
            return k, t_end, 2
        t_next = t + rng.standard_exponential() / a0
        if t_next >= t_end:
            return k, t_end, 0
        t = t_next
        j = _choose(method, rates, off, size, n, a0, rng)
        for c in range(change_ptr[j], change_ptr[j + 1]):
            x[change_species[c]] += change_amount[c]
        for d in range(dep_ptr[j], dep_ptr[j + 1]):
            ch = dep_channel[d]
            set_rate(method, rates, off, size, ch, _propensity(ch, const, reactant, x))
        refresh_total(method, rates, n, acc)
        out_time[k] = t
        out_channel[k] = j
        k += 1
    return k, t, 1
