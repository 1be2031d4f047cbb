"""Propensity matching kernels and the per-agent driver.

Array path: every buyer with units left meets ``meetings`` sellers drawn uniformly from its
network neighbours; a meeting trades with probability equal to the joint curve's peak, at a price
drawn from the normalised joint curve. Successful meetings are then accepted in the order
(random buyer order, meeting number) while both sides have units left, by
:func:`~propensim.plugins._greedy.greedy_accept`; so the result has the same distribution as a
trader-by-trader loop (:func:`pair_meeting` is that loop's one-pair step).

References
----------
P. A. Bromiley, "Products and Convolutions of Gaussian Probability Density Functions",
Tina Memo 2003-003, University of Manchester (2003): mean, variance and scale of a product of
two normal curves.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from propensim.agents.population import BUYER, SELLER, Population
from propensim.plugins._greedy import greedy_accept
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


def propensity_round(
    state: MarketState,
    rng: np.random.Generator,
    meetings: int,
    threshold: float | None,
    grid_points: int,
) -> Trades:
    """One round of propensity matching over whole arrays (see module docstring).

    Random draws, in this order: a permutation of the active buyers (their turns in the round),
    one neighbour pick per meeting, one uniform per meeting (trade or not; skipped when
    ``threshold`` is set), then one price per successful meeting.
    """
    pop, net = state.population, state.network
    remaining = state.remaining
    ptr = net.buyer_ptr  # shape: (n + 1,)
    degree = ptr[1:] - ptr[:-1]  # shape: (n,) trading partners of each buyer
    active = np.flatnonzero((pop.role == BUYER) & (remaining > 0) & (degree > 0))  # (n_active,)
    if active.size == 0 or meetings == 0:
        return Trades.empty()
    active = active[rng.permutation(active.size)]  # the buyers' turns in this round
    # Candidates are laid out in turn order (buyer's turn, then meeting number), so the
    # acceptance order is simply the position.
    b = active if meetings == 1 else np.repeat(active, meetings)  # shape: (k,)
    key = np.arange(b.size)  # shape: (k,)
    deg_b = degree[b]  # shape: (k,)
    offset = (rng.random(b.size) * deg_b).astype(np.int64)
    np.minimum(offset, deg_b - 1, out=offset)  # guard the u * d == d rounding case
    s = net.seller[ptr[b] + offset]  # shape: (k,) the seller met

    if pop.curve == "normal":
        # Bromiley 2003, inline and in place: this is the hot path.
        mu_b, mu_s = pop.mu[b], pop.mu[s]  # shape: (k,)
        var_b = pop.sigma[b]
        var_b *= var_b
        var_s = pop.sigma[s]
        var_s *= var_s
        var_sum = var_b + var_s  # shape: (k,)
        peak = mu_b - mu_s
        peak *= peak
        peak /= var_sum
        peak *= -0.5
        np.exp(peak, out=peak)
        peak *= pop.activity[b]
        peak *= pop.activity[s]  # shape: (k,) joint peak a_b a_s exp(-gap^2 / (2 var_sum))
        if threshold is None:
            traded = rng.random(b.size) < peak  # shape: (k,) the pair agreed to trade
        else:
            traded = peak >= threshold
        hit = np.flatnonzero(traded)
        b, s, key = b[hit], s[hit], key[hit]
        vb, vs, vsum = var_b[hit], var_s[hit], var_sum[hit]  # shape: (n_hit,)
        mean = (mu_b[hit] * vs + mu_s[hit] * vb) / vsum
        sd = np.sqrt(vb * vs / vsum)
        price = mean + sd * rng.standard_normal(hit.size)  # shape: (n_hit,)
    else:
        joint = _joint_of(pop, b, s, grid_points)
        peak = np.asarray(joint.peak, dtype=float).reshape(-1)
        traded = rng.random(b.size) < peak if threshold is None else peak >= threshold
        hit = np.flatnonzero(traded)
        b, s, key = b[hit], s[hit], key[hit]
        if hit.size == 0:
            return Trades.empty()
        price = np.asarray(
            _joint_of(pop, b, s, grid_points).sample_price(rng), dtype=float
        ).reshape(-1)

    if b.size == 0:
        return Trades.empty()
    cash = pop.cash
    budgets = np.isfinite(cash[b]).any()
    accepted = greedy_accept(
        key,
        b,
        s,
        remaining,
        remaining,
        price=price if budgets else None,
        cash=cash if budgets else None,
    )
    return Trades(b[accepted], s[accepted], price[accepted], np.ones(int(accepted.sum())))


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
