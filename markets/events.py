"""Continuous time: trade as a stochastic reaction system, simulated exactly.

Every buyer-seller edge of the trading network is a *channel*. Channel ``e = (b, s)`` fires at
rate::

    a_e = lambda_e * peak J_e        (while the seller has stock and the buyer has cash)

where ``peak J_e`` is the peak of the pair's joint curve ``J(x) = P_b(x) P_s(x)`` (the chance that
a meeting trades, MODEL.md section 3) and ``lambda_e`` the meeting rate of the pair (one number,
or one per trader with ``lambda_e = sqrt(lambda_b lambda_s)``). An event is one unit trade at a
price drawn from the pair's normalised joint curve; stock and cash move; only the channels that
touch the two traders can change, and they change only when the seller runs out of stock or the
buyer out of cash, which takes all of that trader's channels out of the sum. A buyer who cannot
pay the drawn price refuses (a meeting, no trade; counted in :attr:`EventMarket.refused`).

Two exact methods choose the next event (``method``):

``"direct"``
    Gillespie's direct method: ``tau ~ Exp(a0)``, then a linear walk over the channels' cumulative
    rates. O(n) per event; the reference.
``"tree"`` (default)
    The same two draws, with the channel found in a sum tree of 16 children per node: O(log n)
    per event and per changed rate, ``log16 n`` levels of one or two cache lines each. Chosen
    over the next-reaction method (Gibson and Bruck 2000), which also gives O(log n) but needs
    an indexed priority queue and an exponential per changed channel, and over
    composition-rejection (Slepoy, Thompson and Plimpton 2008), whose O(1) selection needs rate
    groups by powers of two and rejection draws. Here rates are set once per drift step and
    change only when a channel dies, so the tree's sums are cheap to keep exact, it costs about
    16/15 of a float per channel, and for the same uniforms it picks the same channel as the
    direct method (both walk the channels in the same order), which the tests use.

**Drift contract.** Curves stay put between drift steps. A drift step happens at every window
boundary (or every ``drift_every`` time units, and always at a window's end) and integrates the
drift rule exactly over the elapsed time: the market sets ``state.elapsed`` to the time since the
last step (in round units: one round = one time unit) and calls ``drift.apply(state, outcome,
rng)`` with the trades since the last step as ``outcome``; rules integrate over
``rule.dt * state.elapsed`` (their exact Ornstein-Uhlenbeck step). After a step every channel's
rate is recomputed from the new curves. Holding the curves between steps is an operator
splitting: the trade process is exact given the curves, and the coupling error vanishes as
``drift_every`` shrinks.

Checks, ledger and metrics are those of the round mode: every chunk of trades passes
:func:`~propensim.plugins.trade_checks.check_trades` against the state it started from (network
edges, the seller's stock, the buyer's cash) before it is applied with
:func:`~propensim.plugins.trade_checks.apply_trades`; the ledger has a ``time`` column; the
metric plugins measure every ``window`` of time as if it were a round.

References
----------
D. T. Gillespie, "Exact stochastic simulation of coupled chemical reactions", J. Phys. Chem.
81:2340-2361 (1977). M. A. Gibson and J. Bruck, J. Phys. Chem. A 104:1876-1889 (2000).
A. Slepoy, A. P. Thompson and S. J. Plimpton, J. Chem. Phys. 128:205101 (2008).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from contextlib import contextmanager

import numpy as np

from propensim.agents.population import SELLER, Population
from propensim.markets.build import (
    build_drift,
    build_interventions,
    build_population_and_network,
    spawn_streams,
)
from propensim.markets.schedule import TraderRemoval
from propensim.plugins.metrics import (
    DeadweightLoss,
    FixedEfficiency,
    MetricBatch,
    measure_row,
)
from propensim.plugins.trade_checks import check_trades, settle_trades
from propensim.plugins.types import MarketState, RoundOutcome, Trades, TradingNetwork

__all__ = ["METHODS", "EventMarket", "build_event_market", "simulate_reactions"]

#: Channel-selection methods.
METHODS = ("direct", "tree")
#: Trades per compiled call (the ledger grows by this many rows at a time).
CHUNK = 1 << 16
#: Bytes per kept ledger row (time, edge, price, and the buyer and seller columns it unpacks to).
LEDGER_BYTES = 40
#: Bytes per channel: endpoints (twice), price mean and sd, seller index, rate and tree share,
#: and the temporaries of a rebuild.
CHANNEL_BYTES = 8 * 14
#: Unit quantities of one chunk of trades (read only: trades hold views of it).
_ONES = np.ones(CHUNK, dtype=np.int64)
_ONES.flags.writeable = False
#: A buyer's units are not limited within a window (one round's capacity means nothing here).
_NO_LIMIT = np.int64(1) << 62


def _kernels():
    from propensim.markets import _event_kernels

    return _event_kernels


def _method_code(method: str) -> int:
    k = _kernels()
    return {"direct": k.DIRECT, "tree": k.TREE}[method]


def available_memory() -> float:
    """Bytes of memory available to new allocations (``MemAvailable``; inf if unknown)."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) * 1024.0
    except OSError:
        pass
    return math.inf


