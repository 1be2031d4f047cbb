"""Tables of a results folder: per design point, means with intervals, and paired differences.

Per design point: the parameter values, the mean and bootstrap interval of every metric per arm,
and the paired differences between arms.

Every table is a pandas DataFrame in long form (one row per point, arm and metric), so it writes
straight to CSV, filters with ordinary pandas and draws with :mod:`propensim.experiments.figures`.

Intervals are percentile bootstrap intervals of the mean over replicates (Efron and Tibshirani
1993, ch. 13), drawn from a generator seeded per cell, so a table is the same on every call.
With one replicate the interval collapses to the single value; read it as "no interval".

References
----------
B. Efron and R. J. Tibshirani, *An Introduction to the Bootstrap*, Chapman & Hall (1993), ch. 13.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = [
    "POINT_COLUMNS",
    "design_table",
    "paired_point_table",
    "point_table",
]

#: Columns of :func:`point_table` after the design parameters.
POINT_COLUMNS = ("arm", "metric", "n", "mean", "sd", "ci_low", "ci_high", "confidence")


def _ok(runs):
    return runs[runs["status"] == "ok"] if "status" in runs.columns else runs


def _point_labels(runs, parameters: Sequence[str]):
    """One row per design point: ``point`` and the parameter values (first run of the point)."""
    cols = ["point", *[p for p in parameters if p in runs.columns]]
    return runs[cols].drop_duplicates("point").sort_values("point").reset_index(drop=True)


def point_table(
    runs,
    metrics: Sequence[str],
    parameters: Sequence[str] = (),
    *,
    confidence: float = 0.95,
    bootstrap: int = 2000,
    seed: int = 0,
):
    """Mean of every metric per design point and arm, with a bootstrap interval over replicates.

    Parameters
    ----------
    runs : pandas.DataFrame
        The runs table (``point``, ``arm``, the metrics, the parameters; only ``status == "ok"``
        rows count).
    metrics : sequence of str
        Metric columns.
    parameters : sequence of str
        Design parameter columns (dotted paths) to label each point with.
    confidence : float
        Level of the interval, in (0, 1).
    bootstrap : int
        Bootstrap resamples per interval.
    seed : int
        Seed of the bootstrap (cell ``(point, arm, metric)`` gets its own spawned stream).

    Returns
    -------
    pandas.DataFrame
        Columns ``point``, the parameters, then :data:`POINT_COLUMNS`: runs used (finite values),
        mean, standard deviation over replicates, interval bounds and its level. Points are in
        design order, arms in run order, metrics as given.

    Examples
    --------
    >>> import pandas as pd
    >>> runs = pd.DataFrame({"point": [0, 0, 1, 1], "arm": "", "a": [1.0, 1.0, 2.0, 2.0],
    ...                      "volume": [3.0, 5.0, 6.0, 8.0]})
    >>> point_table(runs, ["volume"], ["a"], bootstrap=100)["mean"].tolist()
    [4.0, 7.0]
    """
    import pandas as pd

    from propensim.experiments.compare import bootstrap_mean_ci

    metrics = list(metrics)
    for col in ("point", "arm", *metrics):
        if col not in runs.columns:
            raise ValueError(f"runs has no column {col!r}; columns: {', '.join(map(str, runs))}")
    ok = _ok(runs)
    if "index" in ok.columns:
        ok = ok.sort_values("index", kind="stable")
    arms = list(dict.fromkeys(ok["arm"]))
    labels = _point_labels(runs, parameters)
    params = [c for c in labels.columns if c != "point"]
    rows = []
    for label in labels.to_dict("records"):
        p = label["point"]
        at_point = ok[ok["point"] == p]
        for i_arm, arm in enumerate(arms):
            cell = at_point[at_point["arm"] == arm]
            for i_m, metric in enumerate(metrics):
                x = cell[metric].to_numpy(dtype=float)  # shape: (replicates,)
                x = x[np.isfinite(x)]
                rng = np.random.default_rng(
                    np.random.SeedSequence(seed, spawn_key=(int(p), i_arm, i_m))
                )
                lo, hi = bootstrap_mean_ci(x, confidence=confidence, n_resamples=bootstrap, rng=rng)
                rows.append(
                    {
                        **label,
                        "arm": arm,
                        "metric": metric,
                        "n": int(x.size),
                        "mean": float(x.mean()) if x.size else np.nan,
                        "sd": float(x.std(ddof=1)) if x.size > 1 else np.nan,
                        "ci_low": lo,
                        "ci_high": hi,
                        "confidence": float(confidence),
                    }
                )
    return pd.DataFrame(rows, columns=["point", *params, *POINT_COLUMNS])


def paired_point_table(
    runs,
    metrics: Sequence[str],
    baseline: str,
    parameters: Sequence[str] = (),
    *,
    confidence: float = 0.95,
    bootstrap: int = 2000,
    seed: int = 0,
    directions=None,
):
    """Paired differences ``arm - baseline`` per design point, labelled by parameter values.

    :func:`propensim.experiments.compare.compare_arms` with ``by_point=True``, the rows of single
    points joined to the point's parameter values; the all-points rows keep ``point`` empty.

    Returns
    -------
    pandas.DataFrame
        ``point``, the parameters, then the comparison columns
        (:data:`propensim.experiments.compare.COLUMNS`).
    """
    from propensim.experiments.compare import COLUMNS, compare_arms

    table = compare_arms(
        runs,
        list(metrics),
        baseline,
        confidence=confidence,
        bootstrap=bootstrap,
        seed=seed,
        by_point=True,
        directions=directions,
    )
    labels = _point_labels(runs, parameters)
    labels["point"] = labels["point"].astype("Int64")
    params = [c for c in labels.columns if c != "point"]
    merged = table.merge(labels, on="point", how="left", sort=False)
    order = ["point", *params, *[c for c in COLUMNS]]
    return merged[order]


def design_table(spec):
    """The design points a spec will run: point index, parameter values and runs per point.

    Parameters
    ----------
    spec : Spec
        A loaded spec (:func:`propensim.experiments.load_spec`).

    Returns
    -------
    pandas.DataFrame
        Columns ``point``, one per design parameter, ``runs`` (replicates x arms).
    """
    import pandas as pd

    names: list[str] = []
    for point in spec.points:
        names.extend(k for k in point if k not in names)
    per_point = spec.replicates * max(1, len(spec.arm_names))
    rows = [
        {"point": i, **{k: point.get(k) for k in names}, "runs": per_point}
        for i, point in enumerate(spec.points)
    ]
    return pd.DataFrame(rows, columns=["point", *names, "runs"])
