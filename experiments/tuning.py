"""Market tuning by the simulated method of moments.

Find values of a few spec fields (curve width, drift strength, ...) whose simulated summary
metrics match target values. For candidate parameters ``theta`` the market is run ``R`` times
(replicates); the simulated moments ``m_j(theta)`` are the replicate means of the targeted
metrics, and the distance is

    D(theta) = sum_j ((m_j(theta) - t_j) / s_j)**2,

with ``s_j`` the target's standard deviation when given (``METRIC=VALUE:SD``), else the
standard deviation of one run's metric, pooled over the first design's candidates (fixed from
then on, so the objective does not move while it is minimised).

Robust to simulation noise by construction: every candidate is run with the *same* seeds
(replicate ``r`` of every candidate gets seed key ``(r,)``: common random numbers), so two
candidates differ only through their parameters. The search is design-then-refine: a Latin
hypercube over the ranges, then Nelder-Mead (scipy) from the best design point, in coordinates
scaled to the unit cube. Every candidate batch runs through :func:`~propensim.experiments.runner.
run_plans` on one open backend (:func:`~propensim.experiments.runner.open_backend`), each into its
own folder ``batches/NNNN``; the search is deterministic, so running the same command again
finds every batch stored and resumes where it stopped, on the local pool or on Dask.

Intervals come from the curvature: with ``G = dm/dtheta`` at the fit (central differences, one
more batch), ``W = diag(1/s**2)``, ``Omega`` the covariance of one run's metrics (from the
replicates at the fit), the estimator's covariance is

    (G'WG)^-1 G'W V WG (G'WG)^-1,   V = Omega_target + Omega / R,

where ``Omega_target`` is ``diag(SD**2)`` for targets given with an SD, and ``Omega / n_obs``
otherwise (targets observed as the mean of ``n_obs`` markets like the simulated one).

References
----------
.. [1] D. McFadden, "A method of simulated moments for estimation of discrete response models
   without numerical integration", Econometrica 57(5):995-1026 (1989).
.. [2] A. Pakes and D. Pollard, "Simulation and the asymptotics of optimization estimators",
   Econometrica 57(5):1027-1057 (1989) (the ``1 + 1/R`` factor; sandwich covariance).
.. [3] J. A. Nelder and R. Mead, Computer Journal 7:308-313 (1965); M. D. McKay, R. J. Beckman,
   W. J. Conover, Technometrics 21:239-245 (1979) (Latin hypercube).
"""

from __future__ import annotations

import dataclasses
import math
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from propensim.experiments.calibrate_base import (
    Z95,
    CalibrationError,
    caution,
    write_folder,
)

__all__ = ["TuningResult", "parse_param", "parse_target", "tune_market"]

#: Seed-key prefix of tuning runs (apart from any design point's key of the spec itself).
TUNE_SPAWN_KEY = 7_000_001
#: Nelder-Mead stops when its simplex spans less than this share of every range ...
XATOL = 0.01
#: ... and its distances differ by less than this (the distance's sampling noise is of order 1).
FATOL = 0.01


def parse_target(text: str) -> tuple[str, float, float | None]:
    """``"metric=value"`` or ``"metric=value:sd"`` -> (metric, value, sd or None)."""
    name, sep, rest = text.partition("=")
    name = name.strip()
    try:
        if not sep or not name:
            raise ValueError
        value_text, _, sd_text = rest.partition(":")
        value = float(value_text)
        sd = float(sd_text) if sd_text.strip() else None
    except ValueError:
        raise CalibrationError(
            f"--target {text!r}: expected METRIC=VALUE or METRIC=VALUE:SD"
        ) from None
    if not math.isfinite(value) or (sd is not None and not (math.isfinite(sd) and sd > 0)):
        raise CalibrationError(f"--target {text!r}: value must be finite and SD > 0")
    return name, value, sd


def parse_param(text: str) -> tuple[str, float, float]:
    """``"path=low:high"`` -> (path, low, high)."""
    path, sep, rest = text.partition("=")
    path = path.strip()
    lo_text, sep2, hi_text = rest.partition(":")
    try:
        if not sep or not sep2 or not path:
            raise ValueError
        lo, hi = float(lo_text), float(hi_text)
    except ValueError:
        raise CalibrationError(f"--param {text!r}: expected PATH=LOW:HIGH") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise CalibrationError(f"--param {text!r}: need finite LOW < HIGH")
    return path, lo, hi


