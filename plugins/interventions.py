"""Built-in interventions: changes to the market's structure, rules, money and population.

Each acts from round ``start`` (default 0) until round ``until`` (default: the end; exclusive),
draws only from the generator it is handed (its own stream), and changes the market only
through the market's methods (``remove_traders``, ``replace_network``, ``replace_population``,
``replace_clearing``) and its ``policy`` (price bounds and per-unit taxes). ``validate(market)``
checks the parameters against the market before the first round and raises ``ValueError``
naming the field and what is allowed. ``end`` undoes what ``begin`` did where that has a
meaning (traders come back, a price control or tax is lifted, the old rule returns).

References
----------
R. Albert, H. Jeong and A.-L. Barabasi, "Error and attack tolerance of complex networks",
Nature 406:378-382 (2000): removing the best-connected nodes against removing random ones.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import ClassVar

import numpy as np

from propensim.agents.population import BUYER, FLOAT_COLUMNS, INT_COLUMNS, ROLE_NAMES, SELLER

__all__ = [
    "CapDegree",
    "CutRegions",
    "Entry",
    "PriceCeiling",
    "PriceFloor",
    "RemoveHubs",
    "RemoveTraders",
    "SwitchClearing",
    "UnitSubsidy",
    "UnitTax",
    "ValueShock",
]


def _whole(name: str, value, low: int = 0) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < low:
        raise ValueError(f"{name} must be a whole number >= {low}, got {value!r}")
    return int(value)


def _finite(name: str, value) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float | np.number):
        raise ValueError(f"{name} must be a finite number, got {value!r}")
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"{name} must be a finite number, got {value!r}")
    return value


class _Window:
    """``start`` and ``until`` (rounds), shared by every built-in."""

    start: int = 0
    until: int | None = None

    def _check_window(self) -> None:
        _whole("start", self.start)
        if self.until is not None:
            _whole("until", self.until, 1)
            if self.until <= self.start:
                raise ValueError(f"until must be after start ({self.start}), got {self.until}")

    def check(self) -> None:
        """Raise ValueError for a bad window."""
        self._check_window()

    def __repr__(self) -> str:
        params = ", ".join(f"{k}={v!r}" for k, v in vars(self).items() if not k.startswith("_"))
        return f"{type(self).__name__}({params})"


class _Removal(_Window):
    """Take traders out at ``start``; bring them back (with their edges) at ``until``."""

    def rows(self, market, rng: np.random.Generator) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError

    def _pool(self, market) -> np.ndarray:
        """The rows to choose from: every trader, or those of ``self.role``."""
        role = market.population.role
        if getattr(self, "role", None) is None:
            return np.arange(role.size)
        return np.flatnonzero(role == ROLE_NAMES.index(self.role))

    def begin(self, market, rng: np.random.Generator) -> None:
        """Remove the chosen traders' edges."""
        self._network_before = market.network
        self._removed = np.asarray(self.rows(market, rng), dtype=np.int64)
        market.remove_traders(self._removed)

    def end(self, market, rng: np.random.Generator) -> None:
        """Bring the traders back with the network as it was."""
        market.restore_traders(self._removed, self._network_before)


class RemoveHubs(_Removal):
    """Remove the ``k`` best-connected traders (by trading degree; ties broken at random).

    Parameters
    ----------
    k : int
        How many (1 <= k <= traders).
    role : str, optional
        ``"buyer"`` or ``"seller"``: the hubs among that role only.
    start, until : int
        Rounds it acts in (``until`` exclusive; None: to the end).
    """

    description: ClassVar[str] = "remove the k best-connected traders (targeted removal)"
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "Targeted removal of the best-connected traders (Albert, Jeong and Barabasi 2000)."
        ),
    }

    def __init__(self, k: int = 1, role: str | None = None, start: int = 0, until=None) -> None:
        self.k = k
        self.role = role
        self.start = start
        self.until = until

    def check(self) -> None:
        """Raise ValueError naming a bad parameter."""
        self._check_window()
        _whole("k", self.k, 1)
        if self.role is not None and self.role not in ROLE_NAMES:
            raise ValueError(f"role must be 'buyer' or 'seller', got {self.role!r}")

    def validate(self, market) -> None:
        """K may not exceed the traders there are."""
        pool = self._pool(market)
        if self.k > pool.size:
            raise ValueError(f"k is {self.k} but there are only {pool.size} traders to remove")

    def rows(self, market, rng: np.random.Generator) -> np.ndarray:
        """The k rows of highest degree now (a random tie-break from the stream)."""
        pool = self._pool(market)
        degree = market.network.degree[pool]
        order = np.lexsort((rng.random(pool.size), -degree))
        return pool[order[: self.k]]


