"""The ``propensim`` command line.

Commands: ``run``, ``check``, ``compare``, ``query``, ``plugins``, ``demo``, ``pair``,
``calibrate``, ``acceptance``, ``tune``.
Exit codes: 0 success; 1 some runs failed or the sweep stopped; 2 bad input (invalid spec, unknown
plugin, unusable results folder, bad arguments), reported as one line ``propensim: error: ...``
on stderr. Anything unexpected still shows its traceback.

Start-up is kept fast: ``propensim --help`` imports nothing heavy, and ``propensim check`` builds
its pilot with the array engine, which does not import Mesa or Dask.
"""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Sequence
from pathlib import Path

CAUTION = (
    "Caution: these are model outputs, not investment or policy advice. They follow from the "
    "assumptions that drive them: the shape of the propensity curves, the trading network, the "
    "clearing rule, the drift, and invented data."
)

#: Errors that mean bad input (exit 2), by the module that defines them; looked up only in
#: modules already imported, so catching them imports nothing.
_INPUT_ERRORS = {
    "propensim.experiments.spec": "SpecError",
    "propensim.plugins.registry": "UnknownPluginError",
    "propensim.experiments.store": "StoreError",
    "propensim.experiments.runner": "BackendError",
    "propensim.experiments.calibrate_base": "CalibrationError",
    "propensim.experiments.report": "ReportError",
    "propensim.experiments.sensitivity": "SensitivityError",
    "propensim.experiments.new_plugin": "NewPluginError",
    "propensim.experiments.local_plugins": "LocalPluginError",
}


class InputError(ValueError):
    """Bad input found by the command line itself."""


def _dash_hint(message: str, argv) -> str:
    """Name a value that argparse took for an option because it starts with '-'."""
    words = list(sys.argv[1:] if argv is None else argv)
    dashed = [w for w in words if w.startswith("-") and not w.startswith("--") and len(w) > 1]
    dashed = [w for w in dashed if not (len(w) == 2 and w[1].isalpha())]  # -h and friends
    if not dashed or "required" not in message:
        return message
    return (
        f"{message}; {dashed[0]!r} starts with '-' and was read as an option: "
        f"write ./{dashed[0]} for a folder or file"
    )


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line, exit 2, no usage block
        raise InputError(f"{message} (see propensim --help)")


def _version() -> str:
    from importlib import metadata

    try:
        return metadata.version("propensim")
    except metadata.PackageNotFoundError:
        return "unknown"


