"""The numba-compiled loops behind :mod:`propensim.plugins.acceleration` (imported only from there).

Every function repeats, element by element and in the same order, the numpy operations it
replaces, so the results are identical (tests/plugins/test_acceleration.py checks them bit for bit).
Compiled code is cached on disk (``cache=True``): the first use on a machine compiles, later
processes load it.
"""

from __future__ import annotations

import numba
import numpy as np

from propensim.plugins.numba_bits import standard_normal, uniform


@numba.njit(cache=True, nogil=True)
def ou_noise(mu, offset, off_step, decay, dec_step, gain, gain_step, sd, sd_step, bits, out):
    """``out[i] = (mu[i] decay + offset gain) + xi[i] sd``, ``xi`` standard normals.

    Matches ``out = mu * decay; out += offset * gain; xi = rng.standard_normal(n); xi *= sd;
    out += xi``, drawing ``xi`` in row order from the Generator behind ``bits``
    (:mod:`~propensim.plugins.numba_bits`). Each of ``offset``, ``decay``, ``gain``, ``sd`` is a
    column read at ``i * step`` (step 0: one value for every row).
    """
    for i in range(mu.shape[0]):
        drift = mu[i] * decay[i * dec_step] + offset[i * off_step] * gain[i * gain_step]
        out[i] = drift + standard_normal(bits) * sd[i * sd_step]


#: Kinds of force :func:`force_step` sums (the built-in rules it stands in for).
ANCHOR, OUTCOME = 0, 1


@numba.njit(cache=True, nogil=True)
def force_step(
    kinds,
    params,
    sum_from_zero,
    one_scale,
    value,
    role,
    stock,
    cash,
    capacity,
    traded,
    gamma,
    sigma,
    mu,
    coefficients,
    noisy,
    bits,
    out,
):
    """A drift sum of anchor and outcome forces with one stiffness, stepped, in one call.

    Fuses each rule's offset (``AnchorDrift``: ``value * k``, ``params`` holding
    ``k``; ``OutcomeDrift``: :func:`outcome_offset`, ``params`` holding ``step``), summed in rule
    order as ``DriftSum._summed_terms`` sums them (from 0.0 when ``sum_from_zero``, else from
    the first term), and :func:`ou_noise`'s exact step with scalar ``coefficients`` ``(decay,
    gain, sd)``: ``mu decay + offset gain``, plus ``xi sd`` when ``noisy``.

    With ``one_scale`` (an anchor in the sum: ``k`` was worked out from ``gamma[0]`` and
    ``sigma[0]``) it first checks that every trader has that scale and width, and returns False,
    writing and drawing nothing, when one does not; otherwise it returns True.
    """
    if one_scale and not (is_uniform(gamma) and is_uniform(sigma)):
        return False
    n = mu.shape[0]
    # The offsets first, one pass per rule into ``out`` (passes without a branch on the rule
    # kind vectorise: at 1e5 traders an anchor's pass and the step's took 43 us, one loop over
    # traders and rules 200 us), then the step.
    if sum_from_zero:
        out[:] = 0.0
    for r in range(kinds.shape[0]):
        k = params[r]
        fresh = r == 0 and not sum_from_zero  # the first term is the offset so far
        if kinds[r] == ANCHOR:
            if fresh:
                for i in range(n):
                    out[i] = value[i] * k
            else:
                for i in range(n):
                    out[i] = out[i] + value[i] * k
        else:
            for i in range(n):
                term = k * _outcome_direction(role[i], stock[i], cash[i], capacity[i], traded[i])
                out[i] = term if fresh else out[i] + term
    decay, gain, sd = coefficients[0], coefficients[1], coefficients[2]
    if noisy:
        for i in range(n):
            out[i] = (mu[i] * decay + out[i] * gain) + standard_normal(bits) * sd
    else:
        for i in range(n):
            out[i] = mu[i] * decay + out[i] * gain
    return True


@numba.njit(cache=True, nogil=True)
def settle(b, s, q, pb, ps, stock, cash):
    """Settle trades: the compiled twin of ``Population.settle``.

    ``np.add.at(stock, b, q)``, ``np.subtract.at(stock, s, q)``, then
    ``np.subtract.at(cash, b, q pb)`` and ``np.add.at(cash, s, q ps)``, in that order.
    Returns False, changing nothing, when a row of ``b`` or ``s`` is outside ``stock`` and
    ``cash`` (the caller then lets numpy raise its IndexError), else True.
    """
    m = b.shape[0]
    n = min(stock.shape[0], cash.shape[0])
    if not (within(b, n) and within(s, n)):
        return False
    for i in range(m):
        stock[b[i]] += q[i]
    for i in range(m):
        stock[s[i]] -= q[i]
    for i in range(m):
        cash[b[i]] -= q[i] * pb[i]
    for i in range(m):
        cash[s[i]] += q[i] * ps[i]
    return True


