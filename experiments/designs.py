"""Sweep designs: which parameter values an experiment runs.

A design maps dotted field paths of a spec (``"population.sigma"``, ``"clearing.meetings"``) to
values and returns a list of points, one dict per point. Five kinds:

``points``
    An explicit list of points, used as given.
``grid``
    Full factorial over lists of levels; the first parameter varies slowest (the order of
    :func:`itertools.product`), so the order is fixed by the order the parameters are declared.
``random``
    Independent uniform draws within declared ranges (plain Monte Carlo).
``lhs``
    Latin hypercube sample (:class:`scipy.stats.qmc.LatinHypercube`): each range is cut into
    ``samples`` equal strata and every stratum holds exactly one point in every dimension.
``sobol``
    Scrambled Sobol' sequence (:class:`scipy.stats.qmc.Sobol`); its balance properties hold for
    a power-of-two number of points, so other sizes are accepted with a warning. It is a way of
    spreading sweep points evenly over the ranges (a low-discrepancy sequence), not the sampling
    that Sobol' sensitivity indices need: for those use ``propensim sensitivity``
    (:mod:`propensim.experiments.sensitivity`, Saltelli sampling).

Ranges are mappings ``{low, high, integer=False, log=False}``. Unit-cube samples are mapped to the
ranges with :func:`scipy.stats.qmc.scale`. ``log=True`` samples uniformly in ``log(value)``
(``low > 0`` required). ``integer=True`` gives whole numbers: the unit interval is scaled to
``[low, high + 1)`` and floored, so each of ``low .. high`` gets the same share of the points and a
Latin hypercube stays stratified over the integers. (Rounding a sample of ``[low, high]`` instead
would give the two end values half the weight of the others.)

Every design is a pure function of its arguments and seed.

References
----------
McKay, M. D., Beckman, R. J. and Conover, W. J. (1979). A comparison of three methods for
selecting values of input variables in the analysis of output from a computer code.
Technometrics 21(2), 239-245.

Sobol', I. M. (1967). On the distribution of points in a cube and the approximate evaluation of
integrals. USSR Computational Mathematics and Mathematical Physics 7(4), 86-112.

Owen, A. B. (1998). Scrambling Sobol' and Niederreiter-Xing points. Journal of Complexity 14(4),
466-489.
"""

from __future__ import annotations

import itertools
import math
import warnings
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

#: Design kinds, in the order they are documented.
KINDS = ("points", "grid", "random", "lhs", "sobol")
#: Kinds that sample ranges and need ``samples``.
SAMPLED_KINDS = ("random", "lhs", "sobol")
#: Keys a range mapping may hold.
RANGE_KEYS = ("low", "high", "integer", "log")


class DesignError(ValueError):
    """A bad design argument; ``param`` names the parameter (dotted path) when one is at fault."""

    def __init__(self, message: str, param: str | None = None, key: str | None = None) -> None:
        super().__init__(message)
        self.param = param
        self.key = key


def _is_number(x: Any) -> bool:
    return isinstance(x, int | float | np.integer | np.floating) and not isinstance(x, bool)


def check_range(param: str, spec: Any) -> dict[str, Any]:
    """Check one range mapping and return it with defaults filled in.

    Parameters
    ----------
    param : str
        The dotted field path the range belongs to (used in messages).
    spec : mapping
        ``{low, high, integer=False, log=False}``; ``low <= high``; ``log`` needs ``low > 0``.

    Returns
    -------
    dict
        ``{"low": float or int, "high": float or int, "integer": bool, "log": bool}``.

    Raises
    ------
    DesignError
        Naming the parameter and what is wrong (one line).
    """
    if not isinstance(spec, Mapping):
        raise DesignError(
            f"{param} must be a range table {{low = ..., high = ...}} for a sampled design, "
            f"got {spec!r}",
            param,
        )
    extra = [k for k in spec if k not in RANGE_KEYS]
    if extra:
        raise DesignError(
            f"{param} has unknown range key {extra[0]!r}; allowed: {', '.join(RANGE_KEYS)}",
            param,
            extra[0],
        )
    for key in ("low", "high"):
        if key not in spec:
            raise DesignError(f"{param}.{key} is required in a range", param, key)
        if not _is_number(spec[key]) or not math.isfinite(spec[key]):
            raise DesignError(
                f"{param}.{key} must be a finite number, got {spec[key]!r}", param, key
            )
    for key in ("integer", "log"):
        if not isinstance(spec.get(key, False), bool):
            raise DesignError(f"{param}.{key} must be true or false, got {spec[key]!r}", param, key)
    integer, log = bool(spec.get("integer", False)), bool(spec.get("log", False))
    low, high = spec["low"], spec["high"]
    if low > high:
        raise DesignError(
            f"{param} range is reversed (low={low} > high={high}); allowed: low <= high", param
        )
    if integer:
        if int(low) != low or int(high) != high:
            raise DesignError(
                f"{param} is an integer range but low={low}, high={high} are not whole numbers",
                param,
            )
        low, high = int(low), int(high)
    else:
        low, high = float(low), float(high)
    if log and low <= 0:
        raise DesignError(f"{param} is a log range and needs low > 0, got low={low}", param, "low")
    return {"low": low, "high": high, "integer": integer, "log": log}


