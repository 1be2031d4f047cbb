"""Drift rules: exact Ornstein-Uhlenbeck steps, force directions, sums of forces, validation."""

from __future__ import annotations

import math

import numpy as np
import pytest

from propensim.agents.population import Population, build_population
from propensim.plugins.contracts import DriftRule
from propensim.plugins.drift import (
    AnchorDrift,
    DriftSum,
    NoDrift,
    OutcomeDrift,
    SocialDrift,
    WidthAdaptation,
    combine,
    ou_step,
)
from propensim.plugins.registry import get_plugin, make_plugin
from propensim.plugins.types import MarketState, RoundOutcome, Trades, TradingNetwork


def make_state(pop: Population, network: TradingNetwork | None = None) -> MarketState:
    n = len(pop)
    if network is None:
        network = TradingNetwork(n=n, buyer=np.zeros(0), seller=np.zeros(0))
    return MarketState(population=pop, network=network)


def no_trades(n: int) -> RoundOutcome:
    return RoundOutcome.from_trades(Trades.empty(), n)


def ou_population(n: int, theta: float, rng) -> Population:
    """Anchor stiffness k = gamma / sigma^2 = theta (eta = 1), values spread over 80..120."""
    return build_population(
        n // 2, n - n // 2, value=(80.0, 120.0), cost=(80.0, 120.0), sigma=1.0, gamma=theta, rng=rng
    )


def run_anchor(pop: Population, rule, steps: int, rng) -> list[np.ndarray]:
    """Step the anchor drift, writing mu back as the market would; return deviations mu - value."""
    out = []
    outcome = no_trades(len(pop))
    for _ in range(steps):
        mu, sigma = rule.apply(make_state(pop), outcome, rng)
        pop.mu, pop.sigma = mu, sigma
        out.append(mu - pop.value)
    return out


# -- the exact Ornstein-Uhlenbeck step -------------------------------------------------------------
def test_anchor_stationary_variance_and_autocorrelation_match_ou():
    # dx = -theta (x - v) dt + s dW with theta = k / eta = 2, s^2 = 2 D = 1 (D = 0.5):
    # stationary variance s^2 / (2 theta) = D eta / k = 0.25, lag-1 autocorrelation
    # exp(-theta dt) -- Uhlenbeck & Ornstein, Phys. Rev. 36:823 (1930).
    rng = np.random.default_rng(11)
    n, theta, dt = 20_000, 2.0, 0.1
    pop = ou_population(n, theta, rng)
    pop.mu = pop.value.copy()  # start at the rest point: the variance must grow to 0.25
    rule = AnchorDrift(eta=1.0, noise=0.5, dt=dt)
    dev = run_anchor(pop, rule, 60, rng)  # t = 6 = 12 relaxation times
    var = dev[-1].var()
    # standard error of a variance estimate: 0.25 sqrt(2 / n) = 0.0025
    assert var == pytest.approx(0.25, abs=0.01)
    assert abs(dev[-1].mean()) < 0.015  # mean deviation 0, sd 0.5 / sqrt(n) = 0.0035
    lag1 = np.corrcoef(dev[-2], dev[-1])[0, 1]
    assert lag1 == pytest.approx(math.exp(-theta * dt), abs=0.01)  # 0.8187


def test_exact_step_gives_025_where_euler_settles_at_02778():
    # REFERENCES.md (Uhlenbeck & Ornstein 1930; Gillespie, Phys. Rev. E 54:2084, 1996):
    # theta = 2, s = 1, dt = 0.1: exact stationary variance 0.25, Euler's 0.2778.
    theta, s, dt, n, steps = 2.0, 1.0, 0.1, 20_000, 80
    euler_analytic = s**2 * dt / (1.0 - (1.0 - theta * dt) ** 2)
    assert euler_analytic == pytest.approx(0.2778, abs=1e-4)
    rng = np.random.default_rng(5)
    x = np.zeros(n)
    for _ in range(steps):  # a plain Euler-Maruyama reference
        x = x - theta * x * dt + s * math.sqrt(dt) * rng.standard_normal(n)
    assert x.var() == pytest.approx(0.2778, abs=0.012)

    pop = ou_population(n, theta, rng)
    pop.mu = pop.value.copy()
    dev = run_anchor(pop, AnchorDrift(noise=s**2 / 2, dt=dt), steps, rng)
    ours = dev[-1].var()
    assert ours == pytest.approx(0.25, abs=0.01)
    assert abs(ours - x.var()) > 0.015  # the two discretisations are told apart


