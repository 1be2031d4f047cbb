"""Propensity-curve families: values, log space, forces, energies, reservation prices."""

from __future__ import annotations

import math

import numpy as np
import pytest

from propensim.agents.curves import (
    Curve,
    LogisticCurve,
    NormalCurve,
    OscillatorCurve,
    TabulatedCurve,
)
from propensim.agents.oscillator import boltzmann_weights, thermal_variance


def _families():
    """One batch of each family (two or three curves each), for shared contract checks."""
    return {
        "normal": NormalCurve(mu=[100.0, 95.0], sigma=[4.0, 7.0], activity=[1.0, 0.8]),
        "oscillator": OscillatorCurve(
            mu=[100.0, 95.0],
            sigma=[4.0, 3.0],
            weights=[[0.6, 0.1, 0.3], [0.5, 0.5, 0.0]],
            activity=[1.0, 0.9],
        ),
        "logistic": LogisticCurve(mu=[100.0, 95.0], tau=[2.0, 0.5], side=[0, 1], activity=0.9),
        "tabulated": TabulatedCurve(
            grid=[80.0, 90.0, 100.0, 110.0, 120.0],
            values=[[0.1, 0.5, 1.0, 0.4, 0.05], [0.2, 0.9, 0.6, 0.3, 0.1]],
        ),
    }


FAMILIES = list(_families())


# -- the shared contract ----------------------------------------------------------------------
@pytest.mark.parametrize("family", FAMILIES)
def test_contract_shapes_and_range(family):
    curve = _families()[family]
    assert isinstance(curve, Curve)
    assert isinstance(type(curve).description, str) and "\n" not in type(curve).description
    assert curve.shape == (2,)
    x = np.linspace(70.0, 130.0, 25)[:, None]  # (m, 1) against a batch of 2 -> (m, 2)
    v = curve.value(x)
    assert v.shape == (25, 2)
    assert np.all((v >= 0) & (v <= 1))
    np.testing.assert_allclose(np.exp(curve.log_value(x)), v, rtol=1e-13)
    # one price per curve
    assert curve.value(np.array([100.0, 95.0])).shape == (2,)


