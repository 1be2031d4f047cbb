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

__all__ = [
    "KitMarket",
    "check_clearing_rule",
    "check_curve_family",
    "check_drift_rule",
    "check_intervention",
    "check_metric",
    "check_network_builder",
    "kit_markets",
]

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


# -- network builders -----------------------------------------------------------------------
def _global_random_state():
    import random

    # the legacy global state is what a plugin must not touch: read it, never draw from it
    legacy = np.random.get_state()  # noqa: NPY002
    return legacy[1].tobytes(), legacy[2:], random.getstate()


def _kit_roles(seed: int) -> dict[str, np.ndarray]:
    """Role arrays the network kit builds on: buyers first, shuffled, lopsided, tiny."""
    rng = np.random.default_rng(seed)
    shuffled = np.array([0] * 12 + [1] * 9, dtype=np.int8)
    rng.shuffle(shuffled)
    return {
        "buyers first": np.array([0] * 15 + [1] * 15, dtype=np.int8),
        "shuffled roles": shuffled,
        "one seller": np.array([0] * 6 + [1], dtype=np.int8),
        "one of each": np.array([1, 0], dtype=np.int8),
    }


def check_network_builder(builder, *, seeds: Iterable[int] = range(3)) -> dict[str, int]:
    """Assert the NetworkBuilder contract on several role arrays and seeds.

    ``build(role, rng)`` must return a :class:`~propensim.plugins.types.TradingNetwork` over
    ``len(role)`` rows whose edges join a buyer (role 0) to a seller (role 1) and name rows
    ``0..n-1``, with no self-loops or duplicate edges (trading or social); leave ``role``
    unchanged; give the same network for the same generator state; and draw nothing from the
    global random state (``numpy.random``, ``random``). On the two tiny role arrays (7 and 2
    traders) a builder may instead refuse with ``ValueError``.

    Returns
    -------
    dict
        Edges built per role scenario over all seeds (lets a test check it built some).

    Raises
    ------
    AssertionError
        Naming the invariant, the scenario, the seed and the offending edge.
    """
    fail = _Fail(builder)
    _check_metadata(builder, fail)
    if not callable(getattr(builder, "build", None)):
        raise fail("contract", "class", "needs build(role, rng)")
    edges: dict[str, int] = {}
    for seed in seeds:
        for scenario, role in _kit_roles(int(seed)).items():
            where = f"scenario {scenario!r}, seed {seed}"
            n = role.size
            role_before = role.copy()
            state = _global_random_state()
            try:
                net = builder.build(role, np.random.default_rng(seed))
            except ValueError:
                if n >= 20:
                    raise
                continue  # a builder may refuse a market too small for it, with a ValueError
            if _global_random_state() != state:
                raise fail("draws only from rng", where, "the global random state changed")
            if not np.array_equal(role, role_before):
                raise fail("role is read-only", where, "the role array changed")
            if not isinstance(net, TradingNetwork):
                raise fail("returns a TradingNetwork", where, f"got {type(net).__name__}")
            if net.n != n:
                raise fail("same rows", where, f"network has n={net.n}, role has {n} rows")
            b, s = np.asarray(net.buyer), np.asarray(net.seller)
            outside = (b < 0) | (b >= n) | (s < 0) | (s >= n)  # shape: (n_edges,)
            if outside.any():
                i = int(np.flatnonzero(outside)[0])
                raise fail("rows exist", where, f"edge {i} ({b[i]}, {s[i]}) outside 0..{n - 1}")
            loop = b == s
            if loop.any():
                i = int(np.flatnonzero(loop)[0])
                raise fail("no self-loops", where, f"edge {i} joins trader {b[i]} to itself")
            wrong = (role[b] != 0) | (role[s] != 1)
            if wrong.any():
                i = int(np.flatnonzero(wrong)[0])
                raise fail(
                    "edges only between buyers and sellers",
                    where,
                    f"edge {i} ({b[i]}, {s[i]}) joins roles {role[b[i]]} and {role[s[i]]}",
                )
            key = b * np.int64(n) + s
            if np.unique(key).size != key.size:
                raise fail("no duplicate edges", where, "a buyer-seller pair appears twice")
            u, v = (np.asarray(x) for x in net.social)
            if (u == v).any():
                i = int(np.flatnonzero(u == v)[0])
                raise fail("no self-loops", where, f"social edge {i} joins {u[i]} to itself")
            if np.unique(u * np.int64(n) + v).size != u.size:
                raise fail("no duplicate edges", where, "a social edge (u, v) appears twice")
            again = builder.build(role.copy(), np.random.default_rng(seed))
            if not (
                isinstance(again, TradingNetwork)
                and np.array_equal(again.buyer, b)
                and np.array_equal(again.seller, s)
            ):
                raise fail("same generator state gives the same network", where, "edges differ")
            edges[scenario] = edges.get(scenario, 0) + int(b.size)
    return edges


