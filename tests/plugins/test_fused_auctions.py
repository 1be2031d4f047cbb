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