@pytest.mark.parametrize("family", FAMILIES)
def test_force_is_gamma_times_derivative_of_log(family):
    # F = gamma d/dx ln P (MODEL.md section 2; entropic force F = T dS/dx with S = k ln P,
    # standard statistical mechanics), against a central finite difference.
    curve = _families()[family]
    gamma = np.array([0.7, 2.0])
    x = np.array([[93.3], [97.1], [101.7], [104.2], [113.9]])  # off tabulated grid nodes
    h = 1e-5
    fd = (curve.log_value(x + h) - curve.log_value(x - h)) / (2 * h)
    np.testing.assert_allclose(curve.force(x, gamma), gamma * fd, rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("family", FAMILIES)
def test_energy_definition_and_additivity(family):
    curve = _families()[family]
    x0, x1, x2 = 97.0, 99.5, 104.0
    gamma = 1.7
    e01 = curve.energy(x0, x1, gamma)
    expected = -gamma * (curve.log_value(x1) - curve.log_value(x0))
    np.testing.assert_allclose(e01, expected, rtol=1e-15)
    np.testing.assert_allclose(
        curve.energy(x0, x2, gamma), e01 + curve.energy(x1, x2, gamma), rtol=1e-12, atol=1e-12
    )


@pytest.mark.parametrize("family", FAMILIES)
def test_reservation_price_meets_threshold(family):
    curve = _families()[family]
    for side in ("buyer", "seller"):
        res = curve.reservation_price(0.5, side=side)
        finite = np.isfinite(res)  # a one-sided logistic is open (+-inf) on its far side
        assert finite.any()
        at = curve.value(np.where(finite, res, 0.0))
        np.testing.assert_allclose(at[finite], 0.5, rtol=1e-9)


@pytest.mark.parametrize("family", FAMILIES)
def test_getitem_and_flat(family):
    curve = _families()[family]
    one = curve[1]
    assert one.shape == ()
    x = np.linspace(85.0, 115.0, 7)
    np.testing.assert_allclose(one.value(x), curve.value(x[:, None])[:, 1], rtol=1e-13)
    flat = curve[np.array([1, 0, 1])]
    assert flat.shape == (3,)
    wide = curve._flat((3, 2))
    assert wide.shape == (6,)
    np.testing.assert_allclose(wide.value(100.0), np.tile(curve.value(100.0), 3), rtol=1e-13)


# -- normal ------------------------------------------------------------------------------------
def test_normal_values_force_reservation():
    c = NormalCurve(mu=100.0, sigma=5.0, activity=0.9, role="buyer")
    assert c.value(100.0) == pytest.approx(0.9)
    assert c.value(105.0) == pytest.approx(0.9 * math.exp(-0.5), rel=1e-15)
    # normal force is exact: -gamma (x - mu) / sigma^2 (MODEL.md section 2)
    assert c.force(108.0, 2.0) == -2.0 * 8.0 / 25.0
    # reservation mu +- sigma sqrt(2 ln(a / threshold)) (MODEL.md section 6)
    width = 5.0 * math.sqrt(2 * math.log(0.9 / 0.5))
    assert c.reservation_price() == pytest.approx(100.0 + width, rel=1e-15)
    assert c.reservation_price(side="seller") == pytest.approx(100.0 - width, rel=1e-15)
    assert c.reservation_price(threshold=0.9) == pytest.approx(100.0)
    assert np.isnan(c.reservation_price(threshold=0.95))


def test_normal_far_tail_is_finite():
    c = NormalCurve(mu=10.0, sigma=2.0, activity=0.5)
    lv = c.log_value(10.0 + 1e3 * 2.0)
    assert np.isfinite(lv)
    assert lv == pytest.approx(math.log(0.5) - 0.5e6, rel=1e-15)


def test_reservation_side_array_and_default_role():
    c = NormalCurve(mu=[100.0, 90.0], sigma=[5.0, 3.0], role=[0, 1])
    own = c.reservation_price()
    np.testing.assert_allclose(own, c.reservation_price(side=[0, 1]))
    assert own[0] > 100.0 and own[1] < 90.0
    # side broadcasting against the batch: (2, 1) x (2,) -> (2, 2)
    table = c.reservation_price(side=np.array([[0], [1]]))
    assert table.shape == (2, 2)
    assert table[0, 1] > 90.0 and table[1, 0] < 100.0
    with pytest.raises(ValueError, match="^side"):
        NormalCurve(mu=1.0, sigma=1.0).reservation_price()
    with pytest.raises(ValueError, match="^side"):
        c.reservation_price(side="broker")
    with pytest.raises(ValueError, match="^side"):
        c.reservation_price(side=[0, 2])


# -- oscillator ----------------------------------------------------------------------------------
def test_oscillator_ground_state_is_the_normal_curve():
    x = np.linspace(80.0, 120.0, 81)
    osc = OscillatorCurve(mu=100.0, sigma=4.0, weights=[1.0, 0.0, 0.0], activity=0.7)
    norm = NormalCurve(mu=100.0, sigma=4.0, activity=0.7)
    np.testing.assert_allclose(osc.log_value(x), norm.log_value(x), rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(osc.force(x, 1.3), norm.force(x, 1.3), rtol=1e-11, atol=1e-13)


def test_oscillator_height_is_activity():
    # max over prices of the normalised mixture is exactly the activity (several shapes,
    # including a level-1 curve whose maxima sit off-centre at xi = +-1)
    weights = np.array([[0.0, 1.0, 0.0], [0.2, 0.0, 0.8], [0.3, 0.3, 0.4], [0.0, 0.0, 1.0]])
    c = OscillatorCurve(mu=0.0, sigma=1.0, weights=weights, activity=[1.0, 0.8, 0.6, 0.5])
    x = np.linspace(-8, 8, 4001)[:, None]
    table = c.value(x)
    assert np.all(table <= c.activity * (1 + 1e-12))
    # independent maximiser: scipy's bounded Brent search around each grid maximum
    from scipy.optimize import minimize_scalar

    for j in range(4):
        one = c[j]
        i = int(np.argmax(table[:, j]))
        lo, hi = float(x[max(i - 1, 0), 0]), float(x[min(i + 1, 4000), 0])
        best = minimize_scalar(
            lambda v, one=one: -float(one.value(v)),
            bounds=(lo, hi),
            method="bounded",
            options={"xatol": 1e-10},
        )
        assert -best.fun == pytest.approx(c.activity[j], rel=1e-12)
    # level 1: maxima at xi = +-1, i.e. x = +-sqrt(2) sigma
    assert c[0].value(math.sqrt(2.0)) == pytest.approx(1.0, rel=1e-12)


def test_oscillator_symmetric_and_finite_far_out():
    c = OscillatorCurve(mu=50.0, sigma=2.0, weights=[0.5, 0.2, 0.1, 0.0, 0.2])
    d = np.array([0.3, 1.7, 6.0])
    np.testing.assert_allclose(c.value(50.0 + d), c.value(50.0 - d), rtol=1e-12)
    lv = c.log_value(50.0 + 1e3 * 2.0)
    assert np.isfinite(lv) and lv < -4e5
    assert np.isfinite(c.force(50.0 + 1e3 * 2.0, 1.0))


def test_oscillator_high_level_stays_finite():
    weights = np.zeros(61)
    weights[[0, 60]] = 0.5
    c = OscillatorCurve(mu=0.0, sigma=1.0, weights=weights)
    x = np.array([0.0, 5.0, 14.0, 100.0, 1e3])
    assert np.all(np.isfinite(c.log_value(x)))
    assert c.value(x).max() <= 1.0


def test_oscillator_boltzmann_weights_give_the_thermal_normal():
    # Feynman, Statistical Mechanics (1972) eq. 2.84: a Boltzmann mixture of levels is normal
    # with variance sigma^2 coth(gamma / T); normalised to height a it is a NormalCurve.
    sigma, gamma, temp = 2.0, 1.0, 1.5
    osc = OscillatorCurve(mu=10.0, sigma=sigma, weights=boltzmann_weights(120, gamma, temp))
    var = thermal_variance(sigma, gamma, temp)
    x = np.linspace(0.0, 20.0, 41)
    np.testing.assert_allclose(osc.value(x), np.exp(-((x - 10.0) ** 2) / (2 * var)), rtol=1e-9)


def test_oscillator_reservation_is_outermost_crossing():
    # level-2 heavy mixture is bimodal: the buyer's reservation is the highest crossing
    c = OscillatorCurve(mu=0.0, sigma=1.0, weights=[0.1, 0.0, 0.9], role=[0])
    res = c.reservation_price(0.5)[0]
    assert c.value(res)[()] == pytest.approx(0.5, rel=1e-10)
    beyond = np.linspace(res + 1e-6, res + 20.0, 2001)
    assert np.all(c.value(beyond) < 0.5)
    assert c.reservation_price(0.5, side="seller")[0] == pytest.approx(-res, rel=1e-12)
    # threshold above the activity: NaN
    low = OscillatorCurve(mu=0.0, sigma=1.0, weights=[1.0], activity=0.4)
    assert np.isnan(low.reservation_price(0.5, side="buyer"))
    # ground state alone: the normal formula
    g = OscillatorCurve(mu=3.0, sigma=2.0, weights=[1.0], activity=0.9)
    n = NormalCurve(mu=3.0, sigma=2.0, activity=0.9)
    for side in ("buyer", "seller"):
        assert g.reservation_price(0.5, side) == pytest.approx(
            n.reservation_price(0.5, side), rel=1e-12
        )


def test_oscillator_weights_are_normalised():
    c = OscillatorCurve(mu=0.0, sigma=1.0, weights=[[2.0, 0.0, 2.0], [0.0, 3.0, 0.0]])
    np.testing.assert_allclose(c.weights, [[0.5, 0.0, 0.5], [0.0, 1.0, 0.0]])
    assert c.nmax == 2


# -- logistic ----------------------------------------------------------------------------------
def test_logistic_reservation_is_exactly_mu():
    # a = 1, threshold 1/2: the classical reservation price mu, for any tau (MODEL.md section 1)
    c = LogisticCurve(mu=[100.0, 80.0], tau=[3.0, 0.01], side=[0, 1])
    np.testing.assert_array_equal(c.reservation_price(), [100.0, 80.0])
    np.testing.assert_allclose(c.value(np.array([100.0, 80.0])), 0.5)


def test_logistic_approaches_the_step():
    # tau -> 0: buyer accepts every price below mu, none above (classical reservation price)
    x = np.array([99.0, 99.9, 100.1, 101.0])
    for tau in (1e-3, 1e-6):
        b = LogisticCurve(mu=100.0, tau=tau, side="buyer", activity=0.8)
        s = LogisticCurve(mu=100.0, tau=tau, side="seller", activity=0.8)
        np.testing.assert_allclose(b.value(x), [0.8, 0.8, 0.0, 0.0], atol=1e-30)
        np.testing.assert_allclose(s.value(x), [0.0, 0.0, 0.8, 0.8], atol=1e-30)
        assert np.all(np.isfinite(b.log_value(x)))


def test_logistic_log_space_tails_and_sides():
    b = LogisticCurve(mu=0.0, tau=1.0, side="buyer")
    assert b.log_value(1e6) == pytest.approx(-1e6, rel=1e-12)
    assert b.log_value(-1e6) == 0.0
    assert b.force(1e6, 2.0) == pytest.approx(-2.0)  # force saturates at gamma / tau
    assert b.reservation_price(0.5, side="seller") == -np.inf  # buyer accepts all low prices
    s = LogisticCurve(mu=0.0, tau=1.0, side="seller", activity=0.9)
    width = math.log(0.9 / 0.5 - 1)
    assert s.reservation_price(0.5) == pytest.approx(-width, rel=1e-14)
    assert s.reservation_price(0.5, side="buyer") == np.inf
    assert np.isnan(s.reservation_price(0.9))  # the curve never reaches its height a


def test_logistic_from_population_defaults_tau_to_sigma():
    c = LogisticCurve.from_population(
        mu=np.array([10.0, 12.0]), sigma=np.array([1.0, 2.0]), activity=1.0, role=np.array([0, 1])
    )
    np.testing.assert_array_equal(c.tau, [1.0, 2.0])
    np.testing.assert_array_equal(c.side, [0, 1])
    c2 = LogisticCurve.from_population(
        mu=np.array([10.0]), sigma=np.array([1.0]), activity=1.0, role=np.array([0]), tau=0.1
    )
    np.testing.assert_array_equal(c2.tau, [0.1])


# -- tabulated ---------------------------------------------------------------------------------
def test_tabulated_interpolates_values_zero_outside():
    c = TabulatedCurve(grid=[0.0, 1.0, 2.0], values=[0.2, 1.0, 0.0])
    np.testing.assert_allclose(c.value([-0.1, 0.0, 0.5, 1.5, 2.0, 2.1]), [0, 0.2, 0.6, 0.5, 0, 0])
    assert c.log_value(3.0) == -np.inf
    assert c.force(3.0, 1.0) == 0.0
    assert c.force(0.5, 2.0) == pytest.approx(2.0 * 0.8 / 0.6)


def test_tabulated_reservation_crossings():
    c = TabulatedCurve(grid=[0.0, 1.0, 2.0, 3.0], values=[0.0, 1.0, 0.5, 0.2])
    assert c.reservation_price(0.5, side="buyer") == pytest.approx(2.0)
    assert c.reservation_price(0.75, side="buyer") == pytest.approx(1.5)
    assert c.reservation_price(0.5, side="seller") == pytest.approx(0.5)
    # threshold equal to the table's maximum: both crossings at the peak
    assert c.reservation_price(1.0, side="seller") == c.reservation_price(1.0, side="buyer") == 1.0
    flat = TabulatedCurve(grid=[0.0, 1.0], values=[1.0, 1.0])  # table ends above threshold
    assert flat.reservation_price(0.5, side="buyer") == 1.0
    assert flat.reservation_price(0.5, side="seller") == 0.0
    low = TabulatedCurve(grid=[0.0, 1.0], values=[0.3, 0.4])
    assert np.isnan(low.reservation_price(0.5, side="buyer"))


def test_tabulated_per_curve_grids_match_shared_grid():
    values = np.array([[0.1, 0.9, 0.3], [0.5, 0.5, 1.0]])
    shared = TabulatedCurve(grid=[1.0, 2.0, 4.0], values=values)
    own = TabulatedCurve(grid=np.tile([1.0, 2.0, 4.0], (2, 1)), values=values)
    x = np.linspace(0.5, 4.5, 17)[:, None]
    np.testing.assert_allclose(own.value(x), shared.value(x), rtol=1e-15)
    np.testing.assert_allclose(own.force(x, 1.0), shared.force(x, 1.0), rtol=1e-15)
    np.testing.assert_allclose(
        own.reservation_price(0.5, side=[0, 1]), shared.reservation_price(0.5, side=[0, 1])
    )


def test_tabulated_from_population_uses_standard_units():
    c = TabulatedCurve.from_population(
        mu=np.array([100.0, 50.0]),
        sigma=np.array([2.0, 1.0]),
        activity=np.array([1.0, 0.5]),
        role=np.array([0, 1]),
        grid=[-1.0, 0.0, 1.0],
        values=[0.0, 1.0, 0.0],
    )
    np.testing.assert_allclose(c.grid, [[98.0, 100.0, 102.0], [49.0, 50.0, 51.0]])
    np.testing.assert_allclose(c.value(np.array([101.0, 50.0])), [0.5, 0.5])


def test_szilard_one_bit_costs_gamma_ln2():
    # Szilard, Z. Phys. 53:840 (1929): confining a particle to half its box costs kT ln 2.
    # Here: a uniform propensity on [0, 1] (TabulatedCurve constant 1). Confining the price to
    # the half [0, 1/2] keeps half of the acceptance mass Z = integral P dx; the free energy cost
    # is -gamma ln(Z_half / Z_whole). Equivalently, at any price in the half, the normalised
    # curves differ by the factor 2: gamma ln(p_half(x) / p_whole(x)) = gamma ln 2.
    from scipy.integrate import quad

    gamma = 1.3
    whole = TabulatedCurve(grid=[0.0, 1.0], values=[1.0, 1.0])
    half = TabulatedCurve(grid=[0.0, 0.5], values=[1.0, 1.0])
    z_whole = quad(lambda x: float(whole.value(x)), -0.5, 1.5, points=[0.0, 1.0])[0]
    z_half = quad(lambda x: float(half.value(x)), -0.5, 1.5, points=[0.0, 0.5])[0]
    assert -gamma * math.log(z_half / z_whole) == pytest.approx(gamma * math.log(2), rel=1e-12)
    x = np.array([0.05, 0.25, 0.49])
    p_whole = whole.value(x) / z_whole
    p_half = half.value(x) / z_half
    np.testing.assert_allclose(gamma * np.log(p_half / p_whole), gamma * math.log(2), rtol=1e-12)
    # moving within the uniform interval costs nothing: no force, no energy
    assert whole.energy(0.1, 0.9, gamma) == 0.0 and whole.force(0.3, gamma) == 0.0
    # at 300 K one bit is k_B T ln 2 = 2.870979e-21 J (Szilard 1929; scipy.constants)
    from scipy.constants import k as k_boltzmann

    assert k_boltzmann * 300.0 * math.log(2) == pytest.approx(2.870979e-21, rel=1e-6)


# -- population columns ------------------------------------------------------------------------
def test_from_population_every_family():
    cols = dict(
        mu=np.array([100.0, 90.0, 95.0]),
        sigma=np.array([5.0, 4.0, 3.0]),
        activity=np.array([1.0, 0.9, 0.8]),
        role=np.array([0, 1, 1], dtype=np.int8),
    )
    n = NormalCurve.from_population(**cols)
    assert n.shape == (3,) and list(n.role) == [0, 1, 1]
    o = OscillatorCurve.from_population(**cols, weights=np.tile([0.8, 0.0, 0.2], (3, 1)))
    assert o.shape == (3,) and o.weights.shape == (3, 3)
    lo = LogisticCurve.from_population(**cols)
    assert lo.shape == (3,)
    res = n.reservation_price()
    assert res[0] > 100.0 and res[1] < 90.0
    with pytest.raises(ValueError, match="tau"):
        NormalCurve.from_population(**cols, tau=1.0)
    with pytest.raises(ValueError, match="weights"):
        OscillatorCurve.from_population(**cols)
    with pytest.raises(ValueError, match="grid"):
        TabulatedCurve.from_population(**cols, values=[0.0, 1.0])


# -- bad input ---------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("make", "name"),
    [
        (lambda: NormalCurve(mu=0.0, sigma=0.0), "sigma"),
        (lambda: NormalCurve(mu=0.0, sigma=[1.0, -2.0]), "sigma"),
        (lambda: NormalCurve(mu=np.nan, sigma=1.0), "mu"),
        (lambda: NormalCurve(mu=0.0, sigma=1.0, activity=0.0), "activity"),
        (lambda: NormalCurve(mu=0.0, sigma=1.0, activity=1.2), "activity"),
        (lambda: NormalCurve(mu=0.0, sigma=1.0, role=3), "role"),
        (lambda: OscillatorCurve(mu=0.0, sigma=-1.0, weights=[1.0]), "sigma"),
        (lambda: OscillatorCurve(mu=0.0, sigma=1.0, weights=[1.0, -0.1]), "weights"),
        (lambda: OscillatorCurve(mu=0.0, sigma=1.0, weights=[0.0, 0.0]), "weights"),
        (lambda: OscillatorCurve(mu=0.0, sigma=1.0, weights=1.0), "weights"),
        (lambda: LogisticCurve(mu=0.0, tau=0.0, side="buyer"), "tau"),
        (lambda: LogisticCurve(mu=0.0, tau=1.0, side="maker"), "side"),
        (lambda: TabulatedCurve(grid=[0.0, 0.0, 1.0], values=[0, 1, 0]), "grid"),
        (lambda: TabulatedCurve(grid=[0.0], values=[1.0]), "grid"),
        (lambda: TabulatedCurve(grid=[0.0, 1.0], values=[0.5, 1.5]), "values"),
        (lambda: TabulatedCurve(grid=[0.0, 1.0], values=[0.5, 0.5, 0.5]), "values"),
    ],
)
def test_bad_parameters_name_themselves(make, name):
    with pytest.raises(ValueError, match=rf"^{name}\b"):
        make()


@pytest.mark.parametrize("family", FAMILIES)
def test_bad_evaluation_input(family):
    curve = _families()[family]
    with pytest.raises(ValueError, match="^x "):
        curve.value([100.0, np.nan])
    with pytest.raises(ValueError, match="^x "):
        curve.log_value(np.inf)
    with pytest.raises(ValueError, match="^gamma"):
        curve.force(100.0, 0.0)
    with pytest.raises(ValueError, match="^x1"):
        curve.energy(100.0, np.nan, 1.0)
    with pytest.raises(ValueError, match="^threshold"):
        curve.reservation_price(0.0, side="buyer")
    with pytest.raises(ValueError, match="^threshold"):
        curve.reservation_price(1.5, side="buyer")


def test_oscillator_fast_and_log_space_paths_agree():
    # the mixture uses a plain recurrence for |xi| <= 30 and the log-space one beyond; both
    # must give the same ln S across the switch (and the log path alone is the reference)
    from propensim.agents.oscillator import log_hermite_functions

    weights = np.array([0.3, 0.0, 0.2, 0.1, 0.4])
    xi = np.array([0.0, 0.7, 5.0, 12.0, 29.999, 30.0, 30.001, 45.0])
    log_w = np.log(np.where(weights > 0, weights, 1e-300))[:, None]
    log_psi, _ = log_hermite_functions(4, xi)
    reference = np.logaddexp.reduce(log_w + 2 * log_psi, axis=0)
    np.testing.assert_allclose(OscillatorCurve._log_mix(log_w, xi), reference, rtol=1e-13)
