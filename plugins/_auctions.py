"""Kernels of the classical clearing rules: call auction, bilateral bargaining, double auction.

References
----------
D. K. Gode and S. Sunder, "Allocative efficiency of markets with zero-intelligence traders",
J. Political Economy 101(1):119-137 (1993): the double auction with random (ZI) quotes.
M. A. Satterthwaite and S. R. Williams, "The rate of convergence to efficiency in the buyer's bid
double auction as the market becomes large", Rev. Econ. Stud. 56(4):477-498 (1989): the
k-double-auction price rule.
"""

from __future__ import annotations

import math

import numpy as np

from propensim.agents.population import BUYER, Population
from propensim.plugins import acceleration
from propensim.plugins.sequential_accept import greedy_accept
from propensim.plugins.types import MarketState, Trades, TradingNetwork


def _compiled():
    """The compiled auction kernels (``numba_auctions``), or None when numpy is to do the work.

    Follows the market's build-time choice (:func:`acceleration.compiled`); the module is
    imported on first use, numba being loaded already when the answer is yes.
    """
    if acceleration.compiled() is None:
        return None
    from propensim.plugins import numba_auctions

    return numba_auctions


# -- quotes ---------------------------------------------------------------------------------
def reservation_prices(pop: Population, threshold: float) -> np.ndarray:
    """Reservation price of every trader at acceptance ``threshold``, shape (n,).

    A buyer's is the highest price it accepts with probability >= threshold, a seller's the
    lowest. For normal curves ``mu +/- sigma sqrt(2 ln(a / threshold))`` (+ for buyers); NaN where
    the activity ``a`` is below the threshold (the trader never accepts that often).
    """
    if pop.curve != "normal":
        curves = pop.curves()
        return np.asarray(curves.reservation_price(threshold, side=pop.role), dtype=float)
    reach = pop.activity >= threshold  # shape: (n,) curve rises to the threshold somewhere
    ratio = np.where(reach, pop.activity / threshold, 1.0)
    half = pop.sigma * np.sqrt(2.0 * np.log(ratio))  # shape: (n,) half-width at the threshold
    quote = np.where(pop.role == BUYER, pop.mu + half, pop.mu - half)
    return np.where(reach, quote, np.nan)


def bounded_quotes(state: MarketState, quote: np.ndarray) -> np.ndarray:
    """Quotes under the price bounds in force (MODEL.md section 9); unchanged without bounds.

    A buyer bids no more than the ceiling and stays out if its bid is below the floor; a seller
    asks no less than the floor and stays out if its ask is above the ceiling. In a call auction
    this gives the textbook ceiling: when the clearing price would exceed it, the price is the
    ceiling, sellers who ask at most the ceiling sell, and buyers at the ceiling (all those
    willing to pay it) are rationed by the auction's random tie-break.
    """
    if not state.price_bounded:
        return quote
    lo, hi = state.price_floor, state.price_ceiling
    is_buyer = state.population.role == BUYER
    with np.errstate(invalid="ignore"):
        out = np.where(is_buyer, np.minimum(quote, hi), np.maximum(quote, lo))
        out = np.where(is_buyer & (quote < lo), np.nan, out)
        out = np.where(~is_buyer & (quote > hi), np.nan, out)
    return out


def _aggregate(b: np.ndarray, s: np.ndarray, price: np.ndarray, n: int) -> Trades:
    """Merge unit trades of the same pair at the same price into one row with a quantity."""
    if b.size == 0:
        return Trades.empty()
    key = b * np.int64(n) + s
    _, first, counts = np.unique(key, return_index=True, return_counts=True)
    return Trades(b[first], s[first], price[first], counts)


def _unit_copies(reps: np.ndarray):
    """For items repeated ``reps`` times: (item id of each copy, copy number within its item)."""
    item = np.repeat(np.arange(reps.size), reps)  # shape: (n_copies,)
    start = np.cumsum(reps) - reps
    return item, np.arange(item.size) - start[item]


def _copies(reps: np.ndarray) -> np.ndarray:
    """Item id of each unit copy, items repeated ``reps`` times side by side."""
    if reps.size and int(reps.max()) == 1:
        return np.arange(reps.size)
    return np.repeat(np.arange(reps.size), reps)


