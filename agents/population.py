"""The trader population: state as columns.

A market of a million traders cannot afford a Python object per trader in its inner loop, so the
state of every trader lives in one numpy array per attribute (:class:`Population`). Rules and
drifts work on whole columns. The Mesa view on a row (``propensim.markets.model.Trader``, a real
``mesa.Agent``) lives with the Mesa model in the markets layer: this layer imports no other.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field, fields, replace

import numpy as np

from propensim.agents._checks import (
    as_float_array,
    check_nonnegative,
    check_positive,
    check_unit_interval,
)

BUYER = 0
SELLER = 1
ROLE_NAMES = ("buyer", "seller")

#: Columns holding one float per trader, in the order they are documented.
FLOAT_COLUMNS = ("mu", "sigma", "activity", "gamma", "value", "cash")
#: Columns holding one integer per trader.
INT_COLUMNS = ("stock", "capacity")


@dataclass(eq=False)
class Population:
    """Trader state as parallel columns, one row per trader.

    Parameters
    ----------
    role : ndarray of int8, shape (n,)
        ``0`` for a buyer, ``1`` for a seller (see :data:`BUYER`, :data:`SELLER`).
    mu : ndarray, shape (n,)
        Preferred price: the centre of the trader's propensity curve (price units).
    sigma : ndarray, shape (n,)
        Width of the curve: the trader's price uncertainty (price units, > 0).
    activity : ndarray, shape (n,)
        Height of the curve, in (0, 1]: the largest probability of accepting any trade.
    gamma : ndarray, shape (n,)
        Entropic energy scale (energy units, > 0): force = gamma * d/dx ln P.
    value : ndarray, shape (n,)
        Private value of one unit for a buyer, unit cost for a seller (price units).
    cash : ndarray, shape (n,)
        Money a buyer may spend; ``inf`` means no budget constraint. Sellers' cash grows with sales.
    stock : ndarray of int64, shape (n,)
        Units held. Sellers sell from it; buyers' stock grows with purchases.
    capacity : ndarray of int64, shape (n,)
        Most units a trader may trade in one round.
    curve : str
        Curve family shared by the population (a ``propensim.curves`` plugin name).
    curve_params : dict of str to ndarray
        Extra per-trader parameters of that family, first axis of length n
        (``weights`` of shape (n, K+1) for ``oscillator``; ``tau`` for ``logistic``).
    """

    role: np.ndarray
    mu: np.ndarray
    sigma: np.ndarray
    activity: np.ndarray
    gamma: np.ndarray
    value: np.ndarray
    cash: np.ndarray
    stock: np.ndarray
    capacity: np.ndarray
    curve: str = "normal"
    curve_params: dict[str, np.ndarray] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.role = np.asarray(self.role, dtype=np.int8)
        n = self.role.shape[0]
        if self.role.ndim != 1:
            raise ValueError("role must be a 1-D array of 0 (buyer) and 1 (seller)")
        if np.any((self.role != BUYER) & (self.role != SELLER)):
            raise ValueError("role must contain only 0 (buyer) and 1 (seller)")
        for name in FLOAT_COLUMNS:
            arr = np.array(np.broadcast_to(getattr(self, name), (n,)), dtype=float)
            setattr(self, name, arr)
        for name in INT_COLUMNS:
            arr = np.array(np.broadcast_to(getattr(self, name), (n,)), dtype=np.int64)
            setattr(self, name, arr)
        self.curve_params = {k: np.asarray(v, dtype=float) for k, v in self.curve_params.items()}
        self.validate()

    # -- shape -----------------------------------------------------------------------------
    def __len__(self) -> int:
        return self.role.shape[0]

    @property
    def buyers(self) -> np.ndarray:
        """Row indices of the buyers, ascending."""
        return np.flatnonzero(self.role == BUYER)

    @property
    def sellers(self) -> np.ndarray:
        """Row indices of the sellers, ascending."""
        return np.flatnonzero(self.role == SELLER)

    @property
    def is_buyer(self) -> np.ndarray:
        """Boolean mask of buyers, shape (n,)."""
        return self.role == BUYER

    def validate(self) -> None:
        """Raise ``ValueError`` naming the first column that breaks its allowed range."""
        n = len(self)
        for name in (*FLOAT_COLUMNS, *INT_COLUMNS):
            if getattr(self, name).shape != (n,):
                raise ValueError(f"{name} has length {getattr(self, name).shape}, expected ({n},)")
        as_float_array("mu", self.mu)
        as_float_array("value", self.value)
        check_positive("sigma", self.sigma)
        check_unit_interval("activity", self.activity)
        check_positive("gamma", self.gamma)
        check_nonnegative("cash", self.cash, allow_inf=True)
        check_nonnegative("stock", self.stock)
        check_nonnegative("capacity", self.capacity)
        for key, arr in self.curve_params.items():
            if arr.shape[:1] != (n,):
                raise ValueError(
                    f"curve_params[{key!r}] has first axis {arr.shape[:1]}, expected {n}"
                )

    # -- curves ----------------------------------------------------------------------------
    def curves(self, idx: np.ndarray | slice | None = None):
        """The propensity curves of the rows ``idx`` as one vectorised curve object.

        The returned curve's parameters have shape ``(len(idx),)``; evaluating it at prices of
        shape ``(m, 1)`` gives an ``(m, len(idx))`` table.
        """
        from propensim.agents.curves import curve_family

        sel = slice(None) if idx is None else idx
        family = curve_family(self.curve)
        extra = {k: v[sel] for k, v in self.curve_params.items()}
        return family.from_population(
            mu=self.mu[sel],
            sigma=self.sigma[sel],
            activity=self.activity[sel],
            role=self.role[sel],
            **extra,
        )

    # -- settling trades -------------------------------------------------------------------
    def settle(self, buyer, seller, quantity, buyer_pays, seller_gets=None) -> None:
        """Move goods seller -> buyer and money buyer -> seller, in place.

        ``stock[seller] -= q``, ``stock[buyer] += q``, ``cash[buyer] -= q * buyer_pays``,
        ``cash[seller] += q * seller_gets``, in that order, summed over repeated rows
        (``np.add.at``), so its cost follows the number of trades, not of traders. A buyer with
        infinite cash keeps infinite cash.

        Goods are conserved: total stock is unchanged. Money is conserved between the two sides
        when ``seller_gets`` equals ``buyer_pays`` (the default); a per-unit tax or subsidy makes
        them differ, and the difference ``q * (buyer_pays - seller_gets)`` goes to (or comes
        from) a third party the market records (the treasury).

        Parameters
        ----------
        buyer, seller : ndarray of int64, shape (m,)
            Rows of each trade's buyer and seller.
        quantity : ndarray of int64, shape (m,)
            Units of each trade.
        buyer_pays, seller_gets : ndarray of float, shape (m,)
            Price per unit paid by the buyer and received by the seller (price units).
        """
        q = quantity
        if len(q) == 0:
            return
        np.add.at(self.stock, buyer, q)
        np.subtract.at(self.stock, seller, q)
        pay = q * buyer_pays  # shape: (m,)
        np.subtract.at(self.cash, buyer, pay)
        np.add.at(self.cash, seller, pay if seller_gets is None else q * seller_gets)

    # -- copies ----------------------------------------------------------------------------
    def copy(self) -> Population:
        """A deep copy: the columns are new arrays."""
        cols = {f.name: np.copy(getattr(self, f.name)) for f in fields(self) if f.name != "curve"}
        cols["curve_params"] = {k: np.copy(v) for k, v in self.curve_params.items()}
        return replace(self, **cols)

    def row(self, i: int) -> dict[str, float | int | str]:
        """One trader's state as a plain dict (for display and per-agent code)."""
        out: dict[str, float | int | str] = {"index": int(i), "role": ROLE_NAMES[self.role[i]]}
        for name in FLOAT_COLUMNS:
            out[name] = float(getattr(self, name)[i])
        for name in INT_COLUMNS:
            out[name] = int(getattr(self, name)[i])
        return out


