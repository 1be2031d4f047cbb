"""A small two-arm experiment stored once per test session, for report, table and figure tests."""

from __future__ import annotations

from propensim.experiments import load_spec, run_experiment

SPEC = {
    "experiment": {"name": "tiny-report", "seed": 11, "rounds": 6, "replicates": 3},
    "population": {
        "n_buyers": 8,
        "n_sellers": 8,
        "value": [80.0, 120.0],
        "cost": [60.0, 100.0],
        "sigma": 6.0,
    },
    "network": {"name": "complete"},
    "collect": {"metrics": ["volume", "vwap", "efficiency", "buyer_surplus", "seller_surplus"]},
    "design": {"kind": "grid", "parameters": {"population.sigma": [3.0, 9.0]}},
    "arms": [
        {"name": "matching", "set": {"clearing.name": "propensity"}},
        {"name": "auction", "set": {"clearing.name": "call_auction"}},
    ],
    "compare": {"baseline": "auction", "bootstrap": 500},
}


def tiny_store(folder):
    """Run the tiny experiment into ``folder`` (in this process) and return the path."""
    run_experiment(load_spec(SPEC), folder, workers=1, progress=False)
    return folder