def test_large_dt_is_stable_and_exact():
    # Euler with theta dt = 10 would multiply deviations by (1 - 10) = -9 per step and blow up;
    # the exact step keeps the OU stationary law: variance 0.25, lag-1 correlation e^-10 ~ 0.
    rng = np.random.default_rng(8)
    n, theta, dt = 20_000, 2.0, 5.0
    pop = ou_population(n, theta, rng)
    pop.mu = pop.value + 50.0  # far from home
    dev = run_anchor(pop, AnchorDrift(noise=0.5, dt=dt), 6, rng)
    assert np.all(np.isfinite(dev[-1]))
    assert dev[-1].var() == pytest.approx(0.25, abs=0.01)
    assert abs(dev[-1].mean()) < 0.015
    assert abs(np.corrcoef(dev[-2], dev[-1])[0, 1]) < 0.03


def test_ou_step_conditional_moments():
    # One exact step from x0: mean m + (x0 - m) e^{-k dt/eta},
    # variance (D eta / k)(1 - e^{-2 k dt/eta}) -- Gillespie, Phys. Rev. E 54:2084 (1996).
    rng = np.random.default_rng(3)
    n = 200_000
    k, c, eta, noise, dt = 3.0, 6.0, 2.0, 0.4, 0.7
    x0 = np.full(n, 5.0)
    x1 = ou_step(x0, np.full(n, k), np.full(n, c), eta=eta, noise=noise, dt=dt, rng=rng)
    m = c / k
    decay = math.exp(-k * dt / eta)
    assert x1.mean() == pytest.approx(m + (5.0 - m) * decay, abs=0.003)
    assert x1.var() == pytest.approx(noise * eta / k * (1 - decay**2), rel=0.01)
    # stiffness 0: exact Brownian step with drift c / eta
    y = ou_step(x0, np.zeros(n), np.full(n, c), eta=eta, noise=noise, dt=dt, rng=rng)
    assert y.mean() == pytest.approx(5.0 + c * dt / eta, abs=0.003)
    assert y.var() == pytest.approx(2 * noise * dt, rel=0.01)


def test_ou_step_is_continuous_at_zero_stiffness():
    # the k -> 0 limit of the OU step is the Brownian step (common practice, no source)
    x0 = np.array([1.0, 1.0, 1.0])
    k = np.array([0.0, 1e-12, 1e-6])
    out = ou_step(x0, k, np.full(3, 2.0), eta=1.0, dt=0.5)
    assert out == pytest.approx([2.0, 2.0, 2.0 - 0.5e-6 * 1.5], abs=1e-9)


# -- sums of forces -------------------------------------------------------------------------------
def test_anchor_plus_outcome_is_ou_with_shifted_mean():
    # anchor stiffness k, constant outcome force f: the rest point moves to v + f / k and one
    # deterministic step is m + (mu - m) e^{-k dt / eta} -- Uhlenbeck & Ornstein (1930).
    pop = build_population(2, 2, value=100.0, cost=90.0, sigma=2.0, gamma=3.0, rng=1)
    pop.mu = np.array([95.0, 104.0, 93.0, 85.0])
    traded = Trades([0], [2], [97.0], [1])  # buyer 0 and seller 2 traded, 1 and 3 missed
    outcome = RoundOutcome.from_trades(traded, 4)
    eta, dt, strength, step = 1.5, 0.8, 0.5, 0.3
    drift = combine([AnchorDrift(strength=strength), OutcomeDrift(step=step)], eta=eta, dt=dt)
    mu, sigma = drift.apply(make_state(pop), outcome, np.random.default_rng(0))
    k = strength * 3.0 / 2.0**2
    f = np.array([-step, +step, +step, -step])  # buyer won, buyer missed, seller won, seller missed
    m = pop.value + f / k
    expected = m + (pop.mu - m) * math.exp(-k * dt / eta)
    assert mu == pytest.approx(expected, abs=1e-12)
    assert sigma == pytest.approx(pop.sigma)


def test_combined_stationary_mean_is_shifted():
    # the OU law of anchor + outcome: stationary mean v + f / k, variance D eta / k
    rng = np.random.default_rng(21)
    n = 10_000
    pop = build_population(n, 0, value=50.0, sigma=1.0, gamma=1.0, rng=rng)
    drift = combine([AnchorDrift(), OutcomeDrift(step=0.2)], noise=0.5, dt=1.0)
    outcome = no_trades(n)  # every buyer misses: f = +0.2
    for _ in range(15):
        pop.mu, pop.sigma = drift.apply(make_state(pop), outcome, rng)
    assert pop.mu.mean() == pytest.approx(50.2, abs=0.03)
    assert pop.mu.var() == pytest.approx(0.5, abs=0.03)


