"""The continuous-time market: exact event simulation checked against published results."""

import math
import warnings

import numpy as np
import pytest
from scipy import stats

from propensim.markets import events as ev
from propensim.markets.build import build_market
from propensim.markets.events import EventMarket, build_event_market, simulate_reactions


def _config(**events):
    return {
        "population": {"n_buyers": 6, "n_sellers": 5, "stock": 3, "sigma": 6.0, "shade": 5.0},
        "network": {"name": "complete"},
        "metrics": ["volume", "mean_price"],
        "events": {"rate": 1.0, "horizon": 10.0, "window": 2.0, **events},
    }


def _occupancy(times, channels, t_end, burn):
    """Time-weighted occupancy of X (immigration +1 on channel 0, death -1 on channel 1)."""
    x = np.concatenate([[0], np.cumsum(np.where(channels == 0, 1, -1))])  # X on [t_i, t_i+1)
    edges = np.clip(np.concatenate([[0.0], times, [t_end]]), burn, None)
    return x, np.bincount(x, weights=np.diff(edges)), edges


# -- the engine's core against Gillespie (1977) -----------------------------------------------
@pytest.mark.parametrize("method", ["tree", "direct"])
def test_immigration_death_has_the_poisson_stationary_law(method):
    # Immigration at rate k, each unit dying at rate g: the stationary law is Poisson(k / g), and
    # a time average must weight each state by how long it lasts (D. T. Gillespie, J. Phys. Chem.
    # 81:2340, 1977, the immigration-death example).
    k, g, t_end, burn = 5.0, 0.5, 20_000.0, 50.0
    times, channels, _ = simulate_reactions(
        [k, g], [-1, 0], [[(0, 1)], [(0, -1)]], [0], t_end, method=method, rng=11
    )
    x, occ, edges = _occupancy(times, channels, t_end, burn)
    p = occ / occ.sum()  # time-weighted occupancy
    mean = k / g
    support = np.arange(p.size)
    assert abs((support * p).sum() - mean) < 0.15  # Poisson: mean = k/g = 10
    assert abs((np.square(support - mean) * p).sum() - mean) < 0.6  # and variance = k/g
    # Chi-square on the state seen at fixed times 10/g apart (correlation exp(-10): independent
    # draws from the time-weighted law), cells pooled to expected counts >= 5.
    grid = np.arange(burn, t_end, 10.0 / g)  # shape: (1998,)
    seen = x[np.searchsorted(edges[1:-1], grid, side="right")]
    counts = np.bincount(seen, minlength=40)[:40]
    expected = stats.poisson.pmf(np.arange(40), mean) * grid.size
    expected[-1] += grid.size * stats.poisson.sf(39, mean)
    lo, hi = 3, 19  # pool the tails: x <= 3 and x >= 19
    obs = np.r_[counts[: lo + 1].sum(), counts[lo + 1 : hi], counts[hi:].sum()]
    exp = np.r_[expected[: lo + 1].sum(), expected[lo + 1 : hi], expected[hi:].sum()]
    chi2, pvalue = stats.chisquare(obs, exp * obs.sum() / exp.sum())
    assert pvalue > 1e-3, (chi2, pvalue)
    # The same test can fail: a Poisson law with a 10% larger mean is rejected.
    wrong = stats.poisson.pmf(np.arange(40), 1.1 * mean)
    wrong_exp = np.r_[wrong[: lo + 1].sum(), wrong[lo + 1 : hi], wrong[hi:].sum()]
    assert stats.chisquare(obs, wrong_exp * obs.sum() / wrong_exp.sum()).pvalue < 1e-6
    # Weighting matters: the states seen at events (not weighted by dwell time) are not Poisson.
    at_events = np.bincount(x[1:][times > burn], minlength=40)[:40]
    ev_obs = np.r_[at_events[: lo + 1].sum(), at_events[lo + 1 : hi], at_events[hi:].sum()]
    assert stats.chisquare(ev_obs, exp * ev_obs.sum() / exp.sum()).pvalue < 1e-6


def test_tree_and_direct_agree_for_the_same_seed():
    # Both methods use the same draws and walk the channels in the same order, so they choose the
    # same channels; times differ only by the rounding of the total rate.
    out = {}
    for method in ("tree", "direct"):
        cfg = _config(method=method, horizon=50.0)
        cfg["population"]["stock"] = 40  # 200 units: many trades, and sellers selling out
        m = build_event_market(cfg, seed=4)
        m.run()
        out[method] = m.ledger_columns()
    a, b = out["tree"], out["direct"]
    assert a["buyer"].size > 150
    np.testing.assert_array_equal(a["buyer"], b["buyer"])
    np.testing.assert_array_equal(a["seller"], b["seller"])
    np.testing.assert_allclose(a["time"], b["time"], rtol=1e-12)
    np.testing.assert_allclose(a["price"], b["price"], rtol=1e-12)