def _one_line(text) -> str:
    return " ".join(str(text).split())


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {text!r}")
    return value


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for documentation tools)."""
    p = _Parser(
        prog="propensim",
        description="Agent-based markets of traders described by propensity curves: "
        "run seeded sweeps, compare clearing rules, query the results.",
    )
    p.add_argument("--version", action="version", version=f"propensim {_version()}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    def add_set(q):
        q.add_argument(
            "--set",
            dest="overrides",
            action="append",
            default=[],
            metavar="PATH=VALUE",
            help="change a spec field, e.g. --set population.sigma=4 (repeatable)",
        )

    q = sub.add_parser("run", help="run every run of a spec into a results folder")
    q.add_argument("spec", help="spec file (TOML)")
    q.add_argument("--out", help="results folder (default ./results/<experiment name>)")
    add_set(q)
    q.add_argument("--workers", type=_positive_int, help="local worker processes (default: CPUs)")
    g = q.add_mutually_exclusive_group()
    g.add_argument("--scheduler", metavar="ADDR", help="run on a Dask scheduler (tcp://host:port)")
    g.add_argument(
        "--dask-local",
        type=_positive_int,
        metavar="N",
        help="run on a local Dask cluster of N worker processes",
    )
    q.add_argument("--fail-fast", action="store_true", help="stop at the first failed run")
    q.add_argument("--quiet", action="store_true", help="no progress bar")

    q = sub.add_parser("check", help="validate a spec, count its runs and estimate the time")
    q.add_argument("spec", help="spec file (TOML)")
    add_set(q)
    q.add_argument("--workers", type=_positive_int, help="workers to estimate for (default: CPUs)")
    q.add_argument("--points", action="store_true", help="list the design points it will run")

    q = sub.add_parser("compare", help="paired comparison of the arms in a results folder")
    q.add_argument("folder", help="results folder")
    q.add_argument("--metric", action="append", default=[], help="metric (repeatable)")
    q.add_argument("--baseline", help="arm to compare against (default: the spec's)")
    q.add_argument("--by-point", action="store_true", help="also one row per design point")
    q.add_argument(
        "--csv", help="also write the table to this CSV file (the folder is never written)"
    )

    q = sub.add_parser("query", help="run SQL (DuckDB) over a results folder")
    q.add_argument("folder", help="results folder")
    q.add_argument("sql", help='e.g. "SELECT arm, avg(efficiency) FROM runs GROUP BY arm"')

    sub.add_parser("plugins", help="list every registered plugin by kind")
    q = sub.add_parser("new-plugin", help="write an installable package holding a new plugin")
    q.add_argument("kind", metavar="KIND", help="clearing, drift, metrics, networks, curves, ...")
    q.add_argument("name", metavar="NAME", help="a Python identifier: package and plugin name")
    q.add_argument("--per-agent", action="store_true", help="clearing/drift: trader by trader")
    q.add_argument("--dir", help="the folder to create (default: ./NAME; must not exist)")

    q = sub.add_parser("demo", help="run the shipped demo experiment (growers and kitchens)")
    q.add_argument("--out", help="results folder (default ./results/<demo name>)")
    q.add_argument("--workers", type=_positive_int, help="local worker processes (default: CPUs)")
    q.add_argument("--quiet", action="store_true", help="no progress bar")

    _add_report_parsers(sub, add_set)

    q = sub.add_parser("pair", help="one buyer meets one seller: the worked example as a table")
    for name, default in (
        ("buyer-mu", 95.0),
        ("buyer-sigma", 6.0),
        ("seller-mu", 105.0),
        ("seller-sigma", 8.0),
        ("gamma", 1.0),
    ):
        q.add_argument(f"--{name}", type=float, default=default, help=f"(default {default})")
    q.add_argument("--levels", type=int, default=3, help="oscillator levels to show (default 3)")
    _add_calibration_parsers(sub)
    return p


def _add_calibration_parsers(sub) -> None:
    """``calibrate``, ``acceptance`` and ``tune`` (see propensim.experiments.calibrate)."""
    q = sub.add_parser(
        "calibrate", help="fit oscillator-level mixtures, normal and Student-t to a price series"
    )
    q.add_argument("data", help="CSV or Parquet file")
    q.add_argument("--column", required=True, help="column of prices (or returns, --returns)")
    q.add_argument("--returns", action="store_true", help="the column holds log returns")
    q.add_argument("--max-level", type=int, default=2, help="highest level K, 1..8 (default 2)")
    q.add_argument("--starts", type=int, default=8, help="starts per model (default 8)")
    q.add_argument("--seed", type=int, default=20261202, help="seed of the starting points")
    q.add_argument("--max-iter", type=int, default=2000, help="iterations per start (default 2000)")
    q.add_argument("--out", help="results folder (default ./results/calibrate-<file>-<column>)")

    q = sub.add_parser("acceptance", help="fit propensity curves to accept/reject observations")
    q.add_argument("data", help="CSV or Parquet file")
    q.add_argument("--price", default="price", help="column of offered prices (default price)")
    q.add_argument("--accepted", default="accepted", help="column of 0/1 outcomes")
    q.add_argument("--family", choices=("logistic", "normal"), default="logistic")
    q.add_argument("--side", choices=("buyer", "seller"), default="buyer")
    q.add_argument("--activity", default="1", help="curve height in (0, 1], or 'fit'")
    q.add_argument(
        "--meetings",
        action="store_true",
        help="DATA is a meetings table (round, buyer, seller, price, traded): one curve per unit",
    )
    q.add_argument("--by", default="trader", help="with --meetings: trader, or a column suffix")
    q.add_argument("--out", help="results folder (default ./results/acceptance-<file>)")

    q = sub.add_parser("tune", help="fit market parameters to target metrics (simulated moments)")
    q.add_argument("spec", help="spec file (TOML): the market to tune")
    q.add_argument(
        "--target",
        action="append",
        default=[],
        metavar="METRIC=VALUE[:SD]",
        help="target of a collected metric, optionally with its sd (repeatable)",
    )
    q.add_argument(
        "--param",
        action="append",
        default=[],
        metavar="PATH=LOW:HIGH",
        help="spec field to tune and its range, e.g. population.sigma=2:12 (repeatable)",
    )
    q.add_argument("--replicates", type=int, default=8, help="runs per candidate (default 8)")
    q.add_argument("--initial", type=int, help="first-design candidates (default 8 x params)")
    q.add_argument("--max-evals", type=int, default=100, help="refinement candidates (default 100)")
    q.add_argument(
        "--target-runs",
        type=_positive_int,
        default=1,
        help="targets without an SD are means of this many observed markets (default 1)",
    )
    q.add_argument("--out", help="results folder (default ./results/<name>-tuning)")
    q.add_argument("--workers", type=_positive_int, help="local worker processes (default: CPUs)")
    q.add_argument("--scheduler", metavar="ADDR", help="run on a Dask scheduler")
    add = q.add_argument
    add("--set", dest="overrides", action="append", default=[], metavar="PATH=VALUE")


def _add_report_parsers(sub, add_set) -> None:
    """``report``, ``sensitivity`` and ``describe`` (see propensim.experiments.report)."""
    q = sub.add_parser("report", help="write one self-contained HTML report of a results folder")
    q.add_argument("folder", help="results folder")
    q.add_argument("--out", help="HTML file (default FOLDER/report.html); CSV tables beside it")
    q.add_argument("--figures", metavar="DIR", help="also write every figure as PNG and SVG")

    q = sub.add_parser(
        "sensitivity", help="Sobol' indices (Saltelli sampling) or Morris screening of a spec"
    )
    q.add_argument("spec", help="spec file (TOML) whose design.parameters are ranges")
    q.add_argument("--method", choices=("sobol", "morris"), default="sobol")
    q.add_argument(
        "--samples",
        type=_positive_int,
        default=256,
        help="base samples N (Sobol': N x (params + 2) points; a power of 2) or Morris "
        "trajectories (default 256)",
    )
    q.add_argument("--levels", type=_positive_int, default=4, help="Morris grid levels (4)")
    q.add_argument("--metric", action="append", default=[], help="metric (repeatable)")
    q.add_argument("--out", help="results folder (default ./results/<name>-sensitivity)")
    add_set(q)
    q.add_argument("--workers", type=_positive_int, help="local worker processes (default: CPUs)")
    q.add_argument("--scheduler", metavar="ADDR", help="run on a Dask scheduler (tcp://host:port)")
    q.add_argument("--no-report", action="store_true", help="do not write report.html")
    q.add_argument("--quiet", action="store_true", help="no progress bar")

    q = sub.add_parser("describe", help="describe a spec's model under the ODD protocol (Markdown)")
    q.add_argument("spec", help="spec file (TOML)")
    add_set(q)
    q.add_argument("--out", help="Markdown file to write (default: print it)")


# -- commands ------------------------------------------------------------------------------
def _print_warnings(caught) -> None:
    for msg in dict.fromkeys(_one_line(w.message) for w in caught):
        print(f"propensim: warning: {msg}", file=sys.stderr)


def _sweep(spec, out, *, workers, scheduler=None, dask_local=None, fail_fast=False, quiet=False):
    import warnings

    from propensim.experiments.runner import SweepStopped, run_experiment

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            store = run_experiment(
                spec,
                out,
                workers=workers,
                scheduler=scheduler,
                dask_local=dask_local,
                fail_fast=fail_fast,
                progress=False if quiet else None,
            )
        except SweepStopped as exc:
            _print_warnings(caught)
            print(f"propensim: error: {_one_line(exc)}", file=sys.stderr)
            return None, 1
    _print_warnings(caught)
    counts = store.counts()
    if store.comparison is not None:
        from propensim.experiments.compare import format_table

        print(format_table(store.comparison))
        print()
    print(CAUTION)
    print()
    line = f"{counts['runs']} runs: {counts['ok']} ok, {counts['failed']} failed"
    if counts["failed"]:
        line += f" (errors in {store.path / 'failures.parquet'})"
    print(line)
    print(f"results: {store.path}")
    return store, 1 if counts["failed"] else 0


def cmd_run(args) -> int:
    """``propensim run``."""
    if args.scheduler is None:  # first: its imports overlap importing and reading the spec
        from propensim.experiments.runner import prestart_workers

        prestart_workers(args.workers, args.dask_local)
    from propensim.experiments.spec import load_spec

    spec = load_spec(args.spec, args.overrides)
    _, code = _sweep(
        spec,
        args.out,
        workers=args.workers,
        scheduler=args.scheduler,
        dask_local=args.dask_local,
        fail_fast=args.fail_fast,
        quiet=args.quiet,
    )
    return code


def pilot_seconds(plans, budget: float = 0.05) -> tuple[float, int]:
    """Estimate the wall-clock seconds of one run from short pilots of the first plan per arm.

    The first market is built twice (the first build pays one-time imports); each pilot runs one
    warm-up round, then times rounds until its share of ``budget`` seconds or the plan's rounds
    are used up; the estimate is build time + rounds x time per round. Uses the array engine
    on numpy alone (no Mesa or numba import, so ``check`` starts fast; the compiled kernels give
    the same numbers and are as fast or faster, so the estimate errs long). Worker start-up (a few
    seconds per process) is not included.

    Returns
    -------
    (float, int)
        Mean estimated seconds per run over the pilots, and rounds timed.
    """
    import os
    import warnings

    from propensim.experiments.runner import _market_config
    from propensim.markets.build import build_market

    firsts = list({p.arm: p for p in reversed(plans)}.values())[::-1][:8]
    saved = os.environ.get("PROPENSIM_KERNELS")
    os.environ["PROPENSIM_KERNELS"] = "numpy"  # markets choose their kernels when built
    try:
        return _pilots(firsts, budget, build_market, _market_config, warnings)
    finally:
        if saved is None:
            os.environ.pop("PROPENSIM_KERNELS", None)
        else:
            os.environ["PROPENSIM_KERNELS"] = saved


def _pilots(firsts, budget, build_market, _market_config, warnings) -> tuple[float, int]:
    """The pilots of :func:`pilot_seconds` (its first plan per arm)."""
    estimates, timed_total = [], 0
    for i, plan in enumerate(firsts):
        config = _market_config(plan)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if i == 0:
                build_market(config, plan.seed, mesa=False)
            t0 = time.perf_counter()
            market = build_market(config, plan.seed, mesa=False)
            build = time.perf_counter() - t0
        if plan.rounds == 0:
            estimates.append(build)
            continue
        market.step()
        timed, t0 = 0, time.perf_counter()
        while timed < plan.rounds - 1 and time.perf_counter() - t0 < budget / len(firsts):
            market.step()
            timed += 1
        per_round = (time.perf_counter() - t0) / timed if timed else 0.0
        timed_total += timed
        estimates.append(build + plan.rounds * per_round)
    return (sum(estimates) / len(estimates) if estimates else 0.0), timed_total


def _duration(seconds: float) -> str:
    if seconds < 90:
        return f"{seconds:.0f} s" if seconds >= 10 else f"{seconds:.1f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def cmd_check(args) -> int:
    """``propensim check``."""
    import warnings

    from propensim.experiments.runner import available_cpus
    from propensim.experiments.spec import load_spec

    spec = load_spec(args.spec, args.overrides)
    plans = spec.runs()
    distinct = len({p.run_id for p in plans})
    arms = list(spec.arm_names)
    print(
        f"{spec.name}: spec is valid; {spec.n_runs} runs"
        + (f" ({distinct} distinct)" if distinct != spec.n_runs else "")
        + (f", arms: {', '.join(arms)}" if len(arms) > 1 else "")
    )
    if args.points:
        import pandas as pd

        from propensim.experiments.tables import design_table

        with pd.option_context("display.max_rows", None, "display.width", 200):
            print(design_table(spec).to_string(index=False))
    if spec.design.get("kind") == "sobol":
        print(
            "note: design kind 'sobol' spreads points evenly (a low-discrepancy sequence); it is "
            "not the sampling Sobol' sensitivity indices need: use propensim sensitivity"
        )
    if not plans:
        return 0
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            per_run, _ = pilot_seconds(plans)
        except Exception as exc:  # the pilot is a real run: its failure is the spec's problem
            raise InputError(f"pilot run failed: {type(exc).__name__}: {_one_line(exc)}") from None
    _print_warnings(caught)
    workers = args.workers or available_cpus()
    total = per_run * distinct / min(workers, distinct)
    print(
        f"estimated time: about {_duration(total)} on {min(workers, distinct)} worker(s) "
        f"(~{per_run * 1000:.0f} ms per run, from a short pilot)"
        + (", plus a few seconds to start the worker processes" if workers > 1 else "")
    )
    return 0


def cmd_compare(args) -> int:
    """``propensim compare``: paired differences, plain statements, who gains and who loses.

    Reads the results folder and never writes into it; ``--csv FILE`` saves the table.
    """
    from propensim.experiments.compare import compare_folder, format_table, statements
    from propensim.experiments.store import StoreError, atomic_write_bytes, load

    if args.baseline is not None and not args.baseline.strip():
        runs = load(Path(args.folder)).runs
        arms = ", ".join(dict.fromkeys(runs["arm"])) if len(runs) else "none stored yet"
        raise InputError(f"--baseline is empty; allowed: one of the arms ({arms})")
    target = Path(args.csv) if args.csv else None
    if target is not None and ("\x00" in args.csv or target.is_dir() or not args.csv.strip()):
        raise InputError(
            f"--csv {args.csv!r}: not a file name to write (a folder, blank, or a NUL in it); "
            "allowed: a CSV file path outside the results folder"
        )
    try:
        table = compare_folder(
            args.folder, args.metric or None, args.baseline, by_point=args.by_point
        )
        groups = _group_table(args.folder, args.baseline)
    except StoreError:
        raise
    except ValueError as exc:  # bad metric, baseline or folder content: the user's input
        raise InputError(_one_line(exc)) from None
    print(format_table(table))
    print()
    for line in statements(table):
        print(f"- {line}")
    if groups is not None:
        from propensim.experiments.gains import format_groups, group_statements

        print()
        print("Who gains and who loses (surplus per group over a run, paired by trader):")
        print(format_groups(groups))
        print()
        for line in group_statements(groups):
            print(f"- {line}")
    print()
    print(CAUTION)
    if target is not None:
        try:
            atomic_write_bytes(target, table.to_csv(index=False).encode())
        except OSError as exc:
            why = exc.strerror or exc
            raise InputError(f"--csv {args.csv!r}: cannot write it: {why}") from None
        print(f"written: {target}")
    return 0


def _group_table(folder, baseline):
    """Per-group surplus differences when the store holds per-trader totals, else None."""
    from propensim.experiments.compare import settings_from_manifest
    from propensim.experiments.gains import compare_groups
    from propensim.experiments.store import load

    results = load(Path(folder))
    totals = results.totals
    if totals is None or len(totals) == 0:
        return None
    settings = settings_from_manifest(results.manifest, results.runs)
    return compare_groups(
        results.runs,
        totals,
        baseline or settings["baseline"],
        confidence=settings["confidence"],
        bootstrap=settings["bootstrap"],
    )


def cmd_query(args) -> int:
    """``propensim query``."""
    import pandas as pd

    from propensim.experiments.compare import format_frame
    from propensim.experiments.store import query

    frame = query(args.folder, args.sql)
    with pd.option_context("display.max_columns", None, "display.width", 200):
        print(format_frame(frame))  # one format per column, float noise as 0
    return 0


def cmd_plugins(args) -> int:
    """``propensim plugins``."""
    from propensim.plugins.registry import describe

    rows = describe()
    width = max((len(n) for _, n, _ in rows), default=0)
    kind = None
    for k, name, text in rows:
        if k != kind:
            print(("" if kind is None else "\n") + f"{k}:")
            kind = k
        if k == "metrics":  # what a number means: its unit, and how a run sums up its rounds
            from propensim.plugins.metrics import describe_metric
            from propensim.plugins.registry import get_plugin

            text = describe_metric(get_plugin(k, name))
        print(f"  {name:<{width}}  {text}")
    return 0


def demo_spec_path() -> Path:
    """The shipped demo spec (package data)."""
    from importlib import resources

    return Path(str(resources.files("propensim.experiments") / "examples" / "demo.toml"))


def cmd_demo(args) -> int:
    """``propensim demo``."""
    from propensim.experiments.spec import load_spec

    spec = load_spec(demo_spec_path())
    print(f"demo: {spec.name}: {spec.n_runs} runs", file=sys.stderr)
    print(
        "Growers (sellers) and kitchens (buyers) in three towns; propensity matching against a "
        "uniform-price call auction, at three levels of price uncertainty (curve width sigma).\n"
    )
    store, code = _sweep(spec, args.out, workers=args.workers, quiet=args.quiet)
    if store is not None:
        from propensim.experiments.compare import point_means
        from propensim.experiments.store import load

        params = list(spec.design.get("parameters") or {})
        metrics = list(spec.compare.metrics) if spec.compare else spec.metrics
        table = point_means(load(store.path).runs, metrics, params)
        print("\nMeans per design point and arm (paired differences above):")
        from propensim.experiments.compare import format_frame

        print(format_frame(table))
        report = _write_report(store.path)
        if report is not None:
            print(f"report: {report}")
    print(CAUTION)
    return code


def cmd_pair(args) -> int:
    """``propensim pair``."""
    import math

    from propensim.experiments.pair import PairExample, pair_table

    for name in ("buyer-mu", "buyer-sigma", "seller-mu", "seller-sigma", "gamma"):
        value = getattr(args, name.replace("-", "_"))
        if not math.isfinite(value):
            raise InputError(f"--{name}: must be a finite number, got {value}")
        if name.endswith("sigma") and value <= 0:
            raise InputError(f"--{name}: must be > 0 (a curve's width), got {value:g}")
    ex = PairExample(
        buyer_mu=args.buyer_mu,
        buyer_sigma=args.buyer_sigma,
        seller_mu=args.seller_mu,
        seller_sigma=args.seller_sigma,
        gamma=args.gamma,
        levels=args.levels,
    )
    try:
        table = pair_table(ex)
    except ValueError as exc:  # e.g. gamma or levels out of the range the curves allow
        raise InputError(f"pair: {_one_line(exc)}") from None
    print(table)
    return 0


def _write_report(folder, out=None, figures=None):
    """Write the HTML report; None (with a warning) when the report extra is not installed."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        print(
            "propensim: warning: no report written: install the extra, pip install "
            "'propensim[report]'",
            file=sys.stderr,
        )
        return None
    from propensim.experiments.report import write_report

    return write_report(folder, out, figures_dir=figures).path


