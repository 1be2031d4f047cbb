"""Where and how trade happens: the Market (a mesa.Model), its network, rounds, ledger, metrics.

Imports the agents and plugins layers. Names load on first use (importing mesa costs ~1 s).
"""

from importlib import import_module

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
_FROM_PLUGINS = {
    "max_surplus": "propensim.plugins.metrics",
    "competitive_equilibrium": "propensim.plugins.metrics",
    "from_graph": "propensim.plugins.networks",
    "build_network": "propensim.plugins.networks",
    "TradingNetwork": "propensim.plugins.types",
    "Trades": "propensim.plugins.types",
}

__all__ = sorted([*_NAMES, *_FROM_PLUGINS])


def __getattr__(name: str):
    if name in _NAMES:
        return getattr(import_module(f"{__name__}.{_NAMES[name]}"), name)
    if name in _FROM_PLUGINS:
        return getattr(import_module(_FROM_PLUGINS[name]), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return __all__
