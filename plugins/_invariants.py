"""The invariants every batch of trades must keep, and applying a batch to the population.

The market calls :func:`check_trades` then :func:`apply_trades` every round; the conformance kit
(:mod:`propensim.plugins.testing`) calls them too. Goods and money are conserved by construction:
every unit leaves a seller's stock for a buyer's, every payment leaves a buyer's cash for a
seller's.
"""

from __future__ import annotations

import numpy as np

from propensim.agents.population import BUYER, SELLER, Population
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
    out_of_range = (b < 0) | (b >= n) | (s < 0) | (s >= n)  # shape: (n_trades,)
    if out_of_range.any():
        i = _first(out_of_range)
        raise ValueError(f"trade {i} names trader rows ({b[i]}, {s[i]}) outside 0..{n - 1}")
    not_buyer = pop.role[b] != BUYER  # shape: (n_trades,)
    if not_buyer.any():
        i = _first(not_buyer)
        raise ValueError(f"trade {i}: buyer row {b[i]} is not a buyer (role {pop.role[b[i]]})")
    not_seller = pop.role[s] != SELLER  # shape: (n_trades,)
    if not_seller.any():
        i = _first(not_seller)
        raise ValueError(f"trade {i}: seller row {s[i]} is not a seller (role {pop.role[s[i]]})")
    missing = ~net.has_edge(b, s)  # shape: (n_trades,)
    if missing.any():
        i = _first(missing)
        raise ValueError(f"trade {i} crosses a missing edge: buyer {b[i]} - seller {s[i]}")
    bad_q = q < 1
    if bad_q.any():
        i = _first(bad_q)
        raise ValueError(f"trade {i} has quantity {q[i]}; must be >= 1")
    bad_p = ~np.isfinite(p)
    if bad_p.any():
        i = _first(bad_p)
        raise ValueError(f"trade {i} has a non-finite price {p[i]}")
    units = np.bincount(b, weights=q, minlength=n) + np.bincount(s, weights=q, minlength=n)
    over = units > state.remaining  # shape: (n,)
    if over.any():
        i = _first(over)
        raise ValueError(
            f"trader {i} trades {int(units[i])} units but may trade at most "
            f"{int(state.remaining[i])} this round (capacity, and stock for a seller)"
        )
    spend = np.bincount(b, weights=q * p, minlength=n)  # shape: (n,)
    cash = pop.cash
    overspent = np.isfinite(cash) & (spend > cash + CASH_RTOL * np.maximum(np.abs(cash), 1.0))
    if overspent.any():
        i = _first(overspent)
        raise ValueError(f"buyer {i} spends {spend[i]:.6g} but has cash {cash[i]:.6g}")


def apply_trades(population: Population, trades: Trades) -> None:
    """Move goods seller -> buyer and money buyer -> seller, in place.

    ``stock[seller] -= q``, ``stock[buyer] += q``, ``cash[buyer] -= q p``, ``cash[seller] += q p``
    (a buyer with infinite cash keeps infinite cash). Total stock is unchanged; total finite cash
    is unchanged when every buyer has a finite budget.
    """
    if len(trades) == 0:
        return
    n = len(population)
    q = trades.quantity
    units = np.bincount(trades.buyer, weights=q, minlength=n) - np.bincount(
        trades.seller, weights=q, minlength=n
    )  # shape: (n,)
    population.stock += units.astype(np.int64)
    pay = q * trades.price  # shape: (n_trades,)
    flow = np.bincount(trades.seller, weights=pay, minlength=n) - np.bincount(
        trades.buyer, weights=pay, minlength=n
    )  # shape: (n,)
    population.cash += flow