# -- call auction ---------------------------------------------------------------------------
def call_auction(
    state: MarketState, quote: np.ndarray, k: float, rng: np.random.Generator
) -> tuple[Trades, int]:
    """Uniform-price call auction in every connected component at once.

    Every trader with units left and a finite quote offers each unit at its quote (a buyer with a
    finite budget bids its j-th unit at ``min(quote, cash / j)``, so whatever it wins it can pay).
    Demand units are sorted down and supply units up within each component (ties in random
    order); ``q`` is the number of ranks where the bid still covers the ask; the price is
    ``low + k (high - low)`` on the clearing interval
    ``[max(c_q, v_{q+1}), min(v_q, c_{q+1})]``. The ``q`` best units on each side win.

    Returns the trades and the number of winning units that found no connected partner.
    """
    pop, net = state.population, state.network
    n = len(pop)
    rem = state.remaining
    comp = net.component  # shape: (n,)
    live = (rem > 0) & (net.degree > 0) & np.isfinite(quote)  # shape: (n,)
    rows = np.flatnonzero(live)
    if rows.size == 0:
        return Trades.empty(), 0
    kernels = _compiled()
    if kernels is not None:
        return _call_auction_compiled(kernels, state, quote, k, rng, rows)
    unit_row, unit_no = _unit_copies(rem[rows])
    unit_row = rows[unit_row]  # shape: (n_units,) trader of each unit offered
    unit_quote = quote[unit_row]
    cash = pop.cash[unit_row]
    is_buyer = pop.role[unit_row] == BUYER  # shape: (n_units,)
    budget_cap = np.where(is_buyer & np.isfinite(cash), cash / (unit_no + 1.0), np.inf)
    unit_quote = np.minimum(unit_quote, budget_cap)

    bu, bq = unit_row[is_buyer], unit_quote[is_buyer]  # demand units
    su, sq = unit_row[~is_buyer], unit_quote[~is_buyer]  # supply units
    tie_b, tie_s = rng.random(bu.size), rng.random(su.size)
    ob = np.lexsort((tie_b, -bq, comp[bu]))  # by component, bid down
    os_ = np.lexsort((tie_s, sq, comp[su]))  # by component, ask up
    bu, bq, su, sq = bu[ob], bq[ob], su[os_], sq[os_]
    cb, cs = comp[bu], comp[su]  # shape: (n_demand,), (n_supply,)
    n_comp = int(comp.max()) + 1
    nb_c = np.bincount(cb, minlength=n_comp)  # demand units per component
    ns_c = np.bincount(cs, minlength=n_comp)  # supply units per component
    start_b = np.cumsum(nb_c) - nb_c
    start_s = np.cumsum(ns_c) - ns_c
    rank_b = np.arange(bu.size) - start_b[cb]  # shape: (n_demand,)
    rank_s = np.arange(su.size) - start_s[cs]  # shape: (n_supply,)

    facing = rank_b < ns_c[cb]  # a supply unit of the same rank exists
    ask_same_rank = np.full(bu.size, np.inf)
    ask_same_rank[facing] = sq[start_s[cb[facing]] + rank_b[facing]]
    crossed = bq >= ask_same_rank  # shape: (n_demand,) prefix of each component's ranks
    q_c = np.bincount(cb[crossed], minlength=n_comp)  # units traded per component
    trading = np.flatnonzero(q_c > 0)
    if trading.size == 0:
        return Trades.empty(), 0
    q = q_c[trading]
    v_q = bq[start_b[trading] + q - 1]
    c_q = sq[start_s[trading] + q - 1]
    more_b = q < nb_c[trading]
    more_s = q < ns_c[trading]
    v_next = np.full(trading.size, -np.inf)
    v_next[more_b] = bq[start_b[trading[more_b]] + q[more_b]]
    c_next = np.full(trading.size, np.inf)
    c_next[more_s] = sq[start_s[trading[more_s]] + q[more_s]]
    low = np.maximum(c_q, v_next)
    high = np.minimum(v_q, c_next)
    comp_price = np.full(n_comp, np.nan)
    comp_price[trading] = low + k * (high - low)

    win_b = rank_b < q_c[cb]  # shape: (n_demand,)
    win_s = rank_s < q_c[cs]  # shape: (n_supply,)
    wb_units, ws_units = bu[win_b], su[win_s]  # both ordered by (component, rank)
    if net.complete:
        # Everyone is connected: pair the rank-k winners of each component directly.
        return _aggregate(wb_units, ws_units, comp_price[comp[wb_units]], n), 0
    won_b = np.bincount(wb_units, minlength=n)  # shape: (n,) units won per buyer
    won_s = np.bincount(ws_units, minlength=n)  # shape: (n,) units won per seller
    trades = pair_on_edges(net, won_b, won_s, rng)
    trades.price = comp_price[comp[trades.buyer]]
    return trades, int(won_b.sum() - trades.volume)


