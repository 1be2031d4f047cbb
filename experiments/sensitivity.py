"""Global sensitivity analysis: Sobol' indices (Saltelli sampling) or Morris screening.

The parameters and their ranges come from a spec's ``[design.parameters]`` (ranges
``{low, high, integer, log}``, as for the random, lhs and sobol designs). SALib draws the sample
in the unit cube; it is mapped to the ranges exactly as the sampled designs map theirs
(:mod:`propensim.experiments.designs`), written into the spec as an explicit ``points`` design,
and run by the normal sweep machinery (:func:`propensim.experiments.run_experiment`): the runs
land in a results folder, resume after an interruption and run on any backend (Dask included).
The metric of each point is averaged over its replicates before the analysis (the averaging
lowers the simulation noise that would otherwise bias the indices upward at small N).

Sobol' indices: a Saltelli sample of ``N`` base points gives ``N (D + 2)`` points (first-order
and total indices; Saltelli 2002, Saltelli et al. 2010, the estimators SALib implements);
confidence intervals are bootstrap intervals. Morris: ``N`` trajectories of ``D + 1`` points on
a ``levels``-level grid; ``mu_star`` (mean absolute elementary effect) ranks parameters and
``sigma`` flags interactions or non-linearity (Morris 1991; Campolongo et al. 2007).

The design kind named ``sobol`` is a different thing: a low-discrepancy sequence that spreads
sweep points evenly. It is not the sampling Sobol' indices need.

What the analysis stores in the folder: ``sensitivity.json`` (method, problem, sample size,
seed) and ``sensitivity.csv`` (the indices), so a report reads them back.

References
----------
Saltelli, A. (2002). Making best use of model evaluations to compute sensitivity indices.
Computer Physics Communications 145, 280-297.
Saltelli, A., Annoni, P., Azzini, I., Campolongo, F., Ratto, M. and Tarantola, S. (2010).
Variance based sensitivity analysis of model output. Computer Physics Communications 181, 259-270.
Saltelli, A. et al. (2008). *Global Sensitivity Analysis: The Primer*. Wiley.
Morris, M. D. (1991). Factorial sampling plans for preliminary computational experiments.
Technometrics 33(2), 161-174.
Campolongo, F., Cariboni, J. and Saltelli, A. (2007). An effective screening design for
sensitivity analysis of large models. Environmental Modelling & Software 22, 1509-1518.
Herman, J. and Usher, W. (2017). SALib: an open-source Python library for sensitivity analysis.
Journal of Open Source Software 2(9), 97.
"""

from __future__ import annotations

import json
import warnings
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["METHODS", "SensitivityError", "analyze", "problem_from_spec", "run_sensitivity"]

METHODS = ("sobol", "morris")
#: Spawn key (below the DESIGN stream) of the sensitivity sample.
SAMPLE_SPAWN_KEY = 0x5A17
#: An interval half-width above this (in index units) triggers a "too few samples" warning.
WIDE_INTERVAL = 0.1


class SensitivityError(ValueError):
    """A spec or folder that cannot be analysed as asked (one line)."""


def _salib():
    try:
        import SALib  # noqa: F401
    except ImportError:
        raise SensitivityError(
            "sensitivity analysis needs SALib: pip install 'propensim[report]'"
        ) from None


def problem_from_spec(spec) -> dict[str, Any]:
    """The parameters and ranges of a spec's design, as a SALib problem plus our range tables.

    Raises
    ------
    SensitivityError
        If the design has no ranges (a grid or explicit points, or no parameters).
    """
    from propensim.experiments.designs import check_range

    params = spec.design.get("parameters") or {}
    ranges = {k: v for k, v in params.items() if isinstance(v, dict)}
    if not ranges or len(ranges) != len(params):
        where = f"{spec.source}: " if spec.source else ""
        raise SensitivityError(
            f"{where}design.parameters: sensitivity analysis needs ranges "
            "{low = ..., high = ...} for every parameter (design kind random, lhs or sobol); "
            f"this design (kind = {spec.design.get('kind')!r}) has "
            + ("no parameters" if not params else "lists of levels or fixed points")
        )
    names = list(ranges)
    return {
        "num_vars": len(names),
        "names": names,
        "bounds": [[0.0, 1.0]] * len(names),  # sampled in the unit cube, mapped afterwards
        "ranges": {k: check_range(k, v) for k, v in ranges.items()},
    }


def _sample(problem: dict, method: str, samples: int, levels: int, seed: int) -> np.ndarray:
    salib_problem = {k: problem[k] for k in ("num_vars", "names", "bounds")}
    if method == "sobol":
        from SALib.sample import sobol as sobol_sample

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # the power-of-two advice: we give our own warning
            return sobol_sample.sample(salib_problem, samples, calc_second_order=False, seed=seed)
    from SALib.sample import morris as morris_sample

    return morris_sample.sample(salib_problem, samples, num_levels=levels, seed=seed)