def test_tree_and_direct_give_the_same_distributions():
    # Two-sample Kolmogorov-Smirnov over independent seeds: the count of trades by time T and the
    # time of the 5th trade (exactness of both methods: Gillespie 1977; the tree picks channel j
    # with probability a_j / a0 as the direct method does, Gibson and Bruck 2000).
    counts, fifth = {"tree": [], "direct": []}, {"tree": [], "direct": []}
    for method, base in (("tree", 0), ("direct", 10_000)):
        for seed in range(base, base + 150):
            m = build_event_market(_config(method=method, horizon=4.0, window=4.0), seed=seed)
            m.run()
            t = m.ledger_columns()["time"]
            counts[method].append(t.size)
            fifth[method].append(t[4] if t.size > 4 else np.inf)
    for sample in (counts, fifth):
        res = stats.ks_2samp(sample["tree"], sample["direct"])
        assert res.pvalue > 1e-3, res


def test_single_pair_trades_at_rate_lambda_times_the_joint_peak():
    # One buyer, one seller, stock that never runs out: trades form a Poisson process of rate
    # lambda * peak J, peak J = a_b a_s exp(-(mu_b - mu_s)^2 / (2 (s_b^2 + s_s^2))) (Bromiley
    # 2003), so inter-trade times are exponential (KS test against that rate).
    cfg = {
        "population": {"n_buyers": 1, "n_sellers": 1, "value": 100.0, "cost": 96.0,
                       "sigma": [4.0, 4.0], "activity": 0.9, "stock": 10**9},
        "network": "complete",
        "metrics": ["volume"],
        "events": {"rate": 2.0, "horizon": 5000.0, "window": 500.0},
    }  # fmt: skip
    m = build_event_market(cfg, seed=8)
    m.run()
    pop = m.population
    peak = 0.81 * math.exp(-((pop.mu[0] - pop.mu[1]) ** 2) / (2 * (16.0 + 16.0)))
    rate = 2.0 * peak
    assert m.total_rate == pytest.approx(rate, rel=1e-12)
    gaps = np.diff(np.concatenate([[0.0], m.ledger_columns()["time"]]))
    assert gaps.size > 4000
    assert stats.kstest(gaps, "expon", args=(0, 1 / rate)).pvalue > 1e-3
    # the test can fail: a rate 10% off is rejected
    assert stats.kstest(gaps, "expon", args=(0, 1 / (1.1 * rate))).pvalue < 1e-4
    # prices follow the pair's joint curve: normal, mean mu*, sd sigma* (Bromiley 2003)
    price = m.ledger_columns()["price"]
    mid = 0.5 * (pop.mu[0] + pop.mu[1])
    assert stats.kstest(price, "norm", args=(mid, math.sqrt(8.0))).pvalue > 1e-3


@pytest.mark.slow
def test_event_and_round_modes_agree_as_rounds_get_short():
    # A stated limit. 20 buyers, 4 sellers, all alike, every pair a channel of rate
    # lambda * peak. A round of length h in round mode: each buyer meets one random seller and
    # trades with probability lambda * h * deg * peak (buyer activity scaled by lambda h deg),
    # and a seller sells at most one unit a round. Then the trade rate is
    #   r(h) = (n_s / h) (1 - (1 - lambda h peak)^n_b)  ->  n_b n_s lambda peak  as h -> 0,
    # the event mode's rate (a Bernoulli trial per short interval becomes a Poisson process,
    # e.g. S. Ross, Introduction to Probability Models, ch. 5). Tested at three round lengths.
    lam, nb, ns, horizon = 1.0, 20, 4, 80.0
    pop = {"n_buyers": nb, "n_sellers": ns, "value": 100.0, "cost": 95.0, "sigma": 5.0,
           "stock": 10**9}  # fmt: skip
    peak = math.exp(-25.0 / (2 * 50.0))
    cfg = {"population": pop, "network": "complete", "metrics": ["volume"],
           "events": {"rate": lam, "horizon": horizon, "window": horizon}}  # fmt: skip
    m = build_event_market(cfg, seed=1)
    m.run()
    event_rate = m.events / horizon
    expected = nb * ns * lam * peak
    assert abs(event_rate - expected) < 4 * math.sqrt(expected / horizon)
    gaps = []
    for h in (0.05, 0.0125, 0.003125):
        activity = {"values": [lam * h * ns] * nb + [1.0] * ns}
        rounds = int(round(horizon / h))
        market = build_market(
            {"population": {**pop, "activity": activity}, "network": "complete",
             "clearing": "propensity", "metrics": ["volume"], "market": {"keep_ledger": False}},
            seed=2, mesa=False,
        )  # fmt: skip
        market.advance(rounds)
        volume = market.rounds_columns()["volume"]
        rate = volume.sum() / horizon
        predicted = ns / h * (1 - (1 - lam * h * peak) ** nb)
        se = math.sqrt(volume.var(ddof=1) * rounds) / horizon
        assert abs(rate - predicted) < 4 * se + 1e-9, (h, rate, predicted)
        gaps.append(abs(rate / event_rate - 1))
    assert gaps[0] > gaps[1] > gaps[2]
    assert gaps[2] < 0.05  # within 5% at h = 1/320 of the mean time between a buyer's trades