def cmd_report(args) -> int:
    """``propensim report``."""
    from propensim.experiments.report import write_report

    result = write_report(args.folder, args.out, figures_dir=args.figures)
    for line in result.missing:
        print(f"missing: {line}")
    print(f"figures: {', '.join(result.figures) or 'none'}")
    for path in result.tables:
        print(f"written: {path}")
    print(f"report: {result.path} ({result.bytes / 1024:.0f} KiB)")
    return 0


def cmd_sensitivity(args) -> int:
    """``propensim sensitivity``."""
    import warnings

    from propensim.experiments.sensitivity import run_sensitivity

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        folder, table = run_sensitivity(
            args.spec,
            args.out,
            method=args.method,
            samples=args.samples,
            levels=args.levels,
            metrics=args.metric or None,
            overrides=args.overrides,
            workers=args.workers,
            scheduler=args.scheduler,
            progress=False if args.quiet else None,
        )
    _print_warnings(caught)
    import pandas as pd

    with pd.option_context("display.max_rows", None, "display.width", 200):
        print(table.to_string(index=False, float_format=lambda v: f"{v:.4g}"))
    for w in dict.fromkeys(w for w in table.get("warning", []) if isinstance(w, str) and w):
        print(f"propensim: warning: {w}", file=sys.stderr)
    print(f"written: {folder / 'sensitivity.csv'}")
    if not args.no_report:
        report = _write_report(folder)
        if report is not None:
            print(f"report: {report}")
    return 0


