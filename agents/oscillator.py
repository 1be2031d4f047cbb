"""Quantised springs: harmonic-oscillator levels of a propensity curve.

A normal propensity curve of width ``sigma`` and energy scale ``gamma`` implies a linear entropic
spring of stiffness ``k = gamma / sigma**2``. Treated as a quantum harmonic oscillator whose ground
state reproduces the curve, it has levels ``n = 0, 1, 2, ...`` with energies ``gamma (2n + 1)``
and price densities ``|psi_n(xi)|**2 / (sqrt(2) sigma)``, ``xi = (x - mu) / (sqrt(2) sigma)``.
Mixtures of levels give non-normal price distributions (:class:`~propensim.agents.curves.
OscillatorCurve`); a Boltzmann mixture of all levels is again normal, a little wider.

Everything here is plain numpy. The Hermite functions are computed with the normalised three-term
recurrence (no factorials, no Hermite polynomial coefficients), in log space with a running scale,
so they stay finite for high levels and far out in the tails.

References
----------
.. [1] D. J. Griffiths, *Introduction to Quantum Mechanics*, section 2.3.2 (the algebraic and
   analytic harmonic oscillator: ``psi_n``, ``E_n = (n + 1/2) hbar omega``).
.. [2] R. P. Feynman, *Statistical Mechanics* (Benjamin, 1972), eq. 2.84 (the thermal
   density matrix of the oscillator: a normal law with variance
   ``hbar / (2 m omega) coth(hbar omega / (2 k T))``).
"""

from __future__ import annotations

import math

import numpy as np

from propensim.agents._checks import as_float_array, check_positive

__all__ = [
    "boltzmann_weights",
    "hermite_functions",
    "level_energies",
    "log_hermite_functions",
    "oscillator_density",
    "oscillator_mass",
    "thermal_variance",
]

#: psi_0(0) = pi**(-1/4): the ground-state amplitude at the centre.
_PI_M14 = math.pi**-0.25


def _check_level(name: str, n) -> int:
    """A whole number >= 0 (a level index)."""
    if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 0:
        raise ValueError(f"{name} must be a whole number >= 0, got {n!r}")
    return int(n)


def log_hermite_functions(nmax: int, xi) -> tuple[np.ndarray, np.ndarray]:
    """Logarithm and sign of the normalised Hermite functions ``psi_0 .. psi_nmax`` at ``xi``.

    ``psi_n(xi) = sign * exp(log_abs)``. The recurrence runs on ``h_n = psi_n exp(xi**2 / 2)``
    with a running log scale, rescaled at every level, so neither the polynomial growth
    (``~ xi**n``) nor the Gaussian factor (``exp(-xi**2 / 2)``) can overflow or underflow:
    ``log_abs`` is finite (except exactly at a zero of ``psi_n``, where it is ``-inf``).

    Parameters
    ----------
    nmax : int
        Highest level (>= 0).
    xi : array_like
        Dimensionless position (finite), any shape.

    Returns
    -------
    log_abs, sign : ndarray, shape (nmax + 1, *xi.shape)
        ``log |psi_n(xi)|`` and ``sign(psi_n(xi))`` (0 at a zero).

    Notes
    -----
    Recurrence: ``psi_0 = pi**(-1/4) exp(-xi**2/2)``,
    ``psi_{n+1} = sqrt(2/(n+1)) xi psi_n - sqrt(n/(n+1)) psi_{n-1}``.

    References
    ----------
    .. [1] D. J. Griffiths, *Introduction to Quantum Mechanics*, section 2.3.2.
    """
    nmax = _check_level("nmax", nmax)
    xi = as_float_array("xi", xi)
    log_abs = np.empty((nmax + 1, *xi.shape))  # shape: (nmax+1, *xi.shape)
    sign = np.empty((nmax + 1, *xi.shape))
    half_sq = 0.5 * np.square(xi)
    t_prev = np.zeros_like(xi)  # scaled h_{n-1}
    t_cur = np.full_like(xi, _PI_M14)  # scaled h_n
    scale = np.zeros_like(xi)  # h_n = exp(scale) * t_cur
    with np.errstate(divide="ignore"):
        for n in range(nmax + 1):
            log_abs[n] = np.log(np.abs(t_cur)) + scale - half_sq
            sign[n] = np.sign(t_cur)
            if n == nmax:
                break
            t_next = math.sqrt(2.0 / (n + 1)) * xi * t_cur - math.sqrt(n / (n + 1)) * t_prev
            # Rescale so the larger of the two kept terms has magnitude 1. Consecutive Hermite
            # polynomials share no zero, so the factor is positive; the guard is for safety only.
            f = np.maximum(np.abs(t_next), np.abs(t_cur))
            f = np.where(f > 0, f, 1.0)
            t_prev, t_cur = t_cur / f, t_next / f
            scale = scale + np.log(f)
    return log_abs, sign