# -- curve families ---------------------------------------------------------------------------
def check_curve_family(
    family, *, params: dict | None = None, seeds: Iterable[int] = range(3), n: int = 12
) -> None:
    """Assert the CurveFamily contract on batches built from random population columns.

    ``family`` is the class (or an instance: its class is used); ``params`` are the extra
    keyword arguments of ``from_population``. Asserted, on prices from far below to far above
    every curve: ``value`` in [0, 1] with the batch's shape; ``log_value`` finite where the
    value is positive and ``exp(log_value) == value``; ``force(x, gamma) = gamma d ln P/dx``
    (central finite differences); ``energy(x0, x1, gamma) = -gamma (ln P(x1) - ln P(x0))``;
    the population columns unchanged; the same numbers on a second call.

    Raises
    ------
    AssertionError
        Naming the invariant, the seed, and the price and curve where it failed.
    """
    cls = family if isinstance(family, type) else type(family)
    fail = _Fail(cls)
    fail.name = cls.__name__
    desc = getattr(cls, "description", None)
    if not isinstance(desc, str) or not desc.strip() or "\n" in desc.strip():
        raise fail("description", "class", f"needs a one-line string 'description', got {desc!r}")
    for name in ("from_population", "value", "log_value", "force", "energy"):
        if not callable(getattr(cls, name, None)):
            raise fail("contract", "class", f"needs {name}()")
    params = dict(params or {})
    for seed in seeds:
        rng = np.random.default_rng(seed)
        mu = rng.uniform(80.0, 120.0, n)
        sigma = rng.uniform(2.0, 10.0, n)
        activity = rng.uniform(0.3, 1.0, n)
        role = (np.arange(n) % 2).astype(np.int8)
        gamma = rng.uniform(0.5, 2.0, n)
        columns = [mu.copy(), sigma.copy(), activity.copy(), role.copy()]
        curves = cls.from_population(mu, sigma, activity, role, **params)
        for got, old, name in zip(
            (mu, sigma, activity, role), columns, ("mu", "sigma", "activity", "role"), strict=True
        ):
            if not np.array_equal(got, old):
                raise fail("inputs are read-only", f"seed {seed}", f"{name} changed")
        # shape: (n_prices, n): each curve at prices from 12 widths below to 12 above its mu
        # offset from round numbers: piecewise families have kinks there
        z = np.concatenate([np.linspace(-12.0, 12.0, 97) + 0.0123, rng.uniform(-4.0, 4.0, 40)])
        x = mu[None, :] + z[:, None] * sigma[None, :]
        where = f"seed {seed}"
        value = np.asarray(curves.value(x))
        if value.shape != x.shape:
            raise fail("vectorised", where, f"value(x) has shape {value.shape}, x {x.shape}")
        bad = ~((value >= 0.0) & (value <= 1.0))
        if bad.any():
            i, j = np.argwhere(bad)[0]
            raise fail(
                "values in [0, 1]",
                where,
                f"P({x[i, j]:.6g}) = {float(value[i, j])!r} for curve {j}",
            )
        log_value = np.asarray(curves.log_value(x))
        positive = value > 1e-300
        if not np.all(np.isfinite(log_value[positive])):
            raise fail("log_value finite", where, "log_value is not finite where P > 0")
        off = positive & ~np.isclose(np.exp(log_value), value, rtol=1e-7, atol=1e-12)
        if off.any():
            i, j = np.argwhere(off)[0]
            raise fail(
                "log_value consistent",
                where,
                f"exp(log_value({x[i, j]:.6g})) = {np.exp(log_value[i, j]):.10g} but "
                f"value = {value[i, j]:.10g} (curve {j})",
            )
        # central differences, step 1e-5 widths: error O(h^2) of the curvature (common practice)
        h = 1e-5 * sigma[None, :]
        up, down = curves.log_value(x + h), curves.log_value(x - h)
        inside = (np.minimum(up, down) > -30.0) & (log_value > -30.0)  # ln P well resolved
        with np.errstate(invalid="ignore"):
            numeric = gamma * (up - down) / (2.0 * h)
        force = np.asarray(curves.force(x, gamma))
        scale = np.max(np.abs(numeric[inside]), initial=1.0)
        off = inside & ~np.isclose(force, numeric, rtol=1e-4, atol=1e-5 * scale)
        if off.any():
            i, j = np.argwhere(off)[0]
            raise fail(
                "force = gamma d ln P/dx",
                where,
                f"force({x[i, j]:.6g}) = {force[i, j]:.8g}, finite differences give "
                f"{numeric[i, j]:.8g} (curve {j})",
            )
        x0, x1 = x[40], x[60]
        energy = np.asarray(curves.energy(x0, x1, gamma))
        expected = -gamma * (curves.log_value(x1) - curves.log_value(x0))
        ok = np.isfinite(expected)
        if not np.allclose(energy[ok], expected[ok], rtol=1e-9, atol=1e-9):
            raise fail("energy = -gamma (ln P(x1) - ln P(x0))", where, "energy differs")
        if not np.array_equal(np.asarray(curves.value(x)), value, equal_nan=True):
            raise fail("deterministic", where, "value(x) differs on a second call")


