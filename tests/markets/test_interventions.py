"""Interventions and welfare accounting checked against textbook results (MODEL.md section 9)."""

from __future__ import annotations

import copy
import warnings

import numpy as np
import pytest

from propensim.experiments.compare import bootstrap_mean_ci
from propensim.markets.build import build_market
from propensim.markets.engine import MarketEngine

# -- a textbook market: linear demand and supply from many unit traders -------------------------
# MODEL.md section 9 check value, scaled by 10 so that unit steps are small:
# Q_D = 400 - 20 P and Q_S = -400 + 80 P (the book's Q_D = 40 - 2P, Q_S = -40 + 8P, times 10).
N_B, N_S = 400, 800
VALUES = (400 - np.arange(N_B) - 0.5) / 20  # the i-th highest value: Q_D(P) = 400 - 20 P
COSTS = 5 + (np.arange(N_S) + 0.5) / 80  # the j-th lowest cost: Q_S(P) = -400 + 80 P
METRICS = [
    "volume",
    "buyer_price",
    "seller_price",
    "tax_revenue",
    "total_surplus",
    "deadweight_loss",
    "fixed_efficiency",
    "efficiency",
    "unmet_demand",
]


def _textbook(interventions=(), clearing=None):
    conf = {
        "population": {
            "n_buyers": N_B,
            "n_sellers": N_S,
            "value": {"values": VALUES.tolist()},
            "cost": {"values": COSTS.tolist()},
        },
        "clearing": clearing or {"name": "call_auction", "quotes": "value"},
        "metrics": METRICS,
        "interventions": list(interventions),
    }
    return build_market(conf, seed=1, mesa=False).run(1).iloc[0]


def test_no_intervention_clears_at_the_textbook_equilibrium():
    # Any principles textbook: Q_D = Q_S at P = 8, Q = 24 (x10 here: 240).
    row = _textbook()
    assert row["volume"] == 240 and row["buyer_price"] == pytest.approx(8.0)
    assert row["fixed_efficiency"] == 1.0 and row["deadweight_loss"] == pytest.approx(0.0)


@pytest.mark.parametrize("side", ["buyer", "seller"])
def test_per_unit_tax_matches_tax_incidence_and_the_deadweight_triangle(side):
    # Tax incidence (any principles textbook, e.g. the tax-incidence chapter; MODEL.md section 9):
    # 40 - 2 P_b = -40 + 8 (P_b - t) with t = 5 gives P_b = 12, P_s = 7, Q = 16 (x10: 160),
    # whichever side pays; revenue = t Q; deadweight loss = 0.5 t (Q* - Q_t) = 0.5 * 5 * 80.
    t = 5.0
    row = _textbook([{"name": "unit_tax", "amount": t, "side": side}])
    assert row["volume"] == 160
    assert row["buyer_price"] == pytest.approx(12.0)
    assert row["seller_price"] == pytest.approx(7.0)
    assert row["buyer_price"] - row["seller_price"] == pytest.approx(t)
    assert row["tax_revenue"] == pytest.approx(t * 160)
    assert row["deadweight_loss"] == pytest.approx(0.5 * t * (240 - 160))
    # revenue is a transfer, not a loss: total surplus = benchmark - triangle
    assert row["total_surplus"] == pytest.approx(1800.0 - 200.0)


def test_a_subsidy_is_a_negative_tax_whose_cost_comes_off_total_surplus():
    # Textbook subsidy: a wedge of -s; quantity rises above Q*, the cost s Q exceeds the gain.
    row = _textbook([{"name": "unit_subsidy", "amount": 5.0, "side": "buyer"}])
    assert row["volume"] > 240
    assert row["tax_revenue"] == pytest.approx(-5.0 * row["volume"])
    assert row["deadweight_loss"] > 0


def test_binding_ceiling_trades_what_sellers_supply_at_it_and_records_the_shortage():
    # Textbook price ceiling: Q = Q_S(c); with c = 7: Q_S = -400 + 560 = 160 and the shortage
    # Q_D(7) - Q_S(7) = 260 - 160 = 100 units is unmet demand.
    row = _textbook([{"name": "price_ceiling", "price": 7.0}])
    assert row["volume"] == 160
    assert row["buyer_price"] == pytest.approx(7.0)
    assert row["unmet_demand"] == 100