def _sample_seed(spec) -> int:
    from propensim.experiments.spec import DESIGN_SPAWN_KEY

    ss = np.random.SeedSequence(spec.seed, spawn_key=(DESIGN_SPAWN_KEY, SAMPLE_SPAWN_KEY))
    return int(ss.generate_state(1)[0])


def sensitivity_spec(spec, method: str = "sobol", samples: int = 256, levels: int = 4):
    """The spec with its design replaced by the SALib sample (kind ``points``), and the sample.

    Returns
    -------
    (Spec, dict)
        The loaded spec to run, and the settings recorded in ``sensitivity.json``.
    """
    from propensim.experiments.designs import _scale_unit
    from propensim.experiments.spec import load_spec

    _salib()
    if method not in METHODS:
        raise SensitivityError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
    if isinstance(samples, bool) or not isinstance(samples, int) or samples < 2:
        raise SensitivityError(f"samples must be a whole number >= 2, got {samples!r}")
    problem = problem_from_spec(spec)
    seed = _sample_seed(spec)
    u = _sample(problem, method, samples, levels, seed)  # shape: (n_points, d), in [0, 1]
    u = np.clip(
        u, 0.0, np.nextafter(1.0, 0.0)
    )  # Morris uses the upper edge; ranges are [low, high)
    ranges = [problem["ranges"][k] for k in problem["names"]]
    columns = _scale_unit(u, ranges)
    points = [{k: columns[j][i] for j, k in enumerate(problem["names"])} for i in range(u.shape[0])]
    raw = spec.resolved()
    raw["design"] = {
        "kind": "points",
        "points": points,
        "max_runs": max(int(raw["design"].get("max_runs", 0)), len(points) * spec.replicates * 4),
    }
    name = raw["experiment"]["name"]
    raw["experiment"]["name"] = name if name.endswith("-sensitivity") else f"{name}-sensitivity"
    settings = {
        "method": method,
        "samples": samples,
        "levels": levels if method == "morris" else None,
        "seed": seed,
        "names": problem["names"],
        "ranges": problem["ranges"],
        "unit_sample": u.tolist(),
        "points": len(points),
        "replicates": spec.replicates,
        "source_spec": spec.name,
    }
    if method == "sobol" and samples & (samples - 1):
        warnings.warn(
            f"samples = {samples}: Saltelli's sequence keeps its balance only for a power of 2",
            UserWarning,
            stacklevel=2,
        )
    return load_spec(raw), settings


def analyze(
    runs,
    settings: dict,
    metrics: Sequence[str],
    *,
    confidence: float = 0.95,
    resamples: int = 1000,
):
    """Sensitivity indices of every metric (per arm) from a folder's runs table.

    Parameters
    ----------
    runs : pandas.DataFrame
        The runs table of the sensitivity folder (``point`` is the row of the sample).
    settings : dict
        What :func:`sensitivity_spec` recorded (``sensitivity.json``).
    metrics : sequence of str
        Metric columns.
    confidence : float
        Level of the bootstrap intervals.
    resamples : int
        Bootstrap resamples of SALib's analysis.

    Returns
    -------
    pandas.DataFrame
        One row per metric, arm and parameter: ``S1``, ``S1_conf``, ``ST``, ``ST_conf`` (Sobol')
        or ``mu``, ``mu_star``, ``mu_star_conf``, ``sigma`` (Morris); ``conf`` columns are
        half-widths of the interval; ``warning`` says when an index is negative beyond its
        interval or an interval is wide (more samples needed).
    """
    import pandas as pd

    _salib()
    method = settings["method"]
    names = list(settings["names"])
    u = np.asarray(settings["unit_sample"], dtype=float)  # shape: (n_points, d)
    problem = {"num_vars": len(names), "names": names, "bounds": [[0.0, 1.0]] * len(names)}
    ok = runs[runs["status"] == "ok"] if "status" in runs.columns else runs
    rows = []
    for metric in metrics:
        if metric not in runs.columns:
            raise SensitivityError(
                f"metric {metric!r} was not collected; collected: "
                + ", ".join(c for c in runs.columns if c not in ("run_id", "index", "arm"))
            )
        for arm in dict.fromkeys(runs["arm"]):
            at = ok[ok["arm"] == arm]
            y = at.groupby("point")[metric].mean().reindex(range(u.shape[0]))  # replicate mean
            missing = int(y.isna().sum())
            if missing:
                raise SensitivityError(
                    f"{metric}{f' ({arm})' if arm else ''}: {missing} of {u.shape[0]} sample "
                    "points have no finite value (failed or missing runs); run the folder again "
                    "to finish it, or choose another metric"
                )
            yv = y.to_numpy(dtype=float)
            if np.ptp(yv) == 0:
                raise SensitivityError(
                    f"{metric}{f' ({arm})' if arm else ''} is the same at every sample point; "
                    "it has no variance to share out"
                )
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                if method == "sobol":
                    from SALib.analyze import sobol as sobol_analyze

                    res = sobol_analyze.analyze(
                        problem,
                        yv,
                        calc_second_order=False,
                        num_resamples=resamples,
                        conf_level=confidence,
                        seed=settings["seed"],
                    )
                else:
                    from SALib.analyze import morris as morris_analyze

                    res = morris_analyze.analyze(
                        problem,
                        u,
                        yv,
                        num_resamples=resamples,
                        conf_level=confidence,
                        num_levels=settings.get("levels") or 4,
                        seed=settings["seed"],
                    )
            for j, name in enumerate(names):
                row = {"metric": metric, "arm": arm, "parameter": name, "method": method}
                if method == "sobol":
                    row |= {k: float(res[k][j]) for k in ("S1", "S1_conf", "ST", "ST_conf")}
                    row["warning"] = _sobol_warning(row)
                else:
                    row |= {k: float(res[k][j]) for k in ("mu", "mu_star", "mu_star_conf", "sigma")}
                    row["warning"] = ""
                row["confidence"] = float(confidence)
                rows.append(row)
    return pd.DataFrame(rows)