def hermite_functions(nmax: int, xi) -> np.ndarray:
    """The normalised Hermite functions ``psi_0(xi) .. psi_nmax(xi)``.

    ``psi_n(xi) = (2**n n! sqrt(pi))**(-1/2) H_n(xi) exp(-xi**2 / 2)`` with physicists' Hermite
    polynomials ``H_n``; orthonormal on the real line. Stable for high levels (tested to 60) and
    large ``|xi|`` (values underflow smoothly to 0, never to NaN).

    Parameters
    ----------
    nmax : int
        Highest level (>= 0).
    xi : array_like
        Dimensionless position, any shape.

    Returns
    -------
    ndarray, shape (nmax + 1, *xi.shape)

    References
    ----------
    .. [1] D. J. Griffiths, *Introduction to Quantum Mechanics*, section 2.3.2.

    Examples
    --------
    >>> round(float(hermite_functions(0, 0.0)[0]), 7)  # pi**(-1/4)
    0.7511255
    """
    log_abs, sign = log_hermite_functions(nmax, xi)
    return sign * np.exp(log_abs)


def oscillator_density(n: int, x, mu=0.0, sigma=1.0) -> np.ndarray:
    """Price density of level ``n``: ``|psi_n(xi)|**2 / (sqrt(2) sigma)``.

    Parameters
    ----------
    n : int
        Level (>= 0). Level 0 is the normal density with mean ``mu`` and variance ``sigma**2``;
        level ``n`` has variance ``(2n + 1) sigma**2``.
    x : array_like
        Prices (price units).
    mu : array_like
        Centre of the spring (price units).
    sigma : array_like
        Width of the ground state (price units, > 0).

    Returns
    -------
    ndarray
        Density in 1/price units, shape of ``x``, ``mu`` and ``sigma`` broadcast together;
        integrates to 1 over ``x``.

    References
    ----------
    .. [1] D. J. Griffiths, *Introduction to Quantum Mechanics*, section 2.3.2
       (``xi = sqrt(m omega / hbar) x``; here ``xi = (x - mu) / (sqrt(2) sigma)``).
    """
    n = _check_level("n", n)
    x = as_float_array("x", x)
    mu = as_float_array("mu", mu)
    sigma = check_positive("sigma", sigma)
    xi = (x - mu) / (math.sqrt(2.0) * sigma)
    log_abs, _ = log_hermite_functions(n, xi)
    return np.exp(2.0 * log_abs[n]) / (math.sqrt(2.0) * sigma)


def level_energies(n, gamma) -> np.ndarray:
    """Energy of level ``n``: ``E_n = gamma (2n + 1)``.

    With ``hbar omega = 2 gamma`` (see :func:`oscillator_mass`), ``E_n = (n + 1/2) hbar omega``.

    Parameters
    ----------
    n : array_like of int
        Levels (>= 0).
    gamma : array_like
        Entropic energy scale of the curve (energy units, > 0).

    Returns
    -------
    ndarray
        Energies (energy units), ``n`` and ``gamma`` broadcast together.

    References
    ----------
    .. [1] D. J. Griffiths, *Introduction to Quantum Mechanics*, section 2.3.2.
    """
    levels = as_float_array("n", n)
    if np.any(levels < 0) or np.any(levels != np.round(levels)):
        raise ValueError(f"n must be whole numbers >= 0, got {n!r}")
    gamma = check_positive("gamma", gamma)
    return gamma * (2.0 * levels + 1.0)