@dataclass
class TuningResult:
    """A tuned market.

    Attributes
    ----------
    params, se, ci_low, ci_high : dict of str to float
        Fitted values of the tuned fields and their 95% intervals (curvature, see the module).
    distance : float
        Achieved ``D(theta)`` at the fit.
    targets, scales : dict of str to float
        Target values and the scales ``s_j`` of the distance.
    simulated : dict of str to float
        Replicate means of the targeted metrics at the fit.
    candidates : pandas.DataFrame
        Every candidate evaluated: ``stage`` (design, refine, curvature), the parameters, the
        metric means and the distance.
    evaluations : int
        Candidates run (each ``replicates`` runs).
    converged : bool
        Nelder-Mead stopped on its tolerances (not on the evaluation limit) and the
        curvature matrix is invertible.
    message : str
    replicates : int
    path : Path or None
    seconds : float
    """

    params: dict[str, float]
    se: dict[str, float]
    ci_low: dict[str, float]
    ci_high: dict[str, float]
    distance: float
    targets: dict[str, float]
    scales: dict[str, float]
    simulated: dict[str, float]
    candidates: Any
    evaluations: int
    converged: bool
    message: str
    replicates: int
    path: Path | None = None
    seconds: float = 0.0

    def format(self) -> str:
        """The printed report."""
        lines = [
            f"Tuned {len(self.params)} parameter(s) to {len(self.targets)} target(s): "
            f"{self.evaluations} candidates x {self.replicates} replicates "
            "(common random numbers across candidates)",
            "",
            f"{'parameter':<28} {'fit':>10} {'se':>10} {'95% interval':>24}",
        ]
        for k, v in self.params.items():
            lines.append(
                f"{k:<28} {v:>10.4g} {self.se[k]:>10.3g} "
                f"{f'[{self.ci_low[k]:.4g}, {self.ci_high[k]:.4g}]':>24}"
            )
        lines += ["", f"{'metric':<28} {'target':>10} {'simulated':>10} {'gap / scale':>12}"]
        for k, t in self.targets.items():
            gap = (self.simulated[k] - t) / self.scales[k]
            lines.append(f"{k:<28} {t:>10.4g} {self.simulated[k]:>10.4g} {gap:>12.3f}")
        lines += [
            "",
            f"achieved distance {self.distance:.4g} (sum of squared scaled gaps); {self.message}",
        ]
        if self.path is not None:
            lines.append(f"results: {self.path}")
        lines.append(
            caution(
                "the spec's curve family, network, clearing rule and drift, the tuned ranges, "
                "a distance on replicate means, and intervals from a local linearisation"
            )
        )
        return "\n".join(lines)


class _Evaluator:
    """Runs candidate batches through run_plans on one open backend; caches by value."""

    def __init__(self, spec, paths, metrics, replicates, out, backend) -> None:
        self.spec = spec
        self.paths = paths
        self.metrics = metrics
        self.replicates = replicates
        self.out = Path(out)
        self.backend = backend
        self.batches = 0
        self.cache: dict[tuple, Any] = {}  # values -> (R, M) array of metrics
        self.rows: list[dict[str, Any]] = []

    def run(self, points: Sequence[Sequence[float]], stage: str) -> list[np.ndarray]:
        from propensim.experiments.runner import run_plans
        from propensim.experiments.spec import load_spec
        from propensim.experiments.store import load

        keys = [tuple(float(v) for v in p) for p in points]
        new = list(dict.fromkeys(k for k in keys if k not in self.cache))
        if new:
            doc = self.spec.resolved()
            doc.pop("arms", None)
            doc.pop("compare", None)
            doc["experiment"]["replicates"] = self.replicates
            doc["design"] = {
                "kind": "points",
                "points": [dict(zip(self.paths, k, strict=True)) for k in new],
                "max_runs": len(new) * self.replicates,
            }
            batch_spec = load_spec(doc)
            plans = [
                # common random numbers: replicate r of every candidate shares one seed
                dataclasses.replace(p, seed_key=(TUNE_SPAWN_KEY, p.replicate))
                for p in batch_spec.runs()
            ]
            folder = self.out / "batches" / f"{self.batches:04d}"
            self.batches += 1
            store = run_plans(
                plans,
                folder,
                name=f"{self.spec.name}-tuning-{self.batches - 1:04d}",
                metrics=list(self.spec.metrics),
                progress=False,
                backend=self.backend,
            )
            runs = load(store.path).runs
            failed = runs[runs["status"] != "ok"]
            if len(failed):
                first = failed.iloc[0]
                raise RuntimeError(
                    f"{len(failed)} tuning run(s) failed in {folder} "
                    f"({first['error_type']}: {first['error_message']})"
                )
            for i, k in enumerate(new):
                rows = runs[runs["point"] == i].sort_values("replicate")
                self.cache[k] = rows[self.metrics].to_numpy(dtype=float)
        out = []
        for k in keys:
            values = self.cache[k]
            out.append(values)
            self.rows.append({"stage": stage, **dict(zip(self.paths, k, strict=True))})
            self.rows[-1].update(
                {m: float(v) for m, v in zip(self.metrics, values.mean(0), strict=True)}
            )
        return out


