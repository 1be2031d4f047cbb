"""Meetings that did not trade are recorded, and the curves can be recovered from them."""

from __future__ import annotations

import numpy as np
import pytest

from propensim.experiments.recover_matching import RecoveryError, recover_matching
from propensim.markets.build import build_market

CONF = {
    "population": {"n_buyers": 40, "n_sellers": 40},
    "network": {"name": "erdos_renyi", "mean_degree": 6},
    "clearing": {"name": "propensity", "meetings": 2},
    "drift": {"rules": [{"name": "anchor"}], "noise": 0.1},
}


def test_every_meeting_is_recorded_and_recording_changes_no_result():
    plain = build_market({**CONF, "market": {"keep_ledger": True}}, 4, mesa=False)
    kept = build_market({**CONF, "market": {"keep_ledger": True, "keep_meetings": True}}, 4)
    a, b = plain.run(6), kept.run(6)
    assert a.equals(b)  # recording draws nothing and moves nothing
    meetings = kept.meetings_frame()
    ledger = kept.ledger_frame()
    assert int(meetings["traded"].sum()) == len(ledger) == int(a["volume"].sum())
    traded = meetings[meetings["traded"] == 1]
    assert (
        np.isfinite(traded["price"]).all()
        and meetings.loc[meetings.traded == 0, "price"].isna().all()
    )
    # each buyer with partners and units meets `meetings` sellers a round, on edges only
    net = kept.network
    assert net.has_edge(meetings["buyer"].to_numpy(), meetings["seller"].to_numpy()).all()
    assert traded["buyer"].max() < 40 <= traded["seller"].min()  # buyers first, then sellers


#: Truth: buyers' centres 100, sellers' 94, width 5, no drift, units that never run out.
#: Bromiley (2003): trade chance exp(-6^2 / (4 * 25)) = 0.698 and price sd 5 / sqrt(2).
RECOVER = {
    "population": {
        "n_buyers": 200,
        "n_sellers": 50,
        "value": 104.0,
        "cost": 90.0,
        "shade": 4.0,
        "sigma": 5.0,
        "stock": 50,
        "capacity": 50,
    },
    "clearing": {"name": "propensity", "meetings": 1},
    "market": {"keep_meetings": True},
}
TRUTH = {"mu[buyer]": 100.0, "mu[seller]": 94.0, "sigma": 5.0}


def _fit(seed: int):
    market = build_market(RECOVER, seed, mesa=False)
    market.advance(10)
    return recover_matching(market.meetings_frame())


def test_curves_are_recovered_from_meetings():
    fit = _fit(0)
    assert fit.converged and fit.n_traded > 1000
    for row in fit.table.to_dict("records"):
        assert abs(row["estimate"] - TRUTH[row["parameter"]]) < 4 * row["se"], row


@pytest.mark.slow
def test_recovery_intervals_cover_the_truth():
    # Coverage of the 95% intervals over 12 seeded markets: at least 10 of 12 per parameter
    # (binomial(12, 0.95): P(fewer than 10) = 0.02; common practice for a coverage check).
    hits = dict.fromkeys(TRUTH, 0)
    for seed in range(12):
        for row in _fit(seed).table.to_dict("records"):
            hits[row["parameter"]] += row["ci_low"] < TRUTH[row["parameter"]] < row["ci_high"]
    assert min(hits.values()) >= 10, hits


def test_unusable_meetings_are_refused_with_one_line():
    import pandas as pd

    with pytest.raises(RecoveryError, match="traded"):
        recover_matching(pd.DataFrame({"buyer": [0], "seller": [1], "price": [1.0]}))
    same = pd.DataFrame(
        {"buyer": [0] * 30, "seller": [1] * 30, "price": [np.nan] * 30, "traded": 0}
    )
    with pytest.raises(RecoveryError, match="same outcome"):
        recover_matching(same)


def test_a_spec_collects_meetings_into_the_store(tmp_path):
    from propensim.experiments.cli import main
    from propensim.experiments.store import load

    spec = tmp_path / "spec.toml"
    spec.write_text(
        '[experiment]\nname = "meet"\nseed = 3\nrounds = 3\nreplicates = 2\n'
        "[population]\nn_buyers = 20\nn_sellers = 20\n[collect]\nmeetings = true\n"
    )
    assert main(["run", str(spec), "--out", str(tmp_path / "res"), "--quiet"]) == 0
    meetings = load(tmp_path / "res").meetings
    assert len(meetings) == 2 * 3 * 20 and set(meetings.columns) >= {"run_id", "traded", "price"}
