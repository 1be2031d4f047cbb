"""Built-in clearing rules: how one round of market state becomes trades.

Five rules, each a :class:`~propensim.plugins.contracts.ClearingRule` registered under the
``propensim.clearing`` entry-point group exactly as a third party's would be:

===========================  =====================================================================
``propensity``               :class:`PropensityMatching`: random meetings on network edges, trade
                             with probability = joint propensity peak (the model's own rule)
``propensity_per_agent``     :class:`PropensityMatchingPerAgent`: the same, written trader by
                             trader (slow, for teaching and as a reference)
``call_auction``             :class:`CallAuction`: uniform-price call market per connected part
``double_auction``           :class:`DoubleAuction`: continuous double auction, ZI or curve quotes
``bargaining``               :class:`BilateralBargaining`: crossing neighbours split the difference
===========================  =====================================================================

Every rule reads ``state`` and draws only from ``rng``; none trades across a missing edge, beyond
``state.remaining`` or beyond a buyer's finite cash (checked by
:func:`~propensim.plugins.trade_checks.check_trades` and the conformance kit
:mod:`propensim.plugins.testing`). An empty network, or quotes that never cross, give no trades.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np

from propensim.agents.population import BUYER
from propensim.plugins._auctions import (
    bargaining,
    bounded_quotes,
    call_auction,
    double_auction,
    reservation_prices,
)
from propensim.plugins._matching import (
    RowAgent,
    pair_meeting,
    propensity_round,
    run_per_agent,
)
from propensim.plugins.types import MarketState, Trades

__all__ = [
    "BilateralBargaining",
    "CallAuction",
    "DoubleAuction",
    "PropensityMatching",
    "PropensityMatchingPerAgent",
    "RowAgent",
    "run_per_agent",
]


def _check_count(name: str, value, minimum: int = 0) -> None:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < minimum:
        raise ValueError(f"{name} must be a whole number >= {minimum}, got {value!r}")


def _check_threshold(name: str, value, *, allow_none: bool = False) -> None:
    if value is None and allow_none:
        return
    try:
        ok = 0.0 < float(value) <= 1.0
    except (TypeError, ValueError):
        ok = False
    if not ok:
        extra = " or None" if allow_none else ""
        raise ValueError(f"{name} must be in (0, 1]{extra}, got {value!r}")


def _check_choice(name: str, value, allowed: tuple[str, ...]) -> None:
    if value not in allowed:
        raise ValueError(f"{name} must be one of {', '.join(allowed)}; got {value!r}")


class PropensityMatching:
    """Random meetings on network edges; a meeting trades with the joint propensity's peak.

    Each buyer with units left meets ``meetings`` sellers drawn uniformly, with replacement, from
    its network neighbours. A buyer-seller meeting trades one unit with probability equal to the
    peak of the joint curve ``J(x) = P_b(x) P_s(x)``, at a price drawn from ``J`` normalised.
    Successful meetings are accepted in the order (random buyer order, meeting number) while both
    sides have units left and the buyer can pay (a buyer with finite cash never pays more than it
    has left), so the outcome has the same distribution as the trader-by-trader loop of
    :class:`PropensityMatchingPerAgent`.

    Parameters
    ----------
    meetings : int
        Meetings per buyer per round (>= 0).
    threshold : float or None
        None (default): a meeting trades with probability = peak. A number in (0, 1]: a meeting
        trades for sure when the peak is at least ``threshold`` and never otherwise (a
        deterministic acceptance rule; the price is still drawn from the joint curve).
    grid_points : int
        Price-grid size for joint curves of non-normal families (>= 16).

    Notes
    -----
    Normal curves use the closed form inline: peak
    ``a_b a_s exp(-(mu_b - mu_s)^2 / (2 (s_b^2 + s_s^2)))`` and price
    ``N(mu*, sigma*^2)`` with ``mu* = (mu_b s_s^2 + mu_s s_b^2)/(s_b^2 + s_s^2)`` and
    ``sigma*^2 = s_b^2 s_s^2 / (s_b^2 + s_s^2)``. Other families go through
    ``propensim.agents.joint_curve``. Cost: O(buyers x meetings) array work per round, a few
    milliseconds at 1e5 traders.

    References
    ----------
    P. A. Bromiley, "Products and Convolutions of Gaussian Probability Density Functions",
    Tina Memo 2003-003, University of Manchester (2003).
    """

    description: ClassVar[str] = (
        "propensity matching: meetings trade with chance = joint curve peak, price drawn from it"
    )
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "Trade is a stochastic event: a buyer-seller meeting trades with probability "
            "equal to the peak of the product of the two propensity curves, at a price drawn "
            "from that product (no assumed clearing price)."
        ),
        "interaction": (
            "Each buyer with units left meets a number of sellers drawn at random from its "
            "trading partners on the network, every round."
        ),
        "stochasticity": (
            "Who meets whom, whether a meeting trades, the price, and the order in which "
            "agreements are accepted are random (the clearing stream)."
        ),
        "sensing": (
            "A trader knows only its own curve and units left; a meeting reveals nothing else."
        ),
    }
    honours_price_bounds: ClassVar[bool] = True

    def __init__(
        self, meetings: int = 1, threshold: float | None = None, grid_points: int = 257
    ) -> None:
        self.meetings = meetings
        self.threshold = threshold
        self.grid_points = grid_points

    def check(self) -> None:
        """Raise ``ValueError`` naming a parameter outside its allowed range."""
        _check_count("meetings", self.meetings)
        _check_threshold("threshold", self.threshold, allow_none=True)
        _check_count("grid_points", self.grid_points, 16)

    def clear(self, state: MarketState, rng: np.random.Generator) -> Trades:
        """Return this round's trades (one row per unit trade)."""
        return propensity_round(
            state,
            rng,
            int(self.meetings),
            None if self.threshold is None else float(self.threshold),
            int(self.grid_points),
        )


