"""Oscillator levels: Hermite functions, level densities, energies and the thermal mixture."""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.polynomial.hermite import hermgauss
from scipy.special import eval_hermite, factorial

from propensim.agents.oscillator import (
    boltzmann_weights,
    hermite_functions,
    level_energies,
    log_hermite_functions,
    oscillator_density,
    oscillator_mass,
    thermal_variance,
)


def test_ground_state_at_centre():
    # psi_0(0) = pi**(-1/4) = 0.7511255: Griffiths, Introduction to QM, section 2.3.2
    assert hermite_functions(0, 0.0)[0] == pytest.approx(0.7511255, abs=1e-7)
    assert hermite_functions(0, 0.0)[0] == pytest.approx(math.pi**-0.25, rel=1e-15)


def test_orthonormal_to_level_60_by_gauss_hermite():
    # Orthonormality of psi_n; cross-check with numpy.polynomial.hermite Gauss-Hermite quadrature
    # (Griffiths 2.3.2; quadrature exact for polynomial degree <= 2*100 - 1 >= 120).
    nodes, weights = hermgauss(100)
    psi = hermite_functions(60, nodes)  # (61, 100)
    # integral psi_m psi_n dxi = sum_k w_k exp(xi_k^2) psi_m(xi_k) psi_n(xi_k)
    gram = (psi * (weights * np.exp(nodes**2))) @ psi.T
    assert np.max(np.abs(gram - np.eye(61))) < 1e-10


@pytest.mark.parametrize("n", [0, 1, 2, 3, 5, 8, 10])
def test_matches_scipy_hermite_polynomials(n):
    # psi_n = (2^n n! sqrt(pi))^(-1/2) H_n(xi) exp(-xi^2/2), H_n physicists' Hermite:
    # Griffiths 2.3.2, with scipy.special.eval_hermite as the independent H_n.
    xi = np.linspace(-6.0, 6.0, 41)
    expected = (
        eval_hermite(n, xi) * np.exp(-(xi**2) / 2) / np.sqrt(2.0**n * factorial(n) * np.sqrt(np.pi))
    )
    np.testing.assert_allclose(hermite_functions(n, xi)[n], expected, rtol=1e-11, atol=1e-14)


@pytest.mark.parametrize("n", [0, 1, 2, 5, 10, 30])
def test_level_moments_griffiths(n):
    # <x^2>_n = (n + 1/2) and <x^4>_n = (3/4)(2n^2 + 2n + 1) in units hbar = m = omega = 1:
    # Griffiths, Introduction to QM, section 2.3.2 (and problem 2.12 for x^4; values from the
    # ladder-operator algebra). In price units x - mu = sqrt(2) sigma xi, so
    # variance (2n + 1) sigma^2 and fourth moment 4 sigma^4 (3/4)(2n^2 + 2n + 1).
    mu, sigma = 50.0, 1.5
    x = np.linspace(mu - 40 * sigma, mu + 40 * sigma, 40001)
    dens = oscillator_density(n, x, mu, sigma)
    mass = np.trapezoid(dens, x)
    m2 = np.trapezoid(dens * (x - mu) ** 2, x)
    m4 = np.trapezoid(dens * (x - mu) ** 4, x)
    assert mass == pytest.approx(1.0, rel=1e-10)
    assert m2 == pytest.approx((2 * n + 1) * sigma**2, rel=1e-10)
    assert m4 == pytest.approx(4 * sigma**4 * 0.75 * (2 * n**2 + 2 * n + 1), rel=1e-10)


def test_dimensionless_moments_by_quadrature():
    # Same Griffiths values directly in xi (hbar = m = omega = 1), Gauss-Hermite quadrature.
    nodes, weights = hermgauss(120)
    psi = hermite_functions(40, nodes)
    w = weights * np.exp(nodes**2)
    n = np.arange(41)
    np.testing.assert_allclose((psi**2 * nodes**2) @ w, n + 0.5, rtol=1e-11)
    np.testing.assert_allclose((psi**2 * nodes**4) @ w, 0.75 * (2 * n**2 + 2 * n + 1), rtol=1e-11)


def test_finite_at_level_60_far_out():
    xi = np.array([0.0, 3.0, 11.0, 40.0, -75.0, 1e3, -1e6])
    psi = hermite_functions(60, xi)
    assert np.all(np.isfinite(psi))
    assert np.all(np.abs(psi) <= 1.0)
    log_abs, sign = log_hermite_functions(60, xi)
    # finite everywhere except exact zeros (odd levels at xi = 0)
    odd = np.arange(61) % 2 == 1
    assert np.all(np.isneginf(log_abs[odd, 0]))
    assert np.all(np.isfinite(log_abs[~odd])) and np.all(np.isfinite(log_abs[odd, 1:]))
    # far tail at xi = 1e3, n = 60: the two leading terms of the explicit series
    # H_n = (2 xi)^n - n (n-1) (2 xi)^(n-2) + ... (common practice; Griffiths 2.3.2 lists H_n)
    # give log|psi_n| = -xi^2/2 + n log(2 xi) + log(1 - n(n-1)/(4 xi^2))
    #                   - (n log 2 + log n!)/2 - log(pi)/4, up to O(xi^-4)
    n, z = 60, 1e3
    expected = -0.5 * z**2 + n * math.log(2 * z) + math.log1p(-n * (n - 1) / (4 * z**2))
    expected -= 0.5 * (n * math.log(2.0) + math.lgamma(n + 1)) + 0.25 * math.log(math.pi)
    assert log_abs[60, 5] == pytest.approx(expected, abs=1e-6)
    assert np.all(sign[:, 5] == 1.0)


