"""The stages of one round, in the order :meth:`MarketEngine.step` calls them.

::

    begin_round -> apply_interventions -> clear -> settle -> drift -> measure -> record

Each stage is a function of the market. Rules read the state and return arrays; only these
stages write state. Interventions change the market only through the market's own methods
(``replace_network``, ``replace_population``, ``replace_clearing``, ``remove_traders``) and its
price policy, so there is one place where the market changes mid-run.
"""

from __future__ import annotations

import numpy as np

from propensim.agents.population import BUYER, SELLER
from propensim.plugins import acceleration
from propensim.plugins.metrics import measure_row
from propensim.plugins.trade_checks import check_trades, settle_trades
from propensim.plugins.types import RoundOutcome, Trades

#: Slack on the price-bound check (a bound is a number the rule copies, not a computed sum).
_BOUND_SLACK = 1e-9


def begin_round(market) -> None:
    """Restore holdings (when every round is a fresh trading period) and set units left."""
    pop, state = market.population, market.state
    state.round = market.round
    remaining = acceleration.start_round(  # one compiled pass when available: same numbers
        market.replenish,
        market._initial_stock,
        market._initial_cash,
        pop.stock,
        pop.cash,
        pop.capacity,
        market._is_seller,
    )
    if remaining is None:
        if market.replenish:
            np.copyto(pop.stock, market._initial_stock)
            np.copyto(pop.cash, market._initial_cash)
        remaining = units_left(market)
    state.remaining = remaining


def units_left(market) -> np.ndarray:
    """Units each trader may trade now: capacity, and for a seller no more than its stock."""
    pop = market.population
    remaining = pop.capacity.astype(np.int64)  # shape: (n,)
    np.minimum(remaining, pop.stock, out=remaining, where=market._is_seller)
    return remaining


def apply_interventions(market) -> None:
    """Begin the interventions that start this round and end those that stop (spec order)."""
    if market.schedule.act(market, market.round):
        # an intervention may have changed holdings, capacity or rows: recount units left
        market.state.remaining = units_left(market)
    policy, state = market.policy, market.state
    state.price_floor = policy.floor
    state.price_ceiling = policy.ceiling


def clear(market) -> Trades:
    """Ask the clearing rule for this round's trades.

    Under a per-unit tax or subsidy the rule sees each buyer's value and curve lowered by the
    buyer-side tax and each seller's raised by the seller-side tax (what the trader keeps of a
    price), and the price it returns is the market price between them (MODEL.md section 9).
    The shift is undone before anything else reads the population.
    """
    pop, state, rule = market.population, market.state, market.clearing
    state.meetings = [] if market.recorder.keep_meetings else None
    wedge = market.policy.buyer_tax != 0.0 or market.policy.seller_tax != 0.0
    if wedge:
        saved_mu, saved_value = pop.mu.copy(), pop.value.copy()
        shift = np.where(pop.role == BUYER, -market.policy.buyer_tax, market.policy.seller_tax)
        pop.mu += shift
        pop.value += shift
    try:
        if getattr(rule, "per_agent", False):
            from propensim.plugins.clearing import run_per_agent

            # run_per_agent shrinks a private copy of remaining; state stays as it was
            return run_per_agent(rule, state, market._rng_clearing, market.traders)
        return rule.clear(state, market._rng_clearing)
    finally:
        if wedge:
            np.copyto(pop.mu, saved_mu)
            np.copyto(pop.value, saved_value)


def settle(market, trades: Trades) -> RoundOutcome:
    """Check the trades, then transfer goods and money (and the treasury's share).

    The buyer pays ``price + buyer_tax`` per unit and the seller receives
    ``price - seller_tax``; the difference goes to the treasury (a subsidy is a negative tax).
    Goods are conserved; money is conserved among buyers, sellers and the treasury.
    """
    pop, state, policy = market.population, market.state, market.policy
    check_trades(state, trades)
    if state.price_bounded and len(trades):
        _check_bounds(market, trades)
    buyer_pays = seller_gets = None
    revenue = 0.0
    if len(trades) and (policy.buyer_tax != 0.0 or policy.seller_tax != 0.0):
        buyer_pays = trades.price + policy.buyer_tax
        seller_gets = trades.price - policy.seller_tax
        revenue = float((trades.quantity * (policy.buyer_tax + policy.seller_tax)).sum())
    settle_trades(pop, trades, buyer_pays, seller_gets)
    outcome = _Outcome.from_trades(trades, len(pop), buyer_pays, seller_gets, revenue)
    if state.price_bounded:
        outcome.unmet_demand, outcome.unmet_supply = _unmet(market, outcome)
    market.treasury += revenue
    return outcome