class RemoveTraders(_Removal):
    """Remove traders by id, by role, by a network attribute, or at random (a count or fraction).

    Give one selector: ``ids`` (population rows), ``role`` (all buyers or sellers),
    ``attribute`` with ``equals`` (e.g. every trader of ``region`` 2), or ``count`` / ``fraction``
    for a random choice (``count = k`` is the control for removing k hubs). With ``role`` and a
    random choice, the choice is among that role.

    Parameters
    ----------
    ids : list of int, optional
    role : str, optional
    attribute : str, optional
        A network attribute (``region`` for the ``regions`` network, node attributes of a graph
        file).
    equals : optional
        The attribute value (or list of values) of the traders to remove.
    count : int, optional
    fraction : float, optional
        In (0, 1]: that share of the traders, rounded to the nearest whole trader.
    start, until : int
    """

    description: ClassVar[str] = "remove traders by id, role, attribute, or at random"
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "Removal of chosen or random traders; a random removal of as many traders is the "
            "control for a targeted one."
        ),
        "stochasticity": ("A random choice draws from the intervention's own stream."),
    }

    def __init__(
        self,
        ids: Sequence[int] | None = None,
        role: str | None = None,
        attribute: str | None = None,
        equals=None,
        count: int | None = None,
        fraction: float | None = None,
        start: int = 0,
        until=None,
    ) -> None:
        self.ids = ids
        self.role = role
        self.attribute = attribute
        self.equals = equals
        self.count = count
        self.fraction = fraction
        self.start = start
        self.until = until

    def check(self) -> None:
        """Raise ValueError naming a bad parameter."""
        self._check_window()
        chosen = [
            k for k in ("ids", "attribute", "count", "fraction") if getattr(self, k) is not None
        ]
        if len(chosen) > 1:
            raise ValueError(
                f"give one of ids, attribute, count, fraction; got {', '.join(chosen)}"
            )
        if not chosen and self.role is None:
            raise ValueError("give one of ids, role, attribute, count or fraction")
        if self.role is not None and self.role not in ROLE_NAMES:
            raise ValueError(f"role must be 'buyer' or 'seller', got {self.role!r}")
        if self.ids is not None:
            if isinstance(self.ids, str | Mapping) or not all(
                isinstance(i, int | np.integer) and not isinstance(i, bool) for i in self.ids
            ):
                raise ValueError(f"ids must be a list of whole numbers, got {self.ids!r}")
        if self.attribute is not None and self.equals is None:
            raise ValueError(f"attribute {self.attribute!r} needs equals (the value to remove)")
        if self.count is not None:
            _whole("count", self.count, 1)
        if self.fraction is not None:
            f = _finite("fraction", self.fraction)
            if not 0.0 < f <= 1.0:
                raise ValueError(f"fraction must be in (0, 1], got {self.fraction!r}")

    def validate(self, market) -> None:
        """Ids must be rows, the attribute must exist, a count must fit."""
        n = len(market.population)
        if self.ids is not None:
            bad = [i for i in self.ids if not 0 <= i < n]
            if bad:
                raise ValueError(f"ids names trader {bad[0]}, but traders are 0..{n - 1}")
        if self.attribute is not None:
            attrs = market.network.attributes
            if self.attribute not in attrs:
                known = ", ".join(sorted(attrs)) or "none (this network has no attributes)"
                raise ValueError(f"attribute {self.attribute!r} is not known; known: {known}")
            wanted = np.atleast_1d(np.asarray(self.equals))
            present = set(np.unique(attrs[self.attribute]).tolist())
            missing = [v for v in wanted.tolist() if v not in present]
            if missing:
                raise ValueError(
                    f"no trader has {self.attribute} = {missing[0]!r}; "
                    f"values: {sorted(present)[:10]}"
                )
        if self.count is not None and self.count > self._pool(market).size:
            raise ValueError(
                f"count is {self.count} but there are only {self._pool(market).size} traders"
            )

    def rows(self, market, rng: np.random.Generator) -> np.ndarray:
        """The selected rows (a random choice draws one permutation from the stream)."""
        if self.ids is not None:
            return np.unique(np.asarray(self.ids, dtype=np.int64))
        pool = self._pool(market)
        if self.attribute is not None:
            values = market.network.attributes[self.attribute]
            wanted = np.atleast_1d(np.asarray(self.equals))
            return pool[np.isin(values[pool], wanted)]
        if self.count is None and self.fraction is None:
            return pool
        k = self.count if self.count is not None else int(round(self.fraction * pool.size))
        return np.sort(pool[rng.permutation(pool.size)[:k]])


