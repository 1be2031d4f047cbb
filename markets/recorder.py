"""The recorder: what a market keeps of its run (round rows, ledger, trader snapshots, totals).

The market hands it each round's outcome after measuring; the recorder owns every table a run
produces and turns them into columns (name -> array, no pandas needed: workers never import it)
or DataFrames.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from propensim.agents.population import Population
from propensim.plugins.types import RoundOutcome, Trades

LEDGER_COLUMNS = ("round", "buyer", "seller", "price", "quantity")


class Recorder:
    """Round rows, the trade ledger, sampled trader states, and per-trader surplus totals.

    Parameters
    ----------
    metrics : list of (name, Metric)
        The metrics measured every round, in column order.
    traders_every : int
        Keep every trader's state every this many rounds (0: never).
    keep_ledger : bool
        Keep every trade.
    keep_totals : bool
        Accumulate each trader's surplus over the run (for who-gains-and-who-loses comparisons).
    keep_meetings : bool
        Keep every meeting the clearing rule reports, traded or not (for calibration).
    """

    def __init__(
        self,
        metrics: list[tuple[str, Any]],
        *,
        traders_every: int = 0,
        keep_ledger: bool = True,
        keep_totals: bool = False,
        keep_meetings: bool = False,
    ) -> None:
        self.metrics = metrics
        self.keep_meetings = bool(keep_meetings)
        self._meetings: list[tuple[int, tuple]] = []
        self.traders_every = int(traders_every)
        self.keep_ledger = bool(keep_ledger)
        self.keep_totals = bool(keep_totals)
        self._rows: list[dict[str, float]] = []
        self._ledger: list[tuple[int, Trades]] = []
        self._snapshots: list[dict[str, np.ndarray]] = []
        self._surplus: np.ndarray | None = None
        self._units: np.ndarray | None = None

    # -- writing ---------------------------------------------------------------------------
    def record(self, round_: int, row: dict[str, float], pop: Population, outcome: RoundOutcome):
        """Keep one round: its metric row, its trades, a snapshot when due, the totals."""
        self._rows.append(row)
        trades = outcome.trades
        if self.keep_ledger and len(trades):
            self._ledger.append((round_, trades))
        if self.traders_every and round_ % self.traders_every == 0:
            self._snapshots.append(
                {
                    "round": np.full(len(pop), round_),
                    "trader": np.arange(len(pop)),
                    "mu": pop.mu.copy(),
                    "sigma": pop.sigma.copy(),
                    "stock": pop.stock.copy(),
                    "cash": pop.cash.copy(),
                    "traded": outcome.traded,
                }
            )
        if self.keep_totals:
            self._add_totals(pop, outcome)

    def _add_totals(self, pop: Population, outcome: RoundOutcome) -> None:
        n = len(pop)
        if self._surplus is None or self._surplus.shape[0] != n:
            grown = np.zeros(n)
            units = np.zeros(n, dtype=np.int64)
            if self._surplus is not None:  # traders entered: old rows keep their totals
                grown[: self._surplus.shape[0]] = self._surplus
                units[: self._units.shape[0]] = self._units
            self._surplus, self._units = grown, units
        t = outcome.trades
        if len(t) == 0:
            return
        q = t.quantity
        np.add.at(self._surplus, t.buyer, (pop.value[t.buyer] - outcome.buyer_pays) * q)
        np.add.at(self._surplus, t.seller, (outcome.seller_gets - pop.value[t.seller]) * q)
        np.add.at(self._units, t.buyer, q)
        np.add.at(self._units, t.seller, q)

    def record_meetings(self, round_: int, parts: list) -> None:
        """Keep the meetings a clearing rule reported this round (lists of column arrays)."""
        for part in parts:
            self._meetings.append((round_, part))

    # -- reading ---------------------------------------------------------------------------
    def meetings_columns(self) -> dict[str, np.ndarray]:
        """Every recorded meeting: round, buyer, seller, price (NaN if none), traded (0/1)."""
        if not self._meetings:
            return {
                "round": np.zeros(0, np.int64),
                "buyer": np.zeros(0, np.int64),
                "seller": np.zeros(0, np.int64),
                "price": np.zeros(0),
                "traded": np.zeros(0, np.int64),
            }
        cols = list(zip(*(part for _, part in self._meetings), strict=True))
        return {
            "round": np.concatenate([np.full(len(p[0]), r) for r, p in self._meetings]),
            "buyer": np.concatenate(cols[0]).astype(np.int64),
            "seller": np.concatenate(cols[1]).astype(np.int64),
            "price": np.concatenate(cols[2]).astype(float),
            "traded": np.concatenate(cols[3]).astype(np.int64),
        }

    @property
    def rows(self) -> list[dict[str, float]]:
        """The round rows kept so far (one dict per round)."""
        return self._rows

    def rounds_columns(self) -> dict[str, np.ndarray]:
        """The round table as columns: ``round`` and one column per metric."""
        out = {"round": np.array([row["round"] for row in self._rows], dtype=np.int64)}
        for name, _ in self.metrics:
            out[name] = np.array([row[name] for row in self._rows], dtype=float)
        return out

    def ledger_columns(self) -> dict[str, np.ndarray]:
        """The trade ledger as columns: round, buyer, seller, price, quantity."""
        if not self._ledger:
            return {
                "round": np.zeros(0, np.int64),
                "buyer": np.zeros(0, np.int64),
                "seller": np.zeros(0, np.int64),
                "price": np.zeros(0),
                "quantity": np.zeros(0, np.int64),
            }
        return {
            "round": np.concatenate([np.full(len(t), r) for r, t in self._ledger]),
            "buyer": np.concatenate([t.buyer for _, t in self._ledger]),
            "seller": np.concatenate([t.seller for _, t in self._ledger]),
            "price": np.concatenate([t.price for _, t in self._ledger]),
            "quantity": np.concatenate([t.quantity for _, t in self._ledger]),
        }

    def traders_columns(self, pop: Population) -> dict[str, np.ndarray]:
        """The sampled trader states as columns (long format)."""
        if not self._snapshots:
            return {
                "round": np.zeros(0, np.int64),
                "trader": np.zeros(0, np.int64),
                "mu": np.zeros(0),
                "sigma": np.zeros(0),
                "stock": np.zeros(0, pop.stock.dtype),
                "cash": np.zeros(0),
                "traded": np.zeros(0, np.int64),
            }
        return {k: np.concatenate([s[k] for s in self._snapshots]) for k in self._snapshots[0]}

    def totals_columns(self, groups: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        """Each trader's surplus and units over the run, with the columns that group them.

        ``groups`` holds one column per grouping (role, degree quartile, region, left, ...).
        """
        n = next(iter(groups.values())).shape[0] if groups else 0
        surplus = np.zeros(n) if self._surplus is None else self._surplus
        units = np.zeros(n, np.int64) if self._units is None else self._units
        out = {"trader": np.arange(n, dtype=np.int64)}
        out.update(groups)
        out["surplus"] = np.resize(surplus, n) if surplus.shape[0] != n else surplus.copy()
        out["units"] = np.resize(units, n) if units.shape[0] != n else units.copy()
        return out

    def summary(self) -> dict[str, float]:
        """One number per metric over the rounds so far, by each metric's ``aggregate``."""
        out: dict[str, float] = {}
        for name, metric in self.metrics:
            vals = np.array([row[name] for row in self._rows], dtype=float)
            out[name] = aggregate(vals, getattr(metric, "aggregate", "mean"))
        return out


def aggregate(vals: np.ndarray, how: str) -> float:
    """Summarise a run's round values: ``mean``, ``sum``, ``last`` or ``final_half_mean``.

    Non-finite rounds (a price in a round without trade) are left out of means and sums.
    """
    if vals.size == 0:
        return float("nan")
    if how == "last":
        return float(vals[-1])
    if how == "final_half_mean":
        vals = vals[vals.size // 2 :]
    finite = vals[np.isfinite(vals)]
    if how == "sum":
        return float(finite.sum())
    return float(finite.mean()) if finite.size else float("nan")
