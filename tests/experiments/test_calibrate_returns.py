"""Price-change distributions: oscillator mixtures against the normal and Student-t."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

from propensim.experiments.calibrate_api import CalibrationError, calibrate, fit_returns
from propensim.experiments.calibrate_returns import mixture_cdf
from propensim.experiments.cli import main

sp500 = pytest.importorskip("arch.data.sp500")


@pytest.fixture(scope="module")
def sp_prices() -> pd.DataFrame:
    # Source: the daily S&P 500 series 1999-2018 bundled with the `arch` package.
    return sp500.load()


@pytest.fixture(scope="module")
def sp_fit(sp_prices, tmp_path_factory):
    out = tmp_path_factory.mktemp("cal") / "sp500"
    return fit_returns(sp_prices, "Adj Close", out=out)


def test_sp500_heavy_tails(sp_fit):
    # Excess kurtosis of daily S&P 500 log returns is about 8 (Cont 2001, Quantitative Finance
    # 1:223; REFERENCES.md "open data": about 8 on the arch package's series).
    assert sp_fit.n == 5030
    assert 7.0 < stats.kurtosis(sp_fit.returns) < 9.5


def test_student_t_matches_scipy(sp_fit):
    # Reference library: scipy.stats.t.fit (maximum likelihood of df, loc, scale).
    r = sp_fit.returns
    df, loc, scale = stats.t.fit(r)
    ll_scipy = float(np.sum(stats.t.logpdf(r, df, loc, scale)))
    t = sp_fit.fit("student-t")
    assert t.loglik == pytest.approx(ll_scipy, abs=1e-4)
    assert t.params["df"] == pytest.approx(df, rel=1e-3)
    assert t.params["scale"] == pytest.approx(scale, rel=1e-3)
    # and our log-likelihood is scipy's own at our estimate
    ours = np.sum(stats.t.logpdf(r, t.params["df"], t.params["loc"], t.params["scale"]))
    assert t.loglik == pytest.approx(ours, abs=1e-8)


def test_normal_fit_is_closed_form(sp_fit):
    # The normal's ML estimates are the sample mean and the (ddof=0) sd: textbook result.
    r = sp_fit.returns
    f = sp_fit.fit("normal")
    assert f.params["mu"] == pytest.approx(r.mean(), rel=1e-7)
    assert f.params["sigma"] == pytest.approx(r.std(), rel=1e-7)
    assert f.se["sigma"] == pytest.approx(r.std() / math.sqrt(2 * r.size), rel=1e-4)
    assert f.loglik == pytest.approx(np.sum(stats.norm.logpdf(r, r.mean(), r.std())), abs=1e-6)


def test_oscillator_mixture_beats_normal_widely(sp_fit):
    osc, normal = sp_fit.fit("oscillator 0..2"), sp_fit.fit("normal")
    # "wide margin": a log-likelihood gain of over 100 (the check; the threshold is ours)
    assert osc.loglik - normal.loglik > 100
    assert osc.aic < normal.aic - 200 and osc.bic < normal.bic - 200
    assert osc.ks < normal.ks
    assert all(f.converged for f in sp_fit.fits)
    w = [osc.params[f"w{n}"] for n in range(3)]
    assert sum(w) == pytest.approx(1.0) and min(w) >= 0


def test_verdict_says_a_baseline_wins(sp_fit):
    # On this series the Student-t has the lowest AIC and BIC: the verdict must say so plainly.
    assert sp_fit.best("aic").model == "student-t"
    assert "baseline" in sp_fit.verdict()
    text = sp_fit.format()
    assert text.rstrip().splitlines()[-1].startswith("Caution: these are model outputs")
    assert "independent" in text.splitlines()[-1]


def test_information_criteria(sp_fit):
    for f in sp_fit.fits:
        assert f.aic == pytest.approx(2 * f.n_params - 2 * f.loglik)
        assert f.bic == pytest.approx(f.n_params * math.log(sp_fit.n) - 2 * f.loglik)
        assert 0 < f.ks < 1


def test_folder_written(sp_fit):
    path = sp_fit.path
    manifest = json.loads((path / "manifest.json").read_text())
    assert manifest["format"] == "propensim-calibration" and manifest["kind"] == "returns"
    fits = pd.read_parquet(path / "fits.parquet")
    assert list(fits["model"]) == [f.model for f in sp_fit.fits]
    np.testing.assert_array_equal(fits["loglik"], [f.loglik for f in sp_fit.fits])
    dens = pd.read_parquet(path / "density.parquet")
    for _, g in dens.groupby("model"):  # each density integrates to about 1 over the grid
        assert 0.98 < integrate.trapezoid(g["density"], g["x"]) < 1.001
    assert len(pd.read_parquet(path / "qq.parquet")) == 5 * sp_fit.n


@pytest.mark.slow
def test_sp500_rerun_identical(sp_prices, sp_fit, tmp_path):
    again = fit_returns(sp_prices, "Adj Close", out=tmp_path / "again")
    for a, b in zip(sp_fit.fits, again.fits, strict=True):
        assert a.params == b.params and a.loglik == b.loglik
        np.testing.assert_equal(a.se, b.se)  # NaN (no standard error) equals NaN here
    for name in ("fits", "parameters", "density", "qq", "returns"):
        assert (sp_fit.path / f"{name}.parquet").read_bytes() == (
            again.path / f"{name}.parquet"
        ).read_bytes()


def test_rerun_identical_small(tmp_path):
    r = np.random.default_rng(7).standard_t(4, 600) * 0.01
    a = fit_returns(r, max_level=1, starts=2, out=tmp_path / "a")
    b = fit_returns(r, max_level=1, starts=2, out=tmp_path / "b")
    assert [f.params for f in a.fits] == [f.params for f in b.fits]
    assert (a.path / "parameters.parquet").read_bytes() == (
        b.path / "parameters.parquet"
    ).read_bytes()


def test_mixture_recovers_simulated_levels():
    # Draw from a known mixture of levels 0 and 2 by inverting the exact cdf on a fine grid.
    rng = np.random.default_rng(11)
    w_true = np.array([0.7, 0.0, 0.3])
    grid = np.linspace(-8, 8, 40001)
    u = rng.random(4000)
    x = np.interp(u, mixture_cdf(grid, 0.0, 1.0, w_true), grid)
    fit = fit_returns(x, max_level=2, starts=4)
    f = fit.fit("oscillator 0..2")
    assert f.converged
    for n, w in enumerate(w_true):
        if w > 0:
            assert abs(f.params[f"w{n}"] - w) < 4 * f.se[f"w{n}"]
    assert abs(f.params["sigma"] - 1.0) < 4 * f.se["sigma"]


@pytest.mark.parametrize("weights", [[1.0], [0.0, 1.0], [0.2, 0.5, 0.3], [0, 0, 0, 0, 1.0]])
def test_mixture_cdf_matches_integrated_density(weights):
    # Exact cdf (ladder identity, derived in calibrate_returns) against numerical integration.
    from propensim.agents.oscillator import oscillator_density

    x = np.linspace(-9, 9, 20001)
    dens = sum(w * oscillator_density(n, x, 0.3, 1.2) for n, w in enumerate(weights))
    num = integrate.cumulative_trapezoid(dens, x, initial=0.0)
    np.testing.assert_allclose(mixture_cdf(x, 0.3, 1.2, weights), num, atol=1e-6)


def test_thermal_all_levels_limit_is_normal():
    # Feynman (1972) eq. 2.84: the Boltzmann mixture of all levels is normal with variance
    # sigma**2 coth(gamma / T). Cut at many levels, our thermal weights reproduce that variance:
    # level n has variance (2n + 1) sigma**2 (Griffiths 2.3.2).
    temp = 1.0
    n = np.arange(60)
    w = np.exp(-2 * n / temp)
    w /= w.sum()
    assert np.sum(w * (2 * n + 1)) == pytest.approx(1 / math.tanh(1 / temp), rel=1e-12)


# -- bad input through the command line ----------------------------------------------------
def _csv(tmp_path, values, name="p.csv"):
    path = tmp_path / name
    pd.DataFrame({"close": values}).to_csv(path, index=False)
    return str(path)


def _err(capsys):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("propensim: error: ")
    return err[0]


def test_cli_missing_column(tmp_path, capsys):
    path = _csv(tmp_path, np.linspace(1, 2, 100))
    assert main(["calibrate", path, "--column", "price", "--out", str(tmp_path / "o")]) == 2
    assert "--column 'price'" in _err(capsys)


@pytest.mark.parametrize(
    ("values", "words"),
    [
        ([1.0, 2.0, -1.0] + [1.0] * 100, "non-positive price"),
        ([1.0, 0.0] + [1.0] * 100, "non-positive price"),
        ([1.0, None] + [1.1] * 100, "missing"),
        ([1.0, 1.1] * 5, "too few"),
        ([3.0] * 200, "do not vary"),
    ],
)
def test_cli_bad_series(tmp_path, capsys, values, words):
    path = _csv(tmp_path, values)
    assert main(["calibrate", path, "--column", "close", "--out", str(tmp_path / "o")]) == 2
    msg = _err(capsys)
    assert words in msg and "'close'" in msg


@pytest.mark.parametrize("k", ["0", "9", "-1"])
def test_cli_level_out_of_range(tmp_path, capsys, k):
    path = _csv(tmp_path, np.exp(np.random.default_rng(1).normal(0, 0.01, 300).cumsum()))
    assert main(["calibrate", path, "--column", "close", "--max-level", k]) == 2
    assert "--max-level" in _err(capsys)


def test_cli_not_converged_exits_1(tmp_path, capsys):
    path = _csv(tmp_path, np.exp(np.random.default_rng(2).standard_t(3, 400).cumsum() * 0.01))
    code = main(["calibrate", path, "--column", "close", "--max-iter", "1", "--starts", "2",
                 "--out", str(tmp_path / "o")])  # fmt: skip
    assert code == 1
    captured = capsys.readouterr()
    assert "did not converge" in captured.err
    assert "NO" in captured.out  # the table says so too


def test_cli_returns_column_and_parquet(tmp_path, capsys):
    r = np.random.default_rng(3).standard_t(5, 500) * 0.01
    path = tmp_path / "r.parquet"
    pd.DataFrame({"ret": r}).to_parquet(path)
    out = tmp_path / "o"
    assert main(["calibrate", str(path), "--column", "ret", "--returns", "--starts", "2",
                 "--max-level", "1", "--out", str(out)]) == 0  # fmt: skip
    text = capsys.readouterr().out
    lib = calibrate(str(path), "ret", returns=True, starts=2, max_level=1)
    assert f"{lib.fit('student-t').loglik:.2f}" in text  # the same numbers as the library
    assert lib.n == 500 and (out / "manifest.json").exists()


def test_library_bad_input():
    with pytest.raises(CalibrationError, match="too few"):
        fit_returns(np.array([0.1, -0.1] * 10))
