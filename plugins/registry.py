"""Finding plugins by kind and name.

Built-in plugins are declared in pyproject.toml under the entry-point groups
``propensim.clearing``, ``propensim.drift``, ``propensim.curves``, ``propensim.networks`` and
``propensim.metrics``, exactly as a third-party package declares its own. Nothing is imported
until a plugin is asked for. A plugin that fails to import, or a second plugin under a name already
taken, is skipped with a warning. :func:`register` adds one at run time (notebooks, tests).
"""

from __future__ import annotations

import difflib
import importlib
import inspect
import warnings
from dataclasses import dataclass
from importlib import metadata
from typing import Any

KINDS = ("clearing", "drift", "curves", "networks", "metrics", "interventions")


class UnknownPluginError(ValueError):
    """An unknown plugin kind, name or parameter."""


@dataclass
class _Entry:
    name: str
    target: str  # "module:attr", or "" for runtime registrations
    obj: Any = None
    broken: bool = False
    package: str = ""  # " (package NAME)" for an entry point, for warnings


def _package(ep) -> str:
    dist = getattr(ep, "dist", None)
    name = getattr(dist, "name", None) if dist is not None else None
    return f" (package {name})" if name else ""


_TABLE: dict[str, dict[str, _Entry]] | None = None


def _table() -> dict[str, dict[str, _Entry]]:
    global _TABLE
    if _TABLE is None:
        table: dict[str, dict[str, _Entry]] = {k: {} for k in KINDS}
        for kind in KINDS:
            for ep in metadata.entry_points(group=f"propensim.{kind}"):
                known = table[kind].get(ep.name)
                if known is not None:
                    if known.target != ep.value:
                        warnings.warn(
                            f"propensim: duplicate {kind} plugin {ep.name!r} from {ep.value}"
                            f"{_package(ep)} skipped; {known.target}{known.package} keeps the "
                            "name",
                            RuntimeWarning,
                            stacklevel=2,
                        )
                    continue
                table[kind][ep.name] = _Entry(ep.name, ep.value, package=_package(ep))
        _TABLE = table
    return _TABLE


def _check_kind(kind: str) -> None:
    if kind not in KINDS:
        raise UnknownPluginError(f"unknown plugin kind {kind!r}; allowed: {', '.join(KINDS)}")


def _load(kind: str, entry: _Entry):
    if entry.obj is None and not entry.broken:
        module, _, attr = entry.target.partition(":")
        try:
            obj = importlib.import_module(module)
            for part in attr.split("."):
                obj = getattr(obj, part)
        except Exception as exc:  # a broken third-party plugin must not stop the others
            entry.broken = True
            warnings.warn(
                f"propensim: {kind} plugin {entry.name!r} ({entry.target}) failed to load "
                f"and is skipped: {type(exc).__name__}: {exc}",
                RuntimeWarning,
                stacklevel=3,
            )
            return None
        if not isinstance(getattr(obj, "description", None), str):
            entry.broken = True
            warnings.warn(
                f"propensim: {kind} plugin {entry.name!r} has no one-line 'description' and is "
                "skipped",
                RuntimeWarning,
                stacklevel=3,
            )
            return None
        entry.obj = obj
    return entry.obj


def names(kind: str) -> list[str]:
    """Registered names of one kind, sorted (without importing them)."""
    _check_kind(kind)
    return sorted(n for n, e in _table()[kind].items() if not e.broken)


def get_plugin(kind: str, name: str):
    """The plugin class (or factory) registered as ``name`` under ``kind``.

    Raises
    ------
    UnknownPluginError
        Naming the known plugins of that kind and the closest match.
    """
    _check_kind(kind)
    entry = _table()[kind].get(name)
    obj = _load(kind, entry) if entry is not None else None
    if obj is None:
        known = names(kind)
        close = difflib.get_close_matches(str(name), known, n=1)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        raise UnknownPluginError(
            f"unknown {kind} plugin {name!r}{hint}; known: {', '.join(known) or '(none)'}"
        )
    return obj