@pytest.mark.parametrize("clearing", ["propensity", "call_auction", "double_auction", "bargaining"])
def test_a_ceiling_keeps_every_price_under_it_and_a_non_binding_one_changes_nothing(clearing):
    # Common practice: a control above every price must leave the market exactly as it was
    # (common random numbers: the same draws, so the paired difference is exactly 0).
    conf = {
        "population": {"n_buyers": 60, "n_sellers": 60},
        "network": {"name": "erdos_renyi", "mean_degree": 6},
        "clearing": clearing,
        "drift": {"rules": [{"name": "anchor"}], "noise": 0.1},
        "market": {"keep_ledger": True},
    }
    base = build_market(conf, 3, mesa=False).run(8)
    loose = [{"name": "price_ceiling", "price": 1e6}, {"name": "price_floor", "price": 0.0}]
    same = build_market({**conf, "interventions": loose}, 3, mesa=False).run(8)
    assert base.equals(same)
    unbounded = build_market(conf, 3, mesa=False)
    unbounded.advance(8)
    ceiling = float(np.median(unbounded.ledger_frame()["price"]))  # binds for half the trades
    tight = build_market(
        {**conf, "interventions": [{"name": "price_ceiling", "price": ceiling}]}, 3, mesa=False
    )
    tight.advance(8)
    ledger = tight.ledger_frame()
    assert len(ledger) and ledger["price"].max() <= ceiling


def test_cutting_links_between_regions_leaves_no_cross_region_trade():
    # Common practice: with every cross-region link cut no trade can cross a region boundary.
    conf = {
        "population": {"n_buyers": 150, "n_sellers": 150},
        "network": {"name": "regions", "n_regions": 3, "radius": 0.45, "spread": 0.15},
        "clearing": {"name": "propensity", "meetings": 3},
        "market": {"keep_ledger": True},
    }

    def cross(market):
        region = market.network.attributes["region"]
        led = market.ledger_frame()
        return int((region[led["buyer"]] != region[led["seller"]]).sum())

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        base = build_market(conf, 11, mesa=False)
        base.advance(5)
        cut = build_market({**conf, "interventions": [{"name": "cut_regions"}]}, 11, mesa=False)
        cut.advance(5)
    assert cross(base) > 0  # the base market does trade across regions
    assert cross(cut) == 0 and len(cut.ledger_frame()) > 0


def test_removing_hubs_costs_more_volume_than_removing_as_many_random_traders():
    # Albert, Jeong and Barabasi, Nature 406:378 (2000): scale-free networks are robust to
    # random failure and fragile to targeted attack. Paired over seeds (common random numbers).
    def conf(interventions):
        return {
            "population": {
                "n_buyers": 160,
                "n_sellers": 40,
                "shade": [10.0, 20.0],
                "stock": 4,
                "capacity": 4,
            },
            "network": {"name": "scale_free", "m": 2},
            "clearing": {"name": "propensity", "meetings": 3},
            "metrics": ["volume"],
            "interventions": interventions,
        }

    diffs = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for seed in range(10):
            hubs = build_market(conf([{"name": "remove_hubs", "k": 10}]), seed, mesa=False)
            rand = build_market(conf([{"name": "remove_traders", "count": 10}]), seed, mesa=False)
            hubs.advance(10)
            rand.advance(10)
            diffs.append(hubs.summary()["volume"] - rand.summary()["volume"])
    lo, hi = bootstrap_mean_ci(
        np.array(diffs), confidence=0.95, n_resamples=2000, rng=np.random.default_rng(0)
    )
    assert hi < 0, (np.mean(diffs), lo, hi)


def test_a_cost_shift_no_longer_looks_like_an_efficiency_gain_against_the_fixed_benchmark():
    # MODEL.md section 9: against the market as it now is, shifting costs (the old way to model
    # a tax) shrinks the benchmark with the market, so `efficiency` shows no loss at all; the
    # fixed benchmark (the market before any intervention) shows the loss.
    shifted = _textbook([{"name": "value_shock", "side": "seller", "shift": 5.0}])
    assert shifted["efficiency"] == pytest.approx(1.0)  # the trap: "nothing lost"
    assert shifted["fixed_efficiency"] < 1.0
    taxed = _textbook([{"name": "unit_tax", "amount": 5.0}])
    assert taxed["fixed_efficiency"] == pytest.approx(1.0 - 200.0 / 1800.0)


def test_interventions_start_and_end_at_their_rounds():
    conf = {
        "population": {"n_buyers": 40, "n_sellers": 40, "value": 110.0, "cost": 70.0},
        "clearing": {"name": "call_auction", "quotes": "value"},
        "metrics": ["volume", "tax_revenue", "buyer_price"],
        "interventions": [{"name": "unit_tax", "amount": 2.0, "start": 2, "until": 4}],
    }
    frame = build_market(conf, 0, mesa=False).run(6)
    assert frame["tax_revenue"].tolist() == [0.0, 0.0, 80.0, 80.0, 0.0, 0.0]


