"""Experiment spec files: read, check and expand an experiment into run plans.

A spec is a TOML file (or the same structure as a Python dict) with the sections ``experiment``
(name, seed, rounds, replicates), ``population`` (keyword arguments of
:func:`~propensim.agents.population.build_population`), ``network``, ``clearing`` and ``drift``
(plugins: a ``name`` and its parameters), ``market`` (engine options), ``collect`` (what to keep),
``design`` (a sweep over dotted field paths, see :mod:`propensim.experiments.designs`), ``arms``
(comparison arms, each overriding dotted fields) and ``compare`` (how the arms are compared).
``experiments/examples/demo.toml`` is a commented example of every section.

Everything is checked before anything runs, and every problem becomes one :class:`SpecError` whose
one-line message reads ``FILE:LINE: field.path: what is wrong; allowed: ...``. Plugin names and
parameters are checked through the plugin registry, population parameters by building a tiny
population, and every distinct run configuration (every arm at every design point) is checked,
since a design may push a parameter out of its range.

Arms and design points override dotted fields of the base configuration, arm first, then point.
An override that changes a plugin's ``name`` (``clearing.name = "call_auction"``) starts that
plugin's table afresh: only the parameters set by the same arm or point are kept, because the
parameters of one rule generally mean nothing to another. A design parameter that only some arms
have is listed in those arms' ``parameters = ["clearing.meetings"]``: it then applies to them
alone; a parameter no arm lists applies to every arm. Arms of a point and replicate still share
the seed and every parameter applied to both, so they stay paired.

File parameters of plugins (``file_parameters``, e.g. ``network.path`` of ``edge_list``) are read
relative to the spec file's folder, written out absolute, and the SHA-256 of each file's content
is kept in every run configuration that reads it (``config["inputs"]``), so run ids change when a
file does.

Seeds: run ``(point, replicate)`` gets ``SeedSequence(seed, spawn_key=(point, replicate))``,
shared by every arm of that replicate (common random numbers); random, Latin hypercube and Sobol'
designs draw from ``SeedSequence(seed, spawn_key=(DESIGN_SPAWN_KEY,))``, a stream no run uses.

Defaults are written out: :meth:`Spec.resolved` and every run's ``config`` hold every parameter
of the population and of each plugin (from their signatures), so a stored spec records each value
a run used, and a changed default changes the run ids (the store then reruns, as it should).

References
----------
Law, A. M. (2015). *Simulation Modeling and Analysis*, 5th ed., McGraw-Hill, chapter 11
(variance reduction: common random numbers for comparing alternatives).

NumPy documentation, "Parallel random number generation" (``SeedSequence`` spawn keys).
"""

from __future__ import annotations

import copy
import functools
import hashlib
import inspect
import json
import re
import tomllib
import warnings
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import BaseModel, ValidationError

from propensim.experiments import designs
from propensim.experiments._schema import (
    PLUGIN_KINDS,
    DriftModel,
    EventsModel,
    MarketModel,
    PluginModel,
    PopulationModel,
    ShopModel,
    SpecModel,
    _data_path,
    _pydantic_problem,
)
from propensim.experiments._toml_lines import BARE_KEY as _BARE_KEY
from propensim.experiments._toml_lines import _Locator, _parse_key
from propensim.experiments.plan import RunPlan, canonical_json

__all__ = ["CompareOptions", "Spec", "SpecError", "format_path", "load_spec", "parse_override"]

#: Sections of a run configuration that arms and design points may override.
CONFIG_SECTIONS = ("population", "network", "clearing", "drift", "market", "events", "shop")
#: Sections only a run mode other than rounds uses (``market.mode``), left out when absent.
MODE_SECTIONS = {"events": "events", "shop": "shop"}
#: Spawn key (below the root seed) of the random stream of sampled designs.
DESIGN_SPAWN_KEY = 0xDE5167


# ---------------------------------------------------------------------------------------------
# The error
# ---------------------------------------------------------------------------------------------
class SpecError(ValueError):
    """A problem in an experiment spec, reported on one line.

    The message reads ``FILE:LINE: field.path: what is wrong; allowed: ...``; ``FILE`` and ``LINE``
    are left out when the spec did not come from a file or the problem has no line.

    Attributes
    ----------
    problem : str
        What is wrong (one line).
    path : str or None
        The field path, e.g. ``population.n_buyers`` or ``arms[1].name``.
    file : str or None
        The spec file.
    line : int or None
        Line in the file (1-based).
    """

    def __init__(
        self,
        problem: str,
        *,
        path: str | None = None,
        file: str | None = None,
        line: int | None = None,
    ) -> None:
        self.problem = _one_line(problem)
        self.path = path
        self.file = file
        self.line = line
        where = ""
        if file is not None:
            where = f"{file}:{line}: " if line is not None else f"{file}: "
        super().__init__(f"{where}{path + ': ' if path else ''}{self.problem}")


def _one_line(text: Any) -> str:
    return " ".join(str(text).split())


class _Problem(Exception):
    """Internal: a problem at a field path (a tuple), located and formatted later."""

    def __init__(self, path: tuple, problem: str) -> None:
        super().__init__(problem)
        self.path = tuple(path)
        self.problem = problem


def format_path(path: Iterable) -> str:
    """Display a field path tuple the way a TOML file spells it.

    ``("design", "parameters", "population.sigma")`` -> ``design.parameters."population.sigma"``;
    list indices as ``[i]``.
    """
    out = ""
    for p in path:
        if isinstance(p, int):
            out += f"[{p}]"
        else:
            p = str(p)
            out += ("." if out else "") + (p if _BARE_KEY.fullmatch(p) else json.dumps(p))
    return out


# ---------------------------------------------------------------------------------------------
# Plain data helpers
# ---------------------------------------------------------------------------------------------
def _plain(obj: Any) -> Any:
    """Deep copy into plain TOML-able data (numpy scalars -> Python, tuples -> lists)."""
    if isinstance(obj, Mapping):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _plain(obj.tolist())
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, Path):
        return str(obj)
    return obj