class CutRegions(_Window):
    """Cut every trading link between traders of different regions (or of named regions).

    Parameters
    ----------
    regions : list, optional
        Only links between two different regions of this list are cut; all cross-region
        links when omitted.
    attribute : str
        The network attribute that names the region (default ``region``).
    start, until : int
    """

    description: ClassVar[str] = "cut every trading link between regions"
    odd_notes: ClassVar[dict[str, str]] = {
        "interaction": ("Links between regions are cut while it acts."),
    }

    def __init__(self, regions=None, attribute: str = "region", start: int = 0, until=None) -> None:
        self.regions = regions
        self.attribute = attribute
        self.start = start
        self.until = until

    def validate(self, market) -> None:
        """The attribute and every named region must exist."""
        attrs = market.network.attributes
        if self.attribute not in attrs:
            known = ", ".join(sorted(attrs)) or "none (use the regions network or a graph file)"
            raise ValueError(f"attribute {self.attribute!r} is not known; known: {known}")
        if self.regions is not None:
            present = set(np.unique(attrs[self.attribute]).tolist())
            missing = [r for r in self.regions if r not in present]
            if missing:
                raise ValueError(f"regions names {missing[0]!r}, but regions are {sorted(present)}")

    def begin(self, market, rng: np.random.Generator) -> None:
        """Drop the cross-region edges."""
        net = market.network
        self._network_before = net
        region = net.attributes[self.attribute]
        rb, rs = region[net.buyer], region[net.seller]
        cross = rb != rs
        if self.regions is not None:
            named = np.asarray(self.regions)
            cross &= np.isin(rb, named) & np.isin(rs, named)
        market.replace_network(net.keep_edges(~cross))

    def end(self, market, rng: np.random.Generator) -> None:
        """Restore the links."""
        market.replace_network(self._network_before)


class CapDegree(_Window):
    """Every trader keeps at most ``max_degree`` trading partners.

    Edges are kept in a random order (from the stream) while both their ends are under the cap,
    so no trader ends above it and no edge is dropped whose ends both had room.
    """

    description: ClassVar[str] = "cap every trader's number of trading partners"
    odd_notes: ClassVar[dict[str, str]] = {
        "interaction": ("No trader keeps more than a given number of partners while it acts."),
        "stochasticity": ("Which links are kept is random (the intervention's own stream)."),
    }

    def __init__(self, max_degree: int = 5, start: int = 0, until=None) -> None:
        self.max_degree = max_degree
        self.start = start
        self.until = until

    def check(self) -> None:
        """Raise ValueError naming a bad parameter."""
        self._check_window()
        _whole("max_degree", self.max_degree, 1)

    def begin(self, market, rng: np.random.Generator) -> None:
        """Keep edges in random order while both ends have room."""
        from propensim.plugins.sequential_accept import greedy_accept

        net = market.network
        self._network_before = net
        order = rng.permutation(net.n_edges)
        cap = np.full(net.n, int(self.max_degree), dtype=np.int64)
        accepted = greedy_accept(order, net.buyer, net.seller, cap, cap)
        market.replace_network(net.keep_edges(accepted))

    def end(self, market, rng: np.random.Generator) -> None:
        """Restore the links."""
        market.replace_network(self._network_before)


