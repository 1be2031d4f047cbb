"""Propensity matching kernels and the per-agent driver.

Array path: every buyer with units left meets ``meetings`` sellers drawn uniformly from its
network neighbours; a meeting trades with probability equal to the joint curve's peak, at a price
drawn from the normalised joint curve. Successful meetings are then accepted in the order
(random buyer order, meeting number) while both sides have units left, by
:func:`~propensim.plugins.sequential_accept.greedy_accept`; so the result has the same
distribution as a trader-by-trader loop (:func:`pair_meeting` is that loop's one-pair step).

References
----------
P. A. Bromiley, "Products and Convolutions of Gaussian Probability Density Functions",
Tina Memo 2003-003, University of Manchester (2003): mean, variance and scale of a product of
two normal curves.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from propensim.agents.population import BUYER, SELLER, Population
from propensim.plugins import acceleration
from propensim.plugins.sequential_accept import greedy_accept
from propensim.plugins.types import MarketState, Trades


def _joint_of(pop: Population, b: np.ndarray, s: np.ndarray, grid_points: int):
    """Joint curves of the pairs (b, s) for a non-normal family (batch of JointCurve)."""
    from propensim.agents.joint_curve import grid_joint

    return grid_joint(pop.curves(b), pop.curves(s), points=grid_points)


def normal_joint(mu_b, sig_b, a_b, mu_s, sig_s, a_s):
    """Peak, mean and sd of the product of two normal propensity curves.

    ``J(x) = a_b exp(-(x-mu_b)^2/(2 s_b^2)) a_s exp(-(x-mu_s)^2/(2 s_s^2))`` is a scaled normal:
    mean ``(mu_b s_s^2 + mu_s s_b^2)/(s_b^2+s_s^2)``, variance ``s_b^2 s_s^2/(s_b^2+s_s^2)``,
    peak ``a_b a_s exp(-(mu_b-mu_s)^2 / (2 (s_b^2+s_s^2)))`` (Bromiley 2003). Works on arrays or
    scalars (price units; the peak is a probability).
    """
    var_b = sig_b * sig_b
    var_s = sig_s * sig_s
    var_sum = var_b + var_s
    gap = mu_b - mu_s
    peak = a_b * a_s * np.exp(-(gap * gap) / (2.0 * var_sum))
    mean = (mu_b * var_s + mu_s * var_b) / var_sum
    sd = np.sqrt(var_b * var_s / var_sum)
    return peak, mean, sd


#: Key of the per-market cache entry holding the buyers that have trading partners.
_CACHE_KEY = "propensity_matching.buyers"
#: Key of the per-market cache entry holding the meetings table when every buyer is live.
_MEETINGS_KEY = "propensity_matching.meetings"


def _buyer_table(state: MarketState):
    """The buyers who may meet someone, with their first edge and degree (cached per market).

    Returns ``(rows, start, degree, span, lonely)``: ``rows`` ascending, shape (n_b,);
    ``start[i]`` is the position of buyer ``rows[i]``'s first edge in the network's edge arrays;
    ``span`` is ``slice(rows[0], rows[-1] + 1)`` when the rows are one run of consecutive
    population rows (then column reads are slices, not gathers), else None. With a span, the
    buyers without partners stay in ``rows`` (so that it remains a run) and ``lonely`` lists
    their positions, to be masked; otherwise ``rows`` holds only buyers with partners and
    ``lonely`` is None.
    """
    pop, net = state.population, state.network
    entry = state.cache.get(_CACHE_KEY)
    if entry is not None and entry[0] is net and entry[1] is pop:
        return entry[2]
    ptr = net.buyer_ptr  # shape: (n + 1,)
    degree = ptr[1:] - ptr[:-1]  # shape: (n,) trading partners of each buyer
    rows = np.flatnonzero(pop.role == BUYER)  # shape: (n_b,)
    span = lonely = None
    if rows.size and int(rows[-1] - rows[0]) == rows.size - 1:
        span = slice(int(rows[0]), int(rows[-1]) + 1)
        lonely = np.flatnonzero(degree[rows] == 0)  # shape: (n_lonely,)
    else:
        rows = rows[degree[rows] > 0]
    start = np.minimum(ptr[rows], max(net.n_edges - 1, 0))  # lonely rows: any valid position
    table = (rows, start, degree[rows], span, lonely)
    state.cache[_CACHE_KEY] = (net, pop, table)
    return table


def propensity_round(
    state: MarketState,
    rng: np.random.Generator,
    meetings: int,
    threshold: float | None,
    grid_points: int,
) -> Trades:
    """One round of propensity matching over whole arrays (see module docstring).

    Random draws, in this order: one uniform ``u`` per meeting (buyers in row order, then
    meeting number), one uniform per buyer whose meetings produced at least one agreement (its
    turn's key: the buyers take their turns in ascending key, a uniformly random order), then one
    price per accepted trade (per agreement, before the acceptance, when some buyer has a
    budget). The trades are listed by buyer row (then meeting number), not in turn order.

    One uniform serves both choices of a meeting: with ``d`` partners, ``floor(u d)`` picks the
    neighbour and the fractional part ``u d - floor(u d)``, again uniform on [0, 1) and independent
    of the pick, decides the trade (the same reuse as in the alias method, Walker 1977). Only the
    buyers with an agreement need a turn: the turns of the others change nothing, and a uniformly
    random order restricted to a subset is a uniformly random order of that subset.

    References
    ----------
    A. J. Walker, "An efficient method for generating discrete random variables with general
    distributions", ACM Trans. Math. Softw. 3:253-256 (1977): one uniform split into an index and
    a fractional part.
    """
    pop, net = state.population, state.network
    if meetings == 0:
        return Trades.empty()
    if net.n_edges == 0:
        return Trades.empty()
    rows, start, deg, own, lonely = _buyer_table(state)
    all_live = acceleration.all_live(state.remaining, rows, own)  # every buyer has units left
    if own is None or meetings > 1 or not all_live:
        # Every buyer live (the common case: units restored each round): the table depends only
        # on the network and the meetings, so it is built once and kept (read-only).
        kept = state.cache.get(_MEETINGS_KEY) if all_live else None
        if kept is not None and kept[0] is net and kept[1] is pop and kept[2] == meetings:
            rows, start, deg = kept[3]
        else:
            live = state.remaining[rows if own is None else own] > 0  # shape: (n_b,) units left
            keep = np.flatnonzero(live & (deg > 0))  # gather the buyers who can meet someone
            rows, start, deg = rows[keep], start[keep], deg[keep]
            if meetings > 1:
                rows, start, deg = (np.repeat(x, meetings) for x in (rows, start, deg))
            if all_live:
                for column in (rows, start, deg):
                    column.flags.writeable = False
                state.cache[_MEETINGS_KEY] = (net, pop, meetings, (rows, start, deg))
        if rows.size == 0:
            return Trades.empty()
        own, lonely = rows, None
    normal = pop.curve == "normal"
    bounded = state.price_bounded
    if bounded and not normal:
        raise ValueError(
            "price bounds with propensity matching need the normal curve family "
            f"(this population's curves are {pop.curve!r})"
        )
    sigma = pop.sigma
    one_width = normal and acceleration.is_uniform(sigma)
    # Bromiley 2003: the joint peak is exp(-gap^2 / (2 var_sum)) times the heights. With one
    # width for every trader (the default, and kept by drift rules that leave widths alone) the
    # variances are scalars and broadcast.
    var_b = float(sigma[0]) ** 2 if one_width else None
    fast = ready = None
    if one_width and isinstance(own, slice) and not bounded:  # compiled when available
        fast = acceleration.meet_one_width(
            rng, deg, start, net.seller, pop.mu, own.start, -0.5 / (var_b + var_b)
        )
    elif one_width and not bounded and state.meetings is None:  # buyers by row: compiled too
        whole = acceleration.meet_and_accept_rows(
            rng,
            rows,
            deg,
            start,
            net.seller,
            pop.mu,
            -0.5 / (var_b + var_b),
            pop.activity,
            threshold,
            state.remaining,
            pop.cash,
            math.sqrt(0.5 * var_b),
        )
        if whole is not None:
            (status, buyer, seller, price, where), ready = whole
            if status == 0:
                return Trades.empty()
            if status == 1:
                return Trades.unit_trades(buyer, seller, price, where)
            u, s, edge, peak = ready  # a budget: the numpy path goes on from the same meetings
    if ready is None and fast is not None:
        u, s, edge, peak = fast
        np.exp(peak, out=peak)
        if meetings == 1 and state.meetings is None:  # the rest of the round in one pass
            rest = acceleration.accept_one_width(
                rng,
                (u, s, edge, peak),
                pop.activity,
                lonely,
                threshold,
                own.start,
                state.remaining,
                pop.cash,
                pop.mu,
                math.sqrt(0.5 * var_b),
            )
            if rest is not None and rest[0] == 0:
                return Trades.empty()
            if rest is not None and rest[0] == 1:
                _, buyer, seller, price, where = rest
                return Trades.unit_trades(buyer, seller, price, where)
    elif ready is None:
        # Meetings in row order (buyer, then meeting number): column reads walk memory forward.
        u = rng.random(rows.size)  # shape: (k,) on [0, 1 - 2^-53]
        u *= deg  # rounded u d stays below d (d < 2^53): no pick can run past the buyer's edges
        pick = u.astype(np.int64)  # shape: (k,) floor(u d): which neighbour
        u -= pick  # shape: (k,) fractional part: uniform on [0, 1), decides the trade
        edge = start + pick  # shape: (k,) position of the meeting's edge
        s = net.seller[edge]  # shape: (k,) the seller met (any seller for a lonely buyer: masked)
        if normal:  # inline and in place: this is the hot path
            var_b = var_b if one_width else np.square(sigma[own])  # scalar or (k,)
            var_s = var_b if one_width else np.square(sigma[s])
            var_sum = var_b + var_s
            peak = pop.mu[own] - pop.mu[s]  # shape: (k,)
            np.square(peak, out=peak)
            peak *= -0.5 / var_sum
            np.exp(peak, out=peak)
        else:
            peak = np.array(_joint_of(pop, rows, s, grid_points).peak, dtype=float).reshape(-1)
    if normal and pop.activity.min() < 1.0:  # heights of 1 (the default) need no product
        peak *= pop.activity[own]
        peak *= pop.activity[s]  # shape: (k,) joint peak a_b a_s exp(-gap^2 / (2 var_sum))
    if bounded:  # MODEL.md section 9: the chance is the largest J over the allowed prices
        peak *= _bounded_share(pop, own, s, var_b, state.price_floor, state.price_ceiling)
    if lonely is not None and lonely.size:
        peak[lonely] = 0.0  # no partner, no meeting
    traded = u < peak if threshold is None else peak >= threshold  # shape: (k,) agreed
    hit = np.flatnonzero(traded)  # shape: (n_hit,) ascending
    if hit.size == 0:
        if state.meetings is not None:
            _report_meetings(state, rows, s, lonely, hit, np.zeros(0))
        return Trades.empty()
    n_rows = len(pop)
    turn = _turn_keys(hit, rows, meetings, rng)  # shape: (n_hit,)

    def prices(at: np.ndarray) -> np.ndarray:
        """One price per agreed meeting ``at`` (positions), drawn from its joint curve.

        Under price bounds, a draw that falls outside is replaced by a draw from the joint
        curve restricted to the bounds: the mixture is exactly the restricted curve, and a
        bound that never binds uses no extra draw (results identical to no bound).
        """
        price = unbounded_prices(at)
        if bounded:
            lo, hi = state.price_floor, state.price_ceiling
            out = np.flatnonzero((price < lo) | (price > hi))
            if out.size:
                mean, sd = _joint_normal(pop, rows[at[out]], s[at[out]])
                price[out] = _truncated_normal(rng, mean, sd, lo, hi)
        return price

    def unbounded_prices(at: np.ndarray) -> np.ndarray:
        if not normal:
            joint = _joint_of(pop, rows[at], s[at], grid_points)
            return np.asarray(joint.sample_price(rng), dtype=float).reshape(-1)
        if one_width:  # compiled when available: the same numbers
            sd = math.sqrt(0.5 * var_b)
            fast = acceleration.prices_one_width(rng, pop.mu, rows[at], s[at], sd, n_rows)
            if fast is not None:
                return fast
        mu_b, mu_s = pop.mu[rows[at]], pop.mu[s[at]]  # shape: (n_at,)
        if one_width:
            price = mu_b + mu_s
            price *= 0.5  # shape: (n_at,) joint mean; sd as above
        else:
            vb, vs, vsum = var_b[at], var_s[at], var_sum[at]  # shape: (n_at,)
            price = mu_b * vs
            price += mu_s * vb
            price /= vsum  # shape: (n_at,) joint mean
            sd = vb * vs
            sd /= vsum
            np.sqrt(sd, out=sd)  # shape: (n_at,) joint sd
        noise = rng.standard_normal(at.size)  # shape: (n_at,)
        noise *= sd
        price += noise
        return price

    b = rows[hit]  # shape: (n_hit,) by buyer row
    cash = pop.cash
    budgets = bool(np.isfinite(cash[b]).any())
    # Without budgets acceptance does not depend on the price: draw prices for accepted
    # meetings only. With budgets every agreement needs its price first.
    price = prices(hit) if budgets else None
    accepted = greedy_accept(
        turn,
        b,
        s[hit],
        state.remaining,
        state.remaining,
        price=price,
        cash=cash if budgets else None,
        unique_buyers=meetings == 1,
    )
    take = hit if accepted.all() else hit[accepted]  # shape: (n_trades,)
    price = prices(take) if price is None else price[accepted]
    if state.meetings is not None:
        _report_meetings(state, rows, s, lonely, take, price)
    ones = np.ones(take.size, dtype=np.int64)
    return Trades(rows[take], s[take], price, ones, edge[take])


def _report_meetings(state, rows, s, lonely, take, price) -> None:
    """Hand every meeting of the round to the recorder: traded ones with their price."""
    k = rows.size
    traded = np.zeros(k, dtype=np.int64)
    traded[take] = 1
    at = np.full(k, np.nan)
    at[take] = price
    real = np.ones(k, dtype=bool)
    if lonely is not None and lonely.size:
        real[lonely] = False  # a buyer without partners met nobody
    state.meetings.append((rows[real], s[real], at[real], traded[real]))


def _joint_normal(pop: Population, b: np.ndarray, s: np.ndarray):
    """Mean and sd of the normalised joint curve of normal pairs (Bromiley 2003)."""
    vb, vs = np.square(pop.sigma[b]), np.square(pop.sigma[s])
    vsum = vb + vs
    return (pop.mu[b] * vs + pop.mu[s] * vb) / vsum, np.sqrt(vb * vs / vsum)


def _bounded_share(pop, own, s, var_b, floor: float, ceiling: float) -> np.ndarray:
    """``max J over [floor, ceiling] / max J`` for each meeting (normal curves).

    ``J`` is a scaled normal with mean ``m`` and sd ``d``: its largest value on the interval is at
    ``clip(m, floor, ceiling)``, so the share is ``exp(-(clip(m) - m)^2 / (2 d^2))``.
    """
    b = np.arange(own.start, own.stop) if isinstance(own, slice) else own
    mean, sd = _joint_normal(pop, b, s)
    gap = np.clip(mean, floor, ceiling) - mean
    return np.exp(-(gap * gap) / (2.0 * sd * sd))


def _truncated_normal(rng, mean, sd, floor: float, ceiling: float) -> np.ndarray:
    """Draws of N(mean, sd^2) restricted to [floor, ceiling] (inverse CDF, stable in the tails)."""
    from scipy.stats import truncnorm

    a = (floor - mean) / sd
    b = (ceiling - mean) / sd
    x = truncnorm.rvs(a, b, loc=mean, scale=sd, size=mean.shape, random_state=rng)
    return np.clip(np.asarray(x, dtype=float), floor, ceiling)


def _turn_keys(
    hit: np.ndarray, rows: np.ndarray, meetings: int, rng: np.random.Generator
) -> np.ndarray:
    """Turn key of each agreed meeting (positions ``hit``, ascending) in the round.

    The buyers with an agreement take their turns in ascending order of one uniform each
    (independent keys: a uniformly random order, as a permutation would give, for one draw per
    buyer instead of a shuffle's bounded integers); a buyer's meetings share its key, and equal
    keys go in position order, which is meeting order.
    """
    if meetings == 1:
        return rng.random(hit.size)  # one meeting per buyer: every hit is a buyer
    b = rows[hit]  # shape: (n_hit,)
    first = np.empty(hit.size, dtype=bool)
    first[0] = True
    np.not_equal(b[1:], b[:-1], out=first[1:])  # shape: (n_hit,) a buyer's first agreement
    run = np.cumsum(first) - 1  # shape: (n_hit,) which buyer (run) each agreement belongs to
    return rng.random(int(run[-1]) + 1)[run]


def pair_meeting(pop: Population, i: int, j: int, grid_points: int = 257):
    """Joint peak, and a price sampler, for one buyer-seller pair (scalar per-agent path).

    Returns ``(peak, draw)`` where ``draw(rng)`` returns one price from the normalised joint curve.
    """
    if pop.curve == "normal":
        peak, mean, sd = normal_joint(
            float(pop.mu[i]),
            float(pop.sigma[i]),
            float(pop.activity[i]),
            float(pop.mu[j]),
            float(pop.sigma[j]),
            float(pop.activity[j]),
        )
        return float(peak), lambda rng: float(rng.normal(mean, sd))
    joint = _joint_of(pop, np.array([i]), np.array([j]), grid_points)
    peak = float(np.asarray(joint.peak).reshape(-1)[0])
    return peak, lambda rng: float(np.asarray(joint.sample_price(rng)).reshape(-1)[0])


@dataclasses.dataclass(frozen=True)
class RowAgent:
    """The lightest agent a per-agent rule can be driven with: just a population row."""

    index: int


def run_per_agent(rule, state: MarketState, rng: np.random.Generator, agents=None) -> Trades:
    """Drive a per-agent clearing rule trader by trader.

    Calls ``rule.agent_trades(agent, state, rng)`` for every agent, in an order shuffled with
    ``rng``. Each returned ``(buyer, seller, price, quantity)`` tuple is checked against the units
    still allowed, and those units are taken off ``remaining`` before the next agent is called.
    The caller's ``state`` is not changed: the rule sees a shallow copy whose ``remaining`` is a
    private array that shrinks as the round goes on.

    Parameters
    ----------
    rule
        An object with ``agent_trades(agent, state, rng) -> list of tuples``.
    state : MarketState
        The state at the start of the round.
    rng : numpy.random.Generator
        The clearing stream (shuffles the agents; the rule draws from it too).
    agents : sequence, optional
        Objects with an ``index`` attribute (a population row), for example the market's mesa
        Trader agents. Defaults to one :class:`RowAgent` per population row.

    Returns
    -------
    Trades
        All agents' trades, in the order they were made.

    Raises
    ------
    ValueError
        If a returned trade names a bad row, pairs two traders of the same role, has quantity < 1
        or a non-finite price, or takes more units than a trader has left.
    """
    pop = state.population
    n = len(pop)
    if agents is None:
        agents = [RowAgent(i) for i in range(n)]
    agents = list(agents)
    remaining = np.array(state.remaining, dtype=np.int64, copy=True)
    view = dataclasses.replace(state, remaining=remaining)
    buyers: list[int] = []
    sellers: list[int] = []
    prices: list[float] = []
    quantities: list[int] = []
    name = type(rule).__name__
    for k in rng.permutation(len(agents)).tolist():
        agent = agents[k]
        for trade in rule.agent_trades(agent, view, rng) or ():
            b, s, p, q = trade
            b, s, q, p = int(b), int(s), int(q), float(p)
            where = f"{name}.agent_trades(agent {agent.index}) returned ({b}, {s}, {p}, {q})"
            if not (0 <= b < n and 0 <= s < n):
                raise ValueError(f"{where}: rows must be in 0..{n - 1}")
            if pop.role[b] != BUYER or pop.role[s] != SELLER:
                raise ValueError(f"{where}: needs a buyer row then a seller row")
            if q < 1 or not np.isfinite(p):
                raise ValueError(f"{where}: quantity must be >= 1 and price finite")
            if remaining[b] < q or remaining[s] < q:
                raise ValueError(
                    f"{where}: exceeds units left (buyer {remaining[b]}, seller {remaining[s]})"
                )
            remaining[b] -= q
            remaining[s] -= q
            buyers.append(b)
            sellers.append(s)
            prices.append(p)
            quantities.append(q)
    if not buyers:
        return Trades.empty()
    return Trades(np.array(buyers), np.array(sellers), np.array(prices), np.array(quantities))
