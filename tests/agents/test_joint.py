"""The joint curve of buyer-seller pairs: closed form, grid path, and price sampling."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

from propensim.agents import joint_curve as joint_module
from propensim.agents.curves import LogisticCurve, NormalCurve, OscillatorCurve, TabulatedCurve
from propensim.agents.joint_curve import JointCurve, grid_joint, joint

# Measured agreement of the grid path with the closed form for normal pairs (1000 random pairs,
# sigma from 0.01 to 20): peak and mass ~1e-14 relative, sd ~2e-15 relative, mean ~6e-12 sd.
GRID_RTOL = 1e-10


def test_bromiley_product_of_normals():
    # Bromiley 2003, Tina Memo 2003-003: N(3, 0.7^2) x N(4.5, 1): mean 3.493289,
    # variance 0.328859, scale (= integral of f g) 0.153607.
    s_f, s_g = 0.7, 1.0
    j = joint(NormalCurve(3.0, s_f), NormalCurve(4.5, s_g))
    assert j.analytic
    assert j.mean == pytest.approx(3.493289, abs=1e-6)
    assert j.sd**2 == pytest.approx(0.328859, abs=1e-6)
    # our curves have height 1 (not unit area): peak = scale * sqrt(2 pi (s_f^2 + s_g^2))
    scale = float(j.peak) / math.sqrt(2 * math.pi * (s_f**2 + s_g**2))
    assert scale == pytest.approx(0.153607, abs=1e-6)
    # and integral J = scale * (2 pi s_f s_g), since J = f g (2 pi s_f s_g) for unit-area f, g
    assert j.mass == pytest.approx(0.153607 * 2 * math.pi * s_f * s_g, rel=1e-5)


def test_bromiley_against_numerical_integration():
    # the same quantities by scipy.integrate.quad on J itself (independent of the formulas)
    j = joint(NormalCurve(3.0, 0.7), NormalCurve(4.5, 1.0))
    f = lambda x: float(j.value(x))  # noqa: E731
    mass = integrate.quad(f, -np.inf, np.inf)[0]
    mean = integrate.quad(lambda x: x * f(x), -np.inf, np.inf)[0] / mass
    var = integrate.quad(lambda x: (x - mean) ** 2 * f(x), -np.inf, np.inf)[0] / mass
    # f, g unit-area normals: integral f g = 0.153607 (Bromiley 2003)
    f_g = integrate.quad(
        lambda x: stats.norm.pdf(x, 3.0, 0.7) * stats.norm.pdf(x, 4.5, 1.0), -np.inf, np.inf
    )[0]
    assert f_g == pytest.approx(0.153607, abs=1e-6)
    assert j.mass == pytest.approx(mass, rel=1e-9)
    assert j.mean == pytest.approx(mean, rel=1e-9)
    assert j.sd**2 == pytest.approx(var, rel=1e-8)


def test_model_peak_formula_with_activities():
    # MODEL.md section 3: peak = a_b a_s exp(-(mu_b - mu_s)^2 / (2 (s_b^2 + s_s^2)))
    j = joint(NormalCurve(100.0, 4.0, 0.9), NormalCurve(94.0, 3.0, 0.6))
    assert j.peak == pytest.approx(0.9 * 0.6 * math.exp(-36.0 / 50.0), rel=1e-15)
    assert j.value(j.mean) == pytest.approx(j.peak, rel=1e-14)
    assert j.log_value(200.0) == pytest.approx(
        math.log(0.54) - 100.0**2 / 32.0 - 106.0**2 / 18.0, rel=1e-14
    )


def test_grid_path_agrees_with_closed_form():
    rng = np.random.default_rng(7)
    n = 400
    cb = NormalCurve(rng.uniform(90, 110, n), rng.uniform(0.5, 10, n), rng.uniform(0.3, 1, n))
    cs = NormalCurve(rng.uniform(80, 120, n), rng.uniform(0.01, 20, n), rng.uniform(0.3, 1, n))
    exact, grid = joint(cb, cs), grid_joint(cb, cs)
    assert exact.analytic and not grid.analytic
    np.testing.assert_allclose(grid.peak, exact.peak, rtol=GRID_RTOL)
    np.testing.assert_allclose(grid.sd, exact.sd, rtol=GRID_RTOL)
    np.testing.assert_allclose(grid.mass, exact.mass, rtol=GRID_RTOL)
    assert np.max(np.abs(grid.mean - exact.mean) / exact.sd) < GRID_RTOL


def test_grid_path_extreme_widths():
    # one curve 1e6 times narrower than the other; widely separated centres
    cb = NormalCurve([0.0, 0.0], [1e-3, 1.0])
    cs = NormalCurve([0.5, 30.0], [1e3, 2.0])
    exact, grid = joint(cb, cs), grid_joint(cb, cs)
    np.testing.assert_allclose(grid.peak, exact.peak, rtol=1e-9)
    np.testing.assert_allclose(grid.sd, exact.sd, rtol=1e-9)
    np.testing.assert_allclose(grid.mean, exact.mean, rtol=1e-9, atol=1e-12)


def _brute(cb, cs):
    """Loop-based reference: peak, mean, sd of J for one pair by quad and bounded search."""
    from scipy.optimize import minimize_scalar

    f = lambda x: float(np.exp(cb.log_value(x) + cs.log_value(x)))  # noqa: E731
    lo = float(min(cb._span()[0], cs._span()[0]))
    hi = float(max(cb._span()[1], cs._span()[1]))
    xs = np.linspace(lo, hi, 20001)
    vals = np.exp(cb.log_value(xs) + cs.log_value(xs))
    i = int(np.argmax(vals))
    best = minimize_scalar(
        lambda x: -f(x),
        bounds=(xs[max(i - 1, 0)], xs[min(i + 1, xs.size - 1)]),
        method="bounded",
        options={"xatol": 1e-12},
    )
    # break the range at the mode and both centres (where J bends fastest)
    breaks = sorted({float(xs[i]), float(cb.mu), float(cs.mu)})
    opts = {"limit": 1000, "points": breaks, "epsabs": 0.0, "epsrel": 1e-12}
    mass = integrate.quad(f, lo, hi, **opts)[0]
    mean = integrate.quad(lambda x: x * f(x), lo, hi, **opts)[0] / mass
    var = integrate.quad(lambda x: (x - mean) ** 2 * f(x), lo, hi, **opts)[0] / mass
    return -best.fun, mean, math.sqrt(var)


@pytest.mark.parametrize(
    ("cb", "cs"),
    [
        (
            OscillatorCurve(mu=[100.0, 98.0], sigma=[3.0, 2.0], weights=[[0.7, 0, 0.3], [0, 1, 0]]),
            NormalCurve(mu=[96.0, 101.0], sigma=[4.0, 1.5], activity=0.8),
        ),
        (
            LogisticCurve(mu=[100.0, 90.0], tau=[2.0, 0.3], side="buyer"),
            LogisticCurve(mu=[95.0, 99.0], tau=[1.0, 0.5], side="seller", activity=0.7),
        ),
        (
            LogisticCurve(mu=[100.0, 90.0], tau=[2.0, 0.3], side="buyer", activity=0.9),
            NormalCurve(mu=[104.0, 92.0], sigma=[3.0, 1.0]),
        ),
    ],
    ids=["oscillator-normal", "logistic-logistic", "logistic-normal"],
)
def test_grid_path_other_families_against_quadrature(cb, cs):
    j = joint(cb, cs)
    assert not j.analytic
    for k in range(2):
        peak, mean, sd = _brute(cb[k], cs[k])
        # measured: peak ~1e-14, mean ~6e-13 sd, sd ~3e-12 relative
        assert j.peak[k] == pytest.approx(peak, rel=1e-9)
        assert abs(j.mean[k] - mean) < 1e-9 * sd
        assert j.sd[k] == pytest.approx(sd, rel=1e-9)


def test_batch_equals_per_pair_loop_and_chunking(monkeypatch):
    # loop-based reference: one pair at a time gives the same numbers as the batch
    rng = np.random.default_rng(3)
    n = 7
    cb = OscillatorCurve(mu=rng.uniform(95, 105, n), sigma=2.0, weights=[0.6, 0.2, 0.2])
    cs = LogisticCurve(mu=rng.uniform(95, 105, n), tau=1.0, side="seller")
    batch = joint(cb, cs)
    for i in range(n):
        one = joint(cb[i], cs[i])
        assert one.peak == pytest.approx(batch.peak[i], rel=1e-12)
        assert one.mean == pytest.approx(batch.mean[i], rel=1e-12)
    # tiny chunks: same results, and sampling consumes the generator identically
    monkeypatch.setattr(joint_module, "_CHUNK_CELLS", 513 * 2)
    chunked = joint(cb, cs)
    np.testing.assert_allclose(chunked.peak, batch.peak, rtol=1e-14)
    np.testing.assert_allclose(chunked.sd, batch.sd, rtol=1e-14)
    a = chunked.sample_price(np.random.default_rng(11), size=5)
    monkeypatch.setattr(joint_module, "_CHUNK_CELLS", 1 << 20)
    b = batch.sample_price(np.random.default_rng(11), size=5)
    np.testing.assert_allclose(a, b, rtol=1e-13)


def test_broadcasting_one_buyer_many_sellers():
    cb = NormalCurve(100.0, 5.0)
    cs = NormalCurve(np.array([[90.0, 95.0, 100.0]]), 3.0)
    j = joint(cb, cs)
    assert j.shape == (1, 3)
    g = grid_joint(cb, cs)
    assert g.shape == (1, 3)
    np.testing.assert_allclose(g.peak, j.peak, rtol=GRID_RTOL)
    assert g.sample_price(np.random.default_rng(0)).shape == (1, 3)


def test_sampling_analytic_shapes_and_moments():
    j = joint(NormalCurve([100.0, 50.0], [4.0, 2.0]), NormalCurve([94.0, 50.0], [3.0, 2.0]))
    rng = np.random.default_rng(2024)
    one = j.sample_price(rng)
    assert one.shape == (2,)
    draws = j.sample_price(rng, size=40000)
    assert draws.shape == (40000, 2)
    assert j.sample_price(rng, size=(3, 4)).shape == (3, 4, 2)
    # sample mean within 5 standard errors (common practice)
    se = j.sd / math.sqrt(40000)
    assert np.all(np.abs(draws.mean(axis=0) - j.mean) < 5 * se)
    np.testing.assert_allclose(draws.std(axis=0), j.sd, rtol=0.02)


def test_grid_sampling_follows_the_joint_law():
    cb = NormalCurve([100.0, 101.0], [4.0, 6.5])
    cs = NormalCurve([94.0, 103.0], [3.0, 9.0])
    exact, grid = joint(cb, cs), grid_joint(cb, cs)
    draws = grid.sample_price(np.random.default_rng(5), size=20000)
    for k in range(2):
        # Kolmogorov-Smirnov against the closed-form normal law (scipy.stats.kstest)
        p = stats.kstest(draws[:, k], "norm", args=(exact.mean[k], exact.sd[k])).pvalue
        assert p > 1e-3
    # same generator state, same prices
    np.testing.assert_array_equal(
        grid.sample_price(np.random.default_rng(9)), grid.sample_price(np.random.default_rng(9))
    )


def test_grid_sampling_one_sided_pair():
    # logistic buyer x logistic seller with a wide overlap: J ~ 1 on [mu_s, mu_b], a plateau
    cb = LogisticCurve(mu=110.0, tau=0.01, side="buyer")
    cs = LogisticCurve(mu=90.0, tau=0.01, side="seller")
    j = joint(cb, cs)
    assert j.peak == pytest.approx(1.0, abs=1e-12)
    assert j.mean == pytest.approx(100.0, abs=1e-9)
    assert j.sd == pytest.approx(20.0 / math.sqrt(12.0), rel=1e-4)  # uniform on [90, 110]
    draws = j.sample_price(np.random.default_rng(1), size=5000)
    assert draws.min() > 89.9 and draws.max() < 110.1
    assert stats.kstest(draws, "uniform", args=(90.0, 20.0)).pvalue > 1e-3


def test_pair_that_can_never_trade():
    cb = TabulatedCurve(grid=[0.0, 1.0], values=[1.0, 1.0])
    cs = TabulatedCurve(grid=[[2.0, 3.0], [0.5, 2.0]], values=[1.0, 1.0])
    j = joint(cb, cs)
    assert j.peak[0] == 0.0 and np.isnan(j.mean[0]) and np.isnan(j.sd[0])
    assert j.mass[0] == 0.0
    assert j.peak[1] == pytest.approx(1.0)
    assert j.mean[1] == pytest.approx(0.75, rel=1e-9)
    draws = j.sample_price(np.random.default_rng(0), size=100)
    assert np.all(np.isnan(draws[:, 0]))
    assert np.all((draws[:, 1] >= 0.5) & (draws[:, 1] <= 1.0))


def test_bad_input():
    c = NormalCurve(0.0, 1.0)
    with pytest.raises(ValueError, match="^curve_b"):
        joint(object(), c)
    with pytest.raises(ValueError, match="^curve_s"):
        joint(c, 3.0)
    with pytest.raises(ValueError, match="^points"):
        grid_joint(c, c, points=5)
    with pytest.raises(ValueError, match="curve_b and curve_s"):
        joint(NormalCurve([0.0, 1.0], 1.0), NormalCurve([0.0, 1.0, 2.0], 1.0))
    assert isinstance(joint(c, c), JointCurve)
