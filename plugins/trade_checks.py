"""The invariants every batch of trades must keep, checked before the batch is settled.

The market's settle stage calls :func:`check_trades`, then
:meth:`~propensim.agents.population.Population.settle` (and :func:`settle_trades` is that pair, for
the conformance kit and for tests). Goods and money are conserved by construction: every unit
leaves a seller's stock for a buyer's, every payment leaves a buyer's cash for a seller's (or,
under a tax, for the treasury).
"""

from __future__ import annotations

import numpy as np

from propensim.agents.population import BUYER, SELLER, Population
from propensim.plugins import acceleration
from propensim.plugins.types import MarketState, Trades

#: Relative slack on budget checks: sums of float prices may differ from cash by rounding.
CASH_RTOL = 1e-9


def _first(mask: np.ndarray) -> int:
    return int(np.flatnonzero(mask)[0])


def check_trades(state: MarketState, trades: Trades) -> None:
    """Raise ``ValueError`` (one line) if ``trades`` break a clearing invariant for ``state``.

    Checked: trader rows exist; each trade joins a buyer (role 0) and a seller (role 1) that share
    an edge of ``state.network``; quantities are whole numbers >= 1 and prices finite; no trader
    trades more units than ``state.remaining`` allows; a buyer with finite cash spends no more
    than its cash (up to a relative rounding slack of ``CASH_RTOL``).

    Each check first asks a cheap question over the trades (a minimum, a maximum, an ``all``)
    and builds the full mask, to name the first offender, only when it fails. The edge check
    verifies the batch's ``edge`` hint where there is one and searches the network elsewhere.

    Parameters
    ----------
    state : MarketState
        The state the trades were cleared from.
    trades : Trades
        The batch to check.
    """
    if len(trades) == 0:
        return
    pop, net = state.population, state.network
    n = len(pop)
    b, s, p, q = trades.buyer, trades.seller, trades.price, trades.quantity
    if trades.edge is not None and net.n_edges:
        valid = acceleration.kernel("trades_valid")
        if (
            valid is not None
            and _fits(n, pop, net, state.remaining)
            and valid(
                b,
                s,
                q,
                p,
                trades.edge,
                pop.role,
                net.buyer_ptr,
                net.seller,
                state.remaining,
                pop.cash,
                CASH_RTOL,
            )
        ):
            return  # every check passed in one compiled pass; else the checks below say why
    b_lo, b_hi, s_lo, s_hi = b.min(), b.max(), s.min(), s.max()
    if min(b_lo, s_lo) < 0 or max(b_hi, s_hi) >= n:
        out_of_range = (b < 0) | (b >= n) | (s < 0) | (s >= n)  # shape: (n_trades,)
        i = _first(out_of_range)
        raise ValueError(f"trade {i} names trader rows ({b[i]}, {s[i]}) outside 0..{n - 1}")
    buyers, sellers = _role_runs(state)
    if not (buyers and buyers[0] <= b_lo and b_hi < buyers[1]):  # else: all in the buyers' run
        role_b = pop.role[b]  # shape: (n_trades,)
        if role_b.min() != BUYER or role_b.max() != BUYER:
            i = _first(role_b != BUYER)
            raise ValueError(f"trade {i}: buyer row {b[i]} is not a buyer (role {role_b[i]})")
    if not (sellers and sellers[0] <= s_lo and s_hi < sellers[1]):
        role_s = pop.role[s]  # shape: (n_trades,)
        if role_s.min() != SELLER or role_s.max() != SELLER:
            i = _first(role_s != SELLER)
            raise ValueError(f"trade {i}: seller row {s[i]} is not a seller (role {role_s[i]})")
    on_edge = _on_edge(net, b, s, trades.edge)  # shape: (n_trades,)
    if not on_edge.all():
        i = _first(~on_edge)
        raise ValueError(f"trade {i} crosses a missing edge: buyer {b[i]} - seller {s[i]}")
    if q.min() < 1:
        i = _first(q < 1)
        raise ValueError(f"trade {i} has quantity {q[i]}; must be >= 1")
    if not np.isfinite(p).all():
        i = _first(~np.isfinite(p))
        raise ValueError(f"trade {i} has a non-finite price {p[i]}")
    remaining = state.remaining
    if _over_capacity(b, q, remaining, n) or _over_capacity(s, q, remaining, n):
        unit = bool(q.max() == 1)
        units_b = np.bincount(b, minlength=n) if unit else np.bincount(b, weights=q, minlength=n)
        units_s = np.bincount(s, minlength=n) if unit else np.bincount(s, weights=q, minlength=n)
        units = units_b + units_s  # shape: (n,) buyers and sellers are different rows
        i = _first(units > remaining)
        raise ValueError(
            f"trader {i} trades {int(units[i])} units but may trade at most "
            f"{int(remaining[i])} this round (capacity, and stock for a seller)"
        )
    cash = pop.cash
    if np.isfinite(cash[b]).any():  # some buyer has a budget
        spend = np.bincount(b, weights=q * p, minlength=n)  # shape: (n,)
        slack = CASH_RTOL * np.maximum(np.abs(cash), 1.0)
        overspent = np.isfinite(cash) & (spend > cash + slack)
        if overspent.any():
            i = _first(overspent)
            raise ValueError(f"buyer {i} spends {spend[i]:.6g} but has cash {cash[i]:.6g}")


