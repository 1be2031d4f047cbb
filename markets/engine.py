"""The market engine: a round of named stages over trader columns, a network and plugins.

One round is one pass, with no back and forth (see :mod:`propensim.markets.stages`)::

    begin_round -> apply_interventions -> clear -> settle -> drift -> measure -> record

Rules read the state and return arrays; the stages alone write state, and the market's
``replace_*`` methods are the one place where its network, population or clearing rule change
mid-run. Randomness comes from one seed per market, split into named streams (see
:mod:`propensim.markets.build`) so that a draw added in one place does not reshuffle the others,
and a run is a pure function of its configuration and seed.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from typing import Any

import numpy as np

from propensim.agents.population import BUYER, ROLE_NAMES, SELLER, Population
from propensim.markets import stages
from propensim.markets.build import (  # noqa: F401  (build_market etc. also import from here)
    STREAMS,
    build_drift,
    build_market,
    intervention_streams,
    seed_sequence,
    spawn_streams,
)
from propensim.markets.recorder import Recorder
from propensim.markets.schedule import PricePolicy, Schedule, TraderRemoval
from propensim.plugins import acceleration, registry
from propensim.plugins.metrics import MetricBatch
from propensim.plugins.types import MarketState, TradingNetwork

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


class MarketEngine(TraderRemoval):
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
    interventions : sequence, optional
        Intervention plugin instances, acting in this order (see
        :mod:`propensim.markets.schedule`); each draws from its own stream.
    keep_totals : bool
        Keep each trader's surplus over the run (for who-gains-and-who-loses comparisons).
    keep_meetings : bool
        Keep every meeting the clearing rule reports, traded or not (propensity matching
        reports them), for calibration: see :meth:`meetings_columns`.

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
        interventions: Sequence = (),
        keep_totals: bool = False,
        keep_meetings: bool = False,
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
        self.metric_batch = MetricBatch.of(self.metrics)
        self.replenish = bool(replenish)
        self.recorder = Recorder(
            self.metrics,
            traders_every=int(traders_every),
            keep_ledger=bool(keep_ledger),
            keep_totals=bool(keep_totals),
            keep_meetings=bool(keep_meetings),
        )
        self._rng_clearing = streams["clearing"]
        self._rng_drift = streams["drift"]
        self._traders: list | None = None
        self.round = 0
        self.policy = PricePolicy()
        self.treasury = 0.0  #: money taken in taxes less subsidies paid, over the run
        self.present = np.ones(len(population), dtype=bool)  #: False for traders who left
        self.state = MarketState(
            population=population,
            network=network,
            round=0,
            equilibrium_price=float("nan"),  # set by _set_derived, below
        )
        #: Compiled kernels or numpy, chosen once here (importing numba now, not in round 0).
        self.compiled = acceleration.choose()
        self._set_derived()
        # The fixed welfare benchmark: the market as it stands before any intervention.
        self.state._benchmark_source = (
            population.role.copy(),
            population.value.copy(),
            self.state.remaining.copy(),
            network,
        )
        self.initial_degree = network.degree.copy()
        interventions = list(interventions or ())
        self.schedule = Schedule(interventions, intervention_streams(seed, len(interventions)))
        self.schedule.validate(self)
        _warn_if_no_trade_possible(population, network)

    # -- derived state, and the one place that changes the market ----------------------------
    def _set_derived(self) -> None:
        """Everything derived from the population and network; emptied caches."""
        pop = self.population
        self._initial_stock = pop.stock.copy()
        self._initial_cash = pop.cash.copy()
        self._is_seller = pop.role == SELLER  # shape: (n,)
        self.state.population = pop
        self.state.network = self.network
        self.state.cache.clear()
        self.state.remaining = stages.units_left(self)
        self.state.equilibrium_price = _equilibrium_price(pop)

    def replace_network(self, network: TradingNetwork) -> None:
        """Put a new network in place (same traders) and drop every cache derived from the old.

        Holdings and curves are untouched; the next round clears on the new edges.
        """
        if not isinstance(network, TradingNetwork):
            network = _network_from_graph(network, self.population)
        if network.n != len(self.population):
            raise ValueError(
                f"network has {network.n} traders but population has {len(self.population)}"
            )
        self.network = network
        self.state.network = network
        self.state.cache.clear()

    def replace_population(self, population: Population, network: TradingNetwork | None = None):
        """Put a new population in place (rows kept in order; new rows appended) and drop caches.

        The holdings a fresh round restores become those of the new population. A population of
        a different size needs a ``network`` over its rows.
        """
        old_n = len(self.population)
        n = len(population)
        if network is None:
            network = self.network
        if network.n != n:
            raise ValueError(f"network has {network.n} traders but population has {n}")
        if n < old_n:
            raise ValueError(
                "a population may grow or keep its size; traders who leave stay as rows"
            )
        if np.any(population.role[:old_n] != self.population.role):
            raise ValueError("replacing the population must keep every existing trader's role")
        stock0, cash0 = self._initial_stock, self._initial_cash
        self.population = population
        self.network = network
        self._set_derived()
        if self.replenish:  # existing rows restore what they started with; new rows their own
            self._initial_stock[:old_n] = stock0
            self._initial_cash[:old_n] = cash0
        if n > old_n:
            self.present = np.concatenate([self.present, np.ones(n - old_n, dtype=bool)])
            self.initial_degree = np.concatenate(
                [self.initial_degree, np.zeros(n - old_n, dtype=self.initial_degree.dtype)]
            )
        self._population_replaced()

    def _population_replaced(self) -> None:
        """Hook for views on the population rows (the Mesa model rebuilds its agents)."""

    def replace_clearing(self, rule) -> None:
        """Clear with ``rule`` from the next clearing on."""
        self.clearing = rule
        self.state.cache.clear()

    @property
    def traders(self) -> list:
        """Per-agent rules need Mesa agents: use :class:`Market`, which has them."""
        raise TypeError("this rule needs Mesa agents: build the market with mesa=True")

    # -- one round -------------------------------------------------------------------------
    def step(self) -> None:
        """Run one round: its stages in order (see :mod:`propensim.markets.stages`)."""
        acceleration.activate(self.compiled)  # the code chosen at build, every round
        try:
            stages.begin_round(self)
            stages.apply_interventions(self)
            trades = stages.clear(self)
            outcome = stages.settle(self, trades)
            stages.drift(self, outcome)
            row = stages.measure(self, outcome)
            stages.record(self, outcome, row)
        finally:
            acceleration.activate(None)
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

    # -- results (kept by the recorder) ------------------------------------------------------
    @property
    def traders_every(self) -> int:
        """Trader snapshots are kept every this many rounds (0: never)."""
        return self.recorder.traders_every

    @property
    def keep_ledger(self) -> bool:
        """Whether every trade is kept."""
        return self.recorder.keep_ledger

    def rounds_columns(self) -> dict[str, np.ndarray]:
        """The round table as columns (name -> array; see :meth:`rounds_frame`), without pandas."""
        return self.recorder.rounds_columns()

    def rounds_frame(self):
        """One row per round: ``round`` and one column per metric (a pandas DataFrame)."""
        import pandas as pd

        return pd.DataFrame(self.rounds_columns())

    def ledger_columns(self) -> dict[str, np.ndarray]:
        """The trade ledger as columns (see :meth:`ledger_frame`), without pandas."""
        return self.recorder.ledger_columns()

    def ledger_frame(self):
        """Every kept trade: round, buyer, seller, price, quantity (a pandas DataFrame)."""
        import pandas as pd

        return pd.DataFrame(self.ledger_columns())

    def traders_columns(self) -> dict[str, np.ndarray]:
        """The sampled trader states as columns (see :meth:`traders_frame`), without pandas."""
        return self.recorder.traders_columns(self.population)

    def traders_frame(self):
        """Sampled trader states (every ``traders_every`` rounds), long format."""
        import pandas as pd

        return pd.DataFrame(self.traders_columns())

    def meetings_columns(self) -> dict[str, np.ndarray]:
        """Every recorded meeting: round, buyer, seller, price (NaN if untraded), traded."""
        return self.recorder.meetings_columns()

    def meetings_frame(self):
        """Every recorded meeting as a pandas DataFrame (see :meth:`meetings_columns`)."""
        import pandas as pd

        return pd.DataFrame(self.meetings_columns())

    def totals_columns(self) -> dict[str, np.ndarray]:
        """Each trader's surplus over the run with the columns that group traders.

        ``role``; ``degree_quartile`` (1-4, of the trading degree before any intervention);
        ``left`` (1 for a trader an intervention took out); and every network attribute
        (e.g. ``region``).
        """
        pop = self.population
        n = len(pop)
        groups: dict[str, np.ndarray] = {
            "role": np.array(ROLE_NAMES, dtype=object)[pop.role].astype(str),
            "degree_quartile": _quartiles(self.initial_degree),
            "left": (~self.present).astype(np.int64),
        }
        for key, values in self.network.attributes.items():
            if values.shape == (n,):
                groups[key] = values
        return self.recorder.totals_columns(groups)

    def summary(self) -> dict[str, float]:
        """One number per metric over the rounds run so far, by each metric's ``aggregate``."""
        return self.recorder.summary()


