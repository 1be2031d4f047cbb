"""One self-contained HTML page per results folder: what was run, tables, comparisons, figures.

:func:`write_report` reads only the results folder (and, for two figures, re-runs the first
stored run from its stored configuration and seed: runs are pure functions of both, and the
page says whether the re-run reproduced the stored numbers). The page needs nothing else to be
read: figures are SVG inside the file (``data:`` images), styles are inline, there is no script,
and a Content-Security-Policy forbids the browser to fetch anything. Built twice from the same
folder it is the same bytes (fixed SVG hash salts, no dates but the stored ones).

Sections follow the STRESS guidelines for reporting simulation studies (Monks et al. 2019):
objectives and outputs, logic, data, experimentation (initialisation, run length, replications,
how intervals are computed), implementation (software, versions, random numbers, seeds), and
code access; a checklist at the end says where each item is answered.

A folder whose sweep failed in part or was interrupted gets a report of what is there, with a
section saying what is missing. A folder with no finished run is refused.

References
----------
Monks, T., Currie, C. S. M., Onggo, B. S., Robinson, S., Kunc, M. and Taylor, S. J. E. (2019).
Strengthening the reporting of empirical simulation studies: Introducing the STRESS guidelines.
Journal of Simulation 13(1), 55-67.
Efron, B. and Tibshirani, R. J. (1993). *An Introduction to the Bootstrap*, ch. 13.
Mastrandrea, M. D. et al. (2010). Guidance note for lead authors of the IPCC Fifth Assessment
Report on consistent treatment of uncertainties. IPCC (the calibrated likelihood scale).
"""

from __future__ import annotations

import base64
import html
import json
import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

__all__ = ["ReportError", "build_report", "render_report", "write_report"]

#: Largest table (rows) shown in the page; the CSV files hold every row.
MAX_TABLE_ROWS = 60
#: Re-run the first run for the pair and network figures only below this many trader-rounds.
RERUN_LIMIT = 5_000_000
#: Metrics that measure one group's surplus: the gains-and-losses figure compares them.
GROUP_SURPLUS_HINTS = ("_surplus", "treasury", "revenue", "subsidy")

CAUTIONS = (
    "These are model outputs, not investment or policy advice.",
    "They follow from assumptions chosen for the model: the shape and width of the propensity "
    "curves (which set how often trades happen at all), the trading network and its random "
    "draw, the clearing rule and its parameters, the drift of preferred prices and widths, and "
    "the population's values and costs.",
    "Data in the shipped demo and examples are invented and describe no real market, firm or "
    "person.",
    "An interval that excludes zero says the model distinguishes the arms under these "
    "assumptions, nothing more; it is not evidence about any real market.",
)


class ReportError(ValueError):
    """A folder that cannot be reported on (one line naming the problem)."""


def _require_matplotlib() -> None:
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise ReportError("reports need matplotlib: pip install 'propensim[report]'") from None


# -- gathering ----------------------------------------------------------------------------------
@dataclass
class _Figure:
    key: str
    title: str
    caption: str
    fig: Any


@dataclass
class _Page:
    folder: Path
    manifest: dict
    spec: dict
    runs: Any
    ok: Any
    metrics: list[str]
    parameters: list[str]
    arms: list[str]
    settings: dict
    points: Any = None
    paired: Any = None
    comparison: Any = None
    figures: list[_Figure] = field(default_factory=list)
    missing: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    rerun: dict | None = None
    sensitivity: Any = None
    sensitivity_settings: dict | None = None


def _gather(folder: Path) -> _Page:
    from propensim.experiments.compare import settings_from_manifest
    from propensim.experiments.store import load

    results = load(folder)
    if not (folder / "runs.parquet").exists():
        raise ReportError(f"{folder}: no runs table (runs.parquet): the sweep stored no run yet")
    runs = results.runs
    if len(runs) == 0:
        raise ReportError(f"{folder}: the runs table is empty: no run was stored")
    ok = runs[runs["status"] == "ok"]
    if len(ok) == 0:
        first = runs["error_message"].dropna()
        why = f" (first error: {' '.join(str(first.iloc[0]).split())[:160]})" if len(first) else ""
        raise ReportError(f"{folder}: every stored run failed{why}; see failures.parquet")
    manifest = results.manifest
    metrics = [m for m in manifest.get("metrics") or [] if m in runs.columns]
    parameters = [p for p in manifest.get("parameters") or [] if p in runs.columns]
    arms = list(dict.fromkeys(runs.sort_values("index")["arm"]))
    page = _Page(
        folder=folder,
        manifest=manifest,
        spec=manifest.get("spec") or {},
        runs=runs,
        ok=ok,
        metrics=metrics,
        parameters=parameters,
        arms=arms,
        settings=settings_from_manifest(manifest, runs),
    )
    page.rounds = results.rounds
    page.results = results
    _what_is_missing(page, results)
    return page


def _what_is_missing(page: _Page, results) -> None:
    counts = page.manifest.get("counts") or {}
    status = page.manifest.get("status")
    if status != "complete":
        page.missing.append(
            f"The sweep's status is {status!r}, not 'complete'"
            + (
                ": it was stopped or interrupted; run the same spec into this folder to resume."
                if status in ("running", "stopped", "interrupted", "crashed")
                else "."
            )
        )
    planned = int(counts.get("runs", len(page.runs)))
    n_ok, n_failed = len(page.ok), int((page.runs["status"] == "failed").sum())
    absent = planned - len(page.runs)
    if n_failed:
        page.missing.append(
            f"{n_failed} of {planned} runs failed; their rows carry no metrics "
            "(errors below and in failures.parquet)."
        )
    if absent > 0:
        page.missing.append(f"{absent} of {planned} planned runs are not stored (never finished).")
    for m in page.metrics:
        if page.ok[m].isna().all():
            page.missing.append(f"Metric {m!r} has no finite value in any run.")
    if not len(results.rounds):
        page.missing.append(
            "No round tables are stored (collect.rounds = false): round paths are not drawn."
        )
    page.counts_text = f"{n_ok} ok, {n_failed} failed, {max(absent, 0)} missing of {planned}"
    page.failures = results.failures


