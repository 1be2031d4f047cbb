"""The data that flows between the market and its plugins.

Plugins read a :class:`MarketState` and return plain arrays (:class:`Trades`, new ``mu`` and
``sigma``, one float per metric); the market alone writes state. Every array here is a numpy array
indexed by trader row (shape ``(n,)``) or by trade or edge (shape ``(n_trades,)``, ``(n_edges,)``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

from propensim.agents.population import Population


@dataclass(eq=False)
class Trades:
    """A batch of trades, one row each: who bought from whom, at what price, how many units.

    Parameters
    ----------
    buyer, seller : ndarray of int64, shape (n_trades,)
        Population row indices.
    price : ndarray of float, shape (n_trades,)
        Price per unit (price units, finite).
    quantity : ndarray of int64, shape (n_trades,)
        Units traded (>= 1).
    edge : ndarray of int64, shape (n_trades,), optional
        A hint for the invariant check: the position of each trade's edge in the network's edge
        arrays (``network.buyer[edge] == buyer`` and ``network.seller[edge] == seller``). The
        check verifies the hint in O(1) per trade instead of searching the edge list, and
        searches where the hint is missing or wrong, so a hint never makes an invalid trade pass.
    """

    buyer: np.ndarray
    seller: np.ndarray
    price: np.ndarray
    quantity: np.ndarray
    edge: np.ndarray | None = None

    def __post_init__(self) -> None:
        self.buyer = np.asarray(self.buyer, dtype=np.int64).reshape(-1)
        self.seller = np.asarray(self.seller, dtype=np.int64).reshape(-1)
        self.price = np.asarray(self.price, dtype=float).reshape(-1)
        self.quantity = np.asarray(self.quantity, dtype=np.int64).reshape(-1)
        n = self.buyer.shape[0]
        if not (self.seller.shape[0] == self.price.shape[0] == self.quantity.shape[0] == n):
            raise ValueError(
                "Trades columns differ in length "
                f"(buyer={n}, seller={self.seller.size}, price={self.price.size}, "
                f"quantity={self.quantity.size})"
            )
        if self.edge is not None:
            self.edge = np.asarray(self.edge, dtype=np.int64).reshape(-1)
            if self.edge.shape[0] != n:
                raise ValueError(f"Trades edge hint has {self.edge.size} rows, expected {n}")

    @classmethod
    def empty(cls) -> Trades:
        """No trades."""
        z = np.zeros(0, dtype=np.int64)
        return cls(z, z, np.zeros(0), z)

    @classmethod
    def unit_trades(cls, buyer, seller, price, edge) -> Trades:
        """One unit each, from a compiled kernel's columns, taken as they are.

        ``buyer``, ``seller``, ``edge`` int64 and ``price`` float64, of one length: no
        conversions or checks (the constructor's cost 3 us a round at 1e3 traders).
        """
        out = cls.__new__(cls)
        out.buyer, out.seller, out.price, out.edge = buyer, seller, price, edge
        out.quantity = np.ones(buyer.shape[0], dtype=np.int64)
        return out

    @classmethod
    def concat(cls, parts: list[Trades]) -> Trades:
        """Stack several batches in order."""
        if not parts:
            return cls.empty()
        hinted = all(p.edge is not None for p in parts)
        return cls(
            np.concatenate([p.buyer for p in parts]),
            np.concatenate([p.seller for p in parts]),
            np.concatenate([p.price for p in parts]),
            np.concatenate([p.quantity for p in parts]),
            np.concatenate([p.edge for p in parts]) if hinted else None,
        )

    def __len__(self) -> int:
        return self.buyer.shape[0]

    @property
    def volume(self) -> int:
        """Total units traded."""
        return int(self.quantity.sum())


class TradingNetwork:
    """Who may trade with whom, as arrays of buyer-seller edges.

    Only a buyer and a seller joined by an edge can ever trade. Edges between two buyers or two
    sellers in the source graph carry no trade and are dropped here (they may still carry
    information, see ``social``).

    Parameters
    ----------
    n : int
        Number of traders (population rows).
    buyer, seller : ndarray of int64, shape (n_edges,)
        Endpoints of each buyer-seller edge, sorted by buyer then seller, without repeats.
    complete : bool
        True when every buyer is joined to every seller (lets rules use faster paths).
    social : tuple of ndarray, optional
        All edges of the source graph as ``(u, v)`` row-index arrays, both directions, used by
        rules that feel their neighbours whatever their role. Defaults to the trading edges,
        derived only when first read (a network of 1e7 edges saves 320 MB until then).
    labels : list, optional
        The source graph's node labels in row order (for reports).
    attributes : dict of str to ndarray, optional
        Per-trader attributes the network knows (shape (n,) each), e.g. ``region`` for the
        ``regions`` builder or node attributes of a graph file: interventions and group
        comparisons select traders by them.
    """

    def __init__(
        self,
        n: int,
        buyer,
        seller,
        complete: bool = False,
        social: tuple[np.ndarray, np.ndarray] | None = None,
        labels: list | None = None,
        attributes: dict | None = None,
    ) -> None:
        self.n = int(n)
        self.complete = bool(complete)
        self.labels = labels
        self.attributes = {k: np.asarray(v) for k, v in (attributes or {}).items()}
        for key, arr in self.attributes.items():
            if arr.shape != (self.n,):
                raise ValueError(
                    f"network attribute {key!r} has shape {arr.shape}, expected ({n},)"
                )
        self._social = social
        b = np.asarray(buyer, dtype=np.int64).reshape(-1)
        s = np.asarray(seller, dtype=np.int64).reshape(-1)
        if b.shape != s.shape:
            raise ValueError("network buyer and seller edge arrays differ in length")
        if b.size and (min(b.min(), s.min()) < 0 or max(b.max(), s.max()) >= self.n):
            raise ValueError(f"network edges name traders outside 0..{self.n - 1}")
        key = b * np.int64(self.n) + s  # shape: (n_raw,)
        if key.size and not np.all(key[1:] > key[:-1]):  # builders mostly hand sorted edges
            key = np.sort(key)
            keep = np.ones(key.size, dtype=bool)
            keep[1:] = key[1:] != key[:-1]
            key = key[keep]
            b, s = key // self.n, key % self.n
        self.buyer, self.seller = b, s
        self.__dict__["edge_key"] = key  # the cached_property below, already computed

    def __repr__(self) -> str:
        return f"TradingNetwork(n={self.n}, n_edges={self.n_edges}, complete={self.complete})"

    @property
    def social(self) -> tuple[np.ndarray, np.ndarray]:
        """All edges, both directions, as ``(u, v)`` (derived from the trading edges if unset)."""
        if self._social is None:
            self._social = (
                np.concatenate([self.buyer, self.seller]),
                np.concatenate([self.seller, self.buyer]),
            )
        return self._social

    @property
    def n_edges(self) -> int:
        """Number of buyer-seller edges."""
        return self.buyer.shape[0]

    @cached_property
    def edge_key(self) -> np.ndarray:
        """Sorted int64 keys ``buyer * n + seller``, shape (n_edges,), for membership tests."""
        return self.buyer * np.int64(self.n) + self.seller

    def has_edge(self, buyer: np.ndarray, seller: np.ndarray) -> np.ndarray:
        """Boolean mask: True where a (buyer, seller) pair shares an edge.

        Rows outside ``0..n-1`` have no edge. Searches each buyer's own run of sellers (a
        vectorised binary search over ``seller[buyer_ptr[b]:buyer_ptr[b + 1]]``, a few steps
        for a sparse network) rather than the whole edge list.
        """
        b, s = np.broadcast_arrays(
            np.asarray(buyer, dtype=np.int64), np.asarray(seller, dtype=np.int64)
        )
        shape = b.shape
        b, s = b.reshape(-1), s.reshape(-1)
        if self.n_edges == 0 or b.size == 0:
            return np.zeros(shape, dtype=bool)
        n = self.n
        inside = (b >= 0) & (b < n) & (s >= 0) & (s < n)  # shape: (m,)
        if not inside.all():
            out = np.zeros(b.size, dtype=bool)
            out[inside] = self.has_edge(b[inside], s[inside])
            return out.reshape(shape)
        ptr = self.buyer_ptr
        base = ptr[b]  # shape: (m,) start of the buyer's sellers
        end = ptr[b + 1]
        size = end - base  # shape: (m,) sellers left to search
        seller = self._seller_padded
        for _ in range(int(self._max_buyer_degree).bit_length()):
            half = size >> 1
            mid = base + half  # shape: (m,)
            right = seller[mid] < s  # shape: (m,) the target lies after mid
            right &= size > 0
            base += right * (half + 1)
            size = np.where(right, size - half - 1, half)
        return ((base < end) & (seller[base] == s)).reshape(shape)

    @cached_property
    def _seller_padded(self) -> np.ndarray:
        """``seller`` with one sentinel after the end (searches may read one past a run)."""
        return np.append(self.seller, np.int64(-1))

    @cached_property
    def _max_buyer_degree(self) -> int:
        return int(np.diff(self.buyer_ptr).max()) if self.n_edges else 0

    @cached_property
    def buyer_ptr(self) -> np.ndarray:
        """CSR offsets by buyer row, shape (n + 1,).

        Buyer i's sellers are ``seller[buyer_ptr[i]:buyer_ptr[i + 1]]``.
        """
        counts = np.bincount(self.buyer, minlength=self.n)
        return np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)

    @cached_property
    def degree(self) -> np.ndarray:
        """Number of trading partners of each trader, shape (n,)."""
        return np.bincount(self.buyer, minlength=self.n) + np.bincount(
            self.seller, minlength=self.n
        )

    @cached_property
    def component(self) -> np.ndarray:
        """Connected-component label of each trader in the trading graph, shape (n,)."""
        from scipy.sparse import coo_matrix
        from scipy.sparse.csgraph import connected_components

        adj = coo_matrix(
            (np.ones(self.n_edges, dtype=np.int8), (self.buyer, self.seller)),
            shape=(self.n, self.n),
        )
        _, labels = connected_components(adj, directed=False)
        return labels.astype(np.int64)

    def keep_edges(self, keep: np.ndarray) -> TradingNetwork:
        """A new network over the same rows with only the trading edges where ``keep`` is True.

        Social edges touching a trader who lost every trading edge are dropped as well only when
        they were derived from the trading edges; an explicit social graph keeps its edges
        between traders who still have an edge in the kept set or had none to begin with.
        Labels and attributes carry over.
        """
        keep = np.asarray(keep, dtype=bool)
        if keep.shape != (self.n_edges,):
            raise ValueError(f"keep has shape {keep.shape}, expected ({self.n_edges},)")
        social = None
        if self._social is not None:
            u, v = self._social
            gone = np.zeros(self.n, dtype=bool)
            gone[self.buyer[~keep]] = True
            gone[self.seller[~keep]] = True
            still = np.zeros(self.n, dtype=bool)
            still[self.buyer[keep]] = True
            still[self.seller[keep]] = True
            cut = gone & ~still  # traders cut off from trade altogether
            ok = ~(cut[u] | cut[v])
            social = (u[ok], v[ok])
        return TradingNetwork(
            self.n,
            self.buyer[keep],
            self.seller[keep],
            complete=self.complete and bool(keep.all()),
            social=social,
            labels=self.labels,
            attributes=self.attributes,
        )

    def neighbours(self, i: int) -> np.ndarray:
        """Trading partners of row ``i`` (sellers of a buyer, buyers of a seller)."""
        sellers = self.seller[self.buyer_ptr[i] : self.buyer_ptr[i + 1]]
        return sellers if sellers.size else self.buyer[self.seller == i]


@dataclass(eq=False)
class MarketState:
    """What a plugin may read in one round. Plugins must not write to it.

    Parameters
    ----------
    population : Population
        Trader columns at the start of the round.
    network : TradingNetwork
        The trading edges.
    round : int
        Round number, starting at 0.
    remaining : ndarray of int64, shape (n,)
        Units each trader may still trade this round (capacity, less what it already traded,
        and for sellers no more than their stock). Per-agent rules see it shrink as they go.
    equilibrium_price : float
        Competitive price of the values and costs (NaN if supply and demand do not cross).
    last_price : float
        Mean price of the previous round's trades (NaN before any trade).
    cache : dict
        Per-market scratch space for derived quantities that do not change between rounds
        (for example the largest achievable surplus). Key it by your plugin's name. The market
        empties it whenever it replaces the network or the population, so an entry can never
        outlive the objects it was derived from.
    elapsed : float
        Time since the last drift step, in rounds: 1 in round mode, the time between steps in
        event mode. Drift rules step their curves over ``dt * elapsed``.
    price_floor, price_ceiling : float
        Bounds on the price of any trade this round (``-inf`` and ``inf`` when no price control
        is in force). Every clearing rule must honour them (MODEL.md section 9 gives the meaning
        per rule); the market refuses a trade outside them.
    benchmark_surplus : float
        The largest achievable surplus per round of the market as it stood before any
        intervention (NaN until measured): the fixed benchmark of ``fixed_efficiency``.
    round_capacity : bool
        True in round mode: a trader's capacity limits its units each round. False in event
        mode, where capacity means nothing: within a window a buyer may buy any number of
        units and a seller sell its whole stock (benchmarks of achievable surplus follow).
    meetings : list or None
        When the market records meetings (``keep_meetings``), an empty list at the start of
        each clearing, to which a rule may append ``(buyer, seller, price, traded)`` arrays:
        every meeting it held, traded or not (price NaN where none was drawn). None otherwise:
        a rule must then do no extra work or draws.
    """

    population: Population
    network: TradingNetwork
    round: int = 0
    remaining: np.ndarray | None = None
    equilibrium_price: float = float("nan")
    last_price: float = float("nan")
    cache: dict[str, Any] = field(default_factory=dict)
    elapsed: float = 1.0
    price_floor: float = float("-inf")
    price_ceiling: float = float("inf")
    benchmark_surplus: float = float("nan")
    round_capacity: bool = True
    meetings: list | None = None

    @property
    def price_bounded(self) -> bool:
        """True when a price floor or ceiling is in force this round."""
        return self.price_floor > float("-inf") or self.price_ceiling < float("inf")

    def __post_init__(self) -> None:
        if self.remaining is None:
            pop = self.population
            self.remaining = np.where(
                pop.role == 1, np.minimum(pop.capacity, pop.stock), pop.capacity
            ).astype(np.int64)


@dataclass(eq=False)
class RoundOutcome:
    """What happened in one round, as drift rules and metrics see it.

    Parameters
    ----------
    trades : Trades
        This round's trades.
    traded : ndarray of int64, shape (n,)
        Units each trader traded this round.
    mean_price : ndarray of float, shape (n,)
        Volume-weighted mean price each trader traded at this round (NaN where it did not trade).
    buyer_pays, seller_gets : ndarray of float, shape (n_trades,)
        Price per unit the buyer paid and the seller received: both the trade price unless a
        per-unit tax or subsidy drives a wedge between them.
    tax_revenue : float
        Money the treasury took this round (taxes less subsidies; negative for a net subsidy).
    unmet_demand, unmet_supply : int
        Units wanted at a binding price ceiling (buyers whose value is at least the ceiling)
        that did not trade, and units offered at a binding floor (sellers whose cost is at most
        the floor) that did not trade; 0 with no price control.
    """

    trades: Trades
    traded: np.ndarray
    mean_price: np.ndarray
    buyer_pays: np.ndarray | None = None
    seller_gets: np.ndarray | None = None
    tax_revenue: float = 0.0
    unmet_demand: int = 0
    unmet_supply: int = 0

    @classmethod
    def from_trades(
        cls, trades: Trades, n: int, buyer_pays=None, seller_gets=None, tax_revenue: float = 0.0
    ) -> RoundOutcome:
        """Tally a batch of trades per trader.

        ``traded`` and ``mean_price`` are tallied when first read (two passes over ``n``
        traders that a round whose drift rule and metrics read only ``trades`` never pays).
        """
        out = cls.__new__(cls)
        out.trades = trades
        out._n = int(n)
        out.buyer_pays = trades.price if buyer_pays is None else buyer_pays
        out.seller_gets = trades.price if seller_gets is None else seller_gets
        out.tax_revenue = float(tax_revenue)
        out.unmet_demand = 0
        out.unmet_supply = 0
        return out

    def __getattr__(self, name: str):
        # Only called when normal lookup fails: a lazily tallied field not read yet.
        if name in ("traded", "mean_price") and "_n" in self.__dict__:
            self._tally()
            return self.__dict__[name]
        raise AttributeError(f"{type(self).__name__!r} object has no attribute {name!r}")

    def _tally(self) -> None:
        trades, n = self.trades, self.__dict__.pop("_n")
        q = trades.quantity.astype(float)
        traded = np.bincount(trades.buyer, weights=q, minlength=n) + np.bincount(
            trades.seller, weights=q, minlength=n
        )
        pay = q * trades.price  # shape: (n_trades,)
        paid = np.bincount(trades.buyer, weights=pay, minlength=n) + np.bincount(
            trades.seller, weights=pay, minlength=n
        )
        with np.errstate(invalid="ignore", divide="ignore"):
            mean_price = np.where(traded > 0, paid / traded, np.nan)
        self.traded = traded.astype(np.int64)
        self.mean_price = mean_price