# -- interventions ----------------------------------------------------------------------------
class _KitPolicy:
    def __init__(self) -> None:
        self.floor = -np.inf
        self.ceiling = np.inf
        self.buyer_tax = 0.0
        self.seller_tax = 0.0

    def as_tuple(self) -> tuple[float, float, float, float]:
        return (self.floor, self.ceiling, self.buyer_tax, self.seller_tax)


class _KitSchedule:
    """The interventions of the kit's market (each check puts the one under test here)."""

    def __init__(self) -> None:
        self.interventions: list = []


class KitMarket:
    """A stand-in market with the methods an intervention may call, recording each call.

    Attributes ``population``, ``network``, ``clearing``, ``policy`` (``floor``, ``ceiling``,
    ``buyer_tax``, ``seller_tax``), ``round``, ``present`` (bool per row); methods
    ``remove_traders``, ``restore_traders``, ``replace_network``, ``replace_population`` and
    ``replace_clearing`` as on :class:`~propensim.markets.engine.MarketEngine`; ``schedule.
    interventions`` (the intervention under test). ``calls`` lists the method names called.
    """

    def __init__(self, population: Population, network: TradingNetwork, clearing=None) -> None:
        self.population = population
        self.network = network
        self.clearing = clearing
        self.policy = _KitPolicy()
        self.round = 0
        self.present = np.ones(len(population), dtype=bool)
        self.calls: list[str] = []
        self.schedule = _KitSchedule()

    def replace_network(self, network: TradingNetwork) -> None:
        """Put a new network in place."""
        self.calls.append("replace_network")
        if not isinstance(network, TradingNetwork) or network.n != len(self.population):
            raise ValueError("replace_network needs a TradingNetwork over the same rows")
        self.network = network

    def replace_population(self, population: Population, network=None) -> None:
        """Put a new population (same rows first, same roles) and optionally a network."""
        self.calls.append("replace_population")
        old_n = len(self.population)
        network = self.network if network is None else network
        if len(population) < old_n or network.n != len(population):
            raise ValueError("replace_population: rows may only be appended, network over them")
        if np.any(population.role[:old_n] != self.population.role):
            raise ValueError("replace_population must keep every existing trader's role")
        extra = len(population) - old_n
        self.present = np.concatenate([self.present, np.ones(extra, dtype=bool)])
        self.population, self.network = population, network

    def replace_clearing(self, rule) -> None:
        """Clear with ``rule`` from now on."""
        self.calls.append("replace_clearing")
        self.clearing = rule

    def remove_traders(self, rows) -> None:
        """Cut every edge of ``rows``."""
        self.calls.append("remove_traders")
        rows = np.asarray(rows, dtype=np.int64).reshape(-1)
        gone = np.zeros(len(self.population), dtype=bool)
        gone[rows] = True
        self.present &= ~gone
        net = self.network
        self.network = net.keep_edges(~(gone[net.buyer] | gone[net.seller]))

    def restore_traders(self, rows, network: TradingNetwork) -> None:
        """Bring ``rows`` back with ``network``."""
        self.calls.append("restore_traders")
        self.present[np.asarray(rows, dtype=np.int64)] = True
        self.network = network