def _check_number(name: str, value, *, low: float = 0.0, strict: bool = False) -> float:
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number, got {value!r}") from None
    ok = math.isfinite(x) and (x > low if strict else x >= low)
    if not ok:
        raise ValueError(
            f"{name} must be {'>' if strict else '>='} {low:g} and finite, got {value!r}"
        )
    return x


def _check_whole(name: str, value, minimum: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < minimum:
        raise ValueError(f"{name} must be a whole number >= {minimum}, got {value!r}")
    return int(value)


class EventMarket(TraderRemoval):
    """A market in continuous time: one channel per buyer-seller edge, simulated exactly.

    Parameters
    ----------
    population : Population
        Trader columns; the market owns it and writes stock, cash, ``mu`` and ``sigma``.
    network : TradingNetwork
        Buyer-seller edges (the channels) over the same rows.
    drift : DriftRule, optional
        Applied at window boundaries (or every ``drift_every``) over the elapsed time.
    metrics : sequence of Metric or of str, optional
        Measured per window; defaults to the round mode's default metrics.
    seed : int or SeedSequence, optional
        Root of the run's streams (events draw from ``clearing``, drift from ``drift``).
    rate : float or ndarray of shape (n,)
        Meeting rate ``lambda`` (per time unit, >= 0, finite): one for every pair, or one per
        trader (a pair meets at ``sqrt(lambda_b lambda_s)``).
    method : {"tree", "direct"}
        Channel selection (see the module docstring).
    horizon : float
        Simulated time at which the run stops (> 0).
    window : float, optional
        Length of the time windows metrics are measured over (default: the horizon; at most the
        horizon).
    drift_every : float, optional
        Time between drift steps (default: the window).
    max_events : int
        Trade budget: the run stops, with a warning, when it reaches this many trades.
    keep_ledger : bool
        Keep every trade (round = window, time, buyer, seller, price, quantity).
    traders_every : int
        Record every trader's state every this many windows (0: never).

    Attributes
    ----------
    time : float
        Simulated time reached.
    events, refused : int
        Trades made, and meetings a buyer refused because it could not pay the price.
    stop_reason : str or None
        ``"horizon"``, ``"max_events"`` or ``"no_channels"`` once the run has stopped.
    """

    def __init__(
        self,
        population: Population,
        network: TradingNetwork,
        drift=None,
        metrics: Sequence | None = None,
        *,
        seed=None,
        rate=1.0,
        method: str = "tree",
        horizon: float = 1.0,
        window: float | None = None,
        drift_every: float | None = None,
        max_events: int = 10_000_000,
        keep_ledger: bool = True,
        traders_every: int = 0,
        keep_totals: bool = False,
        interventions: Sequence = (),
    ) -> None:
        from propensim.markets.build import intervention_streams
        from propensim.markets.engine import _equilibrium_price, _resolve_metrics
        from propensim.markets.schedule import PricePolicy, Schedule

        streams = spawn_streams(seed)
        if not isinstance(network, TradingNetwork):
            raise ValueError(f"network must be a TradingNetwork, got {type(network).__name__}")
        if network.n != len(population):
            raise ValueError(
                f"network has {network.n} traders but population has {len(population)}; "
                "they must match"
            )
        if method not in METHODS:
            raise ValueError(f"method must be one of {', '.join(METHODS)}; got {method!r}")
        self.horizon = _check_number("horizon", horizon, strict=True)
        self.window = (
            self.horizon if window is None else _check_number("window", window, strict=True)
        )
        if self.window > self.horizon:
            raise ValueError(f"window must be <= horizon ({self.horizon:g}), got {window!r}")
        self.drift_every = (
            self.window
            if drift_every is None
            else _check_number("drift_every", drift_every, strict=True)
        )
        self.max_events = _check_whole("max_events", max_events)
        self.traders_every = _check_whole("traders_every", traders_every, 0)
        self.population = population
        self.network = network
        self.drift = drift
        self.metrics = _resolve_metrics(metrics)
        for name, metric in self.metrics:
            refusal = metric_refusal(name, type(metric))
            if refusal:
                raise ValueError(f"metrics: {refusal}")
        self.metric_batch = MetricBatch.of(self.metrics)  # built-in metrics in one call
        self.method = method
        self.keep_ledger = bool(keep_ledger)
        self.rate = rate
        self._lam_trader = self._trader_rates(rate)
        self._rng = streams["clearing"]
        self._rng_drift = streams["drift"]
        self._is_seller = population.role == SELLER  # shape: (n,) roles never change
        self.n_windows = max(1, math.ceil(self.horizon / self.window - 1e-9))
        self.time = 0.0
        self.round = 0  # windows completed
        self.events = 0
        self.refused = 0
        self.stop_reason: str | None = None
        self._last_drift = 0.0
        self._since_drift: list[Trades] = []
        self._rows: list[dict[str, float]] = []
        self._ledger: list[tuple[int, np.ndarray, Trades]] = []
        self._snapshots: list[dict[str, np.ndarray]] = []
        self.keep_totals = bool(keep_totals)
        self._surplus = np.zeros(len(population))  # shape: (n,) each trader's surplus so far
        self._units = np.zeros(len(population), dtype=np.int64)
        self.state = MarketState(
            population=population,
            network=network,
            round=0,
            equilibrium_price=_equilibrium_price(population),
            round_capacity=False,  # holdings carry over; capacity does not limit a window
        )
        self.clearing = None  # the channels are the clearing rule
        self.policy = PricePolicy()
        self.treasury = 0.0
        self.present = np.ones(len(population), dtype=bool)
        self.initial_degree = network.degree.copy()
        interventions = list(interventions)
        self.schedule = Schedule(interventions, intervention_streams(seed, len(interventions)))
        for i, item in enumerate(interventions):
            name = getattr(item, "plugin_name", type(item).__name__)
            if type(item).__name__ in _NOT_IN_EVENTS:
                raise ValueError(
                    f"interventions[{i}] ({name}): not available in event mode; allowed: "
                    "interventions that change traders, the network, values or per-unit taxes"
                )
        self.schedule.validate(self)
        self._check_memory()
        self._setup_channels()

    # -- set-up ----------------------------------------------------------------------------
    def _trader_rates(self, rate) -> np.ndarray | float:
        n = len(self.population)
        arr = np.asarray(rate, dtype=float)
        if arr.ndim == 0:
            return _check_number("rate", float(arr))
        if arr.shape != (n,):
            raise ValueError(
                f"rate must be a number or one per trader ({n}), got shape {arr.shape}"
            )
        bad = ~np.isfinite(arr) | (arr < 0)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise ValueError(
                f"rate must be >= 0 and finite for every trader; trader {i} has {arr[i]!r}"
            )
        return arr

    def _check_memory(self) -> None:
        need = self.network.n_edges * CHANNEL_BYTES + len(self.population) * 64
        have = available_memory()
        if need > 0.8 * have:
            raise MemoryError(
                f"{self.network.n_edges} channels need about {need / 2**30:.2f} GiB but about "
                f"{have / 2**30:.2f} GiB is available; use a sparser network or fewer traders"
            )

    # -- the one place that changes the market (interventions call these) ------------------
    def replace_network(self, network: TradingNetwork) -> None:
        """Put a new network in place (same traders); every channel is rebuilt from it."""
        if network.n != len(self.population):
            raise ValueError(
                f"network has {network.n} traders but population has {len(self.population)}"
            )
        self.network = network
        self.state.network = network
        self.state.cache.clear()
        self._setup_channels()

    def replace_population(self, population: Population, network: TradingNetwork | None = None):
        """Put a new population in place (rows kept in order, new rows appended) and rebuild.

        New rows get the mean of the per-trader meeting rates when rates are per trader.
        """
        from propensim.markets.engine import _equilibrium_price

        old_n, n = len(self.population), len(population)
        network = self.network if network is None else network
        if network.n != n:
            raise ValueError(f"network has {network.n} traders but population has {n}")
        if n < old_n or np.any(population.role[:old_n] != self.population.role):
            raise ValueError("a population may only grow, keeping every existing trader's role")
        if not isinstance(self._lam_trader, float) and n > old_n:
            extra = np.full(n - old_n, float(self._lam_trader.mean()))
            self._lam_trader = np.concatenate([self._lam_trader, extra])
        grow = n - old_n
        self.present = np.concatenate([self.present, np.ones(grow, dtype=bool)])
        self.initial_degree = np.concatenate([self.initial_degree, np.zeros(grow, np.int64)])
        self._surplus = np.concatenate([self._surplus, np.zeros(grow)])
        self._units = np.concatenate([self._units, np.zeros(grow, np.int64)])
        self.population = population
        self.network = network
        self._is_seller = population.role == SELLER
        self.state.population = population
        self.state.network = network
        self.state.cache.clear()
        self.state.equilibrium_price = _equilibrium_price(population)
        self._setup_channels()

    def _setup_channels(self) -> None:
        net, k = self.network, _kernels()
        self._buyer = net.buyer  # shape: (n_edges,) sorted by buyer: a buyer's channels in a run
        self._seller = net.seller
        self._buyer_ptr = net.buyer_ptr  # shape: (n + 1,)
        order = np.argsort(self._seller, kind="stable")  # shape: (n_edges,)
        counts = np.bincount(self._seller, minlength=net.n)
        self._seller_ptr = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
        self._seller_edges = order.astype(np.int64)
        n_e = net.n_edges
        self._code = _method_code(self.method)
        self._off, self._size = k.tree_layout(n_e)
        self._rates = np.zeros(k.sum_length(self._code, n_e))
        # shape: (n_edges, 4): price mean, price sd, buyer, seller (one row per channel)
        self._chan = np.empty((n_e, 4))
        self._chan[:, 2] = self._buyer
        self._chan[:, 3] = self._seller
        self._acc = np.zeros(1)
        self._counters = np.zeros(1, dtype=np.int64)
        self._stock = self.population.stock.copy()
        self._cash = self.population.cash.copy()
        self._rebuild()
        # Expected trades if the rates stayed as they start: a window's trades are held until its
        # metrics are measured, and the ledger keeps them all.
        span = self.horizon if self.keep_ledger else self.window
        expected = min(float(self.max_events), self.total_rate * span)
        need, have = expected * LEDGER_BYTES, available_memory()
        if need > 0.8 * have:
            what = "the ledger" if self.keep_ledger else "one window"
            raise MemoryError(
                f"{what} of about {expected:.3g} trades needs about {need / 2**30:.2f} GiB but "
                f"about {have / 2**30:.2f} GiB is available; lower events.horizon, events.window "
                "or events.max_events, or keep no ledger (collect.ledger = false)"
            )

    def _rebuild(self) -> None:
        """Recompute every channel's rate and price law from the curves, stock and cash now."""
        pop, k = self.population, _kernels()
        b, s = self._buyer, self._seller
        if isinstance(self._lam_trader, float):
            lam = self._lam_trader
        else:
            lam = np.sqrt(self._lam_trader[b] * self._lam_trader[s])  # shape: (n_edges,)
        self._analytic = pop.curve == "normal"
        if self._analytic:
            with self._taxed_curves():  # under a tax each side judges what it keeps of a price
                mu_b, mu_s = pop.mu[b], pop.mu[s]  # shape: (n_edges,)
            vb, vs = np.square(pop.sigma[b]), np.square(pop.sigma[s])
            total = vb + vs
            peak = pop.activity[b] * pop.activity[s] * np.exp(-np.square(mu_b - mu_s) / (2 * total))
            self._chan[:, 0] = (mu_b * vs + mu_s * vb) / total  # Bromiley (2003)
            self._chan[:, 1] = np.sqrt(vb * vs / total)
            del vb, vs, total, mu_b, mu_s
        else:
            from propensim.agents.joint_curve import joint

            with self._taxed_curves():
                peak = np.asarray(joint(pop.curves(b), pop.curves(s)).peak, dtype=float)
            self._chan[:, :2] = 0.0  # prices are drawn after each chunk instead
        self._with_cash = self._analytic
        if not self._analytic and np.isfinite(pop.cash[pop.role == 0]).any():
            raise ValueError(
                f"event mode with budgets (finite cash) needs normal curves, got curve "
                f"{pop.curve!r}; allowed: cash = inf, or curve = 'normal'"
            )
        np.copyto(self._stock, pop.stock)
        np.copyto(self._cash, pop.cash)
        alive = pop.stock[s] > 0  # shape: (n_edges,) a seller needs stock
        alive &= pop.cash[b] > 0  # and a buyer cash
        leaves = lam * peak * alive  # shape: (n_edges,)
        k.build_sum(
            self._code,
            np.ascontiguousarray(leaves, dtype=float),
            self._rates,
            self._off,
            self._size,
            self._acc,
        )

    @contextmanager
    def _taxed_curves(self):
        """Shift curves by the per-unit taxes in force while the block runs, as round mode does.

        A buyer who pays ``price + buyer_tax`` accepts a price as its curve accepts what it pays:
        its curve sits ``buyer_tax`` lower; a seller's sits ``seller_tax`` higher (MODEL.md
        section 9). The joint curve of the shifted curves gives the rate and the market price.
        """
        pop, policy = self.population, self.policy
        if not (policy.buyer_tax or policy.seller_tax):
            yield
            return
        saved = pop.mu.copy()
        pop.mu += np.where(pop.role == SELLER, policy.seller_tax, -policy.buyer_tax)
        try:
            yield
        finally:
            np.copyto(pop.mu, saved)

    @property
    def total_rate(self) -> float:
        """Sum of the live channels' rates now (events per time unit)."""
        return float(self._acc[0])

    # -- running ---------------------------------------------------------------------------
    def advance(self, windows: int | None = None) -> None:
        """Run ``windows`` more windows (default: all), never past the horizon or the budget."""
        if windows is None:
            windows = self.n_windows
        _check_whole("windows", windows, 0)
        for _ in range(int(windows)):
            if self.stop_reason is not None:
                return
            self.step()

    def run(self, windows: int | None = None):
        """Run (default: to the horizon) and return the window table (see :meth:`rounds_frame`)."""
        self.advance(windows)
        return self.rounds_frame()

    def step(self) -> None:
        """Run one time window: events (checked and applied chunk by chunk), drift, metrics."""
        w = self.round
        end = min((w + 1) * self.window, self.horizon)
        if w + 1 >= self.n_windows:
            end = self.horizon
        self.state.round = w
        if len(self.schedule) and self.schedule.act(self, w):  # interventions due at this window
            if math.isfinite(self.policy.floor) or math.isfinite(self.policy.ceiling):
                raise ValueError("price bounds are not available in event mode")
            self._rebuild()  # values, holdings or curves may have changed
        parts: list[Trades] = []
        times: list[np.ndarray] = []
        while self.stop_reason is None:
            stop = min(end, self._last_drift + self.drift_every)
            trades, t = self._segment(stop)
            parts.extend(trades)
            times.extend(t)
            if self.stop_reason is not None:
                break
            if self.time >= end:
                break
            self._drift_step()  # an inner drift step (drift_every < window)
        window_trades = parts[0] if len(parts) == 1 else Trades.concat(parts)
        outcome = _outcome(parts, window_trades, len(self.population))
        if self.keep_totals and len(window_trades):
            pop, t = self.population, window_trades
            np.add.at(self._surplus, t.buyer, pop.value[t.buyer] - outcome.buyer_pays)
            np.add.at(self._surplus, t.seller, outcome.seller_gets - pop.value[t.seller])
            np.add.at(self._units, t.buyer, 1)
            np.add.at(self._units, t.seller, 1)
        self._drift_step()  # the window's end is always a drift step
        row: dict[str, float] = {"round": w, "time": self.time}
        measure_row(row, self.metrics, self.metric_batch, self.state, outcome)
        self._rows.append(row)
        if self.keep_ledger and len(window_trades):
            self._ledger.append((w, times[0] if len(times) == 1 else np.concatenate(times),
                                 window_trades))  # fmt: skip
        if self.traders_every and w % self.traders_every == 0:
            pop = self.population
            self._snapshots.append(
                {
                    "round": np.full(len(pop), w),
                    "time": np.full(len(pop), self.time),
                    "trader": np.arange(len(pop)),
                    "mu": pop.mu.copy(),
                    "sigma": pop.sigma.copy(),
                    "stock": pop.stock.copy(),
                    "cash": pop.cash.copy(),
                    "traded": outcome.traded,
                }
            )
        if len(window_trades):
            q = window_trades.quantity
            self.state.last_price = float((window_trades.price * q).sum() / q.sum())
        self.round += 1
        if self.stop_reason is None and self.round >= self.n_windows:
            self.stop_reason = "horizon"

    def _segment(self, stop: float) -> tuple[list[Trades], list[np.ndarray]]:
        """Run events until time ``stop`` (or the budget); check and apply them chunk by chunk."""
        k = _kernels()
        parts, times = [], []
        while True:
            cap = min(CHUNK, self.max_events - self.events)
            if cap <= 0:
                self._stop_at_budget()
                break
            out_time = np.empty(cap)
            out_edge = np.empty(cap, dtype=np.int64)
            out_price = np.empty(cap)
            self._counters[0] = 0
            got, t, status = k.run_market(
                self._code, self._rates, self._off, self._size, self._acc,
                self._chan,
                self._buyer_ptr, self._seller_ptr, self._seller_edges,
                self._stock, self._cash, self._with_cash,
                float(self.policy.buyer_tax), float(self.policy.seller_tax),
                float(self.time), float(stop), int(cap), self._rng,
                out_time, out_edge, out_price, self._counters,
            )  # fmt: skip
            self.refused += int(self._counters[0])
            self.time = float(t)
            if got:
                trades = self._settle(out_time[:got], out_edge[:got], out_price[:got])
                parts.append(trades)
                if self.keep_ledger:
                    times.append(out_time[:got])
                if self.drift is not None:
                    self._since_drift.append(trades)
            if status == 2:  # no live channel: nothing happens until the next drift step
                self.time = float(stop)
                break
            if status == 0:
                break
            if self.events >= self.max_events:
                self._stop_at_budget()
                break
        return parts, times

    def _stop_at_budget(self) -> None:
        self.stop_reason = "max_events"
        warnings.warn(
            f"event budget reached: max_events = {self.max_events} trades by time "
            f"{self.time:.6g} of horizon {self.horizon:g}; the run stops there "
            "(raise events.max_events to go on)",
            RuntimeWarning,
            stacklevel=4,
        )

    def _settle(self, t: np.ndarray, edge: np.ndarray, price: np.ndarray) -> Trades:
        """Check one chunk against the state it started from, then apply it."""
        pop = self.population
        b, s = self._buyer[edge], self._seller[edge]
        if not self._with_cash:
            from propensim.agents.joint_curve import joint

            with self._taxed_curves():
                price = np.asarray(joint(pop.curves(b), pop.curves(s)).sample_price(self._rng))
        # the kernel's output buffers are fresh for every chunk: the trades may keep them
        trades = Trades(b, s, price, _ONES[: edge.shape[0]], edge)
        self.state.remaining = np.where(self._is_seller, pop.stock, _NO_LIMIT)
        check_trades(self.state, trades)
        bt, st = float(self.policy.buyer_tax), float(self.policy.seller_tax)
        if bt or st:  # a per-unit tax (subsidy): the wedge goes to (comes from) the treasury
            pays, gets = trades.price + bt, trades.price - st
            trades.buyer_pays, trades.seller_gets = pays, gets
            settle_trades(pop, trades, pays, gets)
            self.treasury += (bt + st) * len(trades)
        else:
            settle_trades(pop, trades)
        if not np.array_equal(pop.stock, self._stock) or (
            self._with_cash and not np.array_equal(pop.cash, self._cash)
        ):
            raise RuntimeError("event kernel and trade ledger disagree on stock or cash")
        if not self._with_cash:
            np.copyto(self._cash, pop.cash)
        self.events += len(trades)
        return trades

    def _drift_step(self) -> None:
        elapsed = self.time - self._last_drift
        parts, self._since_drift = self._since_drift, []
        self._last_drift = self.time
        if self.drift is None or elapsed <= 0:
            return
        pop, state = self.population, self.state
        outcome = _outcome(parts, Trades.concat(parts), len(pop))
        with _elapsed(state, elapsed):
            mu, sigma = self.drift.apply(state, outcome, self._rng_drift)
        pop.mu[:] = mu
        pop.sigma[:] = sigma
        self._rebuild()

    # -- results ---------------------------------------------------------------------------
    def rounds_columns(self) -> dict[str, np.ndarray]:
        """The window table as columns: ``round`` (window), ``time`` (its end), one per metric."""
        out = {
            "round": np.array([r["round"] for r in self._rows], dtype=np.int64),
            "time": np.array([r["time"] for r in self._rows], dtype=float),
        }
        for name, _ in self.metrics:
            out[name] = np.array([r[name] for r in self._rows], dtype=float)
        return out

    def rounds_frame(self):
        """One row per window (a pandas DataFrame)."""
        import pandas as pd

        return pd.DataFrame(self.rounds_columns())

    def ledger_columns(self) -> dict[str, np.ndarray]:
        """Every kept trade: round (window), time, buyer, seller, price, quantity."""
        if not self._ledger:
            z = np.zeros(0, np.int64)
            return {"round": z, "time": np.zeros(0), "buyer": z, "seller": z,
                    "price": np.zeros(0), "quantity": z}  # fmt: skip
        return {
            "round": np.concatenate([np.full(len(tr), w) for w, _, tr in self._ledger]),
            "time": np.concatenate([t for _, t, _ in self._ledger]),
            "buyer": np.concatenate([tr.buyer for *_, tr in self._ledger]),
            "seller": np.concatenate([tr.seller for *_, tr in self._ledger]),
            "price": np.concatenate([tr.price for *_, tr in self._ledger]),
            "quantity": np.concatenate([tr.quantity for *_, tr in self._ledger]),
        }

    def ledger_frame(self):
        """The ledger as a pandas DataFrame."""
        import pandas as pd

        return pd.DataFrame(self.ledger_columns())

    def traders_columns(self) -> dict[str, np.ndarray]:
        """Sampled trader states (every ``traders_every`` windows), long format."""
        if not self._snapshots:
            z = np.zeros(0, np.int64)
            return {"round": z, "time": np.zeros(0), "trader": z, "mu": np.zeros(0),
                    "sigma": np.zeros(0), "stock": z, "cash": np.zeros(0), "traded": z}  # fmt: skip
        return {
            key: np.concatenate([s[key] for s in self._snapshots]) for key in self._snapshots[0]
        }

    def traders_frame(self):
        """Sampled trader states as a pandas DataFrame."""
        import pandas as pd

        return pd.DataFrame(self.traders_columns())

    def totals_columns(self) -> dict[str, np.ndarray]:
        """Each trader's surplus and units over the run, with the columns that group traders."""
        from propensim.agents.population import ROLE_NAMES
        from propensim.markets.engine import _quartiles

        pop = self.population
        n = len(pop)
        out = {
            "trader": np.arange(n, dtype=np.int64),
            "role": np.array(ROLE_NAMES, dtype=object)[pop.role].astype(str),
            "degree_quartile": _quartiles(self.initial_degree),
            "left": (~self.present).astype(np.int64),
        }
        for key, values in self.network.attributes.items():
            if values.shape == (n,):
                out[key] = values
        out["surplus"] = self._surplus.copy()
        out["units"] = self._units.copy()
        return out

    def summary(self) -> dict[str, float]:
        """One number per metric over the windows run so far, by each metric's ``aggregate``."""
        from propensim.markets.recorder import aggregate

        out: dict[str, float] = {}
        for name, metric in self.metrics:
            vals = np.array([row[name] for row in self._rows], dtype=float)
            out[name] = aggregate(vals, getattr(metric, "aggregate", "mean"))
        return out


#: Interventions that need the round's clearing rule (price bounds, another rule).
_NOT_IN_EVENTS = ("PriceCeiling", "PriceFloor", "SwitchClearing")
#: Metrics whose benchmark is one round of the market with holdings restored every round.
_ROUND_BENCHMARK_METRICS = (FixedEfficiency, DeadweightLoss)


def metric_refusal(name: str, cls) -> str | None:
    """Why event mode refuses the metric ``name`` of class ``cls``, or None if it is allowed."""
    if isinstance(cls, type) and issubclass(cls, _ROUND_BENCHMARK_METRICS):
        return (
            f"{name!r} is not available in event mode (its benchmark is a round's largest "
            "surplus, with holdings restored every round; here they carry over); allowed: "
            "efficiency, total_surplus and the other metrics"
        )
    return None


def _outcome(parts: list[Trades], trades: Trades, n: int) -> RoundOutcome:
    """The outcome of ``trades`` (the concatenation of ``parts``), taxes included."""
    if not any(hasattr(p, "buyer_pays") for p in parts):
        return RoundOutcome.from_trades(trades, n)
    pays = np.concatenate([getattr(p, "buyer_pays", p.price) for p in parts])
    gets = np.concatenate([getattr(p, "seller_gets", p.price) for p in parts])
    return RoundOutcome.from_trades(trades, n, pays, gets, float((pays - gets).sum()))


@contextmanager
def _elapsed(state: MarketState, elapsed: float):
    """Let ``drift.apply`` integrate over ``elapsed`` time units (``MarketState.elapsed``)."""
    old = state.elapsed
    state.elapsed = float(elapsed)
    try:
        yield
    finally:
        state.elapsed = old


#: Options of the ``events`` section and their defaults.
EVENT_DEFAULTS = {
    "rate": 1.0,
    "method": "tree",
    "horizon": 1.0,
    "window": None,
    "drift_every": None,
    "max_events": 10_000_000,
}


def build_event_market(config: Mapping, seed=None) -> EventMarket:
    """Build an :class:`EventMarket` from a configuration (the shape a spec file resolves to).

    Parameters
    ----------
    config : mapping
        As for :func:`~propensim.markets.build_market` (``population``, ``network``, ``drift``,
        ``metrics``, ``market``: ``keep_ledger``, ``traders_every``), plus ``events``: ``rate``
        (a number, or a distribution spec as for population columns, drawn once per trader from
        the population stream), ``method`` (``tree`` or ``direct``), ``horizon``, ``window``,
        ``drift_every``, ``max_events``. ``clearing`` is not used: each channel trades at its
        joint curve. ``market.replenish`` is not used: holdings carry over in continuous time.
    seed : int or SeedSequence
        Root seed; population and network come from their own streams exactly as in round mode,
        so an event run and a round run with the same seed start from the same market.
    """
    from propensim.agents.population import _draw

    streams = spawn_streams(seed)
    population, network = build_population_and_network(config, streams)
    drift = build_drift(config.get("drift"))
    ev = {**EVENT_DEFAULTS, **dict(config.get("events") or {})}
    unknown = sorted(set(ev) - set(EVENT_DEFAULTS))
    if unknown:
        raise ValueError(
            f"events.{unknown[0]} is not an option; allowed: {', '.join(EVENT_DEFAULTS)}"
        )
    rate = ev["rate"]
    if not (isinstance(rate, int | float) and not isinstance(rate, bool)):
        rate = _draw("rate", rate, len(population), streams["population"])
    options = dict(config.get("market") or {})
    return EventMarket(
        population,
        network,
        drift,
        config.get("metrics"),
        seed=seed,
        rate=rate,
        method=ev["method"],
        horizon=ev["horizon"],
        window=ev["window"],
        drift_every=ev["drift_every"],
        max_events=ev["max_events"],
        keep_ledger=bool(options.get("keep_ledger", True)),
        traders_every=int(options.get("traders_every", 0) or 0),
        keep_totals=bool(options.get("keep_totals", False)),
        interventions=build_interventions(config.get("interventions")),
    )


def simulate_reactions(
    const,
    reactant,
    changes: Sequence[Sequence[tuple[int, int]]],
    x0,
    t_end: float,
    *,
    method: str = "tree",
    rng: np.random.Generator | int | None = None,
    max_events: int = 10_000_000,
):
    """Gillespie's process for a reaction network of order 0 and 1, on the market's event core.

    The same compiled selection (direct walk or sum tree) and dependency-limited updates as
    :class:`EventMarket`, for channels whose propensity is ``const[j]`` (``reactant[j] < 0``) or
    ``const[j] * x[reactant[j]]``. Used to check the core against published results (e.g. an
    immigration-death process has a Poisson stationary law).

    Parameters
    ----------
    const : array of float, shape (n_channels,)
        Rate constants (>= 0).
    reactant : array of int, shape (n_channels,)
        Species whose count multiplies the constant, or -1.
    changes : sequence of sequences of (species, amount)
        What each channel does to the counts.
    x0 : array of int
        Initial counts.
    t_end : float
        Time to simulate to (> 0).
    method : {"tree", "direct"}
    rng : Generator or seed
    max_events : int
        Most events (a warning says when the budget stops the run).

    Returns
    -------
    times : ndarray, shape (n_events,)
    channels : ndarray of int64, shape (n_events,)
    x : ndarray of int64
        Counts at the end.

    References
    ----------
    D. T. Gillespie, J. Phys. Chem. 81:2340-2361 (1977).
    """
    k = _kernels()
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}; got {method!r}")
    rng = np.random.default_rng(rng)
    const = np.asarray(const, dtype=float)
    reactant = np.asarray(reactant, dtype=np.int64)
    x = np.array(x0, dtype=np.int64)
    n = const.shape[0]
    if reactant.shape != (n,) or len(changes) != n:
        raise ValueError("const, reactant and changes must have one entry per channel")
    if not (np.isfinite(const).all() and (const >= 0).all()):
        raise ValueError("const must be >= 0 and finite")
    _check_number("t_end", t_end, strict=True)
    _check_whole("max_events", max_events)
    change_ptr = np.cumsum([0] + [len(c) for c in changes]).astype(np.int64)
    change_species = np.array([sp for c in changes for sp, _ in c], dtype=np.int64)
    change_amount = np.array([a for c in changes for _, a in c], dtype=np.int64)
    # channel j's firing changes the species it touches: recompute the channels reading them
    deps = []
    for c in changes:
        touched = {sp for sp, _ in c}
        deps.append([d for d in range(n) if reactant[d] in touched])
    dep_ptr = np.cumsum([0] + [len(d) for d in deps]).astype(np.int64)
    dep_channel = np.array([d for row in deps for d in row], dtype=np.int64)
    code = _method_code(method)
    off, size = k.tree_layout(n)
    rates = np.zeros(k.sum_length(code, n))
    acc = np.zeros(1)
    k.build_sum(code, k.reaction_rates(const, reactant, x), rates, off, size, acc)
    times, chans = [], []
    t, done = 0.0, 0
    while done < max_events:
        cap = min(CHUNK * 4, max_events - done)
        out_t, out_c = np.empty(cap), np.empty(cap, dtype=np.int64)
        got, t, status = k.run_reactions(
            code, rates, off, size, acc, const, reactant, change_ptr, change_species, change_amount,
            dep_ptr, dep_channel, x, float(t), float(t_end), int(cap), rng, out_t, out_c,
        )  # fmt: skip
        times.append(out_t[:got])
        chans.append(out_c[:got])
        done += got
        if status != 1:
            break
    else:
        warnings.warn(
            f"event budget reached: max_events = {max_events} by time {t:.6g} of {t_end:g}",
            RuntimeWarning,
            stacklevel=2,
        )
    return np.concatenate(times), np.concatenate(chans), x