def _tables(page: _Page) -> None:
    from propensim.experiments.compare import compare_arms, metric_directions
    from propensim.experiments.tables import paired_point_table, point_table

    s = page.settings
    page.points = point_table(
        page.runs,
        page.metrics,
        page.parameters,
        confidence=s["confidence"],
        bootstrap=min(int(s["bootstrap"]), 2000),
    )
    if len(page.arms) > 1 and s["baseline"] in page.arms:
        metrics = [m for m in s["metrics"] if m in page.metrics] or page.metrics
        directions = metric_directions(metrics)
        kw = {
            "confidence": s["confidence"],
            "bootstrap": int(s["bootstrap"]),
            "directions": directions,
        }
        try:
            page.comparison = compare_arms(page.runs, metrics, s["baseline"], **kw)
            page.paired = paired_point_table(
                page.runs, metrics, s["baseline"], page.parameters, **kw
            )
        except ValueError as exc:
            page.notes.append(f"Comparison not computed: {exc}")


# -- the first run again ------------------------------------------------------------------------
def _rerun_first(page: _Page) -> dict | None:
    """Rebuild and re-run the first ok run from its stored configuration and seed."""
    import numpy as np

    from propensim.experiments.spec import load_spec
    from propensim.markets import build_market

    first = page.ok.sort_values("index").iloc[0]
    spec = _stored_spec(page)
    point = {p: first[p] for p in page.parameters}
    point = {k: (v.item() if hasattr(v, "item") else v) for k, v in point.items()}
    spec["design"] = {"kind": "points", "points": [point] if point else [{}]}
    if not point:
        spec["design"] = {"kind": "grid", "parameters": {}}
    one = load_spec(spec)
    config = one.config(0, first["arm"] if page.arms != [""] else None)
    pop = config.get("population", {})
    n = int(pop.get("n_buyers", 0)) + int(pop.get("n_sellers", 0))
    rounds = int(page.spec.get("experiment", {}).get("rounds", 0))
    if n * max(rounds, 1) > RERUN_LIMIT:
        page.notes.append(
            f"The pair and network figures are not drawn: re-running a run of {n} traders for "
            f"{rounds} rounds is too slow for a report."
        )
        return None
    config["metrics"] = list(page.metrics)
    config["market"] = {**config.get("market", {}), "keep_ledger": True, "traders_every": 0}
    seed = np.random.SeedSequence(int(first["seed_entropy"]), spawn_key=tuple(first["seed_key"]))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        market = build_market(config, seed, mesa=False)
    for w in dict.fromkeys(" ".join(str(w.message).split()) for w in caught):
        page.notes.append(f"Re-running the first run warned: {w}")
    population = market.population
    start = {
        k: np.array(getattr(population, k), copy=True)
        for k in ("role", "mu", "sigma", "gamma", "value")
    }
    market.advance(rounds)
    summary = market.summary()
    ledger = market.ledger_columns()
    value = start["value"]
    surplus = np.zeros(n)  # shape: (n,) each trader's surplus over the run
    b, s = np.asarray(ledger["buyer"], int), np.asarray(ledger["seller"], int)
    price, q = np.asarray(ledger["price"], float), np.asarray(ledger["quantity"], float)
    np.add.at(surplus, b, (value[b] - price) * q)
    np.add.at(surplus, s, (price - value[s]) * q)
    diffs = {}
    for m in page.metrics:
        a, stored = float(summary.get(m, float("nan"))), float(first[m])
        same = (a == stored) or (math.isnan(a) and math.isnan(stored))
        diffs[m] = (stored, a, same)
    return {
        "run_id": first["run_id"],
        "arm": first["arm"],
        "point": int(first["point"]),
        "replicate": int(first["replicate"]),
        "start": start,
        "surplus": surplus,
        "network": (np.asarray(market.network.buyer), np.asarray(market.network.seller)),
        "diffs": diffs,
        "curve": pop.get("curve", "normal"),
    }


def _stored_spec(page: _Page) -> dict:
    """The resolved spec: from spec.toml (TOML keeps inf), else the manifest's JSON copy."""
    import tomllib

    toml = page.folder / "spec.toml"
    if toml.exists():
        return tomllib.loads(toml.read_text())

    def back(obj):  # the manifest spells non-finite floats as strings
        if isinstance(obj, dict):
            return {k: back(v) for k, v in obj.items()}
        if isinstance(obj, list):
            return [back(v) for v in obj]
        return (
            {"inf": math.inf, "-inf": -math.inf, "nan": math.nan}.get(obj, obj)
            if isinstance(obj, str)
            else obj
        )

    return back(json.loads(json.dumps(page.spec)))


# -- figures ------------------------------------------------------------------------------------
def _add(page: _Page, key: str, title: str, caption: str, make) -> None:
    try:
        fig = make()
    except Exception as exc:  # a figure that cannot be drawn is reported, not fatal
        page.notes.append(f"Figure '{title}' not drawn: {type(exc).__name__}: {exc}")
        return
    if fig is not None:
        page.figures.append(_Figure(key, title, caption, fig))


