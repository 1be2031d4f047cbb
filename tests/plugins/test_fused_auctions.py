"""The compiled auction loops give exactly the trades of their Python and numpy references.

The double auction's Python loop (``_auctions._book_loop``) is the reference: it runs when numba
is missing, and the compiled loop repeats it step for step; likewise the call auction's pairing
of winners along edges (``pair_on_edges``: eligible edges, a random order, ``greedy_accept``).
Whole markets are run both ways and compared trade by trade, with budgets, several units per
trader, price bounds and sparse networks.
"""

from __future__ import annotations

import numpy as np
import pytest

from propensim.markets.build import build_market

pytest.importorskip("numba")


def _config(**market):
    config = {
        "population": {
            "n_buyers": 300,
            "n_sellers": 260,
            "value": [80.0, 120.0],
            "cost": [60.0, 100.0],
            "shade": 10.0,
            "sigma": 5.0,
        },
        "network": {"name": "erdos_renyi", "mean_degree": 5.0},
        "clearing": {"name": "double_auction", "strategy": "zi_c"},
        "drift": {"name": "anchor", "noise": 0.5},
        "market": {"keep_ledger": True},
    }
    for key, value in market.items():
        section, _, field = key.partition("__")
        if field:
            config[section][field] = value
        else:
            config[section] = value
    return config


CASES = {
    "zi_c": {},
    "zi_u": {"clearing": {"name": "double_auction", "strategy": "zi_u"}},
    "curve quotes": {"clearing": {"name": "double_auction", "strategy": "curve"}},
    "budgets and units": {
        "population__cash": 150.0,
        "population__capacity": 3,
        "population__stock": 2,
        "market": {"keep_ledger": True, "replenish": False},
    },
    "sparse network": {"network": {"name": "erdos_renyi", "mean_degree": 0.9}},
    "few quotes": {"clearing": {"name": "double_auction", "quotes_per_round": 150}},
    "price ceiling": {
        "interventions": [{"name": "price_ceiling", "price": 88.0, "start": 2}],
    },
    "call auction": {"clearing": {"name": "call_auction"}},
    "call auction, several units": {
        "clearing": {"name": "call_auction"},
        "population__capacity": 3,
        "population__stock": 3,
    },
    "call auction, sparse": {
        "clearing": {"name": "call_auction"},
        "network": {"name": "erdos_renyi", "mean_degree": 1.2},
    },
}


@pytest.mark.filterwarnings("ignore::RuntimeWarning")
@pytest.mark.parametrize("case", sorted(CASES))
def test_compiled_book_matches_the_python_loop(monkeypatch, case):
    out = {}
    for how in ("numpy", "numba"):
        monkeypatch.setenv("PROPENSIM_KERNELS", how)
        try:
            market = build_market(_config(**CASES[case]), seed=7, mesa=False)
        except ValueError as err:  # an intervention this checkout does not have
            pytest.skip(str(err))
        rounds = market.run(6)
        out[how] = (rounds, market.ledger_frame(), market.population.cash.copy())
    slow, fast = out["numpy"], out["numba"]
    assert len(slow[1]) > 0  # the market traded
    assert slow[0].equals(fast[0])
    assert slow[1].equals(fast[1])
    assert np.array_equal(slow[2], fast[2])


@pytest.mark.filterwarnings("ignore::RuntimeWarning")
@pytest.mark.parametrize("strategy", ["zi_c", "zi_u", "curve"])
@pytest.mark.parametrize("bounds", ["none", "quote range", "price controls"])
def test_compiled_quote_setup_matches_numpy(strategy, bounds):
    """``double_auction``'s compiled set-up (``numba_auctions.double_auction_quotes``): the same
    arrivals and quotes as the numpy lines it stands in for, so the same trades, bit for bit, and
    the generator left in the same state."""
    from propensim.plugins import acceleration
    from propensim.plugins._auctions import double_auction

    config = _config(clearing={"name": "double_auction", "strategy": strategy})
    config["population"].update(cash=400.0, capacity=2, stock=2)  # budgets bind, units vary
    market = build_market(config, seed=3, mesa=False)
    market.run(2)
    state = market.state
    state.remaining = np.where(np.arange(len(state.population)) % 7 == 0, 0, 2)  # some are out
    price_low, price_high = (90.0, 105.0) if bounds == "quote range" else (None, None)
    if bounds == "price controls":
        state.price_floor, state.price_ceiling = 85.0, 101.0
    out = {}
    try:
        for how, use in (("numpy", False), ("numba", True), ("other seed", True)):
            acceleration.activate(use)
            rng = np.random.default_rng(11 if how != "other seed" else 12)
            trades = double_auction(state, rng, strategy, None, price_low, price_high)
            out[how] = (trades.buyer, trades.seller, trades.price, rng.random())
    finally:
        acceleration.activate(None)
        state.price_floor, state.price_ceiling = -np.inf, np.inf
    slow, fast, other = out["numpy"], out["numba"], out["other seed"]
    assert slow[0].size > 20  # the round traded
    if bounds == "price controls":
        assert slow[2].min() >= 85.0 and slow[2].max() <= 101.0
    for a, b in zip(slow, fast, strict=True):
        assert np.array_equal(a, b)
    assert not np.array_equal(slow[2], other[2])  # the comparison sees a different stream