def oscillator_mass(gamma, sigma, hbar=1.0) -> np.ndarray:
    """Mass whose ground state reproduces the curve: ``hbar**2 / (4 gamma sigma**2)``.

    The spring has stiffness ``k = gamma / sigma**2``; with this mass its ground-state density is
    the normal of variance ``sigma**2`` and ``hbar omega = 2 gamma``.

    Parameters
    ----------
    gamma : array_like
        Energy scale (> 0).
    sigma : array_like
        Curve width (price units, > 0).
    hbar : float
        Quantum of action in the model's units (> 0, default 1).

    Returns
    -------
    ndarray
        Mass in units of ``hbar**2 / (energy * price**2)``.

    References
    ----------
    .. [1] D. J. Griffiths, *Introduction to Quantum Mechanics*, section 2.3.2 (ground-state
       variance ``hbar / (2 m omega)``).
    """
    gamma = check_positive("gamma", gamma)
    sigma = check_positive("sigma", sigma)
    hbar = check_positive("hbar", hbar)
    return hbar**2 / (4.0 * gamma * sigma**2)


def boltzmann_weights(nmax: int, gamma, temperature) -> np.ndarray:
    """Boltzmann weights of levels ``0..nmax``: ``w_n`` proportional to ``exp(-E_n / T)``, sum 1.

    Computed in log space (``log w_n = -2 gamma n / T - log Z``), so a tiny temperature gives the
    ground state (weights ``[1, 0, 0, ...]``) without overflow or NaN.

    Parameters
    ----------
    nmax : int
        Highest level kept (>= 0).
    gamma : array_like
        Energy scale (> 0).
    temperature : array_like
        Temperature in energy units (``k_B T``, > 0).

    Returns
    -------
    ndarray, shape (*broadcast(gamma, temperature).shape, nmax + 1)
        Level axis last (the layout :class:`~propensim.agents.curves.OscillatorCurve` takes).

    References
    ----------
    .. [1] R. P. Feynman, *Statistical Mechanics* (1972), section 2 (canonical ensemble).
    """
    nmax = _check_level("nmax", nmax)
    gamma = check_positive("gamma", gamma)
    temperature = check_positive("temperature", temperature)
    beta_gap = (2.0 * gamma / temperature)[..., None]  # shape: (..., 1); E_{n+1} - E_n = 2 gamma
    log_w = -beta_gap * np.arange(nmax + 1)  # shape: (..., nmax+1); relative to the ground state
    log_w = log_w - np.logaddexp.reduce(log_w, axis=-1, keepdims=True)
    return np.exp(log_w)


def thermal_variance(sigma, gamma, temperature) -> np.ndarray:
    """Variance of the Boltzmann mixture of all levels: ``sigma**2 coth(gamma / T)``.

    Parameters
    ----------
    sigma : array_like
        Ground-state width (price units, > 0).
    gamma : array_like
        Energy scale (> 0).
    temperature : array_like
        Temperature in energy units (> 0). ``T -> 0`` gives ``sigma**2``; large ``T`` gives
        ``sigma**2 T / gamma``.

    Returns
    -------
    ndarray
        Price variance (price units squared).

    References
    ----------
    .. [1] R. P. Feynman, *Statistical Mechanics* (1972), eq. 2.84: variance
       ``hbar/(2 m omega) coth(hbar omega / (2 k T))``; here ``hbar/(2 m omega) = sigma**2``
       and ``hbar omega = 2 gamma``.
    """
    sigma = check_positive("sigma", sigma)
    gamma = check_positive("gamma", gamma)
    temperature = check_positive("temperature", temperature)
    return sigma**2 / np.tanh(gamma / temperature)
