"""Who gains and who loses: paired differences of surplus per group of traders.

A run that collects ``totals`` stores each trader's surplus over the run with the columns that
group traders: ``role``, ``degree_quartile`` (1-4, trading degree before any intervention),
``left`` (1 for a trader an intervention took out) and every network attribute (``region``).
Arms of one ``(point, replicate)`` share their populations (common random numbers), so the same
trader row is the same trader in every arm: for each pair, each group's surplus in the arm is
set against the same traders' surplus in the baseline, the groups being those of the arm (the
scenario decides who left). A trader who entered in the arm had no surplus in the baseline.

References
----------
A. M. Law, *Simulation Modeling and Analysis*, 5th ed. (2015), sec. 11.2 (paired comparison
under common random numbers); B. Efron and R. J. Tibshirani, *An Introduction to the Bootstrap*
(1993), ch. 13 (percentile interval).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from propensim.experiments.compare import bootstrap_mean

#: Columns of the totals table that are not groupings.
_NOT_GROUPS = ("run_id", "trader", "surplus", "units")

COLUMNS = (
    "arm",
    "baseline",
    "grouping",
    "group",
    "n_pairs",
    "traders",
    "mean_arm",
    "mean_baseline",
    "mean_diff",
    "ci_low",
    "ci_high",
    "confidence",
    "p_up",
)


def group_columns(totals) -> list[str]:
    """The grouping columns a totals table holds, in a fixed order."""
    preferred = ["role", "degree_quartile", "left"]
    cols = [c for c in preferred if c in totals.columns]
    return cols + sorted(c for c in totals.columns if c not in (*_NOT_GROUPS, *preferred))


def compare_groups(
    runs,
    totals,
    baseline: str,
    *,
    groupings: Sequence[str] | None = None,
    confidence: float = 0.95,
    bootstrap: int = 2000,
    seed: int = 0,
):
    """Paired difference of total surplus per group, every arm against the baseline.

    Parameters
    ----------
    runs : pandas.DataFrame
        The runs table (``run_id``, ``arm``, ``point``, ``replicate``, ``status``).
    totals : pandas.DataFrame
        The stored totals (``run_id``, ``trader``, groupings, ``surplus``).
    baseline : str
        The arm the others are compared with.
    groupings : sequence of str, optional
        Grouping columns (default: all of :func:`group_columns`).
    confidence, bootstrap, seed
        As in :func:`propensim.experiments.compare.compare_arms`.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`COLUMNS`: per arm, grouping and group, the pairs, the mean number of
        traders in the group, mean surplus of the group (price units, summed over its traders
        and the run) in each arm, the mean paired difference with its bootstrap interval, and
        the share of resamples above zero.
    """
    import pandas as pd

    ok = runs[runs["status"] == "ok"] if "status" in runs.columns else runs
    arms = list(dict.fromkeys(ok.sort_values("index")["arm"] if "index" in ok else ok["arm"]))
    if baseline not in arms:
        raise ValueError(f"baseline must be one of the arms ({', '.join(arms)}), got {baseline!r}")
    groupings = list(groupings) if groupings else group_columns(totals)
    for g in groupings:
        if g not in totals.columns:
            raise ValueError(
                f"totals have no grouping {g!r}; allowed: {', '.join(group_columns(totals))}"
            )
    keyed = ok.set_index("run_id")[["arm", "point", "replicate"]]
    t = totals.join(keyed, on="run_id", how="inner")
    base = t[t["arm"] == baseline].set_index(["point", "replicate", "trader"])["surplus"]
    rows = []
    for i_arm, arm in enumerate(a for a in arms if a != baseline):
        mine = t[t["arm"] == arm]
        if mine.empty:
            continue
        pair_key = pd.MultiIndex.from_frame(mine[["point", "replicate", "trader"]])
        base_surplus = base.reindex(pair_key).to_numpy(dtype=float)
        mine = mine.assign(base_surplus=np.nan_to_num(base_surplus, nan=0.0))
        has_base = mine.set_index(["point", "replicate"]).index.isin(
            base.index.droplevel("trader").unique()
        )
        mine = mine[has_base]
        for i_g, grouping in enumerate(groupings):
            per_pair = mine.groupby(["point", "replicate", grouping], sort=True, observed=True).agg(
                arm_s=("surplus", "sum"), base_s=("base_surplus", "sum"), n=("trader", "size")
            )
            labels = per_pair.index.get_level_values(grouping)
            for i_label, label in enumerate(pd.unique(labels)):
                part = per_pair[labels == label]
                a = part["arm_s"].to_numpy(float)
                b = part["base_s"].to_numpy(float)
                rng = np.random.default_rng(
                    np.random.SeedSequence(seed, spawn_key=(i_arm, i_g, i_label))
                )
                lo, hi, up = bootstrap_mean(
                    a - b, confidence=confidence, n_resamples=bootstrap, rng=rng
                )
                rows.append(
                    {
                        "arm": arm,
                        "baseline": baseline,
                        "grouping": grouping,
                        "group": _label(grouping, label),
                        "n_pairs": int(a.size),
                        "traders": float(part["n"].mean()),
                        "mean_arm": float(a.mean()),
                        "mean_baseline": float(b.mean()),
                        "mean_diff": float((a - b).mean()),
                        "ci_low": lo,
                        "ci_high": hi,
                        "confidence": float(confidence),
                        "p_up": up,
                    }
                )
    return pd.DataFrame(rows, columns=list(COLUMNS))


def _label(grouping: str, value) -> str:
    if grouping == "left":
        return "left" if int(value) else "stayed"
    if grouping == "degree_quartile":
        return f"Q{int(value)}" + {1: " (least connected)", 4: " (best connected)"}.get(
            int(value), ""
        )
    return str(value)


def format_groups(table) -> str:
    """The group table as aligned plain text."""
    if table.empty:
        return "(no per-trader totals stored: set collect.totals = true)"
    level = f"{round(100 * float(table['confidence'].iloc[0]))}%"
    header = ["arm", "vs", "group", "traders", "surplus diff", f"{level} CI low", "CI high"]
    lines = []
    for r in table.to_dict("records"):
        lines.append(
            [
                str(r["arm"]),
                str(r["baseline"]),
                f"{r['grouping']}={r['group']}",
                f"{r['traders']:.4g}",
                f"{r['mean_diff']:+.4g}",
                f"{r['ci_low']:+.4g}",
                f"{r['ci_high']:+.4g}",
            ]
        )
    widths = [max([len(h), *(len(c[i]) for c in lines)]) for i, h in enumerate(header)]

    def fmt(cells):
        return "  ".join(
            c.rjust(w) if i >= 3 else c.ljust(w)
            for i, (c, w) in enumerate(zip(cells, widths, strict=True))
        ).rstrip()

    return "\n".join([fmt(header), *(fmt(c) for c in lines)])


def group_statements(table) -> list[str]:
    """One plain sentence per group: who gains, who loses, how sure (MODEL.md section 9)."""
    from propensim.experiments.compare import likelihood_term

    out = []
    for r in table.to_dict("records"):
        diff = r["mean_diff"]
        if not np.isfinite(diff):
            continue
        if diff == 0 and r["ci_low"] == 0 and r["ci_high"] == 0:
            out.append(f"{r['grouping']}={r['group']}: no change in {r['arm']} in any pair")
            continue
        gains = diff > 0
        share = r["p_up"] if gains else 1.0 - r["p_up"]
        word = "gain" if gains else "lose"
        out.append(
            f"{r['grouping']}={r['group']} traders {word} {abs(diff):.4g} of surplus in all "
            f"(per run, price units) in {r['arm']} against {r['baseline']} "
            f"({round(100 * r['confidence'])}% interval {r['ci_low']:+.4g} to "
            f"{r['ci_high']:+.4g}); "
            f"that they {word} is {likelihood_term(share)} ({100 * share:.0f}% of resamples)"
        )
    return out