def tune_market(
    spec,
    targets: Mapping[str, float | tuple[float, float]] | Sequence[str],
    params: Mapping[str, tuple[float, float]] | Sequence[str],
    *,
    replicates: int = 8,
    initial: int | None = None,
    max_evals: int = 100,
    target_runs: int = 1,
    out=None,
    workers: int | None = None,
    scheduler: str | None = None,
    dask_local: int | None = None,
    overrides: Sequence[str] = (),
    seed: int | None = None,
) -> TuningResult:
    """Fit spec fields so that simulated summary metrics match targets.

    Parameters
    ----------
    spec : Spec, str, Path or mapping
        The market (a spec without ``[[arms]]``); its ``collect.metrics`` must include every
        target.
    targets : mapping or sequence of str
        ``{"price_sd": 4.2}``, ``{"price_sd": (4.2, 0.3)}`` (value and SD), or the command's
        ``["price_sd=4.2:0.3", ...]``.
    params : mapping or sequence of str
        ``{"population.sigma": (2, 12)}`` or ``["population.sigma=2:12", ...]``: fields to tune
        (dotted spec paths) and their ranges.
    replicates : int
        Runs per candidate (common random numbers: the same seeds for every candidate).
    initial : int, optional
        Latin-hypercube candidates before refining (default ``max(8, 4 x parameters)``).
    max_evals : int
        Nelder-Mead candidate limit (the fit is reported not converged if it is reached).
    target_runs : int
        Targets without an SD are the mean of this many observed markets (for the intervals).
    out : str or Path, optional
        Results folder (default ``./results/<spec name>-tuning``): ``batches/NNNN`` (one
        experiment folder per candidate batch), ``candidates.parquet``, ``estimates.parquet``,
        ``manifest.json``.
    workers, scheduler, dask_local
        Backend, as for :func:`~propensim.experiments.runner.run_experiment`; opened once.
    overrides : sequence of str
        ``--set`` changes to the spec.
    seed : int, optional
        Seed of the Latin hypercube (default: the spec's seed).

    Returns
    -------
    TuningResult

    Raises
    ------
    CalibrationError
        A target naming a metric the spec does not collect, bad ranges, a spec with arms.
    """
    from scipy.optimize import minimize
    from scipy.stats import qmc

    from propensim.experiments.runner import _as_spec, open_backend

    t0 = time.perf_counter()
    spec = _as_spec(spec, overrides)
    if spec.arms:
        raise CalibrationError("arms: tuning needs a spec without [[arms]] (one market)")
    tgt = _targets(targets)
    rng_params = _params(params)
    collected = list(spec.metrics)
    for m in tgt:
        if m not in collected:
            raise CalibrationError(
                f"--target {m!r}: the spec does not collect this metric; collected: "
                f"{', '.join(collected)} (add it to collect.metrics)"
            )
    for name, value in (("replicates", replicates), ("max_evals", max_evals)):
        if not isinstance(value, int) or value < (2 if name == "replicates" else 1):
            low = 2 if name == "replicates" else 1
            raise CalibrationError(f"--{name.replace('_', '-')} must be a whole number >= {low}")
    paths = list(rng_params)
    d = len(paths)
    if not d:
        raise CalibrationError("--param: give at least one field to tune (PATH=LOW:HIGH)")
    if len(tgt) < d:
        raise CalibrationError(
            f"--target: {len(tgt)} target(s) cannot pin down {d} parameters; give at least {d}"
        )
    metrics = list(tgt)
    lo = np.array([rng_params[p][0] for p in paths])
    hi = np.array([rng_params[p][1] for p in paths])
    n_init = initial if initial is not None else max(8, 4 * d)
    out = Path(out) if out is not None else Path("results") / f"{spec.name}-tuning"
    t_vec = np.array([tgt[m][0] for m in metrics])
    given_sd = [tgt[m][1] for m in metrics]

    def to_values(u):
        return lo + np.clip(np.asarray(u, dtype=float), 0.0, 1.0) * (hi - lo)

    with open_backend(workers=workers, scheduler=scheduler, dask_local=dask_local) as backend:
        ev = _Evaluator(spec, paths, metrics, replicates, out, backend)
        sampler = qmc.LatinHypercube(d=d, seed=np.random.default_rng(seed or spec.seed))
        design_u = sampler.random(n_init)  # shape: (n_init, d)
        design = ev.run([to_values(u) for u in design_u], "design")
        pooled = np.sqrt(np.mean([np.var(v, axis=0, ddof=1) for v in design], axis=0))
        scales = np.array(
            [sd if sd is not None else (pooled[j] or 1.0) for j, sd in enumerate(given_sd)]
        )

        def distance(values_rm):
            return float(np.sum(((values_rm.mean(0) - t_vec) / scales) ** 2))

        for row, v in zip(ev.rows[-len(design) :], design, strict=True):
            row["distance"] = distance(v)
        best = int(np.argmin([distance(v) for v in design]))
        start = design_u[best]
        step = 0.5 / n_init ** (1.0 / d)  # about the design's spacing
        simplex = [start] + [
            np.clip(start + step * np.eye(d)[i] * (1 if start[i] < 0.5 else -1), 0, 1)
            for i in range(d)
        ]

        def objective(u):
            vals = ev.run([to_values(u)], "refine")[0]
            ev.rows[-1]["distance"] = distance(vals)
            return distance(vals)

        res = minimize(
            objective,
            start,
            method="Nelder-Mead",
            bounds=[(0.0, 1.0)] * d,
            options={
                "initial_simplex": np.array(simplex),
                "maxfev": max_evals,
                "xatol": XATOL,
                "fatol": FATOL,
            },
        )
        fit_u = np.clip(res.x, 0.0, 1.0)
        fit = to_values(fit_u)
        at_fit = ev.run([fit], "fit")[0]
        # curvature: central differences of the moments (CRN keeps them smooth)
        h = 0.05 * (hi - lo)
        pts = []
        for k in range(d):
            up, dn = fit.copy(), fit.copy()
            up[k] = min(fit[k] + h[k], hi[k])
            dn[k] = max(fit[k] - h[k], lo[k])
            pts += [up, dn]
        around = ev.run(pts, "curvature")
    g = np.empty((len(metrics), d))  # shape: (metrics, params)
    for k in range(d):
        up, dn = pts[2 * k], pts[2 * k + 1]
        g[:, k] = (around[2 * k].mean(0) - around[2 * k + 1].mean(0)) / (up[k] - dn[k])
    w = np.diag(1.0 / scales**2)
    omega = np.atleast_2d(np.cov(at_fit, rowvar=False, ddof=1))
    omega_target = np.diag(
        [sd**2 if sd is not None else omega[j, j] / target_runs for j, sd in enumerate(given_sd)]
    )
    if any(sd is None for sd in given_sd):  # correlations of unspecified targets: from Omega
        free = [j for j, sd in enumerate(given_sd) if sd is None]
        omega_target[np.ix_(free, free)] = omega[np.ix_(free, free)] / target_runs
    v = omega_target + omega / replicates
    bread = g.T @ w @ g
    try:
        a = np.linalg.inv(bread)
        cov = a @ g.T @ w @ v @ w @ g @ a
        se = np.sqrt(np.clip(np.diag(cov), 0.0, None))
        curvature_ok = bool(np.all(np.isfinite(se)) and np.linalg.cond(bread) < 1e12)
    except np.linalg.LinAlgError:
        se = np.full(d, np.nan)
        curvature_ok = False
    nm_ok = bool(res.success)
    converged = nm_ok and curvature_ok
    if converged:
        message = f"converged (Nelder-Mead: {res.nfev} candidates)"
    elif not nm_ok:
        message = (
            f"did not converge: Nelder-Mead stopped after {res.nfev} candidates ({res.message})"
        )
    else:
        message = "did not converge: the metrics do not change with the parameters at the fit"
    import pandas as pd

    result = TuningResult(
        params={p: float(x) for p, x in zip(paths, fit, strict=True)},
        se={p: float(s) for p, s in zip(paths, se, strict=True)},
        ci_low={p: float(x - Z95 * s) for p, x, s in zip(paths, fit, se, strict=True)},
        ci_high={p: float(x + Z95 * s) for p, x, s in zip(paths, fit, se, strict=True)},
        distance=distance(at_fit),
        targets={m: float(t) for m, t in zip(metrics, t_vec, strict=True)},
        scales={m: float(s) for m, s in zip(metrics, scales, strict=True)},
        simulated={m: float(x) for m, x in zip(metrics, at_fit.mean(0), strict=True)},
        candidates=pd.DataFrame(ev.rows),
        evaluations=len(ev.cache),
        converged=converged,
        message=message,
        replicates=replicates,
        seconds=time.perf_counter() - t0,
    )
    result.path = _save(result, out, spec, paths, lo, hi, target_runs)
    return result