def cmd_describe(args) -> int:
    """``propensim describe``."""
    from propensim.experiments.describe import describe_spec
    from propensim.experiments.spec import load_spec
    from propensim.experiments.store import atomic_write_bytes

    text = describe_spec(load_spec(args.spec, args.overrides))
    if args.out:
        atomic_write_bytes(Path(args.out), text.encode())
        print(f"written: {args.out}")
    else:
        print(text, end="")
    return 0


def _calibration_out(given, stem: str) -> Path:
    import re

    return Path(given) if given else Path("results") / re.sub(r"[^A-Za-z0-9_-]+", "_", stem)


def cmd_calibrate(args) -> int:
    """``propensim calibrate``."""
    from propensim.experiments.calibrate_api import calibrate

    out = _calibration_out(args.out, f"calibrate-{Path(args.data).stem}-{args.column}")
    fit = calibrate(
        args.data,
        args.column,
        returns=args.returns,
        max_level=args.max_level,
        starts=args.starts,
        seed=args.seed,
        max_iter=args.max_iter,
        out=out,
    )
    print(fit.format())
    bad = [f for f in fit.fits if not f.converged]
    if bad:
        names = ", ".join(f.model for f in bad)
        print(
            f"propensim: error: {len(bad)} fit(s) did not converge: {names} "
            f"(first: {bad[0].message}); try more --starts or --max-iter",
            file=sys.stderr,
        )
        return 1
    return 0