def check_levels(param: str, levels: Any) -> list:
    """Check a list of grid levels (non-empty list) and return it as a list."""
    if isinstance(levels, Mapping) or not isinstance(levels, Sequence) or isinstance(levels, str):
        raise DesignError(
            f"{param} must be a list of levels for a grid design, got {levels!r}", param
        )
    if len(levels) == 0:
        raise DesignError(
            f"{param} has an empty list of levels; allowed: at least one level", param
        )
    return list(levels)


def _scale_unit(u: np.ndarray, ranges: list[dict[str, Any]]) -> list[list[Any]]:
    """Map unit-cube samples (shape (n, d)) to the declared ranges, column by column."""
    from scipy.stats import qmc

    n, d = u.shape
    lo = np.empty(d)  # shape: (d,) lower bounds in the sampling space
    hi = np.empty(d)  # shape: (d,) upper bounds in the sampling space
    for j, r in enumerate(ranges):
        low, high = float(r["low"]), float(r["high"]) + (1.0 if r["integer"] else 0.0)
        lo[j], hi[j] = (np.log(low), np.log(high)) if r["log"] else (low, high)
    degenerate = hi <= lo  # shape: (d,) a range of one value (low == high, not integer)
    x = np.repeat(lo[None, :], n, axis=0)  # shape: (n, d)
    live = ~degenerate
    if np.any(live):
        x[:, live] = qmc.scale(u[:, live], lo[live], hi[live])
    is_log = np.array([r["log"] for r in ranges], dtype=bool)  # shape: (d,)
    x[:, is_log] = np.exp(x[:, is_log])
    columns: list[list[Any]] = []
    for j, r in enumerate(ranges):
        col = x[:, j]  # shape: (n,)
        if r["integer"]:
            # floor of [low, high + 1): each whole number gets an equal share; clip guards the
            # upper edge against exp/log round-off.
            columns.append(np.clip(np.floor(col), r["low"], r["high"]).astype(np.int64).tolist())
        else:
            columns.append(np.clip(col, r["low"], r["high"]).tolist())
    return columns


def unit_sample(kind: str, n: int, d: int, seed: Any = 0) -> np.ndarray:
    """A design in the unit cube ``[0, 1)^d`` with ``n`` points (shape ``(n, d)``).

    Parameters
    ----------
    kind : {"random", "lhs", "sobol"}
        Plain uniform draws, a Latin hypercube, or a scrambled Sobol' sequence.
    n, d : int
        Number of points (>= 1) and dimensions (>= 1).
    seed : int, SeedSequence or Generator
        Source of randomness (normalised with :func:`numpy.random.default_rng`).

    Returns
    -------
    ndarray, shape (n, d)
    """
    from scipy.stats import qmc

    rng = np.random.default_rng(seed)
    if kind == "random":
        return rng.random((n, d))
    if kind == "lhs":
        return qmc.LatinHypercube(d, rng=rng).random(n)
    if kind == "sobol":
        engine = qmc.Sobol(d, scramble=True, rng=rng)
        m = int(n).bit_length() - 1
        if n == 1 << m:
            return engine.random_base2(m)
        with warnings.catch_warnings():
            # our caller warns once, naming the field; scipy's own warning would repeat it
            warnings.simplefilter("ignore", UserWarning)
            return engine.random(n)
    raise DesignError(f"unknown sampled design kind {kind!r}; allowed: {', '.join(SAMPLED_KINDS)}")


