"""Interchangeable rules behind small contracts: clearing, drift, curves, networks, metrics.

Imports only the agents layer. Built-in plugins register through the same entry-point groups as a
third party's (see :mod:`propensim.plugins.registry`). Names load on first use.
"""

from importlib import import_module

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


def __getattr__(name: str):
    if name in _NAMES:
        return getattr(import_module(f"{__name__}.{_NAMES[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return __all__