def _call_auction_compiled(kernels, state, quote, k, rng, rows) -> tuple[Trades, int]:
    """:func:`call_auction` with its books and pairing compiled (``numba_auctions``).

    The same random draws in the same order (the demand units' ties, the supply units', the
    permutation of the eligible edges), so the same trades as the numpy code.
    """
    pop, net = state.population, state.network
    n = len(pop)
    rem = np.ascontiguousarray(state.remaining, dtype=np.int64)
    units = rem[rows]  # shape: (n_live,)
    tie = rng.random(int(units.sum()))  # demand units' ties, then supply units' (as two calls)
    comp = net.component
    won_b, won_s, comp_price, wb_units, ws_units = kernels.call_auction_clear(
        rows,
        rem,
        np.ascontiguousarray(quote, dtype=float),
        np.ascontiguousarray(pop.cash, dtype=float),
        pop.role,
        comp,
        int(comp.max()) + 1,
        tie,
        float(k),
    )
    if wb_units.size == 0:
        return Trades.empty(), 0
    if net.complete:
        return _aggregate(wb_units, ws_units, comp_price[comp[wb_units]], n), 0
    eligible = kernels.eligible_edges(net.buyer, net.seller, won_b, won_s)
    order = rng.permutation(eligible.size)  # random edge order
    b, s, p, qty, e = kernels.greedy_pairs(
        eligible, order, net.buyer, net.seller, won_b, won_s, comp, comp_price
    )
    return Trades(b, s, p, qty, e), int(wb_units.size - qty.sum())


def pair_on_edges(
    net: TradingNetwork, units_b: np.ndarray, units_s: np.ndarray, rng: np.random.Generator
) -> Trades:
    """Match winning units along network edges greedily in a random edge order.

    Each edge joining two traders with units to place is a candidate for
    ``min(units_b, units_s)`` unit trades, taken edge by edge in random order
    (:func:`greedy_accept`). Prices are left NaN for the caller to fill.
    """
    eligible = np.flatnonzero((units_b[net.buyer] > 0) & (units_s[net.seller] > 0))
    if eligible.size == 0:
        return Trades.empty()
    eligible = eligible[rng.permutation(eligible.size)]  # random edge order
    eb, es = net.buyer[eligible], net.seller[eligible]  # shape: (n_eligible,)
    reps = np.minimum(units_b[eb], units_s[es])
    edge = _copies(reps)  # unit copies, an edge's side by side
    key = np.arange(edge.size)  # candidates are laid out in acceptance order
    accepted = greedy_accept(key, eb[edge], es[edge], units_b, units_s)
    qty = np.bincount(edge[accepted], minlength=eligible.size)  # units per eligible edge
    used = qty > 0
    return Trades(eb[used], es[used], np.full(int(used.sum()), np.nan), qty[used])