def test_single_rule_apply_is_combine_of_itself():
    pop = build_population(5, 5, sigma=3.0, rng=2)
    state, outcome = make_state(pop), no_trades(10)
    rule = AnchorDrift(eta=2.0, noise=0.3, dt=0.5, strength=1.5)
    a = rule.apply(state, outcome, np.random.default_rng(9))
    b = combine([rule], eta=2.0, noise=0.3, dt=0.5).apply(state, outcome, np.random.default_rng(9))
    assert np.array_equal(a[0], b[0]) and np.array_equal(a[1], b[1])


def test_combine_accepts_names_and_nests():
    pop = build_population(3, 3, rng=4)
    state, outcome = make_state(pop), no_trades(6)
    inner = combine(["anchor", "outcome"])
    assert isinstance(inner.rules[0], AnchorDrift)
    outer = combine([inner, NoDrift()])
    k1, c1 = inner.terms(state, outcome)
    k2, c2 = outer.terms(state, outcome)
    assert np.array_equal(k1, k2) and np.array_equal(c1, c2)


# -- single rules ---------------------------------------------------------------------------------
def test_outcome_drift_moves_each_side_the_right_way():
    pop = build_population(3, 3, value=100.0, cost=90.0, sigma=2.0, rng=1)
    pop.stock[5] = 0  # seller 5 has nothing to sell: it cannot miss a trade
    mu0 = pop.mu.copy()
    outcome = RoundOutcome.from_trades(Trades([0], [3], [95.0], [1]), 6)
    mu, sigma = OutcomeDrift(step=0.5).apply(make_state(pop), outcome, np.random.default_rng(0))
    # buyer won -> lower, buyers missed -> higher, seller won -> higher, seller missed -> lower
    assert mu - mu0 == pytest.approx([-0.5, 0.5, 0.5, 0.5, -0.5, 0.0])
    assert np.array_equal(sigma, pop.sigma)
    assert np.array_equal(pop.mu, mu0)  # the population is not modified


def test_width_adaptation_narrows_widens_and_clips():
    pop = build_population(2, 2, rng=1)
    pop.sigma = np.array([2.0, 2.0, 2.0, 0.0011])
    outcome = RoundOutcome.from_trades(Trades([0], [2], [95.0], [1]), 4)
    rule = WidthAdaptation(narrow=0.1, widen=0.25, sigma_min=1e-3, sigma_max=2.2)
    mu, sigma = rule.apply(make_state(pop), outcome, np.random.default_rng(0))
    # buyer 0 traded: 1.8; buyer 1 missed: 2.5 clipped to 2.2; seller 2 traded: 1.8;
    # seller 3 missed: 0.001375
    assert sigma == pytest.approx([1.8, 2.2, 1.8, 0.0011 * 1.25])
    assert np.array_equal(mu, pop.mu)
    narrow = WidthAdaptation(narrow=0.9, sigma_min=1.0)
    _, s2 = narrow.apply(make_state(pop), outcome, np.random.default_rng(0))
    assert s2[0] == 1.0  # 0.2 clipped up to sigma_min


def social_terms_loop(pop, network, strength):
    """Plain-loop reference for SocialDrift.terms."""
    n = len(pop)
    u, v = network.social
    k, c = np.zeros(n), np.zeros(n)
    for i in range(n):
        nbrs = [int(b) for a, b in zip(u, v, strict=True) if a == i and b != i]
        if not nbrs:
            continue
        for j in nbrs:
            w = strength * pop.gamma[i] / len(nbrs) / pop.sigma[j] ** 2
            k[i] += w
            c[i] += w * pop.mu[j]
    return k, c


def test_social_drift_terms_match_loop_reference():
    rng = np.random.default_rng(6)
    pop = build_population(12, 10, sigma=(1.0, 4.0), gamma=(0.5, 2.0), rng=rng)
    b = rng.integers(0, 12, 30)
    s = rng.integers(12, 22, 30)
    net = TradingNetwork(n=22, buyer=b, seller=s)
    k, c = SocialDrift(strength=0.7).terms(make_state(pop, net), no_trades(22))
    k_ref, c_ref = social_terms_loop(pop, net, 0.7)
    assert k == pytest.approx(k_ref) and c == pytest.approx(c_ref)


