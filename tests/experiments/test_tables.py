import numpy as np
import pandas as pd
import pytest
from _report_helpers import SPEC, tiny_store

from propensim.experiments import load, load_spec
from propensim.experiments.tables import design_table, paired_point_table, point_table


def _runs():
    rng = np.random.default_rng(3)
    rows = []
    for point, sigma in enumerate([2.0, 4.0]):
        for rep in range(5):
            for arm, shift in (("a", 0.0), ("b", 1.0)):
                rows.append(
                    {
                        "index": len(rows),
                        "point": point,
                        "replicate": rep,
                        "arm": arm,
                        "population.sigma": sigma,
                        "volume": 10 * sigma + shift + rng.normal(),
                        "status": "ok",
                    }
                )
    rows.append(
        {**rows[-1], "index": len(rows), "replicate": 9, "status": "failed", "volume": np.nan}
    )
    return pd.DataFrame(rows)


def test_point_table_means_intervals_and_labels():
    runs = _runs()
    table = point_table(runs, ["volume"], ["population.sigma"], bootstrap=400)
    assert list(table.columns[:2]) == ["point", "population.sigma"]
    assert len(table) == 4  # 2 points x 2 arms x 1 metric
    ok = runs[runs.status == "ok"]
    for r in table.itertuples():
        cell = ok[(ok.point == r.point) & (ok.arm == r.arm)]["volume"]
        assert r.n == 5  # the failed run is left out
        assert r.mean == pytest.approx(cell.mean())
        assert r.ci_low <= r.mean <= r.ci_high
        assert r.ci_high - r.ci_low < 4 * cell.std()
    again = point_table(runs, ["volume"], ["population.sigma"], bootstrap=400)
    pd.testing.assert_frame_equal(table, again)  # seeded per cell


def test_point_table_refuses_a_missing_metric():
    with pytest.raises(ValueError, match="no column 'nope'"):
        point_table(_runs(), ["nope"])


def test_paired_point_table_labels_points_with_parameters():
    runs = _runs()
    table = paired_point_table(runs, ["volume"], "a", ["population.sigma"], bootstrap=300)
    per_point = table[table["point"].notna()]
    assert per_point["population.sigma"].tolist() == [2.0, 4.0]
    overall = table[table["point"].isna()]
    assert len(overall) == 1 and overall["population.sigma"].isna().all()
    assert per_point["mean_diff"].between(0.0, 2.0).all()  # b = a + 1 + noise


def test_design_table_lists_points_and_runs():
    spec = load_spec(SPEC)
    table = design_table(spec)
    assert table["population.sigma"].tolist() == [3.0, 9.0]
    assert table["runs"].tolist() == [6, 6]  # 3 replicates x 2 arms


def test_point_table_of_a_stored_experiment(tmp_path):
    runs = load(tiny_store(tmp_path / "t")).runs
    table = point_table(runs, ["efficiency"], ["population.sigma"], bootstrap=200)
    assert set(table["arm"]) == {"matching", "auction"}
    assert (table["n"] == 3).all()
    assert table["mean"].between(-0.05, 1.0).all()  # a trade below cost can cost surplus