def cmd_acceptance(args) -> int:
    """``propensim acceptance``."""
    from propensim.experiments.calibrate_api import (
        fit_acceptance,
        recover_curves,
        save_acceptance,
    )
    from propensim.experiments.calibrate_base import caution, read_frame

    frame, source = read_frame(args.data)
    out = _calibration_out(args.out, f"acceptance-{Path(args.data).stem}")
    assumptions = (
        f"{args.family} curves, every answer an independent Bernoulli draw at the offered price"
    )
    if args.meetings:
        result = recover_curves(frame, family=args.family, by=args.by)
        with __import__("pandas").option_context("display.width", 200):
            print(result.table.to_string(index=False, float_format=lambda v: f"{v:.4g}"))
        print(f"log-likelihood {result.loglik:.4f}; {result.message}")
        assumptions += "; a meeting trades only if both sides accept, independently"
    else:
        for col in (args.price, args.accepted):
            if col not in frame.columns:
                opt = "--price" if col == args.price else "--accepted"
                raise InputError(f"{opt} {col!r}: no such column in {args.data}")
        activity = args.activity if args.activity == "fit" else _float_arg(args.activity)
        result = fit_acceptance(
            frame[args.price].to_numpy(),
            frame[args.accepted].to_numpy(),
            family=args.family,
            side=args.side,
            activity=activity,
        )
        print(f"{result.family} curve of a {result.side}, {result.n} offers")
        print(result.table().to_string(index=False, float_format=lambda v: f"{v:.6g}"))
        print(f"log-likelihood {result.loglik:.4f}; {result.message}")
    path = save_acceptance(result, out, source)
    print(f"results: {path}")
    print(caution(assumptions))
    if not result.converged:
        print(f"propensim: error: the fit did not converge ({result.message})", file=sys.stderr)
        return 1
    return 0