def _fits(n: int, pop: Population, net, remaining: np.ndarray) -> bool:
    """True if the columns the compiled check reads have the lengths it assumes."""
    return (
        pop.role.shape == (n,)
        and pop.cash.shape == (n,)
        and remaining.shape == (n,)
        and net.buyer_ptr.shape == (n + 1,)
        and int(net.buyer_ptr[-1]) <= net.seller.shape[0]
    )


#: Key of the per-market cache entry holding the runs of buyer and seller rows.
_ROLES_KEY = "invariants.role_runs"


def _role_runs(state: MarketState) -> tuple[tuple[int, int] | None, tuple[int, int] | None]:
    """The runs of buyer and seller rows: ``(lo, hi)`` each, or None.

    ``(lo, hi)`` when the buyers (then the sellers) are exactly the rows ``lo..hi-1``, else None
    (cached per market: roles never change).
    """
    pop = state.population
    entry = state.cache.get(_ROLES_KEY)
    if entry is not None and entry[0] is pop and entry[1] is pop.role:
        return entry[2]
    runs = []
    for role in (BUYER, SELLER):
        rows = np.flatnonzero(pop.role == role)
        whole = rows.size and int(rows[-1] - rows[0]) == rows.size - 1
        runs.append((int(rows[0]), int(rows[-1]) + 1) if whole else None)
    state.cache[_ROLES_KEY] = (pop, pop.role, tuple(runs))
    return runs[0], runs[1]


def _over_capacity(rows: np.ndarray, q: np.ndarray, remaining: np.ndarray, n: int) -> bool:
    """True if some row trades more units in all than ``remaining`` allows.

    When the rows are strictly increasing (each trader once, e.g. one trade per buyer listed
    by buyer row) a row's units are its single trade's quantity: no tally is needed.
    """
    if rows.size < 2 or bool(np.all(rows[1:] > rows[:-1])):
        return bool((q > remaining[rows]).any())
    units = np.bincount(rows, weights=q, minlength=n) if q.max() > 1 else np.bincount(rows)
    return bool((units[rows] > remaining[rows]).any())


def _on_edge(net, b: np.ndarray, s: np.ndarray, edge: np.ndarray | None) -> np.ndarray:
    """True where trade (b, s) lies on an edge: by its verified hint, else by a search.

    A hint is verified as ``buyer_ptr[b] <= edge < buyer_ptr[b + 1]`` (the edge is one of
    buyer ``b``'s, which also keeps it inside the edge list; ``b`` is already known to be a valid
    row) and ``seller[edge] == s``.
    """
    if edge is None or net.n_edges == 0:
        return net.has_edge(b, s)
    ptr = net.buyer_ptr  # shape: (n + 1,)
    found = edge >= ptr[b]  # shape: (n_trades,)
    found &= edge < ptr[1:][b]
    if found.all():
        found = net.seller[edge] == s
    else:
        mine = np.flatnonzero(found)
        found[mine] = net.seller[edge[mine]] == s[mine]
    if not found.all():  # a missing or wrong hint proves nothing: search those trades
        miss = np.flatnonzero(~found)
        found[miss] = net.has_edge(b[miss], s[miss])
    return found


def settle_trades(population: Population, trades: Trades, buyer_pays=None, seller_gets=None):
    """Transfer a checked batch: goods seller -> buyer, money buyer -> seller, in place.

    ``buyer_pays`` and ``seller_gets`` default to the trade prices (no tax). Large populations
    take the compiled twin of :meth:`Population.settle` (same numbers, one pass).
    """
    if len(trades) == 0:
        return
    pb = trades.price if buyer_pays is None else buyer_pays
    ps = pb if seller_gets is None else seller_gets
    if acceleration.settle(
        trades.buyer, trades.seller, trades.quantity, pb, ps, population.stock, population.cash
    ):
        return
    population.settle(trades.buyer, trades.seller, trades.quantity, pb, ps)
