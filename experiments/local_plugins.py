"""Plugin modules a spec names, loaded in this process and in every worker.

A spec may list Python files (paths relative to the spec file) or importable module names::

    plugins = ["my_rules.py", "mypkg.rules"]

Each is imported before the spec is checked, so the plugins it registers (with
:func:`propensim.plugins.register`) are known to the rest of the spec. A spec that names code runs
that code, as ``python my_rules.py`` would: read a spec from someone else before running it.

Workers get the same modules: the runner sends, with every task, the source text of each file
(and the name of each module) that the task's runs use; a worker imports each once, under the
same module name, before its first run (a process pool, a local Dask cluster or a remote one
alike). A file's SHA-256 enters every run's configuration (``config["plugins"]``), so a changed
plugin file means new run ids, and the spec's fingerprint.

Plugins registered at run time in the user's own session (a notebook, a script) are shipped too
when their class lives in an importable module; a class defined in ``__main__`` or inside a
function cannot reach another process, and the sweep stops before any run starts with one line
that says how to fix it.
"""

from __future__ import annotations

import dataclasses
import hashlib
import importlib
import re
import sys
import types
import warnings
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

__all__ = [
    "LocalPluginError",
    "PluginSource",
    "check_session_plugins",
    "install",
    "load_plugins",
    "loaded",
    "manifest_entries",
    "payload",
]

_DOTTED = re.compile(r"[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)*")


class LocalPluginError(ValueError):
    """A plugin module that cannot be loaded, or a session plugin that cannot reach workers.

    ``index`` is the position in the spec's ``plugins`` list (None for a session plugin).
    """

    def __init__(self, message: str, index: int | None = None) -> None:
        super().__init__(" ".join(message.split()))
        self.index = index


@dataclass(frozen=True)
class PluginSource:
    """One loaded plugin module.

    Attributes
    ----------
    entry : str
        The spec's entry, as resolved: an absolute file path, or a dotted module name.
    label : str
        Location-free name that enters run ids: the file name, or the module name.
    module : str
        The name it is imported under (``sys.modules`` key), the same in every worker.
    sha256 : str
        SHA-256 of the file's bytes (for a dotted module: of its source file, if any).
    source : str or None
        The file's text, shipped to workers (None for a dotted module: workers import it).
    registered : tuple of (kind, name)
        The plugins it registered.
    """

    entry: str
    label: str
    module: str
    sha256: str
    source: str | None
    registered: tuple[tuple[str, str], ...]

    def config_entry(self) -> dict[str, str]:
        """What a run's configuration records of this module (enters the run id)."""
        return {"module": self.label, "sha256": self.sha256}


#: Loaded modules in this process: sha256 -> PluginSource, and entry -> sha256 (latest).
_BY_SHA: dict[str, PluginSource] = {}
_BY_ENTRY: dict[str, str] = {}


def loaded() -> list[PluginSource]:
    """Every plugin module loaded in this process (latest version of each entry)."""
    return [_BY_SHA[sha] for sha in _BY_ENTRY.values()]


def _runtime() -> set[tuple[str, str]]:
    from propensim.plugins import registry

    return {(kind, name) for kind, name, _ in registry.runtime_plugins()}


def _defined_in(module: str) -> set[tuple[str, str]]:
    from propensim.plugins import registry

    return {
        (kind, name)
        for kind, name, obj in registry.runtime_plugins()
        if getattr(obj, "__module__", None) == module
    }


def _forget(old: PluginSource) -> None:
    """Unregister what an older version of a module registered (before loading the new one)."""
    from propensim.plugins import registry

    for kind, name in old.registered:
        registry.unregister(kind, name)
    sys.modules.pop(old.module, None)


def _module_name(path: Path, sha: str) -> str:
    stem = re.sub(r"\W", "_", path.stem) or "plugin"
    return f"propensim_local_{stem}_{sha[:12]}"


def _exec_source(name: str, source: str, filename: str) -> types.ModuleType:
    """Import ``source`` as module ``name`` (registered in sys.modules first, as import does)."""
    module = types.ModuleType(name)
    module.__file__ = filename
    sys.modules[name] = module
    try:
        exec(compile(source, filename, "exec"), module.__dict__)
    except BaseException:
        sys.modules.pop(name, None)
        raise
    return module


