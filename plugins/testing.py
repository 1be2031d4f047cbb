"""Conformance kit: run the contract's invariants against any plugin.

Plugin authors call these from their own test suites::

    from propensim.plugins.testing import check_clearing_rule

    def test_my_rule_conforms():
        check_clearing_rule(MyRule())

Each check builds small markets itself (populations with
:func:`~propensim.agents.population.build_population`, networks as
:class:`~propensim.plugins.types.TradingNetwork` arrays), uses only the contracts in
:mod:`propensim.plugins.contracts`, and raises ``AssertionError`` naming the broken invariant,
the scenario, the seed and the round.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable

import numpy as np

from propensim.agents.population import Population, build_population
from propensim.plugins._matching import RowAgent, run_per_agent
from propensim.plugins.trade_checks import CASH_RTOL, check_trades, settle_trades
from propensim.plugins.types import MarketState, RoundOutcome, Trades, TradingNetwork

__all__ = ["check_clearing_rule", "check_drift_rule", "check_metric", "kit_markets"]

AGGREGATES = ("mean", "sum", "last", "final_half_mean")


class _Fail:
    """Builds the one-line AssertionError messages of the kit."""

    def __init__(self, plugin) -> None:
        self.name = type(plugin).__name__

    def __call__(self, invariant: str, where: str, detail: str) -> AssertionError:
        return AssertionError(f"{self.name}: invariant '{invariant}' violated ({where}): {detail}")


def _check_metadata(plugin, fail: _Fail) -> None:
    desc = getattr(type(plugin), "description", None)
    if not isinstance(desc, str) or not desc.strip() or "\n" in desc.strip():
        raise fail("description", "class", f"needs a one-line string 'description', got {desc!r}")
    check = getattr(plugin, "check", None)
    if callable(check):
        try:
            check()
        except ValueError as exc:
            raise fail("check", "class", f"check() refused its own parameters: {exc}") from exc


# -- small markets --------------------------------------------------------------------------
def _random_network(n_b: int, n_s: int, p: float, rng: np.random.Generator) -> TradingNetwork:
    """Each buyer-seller pair linked with probability ``p`` (buyers are rows 0..n_b-1)."""
    linked = rng.random((n_b, n_s)) < p  # shape: (n_b, n_s)
    bi, sj = np.nonzero(linked)
    return TradingNetwork(n_b + n_s, bi, n_b + sj)


def _complete_network(n_b: int, n_s: int) -> TradingNetwork:
    bi, sj = np.divmod(np.arange(n_b * n_s), n_s)
    return TradingNetwork(n_b + n_s, bi, n_b + sj, complete=True)


def kit_markets(
    seed: int,
    n_buyers: int = 30,
    n_sellers: int = 30,
    network: str | TradingNetwork = "erdos_renyi",
) -> dict[str, tuple[Population, TradingNetwork]]:
    """The kit's scenarios for one seed: name -> (population, network).

    ``sparse``: a random network of mean trading degree about 4; ``complete``: everyone linked;
    ``isolated_buyer``: the sparse network with buyer 0 cut off; ``finite_cash``: buyers with
    budgets from 0 to 120 (values 80 to 120) on the complete network; ``multi_unit``: capacity 2,
    sellers with stock 3; ``empty``: no edges. A given ``network`` (over ``n_buyers + n_sellers``
    rows, buyers first) replaces the random one in ``sparse``, ``isolated_buyer`` and
    ``multi_unit``.
    """
    rng = np.random.default_rng(seed)
    n_b, n_s = n_buyers, n_sellers
    n = n_b + n_s
    common = dict(value=(80.0, 120.0), cost=(60.0, 100.0), shade=(0.0, 10.0), sigma=(4.0, 12.0))
    pop = build_population(n_b, n_s, rng=rng, **common)
    if isinstance(network, TradingNetwork):
        if network.n != n:
            raise ValueError(f"network has {network.n} rows, expected n_buyers + n_sellers = {n}")
        sparse = network
    elif network == "erdos_renyi":
        sparse = _random_network(n_b, n_s, min(1.0, 4.0 / max(n_s, 1)), rng)
    else:
        raise ValueError(f"network must be 'erdos_renyi' or a TradingNetwork, got {network!r}")
    cut = sparse.buyer != 0  # shape: (n_edges,)
    isolated = TradingNetwork(n, sparse.buyer[cut], sparse.seller[cut])
    budget_pop = build_population(n_b, n_s, cash=(0.0, 120.0), rng=rng, **common)
    multi_pop = build_population(n_b, n_s, stock=3, capacity=2, rng=rng, **common)
    empty = TradingNetwork(n, np.zeros(0, np.int64), np.zeros(0, np.int64))
    return {
        "sparse": (pop, sparse),
        "complete": (pop.copy(), _complete_network(n_b, n_s)),
        "isolated_buyer": (pop.copy(), isolated),
        "finite_cash": (budget_pop, _complete_network(n_b, n_s)),
        "multi_unit": (multi_pop, sparse),
        "empty": (pop.copy(), empty),
    }


def _clear(rule, state: MarketState, seed: int) -> Trades:
    rng = np.random.default_rng(seed)
    if getattr(rule, "per_agent", False):
        agents = [RowAgent(i) for i in range(len(state.population))]
        return run_per_agent(rule, state, rng, agents)
    return rule.clear(state, rng)


def _same_trades(a: Trades, b: Trades) -> bool:
    return (
        len(a) == len(b)
        and np.array_equal(a.buyer, b.buyer)
        and np.array_equal(a.seller, b.seller)
        and np.array_equal(a.price, b.price, equal_nan=True)
        and np.array_equal(a.quantity, b.quantity)
    )


def _columns(pop: Population) -> dict[str, np.ndarray]:
    return {
        f.name: np.copy(getattr(pop, f.name))
        for f in dataclasses.fields(pop)
        if isinstance(getattr(pop, f.name), np.ndarray)
    }


def _unchanged(pop: Population, before: dict[str, np.ndarray]) -> str | None:
    for name, old in before.items():
        if not np.array_equal(getattr(pop, name), old, equal_nan=True):
            return name
    return None


# -- clearing rules -------------------------------------------------------------------------
def check_clearing_rule(
    rule,
    *,
    seeds: Iterable[int] = range(5),
    n_buyers: int = 30,
    n_sellers: int = 30,
    network: str | TradingNetwork = "erdos_renyi",
    rounds: int = 3,
) -> dict[str, int]:
    """Run a clearing rule on the kit's markets and assert every contract invariant.

    For each seed and scenario (see :func:`kit_markets`) the rule clears ``rounds`` rounds, the
    trades being applied to the population between rounds. Asserted, each round: the result is a
    :class:`~propensim.plugins.types.Trades`; every trade joins a buyer and a seller sharing a
    network edge (never two buyers or two sellers); quantities >= 1 and prices finite; no trader
    exceeds its units left (capacity, and stock for a seller); no buyer exceeds its finite cash;
    the state is not modified; the same generator state gives identical trades; applying the
    trades conserves total stock (and total cash when every budget is finite) and leaves no
    stock or finite cash negative; the isolated buyer and the empty network never trade.
    Per-agent rules (``per_agent = True``) are driven through
    :func:`~propensim.plugins.clearing.run_per_agent`, as the market does.

    Parameters
    ----------
    rule
        The clearing rule instance.
    seeds : iterable of int
        One set of markets per seed (also seeds the clearing streams).
    n_buyers, n_sellers : int
        Market size.
    network : "erdos_renyi" or TradingNetwork
        The sparse network to use (a handmade one over ``n_buyers + n_sellers`` rows, buyers
        first), or a random one.
    rounds : int
        Rounds per market.

    Returns
    -------
    dict
        Total units traded per scenario over all seeds and rounds (lets a test check the rule
        did trade somewhere).

    Raises
    ------
    AssertionError
        Naming the invariant, scenario, seed and round.
    """
    fail = _Fail(rule)
    _check_metadata(rule, fail)
    if not (getattr(rule, "per_agent", False) or callable(getattr(rule, "clear", None))):
        raise fail("contract", "class", "needs clear(state, rng) or per_agent = True")
    volume: dict[str, int] = {}
    for seed in seeds:
        for scenario, (pop, net) in kit_markets(seed, n_buyers, n_sellers, network).items():
            volume.setdefault(scenario, 0)
            for r in range(rounds):
                where = f"scenario {scenario!r}, seed {seed}, round {r}"
                state = MarketState(pop, net, round=r)
                before = _columns(pop)
                remaining = state.remaining.copy()
                stream = 7919 * int(seed) + r
                try:
                    trades = _clear(rule, state, stream)
                except ValueError as exc:  # run_per_agent's own checks of each agent's trades
                    if not getattr(rule, "per_agent", False):
                        raise
                    raise fail("per-agent trades", where, str(exc)) from exc
                if not isinstance(trades, Trades):
                    raise fail("returns Trades", where, f"got {type(trades).__name__}")
                changed = _unchanged(pop, before)
                if changed is not None:
                    raise fail(
                        "state is read-only", where, f"population column {changed!r} changed"
                    )
                if not np.array_equal(state.remaining, remaining):
                    raise fail("state is read-only", where, "state.remaining changed")
                try:
                    check_trades(state, trades)
                except ValueError as exc:
                    raise fail(_invariant_name(str(exc)), where, str(exc)) from exc
                again = _clear(rule, MarketState(pop, net, round=r), stream)
                if not _same_trades(trades, again):
                    raise fail(
                        "same generator state gives the same trades",
                        where,
                        f"{len(trades)} vs {len(again)} trades, or different values",
                    )
                if scenario == "isolated_buyer" and (trades.buyer == 0).any():
                    raise fail("no trade across a missing edge", where, "isolated buyer 0 traded")
                if scenario == "empty" and len(trades):
                    raise fail(
                        "no trade across a missing edge", where, "trades on an empty network"
                    )
                _apply_and_check_conservation(pop, trades, fail, where)
                volume[scenario] += trades.volume
    return volume


def _invariant_name(message: str) -> str:
    for key, name in (
        ("missing edge", "no trade across a missing edge"),
        ("is not a buyer", "buyer is a buyer"),
        ("is not a seller", "seller is a seller"),
        ("outside", "rows exist"),
        ("quantity", "quantity >= 1"),
        ("non-finite price", "prices finite"),
        ("may trade at most", "capacity and stock respected"),
        ("has cash", "cash respected"),
    ):
        if key in message:
            return name
    return "trades valid"


def _apply_and_check_conservation(pop: Population, trades: Trades, fail: _Fail, where: str):
    stock0 = int(pop.stock.sum())
    cash_finite = bool(np.isfinite(pop.cash).all())
    cash0 = float(pop.cash.sum()) if cash_finite else np.nan
    settle_trades(pop, trades)
    if int(pop.stock.sum()) != stock0:
        raise fail("stock conserved", where, f"total stock {stock0} -> {int(pop.stock.sum())}")
    if (pop.stock < 0).any():
        raise fail("stock respected", where, f"trader {int(np.argmin(pop.stock))} stock < 0")
    finite = np.isfinite(pop.cash)
    slack = CASH_RTOL * np.maximum(np.abs(pop.cash[finite]), 1.0)
    if (pop.cash[finite] < -slack).any():
        raise fail("cash respected", where, "a trader's cash became negative")
    if cash_finite:
        cash1 = float(pop.cash.sum())
        if not np.isclose(cash1, cash0, rtol=1e-9, atol=1e-6):
            raise fail("cash conserved", where, f"total cash {cash0:.10g} -> {cash1:.10g}")


# -- drift rules and metrics ----------------------------------------------------------------
def _after_a_round(seed: int, n_buyers: int, n_sellers: int, trade: bool):
    """A state after one round of simple trades, and that round's outcome.

    Buyer i buys from seller i if they are linked and value >= cost, at the midpoint.
    """
    markets = kit_markets(seed, n_buyers, n_sellers)
    pop, net = markets["sparse"]
    n_pairs = min(n_buyers, n_sellers)
    b = np.arange(n_pairs)
    s = n_buyers + b
    ok = net.has_edge(b, s) & (pop.value[b] >= pop.value[s]) if trade else np.zeros(n_pairs, bool)
    trades = Trades(b[ok], s[ok], 0.5 * (pop.value[b[ok]] + pop.value[s[ok]]), np.ones(ok.sum()))
    settle_trades(pop, trades)
    state = MarketState(
        pop, net, round=1, last_price=float(np.mean(trades.price)) if len(trades) else np.nan
    )
    return state, RoundOutcome.from_trades(trades, len(pop))


def check_drift_rule(
    rule, *, seeds: Iterable[int] = range(3), n_buyers: int = 20, n_sellers: int = 20
) -> None:
    """Assert the DriftRule contract on small markets, after a round with and without trades.

    ``apply(state, outcome, rng)`` must return ``(mu, sigma)``: new arrays (not the population's
    own) of shape ``(n,)``, finite, ``sigma > 0``; leave the state unchanged; and give identical
    results for the same generator state.

    Raises
    ------
    AssertionError
        Naming the invariant and the case.
    """
    fail = _Fail(rule)
    _check_metadata(rule, fail)
    for seed in seeds:
        for trade in (True, False):
            where = f"seed {seed}, {'after trades' if trade else 'no trades'}"
            state, outcome = _after_a_round(seed, n_buyers, n_sellers, trade)
            pop = state.population
            n = len(pop)
            before = _columns(pop)
            result = rule.apply(state, outcome, np.random.default_rng(seed))
            if not (isinstance(result, tuple | list) and len(result) == 2):
                raise fail("returns (mu, sigma)", where, f"got {type(result).__name__}")
            mu, sigma = (np.asarray(x) for x in result)
            changed = _unchanged(pop, before)
            if changed is not None:
                raise fail("never edits the population", where, f"column {changed!r} changed")
            for name, arr in (("mu", mu), ("sigma", sigma)):
                if arr.shape != (n,):
                    raise fail(
                        "shape (n,)", where, f"{name} has shape {arr.shape}, expected ({n},)"
                    )
                if not np.all(np.isfinite(arr)):
                    raise fail("finite", where, f"{name} has NaN or infinite entries")
                if np.shares_memory(arr, pop.mu) or np.shares_memory(arr, pop.sigma):
                    raise fail("returns new arrays", where, f"{name} is a population column")
            if not np.all(sigma > 0):
                raise fail("sigma > 0", where, f"sigma has {int((sigma <= 0).sum())} entries <= 0")
            mu2, sigma2 = rule.apply(state, outcome, np.random.default_rng(seed))
            if not (np.array_equal(mu, mu2) and np.array_equal(sigma, sigma2)):
                raise fail("same generator state gives the same result", where, "results differ")


def check_metric(
    metric, *, seeds: Iterable[int] = range(3), n_buyers: int = 20, n_sellers: int = 20
) -> None:
    """Assert the Metric contract on small markets, after a round with and without trades.

    ``measure(state, outcome)`` must return a real number, finite or NaN (never infinite), the
    same on a second call, and must not change the population; ``aggregate`` must be one of
    ``mean``, ``sum``, ``last``, ``final_half_mean``. (Writing to ``state.cache`` is allowed.)

    Raises
    ------
    AssertionError
        Naming the invariant and the case.
    """
    fail = _Fail(metric)
    _check_metadata(metric, fail)
    agg = getattr(metric, "aggregate", None)
    if agg not in AGGREGATES:
        raise fail("aggregate", "class", f"must be one of {', '.join(AGGREGATES)}, got {agg!r}")
    for seed in seeds:
        for trade in (True, False):
            where = f"seed {seed}, {'after trades' if trade else 'no trades'}"
            state, outcome = _after_a_round(seed, n_buyers, n_sellers, trade)
            before = _columns(state.population)
            value = metric.measure(state, outcome)
            if isinstance(value, bool) or not isinstance(
                value, int | float | np.integer | np.floating
            ):
                raise fail("returns a float", where, f"got {type(value).__name__}")
            value = float(value)
            if np.isinf(value):
                raise fail("finite or NaN", where, f"got {value}")
            changed = _unchanged(state.population, before)
            if changed is not None:
                raise fail("state is read-only", where, f"population column {changed!r} changed")
            again = float(metric.measure(state, outcome))
            if not (value == again or (np.isnan(value) and np.isnan(again))):
                raise fail("deterministic", where, f"{value!r} then {again!r}")
