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
    """

    buyer: np.ndarray
    seller: np.ndarray
    price: np.ndarray
    quantity: np.ndarray

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

    @classmethod
    def empty(cls) -> Trades:
        """No trades."""
        z = np.zeros(0, dtype=np.int64)
        return cls(z, z, np.zeros(0), z)

    @classmethod
    def concat(cls, parts: list[Trades]) -> Trades:
        """Stack several batches in order."""
        if not parts:
            return cls.empty()
        return cls(
            np.concatenate([p.buyer for p in parts]),
            np.concatenate([p.seller for p in parts]),
            np.concatenate([p.price for p in parts]),
            np.concatenate([p.quantity for p in parts]),
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
    """

    def __init__(
        self,
        n: int,
        buyer,
        seller,
        complete: bool = False,
        social: tuple[np.ndarray, np.ndarray] | None = None,
        labels: list | None = None,
    ) -> None:
        self.n = int(n)
        self.complete = bool(complete)
        self.labels = labels
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
        """Boolean mask: True where a (buyer, seller) pair shares an edge."""
        key = np.asarray(buyer, dtype=np.int64) * np.int64(self.n) + np.asarray(seller, np.int64)
        if self.n_edges == 0:
            return np.zeros(key.shape, dtype=bool)
        pos = np.minimum(np.searchsorted(self.edge_key, key), self.n_edges - 1)
        return self.edge_key[pos] == key

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
        (for example the largest achievable surplus). Key it by your plugin's name.
    """

    population: Population
    network: TradingNetwork
    round: int = 0
    remaining: np.ndarray | None = None
    equilibrium_price: float = float("nan")
    last_price: float = float("nan")
    cache: dict[str, Any] = field(default_factory=dict)

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
    """

    trades: Trades
    traded: np.ndarray
    mean_price: np.ndarray

    @classmethod
    def from_trades(cls, trades: Trades, n: int) -> RoundOutcome:
        """Tally a batch of trades per trader."""
        q = trades.quantity.astype(float)
        traded = np.bincount(trades.buyer, weights=q, minlength=n) + np.bincount(
            trades.seller, weights=q, minlength=n
        )
        paid = np.bincount(trades.buyer, weights=q * trades.price, minlength=n) + np.bincount(
            trades.seller, weights=q * trades.price, minlength=n
        )
        with np.errstate(invalid="ignore", divide="ignore"):
            mean_price = np.where(traded > 0, paid / traded, np.nan)
        return cls(trades=trades, traded=traded.astype(np.int64), mean_price=mean_price)