class SwitchClearing(_Window):
    """Clear with another rule from ``start`` (and the old one again from ``until``).

    Parameters
    ----------
    rule : str or mapping
        A clearing plugin name or table ``{name = ..., **params}``.
    """

    description: ClassVar[str] = "switch to another clearing rule"
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": ("The market's clearing rule changes at a round."),
    }

    def __init__(self, rule="call_auction", start: int = 0, until=None) -> None:
        self.rule = rule
        self.start = start
        self.until = until

    def check(self) -> None:
        """The rule must be a known clearing plugin."""
        self._check_window()
        self._build()

    def _build(self):
        from propensim.plugins.registry import make_plugin

        if isinstance(self.rule, str):
            return make_plugin("clearing", self.rule)
        if not isinstance(self.rule, Mapping) or "name" not in self.rule:
            raise ValueError(
                f"rule must be a clearing plugin name or a table with 'name', got {self.rule!r}"
            )
        params = {k: v for k, v in self.rule.items() if k != "name"}
        return make_plugin("clearing", self.rule["name"], **params)

    def begin(self, market, rng: np.random.Generator) -> None:
        """Put the new rule in place."""
        self._before = market.clearing
        market.replace_clearing(self._build())

    def end(self, market, rng: np.random.Generator) -> None:
        """Put the old rule back."""
        market.replace_clearing(self._before)


class _Bound(_Window):
    price: float

    def check(self) -> None:
        """The price must be finite and >= 0."""
        self._check_window()
        p = _finite("price", self.price)
        if p < 0:
            raise ValueError(f"price must be >= 0, got {self.price!r}")

    def _honoured(self, market) -> None:
        rule = market.clearing
        if not getattr(rule, "honours_price_bounds", False):
            name = getattr(rule, "plugin_name", type(rule).__name__)
            raise ValueError(
                f"clearing rule {name!r} does not declare honours_price_bounds = True; a price "
                "control needs a rule that keeps trades inside the bounds"
            )


def _overlap(a, b) -> bool:
    """True if two interventions act in at least one common round."""
    a_end = math.inf if a.until is None else a.until
    b_end = math.inf if b.until is None else b.until
    return max(a.start, b.start) < min(a_end, b_end)


class PriceCeiling(_Bound):
    """No trade above ``price`` (MODEL.md section 9 gives the meaning for each clearing rule).

    Unmet demand at the ceiling is recorded every round (metric ``unmet_demand``).
    """

    description: ClassVar[str] = "price ceiling: no trade above a price"
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "No trade above a price; the meaning for each clearing rule is stated in the "
            "model description (MODEL.md section 9)."
        ),
        "observation": ("Unmet demand at the ceiling is recorded every round."),
    }

    def __init__(self, price: float = 100.0, start: int = 0, until=None) -> None:
        self.price = price
        self.start = start
        self.until = until

    def validate(self, market) -> None:
        """The rule must honour price bounds; the ceiling may not lie below a floor in force."""
        self._honoured(market)
        for j, other in enumerate(getattr(market, "schedule", None).interventions):
            if isinstance(other, PriceFloor) and _overlap(self, other) and other.price > self.price:
                raise ValueError(
                    f"price {self.price} is below the price floor {other.price} of "
                    f"interventions[{j}] in the same rounds; allowed: a ceiling at or above "
                    "every floor in force"
                )

    def begin(self, market, rng: np.random.Generator) -> None:
        """Set the ceiling."""
        if float(self.price) < market.policy.floor:
            raise ValueError(
                f"price ceiling {self.price} is below the price floor {market.policy.floor} "
                "in force"
            )
        self._before = market.policy.ceiling
        market.policy.ceiling = min(market.policy.ceiling, float(self.price))

    def end(self, market, rng: np.random.Generator) -> None:
        """Lift the ceiling."""
        market.policy.ceiling = self._before


class PriceFloor(_Bound):
    """No trade below ``price``; unmet supply at the floor recorded (metric ``unmet_supply``)."""

    description: ClassVar[str] = "price floor: no trade below a price"
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": ("No trade below a price."),
        "observation": ("Unmet supply at the floor is recorded every round."),
    }

    def __init__(self, price: float = 0.0, start: int = 0, until=None) -> None:
        self.price = price
        self.start = start
        self.until = until

    def validate(self, market) -> None:
        """The rule must honour price bounds."""
        self._honoured(market)

    def begin(self, market, rng: np.random.Generator) -> None:
        """Set the floor."""
        if float(self.price) > market.policy.ceiling:
            raise ValueError(
                f"price floor {self.price} is above the price ceiling {market.policy.ceiling} "
                "in force"
            )
        self._before = market.policy.floor
        market.policy.floor = max(market.policy.floor, float(self.price))

    def end(self, market, rng: np.random.Generator) -> None:
        """Lift the floor."""
        market.policy.floor = self._before


