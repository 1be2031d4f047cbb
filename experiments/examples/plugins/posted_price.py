"""Posted prices: an array clearing rule (an example plugin, not built in).

Every seller posts one price for the round, its preferred price ``mu`` plus ``markup``, moved
into the price bounds in force (a price ceiling or floor), and sells only at or above its cost
(a seller's cost lives in ``value``). Each buyer with units left then visits ``visits`` sellers in
turn, one drawn at random from its trading partners each time, and buys one unit at the posted
price with probability ``P_b(price)``: its own propensity curve at that price. A seller with
``r`` units left serves at most ``r`` of the buyers that chose it in a visit, in a random order.
Every price is a posted price inside the bounds, so the rule honours price ceilings and floors.

Use it from a spec with ``plugins = ["posted_price.py"]`` and ``clearing = "posted_price"``.

References
----------
Posted-offer pricing as an institution: C. R. Plott and V. L. Smith, "An experimental
examination of two exchange institutions", Review of Economic Studies 45:133-153 (1978).
"""

import numpy as np

from propensim.plugins import Trades, register


@register("clearing", "posted_price")
class PostedPrice:
    """Sellers post, buyers accept with their propensity at the posted price.

    Parameters
    ----------
    markup : float
        Added to each seller's preferred price to make its posted price (price units).
    visits : int
        Sellers each buyer visits per round (>= 1).
    """

    description = "Sellers post prices; buyers accept with their propensity at the posted price."
    honours_price_bounds = True  # every price is a posted price clipped into the bounds

    def __init__(self, markup=0.0, visits=2):
        self.markup = markup
        self.visits = visits

    def check(self):
        """Refuse a markup that is not finite, or fewer than one visit."""
        if not np.isfinite(self.markup):
            raise ValueError(f"markup must be a finite number, got {self.markup!r}")
        if isinstance(self.visits, bool) or not isinstance(self.visits, int) or self.visits < 1:
            raise ValueError(f"visits must be a whole number >= 1, got {self.visits!r}")

    def clear(self, state, rng):
        """The trades of the round (one unit per accepted visit)."""
        pop, net = state.population, state.network
        if net.n_edges == 0:
            return Trades.empty()
        posted = np.clip(pop.mu + self.markup, state.price_floor, state.price_ceiling)  # (n,)
        open_ = (pop.role == 1) & (posted >= pop.value)  # sellers who sell at their posted price
        left = np.array(state.remaining, dtype=np.int64, copy=True)  # this rule's own tally
        cash = np.array(pop.cash, dtype=float, copy=True)
        first, stop = net.buyer_ptr[:-1], net.buyer_ptr[1:]  # shape: (n,)
        degree = stop - first
        parts = []
        for _ in range(int(self.visits)):  # a few passes, each vectorised over the buyers
            buyers = np.flatnonzero((pop.role == 0) & (degree > 0) & (left > 0))
            if buyers.size == 0:
                break
            edge = first[buyers] + (rng.random(buyers.size) * degree[buyers]).astype(np.int64)
            sellers = net.seller[edge]  # shape: (n_visiting,)
            price = posted[sellers]
            accept = rng.random(buyers.size) < pop.curves(buyers).value(price)
            ok = accept & open_[sellers] & (left[sellers] > 0) & (cash[buyers] >= price)
            buyers, sellers, price, edge = buyers[ok], sellers[ok], price[ok], edge[ok]
            # each seller serves at most its units left, the buyers in a random order
            order = rng.permutation(buyers.size)
            order = order[np.argsort(sellers[order], kind="stable")]
            grouped = sellers[order]
            rank = np.arange(grouped.size) - np.searchsorted(grouped, grouped, side="left")
            keep = order[rank < left[grouped]]
            buyers, sellers, price, edge = buyers[keep], sellers[keep], price[keep], edge[keep]
            left[buyers] -= 1
            np.subtract.at(left, sellers, 1)
            cash[buyers] -= price
            parts.append(Trades(buyers, sellers, price, np.ones(buyers.size), edge=edge))
        return Trades.concat(parts)