def _quartiles(degree: np.ndarray) -> np.ndarray:
    """Degree quartile (1 = least connected quarter, 4 = best) of each trader.

    Traders of equal degree share the quartile of the first of them in sorted order.
    """
    n = degree.size
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    order = np.argsort(degree, kind="stable")
    sorted_deg = degree[order]
    start = np.r_[0, np.flatnonzero(np.diff(sorted_deg)) + 1]  # first rank of each degree
    first_rank = np.empty(n, dtype=np.int64)
    first_rank[order] = np.repeat(start, np.diff(np.r_[start, n]))
    return first_rank * 4 // n + 1


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
    from propensim.plugins.welfare import crossing

    # From counts (a weighted crossing): the same price as competitive_equilibrium on the
    # unit-expanded arrays, in memory and time that do not grow with units per trader.
    b, s = pop.role == BUYER, pop.role == SELLER
    units_s = np.minimum(pop.capacity[s], pop.stock[s])
    q, lo, hi = crossing(pop.value[b], pop.capacity[b], pop.value[s], units_s)
    return float("nan") if q == 0 else 0.5 * (lo + hi)


def _warn_if_no_trade_possible(pop: Population, net: TradingNetwork) -> None:
    if net.n_edges == 0:
        warnings.warn(
            "the trading network has no buyer-seller edge: no trade is possible",
            RuntimeWarning,
            stacklevel=3,
        )
        return
    if _edges_join_roles(pop, net):
        # Every edge joins a buyer and a seller, so a part of two or more traders holds both
        # roles: the traders without a partner are those without an edge, each a part alone.
        # (The same count as the components below, without building them.)
        stranded = lonely = int(np.count_nonzero(net.degree == 0))
    else:
        stranded, lonely = _one_sided_parts(pop, net)
    if lonely:
        # One line, whatever the count of parts: the numbers, then a fixed text.
        warnings.warn(
            f"{stranded} of {len(pop)} traders have no possible trading partner (in {lonely} "
            "part(s) of the trading network that hold only buyers or only sellers)",
            RuntimeWarning,
            stacklevel=3,
        )


def _edges_join_roles(pop: Population, net: TradingNetwork) -> bool:
    """Whether every trading edge runs from a buyer to a seller."""
    role = pop.role
    return bool((role[net.buyer] == BUYER).all() and (role[net.seller] == SELLER).all())


def _one_sided_parts(pop: Population, net: TradingNetwork) -> tuple[int, int]:
    """``(traders, parts)`` in the network's connected parts that hold only one role."""
    comp = net.component
    has_buyer = np.zeros(comp.max() + 1, dtype=bool)
    has_seller = np.zeros(comp.max() + 1, dtype=bool)
    has_buyer[comp[pop.role == BUYER]] = True
    has_seller[comp[pop.role == SELLER]] = True
    one_sided = has_buyer ^ has_seller  # shape: (n_parts,)
    return int(np.count_nonzero(one_sided[comp])), int(np.count_nonzero(one_sided))
