"""Compiled loops of the uniform-price call auction and of the double auction's set-up (numba).

Imported lazily by :mod:`propensim.plugins._auctions` when the market chose the compiled
kernels (``acceleration.compiled()`` is not None). Each kernel gives exactly the numbers of the
numpy code it stands in for (kept in ``_auctions`` as the reference, and compared bit
for bit in ``tests/plugins/test_fused_auctions.py``); every random number is drawn by
numpy before the kernel runs (numba's own generator calls cost about three times numpy's per
draw), except the double auction's quote uniforms, which ``double_auction_quotes`` draws from
the Generator's own bit generator (``numba_bits.uniform``: the same stream as
``Generator.random``). Compiled code is cached on disk (``cache=True``).
"""

from __future__ import annotations

import numba
import numpy as np

from propensim.plugins.numba_bits import uniform
from propensim.plugins.numba_loops import counting_order


# -- call auction ---------------------------------------------------------------------------
@numba.njit(cache=True, nogil=True, inline="always")
def _before(key, tie, a, b):
    """Whether unit ``a`` sorts before unit ``b``: by key, then tie, then position."""
    if key[a] != key[b]:
        return key[a] < key[b]
    if tie[a] != tie[b]:
        return tie[a] < tie[b]
    return a < b


@numba.njit(cache=True, nogil=True)
def _sort_units(comp, key, tie, n_comp):
    """Positions of the units in lexsort order (component, key, tie, position).

    A stable counting sort by component, then each component's run sorted by key (numba's
    quicksort of the keys), then every run of equal keys ordered by (tie, position): an insertion
    sort for short runs, a quicksort of the ties for long ones (all quotes equal). Gives
    ``np.lexsort((tie, key, comp))``.
    """
    u = key.shape[0]
    order, count = counting_order(comp, n_comp)
    for c in range(n_comp):
        lo, hi = count[c], count[c + 1]
        if hi - lo > 1:
            seg = order[lo:hi].copy()
            order[lo:hi] = seg[np.argsort(key[seg])]
    a = 0
    while a < u:  # runs of equal component and key
        b = a + 1
        while b < u and comp[order[b]] == comp[order[a]] and key[order[b]] == key[order[a]]:
            b += 1
        if b - a > 16:
            seg = np.sort(order[a:b])  # by position, then by tie (runs of equal ties by position)
            seg = seg[np.argsort(tie[seg])]
            order[a:b] = seg
        for r in range(a + 1, b):  # insertion sort: finishes the long runs, sorts the short
            x = order[r]
            q = r
            while q > a and _before(key, tie, x, order[q - 1]):
                order[q] = order[q - 1]
                q -= 1
            order[q] = x
        a = b
    return order


@numba.njit(cache=True, nogil=True)
def call_auction_clear(rows, rem, quote, cash, role, comp, n_comp, tie, k):
    """The call auction's order books and clearing, all components in one compiled pass.

    Fuses the unit copies of each live trader (a buyer's j-th unit bid at
    ``min(quote, cash / j)``), the sort of demand (bid down) and supply (ask up) within each
    component with the random tie-break ``tie`` (demand units' draws first, then supply's; as
    ``np.lexsort``), the crossing count ``q``, the k-rule price on the clearing interval and the
    winners (the first ``q`` units on each side). The same operations as the numpy code of
    ``_auctions.call_auction``. Returns the units won per trader (buyers', sellers'), each
    component's price (NaN where nothing trades), and the winning units' traders on each side in
    (component, rank) order.
    """
    n = rem.shape[0]
    nb = 0
    ns = 0
    for r in rows:
        if role[r] == 0:
            nb += rem[r]
        else:
            ns += rem[r]
    b_row = np.empty(nb, dtype=np.int64)
    b_key = np.empty(nb)  # minus the bid: ascending key, bid down
    b_comp = np.empty(nb, dtype=np.int64)
    s_row = np.empty(ns, dtype=np.int64)
    s_key = np.empty(ns)
    s_comp = np.empty(ns, dtype=np.int64)
    ib = 0
    js = 0
    for r in rows:
        if role[r] == 0:
            c = cash[r]
            for j in range(rem[r]):
                q = quote[r]
                if np.isfinite(c):
                    cap = c / (j + 1.0)
                    if cap < q:
                        q = cap
                b_row[ib] = r
                b_key[ib] = -q
                b_comp[ib] = comp[r]
                ib += 1
        else:
            for _ in range(rem[r]):
                s_row[js] = r
                s_key[js] = quote[r]
                s_comp[js] = comp[r]
                js += 1
    ob = _sort_units(b_comp, b_key, tie[:nb], n_comp)
    os_ = _sort_units(s_comp, s_key, tie[nb:], n_comp)
    start_b = np.zeros(n_comp + 1, dtype=np.int64)
    start_s = np.zeros(n_comp + 1, dtype=np.int64)
    for a in range(nb):
        start_b[b_comp[a] + 1] += 1
    for a in range(ns):
        start_s[s_comp[a] + 1] += 1
    for c in range(n_comp):
        start_b[c + 1] += start_b[c]
        start_s[c + 1] += start_s[c]
    price = np.full(n_comp, np.nan)
    won_b = np.zeros(n, dtype=np.int64)
    won_s = np.zeros(n, dtype=np.int64)
    win_b = np.empty(min(nb, ns), dtype=np.int64)
    win_s = np.empty(min(nb, ns), dtype=np.int64)
    w = 0
    for c in range(n_comp):
        b0, s0 = start_b[c], start_s[c]
        n_b, n_s = start_b[c + 1] - b0, start_s[c + 1] - s0
        q = 0
        while q < n_b and q < n_s and -b_key[ob[b0 + q]] >= s_key[os_[s0 + q]]:
            q += 1
        if q == 0:
            continue
        v_q = -b_key[ob[b0 + q - 1]]
        c_q = s_key[os_[s0 + q - 1]]
        v_next = -b_key[ob[b0 + q]] if q < n_b else -np.inf
        c_next = s_key[os_[s0 + q]] if q < n_s else np.inf
        low = max(c_q, v_next)
        high = min(v_q, c_next)
        price[c] = low + k * (high - low)
        for r in range(q):
            bi = b_row[ob[b0 + r]]
            si = s_row[os_[s0 + r]]
            won_b[bi] += 1
            won_s[si] += 1
            win_b[w] = bi
            win_s[w] = si
            w += 1
    return won_b, won_s, price, win_b[:w], win_s[:w]