def cmd_tune(args) -> int:
    """``propensim tune``."""
    from propensim.experiments.tuning import tune_from_cli

    return tune_from_cli(args)


def _float_arg(text: str) -> float:
    try:
        return float(text)
    except ValueError:
        raise InputError(
            f"--activity: expected a number in (0, 1] or 'fit', got {text!r}"
        ) from None


def cmd_new_plugin(args) -> int:
    """``propensim new-plugin``."""
    from propensim.experiments.new_plugin import new_plugin

    folder = new_plugin(args.kind, args.name, per_agent=args.per_agent, directory=args.dir)
    print(f"written: {folder}/ ({args.kind} plugin {args.name!r})")
    print(f"next: cd {folder} && pip install -e . && pytest && propensim plugins")
    print("after changing its entry points in pyproject.toml, run pip install -e . again")
    return 0


COMMANDS = {
    "calibrate": cmd_calibrate,
    "acceptance": cmd_acceptance,
    "tune": cmd_tune,
    "run": cmd_run,
    "check": cmd_check,
    "compare": cmd_compare,
    "query": cmd_query,
    "plugins": cmd_plugins,
    "new-plugin": cmd_new_plugin,
    "demo": cmd_demo,
    "pair": cmd_pair,
    "report": cmd_report,
    "sensitivity": cmd_sensitivity,
    "describe": cmd_describe,
}


def _input_errors() -> tuple[type[BaseException], ...]:
    found: list[type[BaseException]] = [InputError]
    for module, name in _INPUT_ERRORS.items():
        if module in sys.modules:
            found.append(getattr(sys.modules[module], name))
    return tuple(found)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code (0 ok, 1 runs failed, 2 bad input)."""
    parser = build_parser()
    try:
        try:
            args = parser.parse_args(argv)
        except InputError as exc:
            raise InputError(_dash_hint(str(exc), argv)) from None
        if args.command is None:
            parser.print_help()
            return 0
        return COMMANDS[args.command](args)
    except SystemExit as exc:  # --help, --version
        return exc.code if isinstance(exc.code, int) else 0
    except KeyboardInterrupt:
        print("propensim: interrupted; run again to resume", file=sys.stderr)
        return 130
    except Exception as exc:
        if isinstance(exc, _input_errors()):
            print(f"propensim: error: {_one_line(exc)}", file=sys.stderr)
            return 2
        raise


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