class _Outcome(RoundOutcome):
    """A round's outcome whose per-trader tallies, when first read, take one compiled pass."""

    def _tally(self) -> None:
        fused = acceleration.kernel("tally")
        if fused is None:
            return super()._tally()
        trades, n = self.trades, self.__dict__.pop("_n")
        self.traded, self.mean_price = fused(
            trades.buyer, trades.seller, trades.quantity, trades.price, n
        )


def _check_bounds(market, trades: Trades) -> None:
    state = market.state
    lo, hi = state.price_floor, state.price_ceiling
    slack = _BOUND_SLACK * max(
        1.0, abs(lo) if np.isfinite(lo) else 1.0, abs(hi) if np.isfinite(hi) else 1.0
    )
    outside = (trades.price < lo - slack) | (trades.price > hi + slack)
    if outside.any():
        i = int(np.flatnonzero(outside)[0])
        name = getattr(market.clearing, "plugin_name", type(market.clearing).__name__)
        raise ValueError(
            f"clearing rule {name!r} made trade {i} at price {trades.price[i]:.6g}, outside the "
            f"price bounds [{lo:.6g}, {hi:.6g}] in force; rules must honour "
            "state.price_floor and state.price_ceiling"
        )


def _unmet(market, outcome: RoundOutcome) -> tuple[int, int]:
    """Units wanted at a binding ceiling (or offered at a binding floor) that did not trade.

    Demand at a ceiling ``c``: the units left this round of buyers whose value is at least ``c``;
    unmet is what of it did not trade. Supply at a floor mirrors it with sellers' costs.
    """
    pop, state = market.population, market.state
    traded = np.asarray(outcome.traded)
    left = state.remaining - traded  # shape: (n,) units that could still have traded
    demand = supply = 0
    if np.isfinite(state.price_ceiling):
        wants = (pop.role == BUYER) & (pop.value >= state.price_ceiling)
        demand = int(left[wants].sum())
    if np.isfinite(state.price_floor):
        offers = (pop.role == SELLER) & (pop.value <= state.price_floor)
        supply = int(left[offers].sum())
    return demand, supply


def drift(market, outcome: RoundOutcome) -> None:
    """Move the curves by the drift rule (over one round: ``state.elapsed`` is 1)."""
    if market.drift is None:
        return
    pop = market.population
    mu, sigma = market.drift.apply(market.state, outcome, market._rng_drift)
    pop.mu[:] = mu
    pop.sigma[:] = sigma


def measure(market, outcome: RoundOutcome) -> dict[str, float]:
    """One row: the round number and every metric's value."""
    row: dict[str, float] = {"round": market.round}
    # the built-in metrics in one compiled call when they can be (the same numbers)
    return measure_row(row, market.metrics, market.metric_batch, market.state, outcome)


def record(market, outcome: RoundOutcome, row: dict[str, float]) -> None:
    """Hand the round to the recorder and remember its mean price for the next round."""
    market.recorder.record(market.round, row, market.population, outcome)
    if market.state.meetings:
        market.recorder.record_meetings(market.round, market.state.meetings)
    trades = outcome.trades
    if len(trades):
        fused = acceleration.kernel("weighted_price")
        if fused is not None:  # one compiled pass, numpy's rounding (the same number)
            market.state.last_price = float(fused(trades.price, trades.quantity))
        else:  # not np.dot: BLAS may wake its threads for long vectors (costly when shared)
            q = trades.quantity
            market.state.last_price = float((trades.price * q).sum() / q.sum())
