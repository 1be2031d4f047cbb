"""Lazy public names for a package's ``__init__``: import a submodule only when a name is used.

Every layer's ``__init__`` lists its public names and the module each lives in, so that
``import propensim.markets`` does not import Mesa, pandas or scipy until they are needed.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from importlib import import_module


def lazy_exports(package: str, names: Mapping[str, str]) -> tuple[Callable, Callable]:
    """Module-level ``__getattr__`` and ``__dir__`` for ``package``.

    ``names`` maps each public name to the module that defines it: a submodule of ``package``
    (``"curves"``) or a full module path (``"propensim.plugins.metrics"``).
    """

    def __getattr__(name: str):
        target = names.get(name)
        if target is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        module = target if target.startswith("propensim.") else f"{package}.{target}"
        return getattr(import_module(module), name)

    def __dir__() -> list[str]:
        return sorted(names)

    return __getattr__, __dir__