class UnitTax(_Window):
    """A per-unit tax on the buyer side (paid on top of the price) or the seller side.

    Either way the wedge between what the buyer pays and the seller keeps is ``amount``; revenue
    is ``amount x quantity`` (metric ``tax_revenue``). A negative amount is a subsidy.
    """

    description: ClassVar[str] = "per-unit tax levied on the buyer or the seller side"
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "A per-unit tax drives a wedge between what the buyer pays and the seller "
            "receives; revenue is a transfer to the treasury."
        ),
        "observation": ("Tax revenue is recorded every round and counted in total surplus."),
    }
    sign: ClassVar[float] = 1.0

    def __init__(
        self, amount: float = 1.0, side: str = "buyer", start: int = 0, until=None
    ) -> None:
        self.amount = amount
        self.side = side
        self.start = start
        self.until = until

    def check(self) -> None:
        """The amount must be finite; the side buyer or seller."""
        self._check_window()
        _finite("amount", self.amount)
        if self.side not in ROLE_NAMES:
            raise ValueError(f"side must be 'buyer' or 'seller', got {self.side!r}")

    def _field(self) -> str:
        return "buyer_tax" if self.side == "buyer" else "seller_tax"

    def begin(self, market, rng: np.random.Generator) -> None:
        """Add the tax to the policy."""
        f = self._field()
        setattr(market.policy, f, getattr(market.policy, f) + self.sign * float(self.amount))

    def end(self, market, rng: np.random.Generator) -> None:
        """Take it off again."""
        f = self._field()
        setattr(market.policy, f, getattr(market.policy, f) - self.sign * float(self.amount))


class UnitSubsidy(UnitTax):
    """A per-unit subsidy: the buyer pays less (or the seller receives more) by ``amount``.

    Its cost is recorded (``tax_revenue`` goes negative) and subtracted from total surplus.
    """

    description: ClassVar[str] = "per-unit subsidy to the buyer or the seller side"
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "A per-unit subsidy (a negative tax); its cost is subtracted from total surplus."
        ),
    }
    sign: ClassVar[float] = -1.0