@numba.njit(cache=True, nogil=True)
def min_below(values, limit):
    """``values.min() < limit`` for a non-empty column (False if one entry is NaN, as min is)."""
    below = False
    for i in range(values.shape[0]):
        v = values[i]
        if v != v:
            return False
        below |= v < limit
    return below


@numba.njit(cache=True, nogil=True)
def all_positive(values, lo, hi):
    """``(values[lo:hi] > 0).all()``, in one pass."""
    for i in range(lo, hi):
        if not values[i] > 0:
            return False
    return True


@numba.njit(cache=True, nogil=True)
def within(rows, n):
    """``rows.size == 0 or (rows.min() >= 0 and rows.max() < n)``, in one pass."""
    for i in range(rows.shape[0]):
        if rows[i] < 0 or rows[i] >= n:
            return False
    return True


@numba.njit(cache=True, nogil=True)
def _pick_edges(bits, deg, start, frac, edge):
    """One uniform per meeting split into the partner it picks and the chance that decides it.

    ``u = rng.random(k); u *= deg; pick = u.astype(int64); u -= pick; edge = start + pick``
    (``frac`` receives ``u``): the first pass of :func:`meet_one_width` and :func:`meet_rows`.
    """
    for i in range(deg.shape[0]):
        x = uniform(bits) * deg[i]
        pick = np.int64(x)
        frac[i] = x - pick
        edge[i] = start[i] + pick


@numba.njit(cache=True, nogil=True)
def meet_one_width(bits, deg, start, seller, mu, first_row, scale, frac, partner, edge, arg):
    """The meetings of buyers ``first_row + i`` (one each), up to the joint peak's exponent.

    Matches, for normal curves of one width and ``u = rng.random(k)`` (drawn here from the
    Generator behind ``bits``): ``u *= deg;
    pick = u.astype(int64); u -= pick; edge = start + pick; s = seller[edge];
    arg = mu[first_row:first_row + k] - mu[s]; arg = arg * arg; arg *= scale``
    (``frac`` receives ``u``, ``partner`` receives ``s``). The caller takes ``exp(arg)``.

    Two passes, not one: the draws form one chain through the generator's state, and a loop
    that also reads ``seller[e]`` and ``mu[s]`` (random places in columns larger than the
    cache) leaves the processor few independent loads to overlap. With the reads in a loop
    of their own, every iteration's loads are independent. Measured with cold caches in a
    market of 1e5 traders (5e4 buyers): 1.3-1.4 ms in one pass, 1.1 ms in two; of 1e6 traders:
    14-16 ms against 7 ms.
    """
    k = deg.shape[0]
    _pick_edges(bits, deg, start, frac, edge)
    for i in range(k):
        s = seller[edge[i]]
        partner[i] = s
        gap = mu[first_row + i] - mu[s]
        arg[i] = gap * gap * scale


@numba.njit(cache=True, nogil=True)
def prices_one_width(bits, mu, buyer, seller, sd):
    """``(mu[buyer] + mu[seller]) * 0.5 + rng.standard_normal(m) * sd``, in that order.

    The draws first, then the random reads of ``mu`` (see :func:`meet_one_width`).
    """
    m = buyer.shape[0]
    out = np.empty(m)
    for i in range(m):
        out[i] = standard_normal(bits)
    for i in range(m):
        mean = (mu[buyer[i]] + mu[seller[i]]) * 0.5
        out[i] = mean + out[i] * sd
    return out


@numba.njit(cache=True, nogil=True)
def is_uniform(values):
    """``values.min() == values.max()`` for a non-empty column.

    Counts the entries equal to the first (NaN equals nothing, so a column holding one is not
    uniform, as ``min == max`` says). A full pass: it vectorises, where a loop that stops at
    the first change does not (1e5 entries: 11 us against 67-99 us).
    """
    first = values[0]
    same = 0
    for i in range(values.shape[0]):
        same += values[i] == first
    return same == values.shape[0]