def parameters(kind: str, name: str) -> dict[str, Any]:
    """The keyword parameters a plugin accepts, with their defaults."""
    cls = get_plugin(kind, name)
    try:
        found = _parameters_of.get(cls)
    except TypeError:  # an unhashable factory: read its signature every time
        return _signature_parameters(cls)
    if found is None:
        found = _parameters_of[cls] = _signature_parameters(cls)  # read once per class
    return dict(found)


def _signature_parameters(cls) -> dict[str, Any]:
    """Keyword parameters and defaults from ``inspect.signature`` (about 0.2 ms a call)."""
    sig = inspect.signature(cls)
    return {
        p.name: (None if p.default is inspect.Parameter.empty else p.default)
        for p in sig.parameters.values()
        if p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD)
    }


#: ``parameters`` of each plugin class seen (a sweep builds thousands of markets), keyed by the
#: class: a class registered again under the same name is a new object, so it is read afresh.
_parameters_of: dict[Any, dict[str, Any]] = {}


def make_plugin(kind: str, name: str, /, **params):
    """Build plugin ``name`` of ``kind`` with keyword ``params``, and check them.

    Raises
    ------
    UnknownPluginError
        For an unknown name or parameter (listing the allowed ones).
    ValueError
        From the plugin's own ``check()`` for a parameter out of range.
    """
    cls = get_plugin(kind, name)
    allowed = parameters(kind, name)
    extra = sorted(set(params) - set(allowed))
    if extra:
        raise UnknownPluginError(
            f"unknown parameter {extra[0]!r} for {kind} plugin {name!r}; "
            f"allowed: {', '.join(allowed) or '(none)'}"
        )
    obj = cls(**params)
    check = getattr(obj, "check", None)
    if callable(check):
        check()
    obj.plugin_name = name
    return obj


def register(kind: str, name: str | None = None, *, replace: bool = False):
    """Class decorator registering a plugin at run time.

    Parameters
    ----------
    kind : str
        One of :data:`KINDS`.
    name : str, optional
        Registry name; defaults to the class name in lower case.
    replace : bool
        Allow taking a name already in use (otherwise a duplicate is refused with a warning).
    """
    _check_kind(kind)

    def deco(obj):
        key = name or obj.__name__.lower()
        table = _table()[kind]
        if key in table and not replace:
            warnings.warn(
                f"propensim: duplicate {kind} plugin {key!r} skipped; the existing one keeps "
                "the name (pass replace=True to override)",
                RuntimeWarning,
                stacklevel=2,
            )
            return obj
        if not isinstance(getattr(obj, "description", None), str):
            raise TypeError(f"{kind} plugin {key!r} needs a one-line class attribute 'description'")
        table[key] = _Entry(key, "", obj=obj)
        return obj

    return deco


def runtime_plugins() -> list[tuple[str, str, Any]]:
    """``(kind, name, obj)`` of every plugin registered at run time with :func:`register`.

    Worker processes do not see these (they start from the entry points alone), so the runner
    ships them, or refuses them, before a sweep starts (``propensim.experiments.local_plugins``).
    """
    return [
        (kind, entry.name, entry.obj)
        for kind, table in _table().items()
        for entry in table.values()
        if not entry.target and entry.obj is not None
    ]


def unregister(kind: str, name: str) -> None:
    """Remove a plugin registered at run time (tests use it to clean up)."""
    _check_kind(kind)
    _table()[kind].pop(name, None)


def describe(kind: str | None = None) -> list[tuple[str, str, str]]:
    """``(kind, name, description)`` for every plugin that loads, kind by kind."""
    rows = []
    for k in [kind] if kind else KINDS:
        _check_kind(k)
        for n in names(k):
            obj = _load(k, _table()[k][n])
            if obj is not None:
                rows.append((k, n, obj.description.strip().splitlines()[0]))
    return rows


def _install_curve_resolver() -> None:
    # The agents layer finds curve families by name through this hook, so a family registered
    # as a plugin (by entry point or at run time) works there without agents importing plugins.
    from propensim.agents.curves import set_family_resolver

    set_family_resolver(lambda name: get_plugin("curves", name))


_install_curve_resolver()
