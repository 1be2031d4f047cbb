"""Imitate the best neighbour: a per-agent drift rule (an example plugin, not built in).

After each round every trader looks at its competitors: the traders of its own role that share a
trading partner with it (two buyers who can both buy from one seller, two sellers who can both
sell to one buyer). If the most successful of them did better this round than the trader did,
the trader moves its preferred price ``mu`` a share ``rate`` of the way toward that
competitor's. Success is the surplus a trader made this round: ``units * (value - price)`` for
a buyer, ``units * (price - cost)`` for a seller (a seller's cost lives in ``value``); a trader
that did not trade made 0. Widths ``sigma`` stay as they are.

Written trader by trader (``agent_drift``), the way a student would first write it: ``apply``
computes everyone's success once, then asks ``agent_drift`` for each trader's new ``mu``. One
Python call per trader: fine for a few thousand traders.

Use it from a spec with ``plugins = ["imitate_best.py"]`` and ``drift = "imitate_best"``.

References
----------
Imitation of the most successful neighbour is the update rule of M. A. Nowak and R. M. May,
"Evolutionary games and spatial chaos", Nature 359:826-829 (1992).
"""

import numpy as np

from propensim.plugins import register


@register("drift", "imitate_best")
class ImitateBest:
    """Move ``mu`` toward the most successful competitor's, if it did better.

    Parameters
    ----------
    rate : float
        Share of the gap closed per round, in [0, 1].
    """

    description = "Each trader moves its preferred price toward its most successful competitor's."

    def __init__(self, rate=0.3):
        self.rate = rate

    def check(self):
        """Refuse a rate outside [0, 1]."""
        if not (0.0 <= self.rate <= 1.0):
            raise ValueError(f"rate must be in [0, 1], got {self.rate!r}")

    @staticmethod
    def success(state, outcome):
        """Surplus of every trader this round, shape (n,) (0 where it did not trade)."""
        pop = state.population
        units = outcome.traded.astype(float)
        price = outcome.mean_price  # NaN where a trader did not trade
        gain = np.where(pop.role == 0, pop.value - price, price - pop.value)
        return np.where(units > 0, units * gain, 0.0)

    @staticmethod
    def competitors(i, network):
        """Rows of the same role as ``i`` that share a trading partner with it."""
        partners = network.neighbours(i)
        if partners.size == 0:
            return partners
        rivals = np.unique(np.concatenate([network.neighbours(int(p)) for p in partners]))
        return rivals[rivals != i]

    def agent_drift(self, i, state, success):
        """Trader row ``i``'s new preferred price."""
        mu = state.population.mu
        rivals = self.competitors(i, state.network)
        if rivals.size == 0:
            return float(mu[i])
        best = int(rivals[np.argmax(success[rivals])])  # ties: the lowest row
        if success[best] <= success[i]:
            return float(mu[i])
        return float(mu[i] + self.rate * (mu[best] - mu[i]))

    def apply(self, state, outcome, rng):
        """The new ``(mu, sigma)``: ``agent_drift`` trader by trader; no randomness used."""
        pop = state.population
        success = self.success(state, outcome)  # shape: (n,)
        mu = np.array([self.agent_drift(i, state, success) for i in range(len(pop))])
        return mu, pop.sigma.copy()