@numba.njit(cache=True, nogil=True)
def start_round(replenish, stock0, cash0, stock, cash, capacity, is_seller, remaining):
    """Restore stock and cash (when ``replenish``) and set the units each trader may trade.

    Matches ``np.copyto(stock, stock0); np.copyto(cash, cash0)`` (when ``replenish``), then
    ``remaining = capacity; np.minimum(remaining, stock, out=remaining, where=is_seller)``.
    """
    for i in range(stock.shape[0]):
        if replenish:
            stock[i] = stock0[i]
            cash[i] = cash0[i]
        cap = capacity[i]
        if is_seller[i] and stock[i] < cap:
            cap = stock[i]
        remaining[i] = cap


@numba.njit(cache=True, nogil=True)
def double_auction_book(
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
    bounded,
    floor,
    ceiling,
):
    """The arrival loop of the continuous double auction, fused into one compiled pass.

    Fuses, per arrival: the budget cap of a bid, the price-bound refusal, the search of the
    trader's partners for the best standing quote on the other side (first in row order among
    equals), the trade against it (which clears the book of that part of the network), or the
    posting of the quote when it improves the trader's own. The same steps, in the same order,
    as the Python loop in ``propensim.plugins._auctions.double_auction`` (kept as the reference
    when numba is missing); ``rem`` and ``cash`` are updated in place. Returns the trades'
    buyers, sellers and prices, in the order they were made.
    """
    n = rem.shape[0]
    standing = np.zeros(n)
    posted = np.full(n, -1, dtype=np.int64)
    cleared = np.full(n_comp, -1, dtype=np.int64)
    units = 0
    for i in range(n):
        if rem[i] > 0:
            units += rem[i]
    cap = min(units // 2 + 1, who.shape[0])  # a trade takes a unit from each side
    out_b = np.empty(cap, dtype=np.int64)
    out_s = np.empty(cap, dtype=np.int64)
    out_p = np.empty(cap)
    m = 0
    for t in range(who.shape[0]):
        i = who[t]
        if rem[i] <= 0:
            continue
        c = comp[i]
        x = quote[t]
        fresh = cleared[c]
        bid = is_bid[t]
        if bid and x > cash[i]:
            x = cash[i]
        if bounded and not (floor <= x and x <= ceiling):
            continue
        best_j = -1
        if bid:
            best = np.inf
            for e in range(b_ptr[i], b_ptr[i + 1]):
                j = sellers[e]
                if posted[j] > fresh and standing[j] < best:
                    best = standing[j]
                    best_j = j
            if best_j >= 0 and best <= x:
                out_b[m] = i
                out_s[m] = best_j
                out_p[m] = best
                m += 1
                rem[i] -= 1
                rem[best_j] -= 1
                cash[i] -= best
                cleared[c] = t
                continue
        else:
            best = -np.inf
            for e in range(s_ptr[i], s_ptr[i + 1]):
                j = buyers[e]
                if posted[j] > fresh and standing[j] > best:
                    best = standing[j]
                    best_j = j
            if best_j >= 0 and best >= x:
                out_b[m] = best_j
                out_s[m] = i
                out_p[m] = best
                m += 1
                rem[best_j] -= 1
                rem[i] -= 1
                cash[best_j] -= best
                cleared[c] = t
                continue
        if posted[i] > fresh and ((x <= standing[i]) if bid else (x >= standing[i])):
            continue
        standing[i] = x
        posted[i] = t
    return out_b[:m], out_s[:m], out_p[:m]


# -- fused kernels of the round: one per rule ------------------------------------------------
@numba.njit(cache=True, nogil=True)
def _block_sum(a, lo, n):
    """NumPy's pairwise sum of a block of at most 128 elements: 8 partial sums, then the rest."""
    if n < 8:
        res = -0.0
        for i in range(lo, lo + n):
            res += a[i]
        return res
    r0, r1, r2, r3 = a[lo], a[lo + 1], a[lo + 2], a[lo + 3]
    r4, r5, r6, r7 = a[lo + 4], a[lo + 5], a[lo + 6], a[lo + 7]
    stop = lo + n - n % 8
    i = lo + 8
    while i < stop:
        r0 += a[i]
        r1 += a[i + 1]
        r2 += a[i + 2]
        r3 += a[i + 3]
        r4 += a[i + 4]
        r5 += a[i + 5]
        r6 += a[i + 6]
        r7 += a[i + 7]
        i += 8
    res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while i < lo + n:
        res += a[i]
        i += 1
    return res


@numba.njit(cache=True, nogil=True)
def _pairwise(a, lo, n):
    """NumPy's pairwise sum of ``a[lo:lo + n]`` (``pairwise_sum_DOUBLE``), step for step.

    Blocks of at most 128 elements (:func:`_block_sum`); above that the range is halved (the
    first half a multiple of 8) and the halves' sums added: the very rounding of
    ``ndarray.sum`` on a contiguous float64 column, so a fused kernel that sums gives numpy's
    number bit for bit. The halving runs on an explicit stack (numba cannot cache recursion).
    """
    if n <= 128:
        return _block_sum(a, lo, n)
    task_lo = np.empty(256, dtype=np.int64)
    task_n = np.empty(256, dtype=np.int64)  # -1: add the two sums on top of the value stack
    vals = np.empty(128)
    top = 0
    nv = 0
    task_lo[0] = lo
    task_n[0] = n
    top = 1
    while top > 0:
        top -= 1
        t_lo = task_lo[top]
        t_n = task_n[top]
        if t_n < 0:
            nv -= 1
            vals[nv - 1] = vals[nv - 1] + vals[nv]
        elif t_n <= 128:
            vals[nv] = _block_sum(a, t_lo, t_n)
            nv += 1
        else:
            n2 = t_n // 2
            n2 -= n2 % 8
            task_n[top] = -1
            task_lo[top + 1] = t_lo + n2
            task_n[top + 1] = t_n - n2
            task_lo[top + 2] = t_lo
            task_n[top + 2] = n2
            top += 3
    return vals[0]


@numba.njit(cache=True, nogil=True)
def np_sum(a):
    """``a.sum()`` of a contiguous float64 column, with numpy's rounding (see _pairwise)."""
    return 0.0 + _pairwise(a, 0, a.shape[0])


@numba.njit(cache=True, nogil=True)
def outcome_offset(role, stock, cash, capacity, traded, step, out):
    """The force of ``OutcomeDrift``: who traded, who missed, and the push, in one pass.

    Fuses ``_outcome_masks`` (traded; missed = could have traded: capacity, a seller with
    stock, a buyer with cash) with ``step * where(traded, better, where(missed, -better, 0))``,
    ``better`` being -1 for a buyer and +1 otherwise.
    """
    for i in range(role.shape[0]):
        out[i] = step * _outcome_direction(role[i], stock[i], cash[i], capacity[i], traded[i])


@numba.njit(cache=True, nogil=True)
def _outcome_direction(role, stock, cash, capacity, traded):
    """-1, +1 or 0: one trader's push under ``OutcomeDrift``.

    A better price if it traded, a concession if it missed a trade it could have made, nothing
    if it could not trade.

    Takes the trader's entries, not the columns: handing arrays to a jitted function costs a
    reference count on each, which made the loop twenty times slower.
    """
    buyer = role == 0
    better = -1.0 if buyer else 1.0
    if traded > 0:
        return better
    if capacity > 0 and not (role == 1 and stock <= 0) and not (buyer and cash <= 0):
        return -better
    return 0.0


@numba.njit(cache=True, nogil=True)
def accept_one_width(
    bits,
    frac,
    partner,
    edge,
    peak,
    activity,
    heights,
    lonely,
    threshold,
    use_threshold,
    first_row,
    remaining,
    cash,
    mu,
    sd,
):
    """The second half of a propensity-matching round (one meeting per buyer, one width).

    Fuses the heights' product (``peak *= a_b; peak *= a_s``), the lonely buyers' mask, the
    agreement test (``frac < peak``, or ``peak >= threshold``), the buyers' turns (one uniform
    key per agreement, ``_turn_keys``), the greedy acceptance in turn order (first agreement of
    each seller with a unit left, by key then position: ``_first_per_seller``) and the joint-curve
    prices of the
    accepted trades (``(mu_b + mu_s) / 2 + sd z``). Returns ``(status, buyer, seller, price,
    edge)``: status 0 no agreement, 1 trades, 2 a case it does not fuse (a buyer with a budget or
    a seller with several units) -- then it has drawn nothing and the numpy path takes over.
    """
    k = frac.shape[0]
    alone = np.zeros(k, dtype=np.bool_)
    for j in range(lonely.shape[0]):
        alone[lonely[j]] = True
    hit = np.empty(k, dtype=np.int64)
    nh = 0
    for i in range(k):
        p = peak[i]
        if heights:
            p = p * activity[first_row + i]
            p = p * activity[partner[i]]
        if alone[i]:
            p = 0.0
        agreed = (p >= threshold) if use_threshold else (frac[i] < p)
        if agreed:
            hit[nh] = i
            nh += 1
    empty_i = np.empty(0, dtype=np.int64)
    if nh == 0:
        return 0, empty_i, empty_i, np.empty(0), empty_i
    for j in range(nh):
        i = hit[j]
        if np.isfinite(cash[first_row + i]) or remaining[partner[i]] > 1:
            return 2, empty_i, empty_i, np.empty(0), empty_i
    key = np.empty(nh)
    for j in range(nh):
        key[j] = uniform(bits)
    first = np.full(remaining.shape[0], -1)  # each seller's first agreement (by key, position)
    can = np.empty(nh, dtype=np.bool_)
    for j in range(nh):
        i = hit[j]
        s = partner[i]
        can[j] = remaining[first_row + i] > 0 and remaining[s] > 0
        if can[j] and (first[s] < 0 or key[j] < key[first[s]]):
            first[s] = j
    m = 0
    for j in range(nh):
        if can[j] and first[partner[hit[j]]] == j:
            hit[m] = hit[j]
            m += 1
    buyer = np.empty(m, dtype=np.int64)
    seller = np.empty(m, dtype=np.int64)
    where = np.empty(m, dtype=np.int64)
    price = np.empty(m)
    for j in range(m):
        price[j] = standard_normal(bits)
    for j in range(m):
        i = hit[j]
        b = first_row + i
        s = partner[i]
        buyer[j] = b
        seller[j] = s
        where[j] = edge[i]
        price[j] = (mu[b] + mu[s]) * 0.5 + price[j] * sd
    return 1, buyer, seller, price, where


# -- metrics: one fused kernel per metric, sums rounded as numpy's (np_sum) ----------------------
@numba.njit(cache=True, nogil=True)
def mean_of(x):
    """``MeanPrice``: ``x.mean()`` (NaN when empty)."""
    return np_sum(x) / x.shape[0] if x.shape[0] else np.nan


@numba.njit(cache=True, nogil=True)
def weighted_price(price, q):
    """``VolumeWeightedPrice``: ``q = quantity as float; sum(price q) / sum(q)`` (NaN if none)."""
    m = price.shape[0]
    qf = np.empty(m)
    pq = np.empty(m)
    for i in range(m):
        qf[i] = float(q[i])
        pq[i] = price[i] * qf[i]
    total = np_sum(qf)
    return np_sum(pq) / total if total > 0 else np.nan


@numba.njit(cache=True, nogil=True)
def price_spread(price, q, centre, use_centre):
    """``PriceDispersion`` (about the weighted mean) and ``SmithAlpha``'s sigma_0 (about a centre).

    Fuses ``sum(q)``, ``sum(price q) / sum(q)`` (unless ``use_centre``) and
    ``sqrt(sum(q (price - centre)^2) / sum(q))``. NaN when ``sum(q) <= 0``.
    """
    m = price.shape[0]
    qf = np.empty(m)
    tmp = np.empty(m)
    for i in range(m):
        qf[i] = float(q[i])
        tmp[i] = price[i] * qf[i]
    total = np_sum(qf)
    if not total > 0:
        return np.nan
    mean = centre if use_centre else np_sum(tmp) / total
    for i in range(m):
        d = price[i] - mean
        tmp[i] = qf[i] * (d * d)
    return np.sqrt(np_sum(tmp) / total)


@numba.njit(cache=True, nogil=True, boundscheck=True)
def surplus_sums(value, buyer, seller, q, paid, got):
    """``trade_surplus`` summed: ``(sum((v_b - paid) q), sum((got - c_s) q))``."""
    m = buyer.shape[0]
    gb = np.empty(m)
    gs = np.empty(m)
    for i in range(m):
        qf = float(q[i])
        gb[i] = (value[buyer[i]] - paid[i]) * qf
        gs[i] = (got[i] - value[seller[i]]) * qf
    return np_sum(gb), np_sum(gs)


@numba.njit(cache=True, nogil=True, boundscheck=True)
def surplus_gini(value, buyer, seller, q, paid, got, n):
    """``SurplusGini``: each trader's surplus (bincount over its trades), then its Gini.

    Fuses ``trade_surplus``, ``bincount(buyer, gain_b) + bincount(seller, gain_s)`` and
    ``welfare.gini`` (sort; ``2 sum(rank x) / (n sum(x)) - (n + 1) / n``; NaN for a
    non-positive total).
    """
    per_b = np.zeros(n)
    per_s = np.zeros(n)
    for i in range(buyer.shape[0]):
        qf = float(q[i])
        per_b[buyer[i]] += (value[buyer[i]] - paid[i]) * qf
    for i in range(buyer.shape[0]):
        qf = float(q[i])
        per_s[seller[i]] += (got[i] - value[seller[i]]) * qf
    x = per_b + per_s
    # Sorted: only the traders' entries need sorting; everyone else holds 0.0 (a sum of
    # products is never -0.0), so the zeros go between the negative and the positive entries.
    nz = np.empty(n)
    k = 0
    for i in range(n):
        if x[i] != 0.0:
            nz[k] = x[i]
            k += 1
    nz = np.sort(nz[:k])
    neg = 0
    while neg < k and nz[neg] < 0.0:
        neg += 1
    x[:neg] = nz[:neg]
    x[neg : neg + n - k] = 0.0
    x[neg + n - k :] = nz[neg:]
    total = np_sum(x)
    if n == 0 or total <= 0:
        return np.nan
    for i in range(n):
        per_b[i] = float(i + 1) * x[i]
    return 2.0 * np_sum(per_b) / (n * total) - (n + 1.0) / n


@numba.njit(cache=True, nogil=True)
def preference_gap(mu, role):
    """``PreferenceGap``: ``mean(mu[sellers]) - mean(mu[buyers])`` (NaN without either side)."""
    n = mu.shape[0]
    mb = np.empty(n)
    ms = np.empty(n)
    nb = 0
    ns = 0
    for i in range(n):
        if role[i] == 0:
            mb[nb] = mu[i]
            nb += 1
        elif role[i] == 1:
            ms[ns] = mu[i]
            ns += 1
    if nb == 0 or ns == 0:
        return np.nan
    return (0.0 + _pairwise(ms, 0, ns)) / ns - (0.0 + _pairwise(mb, 0, nb)) / nb


@numba.njit(cache=True, nogil=True, error_model="numpy")
def spring_energy(gamma, mu, value, sigma):
    """``EntropicEnergy`` of normal curves: ``sum(gamma (mu - v)^2 / (2 sigma^2))``."""
    n = mu.shape[0]
    tmp = np.empty(n)
    for i in range(n):
        d = mu[i] - value[i]
        s = sigma[i]
        tmp[i] = (gamma[i] * (d * d)) / (2.0 * (s * s))
    return np_sum(tmp)


@numba.njit(cache=True, nogil=True)
def same_units(role, capacity, stock, traded, value, old_value, old_units):
    """Whether ``AllocativeEfficiency``'s cached benchmark still holds, in one pass.

    Fuses ``units = where(buyer, capacity, minimum(capacity, stock + traded))`` and
    ``array_equal(old_value, value) and array_equal(old_units, units)``.
    """
    for i in range(role.shape[0]):
        if value[i] != old_value[i]:
            return False
        units = capacity[i]
        if role[i] != 0:
            start = stock[i] + traded[i]
            if start < units:
                units = start
        if units != old_units[i]:
            return False
    return True


@numba.njit(cache=True, nogil=True, boundscheck=True)
def round_metrics(
    wanted,
    buyer,
    seller,
    q,
    price,
    paid,
    got,
    value,
    mu,
    sigma,
    gamma,
    role,
    capacity,
    stock,
    traded,
    old_value,
    old_units,
    best,
    p0,
    out,
):
    """The built-in round metrics in one call: slot ``k`` of ``out`` when bit ``k`` of ``wanted``.

    Fuses Volume (0), MeanPrice (1), VolumeWeightedPrice (2), PriceDispersion (3),
    PreferenceGap (4), buyer and seller surplus (5, 6), AllocativeEfficiency (7: when its cached
    benchmark ``best`` still holds for ``old_value`` and ``old_units``; ``best`` NaN: no
    cache), SurplusGini (8), SmithAlpha about ``p0`` (9) and EntropicEnergy of normal curves
    (10), calling each metric's own kernel above, so the numbers are theirs. Returns False when
    the efficiency slot is wanted but left for the caller (no cache, or it no longer holds).
    """
    if wanted & 1:
        units = 0
        for i in range(q.shape[0]):
            units += q[i]
        out[0] = float(units)
    if wanted & 2:
        out[1] = mean_of(price)
    if wanted & 4:
        out[2] = weighted_price(price, q)
    if wanted & 8:
        out[3] = price_spread(price, q, 0.0, False)
    if wanted & 16:
        out[4] = preference_gap(mu, role)
    if wanted & (32 | 64 | 128):
        gain_b, gain_s = surplus_sums(value, buyer, seller, q, paid, got)
        out[5] = gain_b
        out[6] = gain_s
    held = True
    if wanted & 128:
        held = not np.isnan(best) and same_units(
            role, capacity, stock, traded, value, old_value, old_units
        )
        out[7] = ((out[5] + out[6]) / best if best > 0 else np.nan) if held else np.nan
    if wanted & 256:
        out[8] = surplus_gini(value, buyer, seller, q, paid, got, role.shape[0])
    if wanted & 512:
        if np.isfinite(p0) and p0 > 0:
            out[9] = 100.0 * price_spread(price, q, p0, True) / p0
        else:
            out[9] = np.nan
    if wanted & 1024:
        out[10] = spring_energy(gamma, mu, value, sigma)
    return held


# -- settle: the checks and the tallies of a batch of trades ------------------------------------
@numba.njit(cache=True, nogil=True)
def trades_valid(b, s, q, p, edge, role, ptr, seller_col, remaining, cash, cash_rtol):
    """Whether a batch passes every check of ``check_trades``, in one pass (True or False).

    Fuses the row range, the roles (buyer 0, seller 1), the edge hints (``ptr[b] <= edge <
    ptr[b + 1]`` and ``seller_col[edge] == s``), ``q >= 1``, finite prices, units against
    ``remaining`` (summed per trader) and, when a buyer has a budget, money spent against cash
    (with the relative slack ``cash_rtol``). False says only "look again": the numpy check then
    names the first offender, or accepts a batch whose wrong hint still lies on an edge.
    """
    m = b.shape[0]
    n = role.shape[0]
    budget = False
    increasing = True
    for i in range(m):
        bi, si = b[i], s[i]
        if bi < 0 or bi >= n or si < 0 or si >= n:
            return False
        if role[bi] != 0 or role[si] != 1:
            return False
        e = edge[i]
        if e < ptr[bi] or e >= ptr[bi + 1] or seller_col[e] != si:
            return False
        if q[i] < 1 or not np.isfinite(p[i]):
            return False
        if np.isfinite(cash[bi]):
            budget = True
        if i and bi <= b[i - 1]:
            increasing = False
    units = np.zeros(n, dtype=np.int64)
    for i in range(m):
        units[s[i]] += q[i]
        if not increasing:
            units[b[i]] += q[i]
        elif q[i] > remaining[b[i]]:
            return False
    for i in range(m):
        if units[s[i]] > remaining[s[i]]:
            return False
        if not increasing and units[b[i]] > remaining[b[i]]:
            return False
    if budget:
        spend = np.zeros(n)
        for i in range(m):
            spend[b[i]] += q[i] * p[i]
        for j in range(n):
            c = cash[j]
            if np.isfinite(c) and spend[j] > c + cash_rtol * max(abs(c), 1.0):
                return False
    return True


@numba.njit(cache=True, nogil=True)
def tally(b, s, q, price, n):
    """``RoundOutcome``'s per-trader tallies: units traded and the mean price, in one pass.

    Fuses ``traded = bincount(b, q) + bincount(s, q)``, ``paid`` likewise with ``q price`` and
    ``where(traded > 0, paid / traded, nan)`` (sums in trade order, as bincount's).
    """
    tb = np.zeros(n)
    ts = np.zeros(n)
    pb = np.zeros(n)
    ps = np.zeros(n)
    for i in range(b.shape[0]):
        qf = float(q[i])
        tb[b[i]] += qf
        pb[b[i]] += qf * price[i]
    for i in range(b.shape[0]):
        qf = float(q[i])
        ts[s[i]] += qf
        ps[s[i]] += qf * price[i]
    traded = np.empty(n, dtype=np.int64)
    mean = np.empty(n)
    for j in range(n):
        t = tb[j] + ts[j]
        traded[j] = np.int64(t)
        mean[j] = (pb[j] + ps[j]) / t if t > 0 else np.nan
    return traded, mean


@numba.njit(cache=True, nogil=True)
def meet_rows(bits, deg, start, seller, mu, rows, scale, frac, partner, edge, arg):
    """:func:`meet_one_width` for buyers listed by row (``rows[i]``, repeated per meeting).

    Matches ``u = rng.random(k)`` (drawn here), ``u *= deg; pick = u.astype(int64);
    u -= pick; edge = start + pick; s = seller[edge]; arg = (mu[rows] - mu[s])^2 * scale``.
    """
    k = deg.shape[0]
    _pick_edges(bits, deg, start, frac, edge)
    for i in range(k):
        s = seller[edge[i]]
        partner[i] = s
        gap = mu[rows[i]] - mu[s]
        arg[i] = gap * gap * scale


@numba.njit(cache=True, nogil=True)
def counting_order(label, n_labels):
    """A stable counting sort: ``(order, start)`` for labels on ``0 .. n_labels - 1``.

    ``order`` lists the positions by label, ties in position order; label ``c``'s run is
    ``order[start[c]:start[c + 1]]``.
    """
    start = np.zeros(n_labels + 1, dtype=np.int64)
    for a in range(label.shape[0]):
        start[label[a] + 1] += 1
    for c in range(n_labels):
        start[c + 1] += start[c]
    order = np.empty(label.shape[0], dtype=np.int64)
    fill = start[:-1].copy()
    for a in range(label.shape[0]):
        order[fill[label[a]]] = a
        fill[label[a]] += 1
    return order, start


@numba.njit(cache=True, nogil=True)
def _ascending(key):
    """``np.argsort(key, kind="stable")`` for keys on [0, 1): a bucket sort.

    Key ``x`` goes to bucket ``floor(x n)`` (in position order), then each bucket is put in
    order by insertion, moving an entry only past strictly larger keys (so equal keys stay in
    position order). Uniform keys leave about one per bucket: linear time, where a comparison
    sort of 500 keys cost more than the shuffle it replaces.
    """
    n = key.shape[0]
    slot = np.empty(n, dtype=np.int64)
    for r in range(n):
        slot[r] = min(int(key[r] * n), n - 1)
    out, count = counting_order(slot, n)
    for b in range(n):
        for a in range(count[b] + 1, count[b + 1]):
            x = out[a]
            q = a
            while q > count[b] and key[out[q - 1]] > key[x]:
                out[q] = out[q - 1]
                q -= 1
            out[q] = x
    return out


@numba.njit(cache=True, nogil=True)
def accept_rows(
    bits,
    frac,
    partner,
    edge,
    peak,
    activity,
    heights,
    rows,
    threshold,
    use_threshold,
    remaining,
    cash,
    mu,
    sd,
):
    """The second half of a propensity round for meetings listed by buyer row (any meetings).

    Fuses the heights' product, the agreement test, the turns (one uniform key per buyer with an
    agreement, the buyers in ascending key, equal keys in row order: ``_turn_keys``; a buyer's
    agreements share its turn, in meeting order), the
    greedy acceptance in turn order while both sides have units left (``greedy_accept``, which
    gives the same set as this loop) and the prices of the accepted meetings, in position order.
    Returns ``(status, buyer, seller, price, edge)`` as :func:`accept_one_width` (status 2, with
    nothing drawn, when a buyer with an agreement has a budget).
    """
    k = frac.shape[0]
    hit = np.empty(k, dtype=np.int64)
    nh = 0
    for i in range(k):
        p = peak[i]
        if heights:
            p = p * activity[rows[i]]
            p = p * activity[partner[i]]
        agreed = (p >= threshold) if use_threshold else (frac[i] < p)
        if agreed:
            hit[nh] = i
            nh += 1
    empty_i = np.empty(0, dtype=np.int64)
    if nh == 0:
        return 0, empty_i, empty_i, np.empty(0), empty_i
    for j in range(nh):
        if np.isfinite(cash[rows[hit[j]]]):
            return 2, empty_i, empty_i, np.empty(0), empty_i
    run_start = np.empty(nh + 1, dtype=np.int64)  # agreements of one buyer: one run
    runs = 0
    for j in range(nh):
        if j == 0 or rows[hit[j]] != rows[hit[j - 1]]:
            run_start[runs] = j
            runs += 1
    run_start[runs] = nh
    key = np.empty(runs)
    for r in range(runs):
        key[r] = uniform(bits)
    by_turn = _ascending(key)  # the runs in turn order
    left = remaining.copy()
    accepted = np.zeros(nh, dtype=np.bool_)
    m = 0
    for t in range(runs):
        r = by_turn[t]
        for j in range(run_start[r], run_start[r + 1]):
            b = rows[hit[j]]
            s = partner[hit[j]]
            if left[b] > 0 and left[s] > 0:
                left[b] -= 1
                left[s] -= 1
                accepted[j] = True
                m += 1
    buyer = np.empty(m, dtype=np.int64)
    seller = np.empty(m, dtype=np.int64)
    where = np.empty(m, dtype=np.int64)
    price = np.empty(m)
    for j in range(m):
        price[j] = standard_normal(bits)
    c = 0
    for j in range(nh):
        if accepted[j]:
            i = hit[j]
            b = rows[i]
            s = partner[i]
            buyer[c] = b
            seller[c] = s
            where[c] = edge[i]
            price[c] = (mu[b] + mu[s]) * 0.5 + price[c] * sd
            c += 1
    return 1, buyer, seller, price, where