class PropensityMatchingPerAgent:
    """Propensity matching written trader by trader, as a student would (per-agent path).

    Same process as :class:`PropensityMatching`: a buyer with units left makes ``meetings``
    meetings with uniformly drawn neighbouring sellers; each trades with probability = joint peak
    at a price drawn from the joint curve, if the seller still has units and the buyer can pay.
    Sellers make no calls of their own. The market calls :meth:`agent_trades` for every trader in
    a random order (:func:`run_per_agent`); the results match the array rule in distribution.

    Parameters
    ----------
    meetings : int
        Meetings per buyer per round (>= 0).

    References
    ----------
    P. A. Bromiley, Tina Memo 2003-003 (2003): the joint curve of two normal curves.
    """

    description: ClassVar[str] = (
        "per-agent propensity matching: each buyer in turn meets sellers (slow reference version)"
    )
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "The trader-by-trader version of propensity matching: each buyer in turn meets "
            "partners and trades with the joint curve's peak probability."
        ),
        "interaction": ("Buyers, in a random order each round, meet random trading partners."),
        "stochasticity": (
            "The order of buyers, the partners met, the trade decisions and the prices are random."
        ),
    }
    per_agent: ClassVar[bool] = True

    def __init__(self, meetings: int = 1) -> None:
        self.meetings = meetings

    def check(self) -> None:
        """Raise ``ValueError`` naming a parameter outside its allowed range."""
        _check_count("meetings", self.meetings)

    def agent_trades(self, agent, state: MarketState, rng: np.random.Generator) -> list:
        """One trader's trades this round, as ``(buyer, seller, price, quantity)`` tuples."""
        i = int(agent.index)
        pop, net = state.population, state.network
        if pop.role[i] != BUYER:
            return []  # sellers wait to be met
        units_left = int(state.remaining[i])
        sellers = net.seller[net.buyer_ptr[i] : net.buyer_ptr[i + 1]]
        if units_left <= 0 or sellers.size == 0:
            return []
        cash_left = float(pop.cash[i])
        taken: dict[int, int] = {}  # units this buyer already took from each seller
        trades = []
        for _ in range(int(self.meetings)):
            if units_left == 0:
                break
            j = int(sellers[rng.integers(sellers.size)])  # a random neighbour
            peak, draw_price = pair_meeting(pop, i, j)
            if rng.random() >= peak:
                continue  # no agreement this time
            price = draw_price(rng)
            if state.remaining[j] - taken.get(j, 0) <= 0 or price > cash_left:
                continue  # seller sold out, or the buyer cannot pay
            trades.append((i, j, price, 1))
            taken[j] = taken.get(j, 0) + 1
            units_left -= 1
            cash_left -= price
        return trades

    def clear(self, state: MarketState, rng: np.random.Generator) -> Trades:
        """Run :meth:`agent_trades` for every row in random order (see :func:`run_per_agent`)."""
        return run_per_agent(self, state, rng)