# -- the market's own invariants ----------------------------------------------------------------
def test_goods_and_money_are_conserved_and_budgets_hold():
    cfg = _config(horizon=30.0, window=3.0)
    cfg["population"] |= {"cash": [50.0, 150.0], "stock": 2}
    m = build_event_market(cfg, seed=3)
    stock0, cash0 = m.population.stock.sum(), m.population.cash.copy()
    m.run()
    pop = m.population
    led = m.ledger_columns()
    assert pop.stock.sum() == stock0 and pop.stock.min() >= 0
    assert pop.cash.sum() == pytest.approx(cash0.sum(), rel=1e-12)
    assert (pop.cash[pop.role == 0] >= -1e-9).all()  # a buyer never spends what it lacks
    spent = np.bincount(led["buyer"], weights=led["price"], minlength=len(pop))
    np.testing.assert_allclose(cash0 - spent, np.where(pop.role == 0, pop.cash, cash0), atol=1e-9)
    assert m.network.has_edge(led["buyer"], led["seller"]).all()
    assert (np.diff(led["time"]) > 0).all() and led["time"].max() <= 30.0
    rounds = m.rounds_columns()
    np.testing.assert_array_equal(
        np.bincount(led["round"], minlength=10), rounds["volume"].astype(int)
    )
    assert list(rounds["time"]) == pytest.approx([3.0 * (i + 1) for i in range(10)])
    # every seller sold out or the run ended: dead channels left the sum
    assert m.total_rate == pytest.approx(0.0, abs=1e-12) or m.stop_reason == "horizon"


def test_sold_out_market_stops_trading_and_says_why():
    m = build_event_market(_config(horizon=1e4, window=1e3), seed=5)
    m.run()
    assert m.events == 15  # 5 sellers x 3 units: everything sold
    assert m.total_rate == 0.0
    assert m.stop_reason == "horizon" and m.time == 1e4


def test_event_budget_stops_the_run_with_a_warning():
    with pytest.warns(RuntimeWarning, match="max_events = 4"):
        m = build_event_market(_config(max_events=4), seed=5)
        m.run()
    assert m.events == 4 and m.stop_reason == "max_events" and m.time < 10.0


def test_a_run_that_would_not_fit_in_memory_says_so(monkeypatch):
    monkeypatch.setattr(ev, "available_memory", lambda: 1e3)
    with pytest.raises(MemoryError, match="channels need about"):
        build_event_market(_config(), seed=1)
    monkeypatch.setattr(ev, "available_memory", lambda: 2e5)
    with pytest.raises(MemoryError, match="the ledger of about"):
        build_event_market(_config(horizon=1e6, window=1e6), seed=1)


