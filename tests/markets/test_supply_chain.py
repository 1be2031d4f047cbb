"""The (s, S) shop: Poisson thinning of customers by their curves, lost sales, bad input."""

import numpy as np
import pytest
from scipy import stats

from propensim.agents.population import build_population
from propensim.markets.build import build_market
from propensim.markets.supply_chain import Shop, build_shop

CUSTOMERS = {
    "n_buyers": 300,
    "n_sellers": 0,
    "value": [3.0, 8.0],
    "shade": 0.0,
    "activity": 0.8,
    "curve": "logistic",
    "curve_params": {"tau": 0.5},
}


def _config(**shop):
    return {"population": dict(CUSTOMERS), "shop": {"price": 5.0, "arrival_rate": 20.0, **shop}}


def test_with_ample_stock_weekly_sales_are_poisson_with_the_thinned_rate():
    # Customers arrive as a Poisson process of rate lambda a day; each buys with probability p
    # (its curve at the price, averaged over the pool): sales are the thinned process, Poisson
    # with mean and variance lambda * 7 * p per week (S. Ross, Introduction to Probability
    # Models, ch. 5, thinning). 20 years of weeks; stock that never runs out.
    cfg = _config(order_up_to=10**9, reorder_point=0, days=364.0 * 20)
    shop = build_shop(cfg, seed=3)
    weeks = shop.run()
    p = shop.buy_probability
    pool = shop.customers
    assert p == pytest.approx(float(pool.curves().value(5.0).mean()), rel=1e-12)
    assert 0.3 < p < 0.6
    mu = 20.0 * 7 * p
    sold = weeks["sold"].to_numpy()
    assert weeks["lost"].sum() == 0 and sold.size == 1040
    assert abs(sold.mean() - mu) < 4 * np.sqrt(mu / sold.size)
    # dispersion index (n - 1) s^2 / mu ~ chi-square(n - 1) for Poisson counts
    d = (sold.size - 1) * sold.var(ddof=1) / mu
    assert 1e-3 < stats.chi2.cdf(d, sold.size - 1) < 1 - 1e-3, (sold.mean(), sold.var(ddof=1), mu)
    # the law itself: a chi-square on the weekly counts, pooled to expected counts >= 5
    edges = np.r_[0, np.arange(int(mu - 20), int(mu + 20)), 10**9]
    obs = np.histogram(sold, edges)[0]
    exp = np.diff(stats.poisson.cdf(edges - 1, mu)) * sold.size
    assert stats.chisquare(obs, exp * obs.sum() / exp.sum()).pvalue > 1e-3


def test_a_tight_reorder_point_loses_sales_and_every_wish_is_counted():
    # (s, S) = (2, 30) with a 5-day lead time and about 60 wishes a week: the shelf runs empty.
    shop = build_shop(_config(order_up_to=30, reorder_point=2, lead_time=5.0), seed=9)
    weeks = shop.run()
    assert len(weeks) == 52
    assert weeks["lost"].sum() > 0
    np.testing.assert_array_equal(weeks["sold"] + weeks["lost"], weeks["wanting"])
    assert (weeks["wanting"] <= weeks["arrivals"]).all()
    assert weeks["on_hand"].min() >= 0
    # units are conserved: start + received - sold = on hand at the end
    assert 30 + weeks["received"].sum() - weeks["sold"].sum() == weeks["on_hand"].iloc[-1]
    summary = shop.summary()
    assert summary["sold"] + summary["lost"] == summary["wanting"]
    assert 0 < summary["fill_rate"] < 1
    # ample stock on the same seed loses nothing
    ample = build_shop(_config(order_up_to=10**6, reorder_point=10**6 - 1, lead_time=5.0), seed=9)
    assert ample.run()["lost"].sum() == 0


def test_a_price_change_moves_demand_through_the_curves():
    cheap = build_shop(_config(price=4.0), seed=1)
    dear = build_shop(_config(price=6.0), seed=1)
    assert cheap.buy_probability > dear.buy_probability
    pool = cheap.customers
    for shop, price in ((cheap, 4.0), (dear, 6.0)):
        # a buyer's logistic curve: a / (1 + exp((x - mu) / tau))
        expected = 0.8 / (1 + np.exp((price - pool.mu) / 0.5))
        assert shop.buy_probability == pytest.approx(expected.mean(), rel=1e-12)


def test_same_seed_same_year():
    a = build_shop(_config(order_up_to=40, reorder_point=10), seed=4).run()
    b = build_shop(_config(order_up_to=40, reorder_point=10), seed=4).run()
    c = build_shop(_config(order_up_to=40, reorder_point=10), seed=5).run()
    assert a.equals(b) and not a.equals(c)


def test_bad_policies_name_the_field():
    pool = build_population(5, 0, rng=0)
    with pytest.raises(ValueError, match="reorder_point must be <= order_up_to"):
        Shop(pool, reorder_point=50, order_up_to=40)
    with pytest.raises(ValueError, match="lead_time must be >= 0"):
        Shop(pool, lead_time=-1.0)
    with pytest.raises(ValueError, match="arrival_rate must be >= 0"):
        Shop(pool, arrival_rate=float("inf"))
    with pytest.raises(ValueError, match="shop.reorder is not an option"):
        build_shop({"population": {"n_buyers": 3}, "shop": {"reorder": 3}})


def test_the_example_spec_runs_into_the_store(tmp_path):
    from propensim.experiments.runner import run_experiment
    from propensim.experiments.spec import SpecError, load_spec

    path = "experiments/examples/supply_chain.toml"
    spec = load_spec(path, ["experiment.replicates=1", "design.parameters={}"])
    assert spec.rounds == 52 and spec.n_runs == 1
    results = run_experiment(spec, tmp_path / "shop", workers=1, progress=False).load()
    runs, weeks = results.runs, results.rounds
    assert runs["status"].tolist() == ["ok"] and len(weeks) == 52
    assert runs["sold"].iloc[0] == weeks["sold"].sum()
    assert runs["lost"].iloc[0] == weeks["lost"].sum()
    # build_market hands a shop config to the shop
    shop = build_market(spec.config(), seed=1, mesa=False)
    assert isinstance(shop, Shop)
    for override, needle in (
        ("shop.reorder_point=70", "shop.reorder_point: must be <= order_up_to (60)"),
        ("shop.lead_time=-1.0", "shop.lead_time: must be greater than or equal to 0"),
        ("collect.metrics=['volume']", "'volume' is not a shop figure"),
    ):
        with pytest.raises(SpecError, match=needle.replace("(", r"\(").replace(")", r"\)")):
            load_spec(path, [override, "design.parameters={}"])