def test_density_high_level_is_stable_and_normalised():
    x = np.linspace(-30, 30, 6001)
    dens = oscillator_density(60, x)
    assert np.all(np.isfinite(dens)) and np.all(dens >= 0)
    assert np.trapezoid(dens, x) == pytest.approx(1.0, rel=1e-9)


def test_level_energies_and_mass():
    # E_n = (n + 1/2) hbar omega with hbar omega = 2 gamma (MODEL.md section 4; Griffiths 2.3.2)
    np.testing.assert_allclose(level_energies(np.arange(4), 0.5), [0.5, 1.5, 2.5, 3.5])
    gamma, sigma, hbar = 0.7, 2.5, 1.3
    m = oscillator_mass(gamma, sigma, hbar)
    omega = math.sqrt((gamma / sigma**2) / m)  # spring k = gamma / sigma^2
    assert hbar * omega == pytest.approx(2 * gamma, rel=1e-14)
    # ground-state variance hbar / (2 m omega) = sigma^2 (Griffiths 2.3.2)
    assert hbar / (2 * m * omega) == pytest.approx(sigma**2, rel=1e-14)


def test_boltzmann_weights():
    w = boltzmann_weights(5, gamma=0.5, temperature=2.0)
    assert w.sum() == pytest.approx(1.0, rel=1e-15)
    # w_{n+1}/w_n = exp(-(E_{n+1} - E_n)/T) = exp(-2 gamma / T), common practice (Boltzmann)
    np.testing.assert_allclose(w[1:] / w[:-1], math.exp(-0.5), rtol=1e-13)
    cold = boltzmann_weights(10, gamma=1.0, temperature=1e-6)
    assert np.all(np.isfinite(cold))
    np.testing.assert_array_equal(cold, np.eye(11)[0])
    batch = boltzmann_weights(3, gamma=[1.0, 2.0], temperature=[[1.0], [4.0]])
    assert batch.shape == (2, 2, 4)
    np.testing.assert_allclose(batch.sum(-1), 1.0)


def test_thermal_mixture_is_normal_feynman():
    # Feynman, Statistical Mechanics (1972) eq. 2.84: the Boltzmann mixture of all levels is
    # normal with variance hbar/(2 m omega) coth(hbar omega / 2kT); at kT = 1 with
    # hbar = m = omega = 1 the variance is 1.0819767. Here sigma^2 = 1/2, gamma = 1/2, T = 1.
    sigma, gamma, temp = math.sqrt(0.5), 0.5, 1.0
    var = thermal_variance(sigma, gamma, temp)
    assert var == pytest.approx(1.0819767, abs=1e-7)
    w = boltzmann_weights(200, gamma, temp)
    x = np.linspace(-8.0, 8.0, 161)
    xi = x / (math.sqrt(2) * sigma)
    mixture = (w @ hermite_functions(200, xi) ** 2) / (math.sqrt(2) * sigma)
    normal = np.exp(-(x**2) / (2 * var)) / math.sqrt(2 * math.pi * var)
    np.testing.assert_allclose(mixture, normal, rtol=1e-10, atol=1e-300)


def test_thermal_variance_limits():
    # coth(y) -> 1 as y -> inf: the ground state (T -> 0); coth(y) ~ 1/y as y -> 0 (classical
    # equipartition, variance sigma^2 T / gamma); common practice
    assert thermal_variance(2.0, 1.0, 1e-9) == pytest.approx(4.0, rel=1e-15)
    assert thermal_variance(2.0, 1.0, 1e6) == pytest.approx(4.0 * 1e6, rel=1e-9)


@pytest.mark.parametrize(
    ("call", "name"),
    [
        (lambda: hermite_functions(-1, 0.0), "nmax"),
        (lambda: hermite_functions(2.5, 0.0), "nmax"),
        (lambda: oscillator_density(-2, 0.0), "n"),
        (lambda: oscillator_density(1, 0.0, sigma=0.0), "sigma"),
        (lambda: oscillator_density(1, np.nan), "x"),
        (lambda: level_energies(-1, 1.0), "n"),
        (lambda: level_energies(1, -1.0), "gamma"),
        (lambda: oscillator_mass(1.0, 1.0, hbar=0.0), "hbar"),
        (lambda: boltzmann_weights(3, 1.0, 0.0), "temperature"),
        (lambda: thermal_variance(1.0, 0.0, 1.0), "gamma"),
    ],
)
def test_bad_input_names_the_parameter(call, name):
    with pytest.raises(ValueError, match=rf"^{name}\b"):
        call()
