"""The schema of a spec file (pydantic v2: strict types, unknown fields refused).

Private to :mod:`propensim.experiments.spec`, which turns validation errors into one-line
:class:`~propensim.experiments.spec.SpecError` messages with file lines.
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from typing import Annotated, Any, Literal, Union, get_args, get_origin

from pydantic import AfterValidator, BaseModel, ConfigDict, Field, field_validator, model_validator

#: Config sections holding a plugin, with the registry kind of each.
PLUGIN_KINDS = {"network": "networks", "clearing": "clearing", "drift": "drift"}
_NAME_PATTERN = r"^[A-Za-z0-9_-]+$"
_DISTRIBUTIONS = ("uniform", "normal", "lognormal", "linspace")
_INT64_MAX = 2**63 - 1


def _is_number(x: Any) -> bool:
    return isinstance(x, int | float) and not isinstance(x, bool)


def _check_distribution(v: Any) -> Any:
    """A distribution spec of build_population: number, [low, high], or a one-key table."""
    allowed = (
        "allowed: a number, [low, high], or a table {uniform|normal|lognormal|linspace = [a, b]} "
        "or {values = [...]}"
    )
    if _is_number(v):
        return v
    if isinstance(v, list) and len(v) == 2 and all(_is_number(x) for x in v):
        return v
    if isinstance(v, Mapping) and len(v) == 1:
        ((kind, args),) = v.items()
        if kind in _DISTRIBUTIONS:
            if isinstance(args, list) and len(args) == 2 and all(_is_number(x) for x in args):
                return v
            raise ValueError(f"{kind} needs a pair [a, b] of numbers, got {args!r}")
        if kind == "values":
            if isinstance(args, list) and all(_is_number(x) for x in args):
                return v
            raise ValueError(f"values needs a list of numbers, got {args!r}")
        raise ValueError(
            f"unknown distribution {kind!r}; allowed: {', '.join(_DISTRIBUTIONS)}, values"
        )
    raise ValueError(f"got {v!r}; {allowed}")


_Dist = Annotated[Any, AfterValidator(_check_distribution)]


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)


class ExperimentModel(_Model):
    """``[experiment]``: name, root seed, rounds per run, replicates per design point."""

    name: str = Field(pattern=_NAME_PATTERN)
    description: str = ""
    seed: int = Field(ge=0)
    rounds: int | None = Field(default=None, ge=1)  # required in round mode (checked in spec.py)
    replicates: int = Field(default=1, ge=1)


class PopulationModel(_Model):
    """``[population]``: keyword arguments of build_population (None: its default)."""

    n_buyers: int = Field(ge=0)
    n_sellers: int = Field(ge=0)
    value: _Dist | None = None
    cost: _Dist | None = None
    shade: _Dist | None = None
    sigma: _Dist | None = None
    activity: _Dist | None = None
    gamma: _Dist | None = None
    cash: _Dist | None = None
    stock: int | None = Field(default=None, ge=0, le=_INT64_MAX)  # stored as int64 arrays
    capacity: int | None = Field(default=None, ge=0, le=_INT64_MAX)
    curve: str | None = None
    curve_params: dict[str, Any] | None = None


class PluginModel(BaseModel):
    """A plugin table: ``name`` plus the plugin's own keyword parameters."""

    model_config = ConfigDict(extra="allow", strict=True)
    name: str


class DriftModel(BaseModel):
    """``[drift]``: one plugin ``{name, ...}`` or a sum ``{rules = [...], eta, noise, dt}``."""

    model_config = ConfigDict(extra="allow", strict=True)
    name: str | None = None
    rules: list[PluginModel] | None = None

    @model_validator(mode="after")
    def _one_form(self) -> DriftModel:
        if (self.name is None) == (self.rules is None):
            raise ValueError(
                "give either name = ... (one rule) or rules = [...] (a sum of forces), "
                + ("not both" if self.name is not None else "one of them is required")
            )
        if self.rules is not None and len(self.rules) == 0:
            raise ValueError("rules is empty; allowed: at least one rule {name = ...}")
        return self