def _import_file(path: Path, index: int, what: str) -> PluginSource:
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise LocalPluginError(
            f"{what}: cannot read {path}: {exc.strerror or exc}", index
        ) from None
    sha = hashlib.sha256(data).hexdigest()
    entry = str(path)
    known = _BY_SHA.get(sha)
    if known is not None and known.source is not None:
        # loaded already (from here, or a copy of the same bytes elsewhere): the same plugins
        rec = dataclasses.replace(known, entry=entry, label=path.name)
        _BY_SHA[sha] = rec
        _BY_ENTRY[entry] = sha
        return rec
    try:
        source = data.decode("utf-8")
    except UnicodeDecodeError:
        raise LocalPluginError(f"{what}: {path} is not UTF-8 text", index) from None
    previous = _BY_ENTRY.get(entry)
    if previous is not None:
        _forget(_BY_SHA[previous])
    name = _module_name(path, sha)
    before = _runtime()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            _exec_source(name, source, entry)
        except Exception as exc:
            raise LocalPluginError(
                f"{what}: importing {path} failed: {type(exc).__name__}: {_first(exc)}", index
            ) from None
    for w in caught:  # shown after the import, not swallowed
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    found = (_runtime() - before) | _defined_in(name)
    rec = PluginSource(entry, path.name, name, sha, source, tuple(sorted(found)))
    taken = [str(w.message) for w in caught if "duplicate" in str(w.message)]
    if not found and taken:
        raise LocalPluginError(f"{what}: {path} registers no new plugin: {taken[0]}", index)
    _remember(rec, index, what)
    return rec


def _import_module(name: str, index: int, what: str) -> PluginSource:
    before = _runtime()
    try:
        module = importlib.import_module(name)
    except Exception as exc:
        if isinstance(exc, ModuleNotFoundError) and exc.name and name.startswith(exc.name):
            raise LocalPluginError(
                f"{what}: no module named {exc.name!r} (not a file either: a file entry ends "
                "in .py)",
                index,
            ) from None
        raise LocalPluginError(
            f"{what}: importing {name} failed: {type(exc).__name__}: {_first(exc)}", index
        ) from None
    file = getattr(module, "__file__", None)
    data = Path(file).read_bytes() if file and Path(file).is_file() else name.encode()
    sha = hashlib.sha256(data).hexdigest()
    found = (_runtime() - before) | _defined_in(name)
    old = _BY_SHA.get(_BY_ENTRY.get(name, ""))
    if old is not None:
        found |= set(old.registered)
    rec = PluginSource(name, name, name, sha, None, tuple(sorted(found)))
    _remember(rec, index, what)
    return rec


def _remember(rec: PluginSource, index: int, what: str) -> None:
    if not rec.registered:
        raise LocalPluginError(
            f"{what}: {rec.entry} registers no plugin; decorate each class with "
            '@propensim.plugins.register("KIND", "NAME") (an installed package with entry '
            "points needs no plugins entry)",
            index,
        )
    _BY_SHA[rec.sha256] = rec
    _BY_ENTRY[rec.entry] = rec.sha256


def _first(exc: BaseException) -> str:
    lines = str(exc).strip().splitlines()
    return lines[0] if lines else ""


def load_plugins(
    entries: Sequence[Any], base: str | Path | None = None, field: str = "plugins"
) -> list[PluginSource]:
    """Import the plugin modules a spec lists; returns one record per entry.

    Parameters
    ----------
    entries : sequence of str
        File paths (ending in ``.py``; relative ones are relative to ``base``) or dotted
        module names.
    base : str or Path, optional
        Folder of the spec file (default: the working directory).
    field : str
        The spec field, for messages (``plugins[i]``).

    Raises
    ------
    LocalPluginError
        One line naming ``plugins[i]`` and the file: not a string, no such file, an import
        that failed, or a module that registers no plugin.
    """
    base = Path(base) if base is not None else Path.cwd()
    out: list[PluginSource] = []
    seen: set[str] = set()
    for i, entry in enumerate(entries):
        what = f"{field}[{i}]"
        if not isinstance(entry, str) or not entry.strip():
            raise LocalPluginError(
                f"{what}: must be a file path ending in .py or a module name, got {entry!r}", i
            )
        text = entry.strip()
        if text.endswith(".py") or "/" in text or "\\" in text:
            path = Path(text).expanduser()
            path = (path if path.is_absolute() else base / path).resolve()
            if not path.is_file():
                raise LocalPluginError(f"{what}: no such plugin file {text!r} ({path})", i)
            rec = _import_file(path, i, what)
        elif _DOTTED.fullmatch(text):
            rec = _import_module(text, i, what)
        else:
            raise LocalPluginError(
                f"{what}: {text!r} is neither a file path ending in .py nor a module name", i
            )
        if rec.entry in seen:
            raise LocalPluginError(f"{what}: {text!r} is listed twice; list each module once", i)
        seen.add(rec.entry)
        out.append(rec)
    return out


# -- workers ----------------------------------------------------------------------------------
def _config_shas(plans: Iterable) -> list[str]:
    shas: list[str] = []
    for plan in plans:
        for item in (plan.config or {}).get("plugins") or ():
            sha = item.get("sha256") if isinstance(item, Mapping) else None
            if sha and sha not in shas:
                shas.append(sha)
    return shas


