"""What researchers run: spec files, designs, sweeps, the results store, comparisons, the CLI.

Imports every other layer. Names load on first use, so importing it is cheap.

Examples
--------
>>> from propensim.experiments import run_experiment, load  # doctest: +SKIP
>>> store = run_experiment("sweep.toml", workers=4)  # doctest: +SKIP
>>> load(store.path).runs.groupby("arm")["efficiency"].mean()  # doctest: +SKIP
"""

from propensim.agents._lazy import lazy_exports

_NAMES = {
    "RunPlan": "plan",
    "canonical_json": "plan",
    "Spec": "spec",
    "SpecError": "spec",
    "load_spec": "spec",
    "design_points": "designs",
    "RunResult": "runner",
    "SweepStopped": "runner",
    "BackendError": "runner",
    "run_one": "runner",
    "run_batch": "runner",
    "run_plans": "runner",
    "run_experiment": "runner",
    "Store": "store",
    "StoreError": "store",
    "Results": "store",
    "load": "store",
    "query": "store",
    "compare_arms": "compare",
    "compare_folder": "compare",
    "bootstrap_mean_ci": "compare",
    "point_table": "tables",
    "paired_point_table": "tables",
    "write_report": "report",
    "render_report": "report",
    "run_sensitivity": "sensitivity",
    "describe_spec": "describe",
    "calibrate": "calibrate_api",
    "fit_returns": "calibrate_api",
    "fit_acceptance": "calibrate_api",
    "recover_curves": "calibrate_api",
    "tune_market": "calibrate_api",
    "CalibrationError": "calibrate_api",
    "Backend": "runner",
    "open_backend": "runner",
}

__all__ = sorted(_NAMES)

__getattr__, __dir__ = lazy_exports(__name__, _NAMES)
