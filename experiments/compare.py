"""Paired comparisons of arms: the same populations, networks and seeds under different rules.

Arms of one replicate at one design point share their seed (common random numbers), so the
difference ``arm - baseline`` of a metric is taken pair by pair, matched on ``(point, replicate)``:
the population and network noise they share cancels, and a paired comparison needs far fewer
replicates than comparing two independent samples.

For each metric and each arm against the baseline the table gives the mean paired difference, a
bootstrap percentile confidence interval of that mean, the share of bootstrap resamples whose
mean difference is above zero (``p_up``), and the share of pairs in which each side is better
(ties split half and half). "Better" follows the metric's ``better`` attribute (higher
efficiency, lower price dispersion); a metric with no better direction (a price level, tax
revenue) gets no "better" and no win share. :func:`statements` turns each row into one plain
sentence with the calibrated likelihood terms of MODEL.md section 9.

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
    "p_up",
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
    lo, hi, _ = bootstrap_mean(diffs, confidence=confidence, n_resamples=n_resamples, rng=rng)
    return lo, hi


def bootstrap_mean(
    diffs: np.ndarray, *, confidence: float, n_resamples: int, rng: np.random.Generator
) -> tuple[float, float, float]:
    """Percentile interval of the mean of ``diffs`` and the share of resample means above 0.

    The share counts a resample mean of exactly 0 as half (so identical arms give 0.5).
    Same draws as :func:`bootstrap_mean_ci`.
    """
    diffs = np.asarray(diffs, dtype=float)  # shape: (n,)
    n = diffs.size
    if n == 0:
        return float("nan"), float("nan"), float("nan")
    means = np.empty(n_resamples)  # shape: (n_resamples,)
    per_chunk = max(1, _CHUNK // n)
    for start in range(0, n_resamples, per_chunk):
        stop = min(start + per_chunk, n_resamples)
        idx = rng.integers(0, n, size=(stop - start, n))  # shape: (chunk, n)
        means[start:stop] = diffs[idx].mean(axis=1)
    alpha = 1.0 - confidence
    lo, hi = np.quantile(means, [alpha / 2, 1 - alpha / 2])
    up = (np.count_nonzero(means > 0) + 0.5 * np.count_nonzero(means == 0)) / n_resamples
    return float(lo), float(hi), float(up)


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
        the pairs where the arm is better; for ``None`` or a missing metric there is no better
        direction and ``arm_wins`` is NaN.

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
    >>> table = compare_arms(runs, "volume", baseline="a", bootstrap=200,
    ...                      directions={"volume": "higher"})
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
    lo, hi, up = bootstrap_mean(diffs, confidence=confidence, n_resamples=n_resamples, rng=rng)
    arm_better = diffs < 0 if way == "lower" else diffs > 0
    tied = diffs == 0
    wins = (np.count_nonzero(arm_better) + 0.5 * np.count_nonzero(tied)) / n if n else np.nan
    if way is None:  # no better direction: no win share either
        wins = np.nan
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
        "p_up": up,
        "better": way,
        "arm_wins": float(wins),
        "baseline_wins": float(1 - wins) if np.isfinite(wins) else np.nan,
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


#: Float noise: a number within this of 0, relative to the larger of 1 and the largest magnitude
#: of its column (of its metric, in the comparison table), is shown as 0: a price dispersion of
#: 9.6e-15 is 0.
NOISE = 1e-12


def _denoised(values) -> np.ndarray:
    arr = np.asarray(values, dtype=float)  # shape: (n,)
    finite = np.abs(arr[np.isfinite(arr)])
    scale = max(1.0, float(finite.max())) if finite.size else 1.0
    return np.where(np.abs(arr) < NOISE * scale, 0.0, arr)


def format_numbers(values, digits: int = 4, sign: bool = False) -> list[str]:
    """One fixed-point format for a whole column: float noise as 0, never scientific notation.

    The decimals give ``digits`` significant digits to the column's largest magnitude (at most
    8 decimals; none when every value is a whole number); NaN and infinities show as ``-``.

    Examples
    --------
    >>> format_numbers([12.5, 9.6e-15, 0.25])
    ['12.50', '0.00', '0.25']
    >>> format_numbers([250000.0, -3.0], sign=True)
    ['+250000', '-3']
    """
    arr = _denoised(values)
    finite = np.abs(arr[np.isfinite(arr) & (arr != 0)])
    decimals = 0
    if finite.size and not np.all(finite == np.round(finite)):  # whole numbers: no decimals
        decimals = int(min(max(digits - 1 - np.floor(np.log10(finite.max())), 0), 8))
    out = []
    for x in arr:
        if not np.isfinite(x):
            out.append("-")
            continue
        text = f"{x:+.{decimals}f}" if sign else f"{x:.{decimals}f}"
        if float(text) == 0:  # no "-0.00" or "+0.00": zero has no sign
            text = text.lstrip("+-")
        out.append(text)
    return out


def format_frame(frame, digits: int = 4) -> str:
    """A DataFrame as plain text, each float column in one format (:func:`format_numbers`)."""
    import pandas as pd

    shown = frame.copy()
    for col in shown.columns:
        if pd.api.types.is_float_dtype(shown[col]):
            shown[col] = format_numbers(shown[col].to_numpy(), digits)
    with pd.option_context("display.max_rows", None, "display.max_columns", None):
        return shown.to_string(index=False, max_colwidth=None, justify="right")


def metric_notes(metrics: Sequence[str]) -> list[str]:
    """``name: description; unit: ...; a run: ...`` of each registered metric (others left out)."""
    from propensim.plugins import registry
    from propensim.plugins.metrics import describe_metric

    out = []
    for name in dict.fromkeys(metrics):
        try:
            cls = registry.get_plugin("metrics", name)
        except registry.UnknownPluginError:
            continue
        out.append(f"{name}: {describe_metric(cls)}")
    return out


def format_table(table) -> str:
    """The comparison table as aligned plain text, wins in percent, then each metric's unit.

    Each metric's differences share one fixed-point format (4 significant digits for its largest
    one); float noise shows as 0 (:data:`NOISE`).
    """
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
    shown: dict[tuple[int, str], str] = {}  # (row, column) -> text, one format per metric
    for metric in dict.fromkeys(table["metric"]):
        rows = np.flatnonzero((table["metric"] == metric).to_numpy())
        cols = ["mean_diff", "ci_low", "ci_high"]
        block = table.iloc[rows][cols].to_numpy(dtype=float)  # shape: (n_rows, 3)
        texts = format_numbers(block.reshape(-1), sign=True)
        for k, text in enumerate(texts):
            shown[(int(rows[k // 3]), cols[k % 3])] = text
    for i, r in enumerate(table.to_dict("records")):
        cells = [str(r["metric"]), str(r["arm"]), str(r["baseline"])]
        if with_point:
            cells.append("all" if pd.isna(r["point"]) else str(r["point"]))
        cells += [
            str(r["n_pairs"]),
            shown[(i, "mean_diff")],
            shown[(i, "ci_low")],
            shown[(i, "ci_high")],
            r["better"] if isinstance(r["better"], str) else "-",
            "-" if pd.isna(r["arm_wins"]) else f"{100 * r['arm_wins']:.0f}%",
        ]
        lines.append(cells)
    widths = [max([len(h), *(len(c[i]) for c in lines)]) for i, h in enumerate(header)]
    first_number = header.index("pairs")

    def fmt(cells: list[str]) -> str:
        return "  ".join(
            c.rjust(w) if i >= first_number else c.ljust(w)
            for i, (c, w) in enumerate(zip(cells, widths, strict=True))
        ).rstrip()

    notes = metric_notes(list(table["metric"])) if len(table) else []
    return "\n".join([fmt(header), *(fmt(c) for c in lines), *(["", *notes] if notes else [])])


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


# -- plain language (MODEL.md section 9) ----------------------------------------------------------
def likelihood_term(p: float) -> str:
    """The calibrated term for a probability ``p`` (share of bootstrap resamples).

    The scale of Mastrandrea et al. (2010), the IPCC guidance note for lead authors on the
    consistent treatment of uncertainties. Strict bounds as in MODEL.md section 9: "virtually
    certain" above 99%, "very likely" above 90%, "likely" above 66%, "about as likely as not"
    from 33% to 66%, "unlikely" below 33%, "very unlikely" below 10%, "exceptionally unlikely"
    below 1%.
    """
    if not np.isfinite(p):
        return "not assessable"
    if p > 0.99:
        return "virtually certain"
    if p > 0.90:
        return "very likely"
    if p > 0.66:
        return "likely"
    if p >= 0.33:
        return "about as likely as not"
    if p >= 0.10:
        return "unlikely"
    if p >= 0.01:
        return "very unlikely"
    return "exceptionally unlikely"


def _amount(x: float, base: float) -> tuple[str, bool]:
    """A change as a percentage of the baseline mean when that is meaningful, else absolute."""
    if np.isfinite(base) and abs(base) > 1e-12:
        if abs(x) < NOISE * max(1.0, abs(base)):  # float noise (a shown number, not the data)
            return "0%", True
        return f"{100 * x / abs(base):.3g}%", True
    if abs(x) < NOISE:
        return "0", False
    return f"{x:.4g}", False


def statements(table) -> list[str]:
    """One plain sentence per row of a comparison table.

    Example: "volume: falls by 12% in tax against baseline (95% interval 9% to 15%); a fall is
    very likely (98% of resamples)". The likelihood is the share of bootstrap resamples of the
    mean paired difference on the side of the estimate, named by :func:`likelihood_term`.
    Whether the change is good is said only for metrics with a better direction.
    """
    out = []
    for r in table.to_dict("records"):
        if "point" in r and r["point"] is not None and not _isna(r["point"]):
            continue  # the overall rows speak for the design
        name, arm, base = r["metric"], r["arm"], r["baseline"]
        n, diff, up = r["n_pairs"], r["mean_diff"], r["p_up"]
        if not n or not np.isfinite(diff):
            out.append(f"{name}: no finite pairs to compare in {arm} against {base}")
            continue
        if diff == 0 and r["ci_low"] == 0 and r["ci_high"] == 0:
            out.append(f"{name}: identical in {arm} and {base} in every pair")
            continue
        rises = diff > 0
        share = up if rises else 1.0 - up
        mean_b = r["mean_baseline"]
        size, _ = _amount(abs(diff), mean_b)
        lo, _ = _amount(r["ci_low"], mean_b)
        hi, _ = _amount(r["ci_high"], mean_b)
        level = f"{round(100 * r['confidence'])}%"
        verb, noun = ("rises", "a rise") if rises else ("falls", "a fall")
        text = (
            f"{name}: {verb} by {size} in {arm} against {base} ({level} interval of the change "
            f"{lo} to {hi}); {noun} is {likelihood_term(share)} ({100 * share:.0f}% of "
            f"resamples, {n} pairs)"
        )
        way = r.get("better")
        if isinstance(way, str):
            good = rises == (way == "higher")
            text += "; for this metric that is " + ("better" if good else "worse")
        out.append(text)
    return out


def _isna(x) -> bool:
    try:
        return bool(np.isnan(x))
    except TypeError:
        return x is None