def _representable(v: Any) -> bool:
    """Whether a default value can be written to TOML (None and objects cannot)."""
    if isinstance(v, bool | int | float | str):
        return True
    if isinstance(v, list | tuple):
        return all(_representable(x) for x in v)
    if isinstance(v, Mapping):
        return all(isinstance(k, str) and _representable(x) for k, x in v.items())
    return False


def _split(dotted: str) -> tuple:
    return tuple(dotted.split("."))


def _set_in(doc: dict, path: tuple, value: Any, what: str) -> None:
    """Set ``path`` in a nested dict/list document, creating tables on the way."""
    cur: Any = doc
    for k, elem in enumerate(path[:-1]):
        if isinstance(cur, list):
            if not elem.isdigit() or int(elem) >= len(cur):
                raise _Problem(path, f"{what}: {format_path(path[: k + 1])} is not in the list")
            cur = cur[int(elem)]
            continue
        nxt = cur.get(elem)
        if nxt is None:
            nxt = cur[elem] = {}
        if not isinstance(nxt, dict | list):
            raise _Problem(path, f"{what}: {format_path(path[: k + 1])} is not a table")
        cur = nxt
    last = path[-1]
    if isinstance(cur, list):
        if not last.isdigit() or int(last) >= len(cur):
            raise _Problem(path, f"{what}: {format_path(path)} is not in the list")
        cur[int(last)] = copy.deepcopy(value)
    else:
        cur[last] = copy.deepcopy(value)


def _apply_sets(doc: dict, sets: Mapping[tuple, Any], what: str) -> None:
    """Apply dotted overrides; a changed plugin ``name`` restarts that plugin's table."""
    for section in PLUGIN_KINDS:
        new = sets.get((section, "name"), None)
        old = doc.get(section)
        if new is not None and (not isinstance(old, dict) or old.get("name") != new):
            doc[section] = {}
    for path, value in sets.items():
        if len(path) == 1:
            whole = {"name": value} if isinstance(value, str) and path[0] in PLUGIN_KINDS else value
            doc[path[0]] = copy.deepcopy(whole)
        else:
            _set_in(doc, path, value, what)


# ---------------------------------------------------------------------------------------------
# Overrides (the CLI's --set)
# ---------------------------------------------------------------------------------------------
def parse_override(item: str) -> tuple[tuple, Any]:
    """Parse ``"dotted.path=value"``: the value as a TOML value, else as a plain string.

    Examples
    --------
    >>> parse_override("population.sigma=4.0")
    (('population', 'sigma'), 4.0)
    >>> parse_override('clearing.name=call_auction')
    (('clearing', 'name'), 'call_auction')
    """
    if "=" not in item:
        raise SpecError(f"--set {item!r}: expected path=value, e.g. population.sigma=4.0")
    left, _, right = item.partition("=")
    try:
        path = _parse_key(left.strip())
    except (ValueError, IndexError, tomllib.TOMLDecodeError):
        raise SpecError(f"--set {item!r}: {left.strip()!r} is not a dotted field path") from None
    try:
        value = tomllib.loads("v = " + right.strip())["v"]
    except tomllib.TOMLDecodeError:
        value = right.strip()
    return path, value


# ---------------------------------------------------------------------------------------------
# Defaults and checks of one run configuration
# ---------------------------------------------------------------------------------------------
@functools.cache
def _population_defaults() -> dict[str, Any]:
    from propensim.agents.population import build_population

    sig = inspect.signature(build_population)
    return {
        name: _plain(p.default)
        for name, p in sig.parameters.items()
        if name not in ("n_buyers", "n_sellers", "rng")
        and p.default is not inspect.Parameter.empty
        and _representable(p.default)
    }


def _fill_plugin(kind: str, table: Mapping[str, Any], skip: Iterable[str] = ()) -> dict[str, Any]:
    """``name`` first, then every parameter in signature order: given, else its default."""
    params = _parameters(kind, table["name"])
    out: dict[str, Any] = {"name": table["name"]}
    for key, default in params.items():
        if key in table:
            out[key] = table[key]
        elif key not in skip and _representable(default):
            out[key] = _plain(default)
    return out


def _parameters(kind: str, name: str) -> dict[str, Any]:
    """The keyword parameters of a plugin with their defaults (cached per plugin class)."""
    from propensim.plugins import registry

    return _signature_defaults(registry.get_plugin(kind, name))


@functools.cache
def _signature_defaults(obj: Any) -> dict[str, Any]:
    sig = inspect.signature(obj)
    return {
        p.name: (None if p.default is inspect.Parameter.empty else p.default)
        for p in sig.parameters.values()
        if p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD)
    }


@functools.cache
def _combine_options() -> dict[str, Any]:
    from propensim.plugins.drift import combine

    sig = inspect.signature(combine)
    return {
        name: p.default
        for name, p in sig.parameters.items()
        if p.kind is inspect.Parameter.KEYWORD_ONLY
    }


def _param_in_message(message: str, names: Iterable[str]) -> str | None:
    """The parameter named earliest in an error message, if any."""
    best, best_pos = None, len(message) + 1
    for name in names:
        m = re.search(rf"(?<![A-Za-z0-9_]){re.escape(name)}(?![A-Za-z0-9_])", message)
        if m and m.start() < best_pos:
            best, best_pos = name, m.start()
    return best


def _check_model(model: type[BaseModel], section: str, data: Any) -> dict[str, Any]:
    try:
        return model.model_validate(data).model_dump(exclude_none=True)
    except ValidationError as exc:
        err = exc.errors()[0]
        path = _data_path(err["loc"], data)
        raise _Problem((section, *path), _pydantic_problem(err, (section, *path))) from None


def _check_plugin(kind: str, section: tuple, table: Mapping[str, Any]) -> None:
    """Build the plugin through the registry (runs its ``check()``); map failures to fields."""
    from propensim.plugins import registry

    name = table["name"]
    try:
        registry.get_plugin(kind, name)
    except registry.UnknownPluginError as exc:
        raise _Problem((*section, "name"), str(exc)) from None
    params = {k: v for k, v in table.items() if k != "name"}
    try:
        registry.make_plugin(kind, name, **params)
    except registry.UnknownPluginError as exc:
        m = re.search(r"unknown parameter '([^']+)'", str(exc))
        raise _Problem((*section, m.group(1)) if m else section, str(exc)) from None
    except (ValueError, TypeError) as exc:
        names = [*params, *_parameters(kind, name)]
        param = _param_in_message(str(exc), names)
        raise _Problem((*section, param) if param else section, str(exc)) from None