def _targets(targets) -> dict[str, tuple[float, float | None]]:
    out: dict[str, tuple[float, float | None]] = {}
    items = (
        [parse_target(t) for t in targets]
        if not isinstance(targets, Mapping)
        else [(k, *(v if isinstance(v, tuple | list) else (v, None))) for k, v in targets.items()]
    )
    if not items:
        raise CalibrationError("--target: give at least one target (METRIC=VALUE)")
    for name, value, sd in items:
        if name in out:
            raise CalibrationError(f"--target {name!r}: given twice")
        out[name] = (float(value), None if sd is None else float(sd))
    return out


def _params(params) -> dict[str, tuple[float, float]]:
    items = (
        [parse_param(p) for p in params]
        if not isinstance(params, Mapping)
        else [(k, float(v[0]), float(v[1])) for k, v in params.items()]
    )
    out: dict[str, tuple[float, float]] = {}
    for path, lo, hi in items:
        if not lo < hi:
            raise CalibrationError(f"--param {path!r}: need LOW < HIGH")
        if path in out:
            raise CalibrationError(f"--param {path!r}: given twice")
        out[path] = (lo, hi)
    return out


def _save(result: TuningResult, out, spec, paths, lo, hi, target_runs) -> Path:
    cand = result.candidates
    cols = {"stage": "str", **{p: "float" for p in paths}}
    cols |= {m: "float" for m in result.targets} | {"distance": "float"}
    rows = [
        {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in r.items()}
        for r in cand.to_dict("records")
    ]
    est_cols = {"parameter": "str", "estimate": "float", "se": "float"}
    est_cols |= {"ci_low": "float", "ci_high": "float", "low": "float", "high": "float"}
    est_rows = [
        {
            "parameter": p,
            "estimate": result.params[p],
            "se": result.se[p],
            "ci_low": result.ci_low[p],
            "ci_high": result.ci_high[p],
            "low": float(lo[i]),
            "high": float(hi[i]),
        }
        for i, p in enumerate(paths)
    ]
    manifest = {
        "spec_name": spec.name,
        "spec": spec.resolved(),
        "targets": result.targets,
        "scales": result.scales,
        "simulated": result.simulated,
        "distance": result.distance,
        "replicates": result.replicates,
        "target_runs": target_runs,
        "evaluations": result.evaluations,
        "converged": result.converged,
        "message": result.message,
        "seconds": round(result.seconds, 3),
    }
    return write_folder(
        out,
        "tuning",
        manifest,
        {"candidates": (rows, cols), "estimates": (est_rows, est_cols)},
    )


def tune_from_cli(args) -> int:
    """``propensim tune`` (called by the command line)."""
    import sys

    from propensim.experiments.runner import prestart_workers

    if args.scheduler is None:
        prestart_workers(args.workers)
    result = tune_market(
        args.spec,
        args.target,
        args.param,
        replicates=args.replicates,
        initial=args.initial,
        max_evals=args.max_evals,
        target_runs=args.target_runs,
        out=args.out,
        workers=args.workers,
        scheduler=args.scheduler,
        overrides=args.overrides,
    )
    print(result.format())
    if not result.converged:
        print(f"propensim: error: tuning {result.message}", file=sys.stderr)
        return 1
    return 0
