"""Calibration: fit the model's curves and levels to data, and a market to observed statistics.

Three jobs, one function each, each returning a result object with the numbers the command line
prints:

- :func:`fit_returns` (also :func:`calibrate`, the ``propensim calibrate`` command): oscillator
  level mixtures, the thermal mixture, the normal and the Student-t fitted by maximum likelihood to
  a return series (:mod:`propensim.experiments.calibrate_returns`);
- :func:`fit_acceptance` and :func:`recover_curves` (``propensim acceptance``): propensity curves
  from accept/reject observations by Bernoulli maximum likelihood, for one trader or for every
  trader of a meetings table (:mod:`propensim.experiments.calibrate_accept`);
- :func:`tune_market` (``propensim tune``): market parameters whose simulated summary metrics
  match targets, by the simulated method of moments (:mod:`propensim.experiments.tuning`).

Examples
--------
>>> from propensim.experiments import calibrate  # doctest: +SKIP
>>> fit = calibrate("prices.csv", column="close", out="results/cal")  # doctest: +SKIP
>>> print(fit.format())  # doctest: +SKIP
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from propensim.experiments.calibrate_accept import (
    AcceptanceFit,
    CurveRecovery,
    fit_acceptance,
    recover_curves,
    simulate_meetings,
)
from propensim.experiments.calibrate_base import CalibrationError, ConvergenceError, write_folder
from propensim.experiments.calibrate_returns import DEFAULT_SEED, ReturnsFit, fit_returns

__all__ = [
    "AcceptanceFit",
    "CalibrationError",
    "ConvergenceError",
    "CurveRecovery",
    "ReturnsFit",
    "calibrate",
    "fit_acceptance",
    "fit_returns",
    "recover_curves",
    "save_acceptance",
    "simulate_meetings",
    "tune_market",
]


def calibrate(
    data,
    column: str | None = None,
    *,
    returns: bool = False,
    max_level: int = 2,
    starts: int = 8,
    seed: int = DEFAULT_SEED,
    max_iter: int = 2000,
    out=None,
) -> ReturnsFit:
    """Fit price-change distributions to a series: what ``propensim calibrate`` does.

    See :func:`~propensim.experiments.calibrate_returns.fit_returns` for the parameters; the
    command's defaults are the same, so ``calibrate(...).format()`` is the command's printout.
    """
    return fit_returns(
        data,
        column,
        returns=returns,
        max_level=max_level,
        starts=starts,
        seed=seed,
        max_iter=max_iter,
        out=out,
    )


def tune_market(*args, **kwargs):
    """Simulated method of moments over market parameters (see :mod:`.tuning`)."""
    from propensim.experiments.tuning import tune_market as _tune

    return _tune(*args, **kwargs)


def save_acceptance(result: AcceptanceFit | CurveRecovery, out, source: dict[str, Any]) -> Path:
    """Write an acceptance fit or a curve recovery to a results folder (Parquet + manifest)."""
    if isinstance(result, AcceptanceFit):
        rows = result.table().to_dict("records")
        cols = {"parameter": "str", "estimate": "float", "se": "float"}
        cols |= {"ci_low": "float", "ci_high": "float"}
        manifest = {
            "source": source,
            "family": result.family,
            "side": result.side,
            "n": result.n,
            "loglik": result.loglik,
            "converged": result.converged,
        }
        return write_folder(out, "acceptance", manifest, {"parameters": (rows, cols)})
    table = result.table.copy()
    table["unit"] = table["unit"].astype(str)
    cols = {"side": "str", "unit": "str", "meetings": "int"}
    for name in ("mu", "sigma"):
        cols |= {name: "float", f"se_{name}": "float", f"{name}_low": "float"}
        cols[f"{name}_high"] = "float"
    manifest = {
        "source": source,
        "family": result.family,
        "loglik": result.loglik,
        "converged": result.converged,
    }
    return write_folder(out, "recovery", manifest, {"curves": (table.to_dict("records"), cols)})
