"""Paired comparisons of arms: the same populations, networks and seeds under different rules.

Arms of one replicate at one design point share their seed (common random numbers), so the
difference ``arm - baseline`` of a metric is taken pair by pair, matched on ``(point, replicate)``:
the population and network noise they share cancels, and a paired comparison needs far fewer
replicates than comparing two independent samples.

For each metric and each arm against the baseline the table gives the mean paired difference, a
bootstrap percentile confidence interval of that mean, and the share of pairs in which each side is
better (ties split half and half). "Better" follows the metric's ``better`` attribute (higher
efficiency, lower price dispersion); for a metric with no better direction (a price level) it
means higher, and the table says so.

References
----------
B. Efron and R. J. Tibshirani, *An Introduction to the Bootstrap*, Chapman & Hall (1993),
ch. 13 (percentile interval).
A. M. Law, *Simulation Modeling and Analysis*, 5th ed., McGraw-Hill (2015), sec. 11.2
(common random numbers and the paired-t comparison of two systems).
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np

#: Columns of the comparison table, in order (``point`` only with ``by_point=True``).
COLUMNS = (
    "metric",
    "arm",
    "baseline",
    "n_pairs",
    "mean_arm",
    "mean_baseline",
    "mean_diff",
    "ci_low",
    "ci_high",
    "confidence",
    "better",
    "arm_wins",
    "baseline_wins",
)

_CHUNK = 2_000_000  # bootstrap indices drawn at a time (16 MB of int64)


def bootstrap_mean_ci(
    diffs: np.ndarray, *, confidence: float, n_resamples: int, rng: np.random.Generator
) -> tuple[float, float]:
    """Percentile bootstrap confidence interval of the mean of ``diffs``.

    Resamples ``diffs`` with replacement ``n_resamples`` times, takes each resample's mean and
    returns the ``(1 - confidence) / 2`` and ``(1 + confidence) / 2`` quantiles of those means.

    Parameters
    ----------
    diffs : ndarray, shape (n,)
        Paired differences (finite).
    confidence : float
        In (0, 1).
    n_resamples : int
        Bootstrap resamples (>= 1).
    rng : numpy.random.Generator
        The only source of randomness.

    Returns
    -------
    (float, float)
        Lower and upper bounds (NaN for an empty sample).

    References
    ----------
    Efron and Tibshirani (1993), ch. 13: the percentile interval.
    """
    diffs = np.asarray(diffs, dtype=float)  # shape: (n,)
    n = diffs.size
    if n == 0:
        return float("nan"), float("nan")
    means = np.empty(n_resamples)  # shape: (n_resamples,)
    per_chunk = max(1, _CHUNK // n)
    for start in range(0, n_resamples, per_chunk):
        stop = min(start + per_chunk, n_resamples)
        idx = rng.integers(0, n, size=(stop - start, n))  # shape: (chunk, n)
        means[start:stop] = diffs[idx].mean(axis=1)
    alpha = 1.0 - confidence
    lo, hi = np.quantile(means, [alpha / 2, 1 - alpha / 2])
    return float(lo), float(hi)


def _check(confidence, bootstrap) -> None:
    if not isinstance(confidence, int | float) or not 0 < float(confidence) < 1:
        raise ValueError(f"confidence must be a number in (0, 1), got {confidence!r}")
    if isinstance(bootstrap, bool) or not isinstance(bootstrap, int | np.integer) or bootstrap < 1:
        raise ValueError(f"bootstrap must be a whole number >= 1, got {bootstrap!r}")


def compare_arms(
    runs,
    metrics: Sequence[str] | str,
    baseline: str,
    *,
    confidence: float = 0.95,
    bootstrap: int = 2000,
    seed: int = 0,
    by_point: bool = False,
    directions: dict[str, str | None] | None = None,
):
    """Paired differences of every arm against the baseline, per metric.

    Parameters
    ----------
    runs : pandas.DataFrame
        The runs table (columns ``arm``, ``point``, ``replicate``, the metrics, and optionally
        ``status``: only ``"ok"`` runs count).
    metrics : str or sequence of str
        Metric columns to compare.
    baseline : str
        The arm every other arm is compared against.
    confidence : float
        Level of the bootstrap interval, in (0, 1).
    bootstrap : int
        Bootstrap resamples per interval.
    seed : int
        Seed of the bootstrap (the table is reproducible).
    by_point : bool
        One row per design point as well (column ``point``).
    directions : dict, optional
        ``metric -> "higher" | "lower" | None``: which direction is better. ``arm_wins`` counts
        the pairs where the arm is better; ``None`` or a missing metric counts "higher".

    Returns
    -------
    pandas.DataFrame
        Columns :data:`COLUMNS` (plus ``point``): pairs used (both runs ok and finite),
        means of each side, mean difference ``arm - baseline`` and its interval, and the share
        of pairs in which the arm is better (``arm_wins``; column ``better`` says which
        direction counts) or the baseline is (ties count half to each).

    References
    ----------
    Law (2015), sec. 11.2: paired comparison under common random numbers; Efron and
    Tibshirani (1993), ch. 13: percentile bootstrap interval.

    Examples
    --------
    >>> import pandas as pd
    >>> runs = pd.DataFrame({"arm": ["a", "b"] * 3, "point": 0, "replicate": [0, 0, 1, 1, 2, 2],
    ...                      "volume": [10.0, 12.0, 11.0, 12.5, 9.0, 11.0]})
    >>> table = compare_arms(runs, "volume", baseline="a", bootstrap=200)
    >>> float(table.loc[0, "mean_diff"]), float(table.loc[0, "arm_wins"])
    (1.8333333333333333, 1.0)
    """
    import pandas as pd

    _check(confidence, bootstrap)
    metrics = [metrics] if isinstance(metrics, str) else list(metrics)
    directions = dict(directions or {})
    for metric, way in directions.items():
        if way not in ("higher", "lower", None):
            raise ValueError(
                f"directions[{metric!r}] must be 'higher', 'lower' or None, got {way!r}"
            )
    if not metrics:
        raise ValueError("metrics must name at least one metric column")
    for col in ("arm", "point", "replicate", *metrics):
        if col not in runs.columns:
            raise ValueError(f"runs has no column {col!r}; columns: {', '.join(map(str, runs))}")
    ok = runs[runs["status"] == "ok"] if "status" in runs.columns else runs
    if "index" in ok.columns:
        ok = ok.sort_values("index", kind="stable")
    arms = list(dict.fromkeys(runs.sort_values("index")["arm"] if "index" in runs else runs["arm"]))
    if baseline not in arms:
        raise ValueError(f"baseline must be one of the arms ({', '.join(arms)}), got {baseline!r}")
    keyed = ok.set_index(["point", "replicate"])
    base = keyed[keyed["arm"] == baseline]
    if base.index.has_duplicates:
        raise ValueError("runs must hold one run per (arm, point, replicate)")
    rows = []
    for i_arm, arm in enumerate(a for a in arms if a != baseline):
        other = keyed[keyed["arm"] == arm]
        if other.index.has_duplicates:
            raise ValueError("runs must hold one run per (arm, point, replicate)")
        common = other.index.intersection(base.index).sort_values()
        for i_metric, metric in enumerate(metrics):
            a = other.loc[common, metric].to_numpy(dtype=float)  # shape: (n_pairs,)
            b = base.loc[common, metric].to_numpy(dtype=float)  # shape: (n_pairs,)
            points = common.get_level_values("point").to_numpy()  # shape: (n_pairs,)
            both_finite = np.isfinite(a) & np.isfinite(b)
            groups = [(None, both_finite)]
            if by_point:
                groups += [(p, both_finite & (points == p)) for p in np.unique(points)]
            for i_group, (point, mask) in enumerate(groups):
                rng = np.random.default_rng(
                    np.random.SeedSequence(seed, spawn_key=(i_arm, i_metric, i_group))
                )
                way = directions.get(metric)
                rows.append(
                    _row(
                        metric,
                        arm,
                        baseline,
                        point,
                        a[mask],
                        b[mask],
                        confidence,
                        bootstrap,
                        rng,
                        way,
                    )
                )
    columns = list(COLUMNS)
    if by_point:
        columns.insert(3, "point")
    table = pd.DataFrame(rows, columns=columns)
    if by_point:
        table["point"] = table["point"].astype("Int64")
    return table


def _row(metric, arm, baseline, point, a, b, confidence, n_resamples, rng, way) -> dict:
    diffs = a - b  # shape: (n_pairs,)
    n = diffs.size
    lo, hi = bootstrap_mean_ci(diffs, confidence=confidence, n_resamples=n_resamples, rng=rng)
    arm_better = diffs < 0 if way == "lower" else diffs > 0
    tied = diffs == 0
    wins = (np.count_nonzero(arm_better) + 0.5 * np.count_nonzero(tied)) / n if n else np.nan
    return {
        "metric": metric,
        "arm": arm,
        "baseline": baseline,
        "point": point,
        "n_pairs": n,
        "mean_arm": float(a.mean()) if n else np.nan,
        "mean_baseline": float(b.mean()) if n else np.nan,
        "mean_diff": float(diffs.mean()) if n else np.nan,
        "ci_low": lo,
        "ci_high": hi,
        "confidence": float(confidence),
        "better": way,
        "arm_wins": float(wins),
        "baseline_wins": float(1 - wins) if n else np.nan,
    }


def settings_from_manifest(manifest: dict, runs) -> dict:
    """Comparison settings from a stored spec's ``[compare]`` table, with defaults.

    Baseline: ``compare.baseline``, else the first arm; metrics: ``compare.metrics``, else every
    stored metric; confidence 0.95 and 2000 resamples unless the spec says otherwise.
    """
    spec = manifest.get("spec") or {}
    comp = spec.get("compare") or {}
    arms = list(dict.fromkeys(runs.sort_values("index")["arm"])) if len(runs) else []
    return {
        "baseline": comp.get("baseline") or (arms[0] if arms else ""),
        "metrics": list(comp.get("metrics") or manifest.get("metrics") or []),
        "confidence": float(comp.get("confidence") or 0.95),
        "bootstrap": int(comp.get("bootstrap") or 2000),
    }


def compare_folder(
    folder,
    metrics: Sequence[str] | None = None,
    baseline: str | None = None,
    *,
    by_point: bool = False,
    seed: int = 0,
):
    """:func:`compare_arms` on a results folder, with the settings of its spec's ``[compare]``."""
    from propensim.experiments.store import load

    results = load(Path(folder))
    runs = results.runs
    settings = settings_from_manifest(results.manifest, runs)
    if len(runs) == 0:
        raise ValueError(f"{folder}: no runs stored yet")
    arms = set(runs["arm"])
    if len(arms) < 2:
        raise ValueError(f"{folder}: the experiment has one arm; nothing to compare")
    metrics = list(metrics) if metrics else settings["metrics"]
    return compare_arms(
        runs,
        metrics,
        baseline or settings["baseline"],
        confidence=settings["confidence"],
        bootstrap=settings["bootstrap"],
        seed=seed,
        by_point=by_point,
        directions=metric_directions(metrics),
    )


