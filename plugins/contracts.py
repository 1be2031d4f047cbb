"""One contract per plugin kind.

Each contract is a :class:`typing.Protocol`: a class passes by its shape, not by inheriting from
anything of ours, so a student's rule needs no import from propensim to be a plugin. Every plugin

* has a class attribute ``description``: one line saying what it does (shown by
  ``propensim plugins`` and in model descriptions);
* takes its parameters as keyword arguments with defaults and stores them under the same names,
  doing nothing else in ``__init__`` (so a rule can be cloned, compared and swept from a spec);
* may carry ``odd_notes``: a class attribute ``dict[str, str]`` of design-concept notes keyed by
  the ODD protocol's concepts (``basic_principles``, ``emergence``, ``adaptation``,
  ``objectives``, ``learning``, ``prediction``, ``sensing``, ``interaction``, ``stochasticity``,
  ``collectives``, ``observation``), which ``propensim describe`` writes into the model
  description (a plugin without them gets a visible placeholder);
* may define ``check(self) -> None`` that raises ``ValueError`` naming a bad parameter and its
  allowed range; the registry calls it when it builds the plugin;
* draws randomness only from the ``numpy.random.Generator`` it is handed, never from global state,
  so a run is a pure function of its spec and seed.

The contracts never import a concrete rule.
"""

from __future__ import annotations

from typing import ClassVar, Protocol, runtime_checkable

import numpy as np

from propensim.plugins.types import MarketState, RoundOutcome, Trades


@runtime_checkable
class ClearingRule(Protocol):
    """Turns one round of market state into trades.

    Inputs
        ``state``: the :class:`MarketState` at the start of the round (read only);
        ``rng``: the market's clearing stream.
    Output
        :class:`Trades` with ``buyer`` a buyer row, ``seller`` a seller row, finite ``price`` and
        ``quantity >= 1``.
    Invariants (checked by the market on every round and by ``propensim.plugins.testing``)
        every trade joins a buyer and a seller that share an edge of ``state.network``;
        no trader trades more units than ``state.remaining`` allows (capacity, and for a seller
        its stock); a buyer with finite cash spends no more than it has;
        the same generator state gives the same trades.
    Cost
        should be linear in edges and traders: a round at 1e5 traders is meant to take
        milliseconds, so no Python loop over traders.

    Price bounds
        ``state.price_floor`` and ``state.price_ceiling`` (``-inf`` and ``inf`` unless a price
        control is in force). A rule that keeps every trade inside them declares the class
        attribute ``honours_price_bounds = True``; only such rules may be used with a price
        ceiling or floor, and the market refuses a trade outside the bounds either way.
        MODEL.md section 9 and docs/policy.md give the meaning for each built-in rule.

    A rule may instead (or also) offer the per-agent path: set ``per_agent = True`` and define
    ``agent_trades(agent, state, rng) -> list[tuple[int, int, float, int]]`` returning
    ``(buyer, seller, price, quantity)`` tuples for one trader. The market then calls it for every
    trader in a random order, applying each trader's trades (and shrinking ``state.remaining``)
    before the next call. Slower, same contract.
    """

    description: ClassVar[str]

    def clear(self, state: MarketState, rng: np.random.Generator) -> Trades:
        """Return this round's trades."""
        ...


@runtime_checkable
class DriftRule(Protocol):
    """Moves the traders' curves between rounds.

    Inputs
        ``state``: the market state after the round's trades were applied; ``state.elapsed``
        is the time since the last drift step in rounds (1 in round mode, the time between
        steps in event mode): a rule that integrates over time steps over ``dt * elapsed``;
        ``outcome``: the round's :class:`RoundOutcome` (who traded, at what price);
        ``rng``: the market's drift stream.
    Output
        ``(mu, sigma)``: new arrays of shape ``(n,)``; ``sigma`` strictly positive and finite.
    Combining
        A rule that is a force may also define ``terms(state, outcome) -> (stiffness,
        offset)`` and ``update_sigma(state, outcome, sigma)``; :func:`~propensim.plugins.drift.
        combine` sums the forces into one exact Ornstein-Uhlenbeck step, then applies every rule
        that has only ``apply`` in order. So any rule that passes the kit combines.
    Invariants
        returns new arrays (never edits the population in place); a rule that leaves a column
        alone returns it unchanged; draws only from ``rng``.
    Cost
        linear in traders (and in social edges for rules that feel their neighbours).
    """

    description: ClassVar[str]

    def apply(
        self, state: MarketState, outcome: RoundOutcome, rng: np.random.Generator
    ) -> tuple[np.ndarray, np.ndarray]:
        """Return the new ``(mu, sigma)`` columns."""
        ...