class Entry(_Window):
    """New traders enter at ``start`` and trade with ``partners`` random traders of the other role.

    Parameters
    ----------
    n_buyers, n_sellers : int
        How many enter.
    partners : int or None
        Trading partners of each entrant, drawn at random among the other role (None: all).
    population : mapping
        Keyword arguments for the entrants' population (value, cost, sigma, ... as in the spec's
        ``[population]``); defaults to the spec's own distributions' defaults.
    """

    description: ClassVar[str] = "new traders enter the market"
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": ("New traders enter at a round with their own curves and links."),
        "stochasticity": (
            "Entrants' parameters and links are drawn from the intervention's own stream."
        ),
    }

    def __init__(
        self,
        n_buyers: int = 0,
        n_sellers: int = 0,
        partners: int | None = None,
        population: Mapping | None = None,
        start: int = 0,
        until=None,
    ) -> None:
        self.n_buyers = n_buyers
        self.n_sellers = n_sellers
        self.partners = partners
        self.population = population
        self.start = start
        self.until = until

    def check(self) -> None:
        """Whole numbers, at least one entrant; ``until`` is not supported (they stay)."""
        self._check_window()
        _whole("n_buyers", self.n_buyers)
        _whole("n_sellers", self.n_sellers)
        if self.n_buyers + self.n_sellers < 1:
            raise ValueError("n_buyers + n_sellers must be at least 1")
        if self.partners is not None:
            _whole("partners", self.partners, 1)
        if self.until is not None:
            raise ValueError("until is not allowed for entry: entrants stay (use remove_traders)")
        bad = set(self.population or {}) & {"n_buyers", "n_sellers", "rng"}
        if bad:
            raise ValueError(f"population.{sorted(bad)[0]} is not allowed here")

    def begin(self, market, rng: np.random.Generator) -> None:
        """Append the entrants' rows and their edges."""
        from propensim.agents.population import Population, build_population
        from propensim.plugins.types import TradingNetwork

        old = market.population
        conf = dict(self.population or {})
        conf.setdefault("curve", old.curve)
        new = build_population(int(self.n_buyers), int(self.n_sellers), rng=rng, **conf)
        cols = {}
        for name in ("role", *FLOAT_COLUMNS, *INT_COLUMNS):
            cols[name] = np.concatenate([getattr(old, name), getattr(new, name)])
        params = {}
        for key, arr in old.curve_params.items():
            extra = new.curve_params.get(key)
            if extra is None:
                raise ValueError(f"entrants need curve_params[{key!r}] like the other traders")
            params[key] = np.concatenate([arr, extra])
        pop = Population(**cols, curve=old.curve, curve_params=params)
        n_old, n = len(old), len(pop)
        rows = np.arange(n_old, n)
        net = market.network
        buyers = np.flatnonzero(pop.role == BUYER)
        sellers = np.flatnonzero(pop.role == SELLER)
        sellers_old = sellers[sellers < n_old]
        buyers_old = buyers[buyers < n_old]
        eb, es = [net.buyer], [net.seller]
        for r in rows:
            others = sellers_old if pop.role[r] == BUYER else buyers_old
            if self.partners is not None and self.partners < others.size:
                others = np.sort(rng.choice(others, size=int(self.partners), replace=False))
            mine = np.full(others.size, r)
            if pop.role[r] == BUYER:
                eb.append(mine)
                es.append(others)
            else:
                eb.append(others)
                es.append(mine)
        attributes = {}
        for key, values in net.attributes.items():
            fill = np.full(n - n_old, values[0] if values.size else 0, dtype=values.dtype)
            attributes[key] = np.concatenate([values, fill])
        network = TradingNetwork(
            n,
            np.concatenate(eb),
            np.concatenate(es),
            complete=net.complete and self.partners is None,
            attributes=attributes,
        )
        market.replace_population(pop, network)


class ValueShock(_Window):
    """A shock to buyers' values or sellers' costs: ``new = old x scale + shift``.

    The curves move with the values (``mu`` shifted by the same change) unless
    ``move_curves = false``. Undone at ``until``.

    Parameters
    ----------
    side : str
        ``"buyer"`` (values) or ``"seller"`` (costs).
    shift : float
        Added (price units).
    scale : float
        Multiplied (> 0).
    """

    description: ClassVar[str] = "shock to buyers' values or sellers' costs"
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "Buyers' values or sellers' costs change at a round (additive or proportional)."
        ),
    }

    def __init__(
        self,
        side: str = "buyer",
        shift: float = 0.0,
        scale: float = 1.0,
        move_curves: bool = True,
        start: int = 0,
        until=None,
    ) -> None:
        self.side = side
        self.shift = shift
        self.scale = scale
        self.move_curves = move_curves
        self.start = start
        self.until = until

    def check(self) -> None:
        """Finite shift, positive scale, a known side."""
        self._check_window()
        _finite("shift", self.shift)
        if _finite("scale", self.scale) <= 0:
            raise ValueError(f"scale must be > 0, got {self.scale!r}")
        if self.side not in ROLE_NAMES:
            raise ValueError(f"side must be 'buyer' or 'seller', got {self.side!r}")

    def begin(self, market, rng: np.random.Generator) -> None:
        """Move the values (and curves)."""
        pop = market.population
        rows = np.flatnonzero(pop.role == ROLE_NAMES.index(self.side))
        self._rows = rows
        self._before = (pop.value[rows].copy(), pop.mu[rows].copy())
        change = pop.value[rows] * (float(self.scale) - 1.0) + float(self.shift)
        pop.value[rows] += change
        if self.move_curves:
            pop.mu[rows] += change
        market.replace_population(pop)  # the one place that tells the market what changed

    def end(self, market, rng: np.random.Generator) -> None:
        """Put the values back (curves move back by the same change)."""
        pop = market.population
        value0, _ = self._before
        change = pop.value[self._rows] - value0
        pop.value[self._rows] = value0
        if self.move_curves:
            pop.mu[self._rows] -= change
        market.replace_population(pop)