def metric_directions(metrics: Sequence[str]) -> dict[str, str | None]:
    """The better direction of each registered metric (``None`` for unknown or neutral ones)."""
    from propensim.plugins import registry

    out: dict[str, str | None] = {}
    for name in metrics:
        try:
            out[name] = getattr(registry.get_plugin("metrics", name), "better", None)
        except registry.UnknownPluginError:
            out[name] = None
    return out


def format_table(table) -> str:
    """The comparison table as aligned plain text (4 significant digits, wins in percent)."""
    import pandas as pd

    with_point = "point" in table.columns
    level = f"{round(float(table['confidence'].iloc[0]) * 100):d}% " if len(table) else ""
    header = [
        "metric",
        "arm",
        "vs",
        *(["point"] if with_point else []),
        "pairs",
        "mean diff",
        f"{level}CI low",
        "CI high",
        "better",
        "arm better",
    ]
    lines = []
    for r in table.to_dict("records"):
        cells = [str(r["metric"]), str(r["arm"]), str(r["baseline"])]
        if with_point:
            cells.append("all" if pd.isna(r["point"]) else str(r["point"]))
        cells += [
            str(r["n_pairs"]),
            f"{r['mean_diff']:+.4g}",
            f"{r['ci_low']:+.4g}",
            f"{r['ci_high']:+.4g}",
            r["better"] if isinstance(r["better"], str) else "(higher)",
            "nan" if pd.isna(r["arm_wins"]) else f"{100 * r['arm_wins']:.0f}%",
        ]
        lines.append(cells)
    widths = [max([len(h), *(len(c[i]) for c in lines)]) for i, h in enumerate(header)]
    first_number = header.index("pairs")

    def fmt(cells: list[str]) -> str:
        return "  ".join(
            c.rjust(w) if i >= first_number else c.ljust(w)
            for i, (c, w) in enumerate(zip(cells, widths, strict=True))
        ).rstrip()

    return "\n".join([fmt(header), *(fmt(c) for c in lines)])


def point_means(runs, metrics: Sequence[str], parameters: Sequence[str]):
    """Mean of each metric per design point and arm, labelled by the point's parameter values.

    Parameters
    ----------
    runs : pandas.DataFrame
        The runs table (only ``status == "ok"`` rows count).
    metrics : sequence of str
        Metric columns.
    parameters : sequence of str
        Design parameter columns (dotted paths) that label the points.

    Returns
    -------
    pandas.DataFrame
        One row per (parameters..., arm), columns ``n`` and the metric means.
    """
    ok = runs[runs["status"] == "ok"] if "status" in runs.columns else runs
    keys = [*parameters, "arm"]
    grouped = ok.groupby(keys, sort=True, dropna=False)
    table = grouped[list(metrics)].mean()
    table.insert(0, "n", grouped.size())
    return table.reset_index()
