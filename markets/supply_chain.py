"""A shop in continuous time: an (s, S) reorder policy, a lead time, and customers with curves.

The shop posts one price and holds stock. Customers arrive as a Poisson process (``arrival_rate``
per day); each is a member of a customer pool (the population's buyers) drawn at random, and buys
one unit with its propensity at the posted price, ``P_c(price)``. A customer who wants to buy when
the shelf is empty is a lost sale. After every sale the shop reviews its inventory position (on
hand plus on order): at or below the reorder point ``s`` it orders up to ``S``, and the order
arrives ``lead_time`` days later (continuous review, lost sales, no backorders).

A price change moves demand through the customers' curves: the share of arrivals that want to
buy is the pool's mean propensity at the price, ``p = mean_c P_c(price)``, not a point on a fixed
demand line. With stock that never runs out, weekly sales are Poisson with mean and variance
``arrival_rate * 7 * p`` (thinning of a Poisson process).

Time is in days; weeks are 7 days (``week``); a year is 52 weeks (364 days) by default. The
weekly table (one row per week) is what the store keeps as the run's round table.

References
----------
S. M. Ross, *Introduction to Probability Models* (any edition), chapter 5 (Poisson processes;
thinning). H. Scarf, "The optimality of (S, s) policies in the dynamic inventory problem", in
*Mathematical Methods in the Social Sciences*, Stanford University Press (1960) (the policy).
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Mapping

import numpy as np

from propensim.agents.population import BUYER, Population, build_population
from propensim.markets.build import spawn_streams

__all__ = ["SHOP_DEFAULTS", "SHOP_METRICS", "Shop", "build_shop"]

#: Options of the ``shop`` section and their defaults (``initial_stock`` None: ``order_up_to``).
SHOP_DEFAULTS = {
    "price": 5.0,
    "arrival_rate": 20.0,
    "reorder_point": 20,
    "order_up_to": 100,
    "lead_time": 3.0,
    "initial_stock": None,
    "days": 364.0,
    "week": 7.0,
}

#: The figures of :meth:`Shop.summary` (a shop spec's ``collect.metrics`` names some of them).
SHOP_METRICS = (
    "sold",
    "lost",
    "arrivals",
    "wanting",
    "fill_rate",
    "weekly_sales_mean",
    "weekly_sales_var",
    "stockout_weeks",
    "revenue",
    "mean_on_hand",
    "buy_probability",
)

#: Columns of the weekly table, after ``round``.
WEEK_COLUMNS = (
    "day",
    "arrivals",
    "wanting",
    "sold",
    "lost",
    "on_hand",
    "on_order",
    "orders",
    "received",
    "revenue",
)


def _positive(name: str, value, *, strict: bool = True) -> float:
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(x) or (x <= 0 if strict else x < 0):
        raise ValueError(f"{name} must be {'>' if strict else '>='} 0 and finite, got {value!r}")
    return x


def _whole(name: str, value, minimum: int = 0) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < minimum:
        raise ValueError(f"{name} must be a whole number >= {minimum}, got {value!r}")
    return int(value)


class Shop:
    """One shop, one product, one posted price, a pool of customers with propensity curves.

    Parameters
    ----------
    customers : Population
        The customer pool: its buyers' curves (sellers, if any, are not customers).
    price : float
        Posted price (price units, finite).
    arrival_rate : float
        Customers per day (>= 0, finite).
    reorder_point, order_up_to : int
        The (s, S) policy: when on hand plus on order falls to ``s`` or below, order up to ``S``
        (``0 <= s <= S``, ``S >= 1``).
    lead_time : float
        Days from order to delivery (>= 0).
    initial_stock : int, optional
        Units on the shelf at day 0 (default ``S``).
    days, week : float
        Length of the simulation and of a reporting week (days; ``week <= days``).
    seed : int or SeedSequence, optional
        Arrivals and choices draw from the run's ``clearing`` stream.
    keep_ledger : bool
        Keep one row per sale (round = week, time, buyer = customer row, price, quantity).

    Notes
    -----
    Arrivals in a week are drawn as a Poisson count and then uniform times, sorted (the
    conditional law of a Poisson process given its count, Ross ch. 5); whether a customer wants to
    buy does not depend on the stock, so sold + lost equals the customers who wanted to buy,
    week by week (checked every week).
    """

    def __init__(
        self,
        customers: Population,
        *,
        price: float = 5.0,
        arrival_rate: float = 20.0,
        reorder_point: int = 20,
        order_up_to: int = 100,
        lead_time: float = 3.0,
        initial_stock: int | None = None,
        days: float = 364.0,
        week: float = 7.0,
        seed=None,
        keep_ledger: bool = False,
    ) -> None:
        self.price = float(price)
        if not math.isfinite(self.price):
            raise ValueError(f"price must be a finite number, got {price!r}")
        self.arrival_rate = _positive("arrival_rate", arrival_rate, strict=False)
        self.reorder_point = _whole("reorder_point", reorder_point)
        self.order_up_to = _whole("order_up_to", order_up_to, 1)
        if self.reorder_point > self.order_up_to:
            raise ValueError(
                f"reorder_point must be <= order_up_to ({self.order_up_to}), got {reorder_point!r}"
            )
        self.lead_time = _positive("lead_time", lead_time, strict=False)
        stock0 = self.order_up_to if initial_stock is None else initial_stock
        self.initial_stock = _whole("initial_stock", stock0)
        self.days = _positive("days", days)
        self.week = _positive("week", week)
        if self.week > self.days:
            raise ValueError(f"week must be <= days ({self.days:g}), got {week!r}")
        self.customers = customers
        self.keep_ledger = bool(keep_ledger)
        self._rng = spawn_streams(seed)["clearing"]
        self._pool = np.flatnonzero(customers.role == BUYER)  # shape: (n_customers,)
        if self._pool.size == 0:
            raise ValueError("the customer pool has no buyers; allowed: population.n_buyers >= 1")
        curves = customers.curves(self._pool)
        # shape: (n_customers,) each customer's chance of buying at the posted price
        self.propensity = np.asarray(curves.value(self.price), dtype=float).reshape(-1)
        self.n_weeks = max(1, math.ceil(self.days / self.week - 1e-9))
        self.time = 0.0
        self.round = 0
        self.on_hand = self.initial_stock
        self._orders: deque[tuple[float, int]] = deque()  # (arrival day, units)
        self._rows: list[dict[str, float]] = []
        self._ledger: list[tuple[int, np.ndarray, np.ndarray]] = []
        self._orders_placed = 0
        self._received = 0
        self._review(0.0)

    @property
    def buy_probability(self) -> float:
        """The pool's mean propensity at the posted price: the share of arrivals that buy."""
        return float(self.propensity.mean())

    @property
    def on_order(self) -> int:
        """Units ordered and not yet delivered."""
        return sum(q for _, q in self._orders)

    def _review(self, t: float) -> None:
        """(s, S): order up to S when the inventory position is at or below s."""
        position = self.on_hand + self.on_order
        if position <= self.reorder_point:
            units = self.order_up_to - position
            self._orders.append((t + self.lead_time, units))
            self._orders_placed += 1
            if self.lead_time == 0:
                self._deliver(t)

    def _deliver(self, t: float) -> None:
        while self._orders and self._orders[0][0] <= t:
            _, units = self._orders.popleft()
            self.on_hand += units
            self._received += units

    def step(self) -> None:
        """Simulate one week: arrivals, sales, lost sales, orders and deliveries."""
        w = self.round
        start = w * self.week
        end = self.days if w + 1 >= self.n_weeks else min(start + self.week, self.days)
        rng = self._rng
        count = int(rng.poisson(self.arrival_rate * (end - start)))
        times = np.sort(start + (end - start) * rng.random(count))  # shape: (count,)
        who = self._pool[rng.integers(0, self._pool.size, count)] if count else self._pool[:0]
        wants = rng.random(count) < self.propensity[np.searchsorted(self._pool, who)]
        self._orders_placed = self._received = 0
        sold = lost = 0
        sale_t, sale_who = [], []
        for t, c in zip(times[wants].tolist(), who[wants].tolist(), strict=True):
            self._deliver(t)
            if self.on_hand > 0:
                self.on_hand -= 1
                sold += 1
                sale_t.append(t)
                sale_who.append(c)
                self._review(t)
            else:
                lost += 1
        self._deliver(end)
        wanting = int(wants.sum())
        if sold + lost != wanting:  # every customer who wanted to buy either bought or was lost
            raise RuntimeError(f"week {w}: sold {sold} + lost {lost} != wanting {wanting}")
        self._rows.append(
            {
                "round": w,
                "day": start,
                "arrivals": count,
                "wanting": wanting,
                "sold": sold,
                "lost": lost,
                "on_hand": self.on_hand,
                "on_order": self.on_order,
                "orders": self._orders_placed,
                "received": self._received,
                "revenue": sold * self.price,
            }
        )
        if self.keep_ledger and sold:
            self._ledger.append((w, np.array(sale_t), np.array(sale_who, dtype=np.int64)))
        self.time = end
        self.round += 1

    def advance(self, weeks: int | None = None) -> None:
        """Simulate ``weeks`` more weeks (default: to the end), never past ``days``."""
        weeks = self.n_weeks if weeks is None else _whole("weeks", weeks)
        for _ in range(weeks):
            if self.round >= self.n_weeks:
                return
            self.step()

    def run(self, weeks: int | None = None):
        """Simulate (default: the whole period) and return the weekly table."""
        self.advance(weeks)
        return self.rounds_frame()

    # -- results ---------------------------------------------------------------------------
    def rounds_columns(self) -> dict[str, np.ndarray]:
        """The weekly table as columns: ``round`` (week), then :data:`WEEK_COLUMNS`."""
        out = {"round": np.array([r["round"] for r in self._rows], dtype=np.int64)}
        for name in WEEK_COLUMNS:
            dtype = float if name in ("day", "revenue") else np.int64
            out[name] = np.array([r[name] for r in self._rows], dtype=dtype)
        return out

    def rounds_frame(self):
        """One row per week (a pandas DataFrame)."""
        import pandas as pd

        return pd.DataFrame(self.rounds_columns())

    def ledger_columns(self) -> dict[str, np.ndarray]:
        """One row per sale: round (week), time (day), buyer (customer row), price, quantity."""
        if not self._ledger:
            z = np.zeros(0, np.int64)
            return {
                "round": z,
                "time": np.zeros(0),
                "buyer": z,
                "price": np.zeros(0),
                "quantity": z,
            }
        rounds = np.concatenate([np.full(len(t), w) for w, t, _ in self._ledger])
        return {
            "round": rounds,
            "time": np.concatenate([t for _, t, _ in self._ledger]),
            "buyer": np.concatenate([c for *_, c in self._ledger]),
            "price": np.full(rounds.size, self.price),
            "quantity": np.ones(rounds.size, dtype=np.int64),
        }

    def traders_columns(self) -> dict[str, np.ndarray]:
        """No trader samples (customers do not change)."""
        return {"round": np.zeros(0, np.int64), "trader": np.zeros(0, np.int64)}

    def summary(self) -> dict[str, float]:
        """Totals and weekly statistics over the weeks simulated so far (:data:`SHOP_METRICS`)."""
        cols = self.rounds_columns()
        sold, lost, wanting = cols["sold"], cols["lost"], cols["wanting"]
        n = sold.size
        return {
            "sold": float(sold.sum()),
            "lost": float(lost.sum()),
            "arrivals": float(cols["arrivals"].sum()),
            "wanting": float(wanting.sum()),
            "fill_rate": float(sold.sum() / wanting.sum()) if wanting.sum() else float("nan"),
            "weekly_sales_mean": float(sold.mean()) if n else float("nan"),
            "weekly_sales_var": float(sold.var(ddof=1)) if n > 1 else float("nan"),
            "stockout_weeks": float(np.count_nonzero(lost)),
            "revenue": float(cols["revenue"].sum()),
            "mean_on_hand": float(cols["on_hand"].mean()) if n else float("nan"),
            "buy_probability": self.buy_probability,
        }


def build_shop(config: Mapping, seed=None) -> Shop:
    """Build a :class:`Shop` from a configuration: ``population`` (the customer pool) and ``shop``.

    ``shop`` holds the options of :data:`SHOP_DEFAULTS`; ``market.keep_ledger`` keeps the sales.
    The customer pool comes from the population stream exactly as a market's traders do.
    """
    pop_conf = dict(config.get("population") or {})
    for key in ("n_buyers", "n_sellers"):
        pop_conf.setdefault(key, 0)
    customers = build_population(rng=spawn_streams(seed)["population"], **pop_conf)
    options = {**SHOP_DEFAULTS, **dict(config.get("shop") or {})}
    unknown = sorted(set(options) - set(SHOP_DEFAULTS))
    if unknown:
        raise ValueError(f"shop.{unknown[0]} is not an option; allowed: {', '.join(SHOP_DEFAULTS)}")
    keep = bool((config.get("market") or {}).get("keep_ledger", False))
    return Shop(customers, seed=seed, keep_ledger=keep, **options)