def test_drift_is_integrated_exactly_over_the_elapsed_time():
    # With no trade possible the drift acts alone: an exact OU step composed over any number of
    # windows gives the same curve (Gillespie, Phys. Rev. E 54:2084, 1996): mu_T = v +
    # (mu_0 - v) exp(-k T / eta), k = gamma / sigma^2.
    cfg = _config(rate=0.0, horizon=6.0, window=6.0)
    cfg["drift"] = {"name": "anchor", "eta": 2.0, "noise": 0.0}
    one = build_event_market(cfg, seed=2)
    mu0 = one.population.mu.copy()
    one.run()
    many = build_event_market({**cfg, "events": {**cfg["events"], "window": 0.5}}, seed=2)
    many.run()
    pop = one.population
    k = pop.gamma / pop.sigma**2
    expected = pop.value + (mu0 - pop.value) * np.exp(-k * 6.0 / 2.0)
    np.testing.assert_allclose(one.population.mu, expected, rtol=1e-12)
    np.testing.assert_allclose(many.population.mu, expected, rtol=1e-12)
    every = build_event_market({**cfg, "events": {**cfg["events"], "drift_every": 1.5}}, seed=2)
    every.run()
    np.testing.assert_allclose(every.population.mu, expected, rtol=1e-12)


def test_per_trader_rates_and_other_curve_families():
    cfg = _config(rate={"uniform": [0.5, 2.0]}, horizon=20.0, window=5.0)
    cfg["population"] |= {"curve": "logistic", "curve_params": {"tau": 2.0}, "stock": 50}
    m = build_event_market(cfg, seed=6)
    lam = m._lam_trader
    assert lam.shape == (11,) and lam.min() >= 0.5 and lam.max() <= 2.0
    m.run()
    led = m.ledger_columns()
    assert led["price"].size > 20 and np.isfinite(led["price"]).all()
    cfg["population"]["cash"] = 100.0
    with pytest.raises(ValueError, match="needs normal curves"):
        build_event_market(cfg, seed=6)


def test_bad_parameters_name_the_field():
    pop_net = build_event_market(_config(), seed=0)
    pop, net = pop_net.population, pop_net.network
    for kw, field in (
        ({"rate": -1.0}, "rate"),
        ({"rate": math.inf}, "rate"),
        ({"horizon": 0.0}, "horizon"),
        ({"horizon": 5.0, "window": 6.0}, "window"),
        ({"max_events": 1e6}, "max_events"),
        ({"method": "fast"}, "method"),
    ):
        with pytest.raises(ValueError, match=field):
            EventMarket(pop, net, **kw)


# -- the spec, the runner and the store ------------------------------------------------------
SPEC = {
    "experiment": {"name": "ev", "seed": 1, "replicates": 2},
    "market": {"mode": "events"},
    "events": {"rate": 0.5, "horizon": 6.0, "window": 2.0, "method": "direct"},
    "population": {"n_buyers": 8, "n_sellers": 8, "stock": 2},
    "network": {"name": "erdos_renyi", "mean_degree": 4},
    "drift": {"name": "anchor", "noise": 0.2},
    "collect": {"ledger": True, "metrics": ["volume", "mean_price"]},
}


