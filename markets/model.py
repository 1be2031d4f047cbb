"""The market as a ``mesa.Model``, and its traders as ``mesa.Agent`` views on population rows.

Mesa lives here only: the array engine and the other layers never import it.
"""

from __future__ import annotations

import mesa
import numpy as np

from propensim.agents.population import BUYER, ROLE_NAMES, Population
from propensim.markets.build import spawn_streams
from propensim.markets.engine import MarketEngine


class _Column:
    """Descriptor: a Trader attribute that reads and writes its row of a population column."""

    def __set_name__(self, owner, name: str) -> None:
        self.name = name

    def __get__(self, obj, objtype=None):
        if obj is None:
            return self
        return getattr(obj._population, self.name)[obj.index].item()

    def __set__(self, obj, val) -> None:
        getattr(obj._population, self.name)[obj.index] = val


class Trader(mesa.Agent):
    """One trader as a ``mesa.Agent``: a view on row ``index`` of the model's population.

    Attributes ``mu``, ``sigma``, ``activity``, ``gamma``, ``value``, ``cash``, ``stock`` and
    ``capacity`` read and write the population arrays, so array rules and per-agent code see
    the same state.
    """

    mu = _Column()
    sigma = _Column()
    activity = _Column()
    gamma = _Column()
    value = _Column()
    cash = _Column()
    stock = _Column()
    capacity = _Column()

    def __init__(self, model, population: Population, index: int) -> None:
        super().__init__(model)
        self._population = population
        self.index = int(index)

    @property
    def role(self) -> str:
        """``"buyer"`` or ``"seller"``."""
        return ROLE_NAMES[self._population.role[self.index]]

    @property
    def is_buyer(self) -> bool:
        """True for a buyer."""
        return bool(self._population.role[self.index] == BUYER)

    def curve(self):
        """The propensity curve of this trader (scalar parameters)."""
        return self._population.curves(np.array([self.index]))

    def __repr__(self) -> str:
        return f"Trader(index={self.index}, role={self.role!r}, mu={self.mu:.4g})"


class Market(MarketEngine, mesa.Model):
    """A market of propensity traders on a trading network, as a ``mesa.Model``.

    Same parameters and results as :class:`MarketEngine`; adds Mesa's ``model.agents`` (one
    ``Trader`` agent per population row, created on first access) so Mesa tooling, data
    collection and per-agent plugins work.

    Examples
    --------
    >>> from propensim.markets import build_market
    >>> m = build_market({"population": {"n_buyers": 50, "n_sellers": 50},
    ...                   "clearing": {"name": "propensity"}}, seed=1)
    >>> frame = m.run(5)
    >>> list(frame["round"])
    [0, 1, 2, 3, 4]
    """

    def __init__(
        self, population, network, clearing, drift=None, metrics=None, *, seed=None, **options
    ) -> None:
        mesa_seed = int(spawn_streams(seed)["mesa"].integers(2**63 - 1))
        mesa.Model.__init__(self, rng=mesa_seed)
        self._traders = None
        MarketEngine.__init__(
            self, population, network, clearing, drift, metrics, seed=seed, **options
        )

    # -- Mesa agents, created only when asked for --------------------------------------------
    @property
    def agents(self):
        """All traders as a Mesa ``AgentSet`` (created on first access: they cost ~9 us each)."""
        self._materialise()
        return self._all_agents

    @property
    def traders(self) -> list:
        """Traders as ``Trader`` Mesa agents in population row order."""
        self._materialise()
        return self._traders

    def _population_replaced(self) -> None:
        """Agents are views on rows: after a new population, build them again when asked."""
        if self._traders is not None:
            for agent in self._traders:
                agent.remove()
            self._traders = None

    def _materialise(self) -> None:
        if self._traders is None:
            self._traders = [Trader(self, self.population, i) for i in range(len(self.population))]