class MarketModel(_Model):
    """``[market]``: engine options."""

    replenish: bool = True
    keep_ledger: bool | None = None
    mode: Literal["rounds", "events", "shop"] = "rounds"


def _finite_rate(v: Any) -> Any:
    """``events.rate``: a number >= 0 and finite, or a distribution spec (one per trader)."""
    if _is_number(v) and not (0 <= v < float("inf")):
        raise ValueError(f"must be >= 0 and finite, got {v!r}")
    return _check_distribution(v)


class EventsModel(_Model):
    """``[events]``: the continuous-time engine (``market.mode = "events"``)."""

    rate: Annotated[Any, AfterValidator(_finite_rate)] = 1.0
    method: Literal["tree", "direct"] = "tree"
    horizon: float = Field(gt=0, allow_inf_nan=False)
    window: float | None = Field(default=None, gt=0, allow_inf_nan=False)
    drift_every: float | None = Field(default=None, gt=0, allow_inf_nan=False)
    max_events: int = Field(default=10_000_000, ge=1)

    @field_validator("window")
    @classmethod
    def _window_fits(cls, v, info):
        horizon = info.data.get("horizon")
        if v is not None and horizon is not None and v > horizon:
            raise ValueError(f"must be <= horizon ({horizon:g}), got {v!r}")
        return v


class ShopModel(_Model):
    """``[shop]``: the (s, S) shop of ``market.mode = "shop"`` (days; see markets/supply_chain)."""

    price: float = Field(default=5.0, allow_inf_nan=False)
    arrival_rate: float = Field(default=20.0, ge=0, allow_inf_nan=False)
    order_up_to: int = Field(default=100, ge=1)
    reorder_point: int = Field(default=20, ge=0)
    lead_time: float = Field(default=3.0, ge=0, allow_inf_nan=False)
    initial_stock: int | None = Field(default=None, ge=0)
    days: float = Field(default=364.0, gt=0, allow_inf_nan=False)
    week: float = Field(default=7.0, gt=0, allow_inf_nan=False)

    @field_validator("reorder_point")
    @classmethod
    def _s_below_big_s(cls, v, info):
        big = info.data.get("order_up_to")
        if big is not None and v > big:
            raise ValueError(f"must be <= order_up_to ({big}), got {v!r}")
        return v

    @field_validator("week")
    @classmethod
    def _week_fits(cls, v, info):
        days = info.data.get("days")
        if days is not None and v > days:
            raise ValueError(f"must be <= days ({days:g}), got {v!r}")
        return v


class CollectModel(_Model):
    """``[collect]``: what each run keeps beyond its summary."""

    rounds: bool = True
    traders_every: int = Field(default=0, ge=0)
    ledger: bool = False
    metrics: list[str] | None = Field(default=None, min_length=1)
    totals: bool | None = None
    meetings: bool = False


class DesignModel(_Model):
    """``[design]``: the sweep (see :mod:`propensim.experiments.designs`)."""

    kind: Literal["points", "grid", "random", "lhs", "sobol"] = "grid"
    samples: int | None = Field(default=None, ge=1)
    max_runs: int = Field(default=100_000, ge=1)
    parameters: dict[str, Any] = Field(default_factory=dict)
    points: list[dict[str, Any]] | None = None


class ArmModel(_Model):
    """``[[arms]]``: a comparison arm overriding dotted fields."""

    name: str = Field(pattern=_NAME_PATTERN)
    description: str = ""
    set: dict[str, Any] = Field(default_factory=dict)
    interventions: list[PluginModel] = Field(default_factory=list)
    #: Design parameters that apply to this arm only (and to the other arms listing them).
    parameters: list[str] = Field(default_factory=list)


class CompareModel(_Model):
    """``[compare]``: paired comparison of the arms."""

    baseline: str | None = None
    metrics: list[str] | None = Field(default=None, min_length=1)
    confidence: float = Field(default=0.95, gt=0.0, lt=1.0)
    bootstrap: int = Field(default=2000, ge=1)


