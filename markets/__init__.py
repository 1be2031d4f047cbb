"""Where and how trade happens: the Market (a mesa.Model), its network, rounds, ledger, metrics.

Imports the agents and plugins layers. Names load on first use (importing mesa costs ~1 s).
"""

from propensim.agents._lazy import lazy_exports

_NAMES = {
    "Market": "model",
    "Trader": "model",
    "build_market": "build",
    "MarketEngine": "engine",
    "build_drift": "build",
    "build_interventions": "build",
    "spawn_streams": "build",
    "seed_sequence": "build",
    "STREAMS": "build",
    "DEFAULT_METRICS": "engine",
    "Recorder": "recorder",
    "PricePolicy": "schedule",
    "EventMarket": "events",
    "build_event_market": "events",
    "simulate_reactions": "events",
    "Shop": "supply_chain",
    "build_shop": "supply_chain",
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