def _kit_market(seed: int, clearing=None) -> KitMarket:
    pop, net = kit_markets(seed, 20, 20)["sparse"]
    region = np.random.default_rng(seed + 101).integers(0, 3, len(pop))
    net = TradingNetwork(net.n, net.buyer, net.seller, attributes={"region": region})
    return KitMarket(pop, net, clearing)


def _snapshot(market: KitMarket):
    net = market.network
    return (
        _columns(market.population),
        (net.n, net.buyer.copy(), net.seller.copy()),
        market.policy.as_tuple(),
        market.clearing,
        len(market.population),
    )


def _policy_ok(policy) -> str | None:
    floor, ceiling, bt, st = (float(v) for v in policy.as_tuple())
    if np.isnan(floor) or np.isnan(ceiling) or floor > ceiling:
        return f"price bounds [{floor}, {ceiling}] are not an interval"
    if not (np.isfinite(bt) and np.isfinite(st)):
        return f"taxes must be finite, got buyer_tax={bt}, seller_tax={st}"
    return None


def check_intervention(
    intervention, *, seeds: Iterable[int] = range(3), clearing=None, market_factory=None
) -> None:
    """Assert the Intervention contract on a stand-in market (:class:`KitMarket`).

    Asserted: ``description`` is one line; ``start`` is a whole number >= 0 and ``until``
    None or after it; ``validate(market)`` (if any) accepts the kit's market; ``begin`` and
    ``end`` change the market only through its methods (a changed population needs
    ``replace_population``, a changed network one of ``replace_network``,
    ``replace_population``, ``remove_traders``, ``restore_traders``; a new clearing rule
    ``replace_clearing``); afterwards every edge still joins a buyer to a seller, the roles of
    existing rows are kept, ``sigma > 0`` and ``mu`` finite, stock never negative, the price
    policy is an interval with finite taxes; the same generator state gives the same market; no
    draw from the global random state.

    Parameters
    ----------
    intervention
        The instance (its ``until`` may be None).
    seeds : iterable of int
        One kit market per seed.
    clearing : optional
        The market's clearing rule (for interventions that read or switch it).
    market_factory : callable, optional
        ``seed -> KitMarket``: a market of your own (for example with network attributes).

    Raises
    ------
    AssertionError
        Naming the invariant and the seed.
    """
    fail = _Fail(intervention)
    _check_metadata(intervention, fail)
    if not callable(getattr(intervention, "begin", None)):
        raise fail("contract", "class", "needs begin(market, rng)")
    start = getattr(intervention, "start", 0)
    until = getattr(intervention, "until", None)
    if isinstance(start, bool) or not isinstance(start, int | np.integer) or start < 0:
        raise fail("window", "class", f"start must be a whole number >= 0, got {start!r}")
    if until is not None and (
        isinstance(until, bool) or not isinstance(until, int | np.integer) or until <= start
    ):
        raise fail("window", "class", f"until must be None or after start, got {until!r}")
    make = market_factory or (lambda s: _kit_market(s, clearing))
    for seed in seeds:
        results = []
        for _attempt in range(2):
            market = make(int(seed))
            market.schedule.interventions = [intervention]
            validate = getattr(intervention, "validate", None)
            where = f"seed {seed}"
            if callable(validate):
                try:
                    validate(market)
                except ValueError as exc:
                    raise fail(
                        "validate accepts the kit market", where, f"{exc} (pass market_factory=)"
                    ) from exc
            rng = np.random.default_rng([int(seed), 17])
            hooks = [("begin", intervention.begin)]
            if callable(getattr(intervention, "end", None)):
                hooks.append(("end", intervention.end))
            for hook, call in hooks:
                where = f"seed {seed}, {hook}"
                before = _snapshot(market)
                market.calls.clear()
                state = _global_random_state()
                market.round = start if hook == "begin" else (until or start + 1)
                call(market, rng)
                if _global_random_state() != state:
                    raise fail("draws only from rng", where, "the global random state changed")
                _check_changes(market, before, fail, where)
            net, pop = market.network, market.population
            results.append(
                (_columns(pop), net.buyer.copy(), net.seller.copy(), market.policy.as_tuple())
            )
        (cols_a, b_a, s_a, pol_a), (cols_b, b_b, s_b, pol_b) = results
        same = (
            np.array_equal(b_a, b_b)
            and np.array_equal(s_a, s_b)
            and pol_a == pol_b
            and cols_a.keys() == cols_b.keys()
            and all(np.array_equal(cols_a[k], cols_b[k], equal_nan=True) for k in cols_a)
        )
        if not same:
            raise fail(
                "same generator state gives the same market", f"seed {seed}", "results differ"
            )