def test_social_drift_pulls_toward_neighbours():
    # buyer 0 joined to sellers 1 and 2 of equal width: its rest point is their mean price.
    pop = build_population(1, 2, value=10.0, cost=20.0, sigma=1.0, gamma=1.0, rng=0)
    pop.mu = np.array([10.0, 20.0, 30.0])
    net = TradingNetwork(n=3, buyer=[0, 0], seller=[1, 2])
    mu, _ = SocialDrift(dt=50.0).apply(make_state(pop, net), no_trades(3), np.random.default_rng(0))
    assert mu[0] == pytest.approx(25.0, abs=1e-9)  # stiffness 1, e^-50
    assert mu[1] == pytest.approx(10.0) and mu[2] == pytest.approx(10.0)  # each sees only buyer 0
    isolated = build_population(1, 1, rng=0)
    empty = TradingNetwork(n=2, buyer=[], seller=[])
    mu2, _ = SocialDrift().apply(
        make_state(isolated, empty), no_trades(2), np.random.default_rng(0)
    )
    assert np.array_equal(mu2, isolated.mu)


def test_no_drift_returns_copies():
    pop = build_population(2, 2, rng=0)
    mu, sigma = NoDrift().apply(make_state(pop), no_trades(4), np.random.default_rng(0))
    assert np.array_equal(mu, pop.mu) and mu is not pop.mu and sigma is not pop.sigma


def test_noise_draws_only_from_given_generator():
    pop = build_population(4, 4, rng=0)
    rule = AnchorDrift(noise=1.0)
    a, _ = rule.apply(make_state(pop), no_trades(8), np.random.default_rng(42))
    b, _ = rule.apply(make_state(pop), no_trades(8), np.random.default_rng(42))
    c, _ = rule.apply(make_state(pop), no_trades(8), np.random.default_rng(43))
    assert np.array_equal(a, b) and not np.array_equal(a, c)


# -- contract, registry, validation ---------------------------------------------------------------
@pytest.mark.parametrize(
    ("name", "cls"),
    [
        ("none", NoDrift),
        ("anchor", AnchorDrift),
        ("outcome", OutcomeDrift),
        ("social", SocialDrift),
        ("width", WidthAdaptation),
    ],
)
def test_entry_points_resolve(name, cls):
    assert get_plugin("drift", name) is cls
    rule = make_plugin("drift", name)
    assert isinstance(rule, DriftRule)
    assert "\n" not in cls.description and cls.description
    assert isinstance(DriftSum(), DriftRule)


@pytest.mark.parametrize(
    ("name", "params", "field", "allowed"),
    [
        ("anchor", {"noise": -1.0}, "noise", ">= 0"),
        ("anchor", {"eta": 0.0}, "eta", "> 0"),
        ("anchor", {"dt": -0.1}, "dt", "> 0"),
        ("anchor", {"strength": -2.0}, "strength", ">= 0"),
        ("outcome", {"step": -0.5}, "step", ">= 0"),
        ("social", {"strength": "strong"}, "strength", "number"),
        ("width", {"narrow": 1.0}, "narrow", "[0, 1)"),
        ("width", {"widen": -0.1}, "widen", ">= 0"),
        ("width", {"sigma_min": 0.0}, "sigma_min", "> 0"),
        ("width", {"sigma_min": 2.0, "sigma_max": 1.0}, "sigma_max", ">= sigma_min"),
    ],
)
def test_bad_parameters_name_field_and_range(name, params, field, allowed):
    with pytest.raises(ValueError) as err:
        make_plugin("drift", name, **params)
    msg = str(err.value)
    assert field in msg and allowed in msg and "\n" not in msg


def test_combine_takes_apply_only_rules_after_the_forces_and_refuses_neither():
    from propensim.plugins.types import MarketState, RoundOutcome, Trades

    class Shift:  # a rule with only apply(): moves every curve up by 1
        description = "shift every preferred price up by one"

        def apply(self, state, outcome, rng):
            return state.population.mu + 1.0, state.population.sigma

    class Neither:
        description = "neither terms nor apply"

    pop = build_population(3, 3, value=100.0, cost=80.0, rng=0)
    state = MarketState(population=pop, network=None)
    outcome = RoundOutcome.from_trades(Trades.empty(), len(pop))
    anchor = AnchorDrift(strength=1.0)
    forces_only = combine([anchor]).apply(state, outcome, np.random.default_rng(1))
    both = combine([anchor, Shift()]).apply(state, outcome, np.random.default_rng(1))
    # forces first (same draws), then the apply-only rule on their result
    np.testing.assert_array_equal(both[0], forces_only[0] + 1.0)
    assert np.array_equal(pop.mu, build_population(3, 3, value=100.0, cost=80.0, rng=0).mu)
    with pytest.raises(ValueError, match="terms.*apply"):
        combine([Neither()])
    with pytest.raises(ValueError, match="noise"):
        combine([AnchorDrift()], noise=-1)


def test_drift_sum_passes_the_conformance_kit():
    testing = pytest.importorskip("propensim.plugins.testing")
    testing.check_drift_rule(combine(["anchor", "outcome", "social", "width"], noise=0.3))