def _draw(name: str, spec, size: int, rng: np.random.Generator) -> np.ndarray:
    """Draw ``size`` values from a distribution spec.

    A spec is a number (constant), a pair ``[low, high]`` (uniform), or a one-key mapping:
    ``{"uniform": [low, high]}``, ``{"normal": [mean, sd]}``, ``{"lognormal": [mean, sd]}``
    (of the log), ``{"values": [...]}`` (given values, length ``size``), or
    ``{"linspace": [first, last]}`` (evenly spaced, deterministic: stepped supply and demand).
    """
    if isinstance(spec, int | float) and not isinstance(spec, bool):
        return np.full(size, float(spec))
    if isinstance(spec, list | tuple) and len(spec) == 2:
        spec = {"uniform": list(spec)}
    if isinstance(spec, np.ndarray):
        spec = {"values": spec}
    if not isinstance(spec, Mapping) or len(spec) != 1:
        raise ValueError(
            f"{name} must be a number, [low, high], or one of "
            "{uniform|normal|lognormal|linspace: [a, b]} or {values: [...]}, "
            f"got {spec!r}"
        )
    ((kind, args),) = spec.items()
    if kind == "values":
        arr = as_float_array(name, args)
        if arr.shape != (size,):
            raise ValueError(f"{name}.values has {arr.size} entries, expected {size}")
        return arr.copy()
    a, b = (float(x) for x in as_float_array(name, args).reshape(-1)[:2])
    if kind == "uniform":
        if b < a:
            raise ValueError(f"{name}.uniform must be [low, high] with low <= high, got {[a, b]}")
        return rng.uniform(a, b, size)
    if kind == "normal":
        check_nonnegative(f"{name}.normal sd", b)
        return rng.normal(a, b, size)
    if kind == "lognormal":
        check_nonnegative(f"{name}.lognormal sd", b)
        return rng.lognormal(a, b, size)
    if kind == "linspace":
        return np.linspace(a, b, size)
    raise ValueError(
        f"{name} has unknown distribution {kind!r}; allowed: uniform, normal, lognormal, "
        "linspace, values"
    )