@runtime_checkable
class Metric(Protocol):
    """One number per round, measured after trades and drift.

    Inputs
        ``state``: the market state at the end of the round; ``outcome``: its trades.
    Output
        a float (NaN where undefined, for example a price with no trade).

    Attributes
        ``aggregate``: how a run's rounds are summarised into one number, one of ``"mean"``,
        ``"sum"``, ``"last"``, ``"final_half_mean"``; optionally ``better``: ``"higher"`` or
        ``"lower"`` when one direction is better for the market (comparisons count wins by it),
        ``None`` when neither is (a price level).
    Cost
        linear in trades and traders per round; anything costlier that does not change between
        rounds goes in ``state.cache`` once.
    """

    description: ClassVar[str]
    aggregate: ClassVar[str]

    def measure(self, state: MarketState, outcome: RoundOutcome) -> float:
        """Return this round's value."""
        ...


@runtime_checkable
class NetworkBuilder(Protocol):
    """Builds who-can-trade-with-whom for a population.

    Inputs
        ``role``: int8 array of shape ``(n,)`` (0 buyer, 1 seller); ``rng``: the network stream.
    Output
        a :class:`~propensim.plugins.types.TradingNetwork` over the same ``n`` rows.
    Invariants
        deterministic given ``rng``; edges name rows 0..n-1; no self-loops.
    Cost
        builders meant for large markets (1e6 traders) must work on arrays, not networkx graphs.
    """

    description: ClassVar[str]

    def build(self, role: np.ndarray, rng: np.random.Generator):
        """Return a TradingNetwork for these roles."""
        ...


@runtime_checkable
class CurveFamily(Protocol):
    """A propensity-curve family: P(x) in [0, 1], vectorised over prices and parameters.

    Required methods: ``value(x)``, ``log_value(x)``, ``force(x, gamma)``,
    ``energy(x0, x1, gamma)``, ``reservation_price(threshold=0.5, side=...)``, and the classmethod
    ``from_population(mu, sigma, activity, role, **params)`` that builds a batch of curves from
    population columns. See :mod:`propensim.agents.curves`.
    """

    description: ClassVar[str]

    def value(self, x):
        """Acceptance probability at prices ``x``."""
        ...

    def log_value(self, x):
        """Natural log of :meth:`value`, finite far into the tails."""
        ...


@runtime_checkable
class Intervention(Protocol):
    """Changes the market from round ``start`` until round ``until`` (a policy or a shock).

    Window
        ``start``: first round it acts in (default 0); ``until``: the round it stops at
        (exclusive; None: to the end).
    Hooks
        ``begin(market, rng)``: called once at the start of round ``start``, after holdings are
        restored and before clearing; ``end(market, rng)`` (optional): called at the start of
        round ``until`` to undo what ``begin`` did; ``validate(market)`` (optional): called
        before the first round, raises ``ValueError`` naming a parameter that does not fit this
        market (a missing attribute, a trader id out of range, ``k`` above the traders there
        are).
    What it may change
        Only through the market: ``remove_traders(rows)``, ``restore_traders(rows, network)``,
        ``replace_network(net)``, ``replace_population(pop, network)``,
        ``replace_clearing(rule)``, and ``market.policy`` (``floor``, ``ceiling``,
        ``buyer_tax``, ``seller_tax``). Each of these drops every derived cache.
    Invariants
        draws only from ``rng``, its own stream (interventions never move each other's draws or
        the market's); several due in one round act in spec order.
    """

    description: ClassVar[str]

    def begin(self, market, rng: np.random.Generator) -> None:
        """Change the market at round ``start``."""
        ...
