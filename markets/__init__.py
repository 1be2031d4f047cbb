"""Where and how trade happens: the Market (a mesa.Model), its network, rounds, ledger, metrics.

Imports the agents and plugins layers. Names load on first use (importing mesa costs ~1 s).
"""

from propensim.agents._lazy import lazy_exports

_NAMES = {
    "Market": "model",
    "build_market": "engine",
    "MarketEngine": "engine",
    "build_drift": "engine",
    "spawn_streams": "engine",
    "seed_sequence": "engine",
    "STREAMS": "engine",
    "DEFAULT_METRICS": "engine",
}
_NAMES |= {
    "max_surplus": "propensim.plugins.metrics",
    "competitive_equilibrium": "propensim.plugins.metrics",
    "from_graph": "propensim.plugins.networks",
    "build_network": "propensim.plugins.networks",
    "TradingNetwork": "propensim.plugins.types",
    "Trades": "propensim.plugins.types",
}

__all__ = sorted(_NAMES)

__getattr__, __dir__ = lazy_exports(__name__, _NAMES)