def build_population(
    n_buyers: int,
    n_sellers: int,
    *,
    value=(80.0, 120.0),
    cost=(60.0, 100.0),
    shade=0.0,
    sigma=5.0,
    activity=1.0,
    gamma=1.0,
    cash=float("inf"),
    stock: int = 1,
    capacity: int = 1,
    curve: str = "normal",
    curve_params: Mapping | None = None,
    rng: np.random.Generator | int | None = None,
) -> Population:
    """Build a population of buyers (rows first) followed by sellers.

    Parameters
    ----------
    n_buyers, n_sellers : int
        How many of each (>= 0, at least one trader in all).
    value, cost : distribution spec
        Buyers' private values and sellers' unit costs (see ``_draw``: a number, ``[low, high]``,
        or ``{"normal": [mean, sd]}`` and friends).
    shade : distribution spec
        How far a trader's preferred price starts from its value toward a better deal:
        ``mu = value - shade`` for buyers and ``mu = cost + shade`` for sellers.
    sigma, activity, gamma : distribution spec
        Curve width (> 0), height in (0, 1], and entropic energy scale (> 0).
    cash : distribution spec
        Buyers' budgets (``inf``: unconstrained). Sellers start with no cash.
    stock : int
        Units each seller holds at the start (buyers hold none).
    capacity : int
        Most units a trader may trade in one round.
    curve : str
        Curve family name (a registered ``propensim.curves`` plugin).
    curve_params : mapping, optional
        Extra family parameters; a 1-D entry is shared by every trader (for example oscillator
        ``weights=[0.8, 0.0, 0.2]``), an entry with first axis n is per trader.
    rng : numpy.random.Generator or int, optional
        Source of all randomness (normalised with ``numpy.random.default_rng``).

    Returns
    -------
    Population

    Examples
    --------
    >>> pop = build_population(3, 2, value=100.0, cost=90.0, sigma=4.0, rng=1)
    >>> len(pop), pop.buyers.tolist(), pop.sellers.tolist()
    (5, [0, 1, 2], [3, 4])
    """
    for name, count in (
        ("n_buyers", n_buyers),
        ("n_sellers", n_sellers),
        ("stock", stock),
        ("capacity", capacity),
    ):
        if isinstance(count, bool) or not isinstance(count, int | np.integer) or count < 0:
            raise ValueError(f"{name} must be a whole number >= 0, got {count!r}")
    n = n_buyers + n_sellers
    if n == 0:
        raise ValueError("n_buyers + n_sellers must be at least 1")
    rng = np.random.default_rng(rng)
    role = np.concatenate([np.full(n_buyers, BUYER), np.full(n_sellers, SELLER)]).astype(np.int8)
    vals = np.concatenate(
        [_draw("value", value, n_buyers, rng), _draw("cost", cost, n_sellers, rng)]
    )
    shades = _draw("shade", shade, n, rng)
    mu = np.where(role == BUYER, vals - shades, vals + shades)
    budget = np.where(role == BUYER, _draw("cash", cash, n, rng), 0.0)
    params = {}
    for key, arr in (curve_params or {}).items():
        arr = np.asarray(arr, dtype=float)
        # A scalar, or level weights or a table (grid, values) given once, is shared by all.
        shared = arr.ndim == 0 or (key in ("weights", "grid", "values") and arr.ndim == 1)
        params[key] = np.broadcast_to(arr, (n, *arr.shape)).copy() if shared else arr
    return Population(
        role=role,
        mu=mu,
        sigma=_draw("sigma", sigma, n, rng),
        activity=_draw("activity", activity, n, rng),
        gamma=_draw("gamma", gamma, n, rng),
        value=vals,
        cash=budget,
        stock=np.where(role == SELLER, stock, 0),
        capacity=np.full(n, capacity),
        curve=curve,
        curve_params=params,
    )