# -- bilateral bargaining -------------------------------------------------------------------
def bargaining(state: MarketState, quote: np.ndarray, rng: np.random.Generator) -> Trades:
    """Neighbouring pairs whose reservation prices cross trade at the midpoint.

    Edges with ``quote[buyer] >= quote[seller]`` (both finite, both with units left) are taken in
    random order; each may trade up to ``min(units left)`` units while both sides still have units
    (and the buyer cash for the midpoint price), via :func:`greedy_accept`.
    """
    pop, net = state.population, state.network
    rem = state.remaining
    eb, es = net.buyer, net.seller  # shape: (n_edges,)
    qb, qs = quote[eb], quote[es]
    with np.errstate(invalid="ignore"):
        crossing = (qb >= qs) & (rem[eb] > 0) & (rem[es] > 0)  # shape: (n_edges,)
    pairs = np.flatnonzero(crossing)
    if pairs.size == 0:
        return Trades.empty()
    pairs = pairs[rng.permutation(pairs.size)]  # random order of the deals
    eb, es = eb[pairs], es[pairs]
    mid = 0.5 * (qb[pairs] + qs[pairs])  # shape: (n_pairs,) split the difference
    reps = np.minimum(rem[eb], rem[es])
    edge = _copies(reps)  # unit copies, a pair's side by side
    key = np.arange(edge.size)  # candidates are laid out in acceptance order
    budgets = bool(np.isfinite(pop.cash[eb]).any())
    accepted = greedy_accept(
        key,
        eb[edge],
        es[edge],
        rem,
        rem,
        price=mid[edge] if budgets else None,
        cash=pop.cash if budgets else None,
    )
    qty = np.bincount(edge[accepted], minlength=pairs.size)
    used = qty > 0
    return Trades(eb[used], es[used], mid[used], qty[used])


# -- continuous double auction --------------------------------------------------------------
def price_range(pop: Population, low: float | None, high: float | None) -> tuple[float, float]:
    """Default quote range: from the lowest to the highest of all values and costs."""
    lo = float(np.min(pop.value)) if low is None else float(low)
    hi = float(np.max(pop.value)) if high is None else float(high)
    return lo, hi


def _curve_draws(pop: Population, who: np.ndarray, z: np.ndarray, lo: float, hi: float):
    """Prices drawn from each arriving trader's own propensity curve, shape (n_arrivals,).

    Normal family: ``mu + sigma z``. Other families: inverse-CDF sampling of the curve normalised
    on a 257-point grid over the quote range (one-sided curves need a bounded range).
    """
    if pop.curve == "normal":
        return pop.mu[who] + pop.sigma[who] * z
    rows, inverse = np.unique(who, return_inverse=True)
    grid = np.linspace(lo, hi, 257)
    dens = np.asarray(pop.curves(rows).value(grid[:, None]), dtype=float).T  # (n_rows, 257)
    cdf = np.cumsum(dens, axis=1)
    cdf /= cdf[:, -1:]
    from scipy.special import ndtr

    u = ndtr(z)  # the same standard normals, turned into uniforms
    cdf_w = np.concatenate([np.zeros((rows.size, 1)), cdf], axis=1)[inverse]  # (n_arr, 258)
    cell = np.clip((cdf_w < u[:, None]).sum(axis=1), 1, grid.size)  # mass cell of each draw
    rows_i = np.arange(u.size)
    c0, c1 = cdf_w[rows_i, cell - 1], cdf_w[rows_i, cell]
    frac = np.where(c1 > c0, (u - c0) / np.where(c1 > c0, c1 - c0, 1.0), 0.5)
    step = grid[1] - grid[0]
    price = grid[cell - 1] - 0.5 * step + frac * step  # linear within the cell around a point
    return np.clip(price, lo, hi)


