"""A run plan: everything one run needs, so that a run is a pure function of its plan.

The spec layer (:mod:`propensim.experiments.spec`) expands an experiment into run plans; the
runner executes them anywhere (this process, a process pool, a Dask worker) and gets the same
result, because the plan carries the resolved market configuration and the exact seed.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np


def canonical_json(obj: Any) -> str:
    """JSON with sorted keys and no spaces: the same object always gives the same text."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=_default)


def _default(obj):
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, tuple | set):
        return list(obj)
    raise TypeError(f"cannot serialise {type(obj).__name__}")


@dataclass(frozen=True)
class RunPlan:
    """One run of an experiment.

    Parameters
    ----------
    index : int
        Position in the experiment's run order (stable for a given spec).
    arm : str
        Comparison arm name ("" when the spec has no arms).
    point : int
        Design point index.
    replicate : int
        Replicate number at that point; arms with the same point and replicate share the seed
        (common random numbers).
    params : dict
        The design parameters of this point, by dotted field path (e.g. ``"population.sigma"``).
    config : dict
        Resolved market configuration for :func:`propensim.markets.build_market`.
    rounds : int
        Rounds to run.
    seed_entropy : int
        The experiment's root seed.
    seed_key : tuple of int
        Spawn key of this run below the root: ``(point, replicate)``.
    collect : dict
        What to keep beyond the summary: ``rounds`` (bool), ``traders_every`` (int),
        ``ledger`` (bool).
    """

    index: int
    arm: str
    point: int
    replicate: int
    params: dict[str, Any]
    config: dict[str, Any]
    rounds: int
    seed_entropy: int
    seed_key: tuple[int, ...]
    collect: dict[str, Any] = field(default_factory=dict)

    @property
    def seed(self) -> np.random.SeedSequence:
        """The run's seed: a child of the root seed, shared by every arm of a replicate."""
        return np.random.SeedSequence(self.seed_entropy, spawn_key=self.seed_key)

    @property
    def run_id(self) -> str:
        """Hash of everything that determines the result: configuration, rounds and seed."""
        text = canonical_json(
            {
                "config": self.config,
                "rounds": self.rounds,
                "seed": [self.seed_entropy, list(self.seed_key)],
                "collect": self.collect,
            }
        )
        return hashlib.sha256(text.encode()).hexdigest()[:16]

    def to_dict(self) -> dict[str, Any]:
        """Plain data (for sending to workers and writing to the store)."""
        d = asdict(self)
        d["seed_key"] = list(self.seed_key)
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> RunPlan:
        """Inverse of :meth:`to_dict`."""
        return cls(**{**d, "seed_key": tuple(d["seed_key"])})
