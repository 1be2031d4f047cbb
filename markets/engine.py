"""The market engine: the round loop over trader columns, a network and three kinds of plugin.

One round is one pass, with no back and forth::

    population columns -> clearing rule -> trades (checked, applied) -> drift rule
        -> metrics -> one row

Rules read the state and return arrays; the market alone writes state. Randomness comes from one
seed per market, split into named streams (population, network, clearing, drift, mesa) so that a
draw added in one place does not reshuffle the others, and a run is a pure function of its
configuration and seed.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from propensim.agents.population import (
    BUYER,
    ROLE_NAMES,
    SELLER,
    Population,
    build_population,
)
from propensim.plugins import _kernels, registry
from propensim.plugins.types import MarketState, RoundOutcome, Trades, TradingNetwork

#: Named random streams of one run, in spawn order. New streams are only ever appended.
STREAMS = ("population", "network", "clearing", "drift", "mesa")

#: Metrics measured when none are named.
DEFAULT_METRICS = (
    "volume",
    "mean_price",
    "vwap",
    "price_sd",
    "preference_gap",
    "efficiency",
    "buyer_surplus",
    "seller_surplus",
    "surplus_gini",
    "smith_alpha",
    "energy",
)


def seed_sequence(seed) -> np.random.SeedSequence:
    """Normalise an int, a sequence of ints, a SeedSequence or None into a SeedSequence."""
    if isinstance(seed, np.random.SeedSequence):
        return seed
    return np.random.SeedSequence(seed)


def spawn_streams(seed) -> dict[str, np.random.Generator]:
    """One independent generator per name in :data:`STREAMS`, derived purely from ``seed``.

    Unlike ``SeedSequence.spawn``, calling this twice with the same seed gives the same streams.
    """
    ss = seed_sequence(seed)
    return {
        name: np.random.default_rng(
            np.random.SeedSequence(ss.entropy, spawn_key=(*ss.spawn_key, i))
        )
        for i, name in enumerate(STREAMS)
    }


class MarketEngine:
    """The round loop of a market, on arrays only (no Mesa import: cheap to start in a worker).

    :class:`Market` is the same engine as a ``mesa.Model``; sweeps use the engine directly
    unless a per-agent plugin needs Mesa agents. Both give identical results for a seed.

    Parameters
    ----------
    population : Population
        Trader columns; the market owns it from now on and writes it every round.
    network : TradingNetwork or networkx.Graph
        Buyer-seller edges over the same rows. A networkx graph is converted once (nodes in the
        order of :func:`~propensim.plugins.networks.from_graph`); if its nodes carry a ``role``
        attribute it must agree with the population's roles.
    clearing : ClearingRule
        A clearing plugin instance (see ``propensim plugins``).
    drift : DriftRule, optional
        A drift plugin instance; ``None`` leaves curves where they are.
    metrics : sequence of Metric or of str, optional
        Metric plugins (instances or registered names); defaults to :data:`DEFAULT_METRICS`.
    seed : int or numpy.random.SeedSequence, optional
        Root of the run's random streams.
    replenish : bool
        If True (default) every round is a trading period that starts from the initial stock and
        cash, as in repeated experimental markets; if False holdings carry over between rounds.
    traders_every : int
        Record every trader's state every this many rounds (0: never).
    keep_ledger : bool
        Keep every trade (round, buyer, seller, price, quantity).

    """

    def __init__(
        self,
        population: Population,
        network: TradingNetwork,
        clearing,
        drift=None,
        metrics: Sequence | None = None,
        *,
        seed=None,
        replenish: bool = True,
        traders_every: int = 0,
        keep_ledger: bool = True,
    ) -> None:
        streams = spawn_streams(seed)
        if not isinstance(network, TradingNetwork):
            network = _network_from_graph(network, population)
        if network.n != len(population):
            raise ValueError(
                f"network has {network.n} traders but population has {len(population)}; "
                "they must match"
            )
        if isinstance(traders_every, bool) or int(traders_every) < 0:
            raise ValueError(f"traders_every must be a whole number >= 0, got {traders_every!r}")
        self.population = population
        self.network = network
        self.clearing = clearing
        self.drift = drift
        self.metrics = _resolve_metrics(metrics)
        self.replenish = bool(replenish)
        self.traders_every = int(traders_every)
        self.keep_ledger = bool(keep_ledger)
        self._rng_clearing = streams["clearing"]
        self._rng_drift = streams["drift"]
        self._initial_stock = population.stock.copy()
        self._initial_cash = population.cash.copy()
        self._is_seller = population.role == SELLER  # shape: (n,) roles never change
        self._rows: list[dict[str, float]] = []
        self._ledger: list[tuple[int, Trades]] = []
        self._snapshots: list[dict[str, np.ndarray]] = []
        self._traders: list | None = None
        self.round = 0
        self.state = MarketState(
            population=population,
            network=network,
            round=0,
            equilibrium_price=_equilibrium_price(population),
        )
        _warn_if_no_trade_possible(population, network)

    @property
    def traders(self) -> list:
        """Per-agent rules need Mesa agents: use :class:`Market`, which has them."""
        raise TypeError("this rule needs Mesa agents: build the market with mesa=True")

    # -- one round -------------------------------------------------------------------------
    def step(self) -> None:
        """Run one round: clear, record trades, drift, measure."""
        from propensim.plugins._invariants import apply_trades, check_trades

        pop, state = self.population, self.state
        _kernels.count_work(len(pop))
        state.round = self.round
        remaining = _kernels.start_round(  # one compiled pass when available: same numbers
            self.replenish,
            self._initial_stock,
            self._initial_cash,
            pop.stock,
            pop.cash,
            pop.capacity,
            self._is_seller,
        )
        if remaining is None:
            if self.replenish:
                np.copyto(pop.stock, self._initial_stock)
                np.copyto(pop.cash, self._initial_cash)
            remaining = pop.capacity.astype(np.int64)  # shape: (n,) a seller also needs stock
            np.minimum(remaining, pop.stock, out=remaining, where=self._is_seller)
        state.remaining = remaining
        if getattr(self.clearing, "per_agent", False):
            from propensim.plugins.clearing import run_per_agent

            # run_per_agent shrinks a private copy of remaining; state stays as it was
            trades = run_per_agent(self.clearing, state, self._rng_clearing, self.traders)
        else:
            trades = self.clearing.clear(state, self._rng_clearing)
        check_trades(state, trades)
        apply_trades(pop, trades)
        outcome = RoundOutcome.from_trades(trades, len(pop))
        if self.drift is not None:
            mu, sigma = self.drift.apply(state, outcome, self._rng_drift)
            pop.mu[:] = mu
            pop.sigma[:] = sigma
        row: dict[str, float] = {"round": self.round}
        for name, metric in self.metrics:
            row[name] = float(metric.measure(state, outcome))
        self._rows.append(row)
        if self.keep_ledger and len(trades):
            self._ledger.append((self.round, trades))
        if self.traders_every and self.round % self.traders_every == 0:
            self._snapshots.append(
                {
                    "round": np.full(len(pop), self.round),
                    "trader": np.arange(len(pop)),
                    "mu": pop.mu.copy(),
                    "sigma": pop.sigma.copy(),
                    "stock": pop.stock.copy(),
                    "cash": pop.cash.copy(),
                    "traded": outcome.traded,
                }
            )
        if len(trades):
            # Not np.dot: BLAS may wake its threads for long vectors (costly on a shared machine).
            q = trades.quantity
            state.last_price = float((trades.price * q).sum() / q.sum())
        self.round += 1

    def run(self, rounds: int):
        """Run ``rounds`` rounds and return the round table (see :meth:`rounds_frame`)."""
        self.advance(rounds)
        return self.rounds_frame()

    def advance(self, rounds: int) -> None:
        """Run ``rounds`` rounds (as :meth:`run`, without building the round table)."""
        if isinstance(rounds, bool) or not isinstance(rounds, int | np.integer) or rounds < 0:
            raise ValueError(f"rounds must be a whole number >= 0, got {rounds!r}")
        for _ in range(int(rounds)):
            self.step()

    # -- results ---------------------------------------------------------------------------
    def rounds_columns(self) -> dict[str, np.ndarray]:
        """The round table as columns (name -> array; see :meth:`rounds_frame`), without pandas."""
        out = {"round": np.array([row["round"] for row in self._rows], dtype=np.int64)}
        for name, _ in self.metrics:
            out[name] = np.array([row[name] for row in self._rows], dtype=float)
        return out

    def rounds_frame(self):
        """One row per round: ``round`` and one column per metric (a pandas DataFrame)."""
        import pandas as pd

        return pd.DataFrame(self.rounds_columns())

    def ledger_columns(self) -> dict[str, np.ndarray]:
        """The trade ledger as columns (see :meth:`ledger_frame`), without pandas."""
        if not self._ledger:
            return {
                "round": np.zeros(0, np.int64),
                "buyer": np.zeros(0, np.int64),
                "seller": np.zeros(0, np.int64),
                "price": np.zeros(0),
                "quantity": np.zeros(0, np.int64),
            }
        return {
            "round": np.concatenate([np.full(len(t), r) for r, t in self._ledger]),
            "buyer": np.concatenate([t.buyer for _, t in self._ledger]),
            "seller": np.concatenate([t.seller for _, t in self._ledger]),
            "price": np.concatenate([t.price for _, t in self._ledger]),
            "quantity": np.concatenate([t.quantity for _, t in self._ledger]),
        }

    def ledger_frame(self):
        """Every kept trade: round, buyer, seller, price, quantity (a pandas DataFrame)."""
        import pandas as pd

        return pd.DataFrame(self.ledger_columns())

    def traders_columns(self) -> dict[str, np.ndarray]:
        """The sampled trader states as columns (see :meth:`traders_frame`), without pandas."""
        if not self._snapshots:
            pop = self.population
            return {
                "round": np.zeros(0, np.int64),
                "trader": np.zeros(0, np.int64),
                "mu": np.zeros(0),
                "sigma": np.zeros(0),
                "stock": np.zeros(0, pop.stock.dtype),
                "cash": np.zeros(0),
                "traded": np.zeros(0, np.int64),
            }
        return {k: np.concatenate([s[k] for s in self._snapshots]) for k in self._snapshots[0]}

    def traders_frame(self):
        """Sampled trader states (every ``traders_every`` rounds), long format."""
        import pandas as pd

        return pd.DataFrame(self.traders_columns())

    def summary(self) -> dict[str, float]:
        """One number per metric over the rounds run so far, by each metric's ``aggregate``."""
        out: dict[str, float] = {}
        for name, metric in self.metrics:
            vals = np.array([row[name] for row in self._rows], dtype=float)
            out[name] = _aggregate(vals, getattr(metric, "aggregate", "mean"))
        return out