def double_auction(
    state: MarketState,
    rng: np.random.Generator,
    strategy: str,
    quotes_per_round: int | None,
    price_low: float | None,
    price_high: float | None,
) -> Trades:
    """Continuous double auction with one standing quote per trader (see DoubleAuction)."""
    pop, net = state.population, state.network
    rem = np.array(state.remaining, dtype=np.int64, copy=True)
    live = np.flatnonzero((rem > 0) & (net.degree > 0))  # traders who can quote at all
    if live.size == 0:
        return Trades.empty()
    lo, hi = price_range(pop, price_low, price_high)
    n_quotes = 20 * live.size if quotes_per_round is None else int(quotes_per_round)
    if n_quotes == 0:
        return Trades.empty()

    # All random draws up front: who arrives, then one number per arrival for the quote.
    pick = rng.integers(0, live.size, n_quotes)  # shape: (n_quotes,)
    kernels = None if strategy == "curve" else _compiled()
    if kernels is not None and live[-1] < min(pop.role.shape[0], pop.value.shape[0]):
        # The numpy lines below (gathers, uniforms, zero-intelligence quotes) in one compiled
        # pass: the same numbers, the uniforms drawn from rng's own bit generator (same stream).
        who, is_bid, quote = _quote_buffers(state, n_quotes)
        kernels.double_auction_quotes(
            live,
            pick,
            pop.role,
            pop.value,
            BUYER,
            strategy == "zi_c",
            lo,
            hi,
            acceleration._bits(rng),
            who,
            is_bid,
            quote,
        )
    else:
        who = live[pick]
        is_bid = pop.role[who] == BUYER  # shape: (n_quotes,)
        value = pop.value[who]
        if strategy == "curve":
            quote = _curve_draws(pop, who, rng.standard_normal(n_quotes), lo, hi)
        else:
            u = rng.random(n_quotes)
            if strategy == "zi_c":
                # Budget-constrained: bids in [low, value], asks in [cost, high] (Gode and Sunder).
                q_low = np.where(is_bid, np.minimum(lo, value), value)
                q_high = np.where(is_bid, value, np.maximum(hi, value))
            else:  # zi_u: anywhere in the range
                q_low = np.full(n_quotes, lo)
                q_high = np.full(n_quotes, hi)
            quote = q_low + u * (q_high - q_low)

    bounded = state.price_bounded  # MODEL.md section 9: quotes outside the bounds are refused
    floor, ceiling = state.price_floor, state.price_ceiling
    cash = pop.cash.astype(float)  # a copy: the loop spends it
    fast = acceleration.double_auction_book(
        who, is_bid, quote, rem, cash, _partner_arrays(state), bounded, floor, ceiling
    )
    if fast is not None:  # the same loop, compiled (numba_loops.double_auction_book)
        out_b, out_s, out_p = fast
        if out_b.size == 0:
            return Trades.empty()
        return Trades(out_b, out_s, out_p, np.ones(out_b.size))
    return _book_loop(state, who, is_bid, quote, rem, cash, bounded, floor, ceiling)


#: Key of the per-market cache entry holding the double auction's arrival columns.
_QUOTES_KEY = "double_auction.quotes"


def _quote_buffers(state: MarketState, n_quotes: int):
    """Arrays ``(who, is_bid, quote)`` of ``n_quotes`` rows for the compiled set-up to fill.

    Kept from round to round (per market): fresh arrays of 2e5 rows cost more in first-touch
    page faults than the compiled pass takes to fill them. Nothing outside ``double_auction``
    holds them (the compiled book returns new arrays), so the next round may overwrite them.
    """
    bufs = state.cache.get(_QUOTES_KEY)
    if bufs is None or bufs[0].shape[0] != n_quotes:
        bufs = (np.empty(n_quotes, np.int64), np.empty(n_quotes, bool), np.empty(n_quotes))
        state.cache[_QUOTES_KEY] = bufs
    return bufs