def _check_population(pop: dict[str, Any]) -> None:
    """Build a tiny copy of the population with the same parameters; map errors to fields."""
    from propensim.agents.population import build_population
    from propensim.plugins import registry

    try:
        registry.get_plugin("curves", pop["curve"])
    except registry.UnknownPluginError as exc:
        raise _Problem(("population", "curve"), str(exc)) from None
    tiny = dict(pop)
    per_trader = any(isinstance(v, Mapping) and "values" in v for v in pop.values())
    if not per_trader and not pop.get("curve_params"):
        tiny["n_buyers"] = min(pop["n_buyers"], 2)
        tiny["n_sellers"] = min(pop["n_sellers"], 2)
    try:
        population = build_population(**tiny, rng=0)
        population.curves()
    except (ValueError, TypeError, OverflowError) as exc:
        params = list(pop.get("curve_params") or ())
        # "unknown parameter 'k' for the normal curve family" names a curve_params key, though
        # the word "curve" would match the field curve first
        field = "curve_params" if any(repr(k) in str(exc) for k in params) else None
        field = field or _param_in_message(str(exc), list(pop))
        if field is None and _param_in_message(str(exc), params):
            field = "curve_params"
        if field is None:  # a derived number (a curve's mu) is named: the input behind it
            field = next((k for k, v in pop.items() if not _all_finite(v)), None)
        raise _Problem(("population", field) if field else ("population",), str(exc)) from None


def _all_finite(value: Any) -> bool:
    """No NaN or infinity in a number, or in the numbers of a list or table."""
    if isinstance(value, float):
        return bool(np.isfinite(value))
    if isinstance(value, Mapping):
        return all(_all_finite(v) for v in value.values())
    if isinstance(value, list | tuple):
        return all(_all_finite(v) for v in value)
    return True


def _check_drift(drift: dict[str, Any]) -> None:
    from propensim.plugins import registry

    if "rules" not in drift:
        _check_plugin("drift", ("drift",), drift)
        return
    rules = []
    for i, rule in enumerate(drift["rules"]):
        _check_plugin("drift", ("drift", "rules", i), rule)
        rules.append(
            registry.make_plugin(
                "drift", rule["name"], **{k: v for k, v in rule.items() if k != "name"}
            )
        )
    options = {k: v for k, v in drift.items() if k != "rules"}
    allowed = _combine_options()
    extra = [k for k in options if k not in allowed]
    if extra:
        raise _Problem(
            ("drift", extra[0]),
            f"unknown option {extra[0]!r} of a sum of drift rules; allowed: rules, "
            + ", ".join(allowed),
        )
    from propensim.plugins.drift import combine

    try:
        rule = combine(rules, **options)
        check = getattr(rule, "check", None)
        if callable(check):
            check()
    except (ValueError, TypeError) as exc:
        opt = _param_in_message(str(exc), list(options) + list(allowed))
        raise _Problem(("drift", opt) if opt else ("drift",), str(exc)) from None


def _fill_drift(drift: dict[str, Any]) -> dict[str, Any]:
    if "rules" not in drift:
        return _fill_plugin("drift", drift)
    options = _combine_options()
    # inside a sum the integrator options belong to the sum, so rules do not repeat them
    out: dict[str, Any] = {
        "rules": [_fill_plugin("drift", r, skip=options) for r in drift["rules"]]
    }
    for key, default in options.items():
        if key in drift:
            out[key] = drift[key]
        elif _representable(default):
            out[key] = _plain(default)
    return out


# ---------------------------------------------------------------------------------------------
# The spec
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class CompareOptions:
    """How arms are compared: ``baseline`` arm, ``metrics``, CI ``confidence``, ``bootstrap``."""

    baseline: str
    metrics: list[str]
    confidence: float
    bootstrap: int