class SpecModel(_Model):
    """A whole spec file."""

    experiment: ExperimentModel
    plugins: list[str] = Field(default_factory=list)  # loaded first (local_plugins.py)
    population: PopulationModel
    network: PluginModel | None = None
    clearing: PluginModel | None = None
    drift: DriftModel | None = None
    market: MarketModel = Field(default_factory=MarketModel)
    collect: CollectModel = Field(default_factory=CollectModel)
    design: DesignModel = Field(default_factory=DesignModel)
    events: EventsModel | None = None
    shop: ShopModel | None = None
    interventions: list[PluginModel] = Field(default_factory=list)
    arms: list[ArmModel] = Field(default_factory=list)
    compare: CompareModel | None = None


def _model_at(path: Sequence) -> type[BaseModel] | None:
    """The schema model describing the table at ``path`` (for 'allowed: ...' lists)."""
    ann: Any = SpecModel
    for elem in path:
        ann = _unwrap(ann)
        if isinstance(ann, type) and issubclass(ann, BaseModel):
            field = ann.model_fields.get(elem) if isinstance(elem, str) else None
            if field is None:
                return None
            ann = field.annotation
        elif get_origin(ann) is list and isinstance(elem, int):
            ann = get_args(ann)[0]
        elif get_origin(ann) is dict:
            ann = get_args(ann)[1]
        else:
            return None
    ann = _unwrap(ann)
    return ann if isinstance(ann, type) and issubclass(ann, BaseModel) else None


def _unwrap(ann: Any) -> Any:
    origin = get_origin(ann)
    if origin is Union or getattr(origin, "__name__", None) == "UnionType":  # X | None
        args = [a for a in get_args(ann) if a is not type(None)]
        return args[0] if args else ann
    if origin is Annotated:
        return get_args(ann)[0]
    return ann


def _data_path(loc: Sequence, data: Any) -> tuple:
    """Keep the elements of a pydantic error location that address the data (drop union tags)."""
    out: list = []
    cur = data
    for k, elem in enumerate(loc):
        last = k == len(loc) - 1
        if isinstance(cur, Mapping) and elem in cur:
            out.append(elem)
            cur = cur[elem]
        elif isinstance(cur, list) and isinstance(elem, int) and 0 <= elem < len(cur):
            out.append(elem)
            cur = cur[elem]
        elif last and isinstance(cur, Mapping) and isinstance(elem, str):
            out.append(elem)  # a missing key
            cur = None
    return tuple(out)


def _pydantic_problem(err: dict, path: tuple) -> str:
    kind, value = err["type"], err.get("input")
    ctx = err.get("ctx") or {}
    if kind == "missing":
        text = "is required"
        if len(path) == 1:
            text = f"section [{path[0]}] is required"
        elif path[-1] == "name" and path[0] in PLUGIN_KINDS:
            text += f"; allowed: {', '.join(_known(PLUGIN_KINDS[path[0]]))}"
        return text
    if kind == "extra_forbidden":
        model = _model_at(path[:-1])
        allowed = ", ".join(model.model_fields) if model else "?"
        what = "section" if len(path) == 1 else "field"
        return f"unknown {what} {path[-1]!r}; allowed: {allowed}"
    if kind in ("model_type", "dict_type", "model_attributes_type"):
        return f"must be a table, got {value!r}"
    if kind == "list_type":
        return f"must be a list, got {value!r}"
    if kind in ("value_error", "assertion_error") and "error" in ctx:
        return str(ctx["error"])
    if kind == "literal_error":
        return f"got {value!r}; allowed: {ctx.get('expected')}"
    if kind == "too_short":
        return f"must have at least {ctx.get('min_length')} item(s), got {value!r}"
    if kind == "string_pattern_mismatch":
        return f"got {value!r}; allowed: letters, digits, '_' and '-' (no spaces)"
    msg = str(err.get("msg", kind))
    msg = re.sub(r"^Input should be", "must be", msg)
    return f"{msg}, got {value!r}"


def _known(kind: str) -> list[str]:
    from propensim.plugins import registry

    return registry.names(kind)
