"""The compiled loops give exactly the numbers of the numpy code they stand in for.

Each kernel is checked bit for bit against its numpy twin (same values, and the generator left in
the same state), then whole markets are run with the kernels forced on and off and compared
column by column. The reference for the normal draws is NumPy itself:
``Generator.standard_normal`` (ziggurat) and ``Generator.random``.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pytest

from propensim.agents.population import Population
from propensim.markets import engine, stages
from propensim.markets.build import build_market
from propensim.markets.engine import DEFAULT_METRICS
from propensim.plugins import acceleration, metrics
from propensim.plugins.drift import _ou_apply
from propensim.plugins.trade_checks import settle_trades
from propensim.plugins.types import Trades

pytest.importorskip("numba")


@pytest.fixture
def forced(monkeypatch):
    """Kernels on from the first round (``PROPENSIM_KERNELS=numba``)."""
    monkeypatch.setenv("PROPENSIM_KERNELS", "numba")
    assert acceleration.compiled(1) is not None


def _same_state(g1: np.random.Generator, g2: np.random.Generator) -> bool:
    return g1.bit_generator.state == g2.bit_generator.state


@pytest.mark.parametrize(
    "shape", ["scalars", "offset column", "all columns", "sd column", "scalar offset"]
)
def test_ou_step_matches_numpy_bit_for_bit(forced, shape):
    rng = np.random.default_rng(11)
    n = 5000
    mu = rng.normal(100.0, 10.0, n)
    offset = rng.normal(30.0, 5.0, n)
    decay, gain, sd = 0.81, 0.17, 0.63
    if shape == "all columns":
        decay, gain, sd = rng.random(n), rng.random(n) * 2, rng.random(n)
    elif shape == "sd column":
        sd = rng.random(n)
    elif shape == "scalar offset":
        offset = np.float64(12.5)
    elif shape == "scalars":
        pass
    g_fast, g_ref = np.random.default_rng(5), np.random.default_rng(5)
    out = np.empty(n)
    assert acceleration.ou_apply(mu, offset, decay, gain, sd, g_fast, out)
    ref = mu * decay
    ref += np.multiply(offset, gain)
    xi = g_ref.standard_normal(n)
    xi *= sd
    ref += xi
    assert np.array_equal(out, ref)
    assert _same_state(g_fast, g_ref)


def test_ou_apply_uses_the_kernel_and_agrees_with_numpy(monkeypatch):
    rng = np.random.default_rng(2)
    mu, offset = rng.normal(0, 1, 3000), rng.normal(0, 1, 3000)
    coefficients = (0.5, 0.25, 1.5)
    monkeypatch.setenv("PROPENSIM_KERNELS", "numpy")
    g1 = np.random.default_rng(9)
    slow = _ou_apply(mu, offset, coefficients, g1)
    monkeypatch.setenv("PROPENSIM_KERNELS", "numba")
    g2 = np.random.default_rng(9)
    fast = _ou_apply(mu, offset, coefficients, g2)
    assert np.array_equal(fast, slow) and _same_state(g1, g2)


def test_ou_kernel_refuses_columns_of_the_wrong_length(forced):
    # The compiled loop has no bounds checks: the wrapper must stop a short column.
    with pytest.raises(ValueError, match="as many rows as mu"):
        acceleration.ou_apply(
            np.zeros(10), np.zeros(9), 0.5, 0.5, 1.0, np.random.default_rng(0), np.empty(10)
        )


def test_settle_matches_the_ufunc_at_sequence(forced):
    rng = np.random.default_rng(3)
    n, m = 400, 3000
    buyer = rng.integers(0, 200, m)  # repeated rows: the order of the sums matters
    seller = rng.integers(200, 400, m)
    price = rng.normal(90, 20, m)
    qty = rng.integers(1, 4, m)
    stock = rng.integers(0, 50, n).astype(np.int64)
    cash = rng.normal(1000, 300, n)
    cash[rng.random(n) < 0.2] = np.inf
    s1, c1, s2, c2 = stock.copy(), cash.copy(), stock.copy(), cash.copy()
    assert acceleration.settle(buyer, seller, qty, price, price, s1, c1)
    np.add.at(s2, buyer, qty)
    np.subtract.at(s2, seller, qty)
    pay = qty * price
    np.subtract.at(c2, buyer, pay)
    np.add.at(c2, seller, pay)
    assert np.array_equal(s1, s2) and np.array_equal(c1, c2)


def test_apply_kernel_leaves_rows_out_of_range_to_numpy(forced):
    # The compiled loop has no bounds checks: a bad row must reach numpy, which raises.
    trades = Trades(np.array([0, 7]), np.array([3, 2]), np.array([1.0, 1.0]), np.array([1, 1]))
    stock, cash = np.zeros(5, dtype=np.int64), np.zeros(5)
    t = trades
    assert not acceleration.settle(t.buyer, t.seller, t.quantity, t.price, t.price, stock, cash)
    assert not stock.any() and not cash.any()
    with pytest.raises(IndexError):
        pop = Population(
            role=[0, 0, 1, 1, 1],
            mu=100.0,
            sigma=5.0,
            activity=1.0,
            gamma=1.0,
            value=100.0,
            cash=50.0,
            stock=1,
            capacity=1,
        )
        settle_trades(pop, trades)


def test_meeting_kernel_matches_the_numpy_chain(forced):
    rng = np.random.default_rng(8)
    k, n_edges, n = 3000, 30000, 8000
    deg = rng.integers(0, 20, k)
    start = np.minimum(np.concatenate([[0], np.cumsum(deg)[:-1]]), n_edges - 1)
    seller = rng.integers(k, n, n_edges)
    mu = rng.normal(100, 8, n)
    first_row, scale = 0, -0.5 / (2 * 25.0)
    g_fast, g_ref = np.random.default_rng(1), np.random.default_rng(1)
    frac, partner, edge, arg = acceleration.meet_one_width(
        g_fast, deg, start, seller, mu, first_row, scale
    )
    u = g_ref.random(k)
    u *= deg
    pick = u.astype(np.int64)
    u -= pick
    ref_edge = start + pick
    s = seller[ref_edge]
    peak = mu[first_row : first_row + k] - mu[s]
    np.square(peak, out=peak)
    peak *= scale
    assert np.array_equal(frac, u) and np.array_equal(partner, s)
    assert np.array_equal(edge, ref_edge) and np.array_equal(arg, peak)
    assert _same_state(g_fast, g_ref)


def test_price_kernel_matches_numpy(forced):
    rng = np.random.default_rng(4)
    mu = rng.normal(100, 10, 5000)
    b, s = rng.integers(0, 2500, 700), rng.integers(2500, 5000, 700)
    g_fast, g_ref = np.random.default_rng(6), np.random.default_rng(6)
    fast = acceleration.prices_one_width(g_fast, mu, b, s, 3.5, 5000)
    ref = mu[b] + mu[s]
    ref *= 0.5
    noise = g_ref.standard_normal(700)
    noise *= 3.5
    ref += noise
    assert np.array_equal(fast, ref) and _same_state(g_fast, g_ref)


@pytest.mark.parametrize(
    "values",
    [
        np.full(50, 5.0),
        np.r_[np.full(49, 5.0), 5.0000001],
        np.r_[4.0, np.full(49, 5.0)],
        np.full(30, np.nan),
        np.r_[-0.0, 0.0, 0.0],
        np.array([7.0]),
    ],
)
def test_uniform_check_matches_min_equals_max(forced, values):
    assert acceleration.is_uniform(values) == bool(values.min() == values.max())


@pytest.mark.parametrize("replenish", [True, False])
def test_round_start_matches_numpy(forced, replenish):
    rng = np.random.default_rng(12)
    n = 2000
    stock0, stock = rng.integers(0, 6, n), rng.integers(0, 6, n)
    cash0, cash = rng.normal(100, 30, n), rng.normal(100, 30, n)
    capacity = rng.integers(0, 4, n)
    is_seller = rng.random(n) < 0.5
    s1, c1, s2, c2 = stock.copy(), cash.copy(), stock.copy(), cash.copy()
    fast = acceleration.start_round(replenish, stock0, cash0, s1, c1, capacity, is_seller)
    if replenish:
        np.copyto(s2, stock0)
        np.copyto(c2, cash0)
    ref = capacity.astype(np.int64)
    np.minimum(ref, s2, out=ref, where=is_seller)
    assert np.array_equal(fast, ref) and np.array_equal(s1, s2) and np.array_equal(c1, c2)


def _market_config(**changes) -> dict:
    config = {
        "population": {
            "n_buyers": 1500,
            "n_sellers": 1300,
            "value": [80.0, 120.0],
            "cost": [60.0, 100.0],
            "shade": 10.0,
            "sigma": 5.0,
        },
        "network": {"name": "erdos_renyi", "mean_degree": 6.0},
        "clearing": {"name": "propensity"},
        "drift": {"name": "anchor", "noise": 0.5},
        "market": {"keep_ledger": True},
    }
    for key, value in changes.items():
        section, _, field = key.partition("__")
        if field:
            config[section][field] = value
        else:
            config[section] = value
    return config


CASES = {
    "one width": {},
    "spread widths": {"population__sigma": [3.0, 8.0]},
    "heights below one": {"population__activity": [0.5, 1.0]},
    "two meetings": {"clearing": {"name": "propensity", "meetings": 2}},
    "budgets": {"population__cash": 400.0, "market": {"keep_ledger": True, "replenish": False}},
    "summed forces": {
        "drift": {
            "rules": [{"name": "anchor"}, {"name": "outcome"}, {"name": "width"}],
            "noise": 0.3,
        }
    },
    "sparse network": {"network": {"name": "erdos_renyi", "mean_degree": 0.8}},
    # Sums the fused drift pass (numba_loops.force_step) stands in for, and one it must not take
    # (spread widths: one stiffness per trader).
    "anchor and outcome": {"drift": {"rules": [{"name": "anchor"}, {"name": "outcome"}]}},
    "outcome then anchor": {
        "drift": {"rules": [{"name": "outcome", "step": 0.2}, {"name": "anchor", "strength": 2.5}]}
    },
    "outcome alone": {"drift": {"name": "outcome", "step": 0.3, "noise": 0.2}},
    "noiseless anchor": {"drift": {"name": "anchor", "noise": 0.0, "strength": 0.4}},
    "two forces, spread widths": {
        "population__sigma": [3.0, 8.0],
        "drift": {"rules": [{"name": "anchor"}, {"name": "outcome"}], "noise": 0.5},
    },
    # The built-in metrics in one call (metrics.MetricBatch): taxed prices (paid and got differ
    # from the price), a binding ceiling, hubs removed mid-run (the efficiency benchmark's
    # network changes) and a tax that starts and stops.
    "tax, cap and a removal": {
        "interventions": [
            {"name": "unit_tax", "amount": 2.0, "start": 2, "until": 8},
            {"name": "price_ceiling", "price": 92.0, "start": 4},
            {"name": "remove_hubs", "k": 30, "start": 6},
        ],
        "metrics": [*DEFAULT_METRICS, "tax_revenue", "buyer_price", "unmet_demand"],
    },
    "two forces, budgets": {
        "population__cash": 300.0,
        "market": {"keep_ledger": True, "replenish": False},
        "drift": {"rules": [{"name": "anchor"}, {"name": "outcome"}], "noise": 0.5, "eta": 2.0},
    },
}


@pytest.mark.filterwarnings("ignore:.*trading network hold only:RuntimeWarning")
@pytest.mark.parametrize("case", sorted(CASES))
def test_markets_are_identical_with_and_without_kernels(monkeypatch, case):
    results = {}
    for how in ("numpy", "numba"):
        monkeypatch.setenv("PROPENSIM_KERNELS", how)
        market = build_market(_market_config(**CASES[case]), seed=31, mesa=False)
        rounds = market.run(12)
        results[how] = (
            rounds,
            market.ledger_frame(),
            market.population.mu.copy(),
            market.population.sigma.copy(),
            market.population.cash.copy(),
        )
    slow, fast = results["numpy"], results["numba"]
    assert len(slow[1]) > 0  # the market traded
    assert slow[0].equals(fast[0]) and slow[1].equals(fast[1])
    for a, b in zip(slow[2:], fast[2:], strict=True):
        assert np.array_equal(a, b)


class _Halved(metrics.MeanPrice):
    """A subclass of a built-in metric measures its own way: it must not be batched."""

    def measure(self, state, outcome):
        return 0.5 * super().measure(state, outcome)


class _Trades:
    """A third-party metric between built-in ones."""

    def measure(self, state, outcome):
        return float(len(outcome.trades))


@pytest.mark.parametrize("curve", ["normal", "logistic"])
def test_the_metric_batch_gives_each_metrics_own_number_in_its_place(monkeypatch, curve):
    chosen = ["volume", _Halved(), "efficiency", _Trades(), "surplus_gini", "energy", "vwap"]
    rows, fills = {}, []
    real_fill = metrics.MetricBatch.fill

    def counted(self, row, state, outcome):
        done = real_fill(self, row, state, outcome)
        fills.append(done)
        return done

    monkeypatch.setattr(metrics.MetricBatch, "fill", counted)
    for how in ("numpy", "numba"):
        monkeypatch.setenv("PROPENSIM_KERNELS", how)
        config = _market_config(market={"keep_ledger": False, "replenish": False})
        config["population"]["curve"] = curve
        config["population"]["stock"] = 3
        market = build_market(config, seed=5, mesa=False)
        market.metrics[:] = engine._resolve_metrics(chosen)  # same list: the batch still serves
        market.metric_batch = metrics.MetricBatch.of(market.metrics)
        rows[how] = market.run(10)
    names = [name for name, _ in market.metrics]
    assert list(rows["numba"].columns) == ["round", *names]
    assert rows["numpy"].equals(rows["numba"])
    assert rows["numba"]["volume"].sum() > 0
    # numpy: the batch declines every round; numba: it measures every round
    assert fills == [False] * 10 + [True] * 10
    batch = market.metric_batch
    assert batch.slots[names.index("_halved")] == -1 and batch.slots[names.index("_trades")] == -1
    # the stock runs out (no replenishment): the efficiency benchmark is recomputed on the way
    assert rows["numba"]["efficiency"].notna().all()


def test_the_metric_batch_counts_units_per_trader_only_for_efficiency(monkeypatch):
    # Volume and prices read the trades alone: measuring them must not make the outcome tally
    # every trader's units (two passes over n), which a sweep of volume and mean price would
    # pay every round. Efficiency's benchmark check does read the tally.
    monkeypatch.setenv("PROPENSIM_KERNELS", "numba")
    for chosen, tallied in ((["volume", "mean_price"], False), (["volume", "efficiency"], True)):
        config = _market_config(metrics=chosen, drift={"name": "anchor"})
        market = build_market(config, seed=3, mesa=False)
        market.run(2)
        stages.begin_round(market)
        stages.apply_interventions(market)
        outcome = stages.settle(market, stages.clear(market))
        assert len(outcome.trades) > 0 and "traded" not in outcome.__dict__
        row = {}
        assert market.metric_batch.fill(row, market.state, outcome)
        assert ("traded" in outcome.__dict__) is tallied
        assert row["volume"] == float(outcome.trades.quantity.sum())


def test_a_market_whose_metric_list_is_swapped_measures_one_by_one(monkeypatch):
    # The batch made for the default metrics must not serve a list put in its place: the new
    # list's rows are those of a market built with it.
    monkeypatch.setenv("PROPENSIM_KERNELS", "numba")
    chosen = ["volume", _Halved()]
    market = build_market(_market_config(), seed=2, mesa=False)
    assert market.metric_batch is not None and market.metric_batch.source is market.metrics
    market.metrics = engine._resolve_metrics(chosen)
    market.recorder.metrics = market.metrics
    frame = market.run(3)
    built_with_it = build_market(_market_config(metrics=chosen), seed=2, mesa=False).run(3)
    assert list(frame.columns) == ["round", "volume", "_halved"]
    assert frame.equals(built_with_it)
    assert frame["_halved"].notna().all() and (frame["volume"] > 0).all()


def test_the_choice_is_made_at_build_and_does_not_depend_on_work_or_length(monkeypatch):
    # No process-wide counter and no length threshold: whatever has run before, a market of
    # any size gets the kernels when numba imports, unless PROPENSIM_KERNELS=numpy.
    assert not hasattr(acceleration, "count_work")
    monkeypatch.setenv("PROPENSIM_KERNELS", "auto")
    for length in (1, 10, 4095, 10**6):
        assert acceleration.compiled(length) is not None
    small = build_market({"population": {"n_buyers": 5, "n_sellers": 5}}, seed=1, mesa=False)
    assert small.compiled is True
    monkeypatch.setenv("PROPENSIM_KERNELS", "numpy")
    assert acceleration.compiled(10**6) is None
    off = build_market({"population": {"n_buyers": 5, "n_sellers": 5}}, seed=1, mesa=False)
    assert off.compiled is False


def test_a_fresh_process_loads_the_kernels_from_the_disk_cache():
    # cache=True: a second fresh process finds every kernel it calls already compiled on disk.
    code = (
        "import json, os, warnings\n"
        "warnings.simplefilter('ignore')\n"
        "from propensim.markets.build import build_market\n"
        "from propensim.plugins import numba_loops\n"
        "for clearing in ('propensity', 'double_auction'):\n"
        "    cfg = {'population': {'n_buyers': 60, 'n_sellers': 60}, 'clearing': clearing,\n"
        "           'network': {'name': 'erdos_renyi', 'mean_degree': 4},\n"
        "           'drift': {'rules': [{'name': 'anchor'}, {'name': 'outcome'}], 'noise': 0.5}}\n"
        "    build_market(cfg, seed=1, mesa=False).run(3)\n"
        "fns = [f for f in vars(numba_loops).values() if hasattr(f, 'stats')]\n"
        "used = [f for f in fns if f.signatures]\n"
        "print(json.dumps([len(used), sum(len(f.stats.cache_misses) for f in used)]))\n"
    )
    env = {k: v for k, v in os.environ.items() if k != "PROPENSIM_KERNELS"}
    for _ in range(2):  # the first may compile (a new machine or changed code); the second not
        res = subprocess.run(
            [sys.executable, "-c", code], capture_output=True, text=True, check=True, env=env
        )
    used, misses = json.loads(res.stdout.strip().splitlines()[-1])
    assert used >= 4 and misses == 0


def test_a_bad_kernels_setting_is_named(monkeypatch):
    monkeypatch.setenv("PROPENSIM_KERNELS", "fast")
    with pytest.raises(ValueError, match="PROPENSIM_KERNELS must be numpy, numba or auto"):
        acceleration.compiled(10)


@pytest.mark.filterwarnings("ignore:.*trading network hold only:RuntimeWarning")
def test_the_fused_drift_pass_serves_anchor_and_outcome_sums(monkeypatch):
    # The market cases above agree with numpy; this checks that they went through the fused pass
    # (else they would only repeat the general path) and that it declines what it cannot do.
    from propensim.plugins import drift as drift_rules
    from propensim.plugins import numba_loops

    assert (drift_rules._ANCHOR, drift_rules._OUTCOME) == (numba_loops.ANCHOR, numba_loops.OUTCOME)
    calls = []
    original = acceleration.force_step

    def counted(*args, **kwargs):
        out = original(*args, **kwargs)
        calls.append(out is not None)
        return out

    monkeypatch.setattr(acceleration, "force_step", counted)
    monkeypatch.setenv("PROPENSIM_KERNELS", "numba")
    build_market(_market_config(**CASES["anchor and outcome"]), seed=3, mesa=False).run(3)
    assert calls == [True, True, True]
    calls.clear()
    build_market(_market_config(**CASES["two forces, spread widths"]), seed=3, mesa=False).run(2)
    assert calls == [False, False]  # one stiffness per trader: the kernel declines
    calls.clear()
    build_market(_market_config(**CASES["summed forces"]), seed=3, mesa=False).run(2)
    assert calls == []  # a width rule: the general path, without asking the kernel


@pytest.mark.filterwarnings("ignore:.*trading network hold only:RuntimeWarning")
@pytest.mark.parametrize("elapsed", [0.25, 3.0])
def test_the_fused_drift_pass_steps_over_elapsed_time_as_numpy_does(monkeypatch, elapsed):
    # Event mode steps the drift over the time since the last step (MarketState.elapsed).
    from propensim.markets import stages

    seen = []
    step_drift = stages.drift

    def keep(market, outcome):
        seen.append(outcome)
        return step_drift(market, outcome)

    monkeypatch.setattr(stages, "drift", keep)
    results = []
    for how in ("numpy", "numba"):
        monkeypatch.setenv("PROPENSIM_KERNELS", how)
        market = build_market(_market_config(**CASES["anchor and outcome"]), seed=8, mesa=False)
        market.run(2)
        assert seen[-1].traded.any()  # an outcome with trades and misses
        market.state.elapsed = elapsed
        acceleration.activate(how == "numba")
        try:
            rng = np.random.default_rng(4)
            results.append(market.drift.apply(market.state, seen[-1], rng))
        finally:
            acceleration.activate(None)
    (mu0, sigma0), (mu1, sigma1) = results
    assert np.array_equal(mu0, mu1) and np.array_equal(sigma0, sigma1)


@pytest.mark.parametrize("n", [1, 2, 7, 500, 4096])
def test_turn_order_bucket_sort_matches_a_stable_argsort(forced, n):
    # Reference: numpy's stable argsort (equal keys in position order), with ties forced in.
    from propensim.plugins import numba_loops

    rng = np.random.default_rng(n)
    key = rng.random(n)
    if n > 2:
        key[rng.integers(0, n, n // 3)] = key[0]  # ties
        key[-1] = np.nextafter(1.0, 0.0)  # the largest key below one
    assert np.array_equal(numba_loops._ascending(key), np.argsort(key, kind="stable"))