class Spec:
    """A checked experiment: the file's sections, fully defaulted, and its run plans.

    Build one with :func:`load_spec`. Attributes mirror the file: ``name``, ``description``,
    ``seed``, ``rounds``, ``replicates`` (from ``[experiment]``), and the sections
    ``population``, ``network``, ``clearing``, ``drift``, ``market``, ``collect``, ``design``
    (dicts), ``arms`` (list of dicts), ``compare`` (:class:`CompareOptions`, or None with fewer
    than two arms). Also ``points`` (the design points), ``source`` (the file, or None).
    """

    def __init__(
        self, resolved: dict[str, Any], points: list[dict[str, Any]], configs, source
    ) -> None:
        self._resolved = resolved
        self.points = points
        self._configs = configs  # {(point, arm index): config}
        self.source: Path | None = source
        exp = resolved["experiment"]
        self.experiment = exp
        self.name: str = exp["name"]
        self.description: str = exp["description"]
        self.seed: int = exp["seed"]
        self.rounds: int = exp["rounds"] if "rounds" in exp else _timed_rounds(configs)
        self.replicates: int = exp["replicates"]
        for section in ("population", "network", "clearing", "drift", "market", "collect"):
            setattr(self, section, resolved[section])
        self.design: dict[str, Any] = resolved["design"]
        self.arms: list[dict[str, Any]] = resolved.get("arms", [])
        comp = resolved.get("compare")
        self.compare: CompareOptions | None = CompareOptions(**comp) if comp else None

    def __repr__(self) -> str:
        return (
            f"Spec(name={self.name!r}, points={len(self.points)}, "
            f"replicates={self.replicates}, arms={self.arm_names}, runs={self.n_runs})"
        )

    @property
    def arm_names(self) -> list[str]:
        """Names of the comparison arms, in file order (empty without arms)."""
        return [a["name"] for a in self.arms]

    @property
    def metrics(self) -> list[str]:
        """Metrics every run measures (``collect.metrics``)."""
        return list(self.collect["metrics"])

    @property
    def n_runs(self) -> int:
        """Number of runs: design points x replicates x arms (at least one arm)."""
        return len(self.points) * self.replicates * max(1, len(self.arms))

    def runs(self) -> list[RunPlan]:
        """Every run, ordered by design point, then replicate, then arm.

        Arms of one ``(point, replicate)`` share ``seed_key = (point, replicate)``: they see the
        same population, network and random streams (common random numbers). The ``config`` of
        runs at the same point and arm is one dict shared between replicates: treat it as
        read-only.
        """
        collect = {k: self.collect[k] for k in ("rounds", "traders_every", "ledger")}
        if self.collect.get("totals"):  # only when kept: run ids of other specs stay as they were
            collect["totals"] = True
        if self.collect.get("meetings"):
            collect["meetings"] = True
        arms = self.arm_names or [""]
        plans = []
        for p, params in enumerate(self.points):
            for r in range(self.replicates):
                for a, arm in enumerate(arms):
                    plans.append(
                        RunPlan(
                            index=len(plans),
                            arm=arm,
                            point=p,
                            replicate=r,
                            params=dict(params),
                            config=self._configs[(p, a)],
                            rounds=self.rounds,
                            seed_entropy=self.seed,
                            seed_key=(p, r),
                            collect=dict(collect),
                        )
                    )
        return plans

    def config(self, point: int = 0, arm: str | None = None) -> dict[str, Any]:
        """The resolved market configuration at a design point for an arm (a deep copy)."""
        names = self.arm_names or [""]
        a = names.index(arm if arm is not None else names[0])
        return copy.deepcopy(self._configs[(point, a)])

    def resolved(self) -> dict[str, Any]:
        """The spec as plain data, every default filled in (writable with ``tomli_w``)."""
        return copy.deepcopy(self._resolved)

    #: The plugin modules the spec's ``plugins`` loaded (local_plugins.PluginSource each).
    plugin_sources: tuple = ()

    def fingerprint(self) -> str:
        """SHA-256 of the canonical JSON of :meth:`resolved`: changes when any setting does.

        Plugin modules count by file name and content (SHA-256), not by where they are.
        """
        doc = self._resolved
        if self.plugin_sources:
            doc = {**doc, "plugins": [rec.config_entry() for rec in self.plugin_sources]}
        return hashlib.sha256(canonical_json(doc).encode()).hexdigest()

    def to_toml(self) -> str:
        """The resolved spec as TOML text (loads back to the same fingerprint)."""
        import tomli_w

        head = "# propensim experiment spec, resolved: every default written out\n"
        return head + tomli_w.dumps(self._resolved)