def _sobol_warning(row: dict) -> str:
    notes = []
    for k in ("S1", "ST"):
        if row[k] + row[f"{k}_conf"] < 0:
            notes.append(f"{k} is negative beyond its interval")
        elif row[k] < 0:
            notes.append(f"{k} is negative (read as 0 within noise)")
        if row[f"{k}_conf"] > WIDE_INTERVAL:
            notes.append(f"{k} interval wider than +-{WIDE_INTERVAL:g}: use more samples")
    return "; ".join(notes)


def run_sensitivity(
    spec_or_path,
    out=None,
    *,
    method: str = "sobol",
    samples: int = 256,
    levels: int = 4,
    metrics: Sequence[str] | None = None,
    overrides: Sequence[str] = (),
    workers: int | None = None,
    scheduler: str | None = None,
    dask_local: int | None = None,
    progress: bool | None = None,
    confidence: float = 0.95,
    resamples: int = 1000,
):
    """Sample, run through the sweep machinery, analyse, and store the indices.

    Parameters
    ----------
    spec_or_path : Spec, str, Path or mapping
        A spec whose ``[design.parameters]`` are ranges.
    out : str or Path, optional
        Results folder (default ``./results/<name>-sensitivity``); rerunning resumes.
    method : {"sobol", "morris"}
        Sobol' indices from a Saltelli sample, or Morris elementary effects.
    samples : int
        Base samples ``N`` (Sobol': ``N (D + 2)`` points; a power of 2) or Morris trajectories.
    levels : int
        Morris grid levels.
    metrics : sequence of str, optional
        Metrics to analyse (default: every collected metric).
    overrides, workers, scheduler, dask_local, progress
        As for :func:`propensim.experiments.run_experiment`.

    Returns
    -------
    (Path, pandas.DataFrame)
        The results folder and the indices table (also in ``sensitivity.csv`` there).
    """
    from propensim.experiments.runner import _as_spec, default_out, run_experiment
    from propensim.experiments.store import atomic_write_bytes, load

    base = _as_spec(spec_or_path, overrides)
    metrics = list(metrics) if metrics else list(base.metrics)
    for m in metrics:
        if m not in base.metrics:
            raise SensitivityError(
                f"metric {m!r} is not collected; allowed: {', '.join(base.metrics)} "
                "(collect.metrics)"
            )
    run_spec, settings = sensitivity_spec(base, method, samples, levels)
    out = Path(out) if out is not None else default_out(run_spec.name)
    store = run_experiment(
        run_spec,
        out,
        workers=workers,
        scheduler=scheduler,
        dask_local=dask_local,
        progress=progress,
    )
    runs = load(store.path).runs
    table = analyze(runs, settings, metrics, confidence=confidence, resamples=resamples)
    settings = {**settings, "metrics": metrics, "confidence": confidence, "resamples": resamples}
    atomic_write_bytes(
        store.path / "sensitivity.json", (json.dumps(settings, indent=1) + "\n").encode()
    )
    atomic_write_bytes(store.path / "sensitivity.csv", table.to_csv(index=False).encode())
    return store.path, table


def load_indices(folder):
    """The stored indices and settings of a sensitivity folder, or ``(None, None)``."""
    import pandas as pd

    folder = Path(folder)
    csv, js = folder / "sensitivity.csv", folder / "sensitivity.json"
    if not (csv.exists() and js.exists()):
        return None, None
    settings = json.loads(js.read_text())
    table = pd.read_csv(csv)
    for col in ("arm", "warning"):
        if col in table.columns:
            table[col] = table[col].astype(object).where(table[col].notna(), "").astype(str)
    return table, settings