def _book_loop(state, who, is_bid, quote, rem, cash, bounded, floor, ceiling) -> Trades:
    """The arrival loop in Python: the reference the compiled loop repeats step for step."""
    n = len(state.population)
    n_quotes = who.size
    # The arrival loop reads a few partners per step: plain Python lists and memoryviews serve
    # such scalar reads several times faster than numpy calls on small slices.
    sellers_of, b_ptr, buyers_of, s_ptr, comp = _partner_views(state)
    standing = [0.0] * n  # each trader's standing quote (valid only while posted > cleared)
    posted = [-1] * n  # when it was posted
    cleared = [-1] * (max(comp) + 1)  # last book clearing per part of the network
    rem_l = rem.tolist()
    cash_l = cash.tolist()
    out_b: list[int] = []
    out_s: list[int] = []
    out_p: list[float] = []

    # The mechanism is sequential: each quote meets the book left by all earlier quotes, so the
    # arrivals are a Python loop (lean: every random number was drawn above).
    who_l, bid_l, quote_l = who.tolist(), is_bid.tolist(), quote.tolist()
    for t in range(n_quotes):
        i = who_l[t]
        if rem_l[i] <= 0:
            continue
        c = comp[i]
        x = quote_l[t]
        fresh = cleared[c]  # quotes posted after this are on the book
        best_j = -1
        if bid_l[t]:
            if x > cash_l[i]:
                x = cash_l[i]
        if bounded and not floor <= x <= ceiling:
            continue
        if bid_l[t]:
            best = math.inf
            for j in sellers_of[b_ptr[i] : b_ptr[i + 1]]:  # lowest ask, first in row order
                if posted[j] > fresh and standing[j] < best:
                    best, best_j = standing[j], j
            if best_j >= 0 and best <= x:
                _record(out_b, out_s, out_p, rem_l, cash_l, cleared, i, best_j, best, c, t)
                continue
        else:
            best = -math.inf
            for j in buyers_of[s_ptr[i] : s_ptr[i + 1]]:  # highest bid, first in row order
                if posted[j] > fresh and standing[j] > best:
                    best, best_j = standing[j], j
            if best_j >= 0 and best >= x:
                _record(out_b, out_s, out_p, rem_l, cash_l, cleared, best_j, i, best, c, t)
                continue
        if posted[i] > fresh and (x <= standing[i] if bid_l[t] else x >= standing[i]):
            continue  # a standing quote may only be improved
        standing[i] = x
        posted[i] = t
    if not out_b:
        return Trades.empty()
    return Trades(np.array(out_b), np.array(out_s), np.array(out_p), np.ones(len(out_b)))


#: Key of the per-market cache entry holding the partner views of the double auction.
_PARTNERS_KEY = "double_auction.partners"
_VIEWS_KEY = "double_auction.partner_views"


def _partner_arrays(state: MarketState):
    """Partner lists of every trader as int64 arrays (cached per network).

    Returns ``(sellers_of, b_ptr, buyers_of, s_ptr, comp)``: buyer ``i``'s sellers are
    ``sellers_of[b_ptr[i]:b_ptr[i + 1]]`` (in edge order), seller ``i``'s buyers
    ``buyers_of[s_ptr[i]:s_ptr[i + 1]]`` (in edge order), and ``comp`` is each row's network part.
    """
    net = state.network
    entry = state.cache.get(_PARTNERS_KEY)
    if entry is not None and entry[0] is net:
        return entry[1]
    n = net.n
    by_seller = np.argsort(net.seller, kind="stable")  # shape: (n_edges,) edges by seller
    buyers = np.ascontiguousarray(net.buyer[by_seller], dtype=np.int64)
    sellers = np.ascontiguousarray(net.seller, dtype=np.int64)
    s_ptr = np.concatenate([[0], np.cumsum(np.bincount(net.seller, minlength=n))]).astype(np.int64)
    arrays = (
        sellers,
        np.ascontiguousarray(net.buyer_ptr, dtype=np.int64),
        buyers,
        s_ptr,
        np.ascontiguousarray(net.component, dtype=np.int64),
    )
    state.cache[_PARTNERS_KEY] = (net, arrays)
    return arrays


def _partner_views(state: MarketState):
    """The partner lists of :func:`_partner_arrays` for the Python loop (cached per network).

    Memoryviews over the int64 edge arrays (slicing copies nothing, unlike lists, which would
    hold one Python int per edge); lists for the pointers and parts.
    """
    net = state.network
    entry = state.cache.get(_VIEWS_KEY)
    if entry is not None and entry[0] is net:
        return entry[1]
    sellers, b_ptr, buyers, s_ptr, comp = _partner_arrays(state)
    views = (memoryview(sellers), b_ptr.tolist(), memoryview(buyers), s_ptr.tolist(), comp.tolist())
    state.cache[_VIEWS_KEY] = (net, views)
    return views


def _record(out_b, out_s, out_p, rem, cash, cleared, b, s, p, c, t) -> None:
    """Book one unit trade and clear the component's book (Gode and Sunder's rule)."""
    out_b.append(b)
    out_s.append(s)
    out_p.append(p)
    rem[b] -= 1
    rem[s] -= 1
    cash[b] -= p
    cleared[c] = t