class _Builder:
    """Checks a raw spec document and expands it (one per load_spec call)."""

    def __init__(self, raw: dict, file: str | None, locator: _Locator | None, overridden) -> None:
        self.raw = raw
        self.file = file
        self.locator = locator
        self.overridden: dict[tuple, str] = overridden  # path -> the --set text

    # -- errors --------------------------------------------------------------------------------
    def error(self, path: tuple, problem: str, source: tuple | None = None, note: str = ""):
        """A SpecError at ``path``; its line is that of ``source`` (default: ``path``)."""
        where = tuple(source if source is not None else path)
        line = None
        for opath, text in self.overridden.items():
            if where and (where[: len(opath)] == opath or opath[: len(where)] == where):
                note = f"{note}; " if note else ""
                note += f"from --set {text}"
                break
        else:
            if self.locator is not None:
                line = self.locator.find(where)
        suffix = f" ({note})" if note else ""
        return SpecError(problem + suffix, path=format_path(path), file=self.file, line=line)

    # -- the whole spec ------------------------------------------------------------------------
    def build(self) -> Spec:
        raw = self.raw
        plugin_sources = self._plugins(raw)  # first: they register names the rest may use
        try:
            model = SpecModel.model_validate(raw)
        except ValidationError as exc:
            errors = exc.errors()
            err = errors[0]
            path = _data_path(err["loc"], raw)
            more = len(errors) - 1
            note = f"and {more} more problem{'s' if more > 1 else ''}" if more else ""
            raise self.error(path, _pydantic_problem(err, path), note=note) from None
        m = model.model_dump(exclude_none=True)
        exp = m["experiment"]
        self._check_mode(m)
        collect = self._collect(m)
        market = self._market(m, collect)
        arms = m["arms"]
        compare = self._compare(m, arms, collect)
        design = self._design(m)
        self.design_kind = design["kind"]
        n_arms = max(1, len(arms))
        n_pts = self._count_points(design)
        n_runs = n_pts * exp["replicates"] * n_arms
        if n_runs > design["max_runs"]:
            raise self.error(
                ("design", "max_runs"),
                f"design too large: {n_pts} points x {exp['replicates']} replicates x {n_arms} "
                f"arms = {n_runs} runs > max_runs = {design['max_runs']}; "
                "allowed: shrink the design or raise design.max_runs",
            )
        points = self._points(design, exp["seed"])
        base = {
            "population": m["population"],
            "network": m.get("network", {"name": "complete"}),
            "clearing": m.get("clearing", {"name": "propensity"}),
            "drift": m.get("drift", {"name": "none"}),
            "market": market,
            **{k: m[k] for k in MODE_SECTIONS if k in m},
        }
        self._check_set_paths(arms, design, points)
        scoped = self._scoped_parameters(arms, design, points)
        self._cache: dict[str, Any] = {}
        self._hashes: dict[str, str] = {}  # input file (absolute) -> sha256 of its content
        resolved_base = self._resolve_config(base, None, None, {})
        top = self._interventions(m.get("interventions") or [], ("interventions",), exp)
        per_arm = [
            self._interventions(arm.get("interventions") or [], ("arms", a, "interventions"), exp)
            for a, arm in enumerate(arms)
        ]
        configs = {}
        checked_markets: set[str] = set()
        for p, point in enumerate(points):
            for a in range(n_arms):
                arm = arms[a] if arms else None
                # a design parameter some arms list in their `parameters` applies to those only
                own = {k: v for k, v in point.items() if a in scoped.get(k, (a,))}
                cfg = self._resolve_config(base, arm, a if arms else None, own, p)
                # sections are shared between configs (cached): build new dicts on top
                cfg["market"] = {**cfg["market"], "traders_every": collect["traders_every"]}
                cfg["metrics"] = list(collect["metrics"])
                if inputs := self._inputs(cfg):  # file contents enter the run ids
                    cfg["inputs"] = inputs
                if plugin_sources:  # their source hashes enter every run id
                    cfg["plugins"] = [rec.config_entry() for rec in plugin_sources]
                items = [*top, *(per_arm[a] if arms else [])]
                if items:
                    cfg["interventions"] = items
                    self._check_interventions_on(cfg, exp["seed"], arm, checked_markets)
                configs[(p, a)] = cfg
        resolved = {
            "experiment": {
                "name": exp["name"],
                "description": exp.get("description", ""),
                "seed": exp["seed"],
                **({} if getattr(self, "_timed", None) else {"rounds": exp["rounds"]}),
                "replicates": exp["replicates"],
            },
            **{k: resolved_base[k] for k in CONFIG_SECTIONS if k in resolved_base},
            "collect": collect,
            "design": design,
        }
        if top:
            resolved["interventions"] = top
        if arms:
            resolved["arms"] = [
                {"name": a["name"], "description": a.get("description", ""), "set": a["set"]}
                | ({"interventions": per_arm[i]} if per_arm[i] else {})
                | ({"parameters": a["parameters"]} if a.get("parameters") else {})
                for i, a in enumerate(arms)
            ]
        if compare is not None:
            resolved["compare"] = compare
        if plugin_sources:
            resolved = {"plugins": [rec.entry for rec in plugin_sources], **resolved}
        spec = Spec(_plain(resolved), points, configs, None)
        spec.plugin_sources = tuple(plugin_sources)
        return spec

    def _plugins(self, raw: dict) -> list:
        """Import the modules in ``plugins`` (paths relative to the spec file)."""
        entries = raw.get("plugins")
        if entries is None:
            return []
        if not isinstance(entries, list):
            raise self.error(
                ("plugins",),
                "must be a list of files (ending in .py) or module names, e.g. plugins = "
                '["my_rules.py"]',
            )
        from propensim.experiments.local_plugins import LocalPluginError, load_plugins

        try:
            return load_plugins(entries, Path(self.file).parent if self.file else None)
        except LocalPluginError as exc:
            problem = str(exc).split(": ", 1)[-1]
            raise self.error(("plugins", exc.index), problem) from None

    # -- sections ------------------------------------------------------------------------------
    def _collect(self, m: dict) -> dict[str, Any]:
        from propensim.markets.engine import DEFAULT_METRICS
        from propensim.plugins import registry

        c = m["collect"]
        metrics = list(c.get("metrics", DEFAULT_METRICS))
        shop = m["market"]["mode"] == "shop"  # a shop reports its own figures (supply_chain.py)
        if shop:
            from propensim.markets.supply_chain import SHOP_METRICS

            metrics = list(c.get("metrics", SHOP_METRICS))
        # Per-trader totals (who gains, who loses) by default when the spec has interventions.
        any_interventions = bool(m.get("interventions")) or any(
            a.get("interventions") for a in m["arms"]
        )
        for i, name in enumerate(metrics):
            if name in metrics[:i]:
                raise self.error(
                    ("collect", "metrics", i), f"{name!r} is listed twice; each metric once"
                )
            if shop:
                if name not in SHOP_METRICS:
                    raise self.error(
                        ("collect", "metrics", i),
                        f"{name!r} is not a shop figure; allowed: {', '.join(SHOP_METRICS)}",
                    )
                continue
            try:
                cls = registry.get_plugin("metrics", name)
            except registry.UnknownPluginError as exc:
                raise self.error(("collect", "metrics", i), str(exc)) from None
            if m["market"]["mode"] == "events":
                from propensim.markets.events import metric_refusal

                refusal = metric_refusal(name, cls)
                if refusal:
                    raise self.error(("collect", "metrics", i), refusal)
        return {
            "rounds": c["rounds"],
            "traders_every": c["traders_every"],
            "ledger": c["ledger"],
            "metrics": metrics,
            "totals": any_interventions if c.get("totals") is None else c["totals"],
            "meetings": c["meetings"],
        }

    def _market(self, m: dict, collect: dict) -> dict[str, Any]:
        mk = m["market"]
        keep = mk.get("keep_ledger")
        if keep is False and collect["ledger"]:
            raise self.error(
                ("market", "keep_ledger"),
                "is false but collect.ledger = true asks for the ledger; allowed: true, "
                "or leave it out (it follows collect.ledger)",
            )
        return {
            "replenish": mk["replenish"],
            "keep_ledger": collect["ledger"] if keep is None else keep,
            **({"mode": mk["mode"]} if mk["mode"] != "rounds" else {}),
        }

    def _check_mode(self, m: dict) -> None:
        """``market.mode`` and its section agree; fill ``experiment.rounds`` for timed modes.

        A timed run (events, shop) lasts its horizon; its ``rounds`` are the windows (weeks) of
        the longest configuration, and each run stops at its own horizon.
        """
        exp, mode = m["experiment"], m["market"]["mode"]
        for section in MODE_SECTIONS:
            if section in m and section != mode:
                raise self.error(
                    (section,), f"is only used with market.mode = {section!r} (mode is {mode!r})"
                )
        if mode == "rounds":
            if "rounds" not in exp:
                raise self.error(("experiment", "rounds"), "is required (a whole number >= 1)")
            return
        if "rounds" in exp:
            raise self.error(
                ("experiment", "rounds"),
                f"is not used with market.mode = {mode!r} (a run lasts "
                f"{'events.horizon' if mode == 'events' else 'shop.days'}); leave it out",
            )
        if mode not in m:
            raise self.error((mode,), f"section [{mode}] is required with market.mode = {mode!r}")
        if mode == "shop" and (
            m.get("interventions") or any(a.get("interventions") for a in m["arms"])
        ):
            raise self.error(("interventions",), "are not available with market.mode = 'shop'")
        # Not written out: runs take their length from _timed_rounds. Interventions act at the
        # start of a window, so their start and until count windows of the base configuration.
        exp["rounds"] = _timed_rounds({0: {mode: {"window": m[mode].get("horizon"), **m[mode]}}})
        self._timed = mode

    def _compare(self, m: dict, arms: list, collect: dict) -> dict[str, Any] | None:
        names = [a["name"] for a in arms]
        for i, name in enumerate(names):
            if name in names[:i]:
                raise self.error(
                    ("arms", i, "name"), f"duplicate arm name {name!r}; arm names must be unique"
                )
        c = m.get("compare")
        if c is None and len(arms) < 2:
            return None
        if len(arms) < 2:
            raise self.error(
                ("compare",),
                f"needs at least 2 [[arms]] to compare, found {len(arms)}; add arms or remove "
                "[compare]",
            )
        c = c or {}
        baseline = c.get("baseline", names[0])
        if baseline not in names:
            raise self.error(
                ("compare", "baseline"),
                f"{baseline!r} is not an arm; allowed: {', '.join(names)}",
            )
        metrics = list(c.get("metrics", collect["metrics"]))
        for i, name in enumerate(metrics):
            if name not in collect["metrics"]:
                raise self.error(
                    ("compare", "metrics", i),
                    f"{name!r} is not collected; allowed: {', '.join(collect['metrics'])} "
                    "(collect.metrics)",
                )
        return {
            "baseline": baseline,
            "metrics": metrics,
            "confidence": c.get("confidence", 0.95),
            "bootstrap": c.get("bootstrap", 2000),
        }

    def _design(self, m: dict) -> dict[str, Any]:
        d = m["design"]
        kind, params = d["kind"], d["parameters"]
        out: dict[str, Any] = {"kind": kind, "max_runs": d["max_runs"]}
        if kind in designs.SAMPLED_KINDS:
            if "samples" not in d:
                raise self.error(
                    ("design", "samples"), f"is required for kind = {kind!r} (a whole number >= 1)"
                )
            out["samples"] = d["samples"]
        elif "samples" in d:
            raise self.error(
                ("design", "samples"),
                f"is not used by kind = {kind!r}; allowed with kind = random, lhs or sobol",
            )
        if kind == "points":
            if params:
                raise self.error(
                    ("design", "parameters"),
                    "is not used by kind = 'points'; give the values in design.points",
                )
            if "points" not in d:
                raise self.error(
                    ("design", "points"), "is required for kind = 'points' (a list of tables)"
                )
            if not d["points"]:
                raise self.error(("design", "points"), "is empty; allowed: at least one point")
            out["points"] = d["points"]
            return out
        if "points" in d:
            raise self.error(("design", "points"), f"is only used by kind = 'points', not {kind!r}")
        checked = {}
        for name, spec in params.items():
            try:
                if kind == "grid":
                    checked[name] = designs.check_levels(name, spec)
                else:
                    checked[name] = designs.check_range(name, spec)
            except designs.DesignError as exc:
                src = ("design", "parameters", name) + ((exc.key,) if exc.key else ())
                raise self.error(("design", "parameters", name), str(exc), source=src) from None
        out["parameters"] = checked
        return out

    def _count_points(self, design: dict) -> int:
        if design["kind"] == "points":
            return len(design["points"])
        return designs.n_points(design["kind"], design["parameters"], samples=design.get("samples"))

    def _points(self, design: dict, seed: int) -> list[dict[str, Any]]:
        kind = design["kind"]
        params = design["points"] if kind == "points" else design["parameters"]
        ss = np.random.SeedSequence(seed, spawn_key=(DESIGN_SPAWN_KEY,))
        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                points = designs.design_points(kind, params, samples=design.get("samples"), seed=ss)
        except designs.DesignError as exc:  # pragma: no cover - checked above already
            raise self.error(("design",), str(exc)) from None
        for w in caught:
            where = f"{self.file}: " if self.file else ""
            warnings.warn(f"{where}{w.message}", w.category, stacklevel=4)
        return _plain(points)

    def _check_set_paths(self, arms: list, design: dict, points: list) -> None:
        allowed = ", ".join(CONFIG_SECTIONS)

        def check(key: str, where: tuple, value: Any) -> None:
            parts = _split(key)
            whole = len(parts) == 1 and (
                isinstance(value, Mapping) or (isinstance(value, str) and key in PLUGIN_KINDS)
            )
            if parts[0] not in CONFIG_SECTIONS or (len(parts) < 2 and not whole) or "" in parts:
                raise self.error(
                    where,
                    f"{key!r} is not a field path of the run configuration; allowed: a dotted "
                    f"path under {allowed} (e.g. 'population.sigma')",
                )

        for i, arm in enumerate(arms):
            for key, value in arm["set"].items():
                check(key, ("arms", i, "set", key), value)
        for i, point in enumerate(points):
            for key, value in point.items():
                src = ("design", "points", i, key) if design["kind"] == "points" else None
                check(key, src or ("design", "parameters", key), value)

    def _scoped_parameters(self, arms: list, design: dict, points: list) -> dict[str, set]:
        """Design parameter -> the arms (indices) it applies to, for those some arm lists.

        An arm's ``parameters`` lists design parameters that apply to it and not to the arms
        that do not list them (``clearing.meetings`` in a propensity arm, not in a call-auction
        arm). A parameter no arm lists applies to every arm.
        """
        names = list(dict.fromkeys(k for point in points for k in point))
        scoped: dict[str, set] = {}
        for a, arm in enumerate(arms):
            for j, key in enumerate(arm.get("parameters") or []):
                if key not in names:
                    allowed = ", ".join(names) if names else "none (the design has no parameters)"
                    raise self.error(
                        ("arms", a, "parameters", j),
                        f"{key!r} is not a design parameter; allowed: {allowed}",
                    )
                scoped.setdefault(key, set()).add(a)
        return scoped

    def _interventions(self, items: list, where: tuple, exp: dict) -> list[dict[str, Any]]:
        """Check each intervention table (plugin, parameters, rounds); fill its defaults."""
        out = []
        rounds = int(exp["rounds"])
        for i, table in enumerate(items):
            path = (*where, i)
            try:
                _check_plugin("interventions", path, table)
            except _Problem as prob:
                raise self.error(prob.path, prob.problem) from None
            filled = _fill_plugin("interventions", table)
            start, until = filled.get("start", 0), filled.get("until")
            if isinstance(start, int) and start >= rounds:
                raise self.error(
                    (*path, "start"),
                    f"is round {start} but the run has rounds 0..{rounds - 1} "
                    "(experiment.rounds); allowed: 0.." + str(rounds - 1),
                )
            if isinstance(until, int) and until > rounds:
                raise self.error(
                    (*path, "until"),
                    f"is round {until} but the run ends after round {rounds - 1} "
                    f"(experiment.rounds = {rounds}); allowed: up to {rounds}, or leave it out",
                )
            out.append(filled)
        return out

    def _check_interventions_on(self, cfg: dict, seed: int, arm, seen: set) -> None:
        """Check the interventions against a market built from ``cfg`` (ids, attributes, k).

        One market per distinct configuration, built with the first replicate's seed (sizes,
        roles and network attributes do not depend on the seed).
        """
        import warnings as _warnings

        from propensim.markets.build import build_market

        key = canonical_json({k: cfg[k] for k in ("population", "network", "clearing")})
        key += canonical_json(cfg["interventions"])
        if key in seen:
            return
        seen.add(key)
        try:
            with _warnings.catch_warnings():
                _warnings.simplefilter("ignore")
                build_market({**cfg, "metrics": []}, seed, mesa=False)
        except ValueError as exc:
            text = str(exc)
            m = re.match(r"interventions\[(\d+)\] \(([^)]*)\): (.*)", text)
            if not m:
                raise
            i = int(m.group(1))
            n_top = len(self.raw.get("interventions") or [])
            if arm is not None and i >= n_top:
                a = [x["name"] for x in self.raw.get("arms", [])].index(arm["name"])
                path: tuple = ("arms", a, "interventions", i - n_top)
            else:
                path = ("interventions", i)
            names = _parameters("interventions", m.group(2)) if m.group(2) else {}
            param = _param_in_message(m.group(3), names)
            raise self.error((*path, param) if param else path, m.group(3)) from None

    # -- one run configuration -------------------------------------------------------------------
    def _resolve_config(
        self, base: dict, arm: dict | None, a: int | None, point: dict, p: int | None = None
    ) -> dict[str, Any]:
        """Apply the arm's then the point's overrides, check every section, fill defaults."""
        # copy only the sections an override writes into; the others stay shared with base
        touched = {k.split(".")[0] for k in (*(arm["set"] if arm else ()), *point)}
        cfg = {k: copy.deepcopy(v) if k in touched else v for k, v in base.items()}
        arm_sets = {_split(k): v for k, v in (arm["set"] if arm else {}).items()}
        point_sets = {_split(k): v for k, v in point.items()}

        def fail(prob: _Problem) -> SpecError:
            """Locate a problem at the override that caused it (the point wins: applied last)."""
            arm_note = f"arm {arm['name']!r}" if arm is not None else ""
            for key, value in point_sets.items():
                n = min(len(key), len(prob.path))
                if key[:n] == prob.path[:n]:
                    dotted = ".".join(key)
                    if self.design_kind == "points":
                        src = ("design", "points", p, dotted)
                    else:
                        src = ("design", "parameters", dotted)
                    note = f"design point {p}: {dotted} = {value!r}"
                    note += f", {arm_note}" if arm_note else ""
                    if arm is not None and "unknown parameter" in prob.problem:
                        note += (
                            f"; to sweep {dotted} only in the arms that have it, list it in "
                            f'their parameters = ["{dotted}"]'
                        )
                    return self.error(prob.path, prob.problem, source=src, note=note)
            for key in arm_sets:
                n = min(len(key), len(prob.path))
                if key[:n] == prob.path[:n]:
                    src = ("arms", a, "set", ".".join(key))
                    return self.error(
                        prob.path, prob.problem, source=src, note=f"set by {arm_note}"
                    )
            note = arm_note
            if p is not None and point:
                note = f"design point {p}" + (f", {note}" if note else "")
            return self.error(prob.path, prob.problem, note=note)

        try:
            _apply_sets(cfg, arm_sets, "arm")
            _apply_sets(cfg, point_sets, "design")
            out = {}
            for section in CONFIG_SECTIONS:
                if section in MODE_SECTIONS and cfg.get(section) is None:
                    continue
                out[section] = self._section(section, cfg.get(section))
        except _Problem as prob:
            raise fail(prob) from None
        return out

    def _section(self, section: str, data: Any) -> Any:
        """Check and fill one section (cached by content: designs repeat sections)."""
        key = section + canonical_json(data)
        hit = self._cache.get(key)
        if hit is None:
            try:
                hit = self._cache[key] = self._section_uncached(section, data)
            except _Problem as prob:
                hit = self._cache[key] = prob
        if isinstance(hit, _Problem):
            raise hit
        return hit

    def _section_uncached(self, section: str, data: Any) -> Any:
        if section == "population":
            pop = _check_model(PopulationModel, section, data)
            pop = {**pop, **{k: v for k, v in _population_defaults().items() if k not in pop}}
            order = list(PopulationModel.model_fields)
            pop = {k: pop[k] for k in order if k in pop}
            _check_population(pop)
            return pop
        if section == "market":
            mk = _check_model(MarketModel, section, data)
            return {
                "replenish": mk.get("replenish", True),
                "keep_ledger": mk.get("keep_ledger", False),
                **({"mode": mk["mode"]} if mk.get("mode", "rounds") != "rounds" else {}),
            }
        if section == "events":
            ev = _check_model(EventsModel, section, data)
            ev.setdefault("window", ev["horizon"])
            ev.setdefault("drift_every", ev["window"])
            return {k: ev[k] for k in EventsModel.model_fields}
        if section == "shop":
            shop = _check_model(ShopModel, section, data)
            shop.setdefault("initial_stock", shop["order_up_to"])
            return {k: shop[k] for k in ShopModel.model_fields}
        if section == "drift":
            drift = _check_model(DriftModel, section, data)
            _check_drift(drift)
            return _fill_drift(drift)
        table = _check_model(PluginModel, section, data)
        table = self._resolve_files(section, table)
        _check_plugin(PLUGIN_KINDS[section], (section,), table)
        return _fill_plugin(PLUGIN_KINDS[section], table)

    def _resolve_files(self, section: str, table: dict[str, Any]) -> dict[str, Any]:
        """Resolve the plugin's file parameters against the spec file's folder; hash them.

        A plugin lists the parameters that name files in ``file_parameters``. A relative path
        is read from the folder of the spec file (from the current folder for a spec given as a
        dict) and written out absolute; its content's SHA-256 is kept for the run ids.
        """
        import os

        from propensim.plugins import registry

        try:
            cls = registry.get_plugin(PLUGIN_KINDS[section], table["name"])
        except registry.UnknownPluginError:
            return table  # reported by _check_plugin
        names = [k for k in getattr(cls, "file_parameters", ()) if isinstance(table.get(k), str)]
        if not names:
            return table
        table = dict(table)
        for key in names:
            given = Path(table[key]).expanduser()
            if not str(table[key]):
                continue  # the plugin's own check names the missing path
            relative = not given.is_absolute()
            base = Path(self.file).parent if (relative and self.file) else Path()
            path = Path(os.path.abspath(base / given))
            where = " (a relative path is read from the spec file's folder)" if relative else ""
            if not path.is_file():
                raise _Problem((section, key), f"no such file {str(path)!r}{where}")
            if str(path) not in self._hashes:
                try:
                    self._hashes[str(path)] = hashlib.sha256(path.read_bytes()).hexdigest()
                except OSError as exc:
                    raise _Problem(
                        (section, key), f"cannot read {str(path)!r}: {exc.strerror or exc}"
                    ) from None
            table[key] = str(path)
        return table

    def _inputs(self, cfg: dict[str, Any]) -> dict[str, str]:
        """``{path: sha256}`` of every input file a run configuration reads."""
        out = {}
        for section in PLUGIN_KINDS:
            table = cfg.get(section)
            if isinstance(table, dict):
                for value in table.values():
                    if isinstance(value, str) and value in self._hashes:
                        out[value] = self._hashes[value]
        return out


