"""Sequential greedy acceptance of candidate trades, computed in vectorised passes.

Many clearing rules produce a list of candidate ``(buyer, seller)`` unit trades in some priority
order and accept them one by one while both sides have capacity left (and, optionally, while the
buyer can still pay). Done literally that is a Python loop over candidates. :func:`greedy_accept`
gives exactly the same accepted set with a few array passes.

Why the passes are exact. Call ``A`` the set the sequential loop accepts. A candidate ``c`` at
buyer ``b`` is in ``A`` iff, when its turn comes, ``b`` has accepted fewer than ``cap_b`` units
(and spent no more than ``cash_b - price_c``) and its seller likewise has room. Every pass looks
at the still-undecided ("open") candidates and uses only what happened *before* ``c`` in the
order:

* **safe accept**: (accepted before ``c`` at ``b``) + (open before ``c`` at ``b``) < ``cap_b``,
  and the same bound for money, and the same at the seller. Even if every open earlier candidate
  were accepted, ``c`` still fits, so ``c`` is in ``A``;
* **sure reject**: (accepted before ``c`` at ``b``) >= ``cap_b`` (or money already spent before
  ``c`` plus its price exceeds the cash), or the seller is full before ``c``. Then ``c`` is not
  in ``A``.

Where every contested trader of a side has one unit, "nothing open before ``c``" is a group
minimum (``np.minimum.at``), so that side needs no sort at all (the common case).

The first open candidate in the order has nothing open before it, so each pass decides at least
that one; on random inputs a handful of passes decide everything. Long dependency chains (an
adversarial case) could need many passes, so after ``max_passes`` the few candidates left are
finished by a plain loop in order, which is exact for the same reason.
"""

from __future__ import annotations

import numpy as np

OPEN, ACCEPTED, REJECTED = 0, 1, 2
_NEVER = np.iinfo(np.int64).max  # a rank after every rank


def _group_starts(groups: np.ndarray) -> np.ndarray:
    """Index of the first element of each element's run, for an array sorted into runs."""
    n = groups.shape[0]
    first = np.empty(n, dtype=bool)  # shape: (n,)
    if n:
        first[0] = True
        np.not_equal(groups[1:], groups[:-1], out=first[1:])
    pos = np.arange(n)
    return np.maximum.accumulate(np.where(first, pos, 0))  # shape: (n,)


def _grouped(ids: np.ndarray, group: np.ndarray, n_groups: int) -> np.ndarray:
    """Reorder ``ids`` (given in processing order) so equal ``group[ids]`` form runs.

    Keeps processing order within each run. Skips the sort when the runs already are.
    """
    g = group[ids]
    if g.size < 2:
        return ids
    runs = 1 + int(np.count_nonzero(g[1:] != g[:-1]))
    if runs == int(np.count_nonzero(np.bincount(g, minlength=n_groups))):
        return ids  # each group is already one run (e.g. a buyer's meetings side by side)
    return ids[np.argsort(g, kind="stable")]


