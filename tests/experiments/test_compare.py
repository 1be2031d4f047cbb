"""Paired arm comparisons: bootstrap interval checked against scipy, known shifts, ties."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from propensim.experiments.compare import (
    COLUMNS,
    bootstrap_mean_ci,
    compare_arms,
    format_table,
)


def _runs(base, arm, *, points=1, name="b"):
    """A runs table: baseline 'a' and arm ``name``, paired by (point, replicate)."""
    n = len(base)
    point = np.arange(n) % points
    replicate = np.arange(n) // points
    rows = []
    for i in range(n):
        rows.append({"arm": "a", "point": point[i], "replicate": replicate[i], "m": base[i]})
        rows.append({"arm": name, "point": point[i], "replicate": replicate[i], "m": arm[i]})
    frame = pd.DataFrame(rows)
    frame["index"] = np.arange(len(frame))
    frame["status"] = "ok"
    return frame


def test_bootstrap_ci_agrees_with_scipy():
    # Outside source: scipy.stats.bootstrap(method="percentile") computes the same percentile
    # interval (Efron and Tibshirani 1993, ch. 13); both are Monte Carlo, so they agree within
    # a small fraction of the standard error (Monte Carlo sd of each end ~0.011 se here).
    rng = np.random.default_rng(11)
    diffs = rng.gamma(2.0, 1.5, size=40) - 2.0  # skewed, so the interval is not symmetric
    lo, hi = bootstrap_mean_ci(
        diffs, confidence=0.9, n_resamples=40_000, rng=np.random.default_rng(1)
    )
    ref = stats.bootstrap(
        (diffs,),
        np.mean,
        confidence_level=0.9,
        method="percentile",
        n_resamples=40_000,
        rng=np.random.default_rng(2),
    )
    se = diffs.std(ddof=1) / np.sqrt(diffs.size)
    assert lo == pytest.approx(ref.confidence_interval.low, abs=0.06 * se)
    assert hi == pytest.approx(ref.confidence_interval.high, abs=0.06 * se)
    # and through compare_arms on the same differences
    table = compare_arms(
        _runs(np.zeros(40), diffs), "m", "a", confidence=0.9, bootstrap=40_000, seed=5
    )
    assert table.loc[0, "ci_low"] == pytest.approx(ref.confidence_interval.low, abs=0.06 * se)
    assert table.loc[0, "ci_high"] == pytest.approx(ref.confidence_interval.high, abs=0.06 * se)
    assert table.loc[0, "mean_diff"] == pytest.approx(diffs.mean())


def test_known_positive_shift_excludes_zero():
    rng = np.random.default_rng(3)
    shared = rng.normal(100, 20, size=30)  # large noise common to both arms of a pair
    base = shared + rng.normal(0, 0.5, 30)
    arm = shared + 1.0 + rng.normal(0, 0.5, 30)
    up = {"m": "higher"}
    row = compare_arms(_runs(base, arm), ["m"], "a", seed=0, directions=up).iloc[0]
    assert row["ci_low"] > 0 and row["ci_low"] < 1.0 < row["ci_high"]
    assert row["mean_diff"] == pytest.approx((arm - base).mean())
    assert row["arm_wins"] > 0.85 and row["arm_wins"] + row["baseline_wins"] == 1
    assert row["n_pairs"] == 30
    # Pairing is what makes the shift visible: unpaired, the shared noise (sd 20) swamps it.
    unpaired_se = np.sqrt(base.var(ddof=1) / 30 + arm.var(ddof=1) / 30)
    assert unpaired_se > 3 * (row["ci_high"] - row["ci_low"])


def test_identical_arms_give_zero_and_half_wins():
    base = np.random.default_rng(4).normal(size=25)
    row = compare_arms(_runs(base, base.copy()), "m", "a", directions={"m": "higher"}).iloc[0]
    assert row["ci_low"] <= 0 <= row["ci_high"]
    assert row["mean_diff"] == 0 and row["arm_wins"] == 0.5  # all ties, split half and half
    # Same distribution, independent draws: the interval covers 0 (seeded data).
    rng = np.random.default_rng(8)
    runs = _runs(rng.normal(size=200), rng.normal(size=200))
    row = compare_arms(runs, "m", "a", directions={"m": "higher"}).iloc[0]
    assert row["ci_low"] < 0 < row["ci_high"] and 0.4 < row["arm_wins"] < 0.6


def test_pairs_match_on_point_and_replicate_not_row_order():
    rng = np.random.default_rng(5)
    base = rng.normal(size=12)
    runs = _runs(base, base + 2.0, points=3)
    shuffled = runs.sample(frac=1.0, random_state=1).drop(columns="index")
    a = compare_arms(runs, "m", "a", seed=2)
    b = compare_arms(shuffled, "m", "a", seed=2)
    assert a.loc[0, "mean_diff"] == pytest.approx(2.0) and a.loc[0, "ci_low"] == pytest.approx(2.0)
    pd.testing.assert_frame_equal(a, b)


def test_failed_and_missing_values_are_left_out():
    base = np.arange(6, dtype=float)
    arm = base + 1
    arm[2] = np.nan  # a metric undefined in one run
    runs = _runs(base, arm)
    runs.loc[(runs["arm"] == "b") & (runs["replicate"] == 4), "status"] = "failed"
    row = compare_arms(runs, "m", "a").iloc[0]
    assert row["n_pairs"] == 4 and row["mean_diff"] == 1.0


def test_by_point_and_several_arms_and_metrics():
    rng = np.random.default_rng(6)
    base = rng.normal(size=8)
    runs = _runs(base, base + np.where(np.arange(8) % 2 == 0, 1.0, 3.0), points=2)
    third = runs[runs["arm"] == "b"].assign(
        arm="c", m=lambda f: f["m"] - 1.0, index=lambda f: f["index"] + 100
    )
    runs = pd.concat([runs, third]).assign(m2=lambda f: 2 * f["m"])
    table = compare_arms(runs, ["m", "m2"], "a", by_point=True, bootstrap=200)
    assert list(table.columns) == [*COLUMNS[:3], "point", *COLUMNS[3:]]
    assert list(table["arm"]) == ["b"] * 6 + ["c"] * 6
    b_m = table[(table["arm"] == "b") & (table["metric"] == "m")]
    assert list(b_m["point"].astype("object").fillna(-1)) == [-1, 0, 1]
    assert list(b_m["mean_diff"]) == pytest.approx([2.0, 1.0, 3.0])
    c_m2 = table[(table["arm"] == "c") & (table["metric"] == "m2")]
    assert c_m2["mean_diff"].iloc[0] == pytest.approx(2.0)
    text = format_table(table)
    assert text.splitlines()[0].split()[:4] == ["metric", "arm", "vs", "point"]
    assert len(text.splitlines()) == 13


def test_seeded_and_reproducible():
    rng = np.random.default_rng(9)
    runs = _runs(rng.normal(size=15), rng.normal(size=15))
    pd.testing.assert_frame_equal(
        compare_arms(runs, "m", "a", seed=4), compare_arms(runs, "m", "a", seed=4)
    )
    assert not compare_arms(runs, "m", "a", seed=4).equals(compare_arms(runs, "m", "a", seed=5))


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"baseline": "z"}, "baseline must be one of the arms"),
        ({"metrics": "nope"}, "runs has no column 'nope'"),
        ({"confidence": 1.0}, r"confidence must be a number in \(0, 1\)"),
        ({"bootstrap": 0}, "bootstrap must be a whole number >= 1"),
        ({"metrics": []}, "at least one metric"),
    ],
)
def test_bad_arguments(kwargs, match):
    runs = _runs(np.zeros(3), np.ones(3))
    args = {"metrics": "m", "baseline": "a", **kwargs}
    with pytest.raises(ValueError, match=match):
        compare_arms(runs, args.pop("metrics"), args.pop("baseline"), **args)


def test_wins_follow_the_metrics_better_direction():
    import pandas as pd

    from propensim.experiments.compare import compare_arms, metric_directions, point_means

    runs = pd.DataFrame(
        {
            "arm": ["a", "b"] * 4,
            "point": [0, 0, 0, 0, 1, 1, 1, 1],
            "replicate": [0, 0, 1, 1, 0, 0, 1, 1],
            "population.sigma": [3.0] * 4 + [6.0] * 4,
            "price_sd": [2.0, 1.0, 3.0, 2.5, 4.0, 3.0, 1.0, 1.5],
        }
    )
    # b has the lower dispersion in 3 of 4 pairs; lower dispersion is better (common practice)
    lower = compare_arms(runs, "price_sd", "a", bootstrap=200, directions={"price_sd": "lower"})
    higher = compare_arms(runs, "price_sd", "a", bootstrap=200)
    assert lower.loc[0, "arm_wins"] == 0.75 and lower.loc[0, "better"] == "lower"
    # no better direction: no "better" and no win share (a price level is neither good nor bad)
    assert np.isnan(higher.loc[0, "arm_wins"]) and higher.loc[0, "better"] is None
    assert metric_directions(["efficiency", "price_sd", "vwap", "no_such"]) == {
        "efficiency": "higher",
        "price_sd": "lower",
        "vwap": None,
        "no_such": None,
    }
    means = point_means(runs, ["price_sd"], ["population.sigma"])
    assert means["n"].tolist() == [2, 2, 2, 2]
    assert (
        means.loc[(means["population.sigma"] == 6.0) & (means["arm"] == "b"), "price_sd"].item()
        == 2.25
    )
    with pytest.raises(ValueError, match="directions"):
        compare_arms(runs, "price_sd", "a", directions={"price_sd": "up"})