def _timed_rounds(configs: dict) -> int:
    """Windows (events) or weeks (shop) of the longest run configuration of a timed spec.

    Every run gets this many; each stops at its own horizon (``events.horizon``, ``shop.days``).
    """
    import math

    most = 1
    for cfg in configs.values():
        if "events" in cfg:
            ev = cfg["events"]
            most = max(most, math.ceil(ev["horizon"] / ev["window"] - 1e-9))
        elif "shop" in cfg:
            shop = cfg["shop"]
            most = max(most, math.ceil(shop["days"] / shop["week"] - 1e-9))
    return most


def _parse_file(path: Path) -> tuple[dict, _Locator]:
    file = str(path)
    try:
        # utf-8-sig: a byte-order mark some editors write in front is not part of the TOML
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise SpecError("no such spec file", file=file) from None
    except UnicodeDecodeError as exc:
        raise SpecError(f"not UTF-8 text ({exc.reason} at byte {exc.start})", file=file) from None
    except OSError as exc:
        raise SpecError(f"cannot read the spec file: {exc.strerror or exc}", file=file) from None
    except ValueError as exc:  # a path the OS cannot take (a NUL character in it)
        raise SpecError(f"cannot read the spec file: {exc}", file=file) from None
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        line = int(m.group(1)) if m else None
        if m:
            msg = msg[: m.start()].rstrip() + f" (column {m.group(2)})"
        elif "end of document" in msg:
            line = text.count("\n") + (0 if text.endswith("\n") else 1)
        raise SpecError(f"invalid TOML: {msg}", file=file, line=line) from None
    return raw, _Locator(text)