def _network_from_graph(graph, population: Population) -> TradingNetwork:
    from propensim.plugins.networks import from_graph

    if not hasattr(graph, "nodes") or not hasattr(graph, "edges"):
        raise ValueError(
            f"network must be a TradingNetwork or a networkx graph, got {type(graph).__name__}"
        )
    if graph.number_of_nodes() != len(population):
        raise ValueError(
            f"network has {graph.number_of_nodes()} traders but population has "
            f"{len(population)}; they must match"
        )
    tagged = any("role" in data for _, data in graph.nodes(data=True))
    net, role = from_graph(graph) if tagged else from_graph(graph, role=population.role)
    differ = np.flatnonzero(role != population.role)
    if differ.size:
        raise ValueError(
            f"network node {net.labels[differ[0]]!r} has role {ROLE_NAMES[role[differ[0]]]!r} "
            f"but population row {differ[0]} is a {ROLE_NAMES[population.role[differ[0]]]}"
        )
    return net


def _aggregate(vals: np.ndarray, how: str) -> float:
    if vals.size == 0:
        return float("nan")
    if how == "last":
        return float(vals[-1])
    if how == "final_half_mean":
        vals = vals[vals.size // 2 :]
    finite = vals[np.isfinite(vals)]
    if how == "sum":
        return float(finite.sum())
    return float(finite.mean()) if finite.size else float("nan")


def _resolve_metrics(metrics) -> list[tuple[str, Any]]:
    out = []
    for m in DEFAULT_METRICS if metrics is None else metrics:
        if isinstance(m, str):
            out.append((m, registry.make_plugin("metrics", m)))
        else:
            out.append((getattr(m, "plugin_name", type(m).__name__.lower()), m))
    names = [n for n, _ in out]
    if len(set(names)) != len(names):
        raise ValueError(f"metrics must not repeat a name, got {names}")
    return out


def _equilibrium_price(pop: Population) -> float:
    from propensim.plugins.metrics import competitive_equilibrium

    b, s = pop.role == BUYER, pop.role == SELLER
    values = np.repeat(pop.value[b], pop.capacity[b])
    costs = np.repeat(pop.value[s], np.minimum(pop.capacity[s], pop.stock[s]))
    q, lo, hi = competitive_equilibrium(values, costs)
    return float("nan") if q == 0 else 0.5 * (lo + hi)


def _warn_if_no_trade_possible(pop: Population, net: TradingNetwork) -> None:
    if net.n_edges == 0:
        warnings.warn(
            "the trading network has no buyer-seller edge: no trade is possible",
            RuntimeWarning,
            stacklevel=3,
        )
        return
    comp = net.component
    has_buyer = np.zeros(comp.max() + 1, dtype=bool)
    has_seller = np.zeros(comp.max() + 1, dtype=bool)
    has_buyer[comp[pop.role == BUYER]] = True
    has_seller[comp[pop.role == SELLER]] = True
    lonely = int(np.count_nonzero(has_buyer ^ has_seller))
    if lonely:
        warnings.warn(
            f"{lonely} part(s) of the trading network hold only buyers or only sellers; "
            "their traders cannot trade",
            RuntimeWarning,
            stacklevel=3,
        )


def _plugin_from(kind: str, conf) -> Any:
    """Build a plugin from a name or a mapping ``{"name": ..., **params}``."""
    if isinstance(conf, str):
        return registry.make_plugin(kind, conf)
    if not isinstance(conf, Mapping) or "name" not in conf:
        raise ValueError(f"{kind} must be a plugin name or a table with 'name', got {conf!r}")
    params = {k: v for k, v in conf.items() if k != "name"}
    return registry.make_plugin(kind, conf["name"], **params)


def build_drift(conf):
    """Build a drift rule from a name, a table, or a table ``{"rules": [...], eta, noise, dt}``.

    Several rules are summed as forces (see :func:`propensim.plugins.drift.combine`).
    """
    if conf is None:
        return None
    if isinstance(conf, Mapping) and "rules" in conf:
        from propensim.plugins.drift import combine

        rules = [_plugin_from("drift", r) for r in conf["rules"]]
        options = {k: v for k, v in conf.items() if k != "rules"}
        return combine(rules, **options)
    return _plugin_from("drift", conf)


def build_market(config: Mapping, seed=None, *, mesa: bool = True):
    """Build a market from a plain configuration mapping (the shape a spec file resolves to).

    Parameters
    ----------
    config : mapping
        ``population``: keyword arguments of
        :func:`~propensim.agents.population.build_population` (``n_buyers`` and ``n_sellers``
        required); ``network``: a network plugin name or ``{"name": ..., **params}`` (default
        ``complete``); ``clearing``: a clearing plugin (default ``propensity``); ``drift``: a drift
        plugin, or ``{"rules": [...], "eta":, "noise":, "dt":}`` for a sum of forces (default none);
        ``metrics``: list of metric names; ``market``: ``replenish``, ``traders_every``,
        ``keep_ledger``.
    seed : int or SeedSequence
        Root seed of the run; population and network come from their own named streams.
    mesa : bool
        Return a :class:`~propensim.markets.model.Market` (a ``mesa.Model``, default) or, if
        False, the lighter :class:`MarketEngine` (no Mesa import; same results). A per-agent
        clearing rule always gets a Market, since it needs Mesa agents.

    Returns
    -------
    Market or MarketEngine
    """
    from propensim.plugins.networks import build_network

    streams = spawn_streams(seed)
    pop_conf = dict(config.get("population") or {})
    missing = [k for k in ("n_buyers", "n_sellers") if k not in pop_conf]
    if missing:
        raise ValueError(f"population.{missing[0]} is required (a whole number >= 0)")
    population = build_population(rng=streams["population"], **pop_conf)
    net_conf = config.get("network", "complete")
    if isinstance(net_conf, str):
        net_conf = {"name": net_conf}
    net_params = {k: v for k, v in net_conf.items() if k != "name"}
    network = build_network(net_conf["name"], population.role, streams["network"], **net_params)
    clearing = _plugin_from("clearing", config.get("clearing", "propensity"))
    drift = build_drift(config.get("drift"))
    options = dict(config.get("market") or {})
    cls = MarketEngine
    if mesa or getattr(clearing, "per_agent", False):
        from propensim.markets.model import Market as cls
    return cls(
        population,
        network,
        clearing,
        drift,
        config.get("metrics"),
        seed=seed,
        **options,
    )