def _figures(page: _Page) -> None:
    import numpy as np

    from propensim.experiments import figures as F

    r = page.rerun
    if r is not None:
        st = r["start"]
        buyers = np.flatnonzero(st["role"] == 0)
        sellers = np.flatnonzero(st["role"] == 1)
        if buyers.size and sellers.size:
            ib = buyers[np.argsort(st["mu"][buyers])[buyers.size // 2]]
            js = sellers[np.argsort(st["mu"][sellers])[sellers.size // 2]]
            note = (
                ""
                if r["curve"] == "normal"
                else (
                    f" The population's curves are {r['curve']!r}; the pair is drawn as normal "
                    "curves with the same preferred price and width."
                )
            )
            _add(
                page,
                "pair",
                "One buyer and one seller",
                "Left: the median buyer's and the median seller's propensity curves (by "
                "preferred price) of the first run at its start, their joint curve shaded "
                "(the chance that both accept a price) and the entropic forces at the joint "
                "price. Right: the classical picture of the same population, demand from "
                "buyers' values and supply from sellers' costs." + note,
                lambda: F.pair_figure(
                    float(st["mu"][ib]),
                    float(st["sigma"][ib]),
                    float(st["mu"][js]),
                    float(st["sigma"][js]),
                    gamma=float(st["gamma"][ib]),
                    values=st["value"][buyers],
                    costs=st["value"][sellers],
                ),
            )
    rounds = getattr(page, "rounds", None)
    if rounds is not None and len(rounds):
        wanted = [m for m in ("vwap", "mean_price", "volume") if m in rounds.columns][:2]
        wanted = wanted or [m for m in page.metrics if m in rounds.columns][:2]
        _add(
            page,
            "paths",
            "Round paths",
            "Each metric round by round: the line is the mean over the replicates of a design "
            "point and arm, the band a 95% Student-t interval of that mean.",
            lambda: F.paths_figure(rounds, page.runs, wanted),
        )
    kind = page.spec.get("design", {}).get("kind")
    if page.parameters and page.points is not None and len(page.points):
        p0 = page.parameters[0]
        numeric = page.points[p0].map(lambda v: isinstance(v, int | float)).all()
        many = page.points["point"].nunique() > 1
        if numeric and many:
            shown = (page.settings["metrics"] or page.metrics)[:6]
            shown = [m for m in shown if m in page.metrics] or page.metrics[:6]
            log_x = (
                bool(
                    (page.spec.get("design", {}).get("parameters", {}).get(p0) or {}).get(
                        "log", False
                    )
                )
                if isinstance(page.spec.get("design", {}).get("parameters", {}).get(p0), dict)
                else False
            )
            _add(
                page,
                "sweep",
                f"Responses to {p0}",
                f"Mean of each metric per design point against {p0}, per arm, with "
                f"{page.settings['confidence']:.0%} bootstrap intervals over replicates"
                + (
                    "; other parameters vary between points too."
                    if len(page.parameters) > 1
                    else "."
                ),
                lambda: F.sweep_figure(page.points, p0, shown, log_x=log_x),
            )
        if kind == "grid" and len(page.parameters) >= 2:
            px, py = page.parameters[:2]
            metric = (page.settings["metrics"] or page.metrics)[0]
            for arm in page.arms[:2]:
                _add(
                    page,
                    f"heatmap-{arm or 'runs'}",
                    f"{metric} over {px} and {py}" + (f" ({arm})" if arm else ""),
                    f"Mean {metric} over the grid of {px} and {py}"
                    + (", averaged over the other parameters" if len(page.parameters) > 2 else "")
                    + ".",
                    lambda arm=arm: F.heatmap_figure(page.points, px, py, metric, arm or None),
                )
    if page.comparison is not None and len(page.comparison):
        _add(
            page,
            "forest",
            "Paired differences between arms",
            f"Mean paired difference (arm minus baseline {page.settings['baseline']!r}) over "
            "all design points and replicates, with its bootstrap interval; a grey row's "
            "interval includes zero.",
            lambda: F.forest_figure(page.comparison),
        )
        groups = _group_surplus(page)
        if groups is not None:
            _add(
                page,
                "gains",
                "Who gains and who loses",
                "Paired change of each group's surplus against the baseline (green: gains, "
                "red: losses), with bootstrap intervals.",
                lambda: F.gains_losses_figure(groups),
            )
    if r is not None:
        _add(
            page,
            "network",
            "The trading network of the first run",
            f"Run {r['run_id']} (arm {r['arm'] or '-'}, point {r['point']}, replicate "
            f"{r['replicate']}), re-run from its stored configuration and seed: buyers and "
            "sellers, node area proportional to each trader's surplus over the run.",
            lambda: F.network_figure(
                r["network"][0], r["network"][1], r["start"]["role"], r["surplus"]
            ),
        )
    _optional_tables(page, F)
    if page.sensitivity is not None and len(page.sensitivity):
        method = page.sensitivity_settings.get("method")
        _add(
            page,
            "sensitivity",
            "Sensitivity indices",
            (
                "First-order (S1) and total (ST) Sobol' indices per parameter from a Saltelli "
                "sample, bars with bootstrap intervals."
                if method == "sobol"
                else "Morris screening: mu* (mean absolute elementary effect) with its interval, "
                "and "
                "sigma (spread of the effects: interactions or non-linearity)."
            ),
            lambda: F.sensitivity_figure(page.sensitivity),
        )


def _group_surplus(page: _Page):
    import pandas as pd

    stored = page.folder / "groups.parquet"
    if stored.exists():
        return pd.read_parquet(stored)
    totals = getattr(page.results, "totals", None)  # per-trader surplus, when collected
    if totals is not None and len(totals):
        try:
            from propensim.experiments.gains import compare_groups

            table = compare_groups(
                page.runs,
                totals,
                page.settings["baseline"],
                confidence=page.settings["confidence"],
                bootstrap=1000,
            )
            if (table["grouping"] == "role").any():  # by role: one bar per side and arm
                table = table[table["grouping"] == "role"]
            label = table["grouping"].astype(str) + ": " + table["group"].astype(str)
            return table.assign(group=label)[["group", "arm", "mean_diff", "ci_low", "ci_high"]]
        except Exception as exc:  # that module's table may change; fall back to the metrics
            page.notes.append(f"Per-group surplus not compared: {type(exc).__name__}: {exc}")
    metrics = [
        m for m in page.comparison["metric"].unique() if any(h in m for h in GROUP_SURPLUS_HINTS)
    ]
    metrics += [
        m for m in page.metrics if any(h in m for h in GROUP_SURPLUS_HINTS) and m not in metrics
    ]
    if len(metrics) < 2:
        return None
    from propensim.experiments.compare import compare_arms

    table = compare_arms(
        page.runs,
        metrics,
        page.settings["baseline"],
        confidence=page.settings["confidence"],
        bootstrap=1000,
    )
    return table.rename(columns={"metric": "group"})[
        ["group", "arm", "mean_diff", "ci_low", "ci_high"]
    ]


def _optional_tables(page: _Page, F) -> None:
    """Event-mode sales and calibration fits: drawn when the folder holds those tables."""
    import pandas as pd

    def read(name: str):
        for candidate in (page.folder / f"{name}.parquet", page.folder / f"{name}.csv"):
            if candidate.exists():
                return (
                    pd.read_parquet(candidate)
                    if candidate.suffix == ".parquet"
                    else pd.read_csv(candidate)
                )
        parts = sorted((page.folder / name).glob("part-*.parquet"))
        if parts:
            return pd.concat([pd.read_parquet(p) for p in parts], ignore_index=True)
        return None

    rounds = getattr(page, "rounds", None)
    if rounds is not None and {"sold", "on_hand"} <= set(rounds.columns):  # shop mode's weeks
        weeks = rounds[["run_id", "round", "sold", "on_hand"]]
        _add(
            page,
            "shop",
            "Weekly sales and stock",
            "Units sold per week and stock on hand at the end of the week, mean over runs "
            "with a 95% Student-t interval.",
            lambda: F.event_sales_figure(
                weeks, time="round", sales="sold", stock="on_hand", time_label="week"
            ),
        )
    events = read("events")
    if events is not None and {"time", "sales"} <= set(events.columns):
        _add(
            page,
            "events",
            "Sales and stock over time",
            "Event mode: sales per time window and stock, mean over runs with a 95% interval.",
            lambda: F.event_sales_figure(events),
        )
    fits = read("calibration")
    if fits is not None and "x" in fits.columns:
        _add(
            page,
            "calibration",
            "Calibration fits",
            "The observed distribution against each fitted model's density.",
            lambda: F.calibration_figure(fits),
        )


# -- rendering ----------------------------------------------------------------------------------
def _e(x) -> str:
    return html.escape(str(x), quote=True)


def _num(v, digits: int = 4) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return str(v)
    if isinstance(v, int):
        return str(v)
    try:
        f = float(v)
    except (TypeError, ValueError):
        return str(v)
    if math.isnan(f):
        return "n/a"
    return f"{f:.{digits}g}"


def _table(frame, columns=None, *, max_rows: int = MAX_TABLE_ROWS, csv: str | None = None) -> str:
    import pandas as pd

    columns = list(columns or frame.columns)
    head = "".join(f"<th>{_e(c)}</th>" for c in columns)
    rows = []
    for rec in frame.head(max_rows).to_dict("records"):
        cells = []
        for c in columns:
            v = rec.get(c)
            text = "" if (v is None or (not isinstance(v, str) and pd.isna(v))) else _num(v)
            cls = ' class="n"' if isinstance(v, int | float) and not isinstance(v, bool) else ""
            cells.append(f"<td{cls}>{_e(text)}</td>")
        rows.append("<tr>" + "".join(cells) + "</tr>")
    more = ""
    if len(frame) > max_rows:
        more = (
            f'<p class="more">First {max_rows} of {len(frame)} rows'
            + (f"; every row is in {_e(csv)}" if csv else "")
            + ".</p>"
        )
    return (
        f'<div class="scroll"><table><thead><tr>{head}</tr></thead><tbody>'
        + "".join(rows)
        + "</tbody></table></div>"
        + more
    )


def _svg_img(fig: _Figure) -> str:
    from propensim.experiments.figures import svg_bytes

    data = base64.b64encode(svg_bytes(fig.fig, salt=f"propensim-{fig.key}")).decode()
    return (
        f'<figure id="fig-{_e(fig.key)}"><img alt="{_e(fig.title)}" '
        f'src="data:image/svg+xml;base64,{data}"><figcaption><b>{_e(fig.title)}.</b> '
        f"{_e(fig.caption)}</figcaption></figure>"
    )


#: Calibrated likelihood language (Mastrandrea et al. 2010, the IPCC guidance note on the
#: consistent treatment of uncertainties): lower bound of the probability, term.
LIKELIHOOD_TERMS = (
    (0.99, "virtually certain"),
    (0.90, "very likely"),
    (0.66, "likely"),
    (0.33, "about as likely as not"),
    (0.10, "unlikely"),
    (0.01, "very unlikely"),
    (0.0, "exceptionally unlikely"),
)


def likelihood_term(p: float) -> str:
    """The calibrated term for a probability ``p`` (Mastrandrea et al. 2010).

    Examples
    --------
    >>> likelihood_term(0.95), likelihood_term(0.5), likelihood_term(0.005)
    ('very likely', 'about as likely as not', 'exceptionally unlikely')
    """
    for bound, term in LIKELIHOOD_TERMS:
        if p > bound or (bound == 0.0 and p >= 0.0):
            return term
    return LIKELIHOOD_TERMS[-1][1]


def _share_up(page: _Page, metric: str, arm: str, baseline: str, seed: int) -> float:
    """Share of bootstrap means of the paired differences ``arm - baseline`` above zero."""
    import numpy as np

    ok = page.ok
    a = ok[ok["arm"] == arm].set_index(["point", "replicate"])[metric]
    b = ok[ok["arm"] == baseline].set_index(["point", "replicate"])[metric]
    d = (a - b).dropna().to_numpy(dtype=float)  # shape: (n_pairs,)
    d = d[np.isfinite(d)]
    if d.size == 0:
        return float("nan")
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    idx = rng.integers(0, d.size, size=(2000, d.size))  # shape: (2000, n_pairs)
    return float(np.mean(d[idx].mean(axis=1) > 0))


def _plain_comparisons(page: _Page) -> list[str]:
    out = []
    if page.comparison is None:
        return out
    level = f"{page.settings['confidence']:.0%}"
    for r in page.comparison.to_dict("records"):
        if not r["n_pairs"]:
            continue
        d, lo, hi = r["mean_diff"], r["ci_low"], r["ci_high"]
        way = "higher" if d > 0 else "lower" if d < 0 else "the same"
        if lo > 0 or hi < 0:
            verdict = "the interval excludes zero: the model tells the two apart"
        else:
            verdict = "the interval includes zero: the model does not tell them apart here"
        better = r["better"]
        wins = ""
        if isinstance(better, str):
            wins = (
                f" {r['arm']} was better ({better} is better) in "
                f"{100 * r['arm_wins']:.0f}% of the pairs."
            )
        p_up = _share_up(page, r["metric"], r["arm"], r["baseline"], seed=len(out))
        likely = ""
        if p_up == p_up:  # not NaN
            likely = (
                f" In the model it is {likelihood_term(p_up)} ({100 * p_up:.0f}% of bootstrap "
                f"resamples) that {r['metric']} is higher under {r['arm']} than under "
                f"{r['baseline']}."
            )
        out.append(
            f"<b>{_e(r['metric'])}</b>: under <b>{_e(r['arm'])}</b> it was {way} than under "
            f"<b>{_e(r['baseline'])}</b> by {_e(_num(abs(d)))} on average over {r['n_pairs']} "
            f"paired runs ({level} interval of the difference {_e(_num(lo))} to "
            f"{_e(_num(hi))}); {verdict}.{_e(wins)}{_e(likely)}"
        )
    if out:
        out.append(
            "Likelihood terms follow the calibrated scale of Mastrandrea et al. (2010): "
            "virtually certain &gt; 99%, very likely &gt; 90%, likely &gt; 66%, about as likely "
            "as not 33-66%, unlikely &lt; 33%, very unlikely &lt; 10%, exceptionally unlikely "
            "&lt; 1%; they describe the model under its assumptions, not the world."
        )
    return out


def _plugin_line(section: dict) -> str:
    if not section:
        return "-"
    if "rules" in section:
        names = ", ".join(_plugin_line(r) for r in section["rules"])
        rest = {k: v for k, v in section.items() if k != "rules"}
        return f"sum of [{names}]" + (f" with {_kv(rest)}" if rest else "")
    rest = {k: v for k, v in section.items() if k != "name"}
    return f"{section.get('name')}" + (f" ({_kv(rest)})" if rest else "")


def _kv(d: dict) -> str:
    return ", ".join(f"{k}={json.dumps(v) if not isinstance(v, str) else v}" for k, v in d.items())


def _what_was_run(page: _Page) -> str:
    from propensim.experiments.store import package_versions

    sp, m = page.spec, page.manifest
    exp = sp.get("experiment", {})
    design = sp.get("design", {})
    kind = design.get("kind")
    params = design.get("parameters") or {}
    n_points = int(page.runs["point"].max()) + 1 if len(page.runs) else 0
    versions = dict(m.get("versions") or {})
    report_versions = {k: v for k, v in package_versions().items() if k == "propensim"}
    try:
        from importlib import metadata

        report_versions["matplotlib"] = metadata.version("matplotlib")
    except Exception:  # pragma: no cover - matplotlib is required to get here
        pass
    design_text = f"{kind}" + (
        f", {design.get('samples')} samples" if design.get("samples") else ""
    )
    if kind == "sobol":
        design_text += (
            " (a low-discrepancy sequence that spreads the points evenly; it is not "
            "the sampling Sobol' sensitivity indices need: see propensim sensitivity)"
        )
    rows = [
        ("experiment", f"{exp.get('name', m.get('name'))}: {exp.get('description', '')}"),
        ("status", f"{m.get('status')} ({page.counts_text})"),
        ("population", _kv(sp.get("population", {}))),
        ("network", _plugin_line(sp.get("network", {}))),
        ("clearing", _plugin_line(sp.get("clearing", {}))),
        ("drift", _plugin_line(sp.get("drift", {}))),
        ("market", _kv(sp.get("market", {}))),
        ("rounds per run", exp.get("rounds")),
        ("replicates per point and arm", exp.get("replicates")),
        ("design", design_text),
        (
            "design parameters",
            "; ".join(f"{k}: {json.dumps(v)}" for k, v in params.items()) or "none",
        ),
        ("design points", n_points),
        (
            "arms",
            "; ".join(f"{a.get('name')}: {_kv(a.get('set', {}))}" for a in sp.get("arms", []))
            or "one configuration, no arms",
        ),
        ("metrics collected", ", ".join(page.metrics)),
        (
            "root seed",
            f"{m.get('root_seed')}: run (point, replicate) uses SeedSequence(root, "
            "spawn_key=(point, replicate)), shared by every arm (common random numbers)",
        ),
        ("run-id fingerprint", m.get("fingerprint")),
        ("created / finished", f"{m.get('created')} / {m.get('finished')}"),
        ("backend", _kv(m.get("backend") or {}) or "-"),
        ("versions (runs)", _kv(versions)),
        ("versions (this report)", _kv(report_versions)),
        ("platform", m.get("platform")),
        ("command", " ".join(m.get("command") or [])),
    ]
    body = "".join(f"<tr><th>{_e(k)}</th><td>{_e(v)}</td></tr>" for k, v in rows)
    toml = page.folder / "spec.toml"
    spec_text = toml.read_text() if toml.exists() else json.dumps(sp, indent=1)
    return (
        f'<table class="kv">{body}</table><details><summary>The resolved spec (every default '
        f"written out; run it again with propensim run)</summary><pre>{_e(spec_text)}</pre>"
        "</details>"
    )


def _stress(page: _Page) -> str:
    has_cmp = page.comparison is not None
    items = [
        (
            "1 Objectives",
            [
                (
                    "Purpose of the model",
                    "the experiment's description (What was run), from the spec",
                ),
                (
                    "Model outputs",
                    "the metrics collected, defined in Outputs defined; summary per "
                    "run as each metric's aggregate over rounds",
                ),
                (
                    "Experimentation aims",
                    "the design and the arms (What was run); comparisons "
                    + ("in Comparisons" if has_cmp else "not made: one arm"),
                ),
            ],
        ),
        (
            "2 Logic",
            [
                (
                    "Base model overview",
                    "the round: clear on network edges, settle, drift, measure (Model logic)",
                ),
                (
                    "Base model logic and algorithms",
                    "the plugins and their parameters (What was "
                    "run); propensim describe SPEC writes the ODD",
                ),
                ("Scenario logic", "the arms' overrides and the design parameters (What was run)"),
                (
                    "Components (agents, environment, interactions)",
                    "traders with propensity "
                    "curves; the trading network; the clearing rule (Model logic)",
                ),
            ],
        ),
        (
            "3 Data",
            [
                (
                    "Data sources",
                    "none: values, costs and curves are drawn from the distributions "
                    "in the spec (invented data in the shipped examples)",
                ),
                ("Pre-processing", "not applicable"),
                ("Input parameters", "the resolved spec, every default written out (What was run)"),
                ("Assumptions", "Cautions"),
            ],
        ),
        (
            "4 Experimentation",
            [
                (
                    "Initialisation",
                    "every run builds its population and network afresh from its "
                    "seed; no warm-up is discarded unless a metric's aggregate says "
                    "so (e.g. final_half_mean)",
                ),
                ("Run length", f"{page.spec.get('experiment', {}).get('rounds')} rounds per run"),
                (
                    "Estimation approach",
                    f"{page.spec.get('experiment', {}).get('replicates')} "
                    "replicates per point and arm; means with percentile bootstrap intervals; "
                    "paired "
                    "differences under common random numbers (Intervals)",
                ),
            ],
        ),
        (
            "5 Implementation",
            [
                ("Software", "propensim and the package versions in What was run"),
                (
                    "Random sampling",
                    "one numpy Generator per named stream, spawned from the run's "
                    "SeedSequence (What was run)",
                ),
                (
                    "Model execution",
                    "the backend and worker processes (What was run); results do "
                    "not depend on them",
                ),
                ("System specification", "the platform (What was run)"),
            ],
        ),
        (
            "6 Code access",
            [
                (
                    "Computer model sharing",
                    "spec.toml in the results folder reruns the experiment "
                    "with the propensim version given",
                ),
            ],
        ),
    ]
    out = []
    for section, rows in items:
        body = "".join(f"<tr><td>{_e(a)}</td><td>{_e(b)}</td></tr>" for a, b in rows)
        out.append(f"<h3>{_e(section)}</h3><table class='kv'><tbody>{body}</tbody></table>")
    return "".join(out)


_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1100px;margin:1.5em auto;
padding:0 1em;color:#222;line-height:1.45}
h1{font-size:1.6em;margin-bottom:.2em}h2{border-bottom:2px solid #1b6f8a;padding-bottom:.15em;
margin-top:1.8em}h3{margin-bottom:.3em}
.caution{background:#fff6e5;border-left:4px solid #d1603d;padding:.6em 1em}
.missing{background:#fdecea;border-left:4px solid #c0392b;padding:.6em 1em}
table{border-collapse:collapse;font-size:.85em;margin:.4em 0}
th,td{border:1px solid #ddd;padding:.2em .5em;text-align:left;vertical-align:top}
td.n{text-align:right;font-variant-numeric:tabular-nums}thead th{background:#eef4f6}
table.kv th{background:#f6f6f6;width:14em}.scroll{overflow-x:auto}
figure{margin:1em 0}figure img{max-width:100%;height:auto;border:1px solid #eee}
figcaption{font-size:.85em;color:#444}pre{background:#f6f6f6;padding:.6em;overflow-x:auto;
font-size:.8em}.more{font-size:.8em;color:#666}nav a{margin-right:.8em}
"""


def render_report(folder) -> str:
    """The report of a results folder as HTML text (see :func:`write_report`)."""
    folder = Path(folder)
    if _folder_format(folder) == CALIBRATION_FORMAT:
        return _render_calibration(folder, None)[0]
    html_text, _ = _render(folder)
    return html_text


CALIBRATION_FORMAT = "propensim-calibration"


def _folder_format(folder: Path) -> str | None:
    try:
        return json.loads((folder / "manifest.json").read_text()).get("format")
    except (OSError, ValueError, AttributeError):
        return None  # load() names the problem


def _head(title: str) -> list[str]:
    return [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta http-equiv="Content-Security-Policy" content="default-src \'none\'; '
        "img-src data:; style-src 'unsafe-inline'\">",
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(title)}: propensim report</title><style>{_CSS}</style></head><body>",
    ]


def _render_calibration(folder: Path, figures_dir: Path | None) -> tuple[str, _Page]:
    """The report of a calibration folder (``propensim calibrate``): fits, densities, cautions."""
    import pandas as pd

    from propensim.experiments import figures as F

    _require_matplotlib()
    manifest = json.loads((folder / "manifest.json").read_text())

    def table(name: str):
        path = folder / f"{name}.parquet"
        return pd.read_parquet(path) if path.exists() else None

    fits, params, density, returns = (
        table(n) for n in ("fits", "parameters", "density", "returns")
    )
    page = _Page(
        folder=folder,
        manifest=manifest,
        spec={},
        runs=None,
        ok=None,
        metrics=[],
        parameters=[],
        arms=[],
        settings={},
    )
    missing = [f"{n}.parquet" for n, t in (("fits", fits), ("density", density)) if t is None]
    if density is not None and {"model", "x", "density"} <= set(density.columns):
        wide = density.pivot_table(index="x", columns="model", values="density", sort=True)
        wide = wide.reset_index()
        sample = returns["r"] if returns is not None and "r" in returns.columns else None
        label = "log return" if manifest.get("kind") == "returns" else "x (data units)"
        _add(
            page,
            "calibration",
            "Fitted densities against the data",
            "The observations as a density histogram and each fitted model's density.",
            lambda: F.calibration_figure(wide, sample=sample, x_label=label),
        )
    title = f"calibration: {Path(str(manifest.get('source', folder.name))).name}"
    rows = [
        (k, manifest.get(k))
        for k in (
            "kind",
            "source",
            "n",
            "options",
            "best_aic",
            "best_bic",
            "verdict",
            "converged",
            "written",
            "versions",
            "platform",
            "command",
        )
        if k in manifest
    ]
    parts = _head(title) + [
        f"<h1>{_e(title)}</h1>",
        '<p class="caution"><b>Caution.</b> ' + _e(CAUTIONS[0]) + " The fits assume what the "
        "calibration states (below); a better likelihood is not evidence that a model is "
        "true.</p>",
        "<h2>What was fitted</h2><table class='kv'>"
        + "".join(
            f"<tr><th>{_e(k)}</th><td>{_e(v if isinstance(v, str) else json.dumps(v))}</td></tr>"
            for k, v in rows
        )
        + "</table>",
        "<h2>What is missing</h2>",
        ("<p class='missing'>Not in the folder: " + _e(", ".join(missing)) + "</p>")
        if missing
        else "<p>Nothing: every table of the calibration is there.</p>",
    ]
    if fits is not None:
        parts += ["<h2>Fits</h2>", _table(fits)]
    if params is not None:
        parts += ["<h3>Parameters</h3>", _table(params)]
    parts.append("<h2>Figures</h2>")
    parts += [_svg_img(f) for f in page.figures]
    if page.notes:
        parts.append("<ul>" + "".join(f"<li>{_e(n)}</li>" for n in page.notes) + "</ul>")
    parts.append(
        "<h2>Cautions</h2><ul>"
        + "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS[:2])
        + "</ul></body></html>\n"
    )
    if figures_dir is not None:
        figures_dir.mkdir(parents=True, exist_ok=True)
        for f in page.figures:
            F.save(f.fig, figures_dir / f.key)
    page.missing = missing
    return "\n".join(parts), page


def _render(folder: Path, figures_dir: Path | None = None) -> tuple[str, _Page]:
    from propensim.experiments.sensitivity import load_indices

    _require_matplotlib()
    page = _gather(folder)
    _tables(page)
    page.sensitivity, page.sensitivity_settings = load_indices(folder)
    try:
        page.rerun = _rerun_first(page)
    except Exception as exc:  # the page is still useful without the two re-run figures
        page.notes.append(
            f"The first run could not be re-run ({type(exc).__name__}: {exc}); the pair and "
            "network figures are not drawn."
        )
    _figures(page)
    name = page.manifest.get("name", folder.name)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta http-equiv="Content-Security-Policy" content="default-src \'none\'; '
        "img-src data:; style-src 'unsafe-inline'\">",
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(name)}: propensim report</title><style>{_CSS}</style></head><body>",
        f"<h1>{_e(name)}</h1>",
        f"<p>{_e(page.spec.get('experiment', {}).get('description', ''))}</p>",
        '<p class="caution"><b>Caution.</b> ' + _e(CAUTIONS[0]) + " " + _e(CAUTIONS[1]) + "</p>",
        '<nav><a href="#run">What was run</a><a href="#missing">Missing</a>'
        '<a href="#outputs">Outputs</a><a href="#comparisons">Comparisons</a>'
        '<a href="#tables">Tables</a><a href="#figures">Figures</a>'
        '<a href="#cautions">Cautions</a><a href="#stress">STRESS checklist</a></nav>',
        '<h2 id="run">What was run</h2>',
        _what_was_run(page),
        '<h2 id="missing">What is missing</h2>',
    ]
    if page.missing:
        parts.append(
            '<div class="missing"><ul>'
            + "".join(f"<li>{_e(m)}</li>" for m in page.missing)
            + "</ul></div>"
        )
        fails = getattr(page, "failures", None)
        if fails is not None and len(fails):
            shown = fails[["index", "error_type", "error_message"]].copy()
            shown["error_message"] = shown["error_message"].map(
                lambda t: " ".join(str(t).split())[:200]
            )
            parts.append(_table(shown, max_rows=20, csv="failures.parquet"))
    else:
        parts.append("<p>Nothing: every planned run finished and every metric has values.</p>")
    if page.rerun is not None:
        same = all(v[2] for v in page.rerun["diffs"].values())
        parts.append(
            f"<p>Reproduction check: run {_e(page.rerun['run_id'])} was re-run from its stored "
            "configuration and seed for this report; its summary "
            + (
                "matches the stored one exactly."
                if same
                else "differs from the stored one: "
                + _e(
                    ", ".join(
                        f"{k} {v[0]:.6g} stored, {v[1]:.6g} now"
                        for k, v in page.rerun["diffs"].items()
                        if not v[2]
                    )
                )
                + " (a changed propensim version?)"
            )
            + "</p>"
        )
    parts += ['<h2 id="outputs">Outputs defined</h2>', _outputs(page)]
    parts.append('<h2 id="comparisons">Comparisons in plain language</h2>')
    sentences = _plain_comparisons(page)
    if sentences:
        parts.append("<ul>" + "".join(f"<li>{s}</li>" for s in sentences) + "</ul>")
        parts.append(_table(page.comparison, csv="comparison.csv"))
    else:
        parts.append("<p>No comparison: the experiment has one arm.</p>")
    parts.append('<h2 id="tables">Tables</h2>')
    level = f"{page.settings['confidence']:.0%}"
    parts.append(f"<h3>Per design point and arm: mean and {level} bootstrap interval</h3>")
    parts.append(_table(page.points, csv="points.csv"))
    if page.paired is not None:
        parts.append(
            f"<h3>Paired differences per design point (arm minus "
            f"{_e(page.settings['baseline'])})</h3>"
        )
        parts.append(_table(page.paired, csv="point-differences.csv"))
    if page.sensitivity is not None:
        parts.append("<h3>Sensitivity indices</h3>")
        s = page.sensitivity_settings
        parts.append(
            f"<p>Method {_e(s.get('method'))}, {_e(s.get('samples'))} base samples "
            f"({_e(s.get('points'))} points x {_e(s.get('replicates'))} replicates, "
            "replicates averaged per point), intervals as half-widths at "
            f"{_e(s.get('confidence'))}.</p>"
        )
        parts.append(_table(page.sensitivity, csv="sensitivity.csv"))
        warned = [w for w in page.sensitivity.get("warning", []) if isinstance(w, str) and w]
        if warned:
            parts.append('<p class="missing">' + _e("; ".join(dict.fromkeys(warned))) + "</p>")
    parts.append('<h2 id="figures">Figures</h2>')
    parts += [_svg_img(f) for f in page.figures]
    if page.notes:
        parts.append(
            "<h3>Notes</h3><ul>" + "".join(f"<li>{_e(n)}</li>" for n in page.notes) + "</ul>"
        )
    parts.append(
        '<h2 id="cautions">Cautions</h2><ul>'
        + "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS)
        + "</ul>"
    )
    parts.append(
        '<h2 id="stress">STRESS checklist</h2><p>Where this report answers each item '
        "of the STRESS guidelines for reporting simulation studies (Monks et al., "
        "Journal of Simulation 13(1):55-67, 2019).</p>"
    )
    parts.append(_stress(page))
    parts.append(
        '<h2 id="logic">Model logic</h2><p>Every trader carries a propensity curve: the '
        "probability of accepting a trade at each price. Each round the clearing rule "
        "turns meetings along the trading network's buyer-seller edges into trades, the "
        "market settles them (goods and cash conserved), the drift rule moves preferred "
        "prices and widths, and every metric records one number; a run's summary is "
        "each metric's aggregate over the rounds.</p>"
    )
    parts.append(
        "<p class='more'>Written by propensim report from the results folder alone "
        "(the reproduction check re-runs one stored run).</p></body></html>\n"
    )
    if figures_dir is not None:
        from propensim.experiments.figures import save

        figures_dir.mkdir(parents=True, exist_ok=True)
        for f in page.figures:
            save(f.fig, figures_dir / f.key)
    for f in page.figures:
        f.fig.clear()
    return "\n".join(parts), page


def _outputs(page: _Page) -> str:
    from propensim.experiments.figures import metric_label
    from propensim.plugins import registry

    rows = []
    for m in page.metrics:
        try:
            cls = registry.get_plugin("metrics", m)
            text, agg = cls.description, getattr(cls, "aggregate", "")
            better = getattr(cls, "better", None)
        except Exception:
            text, agg, better = "(plugin not installed here)", "", None
        rows.append(
            {
                "metric": m,
                "unit": metric_label(m),
                "definition": text,
                "summary of a run": agg,
                "better": better or "neither",
            }
        )
    import pandas as pd

    level = f"{page.settings['confidence']:.0%}"
    return (
        _table(pd.DataFrame(rows))
        + f"<p id='intervals'>Intervals: {level} percentile bootstrap intervals of the mean "
        f"over replicates ({page.settings['bootstrap']} resamples for paired differences, "
        "at most 2000 per table cell; Efron and Tibshirani 1993, ch. 13). Paired differences "
        "are taken run by run between arms that share a seed (common random numbers), "
        "matched on design point and replicate. Round paths: Student-t 95% interval of the "
        "mean over replicates.</p>"
    )


@dataclass
class ReportResult:
    """What :func:`write_report` wrote."""

    path: Path
    bytes: int
    figures: list[str]
    tables: list[Path]
    missing: list[str]


def write_report(folder, out=None, *, figures_dir=None) -> ReportResult:
    """Write the HTML report of a results folder, and its tables as CSV beside it.

    Parameters
    ----------
    folder : str or Path
        A results folder.
    out : str or Path, optional
        The HTML file (default ``FOLDER/report.html``). ``points.csv`` and
        ``point-differences.csv`` are written beside it (prefixed with the file's stem when it
        is not ``report``).
    figures_dir : str or Path, optional
        Also write every figure there as PNG and SVG.

    Raises
    ------
    StoreError
        Not a results folder, or its files cannot be read.
    ReportError
        No runs table, or no run finished.
    """
    from propensim.experiments.store import atomic_write_bytes

    folder = Path(folder)
    target = Path(out) if out is not None else folder / "report.html"
    figures = Path(figures_dir) if figures_dir is not None else None
    if _folder_format(folder) == CALIBRATION_FORMAT:
        text, page = _render_calibration(folder, figures)
    else:
        text, page = _render(folder, figures)
    prefix = "" if target.stem == "report" else f"{target.stem}-"
    target.parent.mkdir(parents=True, exist_ok=True)
    tables = []
    for name, frame in (("points", page.points), ("point-differences", page.paired)):
        if frame is not None:
            path = target.parent / f"{prefix}{name}.csv"
            atomic_write_bytes(path, frame.to_csv(index=False).encode())
            tables.append(path)
    data = text.encode()
    atomic_write_bytes(target, data)
    return ReportResult(target, len(data), [f.key for f in page.figures], tables, page.missing)


build_report = write_report