def _strings(obj: Any, out: set[str]) -> set[str]:
    if isinstance(obj, str):
        out.add(obj)
    elif isinstance(obj, Mapping):
        for v in obj.values():
            _strings(v, out)
    elif isinstance(obj, list | tuple):
        for v in obj:
            _strings(v, out)
    return out


def check_session_plugins(plans: Iterable) -> list[tuple[str, str, str]]:
    """Session plugins the plans use, as ``(kind, name, "module:qualname")`` for workers.

    Raises
    ------
    LocalPluginError
        For a plugin that a worker cannot import (defined in ``__main__``, a notebook or a
        function), naming it and how to fix it.
    """
    from propensim.plugins import registry

    plans = list(plans)
    used: set[str] = set()
    for config in {id(p.config): p.config for p in plans}.values():
        _strings({k: v for k, v in config.items() if k != "plugins"}, used)
    local = {rec.module for rec in _BY_SHA.values()}
    out = []
    for kind, name, obj in registry.runtime_plugins():
        if name not in used:
            continue
        module = getattr(obj, "__module__", None) or ""
        if module in local:
            continue  # shipped by source
        qualname = getattr(obj, "__qualname__", "") or ""
        reachable = (
            module not in ("", "__main__", "__mp_main__", "builtins")
            and "<locals>" not in qualname
            and getattr(sys.modules.get(module), "__file__", None) is not None
        )
        if not reachable:
            where = "in __main__ (a script or notebook)" if "main" in module else "in a function"
            raise LocalPluginError(
                f"{kind} plugin {name!r} was registered in this session {where} and cannot "
                "reach the worker processes; put the class in a file, register it there and "
                'list the file in the spec: plugins = ["my_plugins.py"] (or run with workers=1)'
            )
        out.append((kind, name, f"{module}:{qualname}"))
    return out


def payload(plans: Sequence) -> tuple:
    """What a task must carry so that a worker can run ``plans``: ``()`` when nothing.

    ``(payload,)`` with ``payload = {"files": [(module, filename, sha256, source)],
    "modules": [name], "session": [(kind, name, target)]}``.

    Raises
    ------
    LocalPluginError
        A run needs a plugin module this process has not loaded (load the spec first), or a
        session plugin that cannot reach the workers.
    """
    files, modules = [], []
    for sha in _config_shas(plans):
        rec = _BY_SHA.get(sha)
        if rec is None:
            raise LocalPluginError(
                f"a run needs plugin module {sha[:12]}, which this process has not loaded; "
                "load the spec with load_spec first"
            )
        if rec.source is not None:
            files.append((rec.module, rec.entry, rec.sha256, rec.source))
        else:
            modules.append(rec.module)
    session = check_session_plugins(plans)
    if not (files or modules or session):
        return ()
    return ({"files": files, "modules": modules, "session": session},)


#: In a worker: module name -> sha256 of what it imported (so each is imported once).
_INSTALLED: dict[str, str] = {}
_INSTALLED_FROM: dict[str, tuple[str, tuple[tuple[str, str], ...]]] = {}


def install(data: Mapping[str, Any]) -> None:
    """In a worker: import the shipped plugin modules and register the session plugins once."""
    from propensim.plugins import registry

    for module, filename, sha, source in data.get("files", ()):
        if _INSTALLED.get(module) == sha:
            continue
        old = _INSTALLED_FROM.get(filename)
        if old is not None:  # an older version of the same file: drop its registrations
            for kind, name in old[1]:
                registry.unregister(kind, name)
            sys.modules.pop(old[0], None)
        before = _runtime()
        if module not in sys.modules:  # (the main process, when it runs a task itself)
            _exec_source(module, source, filename)
        _INSTALLED[module] = sha
        _INSTALLED_FROM[filename] = (module, tuple(sorted(_runtime() - before)))
    for module in data.get("modules", ()):
        importlib.import_module(module)
    for kind, name, target in data.get("session", ()):
        if name in registry.names(kind):
            continue
        mod, _, qual = target.partition(":")
        obj: Any = importlib.import_module(mod)
        for part in qual.split("."):
            obj = getattr(obj, part)
        if name not in registry.names(kind):  # importing may have registered it
            registry.register(kind, name)(obj)


def manifest_entries(plans: Iterable) -> list[dict[str, Any]]:
    """The plugin modules the plans use, for the manifest: entry, sha256, what they register."""
    out = []
    for sha in _config_shas(plans):
        rec = _BY_SHA.get(sha)
        if rec is not None:
            out.append(
                {
                    "entry": rec.entry,
                    "module": rec.label,
                    "sha256": rec.sha256,
                    "registers": [f"{k}:{n}" for k, n in rec.registered],
                }
            )
    return out
