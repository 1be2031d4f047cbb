"""The plain per-agent Mesa reference models compute the same market as propensim's engine.

The benchmark suite (benchmarks/run.py) times benchmarks/plain_mesa.py against the engine; the
ratio means something only if both run the same science. Here both run the same small market
over many seeds and must agree in distribution: mean volume per round and mean trade price per
round within a z-score of 4 (means of independent replicates; the two sides use different random
streams, so they can only agree in distribution, not draw for draw). A deliberately different
market must be told apart by the same test, so the check has power.
"""

from __future__ import annotations

import importlib.util
import math
import sys
from pathlib import Path

import numpy as np
import pytest

BENCH = Path(__file__).resolve().parents[1] / "benchmarks"

N_BUYERS = N_SELLERS = 20
ROUNDS = 5
POP = {"value": [80.0, 120.0], "cost": [60.0, 100.0], "shade": 10.0, "sigma": 5.0}
DRIFT = {"eta": 1.0, "noise": 0.5, "dt": 1.0, "strength": 1.0}
MEAN_DEGREE = 8.0
Z_MAX = 4.0


@pytest.fixture(scope="module")
def plain():
    spec = importlib.util.spec_from_file_location("plain_mesa", BENCH / "plain_mesa.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("plain_mesa", module)
    spec.loader.exec_module(module)
    return module


def _engine_runs(clearing, seeds, pop=POP):
    from propensim.markets.build import build_market

    config = {
        "population": {"n_buyers": N_BUYERS, "n_sellers": N_SELLERS, **pop},
        "network": {"name": "erdos_renyi", "mean_degree": MEAN_DEGREE},
        "clearing": clearing,
        "drift": {"name": "anchor", **DRIFT},
        "metrics": ["volume", "mean_price"],
        "market": {"keep_ledger": False},
    }
    out = []
    for seed in seeds:
        frame = build_market(config, seed=seed, mesa=False).run(ROUNDS)
        out.append((frame["volume"].to_numpy(float), frame["mean_price"].to_numpy(float)))
    return out


def _plain_runs(model_cls, seeds, pop=POP, **extra):
    out = []
    for seed in seeds:
        model = model_cls(
            n_buyers=N_BUYERS,
            n_sellers=N_SELLERS,
            value=tuple(pop["value"]),
            cost=tuple(pop["cost"]),
            shade=pop["shade"],
            sigma=pop["sigma"],
            mean_degree=MEAN_DEGREE,
            rng=seed,
            **DRIFT,
            **extra,
        )
        for _ in range(ROUNDS):
            model.step()
        frame = model.datacollector.get_model_vars_dataframe()
        out.append((frame["volume"].to_numpy(float), frame["mean_price"].to_numpy(float)))
    return out


def _per_run(runs):
    """Per replicate: mean volume per round, and mean over rounds of the round's mean price."""
    volume = np.array([v.mean() for v, _ in runs])  # shape: (n_seeds,)
    price = np.array([np.nanmean(p) if np.isfinite(p).any() else np.nan for _, p in runs])
    return volume, price[np.isfinite(price)]


def _z(a, b):
    """Two-sample z-score of a difference in means (independent samples)."""
    se = math.sqrt(a.var(ddof=1) / a.size + b.var(ddof=1) / b.size)
    return abs(a.mean() - b.mean()) / se


CASES = {
    "propensity": (
        {"name": "propensity", "meetings": 2},
        "PlainPropensityMarket",
        {"meetings": 2},
        40,
    ),
    "call_auction": ({"name": "call_auction"}, "PlainCallAuctionMarket", {}, 40),
    "double_auction": (
        {"name": "double_auction", "strategy": "zi_c"},
        "PlainDoubleAuctionMarket",
        {"quotes_per_trader": 20, "strategy": "zi_c"},
        20,
    ),
}

pytestmark = pytest.mark.filterwarnings("ignore:.*hold only buyers or only sellers:RuntimeWarning")

_ENGINE_CACHE: dict[str, list] = {}


def _engine_for(rule):
    if rule not in _ENGINE_CACHE:
        clearing, _, _, n_seeds = CASES[rule]
        _ENGINE_CACHE[rule] = _engine_runs(clearing, range(n_seeds))
    return _ENGINE_CACHE[rule]


@pytest.mark.parametrize("rule", list(CASES))
def test_plain_model_agrees_with_engine(plain, rule):
    clearing, cls_name, extra, n_seeds = CASES[rule]
    engine = _per_run(_engine_for(rule))
    ref = _per_run(_plain_runs(getattr(plain, cls_name), range(1000, 1000 + n_seeds), **extra))
    # Both sides trade: the comparison is not between two empty markets (common practice).
    assert engine[0].mean() > 1.0 and ref[0].mean() > 1.0
    assert _z(engine[0], ref[0]) < Z_MAX, (engine[0].mean(), ref[0].mean())
    assert _z(engine[1], ref[1]) < Z_MAX, (engine[1].mean(), ref[1].mean())


def test_agreement_check_has_power(plain):
    # The same test tells apart a market whose preferred prices start 10 further apart.
    wide = {**POP, "shade": 0.0}
    clearing, cls_name, extra, n_seeds = CASES["propensity"]
    engine = _per_run(_engine_for("propensity"))
    other = _per_run(_plain_runs(getattr(plain, cls_name), range(n_seeds), pop=wide, **extra))
    assert _z(engine[0], other[0]) > Z_MAX


def test_plain_anchor_drift_is_the_exact_ou_step(plain):
    # Exact OU step: stationary variance D eta / k (Uhlenbeck & Ornstein 1930; Gillespie 1996).
    model = plain.PlainPropensityMarket(
        n_buyers=400, n_sellers=0, value=100.0, sigma=2.0, noise=0.5, dt=3.0, meetings=0, rng=5
    )
    for _ in range(40):
        model.step()
    mu = np.array([t.mu for t in model.buyers])
    k = 1.0 / 2.0**2  # strength gamma / sigma^2
    expected = 0.5 * 1.0 / k  # D eta / k = 2.0
    # 400 draws: the sample variance has relative sd sqrt(2/399) ~ 7%; allow 4 of them.
    assert abs(mu.var() - expected) < 4 * expected * math.sqrt(2 / 399)
    assert abs(mu.mean() - 100.0) < 4 * math.sqrt(expected / 400)


@pytest.mark.slow
def test_benchmark_harness_times_each_side_in_its_own_process():
    # The harness itself (benchmarks/run.py): builds the plain model, the engine with compiled
    # loops and the engine on numpy alone in three child processes and times them in turns.
    import json
    import subprocess

    code = (
        "import json, sys\n"
        f"sys.path.insert(0, {str(BENCH)!r})\n"
        "import run as R, plain_mesa\n"
        "if __name__ == '__main__':\n"
        "    t = R.side_by_side({'engine': R._engine_builder(6000, 'propensity'),\n"
        "        'engine_numpy': R._engine_builder(6000, 'propensity', kernels='numpy'),\n"
        "        'plain': R._plain_builder(plain_mesa.PlainPropensityMarket, 6000, meetings=1)},\n"
        "        2, 0.02)\n"
        "    row = R._row_for('matching', 6000, t)\n"
        "    print(json.dumps(row))\n"
    )
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    row = json.loads(res.stdout.strip().splitlines()[-1])
    assert row["edges"] > 0 and row["engine_round_s"] > 0 and row["plain_round_s"] > 0
    assert row["ratio"] > 0 and row["ratio_numpy"] > 0  # both sides measured (no speed target)