@numba.njit(cache=True, nogil=True)
def eligible_edges(buyer, seller, units_b, units_s):
    """Positions of the edges whose two ends both have units to place (``flatnonzero``)."""
    m = buyer.shape[0]
    out = np.empty(m, dtype=np.int64)
    k = 0
    for e in range(m):
        if units_b[buyer[e]] > 0 and units_s[seller[e]] > 0:
            out[k] = e
            k += 1
    return out[:k]


@numba.njit(cache=True, nogil=True)
def greedy_pairs(eligible, order, buyer, seller, units_b, units_s, comp, price):
    """Winning units paired along edges taken in a random order, with their prices.

    Fuses the edge order ``eligible[order]``, the unit copies of each edge and the greedy
    acceptance of ``greedy_accept`` in that order (an edge's copies come one after another, so
    the edge takes ``min(units left at its buyer, units left at its seller)``), and the price of
    each pair's component. Returns the used edges' buyers, sellers, prices, quantities and
    positions, in the random order (as the numpy path lists them).

    An edge used takes at least one unit from each side, so there are at most as many pairs as
    buyers' units (the outputs are sized for that, not for every edge: fresh pages cost more
    than the loop), and once every buyer's unit is placed no later edge can take one: the loop
    stops there.
    """
    k = order.shape[0]
    left_b = units_b.copy()
    left_s = units_s.copy()
    open_b = 0  # buyers' units not placed yet
    for i in range(left_b.shape[0]):
        if left_b[i] > 0:
            open_b += left_b[i]
    cap = min(k, open_b)
    out_b = np.empty(cap, dtype=np.int64)
    out_s = np.empty(cap, dtype=np.int64)
    out_p = np.empty(cap)
    out_q = np.empty(cap, dtype=np.int64)
    out_e = np.empty(cap, dtype=np.int64)
    used = 0
    for j in range(k):
        if open_b <= 0:
            break
        e = eligible[order[j]]
        b = buyer[e]
        s = seller[e]
        t = min(left_b[b], left_s[s])
        if t > 0:
            left_b[b] -= t
            left_s[s] -= t
            open_b -= t
            out_b[used] = b
            out_s[used] = s
            out_p[used] = price[comp[b]]
            out_q[used] = t
            out_e[used] = e
            used += 1
    return out_b[:used], out_s[:used], out_p[:used], out_q[:used], out_e[:used]


# -- double auction -------------------------------------------------------------------------
@numba.njit(cache=True, nogil=True)
def double_auction_quotes(live, pick, role, value, buyer, zi_c, lo, hi, bits, who, is_bid, quote):
    """The double auction's arrivals and zero-intelligence quotes in one compiled pass.

    Stands in for, in ``_auctions.double_auction``: ``who = live[pick]``,
    ``is_bid = role[who] == buyer``, ``u = rng.random(n)`` (drawn here from ``rng``'s own bit
    generator through ``bits``, in arrival order: the same numbers, the Generator left in the same
    state), and the quote ``q_low + u * (q_high - q_low)``, where zi_c (``zi_c`` true) has
    ``q_low = minimum(lo, value)`` for a bid and ``value`` for an ask, ``q_high = value`` for a
    bid and ``maximum(hi, value)`` for an ask (``minimum`` and ``maximum`` as NumPy's, NaN
    passed on), and zi_u has ``q_low = lo``, ``q_high = hi``. Fills ``who``, ``is_bid`` and
    ``quote`` (each as long as ``pick``, which must index ``live``, whose entries must be rows of
    ``role`` and ``value``: no bounds checks).
    """
    for t in range(pick.shape[0]):
        i = live[pick[t]]
        bid = role[i] == buyer
        who[t] = i
        is_bid[t] = bid
        u = uniform(bits)
        if zi_c:
            v = value[i]
            if bid:
                q_low = lo if (lo < v or lo != lo) else v  # np.minimum(lo, v)
                q_high = v
            else:
                q_low = v
                q_high = hi if (hi > v or hi != hi) else v  # np.maximum(hi, v)
        else:
            q_low = lo
            q_high = hi
        quote[t] = q_low + u * (q_high - q_low)
