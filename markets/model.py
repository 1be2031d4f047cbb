"""The market as a ``mesa.Model``: the engine plus Mesa agents for every trader."""

from __future__ import annotations

import mesa

from propensim.markets.engine import MarketEngine, spawn_streams


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

    def _materialise(self) -> None:
        if self._traders is None:
            from propensim.agents.population import Trader

            self._traders = [Trader(self, self.population, i) for i in range(len(self.population))]
