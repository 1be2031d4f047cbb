"""The trader population: columns, validation, builders, curves, and the Mesa agent view."""

from __future__ import annotations

import numpy as np
import pytest

from propensim.agents.curves import LogisticCurve, NormalCurve, OscillatorCurve, TabulatedCurve
from propensim.agents.population import BUYER, SELLER, Population, build_population


def _columns(n=3, **over):
    cols = dict(
        role=np.array([0, 0, 1][:n]),
        mu=np.array([100.0, 95.0, 90.0][:n]),
        sigma=5.0,
        activity=1.0,
        gamma=1.0,
        value=np.array([110.0, 105.0, 80.0][:n]),
        cash=np.inf,
        stock=np.array([0, 0, 1][:n]),
        capacity=1,
    )
    cols.update(over)
    return cols


# -- build_population --------------------------------------------------------------------------
def test_build_population_layout_and_docstring_example():
    pop = build_population(3, 2, value=100.0, cost=90.0, sigma=4.0, rng=1)
    assert (len(pop), pop.buyers.tolist(), pop.sellers.tolist()) == (5, [0, 1, 2], [3, 4])
    np.testing.assert_array_equal(pop.role, [BUYER] * 3 + [SELLER] * 2)
    np.testing.assert_array_equal(pop.is_buyer, [True, True, True, False, False])
    np.testing.assert_array_equal(pop.value, [100.0] * 3 + [90.0] * 2)
    np.testing.assert_array_equal(pop.sigma, 4.0)
    # sellers hold the stock, buyers the cash (cash unconstrained by default)
    np.testing.assert_array_equal(pop.stock, [0, 0, 0, 1, 1])
    np.testing.assert_array_equal(pop.cash, [np.inf] * 3 + [0.0] * 2)
    assert pop.role.dtype == np.int8 and pop.stock.dtype == np.int64


def test_build_population_shade_moves_mu_toward_a_better_deal():
    pop = build_population(2, 2, value=100.0, cost=80.0, shade=5.0, rng=0)
    # mu = value - shade for buyers, cost + shade for sellers (population.py docstring)
    np.testing.assert_array_equal(pop.mu, [95.0, 95.0, 85.0, 85.0])


def test_build_population_is_seeded():
    a = build_population(5, 5, value=[80, 120], cost={"normal": [90, 5]}, sigma=[1, 3], rng=42)
    b = build_population(5, 5, value=[80, 120], cost={"normal": [90, 5]}, sigma=[1, 3], rng=42)
    c = build_population(5, 5, value=[80, 120], cost={"normal": [90, 5]}, sigma=[1, 3], rng=43)
    np.testing.assert_array_equal(a.mu, b.mu)
    np.testing.assert_array_equal(a.sigma, b.sigma)
    assert not np.array_equal(a.mu, c.mu)
    assert np.all((a.value[:5] >= 80) & (a.value[:5] <= 120))
    assert np.all((a.sigma >= 1) & (a.sigma <= 3))


def test_build_population_distribution_specs():
    pop = build_population(
        4,
        3,
        value={"linspace": [120, 90]},
        cost={"values": [70, 80, 90]},
        activity={"uniform": [0.5, 1.0]},
        gamma={"lognormal": [0.0, 0.1]},
        cash=500.0,
        rng=2,
    )
    np.testing.assert_allclose(pop.value, [120, 110, 100, 90, 70, 80, 90])
    np.testing.assert_array_equal(pop.cash, [500.0] * 4 + [0.0] * 3)
    assert np.all(pop.gamma > 0)


@pytest.mark.parametrize(
    ("kwargs", "name"),
    [
        ({"n_buyers": -1, "n_sellers": 2}, "n_buyers"),
        ({"n_buyers": 1, "n_sellers": 2.5}, "n_sellers"),
        ({"n_buyers": True, "n_sellers": 2}, "n_buyers"),
        ({"n_buyers": 1, "n_sellers": 1, "stock": -1}, "stock"),
        ({"n_buyers": 1, "n_sellers": 1, "capacity": 1.5}, "capacity"),
        ({"n_buyers": 0, "n_sellers": 0}, "n_buyers"),
        ({"n_buyers": 2, "n_sellers": 1, "value": {"poisson": [1, 2]}}, "value"),
        ({"n_buyers": 2, "n_sellers": 1, "value": {"values": [1.0]}}, "value"),
        ({"n_buyers": 2, "n_sellers": 1, "cost": {"uniform": [5, 1]}}, "cost"),
        ({"n_buyers": 2, "n_sellers": 1, "sigma": 0.0}, "sigma"),
        ({"n_buyers": 2, "n_sellers": 1, "activity": 1.5}, "activity"),
        ({"n_buyers": 2, "n_sellers": 1, "value": "high"}, "value"),
    ],
)
def test_build_population_bad_input(kwargs, name):
    with pytest.raises(ValueError, match=rf"^{name}\b"):
        build_population(**kwargs, rng=0)