def _check_changes(market: KitMarket, before, fail: _Fail, where: str) -> None:
    cols, (n0, b0, s0), policy0, clearing0, rows0 = before
    calls = set(market.calls)
    pop, net = market.population, market.network
    now = _columns(pop)
    changed = [
        k
        for k, old in cols.items()
        if k in now and (now[k].shape != old.shape or not np.array_equal(now[k], old, True))
    ]
    if changed and "replace_population" not in calls:
        raise fail(
            "changes the market only through its methods",
            where,
            f"population column {changed[0]!r} changed without market.replace_population",
        )
    net_changed = net.n != n0 or not (
        np.array_equal(net.buyer, b0) and np.array_equal(net.seller, s0)
    )
    by_methods = {"replace_network", "replace_population", "remove_traders", "restore_traders"}
    if net_changed and not (calls & by_methods):
        raise fail(
            "changes the market only through its methods",
            where,
            "the network changed without market.replace_network",
        )
    if market.clearing is not clearing0 and "replace_clearing" not in calls:
        raise fail(
            "changes the market only through its methods",
            where,
            "market.clearing changed without market.replace_clearing",
        )
    if len(pop) < rows0:
        raise fail("rows are kept", where, f"{rows0} traders became {len(pop)}")
    if not np.array_equal(pop.role[:rows0], cols["role"]):
        raise fail("roles are kept", where, "an existing trader changed role")
    wrong = (pop.role[net.buyer] != 0) | (pop.role[net.seller] != 1)
    if wrong.any():
        i = int(np.flatnonzero(wrong)[0])
        raise fail(
            "edges only between buyers and sellers",
            where,
            f"edge {i} ({net.buyer[i]}, {net.seller[i]}) after the intervention",
        )
    if not (np.all(np.isfinite(pop.mu)) and np.all(pop.sigma > 0) and np.all(pop.stock >= 0)):
        raise fail("population valid", where, "mu not finite, sigma <= 0 or stock < 0")
    problem = _policy_ok(market.policy)
    if problem:
        raise fail("price policy valid", where, problem)