def n_points(kind: str, parameters: Any, *, samples: int | None = None) -> int:
    """How many points :func:`design_points` would return, without building them."""
    if kind == "points":
        return len(parameters)
    if kind == "grid":
        return math.prod(len(check_levels(p, v)) for p, v in parameters.items())
    if kind in SAMPLED_KINDS:
        return _check_samples(samples)
    raise DesignError(f"unknown design kind {kind!r}; allowed: {', '.join(KINDS)}")


def _check_samples(samples: Any) -> int:
    if isinstance(samples, bool) or not isinstance(samples, int | np.integer):
        raise DesignError(
            f"samples must be a whole number >= 1 for a sampled design, got {samples!r}",
            key="samples",
        )
    if samples < 1:
        raise DesignError(f"samples must be >= 1, got {samples}", key="samples")
    return int(samples)


def design_points(
    kind: str,
    parameters: Mapping[str, Any] | Sequence[Mapping[str, Any]],
    *,
    samples: int | None = None,
    seed: Any = 0,
) -> list[dict[str, Any]]:
    """The points of a design, in a fixed order.

    Parameters
    ----------
    kind : {"points", "grid", "random", "lhs", "sobol"}
        Design kind (see the module docstring).
    parameters : mapping or sequence of mappings
        ``points``: the list of points itself (each a mapping of dotted path to value).
        ``grid``: dotted path -> list of levels. ``random``, ``lhs``, ``sobol``: dotted path ->
        range ``{low, high, integer=False, log=False}``.
    samples : int, optional
        Number of points for the sampled kinds (>= 1; Sobol': a power of 2 is advised).
    seed : int, SeedSequence or Generator
        Seed of the sampled kinds; the same seed gives the same points.

    Returns
    -------
    list of dict
        One dict per point, mapping each dotted path to a plain Python value. With no parameters
        a grid has one empty point and a sampled design ``samples`` empty points.

    Raises
    ------
    DesignError
        A ``ValueError`` naming the parameter and what is wrong (one line).

    References
    ----------
    McKay, Beckman and Conover (1979) for the Latin hypercube; Sobol' (1967) and Owen (1998) for
    scrambled Sobol' points.

    Examples
    --------
    >>> design_points("grid", {"a": [1, 2], "b": ["x", "y"]})
    [{'a': 1, 'b': 'x'}, {'a': 1, 'b': 'y'}, {'a': 2, 'b': 'x'}, {'a': 2, 'b': 'y'}]
    """
    if kind not in KINDS:
        raise DesignError(f"unknown design kind {kind!r}; allowed: {', '.join(KINDS)}")
    if kind == "points":
        if isinstance(parameters, Mapping) or not isinstance(parameters, Sequence):
            raise DesignError("points must be a list of tables {path = value, ...}")
        if len(parameters) == 0:
            raise DesignError("points is empty; allowed: at least one point")
        out = []
        for i, p in enumerate(parameters):
            if not isinstance(p, Mapping):
                raise DesignError(f"points[{i}] must be a table {{path = value}}, got {p!r}")
            out.append(dict(p))
        return out
    if not isinstance(parameters, Mapping):
        raise DesignError(f"parameters must be a table of dotted paths, got {parameters!r}")
    names = list(parameters)
    if kind == "grid":
        levels = [check_levels(p, parameters[p]) for p in names]
        return [dict(zip(names, combo, strict=True)) for combo in itertools.product(*levels)]
    n = _check_samples(samples)
    ranges = [check_range(p, parameters[p]) for p in names]
    if not names:
        return [{} for _ in range(n)]
    if kind == "sobol" and n & (n - 1):
        lower, upper = 1 << (n.bit_length() - 1), 1 << n.bit_length()
        warnings.warn(
            f"design.samples = {n}: Sobol' points keep their balance properties only for a power "
            f"of 2 (try {lower} or {upper})",
            UserWarning,
            stacklevel=2,
        )
    u = unit_sample(kind, n, len(names), seed)  # shape: (n, d)
    columns = _scale_unit(u, ranges)
    return [{p: columns[j][i] for j, p in enumerate(names)} for i in range(n)]
