"""Propensity matching (array and per-agent), run_per_agent, parameter checks, registration."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from propensim.agents.population import build_population
from propensim.plugins import registry
from propensim.plugins.clearing import (
    BilateralBargaining,
    CallAuction,
    DoubleAuction,
    PropensityMatching,
    PropensityMatchingPerAgent,
    RowAgent,
    run_per_agent,
)
from propensim.plugins.trade_checks import check_trades
from propensim.plugins.types import MarketState, Trades, TradingNetwork

# Bromiley 2003, Tina Memo 2003-003: N(3, 0.7^2) x N(4.5, 1^2) has mean 3.493289,
# variance 0.328859 and scale 0.153607 (= integral of the product of the two densities).
B_MU, B_SD, S_MU, S_SD = 3.0, 0.7, 4.5, 1.0
JOINT_MEAN, JOINT_VAR, SCALE = 3.493289, 0.328859, 0.153607
# With activities 1 the peak of P_b P_s is the scale times sqrt(2 pi (s_b^2 + s_s^2)).
PEAK = SCALE * np.sqrt(2 * np.pi * (B_SD**2 + S_SD**2))


def _pairs_market(n_pairs: int) -> MarketState:
    """n_pairs disjoint buyer-seller pairs with the Bromiley curves."""
    pop = build_population(n_pairs, n_pairs, rng=0)
    pop.mu[:n_pairs], pop.sigma[:n_pairs] = B_MU, B_SD
    pop.mu[n_pairs:], pop.sigma[n_pairs:] = S_MU, S_SD
    net = TradingNetwork(2 * n_pairs, np.arange(n_pairs), n_pairs + np.arange(n_pairs))
    return MarketState(pop, net)


def test_peak_constant_matches_closed_form():
    # Bromiley 2003: peak = exp(-(mu_b - mu_s)^2 / (2 (s_b^2 + s_s^2))) for unit activities
    assert PEAK == pytest.approx(np.exp(-(1.5**2) / (2 * 1.49)), rel=1e-5)


def test_single_pair_trades_with_joint_peak_frequency_and_joint_price_law():
    state = _pairs_market(1)
    rule = PropensityMatching()
    n_rounds = 2500
    prices = []
    for seed in range(n_rounds):
        trades = rule.clear(state, np.random.default_rng(seed))
        prices.extend(trades.price.tolist())
    k = len(prices)
    # Bromiley 2003 (peak of the product of two normal curves); binomial test, scipy.stats
    test = stats.binomtest(k, n_rounds, PEAK)
    assert test.pvalue > 1e-3, (k / n_rounds, PEAK)
    ci = test.proportion_ci(confidence_level=0.999)
    assert ci.low <= PEAK <= ci.high
    prices = np.array(prices)
    sd = np.sqrt(JOINT_VAR)
    # Bromiley 2003: price law N(3.493289, 0.328859); 3-sigma tolerance on the sample mean and sd
    assert abs(prices.mean() - JOINT_MEAN) < 3 * sd / np.sqrt(k)
    assert abs(prices.std(ddof=1) - sd) < 3 * sd / np.sqrt(2 * (k - 1))


def test_many_disjoint_pairs_agree_with_peak():
    trades = PropensityMatching().clear(_pairs_market(20000), np.random.default_rng(1))
    # Bromiley 2003 peak; binomial test over 20000 independent pairs in one round
    assert stats.binomtest(len(trades), 20000, PEAK).pvalue > 1e-3
    assert abs(trades.price.mean() - JOINT_MEAN) < 3 * np.sqrt(JOINT_VAR / len(trades))


def test_threshold_makes_acceptance_deterministic():
    state = _pairs_market(50)
    state.population.activity[:] = 1.0
    state.population.mu[25:50] = B_MU  # first 25 pairs: gap 1.5 (peak 0.47); last 25: gap 0
    state.population.mu[75:] = B_MU
    state.population.mu[50:75] = S_MU
    trades = PropensityMatching(threshold=0.5).clear(state, np.random.default_rng(0))
    assert sorted(trades.buyer.tolist()) == list(range(25, 50))  # peak 1 >= 0.5; 0.47 < 0.5
    none = PropensityMatching(threshold=0.99).clear(_pairs_market(50), np.random.default_rng(0))
    assert len(none) == 0


def test_capacity_cash_and_isolation():
    # one seller with one unit, ten eager buyers meeting it: exactly one sale per round
    pop = build_population(10, 1, value=100.0, cost=100.0, sigma=1.0, rng=0)
    net = TradingNetwork(11, np.arange(10), np.full(10, 10))
    state = MarketState(pop, net)
    for seed in range(20):
        trades = PropensityMatching(meetings=4).clear(state, np.random.default_rng(seed))
        check_trades(state, trades)
        assert trades.volume == 1  # peak 1: the first buyer in turn order buys, the rest find none
    pop.cash[:] = 50.0  # prices are near 100: nobody can pay
    assert len(PropensityMatching(meetings=4).clear(state, np.random.default_rng(0))) == 0
    empty = TradingNetwork(11, np.zeros(0, np.int64), np.zeros(0, np.int64))
    assert len(PropensityMatching().clear(MarketState(pop, empty), np.random.default_rng(0))) == 0


def _equivalence_market() -> MarketState:
    rng = np.random.default_rng(2024)
    pop = build_population(
        12,
        12,
        value=(80.0, 120.0),
        cost=(60.0, 100.0),
        shade=(0.0, 10.0),
        sigma=(4.0, 12.0),
        cash=(60.0, 260.0),
        stock=2,
        capacity=2,
        rng=rng,
    )
    linked = rng.random((12, 12)) < 0.3
    bi, sj = np.nonzero(linked)
    return MarketState(pop, TradingNetwork(24, bi, 12 + sj))


def _volume_and_mean(rule, state, seeds):
    vol, mean = [], []
    for seed in seeds:
        t = rule.clear(state, np.random.default_rng(seed))
        vol.append(t.volume)
        if len(t):
            mean.append(float(np.average(t.price, weights=t.quantity)))
    return np.array(vol), np.array(mean)


def test_array_and_per_agent_versions_agree_in_distribution():
    state = _equivalence_market()
    va, ma = _volume_and_mean(PropensityMatching(meetings=3), state, range(300))
    vp, mp = _volume_and_mean(PropensityMatchingPerAgent(meetings=3), state, range(1000, 1300))
    # common practice: two-sample KS tests and Welch t-tests at the 0.1% level
    assert stats.ks_2samp(va, vp).pvalue > 1e-3
    assert stats.ks_2samp(ma, mp).pvalue > 1e-3
    assert stats.ttest_ind(va, vp, equal_var=False).pvalue > 1e-3
    assert stats.ttest_ind(ma, mp, equal_var=False).pvalue > 1e-3
    # the same tests do detect a different process (one meeting instead of three)
    v1, _ = _volume_and_mean(PropensityMatchingPerAgent(meetings=1), state, range(300))
    assert stats.ks_2samp(va, v1).pvalue < 1e-6


def test_per_agent_trades_per_buyer_match_array_version():
    state = _equivalence_market()
    n = len(state.population)
    per_a, per_p = np.zeros(n), np.zeros(n)
    for seed in range(300):
        ta = PropensityMatching(meetings=3).clear(state, np.random.default_rng(seed))
        tp = PropensityMatchingPerAgent(meetings=3).clear(state, np.random.default_rng(seed + 7))
        per_a += np.bincount(ta.seller, weights=ta.quantity, minlength=n)
        per_p += np.bincount(tp.seller, weights=tp.quantity, minlength=n)
    sellers = state.population.sellers
    # common practice: per-seller sales counts, chi-square test of homogeneity
    table = np.vstack([per_a[sellers], per_p[sellers]])
    table = table[:, table.sum(axis=0) > 0]
    assert stats.chi2_contingency(table).pvalue > 1e-3


def test_ground_state_oscillator_takes_the_grid_path_with_the_same_peaks():
    # An oscillator curve with all weight on level 0 is the normal curve (its ground state), so
    # the grid path must reproduce the inline normal path's trade decisions seed by seed.
    kw = dict(value=(80.0, 120.0), cost=(60.0, 100.0), shade=(0.0, 10.0), sigma=(4.0, 12.0))
    normal = build_population(40, 40, rng=3, **kw)
    osc = build_population(40, 40, rng=3, curve="oscillator", curve_params={"weights": [1.0]}, **kw)
    rng = np.random.default_rng(5)
    bi, sj = np.nonzero(rng.random((40, 40)) < 0.2)
    net = TradingNetwork(80, bi, 40 + sj)
    prices_n, prices_o = [], []
    for seed in range(4):
        tn = PropensityMatching().clear(MarketState(normal, net), np.random.default_rng(seed))
        to = PropensityMatching().clear(MarketState(osc, net), np.random.default_rng(seed))
        assert np.array_equal(tn.buyer, to.buyer) and np.array_equal(tn.seller, to.seller)
        prices_n.extend(tn.price)
        prices_o.extend(to.price)
    # same price law (Bromiley 2003 mean and sd for the normal pairs): KS test
    assert stats.ks_2samp(prices_n, prices_o).pvalue > 1e-3


# -- run_per_agent ----------------------------------------------------------------------------
class _Greedy:
    """A per-agent rule that asks for too much: each buyer buys 2 units from its first seller."""

    description = "test rule"
    per_agent = True

    def agent_trades(self, agent, state, rng):
        i = agent.index
        net = state.network
        if state.population.role[i] != 0 or net.buyer_ptr[i] == net.buyer_ptr[i + 1]:
            return []
        return [(i, int(net.seller[net.buyer_ptr[i]]), 1.0, 2)]


def test_run_per_agent_checks_units_and_leaves_state_alone():
    state = _equivalence_market()  # capacity 2, stock 2: a second buyer at the same seller fails
    before = state.remaining.copy()
    with pytest.raises(ValueError, match="exceeds units left"):
        run_per_agent(_Greedy(), state, np.random.default_rng(0))
    assert np.array_equal(state.remaining, before)


def test_run_per_agent_accepts_mesa_traders():
    import mesa

    from propensim.markets.model import Trader

    state = _equivalence_market()
    model = mesa.Model(rng=0)
    agents = [Trader(model, state.population, i) for i in range(len(state.population))]
    rule = PropensityMatchingPerAgent(meetings=3)
    with_mesa = run_per_agent(rule, state, np.random.default_rng(9), agents)
    with_rows = run_per_agent(
        rule, state, np.random.default_rng(9), [RowAgent(i) for i in range(24)]
    )
    assert isinstance(with_mesa, Trades) and with_mesa.volume > 0
    assert np.array_equal(with_mesa.price, with_rows.price)
    check_trades(state, with_mesa)


# -- parameters and registration ----------------------------------------------------------------
@pytest.mark.parametrize(
    ("rule", "field"),
    [
        (PropensityMatching(meetings=-1), "meetings"),
        (PropensityMatching(meetings=1.5), "meetings"),
        (PropensityMatching(threshold=1.5), "threshold"),
        (PropensityMatching(grid_points=3), "grid_points"),
        (PropensityMatchingPerAgent(meetings=-2), "meetings"),
        (CallAuction(k=1.2), "k"),
        (CallAuction(k=-0.1), "k"),
        (CallAuction(quotes="bids"), "quotes"),
        (CallAuction(threshold=0.0), "threshold"),
        (DoubleAuction(strategy="zip"), "strategy"),
        (DoubleAuction(quotes_per_round=-5), "quotes_per_round"),
        (DoubleAuction(price_low=10.0, price_high=5.0), "price_low"),
        (DoubleAuction(price_high=float("inf")), "price_high"),
        (BilateralBargaining(threshold=2.0), "threshold"),
    ],
)
def test_bad_parameters_name_the_field(rule, field):
    with pytest.raises(ValueError, match=field) as err:
        rule.check()
    assert "\n" not in str(err.value)


def test_unknown_strategy_lists_allowed_values():
    with pytest.raises(ValueError, match="zi_c, zi_u, curve"):
        registry.make_plugin("clearing", "double_auction", strategy="gd")


@pytest.mark.parametrize(
    "name", ["propensity", "propensity_per_agent", "call_auction", "double_auction", "bargaining"]
)
def test_registered_and_described(name):
    rule = registry.make_plugin("clearing", name)
    assert isinstance(rule.description, str) and "\n" not in rule.description
    pop = build_population(3, 3, rng=0)
    empty = MarketState(pop, TradingNetwork(6, np.zeros(0, np.int64), np.zeros(0, np.int64)))
    assert len(rule.clear(empty, np.random.default_rng(0))) == 0  # empty network: no trades