def _segmented_exclusive_cumsum(starts: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Sum of ``values`` over the earlier elements of the same run (runs given by ``starts``)."""
    csum = np.cumsum(values)
    excl = csum - values  # shape: (n,)
    return excl - excl[starts]


def greedy_accept(
    order: np.ndarray,
    buyer: np.ndarray,
    seller: np.ndarray,
    cap_buyer: np.ndarray,
    cap_seller: np.ndarray,
    *,
    price: np.ndarray | None = None,
    cash: np.ndarray | None = None,
    max_passes: int = 32,
    unique_buyers: bool = False,
    unique_order: bool = False,
) -> np.ndarray:
    """Which candidate unit trades a one-by-one greedy pass would accept.

    Candidates are taken in ascending ``order`` (ties by position); each is accepted if its buyer
    and its seller both have capacity left and, when ``cash`` is given, the buyer's spending so
    far this call plus ``price`` does not exceed its cash. A rejected candidate uses nothing.

    Parameters
    ----------
    order : ndarray, shape (m,)
        Sort key of each candidate (lower goes first).
    buyer, seller : ndarray of int, shape (m,)
        Trader rows of each candidate.
    cap_buyer, cap_seller : ndarray of int, shape (n,)
        Units each trader row may still take (indexed by the values in ``buyer``/``seller``).
    price : ndarray, shape (m,), optional
        Price of each candidate unit (price units); needed with ``cash``.
    cash : ndarray, shape (n,), optional
        Budget of each buyer row (``inf``: no budget).
    max_passes : int
        Vectorised passes before the remaining candidates are finished by a loop in order.
    unique_buyers : bool
        The caller guarantees that no buyer row appears twice in ``buyer``. With no budget and
        at most one unit per seller the answer is then "first candidate of each seller", found
        with one group minimum (``np.minimum.at``) instead of passes.
    unique_order : bool
        The caller guarantees that ``order`` has no ties (e.g. a permutation): the shortcut then
        compares the keys as they are.

    Returns
    -------
    ndarray of bool, shape (m,)
        True where the candidate is accepted. Identical to the sequential loop's result.
    """
    order = np.asarray(order)
    m = order.shape[0]
    if m == 0:
        return np.zeros(0, dtype=bool)
    buyer = np.asarray(buyer, dtype=np.int64)
    seller = np.asarray(seller, dtype=np.int64)
    n_rows = max(len(cap_buyer), len(cap_seller))
    if unique_buyers and cash is None:
        cap_s = np.asarray(cap_seller)[seller]  # shape: (m,)
        if cap_s.max() <= 1:
            can = np.asarray(cap_buyer)[buyer] > 0  # shape: (m,)
            if cap_s.min() <= 0:
                can &= cap_s > 0
            return _first_per_seller(order, seller, can, n_rows, unique_order)
    cap_b = np.asarray(cap_buyer)[buyer].astype(np.int64)  # shape: (m,)
    cap_s = np.asarray(cap_seller)[seller].astype(np.int64)  # shape: (m,)

    spend = cash_b = None
    if cash is not None:
        if price is None:
            raise ValueError("price is required when cash is given")
        cash_b = np.asarray(cash, dtype=float)[buyer]  # shape: (m,)
        budgeted = np.isfinite(cash_b)  # shape: (m,)
        if budgeted.any():
            # Only budgeted buyers' spending matters; zeros elsewhere keep the cumsums small.
            spend = np.where(budgeted, np.asarray(price, dtype=float), 0.0)  # shape: (m,)
            cash_b = np.where(budgeted, cash_b, np.inf)
    if unique_buyers and spend is None and cap_s.max() <= 1:
        return _first_per_seller(order, seller, (cap_b > 0) & (cap_s > 0), n_rows, unique_order)
    status = np.zeros(m, dtype=np.int8)  # shape: (m,) OPEN, ACCEPTED or REJECTED
    status[(cap_b <= 0) | (cap_s <= 0)] = REJECTED
    if spend is not None:
        status[spend > cash_b] = REJECTED  # dearer than the whole budget: never bought

    sorted_already = bool(np.all(order[1:] >= order[:-1]))
    seq = np.arange(m) if sorted_already else np.argsort(order, kind="stable")  # processing order
    pos = seq if sorted_already else np.empty(m, dtype=np.int64)
    if not sorted_already:
        pos[seq] = np.arange(m)  # processing position of each candidate

    # A side is "contested" at a trader whose open candidates could not all fit; elsewhere every
    # candidate fits on that side whatever happens. Candidates contested on neither side are
    # accepted at once; only the contested ones need passes.
    still = status == OPEN  # shape: (m,)
    load_b = np.bincount(buyer[still], minlength=n_rows)[buyer]  # open candidates at my buyer
    load_s = np.bincount(seller[still], minlength=n_rows)[seller]
    hot_b = still & (load_b > cap_b)  # shape: (m,)
    if spend is not None:
        money = np.bincount(buyer[still], weights=spend[still], minlength=n_rows)[buyer]
        hot_b |= still & (money > cash_b)
    hot_s = still & (load_s > cap_s)  # shape: (m,)
    status[still & ~hot_b & ~hot_s] = ACCEPTED
    live = seq[(hot_b | hot_s)[seq]]  # open contested candidates, in processing order
    side_b = _Side(buyer, cap_b, live[hot_b[live]], n_rows, pos, spend, cash_b)
    side_s = _Side(seller, cap_s, live[hot_s[live]], n_rows, pos)
    ok_b = np.ones(m, dtype=bool)  # scratch: side check passed (uncontested sides pass)
    ok_s = np.ones(m, dtype=bool)

    for _ in range(max_passes):
        if live.size == 0:
            return status == ACCEPTED
        ok_b[side_b.ids] = side_b.fits()
        ok_s[side_s.ids] = side_s.fits()
        status[live[ok_b[live] & ok_s[live]]] = ACCEPTED  # safe on both sides
        ok_b[side_b.ids] = True
        ok_s[side_s.ids] = True
        side_b.record(status)
        side_s.record(status)
        live = live[status[live] == OPEN]
        full = side_b.full(live) | side_s.full(live)  # shape: (n_live,) surely rejected
        status[live[full]] = REJECTED
        live = live[~full]
        side_b.prune(status)
        side_s.prune(status)

    # Rare: a long dependency chain. Finish the open ones in order, from the counts of what was
    # accepted before each and what this loop accepts.
    extra_b: dict[int, list] = {}
    extra_s: dict[int, list] = {}
    for c in live.tolist():
        b, s = int(buyer[c]), int(seller[c])
        got_b = extra_b.setdefault(b, [0, 0.0])
        got_s = extra_s.setdefault(s, [0, 0.0])
        if side_b.blocked(c, *got_b) or side_s.blocked(c, *got_s):
            status[c] = REJECTED
            continue
        status[c] = ACCEPTED
        got_b[0] += 1
        got_s[0] += 1
        if spend is not None:
            got_b[1] += float(spend[c])
    return status == ACCEPTED


def _first_per_seller(
    order: np.ndarray, seller: np.ndarray, can: np.ndarray, n_rows: int, unique: bool = False
) -> np.ndarray:
    """Greedy acceptance when every buyer has one candidate and every seller one unit.

    Only sellers compete, so a candidate is accepted iff both its sides have a unit (``can``)
    and it comes first in the order among its seller's such candidates: one group minimum
    (``np.minimum.at``). Whole-number keys are made unique by position (``key * m + position``,
    the order's tie rule) and need no sort.
    """
    m = order.shape[0]
    if unique and order.dtype.kind in "iu":
        rank = order  # no ties: the keys themselves
    elif order.dtype.kind in "iu" and m < 2**31 and int(np.abs(order).max()) < 2**31:
        rank = order.astype(np.int64) * m  # shape: (m,) key, then position: unique
        rank += np.arange(m)
    else:
        rank = np.empty(m, dtype=np.int64)
        rank[np.argsort(order, kind="stable")] = np.arange(m)
    first = np.full(n_rows, _NEVER)  # scratch: each seller's first rank
    if can.all():
        np.minimum.at(first, seller, rank)
        return first[seller] == rank
    np.minimum.at(first, seller[can], rank[can])
    return can & (first[seller] == rank)


class _Side:
    """The contested candidates of one side (buyers or sellers) and what they have used.

    Two ways to decide "fits whatever happens before": where every contested trader takes one
    unit, a candidate fits iff it comes first among its trader's open candidates (a group minimum
    by ``np.minimum.at``, no sort); otherwise candidates are grouped by trader once (a stable sort)
    and ranked within their group each pass, with accepted-before counts (and money, for budgets).
    """

    def __init__(self, group, cap, ids, n_rows, pos, spend=None, cash=None):
        self.group, self.cap, self.pos = group, cap, pos
        # With one unit per trader a budget only matters up front (dearer units are rejected).
        self.unit = bool(np.all(cap[ids] == 1))
        self.spend = None if self.unit else spend
        self.cash = cash
        if self.unit:
            self.ids = ids
            self.first = np.full(n_rows, np.iinfo(np.int64).max)  # scratch: group minimum
            self.used = np.zeros(n_rows, dtype=bool)  # trader took its unit
        else:
            self.ids = _grouped(ids, group, n_rows)  # grouped by trader, in order
            self.acc = np.zeros(group.shape[0], dtype=np.int64)  # units accepted before c
            self.acc_spend = np.zeros(group.shape[0])  # money accepted before c
            self.starts = None

    def fits(self) -> np.ndarray:
        ids, g = self.ids, self.group[self.ids]
        if self.unit:
            p = self.pos[ids]
            self.first[g] = np.iinfo(np.int64).max
            np.minimum.at(self.first, g, p)
            return self.first[g] == p
        self.starts = starts = _group_starts(g)
        open_before = np.arange(ids.size) - starts  # shape: (n_hot,)
        ok = self.acc[ids] + open_before < self.cap[ids]
        if self.spend is not None:
            sp = self.spend[ids]
            open_spend = _segmented_exclusive_cumsum(starts, sp)
            ok &= self.acc_spend[ids] + open_spend + sp <= self.cash[ids]
        return ok

    def record(self, status: np.ndarray) -> None:
        ids = self.ids
        new = status[ids] == ACCEPTED  # shape: (n_hot,)
        if self.unit:
            self.used[self.group[ids[new]]] = True
            return
        self.acc[ids] += _segmented_exclusive_cumsum(self.starts, new.astype(np.int64))
        if self.spend is not None:
            self.acc_spend[ids] += _segmented_exclusive_cumsum(
                self.starts, np.where(new, self.spend[ids], 0.0)
            )

    def full(self, live: np.ndarray) -> np.ndarray:
        if self.unit:
            return self.used[self.group[live]]
        out = self.acc[live] >= self.cap[live]
        if self.spend is not None:
            out |= self.acc_spend[live] + self.spend[live] > self.cash[live]
        return out

    def prune(self, status: np.ndarray) -> None:
        self.ids = self.ids[status[self.ids] == OPEN]

    def blocked(self, c: int, extra_units: int, extra_money: float) -> bool:
        """Sequential check for the loop finish (``extra_*``: accepted earlier in the loop)."""
        if self.unit:
            return bool(self.used[self.group[c]]) or extra_units >= self.cap[c]
        if self.acc[c] + extra_units >= self.cap[c]:
            return True
        if self.spend is not None:
            return bool(self.acc_spend[c] + extra_money + self.spend[c] > self.cash[c])
        return False


def greedy_accept_loop(order, buyer, seller, cap_buyer, cap_seller, *, price=None, cash=None):
    """Plain sequential reference for :func:`greedy_accept` (tests and tiny inputs)."""
    order = np.asarray(order)
    cap_b = np.array(cap_buyer, dtype=np.int64, copy=True)
    cap_s = np.array(cap_seller, dtype=np.int64, copy=True)
    left = None if cash is None else np.array(cash, dtype=float, copy=True)
    out = np.zeros(order.shape[0], dtype=bool)
    for c in np.argsort(order, kind="stable").tolist():
        b, s = int(buyer[c]), int(seller[c])
        if cap_b[b] <= 0 or cap_s[s] <= 0:
            continue
        if left is not None and np.isfinite(left[b]) and price[c] > left[b]:
            continue
        out[c] = True
        cap_b[b] -= 1
        cap_s[s] -= 1
        if left is not None and np.isfinite(left[b]):
            left[b] -= price[c]
    return out