class CallAuction:
    """Uniform-price call auction in each connected part of the trading network.

    Bids are the buyers' reservation prices (highest price accepted with probability >=
    ``threshold``) and asks the sellers' (lowest such price), or, with ``quotes="value"``, the
    values and costs themselves (truthful). Each trader offers every unit it has left; a buyer
    with a finite budget bids its j-th unit at no more than ``cash / j``. Within each connected
    component demand is sorted down and supply up; ``q`` units trade, where ``q`` is the last rank
    at which the bid covers the ask, at one price ``low + k (high - low)`` on the clearing interval
    ``[max(c_q, v_{q+1}), min(v_q, c_{q+1})]``. On a complete network every winner trades; on a
    sparse one winners are paired along edges greedily in random order and any left without a
    connected partner do not trade (their count is kept in ``unmatched_`` after each call).

    Parameters
    ----------
    k : float
        Where in the clearing interval the price sits, in [0, 1] (0: lowest, 1: highest).
    quotes : {"reservation", "value"}
        Quote reservation prices of the curves, or values and costs (truthful).
    threshold : float
        Acceptance probability defining the reservation price, in (0, 1].

    Notes
    -----
    Cost: sorting all offered units once, O(u log u), all components at once.

    References
    ----------
    Standard textbook result: competitive equilibrium at the crossing of sorted demand and supply
    attains the maximum surplus (first welfare theorem).
    M. A. Satterthwaite and S. R. Williams, Rev. Econ. Stud. 56(4):477-498 (1989): the k rule.
    """

    description: ClassVar[str] = (
        "uniform-price call auction per connected part: one k-rule price where bids and asks cross"
    )
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "A uniform-price call auction: bids and asks (reservation prices of the curves, "
            "or values and costs) are sorted and cleared at one price per connected part of "
            "the network (competitive equilibrium)."
        ),
        "interaction": (
            "Indirect, through the order book of each connected part; winners are paired "
            "along network edges."
        ),
        "stochasticity": (
            "Ties among equal quotes and the pairing of winners on a sparse network are random."
        ),
        "objectives": ("Traders quote their reservation prices: no strategic quoting."),
    }
    honours_price_bounds: ClassVar[bool] = True

    def __init__(self, k: float = 0.5, quotes: str = "reservation", threshold: float = 0.5) -> None:
        self.k = k
        self.quotes = quotes
        self.threshold = threshold

    def check(self) -> None:
        """Raise ``ValueError`` naming a parameter outside its allowed range."""
        try:
            ok = 0.0 <= float(self.k) <= 1.0
        except (TypeError, ValueError):
            ok = False
        if not ok:
            raise ValueError(f"k must be in [0, 1], got {self.k!r}")
        _check_choice("quotes", self.quotes, ("reservation", "value"))
        _check_threshold("threshold", self.threshold)

    def clear(self, state: MarketState, rng: np.random.Generator) -> Trades:
        """Return this round's trades (one row per buyer-seller pair, with a quantity)."""
        pop = state.population
        if self.quotes == "value":
            quote = pop.value
        else:
            quote = reservation_prices(pop, float(self.threshold))
        quote = bounded_quotes(state, quote)
        trades, self.unmatched_ = call_auction(state, quote, float(self.k), rng)
        return trades