def test_changing_the_network_mid_run_equals_a_market_built_on_it_then():
    # No stale cache: matching, auctions, checks and metrics all derive from the network.
    # Market A runs on N1, then replaces it by N2 at round t; market B is built on N2 from A's
    # state at round t (same curves, holdings and random streams). They must agree exactly.
    for clearing in ("propensity", "call_auction", "double_auction"):
        conf = {
            "population": {"n_buyers": 50, "n_sellers": 50},
            "network": {"name": "erdos_renyi", "mean_degree": 5},
            "clearing": clearing,
            "drift": {"rules": [{"name": "anchor"}, {"name": "outcome"}], "noise": 0.1},
            "metrics": ["volume", "vwap", "efficiency"],
        }
        a = build_market(conf, 5, mesa=False)
        a.advance(4)
        other = build_market({**conf, "network": {"name": "small_world", "k": 6}}, 9, mesa=False)
        n2 = other.network
        b = MarketEngine(
            a.population.copy(),
            n2,
            copy.deepcopy(a.clearing),
            copy.deepcopy(a.drift),
            ["volume", "vwap", "efficiency"],
            seed=5,
        )
        b._initial_stock[:] = a._initial_stock
        b._initial_cash[:] = a._initial_cash
        b._rng_clearing.bit_generator.state = a._rng_clearing.bit_generator.state
        b._rng_drift.bit_generator.state = a._rng_drift.bit_generator.state
        b.state.equilibrium_price = a.state.equilibrium_price
        b.state.last_price = a.state.last_price
        b.round = a.round
        a.replace_network(n2)
        a.advance(4)
        b.advance(4)
        ra = a.rounds_frame().iloc[4:].reset_index(drop=True)
        rb = b.rounds_frame()
        assert ra.equals(rb), clearing


def test_entry_appends_traders_who_then_trade():
    conf = {
        "population": {"n_buyers": 20, "n_sellers": 20, "value": 110.0, "cost": 70.0},
        "clearing": {"name": "call_auction", "quotes": "value"},
        "metrics": ["volume"],
        "interventions": [{"name": "entry", "n_buyers": 10, "start": 1}],
        "market": {"keep_totals": True, "keep_ledger": True},
    }
    m = build_market(conf, 0, mesa=False)
    frame = m.run(3)
    assert len(m.population) == 50
    assert frame["volume"].tolist() == [20.0, 20.0, 20.0]  # sellers are the short side
    assert m.ledger_frame()["buyer"].max() >= 40  # an entrant bought something
    assert m.totals_columns()["surplus"].shape == (50,)


def test_per_trader_totals_add_up_to_the_round_surplus():
    conf = {
        "population": {"n_buyers": 30, "n_sellers": 30},
        "network": {"name": "regions", "n_regions": 2, "radius": 0.5},
        "clearing": "propensity",
        "metrics": ["total_surplus", "tax_revenue"],
        "interventions": [{"name": "unit_tax", "amount": 1.0}, {"name": "remove_hubs", "k": 3}],
        "market": {"keep_totals": True},
    }
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m = build_market(conf, 2, mesa=False)
        frame = m.run(5)
    totals = m.totals_columns()
    traders = totals["surplus"].sum()
    assert traders + frame["tax_revenue"].sum() == pytest.approx(frame["total_surplus"].sum())
    assert totals["left"].sum() == 3 and set(np.unique(totals["region"])) <= {0, 1}
    assert set(np.unique(totals["degree_quartile"])) <= {1, 2, 3, 4}


@pytest.mark.parametrize(
    ("intervention", "field"),
    [
        ({"name": "remove_hubs", "k": 1000}, "k"),
        ({"name": "remove_traders", "ids": [5, 999]}, "ids"),
        ({"name": "remove_traders", "attribute": "island", "equals": 1}, "attribute"),
        ({"name": "cut_regions"}, "attribute"),
    ],
)
def test_interventions_that_do_not_fit_the_market_are_refused_before_the_first_round(
    intervention, field
):
    conf = {"population": {"n_buyers": 10, "n_sellers": 10}, "interventions": [intervention]}
    with pytest.raises(ValueError, match=field) as err:
        build_market(conf, 0, mesa=False)
    assert "\n" not in str(err.value)