def _normalise(raw: dict) -> None:
    """Shorthands: ``network = "complete"`` means ``[network] name = "complete"``."""
    for section in PLUGIN_KINDS:
        if isinstance(raw.get(section), str):
            raw[section] = {"name": raw[section]}


def load_spec(source: str | Path | Mapping[str, Any], overrides: Iterable[str] = ()) -> Spec:
    """Read and check an experiment spec.

    Parameters
    ----------
    source : str, Path or mapping
        Path of a TOML spec file, or the same structure as a dict.
    overrides : iterable of str
        ``"dotted.path=value"`` settings applied on top (the CLI's ``--set``); the value is read as
        a TOML value (``4.0``, ``true``, ``[1, 2]``, ``"text"``), else taken as a plain string.

    Returns
    -------
    Spec

    Raises
    ------
    SpecError
        One line naming the file, line and field of the first problem found.

    Examples
    --------
    >>> spec = load_spec(
    ...     {
    ...         "experiment": {"name": "tiny", "seed": 1, "rounds": 5},
    ...         "population": {"n_buyers": 4, "n_sellers": 4},
    ...     }
    ... )  # doctest: +SKIP
    >>> spec.n_runs  # doctest: +SKIP
    1
    """
    file = None
    locator = None
    if isinstance(source, Mapping):
        raw = _plain(source)
    elif isinstance(source, str | Path):
        path = Path(source)
        raw, locator = _parse_file(path)
        file = str(source)
    else:
        raise SpecError(
            f"spec source must be a file path or a mapping, got {type(source).__name__}"
        )
    _normalise(raw)
    overridden: dict[tuple, str] = {}
    allowed = list(SpecModel.model_fields)
    for item in overrides:
        path, value = parse_override(item)
        if path[0] not in allowed:
            raise SpecError(
                f"--set {item}: unknown section {path[0]!r}; allowed: {', '.join(allowed)}",
                file=file,
            )
        try:
            _apply_sets(raw, {path: _plain(value)}, f"--set {item}")
        except _Problem as prob:
            raise SpecError(prob.problem, file=file) from None
        overridden[path] = item.strip()
    builder = _Builder(raw, file, locator, overridden)
    spec = builder.build()
    spec.source = Path(source) if file is not None else None
    return spec