def test_event_specs_run_like_any_other_and_land_in_the_store(tmp_path):
    from propensim.experiments.runner import run_experiment
    from propensim.experiments.spec import load_spec

    spec = load_spec(SPEC)
    assert spec.rounds == 3 and spec.resolved()["events"]["drift_every"] == 2.0
    assert "rounds" not in spec.resolved()["experiment"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        results = run_experiment(spec, tmp_path / "ev", workers=1, progress=False).load()
    runs = results.runs
    assert list(runs["status"]) == ["ok", "ok"] and (runs["volume"] > 0).all()
    rounds = results.rounds
    assert list(rounds["time"][:3]) == [2.0, 4.0, 6.0]
    ledger = results.ledger
    assert {"time", "buyer", "seller", "price"} <= set(ledger.columns)
    per_run = ledger.groupby("run_id").size().sort_index()
    np.testing.assert_array_equal(
        per_run.to_numpy(), runs.set_index("run_id")["volume"].sort_index()
    )


@pytest.mark.parametrize(
    ("path", "value", "needle"),
    [
        (("events", "rate"), -1.0, "events.rate: must be >= 0 and finite"),
        (("events", "rate"), math.inf, "events.rate: must be >= 0 and finite"),
        (("events", "horizon"), 0.0, "events.horizon: must be greater than 0"),
        (("events", "window"), 7.0, "events.window: must be <= horizon"),
        (("events", "max_events"), 1e6, "events.max_events: must be a valid integer"),
        (("market", "mode"), "event", "market.mode: got 'event'; allowed: 'rounds', 'events'"),
        (("experiment", "rounds"), 5, "experiment.rounds: is not used with market.mode"),
        (
            ("collect", "metrics"),
            ["volume", "deadweight_loss"],
            "collect.metrics[1]: 'deadweight_loss' is not available in event mode",
        ),
    ],
)
def test_bad_event_specs_give_one_line_naming_the_field(path, value, needle):
    from propensim.experiments.spec import SpecError, load_spec

    raw = {k: dict(v) for k, v in SPEC.items()}
    raw[path[0]][path[1]] = value
    with pytest.raises(SpecError) as info:
        load_spec(raw)
    assert needle in str(info.value) and "\n" not in str(info.value)


# -- interventions at a time (the start of a window) ---------------------------------------------
def test_interventions_act_at_window_starts_and_money_is_conserved_with_the_treasury():
    # A per-unit tax drives a wedge t between what buyers pay and sellers get; revenue is
    # t x quantity (any principles-of-economics text, tax-incidence chapter); money is conserved
    # among buyers, sellers and the treasury.
    cfg = {
        "population": {"n_buyers": 20, "n_sellers": 20, "stock": 40, "shade": 5.0, "cash": 1e4},
        "network": {"name": "erdos_renyi", "mean_degree": 6},
        "metrics": ["volume", "tax_revenue", "buyer_price", "seller_price"],
        "events": {"rate": 0.5, "horizon": 10.0, "window": 1.0},
        "market": {"keep_totals": True},
        "interventions": [
            {"name": "unit_tax", "amount": 2.0, "start": 3, "until": 6},
            {"name": "remove_hubs", "k": 4, "start": 5},
        ],
    }
    m = build_event_market(cfg, seed=1)
    cash0, edges0 = m.population.cash.sum(), m.network.n_edges
    rounds = m.run()
    taxed = rounds["round"].between(3, 5)
    np.testing.assert_allclose(rounds["tax_revenue"][taxed], 2.0 * rounds["volume"][taxed])
    assert (rounds["tax_revenue"][~taxed] == 0).all()
    np.testing.assert_allclose(
        (rounds["buyer_price"] - rounds["seller_price"])[taxed & (rounds["volume"] > 0)], 2.0
    )
    assert m.treasury == pytest.approx(rounds["tax_revenue"].sum())
    assert m.population.cash.sum() + m.treasury == pytest.approx(cash0, rel=1e-12)
    led = m.ledger_columns()
    hubs = np.flatnonzero(~m.present)
    assert hubs.size == 4 and m.network.n_edges < edges0
    late = led["time"] > 5.0
    assert not np.isin(led["buyer"][late], hubs).any()
    assert not np.isin(led["seller"][late], hubs).any()
    totals = m.totals_columns()
    assert totals["units"].sum() == 2 * led["buyer"].size and totals["left"].sum() == 4
    with pytest.raises(ValueError, match=r"interventions\[0\] \(price_ceiling\): not available"):
        build_event_market({**cfg, "interventions": [{"name": "price_ceiling"}]}, seed=1)


def test_event_specs_check_intervention_windows():
    from propensim.experiments.spec import SpecError, load_spec

    raw = {k: dict(v) for k, v in SPEC.items()}
    raw["interventions"] = [{"name": "unit_tax", "amount": 1.0, "start": 1}]
    assert load_spec(raw).config()["interventions"][0]["start"] == 1
    raw["interventions"] = [{"name": "unit_tax", "amount": 1.0, "start": 3}]
    with pytest.raises(SpecError, match="interventions.0.start|interventions\\[0\\].start"):
        load_spec(raw)


def test_a_tax_moves_the_joint_curve_as_in_round_mode():
    # Under a per-unit buyer tax t the buyer judges a price p by what it pays, p + t: its curve
    # sits t lower, so the pair's rate is lambda * peak of P_b(x + t) P_s(x) and the market price
    # is drawn from that joint curve (MODEL.md section 9; the round mode's clearing stage does
    # the same); the buyer pays p + t, the seller keeps p.
    cfg = {
        "population": {"n_buyers": 1, "n_sellers": 1, "value": 100.0, "cost": 90.0,
                       "sigma": [4.0, 4.0], "stock": 10**9},
        "network": "complete",
        "metrics": ["volume", "buyer_price", "seller_price"],
        "events": {"rate": 2.0, "horizon": 400.0, "window": 100.0},
        "interventions": [{"name": "unit_tax", "amount": 3.0, "start": 2}],
    }  # fmt: skip
    m = build_event_market(cfg, seed=3)
    mu_b, mu_s = m.population.mu
    assert m.total_rate == pytest.approx(2.0 * math.exp(-((mu_b - mu_s) ** 2) / 64.0))
    m.step()
    m.step()
    m.step()
    taxed = 2.0 * math.exp(-((mu_b - 3.0 - mu_s) ** 2) / 64.0)
    assert m.total_rate == pytest.approx(taxed, rel=1e-12)
    np.testing.assert_array_equal(m.population.mu, [mu_b, mu_s])  # the shift is undone
    led = m.ledger_columns()
    late = led["time"] > 200.0
    # prices from the shifted joint curve: mean halfway between mu_b - t and mu_s
    mid = 0.5 * (mu_b - 3.0 + mu_s)
    assert stats.kstest(led["price"][late], "norm", args=(mid, math.sqrt(8.0))).pvalue > 1e-3
    rows = m.rounds_columns()
    np.testing.assert_allclose(rows["buyer_price"][2] - rows["seller_price"][2], 3.0)


def test_a_window_too_large_for_memory_says_so_without_a_ledger(monkeypatch):
    monkeypatch.setattr(ev, "available_memory", lambda: 2e5)
    with pytest.raises(MemoryError, match="one window of about"):
        cfg = _config(horizon=1e6, window=1e6)
        cfg["market"] = {"keep_ledger": False}
        build_event_market(cfg, seed=1)
    cfg = _config(horizon=1e6, window=1.0)
    cfg["market"] = {"keep_ledger": False}
    build_event_market(cfg, seed=1)  # short windows fit


def test_the_windows_metrics_are_the_same_in_one_call_as_one_by_one(monkeypatch):
    # The built-in metrics of a window are measured in one compiled call (MetricBatch) when
    # the kernels are on: the same numbers as each metric's own measure, window by window, in
    # a market whose stock runs down (the efficiency benchmark is recomputed on the way).
    from propensim.markets.engine import DEFAULT_METRICS

    frames = {}
    for how in ("numpy", "numba"):
        monkeypatch.setenv("PROPENSIM_KERNELS", how)
        cfg = _config(horizon=12.0, window=1.0)
        cfg["population"].update(n_buyers=30, n_sellers=25)
        cfg["metrics"] = list(DEFAULT_METRICS)
        cfg["drift"] = {"name": "anchor", "noise": 0.5}
        market = build_event_market(cfg, seed=6)
        assert market.metric_batch is not None
        frames[how] = market.run()
    assert frames["numba"]["volume"].sum() > 0 and frames["numba"]["efficiency"].notna().any()
    assert list(frames["numba"].columns) == list(frames["numpy"].columns)
    assert frames["numba"].equals(frames["numpy"])


def test_efficiency_in_event_mode_is_a_share_of_what_the_window_could_realise():
    # Capacity does not limit a window, so a buyer may buy several units in one: the benchmark
    # gives every unit a seller held at the window's start to its best-valued partner (buyers
    # unlimited), and realised surplus can never exceed it. Against the one-unit-per-buyer
    # benchmark of round mode this market showed 1.70 in its first window.
    cfg = _config(horizon=6.0, window=1.0)
    cfg["population"].update(n_buyers=30, n_sellers=25)
    cfg["metrics"] = ["volume", "efficiency", "buyer_surplus", "seller_surplus"]
    market = build_event_market(cfg, seed=6)
    pop = market.population
    values, costs = pop.value[pop.role == 0], pop.value[pop.role == 1]
    stock0 = pop.stock[pop.role == 1].copy()
    frame = market.run()
    assert frame["volume"].iloc[0] > values.size  # more units than buyers: several per buyer
    # complete network: each seller unit to the highest value (worked out here by hand)
    best0 = float((stock0 * np.maximum(values.max() - costs, 0.0)).sum())
    realised = frame["buyer_surplus"] + frame["seller_surplus"]
    assert frame["efficiency"].iloc[0] == pytest.approx(realised.iloc[0] / best0, rel=1e-12)
    assert (frame["efficiency"].dropna() <= 1.0 + 1e-12).all()


@pytest.mark.parametrize("name", ["fixed_efficiency", "deadweight_loss"])
def test_metrics_of_a_rounds_fixed_benchmark_are_refused_in_event_mode(name):
    # Their benchmark is one round's largest surplus with holdings restored every round; in
    # event mode holdings carry over, so a window has no such benchmark (before, the run
    # stopped inside numpy, expanding buyers of unlimited units).
    cfg = _config()
    cfg["metrics"] = ["volume", name]
    with pytest.raises(ValueError, match=rf"metrics: '{name}' is not available in event mode"):
        build_event_market(cfg, seed=1)