class DoubleAuction:
    """Continuous double auction with a standing book, per connected part of the network.

    ``quotes_per_round`` quote arrivals are drawn uniformly among traders with units left and at
    least one partner. An arriving buyer's bid trades with the lowest standing ask among its
    connected sellers if it covers it (price = that ask), an arriving seller's ask with the highest
    standing connected bid (price = that bid); otherwise the quote becomes the trader's standing
    quote if it improves on it (a higher bid, a lower ask). On a complete network this is Gode and
    Sunder's rule that a new bid must beat the market bid. After a trade the book of that
    component is cleared, as in their markets.

    Strategies: ``"zi_c"`` budget-constrained zero intelligence (bid uniform in
    ``[price_low, value]``, ask uniform in ``[cost, price_high]``: never trades at a loss);
    ``"zi_u"`` unconstrained (uniform in ``[price_low, price_high]``); ``"curve"`` a price drawn
    from the trader's own propensity curve (normal family: ``N(mu, sigma^2)``; other families by
    inverse CDF on a grid over the price range). A buyer never bids above its cash left.

    Parameters
    ----------
    strategy : {"zi_c", "zi_u", "curve"}
        How quotes are drawn.
    quotes_per_round : int or None
        Quote arrivals per round; None means 20 per trader able to quote, enough for ZI-C
        traders to exhaust nearly all profitable trades.
    price_low, price_high : float or None
        Quote range; None means the lowest (highest) of all values and costs in the population.

    Notes
    -----
    Cost: a Python loop over quote arrivals, each scanning the arriving trader's partners. The
    loop is inherent: each quote meets the book that all earlier quotes left, so arrivals cannot
    be processed in parallel. All random numbers are drawn before the loop.

    References
    ----------
    D. K. Gode and S. Sunder, J. Political Economy 101(1):119-137 (1993).
    """

    description: ClassVar[str] = (
        "continuous double auction with a standing book; zero-intelligence or curve-drawn quotes"
    )
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "A continuous double auction with one standing quote per trader: an arriving bid "
            "(ask) trades with the best ask (bid) among its partners when they cross."
        ),
        "interaction": ("Through the standing quotes of network partners."),
        "stochasticity": (
            "Arrival order and quotes are random (zero-intelligence quotes, or draws from "
            "each trader's curve)."
        ),
        "sensing": ("An arriving trader sees its partners' standing quotes."),
    }
    honours_price_bounds: ClassVar[bool] = True

    def __init__(
        self,
        strategy: str = "zi_c",
        quotes_per_round: int | None = None,
        price_low: float | None = None,
        price_high: float | None = None,
    ) -> None:
        self.strategy = strategy
        self.quotes_per_round = quotes_per_round
        self.price_low = price_low
        self.price_high = price_high

    def check(self) -> None:
        """Raise ``ValueError`` naming a parameter outside its allowed range."""
        _check_choice("strategy", self.strategy, ("zi_c", "zi_u", "curve"))
        if self.quotes_per_round is not None:
            _check_count("quotes_per_round", self.quotes_per_round)
        for name in ("price_low", "price_high"):
            v = getattr(self, name)
            if v is not None and not np.isfinite(float(v)):
                raise ValueError(f"{name} must be a finite number or None, got {v!r}")
        if (
            self.price_low is not None
            and self.price_high is not None
            and float(self.price_low) > float(self.price_high)
        ):
            raise ValueError(
                f"price_low must be <= price_high, got {self.price_low!r} > {self.price_high!r}"
            )

    def clear(self, state: MarketState, rng: np.random.Generator) -> Trades:
        """Return this round's trades (one row per unit trade, in the order they happened)."""
        return double_auction(
            state, rng, self.strategy, self.quotes_per_round, self.price_low, self.price_high
        )


class BilateralBargaining:
    """Neighbours whose reservation prices cross split the difference.

    Every network edge whose buyer's reservation price is at least its seller's is a deal at the
    midpoint of the two. Deals are taken in random order, each pair trading up to the units both
    have left, while each trader has units left (and the buyer cash for the price).

    Parameters
    ----------
    threshold : float
        Acceptance probability defining the reservation price, in (0, 1].

    Notes
    -----
    Cost: O(edges) array work plus :func:`~propensim.plugins.sequential_accept.greedy_accept`.

    References
    ----------
    J. F. Nash, "The bargaining problem", Econometrica 18(2):155-162 (1950): with equal
    bargaining power the symmetric split of the surplus, here the midpoint price.
    """

    description: ClassVar[str] = (
        "bilateral bargaining: neighbours whose reservation prices cross trade at the midpoint"
    )
    odd_notes: ClassVar[dict[str, str]] = {
        "basic_principles": (
            "Neighbours whose reservation prices cross split the difference (the symmetric "
            "Nash bargaining solution)."
        ),
        "interaction": ("Pairs of network neighbours."),
        "stochasticity": ("The order in which deals are made is random."),
    }
    honours_price_bounds: ClassVar[bool] = True

    def __init__(self, threshold: float = 0.5) -> None:
        self.threshold = threshold

    def check(self) -> None:
        """Raise ``ValueError`` naming a parameter outside its allowed range."""
        _check_threshold("threshold", self.threshold)

    def clear(self, state: MarketState, rng: np.random.Generator) -> Trades:
        """Return this round's trades (one row per pair, with a quantity)."""
        quote = reservation_prices(state.population, float(self.threshold))
        return bargaining(state, bounded_quotes(state, quote), rng)
