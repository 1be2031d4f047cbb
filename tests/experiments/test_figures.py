import numpy as np
import pandas as pd
import pytest

pytest.importorskip("matplotlib")

from propensim.experiments import figures as F  # noqa: E402


def _labels(fig):
    return [(ax.get_xlabel(), ax.get_ylabel()) for ax in fig.axes if ax.get_visible()]


def _rounds_and_runs():
    rng = np.random.default_rng(0)
    runs, rounds = [], []
    for i in range(8):
        runs.append({"run_id": f"r{i}", "arm": "ab"[i % 2], "point": 0, "index": i})
        for t in range(10):
            rounds.append(
                {"run_id": f"r{i}", "round": t, "vwap": 100 + rng.normal(), "volume": 5.0 + (i % 2)}
            )
    return pd.DataFrame(rounds), pd.DataFrame(runs)


def test_svg_is_the_same_bytes_every_time_and_has_no_date():
    fig = F.pair_figure(95, 6, 105, 8)
    a, b = F.svg_bytes(fig, salt="x"), F.svg_bytes(fig, salt="x")
    assert a == b
    assert b"<dc:date>" not in a
    assert a != F.svg_bytes(fig, salt="y")  # the salt sets the ids


def test_pair_figure_draws_curves_joint_forces_and_supply_demand():
    fig = F.pair_figure(95, 6, 105, 8, values=[120, 110, 90], costs=[70, 95, 115])
    left, right = fig.axes
    assert left.get_xlabel() == "price (price units)"
    assert right.get_xlabel() == "quantity (units)"
    assert len(left.collections) >= 1  # the shaded joint curve
    # the competitive point: two units cross (120 >= 70, 110 >= 95; 90 < 115)
    assert any("q=2" in t.get_text() for t in right.get_legend().get_texts())


def test_paths_band_is_the_t_interval_of_the_mean():
    rounds, runs = _rounds_and_runs()
    fig = F.paths_figure(rounds, runs, ["vwap", "volume"])
    ax_volume = fig.axes[1]
    assert "per round" in ax_volume.get_ylabel()
    line = ax_volume.get_lines()[1]  # arm b: volume 6 in every run: a zero-width band
    np.testing.assert_allclose(line.get_ydata(), 6.0)
    mean, lo, hi = F._t_band(np.array([[1.0, 2.0], [3.0, 4.0]]))
    np.testing.assert_allclose(mean, [2.0, 3.0])
    # t(0.975, 1 df) = 12.706; sd = sqrt(2); n = 2
    np.testing.assert_allclose(hi - mean, 12.706 * np.sqrt(2) / np.sqrt(2), rtol=1e-3)


def test_sweep_heatmap_and_forest_label_their_axes_with_units():
    points = pd.DataFrame(
        {
            "point": [0, 1, 2, 3],
            "a": [1.0, 1.0, 2.0, 2.0],
            "b": [5, 6, 5, 6],
            "arm": "x",
            "metric": "efficiency",
            "n": 3,
            "mean": [0.5, 0.6, 0.7, 0.8],
            "ci_low": [0.4, 0.5, 0.6, 0.7],
            "ci_high": [0.6, 0.7, 0.8, 0.9],
            "confidence": 0.95,
        }
    )
    sweep = F.sweep_figure(points, "a", ["efficiency"])
    assert _labels(sweep)[0] == ("a", "efficiency (share of max. surplus)")
    heat = F.heatmap_figure(points, "a", "b", "efficiency")
    assert heat.axes[0].get_xlabel() == "a"
    comparison = pd.DataFrame(
        {
            "metric": ["volume", "volume"],
            "arm": ["m", "n"],
            "baseline": "c",
            "mean_diff": [1.0, -0.5],
            "ci_low": [0.5, -1.0],
            "ci_high": [1.5, 0.2],
            "confidence": 0.95,
        }
    )
    forest = F.forest_figure(comparison)
    assert "units traded" in forest.axes[0].get_xlabel()
    ticks = [t.get_text() for t in forest.axes[0].get_yticklabels()]
    assert ticks == ["m - c", "n - c"]


def test_network_is_sampled_when_large():
    n = 1000
    role = np.r_[np.zeros(500, int), np.ones(500, int)]
    buyer = np.arange(500)
    seller = 500 + (np.arange(500) + 1) % 500
    fig = F.network_figure(buyer, seller, role, np.arange(n, dtype=float), max_nodes=100)
    assert "100 of 1000" in fig.axes[0].get_title()
    offsets = fig.axes[0].collections[-3].get_offsets()  # the node scatter
    assert len(offsets) == 100


def test_figures_from_plain_tables_of_other_modules():
    groups = pd.DataFrame(
        {
            "group": ["buyers", "sellers", "treasury"],
            "mean_diff": [-2.0, -1.0, 2.5],
            "ci_low": [-3, -2, 2],
            "ci_high": [-1, 0, 3],
        }
    )
    g = F.gains_losses_figure(groups)
    assert "price units" in g.axes[0].get_xlabel()
    bars = [p.get_width() for p in g.axes[0].patches]
    assert bars == [-2.0, -1.0, 2.5]
    events = pd.DataFrame(
        {
            "run_id": np.repeat(["a", "b"], 4),
            "time": np.tile(range(4), 2),
            "sales": [1, 2, 3, 4, 1, 2, 3, 4],
            "stock": 10.0,
        }
    )
    e = F.event_sales_figure(events)
    np.testing.assert_allclose(e.axes[0].get_lines()[0].get_ydata(), [1, 2, 3, 4])
    x = np.linspace(-3, 3, 13)
    fits = pd.DataFrame({"x": x, "observed": np.exp(-(x**2) / 2), "normal": np.exp(-(x**2) / 2)})
    c = F.calibration_figure(fits)
    assert c.axes[0].get_ylabel().startswith("density")
    sens = pd.DataFrame(
        {
            "metric": "v",
            "arm": "",
            "parameter": ["p", "q"],
            "S1": [0.5, 0.1],
            "S1_conf": 0.05,
            "ST": [0.6, 0.2],
            "ST_conf": 0.05,
        }
    )
    s = F.sensitivity_figure(sens)
    assert "Sobol" in s.axes[0].get_xlabel()


def test_save_writes_png_and_svg(tmp_path):
    paths = F.save(F.pair_figure(95, 6, 105, 8), tmp_path / "pair")
    assert [p.suffix for p in paths] == [".png", ".svg"]
    assert paths[0].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert paths[1].read_bytes().lstrip().startswith(b"<?xml")