# -- Population validation ---------------------------------------------------------------------
@pytest.mark.parametrize(
    ("over", "name"),
    [
        ({"role": np.array([0, 2, 1])}, "role"),
        ({"role": np.array([[0, 1]])}, "role"),
        ({"sigma": np.array([1.0, 0.0, 1.0])}, "sigma"),
        ({"activity": 1.01}, "activity"),
        ({"activity": 0.0}, "activity"),
        ({"gamma": -1.0}, "gamma"),
        ({"mu": np.array([1.0, np.nan, 2.0])}, "mu"),
        ({"value": np.array([1.0, np.inf, 2.0])}, "value"),
        ({"cash": -5.0}, "cash"),
        ({"stock": np.array([0, -1, 1])}, "stock"),
        ({"capacity": -1}, "capacity"),
        ({"curve_params": {"weights": np.ones((2, 3))}}, "curve_params"),
    ],
)
def test_population_validation_names_the_column(over, name):
    with pytest.raises(ValueError, match=rf"^{name}\b"):
        Population(**_columns(**over))


def test_population_length_mismatch():
    with pytest.raises(ValueError):
        Population(**_columns(mu=np.array([1.0, 2.0])))


def test_population_copy_and_row():
    pop = Population(**_columns(curve_params={"tau": np.ones(3)}))
    dup = pop.copy()
    dup.mu[0] = -1.0
    dup.curve_params["tau"][0] = 9.0
    assert pop.mu[0] == 100.0 and pop.curve_params["tau"][0] == 1.0
    row = pop.row(2)
    assert row["role"] == "seller" and row["value"] == 80.0 and row["stock"] == 1
    assert row["index"] == 2 and isinstance(row["capacity"], int)


# -- curves from the population ------------------------------------------------------------------
def test_population_curves_default_normal():
    pop = build_population(3, 2, value=100.0, cost=90.0, sigma=4.0, activity=0.9, rng=1)
    curves = pop.curves()
    assert isinstance(curves, NormalCurve) and curves.shape == (5,)
    np.testing.assert_array_equal(curves.mu, pop.mu)
    np.testing.assert_array_equal(curves.role, pop.role)
    # prices of shape (m, 1) give an (m, n) table (Population.curves docstring)
    assert curves.value(np.linspace(80, 110, 4)[:, None]).shape == (4, 5)
    # default reservation side is each trader's role: buyers above mu, sellers below
    res = curves.reservation_price()
    assert np.all(res[:3] > 100.0) and np.all(res[3:] < 90.0)
    sub = pop.curves(pop.sellers)
    assert sub.shape == (2,) and np.all(sub.role == SELLER)


def test_population_curves_other_families():
    osc = build_population(2, 2, curve="oscillator", curve_params={"weights": [0.8, 0.0, 0.2]})
    c = osc.curves()
    assert isinstance(c, OscillatorCurve) and c.weights.shape == (4, 3)
    log = build_population(2, 2, curve="logistic", curve_params={"tau": 0.5}, rng=0)
    lc = log.curves()
    assert isinstance(lc, LogisticCurve)
    np.testing.assert_array_equal(lc.side, log.role)
    np.testing.assert_array_equal(lc.tau, 0.5)
    # a logistic curve with a = 1 at threshold 1/2 reserves exactly at mu (MODEL.md section 1)
    np.testing.assert_allclose(lc.reservation_price(), log.mu)
    tab = build_population(
        1,
        1,
        value=100.0,
        cost=90.0,
        sigma=2.0,
        curve="tabulated",
        curve_params={"grid": [-1.0, 0.0, 1.0], "values": [0.0, 1.0, 0.0]},
    )
    tc = tab.curves()
    assert isinstance(tc, TabulatedCurve)
    np.testing.assert_allclose(tc.grid, [[98.0, 100.0, 102.0], [88.0, 90.0, 92.0]])


# -- the Mesa agent view -----------------------------------------------------------------------
def test_trader_is_a_view_on_the_population_row():
    import mesa

    from propensim.markets.model import Trader

    pop = build_population(2, 1, value=100.0, cost=90.0, sigma=3.0, rng=0)
    model = mesa.Model(rng=1)
    traders = [Trader(model, pop, i) for i in range(len(pop))]
    assert isinstance(traders[0], mesa.Agent)
    assert len(model.agents) == 3
    t = traders[2]
    assert t.role == "seller" and not t.is_buyer and traders[0].is_buyer
    assert t.mu == pop.mu[2] and isinstance(t.mu, float)
    assert isinstance(t.stock, int) and t.stock == 1
    # writes go to the column, and column writes show through the agent
    t.mu = 91.5
    assert pop.mu[2] == 91.5
    pop.sigma[0] = 7.0
    assert traders[0].sigma == 7.0
    curve = t.curve()
    assert curve.shape == (1,) and curve.mu[0] == 91.5
    assert "seller" in repr(t)
    # Mesa's own tooling sees the attributes
    assert sorted(model.agents.get("mu")) == sorted(pop.mu.tolist())
