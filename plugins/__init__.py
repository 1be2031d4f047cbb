"""Interchangeable rules behind small contracts: clearing, drift, curves, networks, metrics,
interventions.

Imports only the agents layer. Built-in plugins register through the same entry-point groups as a
third party's (see :mod:`propensim.plugins.registry`). Names load on first use.
"""

from propensim.agents._lazy import lazy_exports

_NAMES = {
    "Trades": "types",
    "TradingNetwork": "types",
    "MarketState": "types",
    "RoundOutcome": "types",
    "ClearingRule": "contracts",
    "DriftRule": "contracts",
    "Metric": "contracts",
    "NetworkBuilder": "contracts",
    "CurveFamily": "contracts",
    "Intervention": "contracts",
    "KINDS": "registry",
    "UnknownPluginError": "registry",
    "get_plugin": "registry",
    "make_plugin": "registry",
    "names": "registry",
    "parameters": "registry",
    "register": "registry",
    "unregister": "registry",
    "describe": "registry",
}

__all__ = sorted(_NAMES)

__getattr__, __dir__ = lazy_exports(__name__, _NAMES)
