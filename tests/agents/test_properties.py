"""Property-based checks (hypothesis) of curves and joint curves."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from propensim.agents.curves import LogisticCurve, NormalCurve, OscillatorCurve, TabulatedCurve
from propensim.agents.joint_curve import grid_joint, joint

SETTINGS = settings(max_examples=25, deadline=None, derandomize=True)

prices = st.floats(50.0, 150.0)
widths = st.floats(0.05, 30.0)
heights = st.floats(0.05, 1.0)
level_weights = st.lists(st.floats(0.0, 1.0), min_size=1, max_size=5).filter(
    lambda w: sum(w) > 1e-3
)


@st.composite
def curves(draw, family=None):
    """One curve of a drawn (or given) family, centred in [50, 150]."""
    family = family or draw(st.sampled_from(["normal", "oscillator", "logistic", "tabulated"]))
    mu, width, a = draw(prices), draw(widths), draw(heights)
    if family == "normal":
        return NormalCurve(mu, width, a)
    if family == "oscillator":
        return OscillatorCurve(mu, width, draw(level_weights), a)
    if family == "logistic":
        return LogisticCurve(mu, width, draw(st.sampled_from(["buyer", "seller"])), a)
    values = draw(st.lists(st.floats(0.0, 1.0), min_size=3, max_size=8))
    values[len(values) // 2] = a  # make sure something is positive
    grid = mu + width * np.linspace(-3.0, 3.0, len(values))
    return TabulatedCurve(grid, values)


@SETTINGS
@given(mu_b=prices, mu_s=prices, s_b=widths, s_s=widths, a_b=heights, a_s=heights)
def test_joint_peak_below_both_heights_and_mean_between(mu_b, mu_s, s_b, s_s, a_b, a_s):
    # J = P_b P_s <= min(P_b, P_s) <= min(a_b, a_s); the product-of-Gaussians mean is a convex
    # combination of the two centres (Bromiley 2003, Tina Memo 2003-003)
    cb, cs = NormalCurve(mu_b, s_b, a_b), NormalCurve(mu_s, s_s, a_s)
    lo, hi = min(mu_b, mu_s), max(mu_b, mu_s)
    for j in (joint(cb, cs), grid_joint(cb, cs)):
        assert j.peak <= min(a_b, a_s) * (1 + 1e-12)
        if j.peak > 1e-250:  # the grid path has no mean for a pair that underflows
            assert lo - 1e-9 * (1 + abs(lo)) <= j.mean <= hi + 1e-9 * (1 + abs(hi))


@SETTINGS
@given(
    mu_b=prices,
    mu_s=prices,
    s_b=widths,
    s_s=widths,
    a_b=heights,
    a_s=heights,
    weights=level_weights,
)
def test_joint_peak_below_heights_oscillator(mu_b, mu_s, s_b, s_s, a_b, a_s, weights):
    cb = OscillatorCurve(mu_b, s_b, weights, a_b)
    cs = NormalCurve(mu_s, s_s, a_s)
    j = joint(cb, cs)
    assert 0.0 <= j.peak <= min(a_b, a_s) * (1 + 1e-12)


@SETTINGS
@given(curve=curves(), x=st.lists(prices, min_size=3, max_size=3), gamma=st.floats(0.01, 10.0))
def test_energy_is_additive_along_a_path(curve, x, gamma):
    x0, x1, x2 = x
    e01, e12, e02 = (curve.energy(a, b, gamma) for a, b in ((x0, x1), (x1, x2), (x0, x2)))
    if np.isfinite(e01) and np.isfinite(e12):
        scale = 1.0 + abs(e01) + abs(e12)
        assert abs(e02 - (e01 + e12)) <= 1e-12 * scale


@SETTINGS
@given(
    curve=curves(),
    threshold=st.floats(0.01, 1.0),
    side=st.sampled_from(["buyer", "seller"]),
)
def test_reservation_price_is_where_the_curve_meets_the_threshold(curve, threshold, side):
    res = curve.reservation_price(threshold, side=side)
    if np.isfinite(res):
        v = curve.value(res)
        if isinstance(curve, TabulatedCurve) and res in (curve.grid[0], curve.grid[-1]):
            assert v >= threshold  # the table ends above the threshold; zero beyond it
        else:
            assert abs(v - threshold) <= 1e-9 * threshold


@SETTINGS
@given(
    mu=prices,
    sigma=widths,
    a=heights,
    threshold=st.floats(0.01, 1.0),
    side=st.sampled_from(["buyer", "seller"]),
)
def test_normal_reservation_nan_exactly_when_unreachable(mu, sigma, a, threshold, side):
    res = NormalCurve(mu, sigma, a).reservation_price(threshold, side=side)
    assert np.isnan(res) == (a < threshold)
    if not np.isnan(res):
        # buyer: upper crossing, seller: lower crossing (MODEL.md section 6)
        assert (res >= mu) if side == "buyer" else (res <= mu)


@SETTINGS
@given(curve=curves(), x=st.lists(st.floats(-1e4, 1e4), min_size=1, max_size=6))
def test_values_are_probabilities(curve, x):
    v = curve.value(np.asarray(x))
    assert np.all((v >= 0.0) & (v <= 1.0))


@SETTINGS
@given(curve=curves(family="oscillator"), k=st.floats(5.0, 1e3))
def test_far_tail_is_finite_for_normal_and_oscillator(curve, k):
    far = curve.mu + k * curve.sigma
    assert np.isfinite(curve.log_value(far)) and np.isfinite(curve.log_value(2 * curve.mu - far))
    normal = NormalCurve(curve.mu, curve.sigma, curve.activity)
    assert np.isfinite(normal.log_value(far))
