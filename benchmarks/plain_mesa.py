"""Reference markets written the way a typical Mesa user writes them: one Python object per trader.

These models compute the same science as propensim's engine (MODEL.md sections 3, 5 and 6), but
trader by trader: every trader is a ``mesa.Agent`` with a ``step`` method, the model calls
``self.agents.shuffle_do("step")`` once per round, and each trader draws its own random numbers
from ``model.random`` with the ``math`` module. They are the baseline of the benchmark suite
(``benchmarks/run.py``) and are checked against the engine in ``tests/test_plain_reference.py``,
so that the benchmark compares like with like.

They are written with ordinary care, not as a straw man: local look-ups, no needless copies, the
standard-library generator (faster per draw than numpy for scalars), and Mesa's own
``AgentSet.shuffle_do``/``do``. What they do not do is work on whole arrays.

Models
------
``PlainPropensityMarket``
    Propensity matching: each buyer meets ``meetings`` random trading partners (sellers); a meeting
    trades with probability equal to the peak of the joint curve and at a price drawn from it.
``PlainCallAuctionMarket``
    Uniform-price call auction in each connected part of the trading network, quotes are the
    traders' reservation prices, price set by the k-rule inside the clearing interval.
``PlainDoubleAuctionMarket``
    Continuous double auction with budget-constrained zero-intelligence quotes, one quote arrival
    at a time, the book cleared after every trade.

All three drift their preferred prices between rounds by the exact Ornstein-Uhlenbeck step of the
anchor force (a trader's own curve around its value or cost) and record volume and mean price per
round in a ``mesa.DataCollector``.

References
----------
P. A. Bromiley, "Products and Convolutions of Gaussian Probability Density Functions",
Tina Memo 2003-003, University of Manchester (joint curve of two normal curves).
G. E. Uhlenbeck and L. S. Ornstein, Phys. Rev. 36:823 (1930); D. T. Gillespie, Phys. Rev. E
54:2084 (1996) (exact Ornstein-Uhlenbeck update).
D. K. Gode and S. Sunder, J. Political Economy 101(1):119-137 (1993) (zero-intelligence traders).
"""

from __future__ import annotations

import math

import mesa

BUYER = 0
SELLER = 1


def _uniform_or_constant(spec, rnd):
    """A constant, or a ``(low, high)`` pair drawn uniformly with ``rnd`` (a ``random.Random``)."""
    if isinstance(spec, int | float):
        return float(spec)
    low, high = spec
    return rnd.uniform(low, high)


class Trader(mesa.Agent):
    """A trader with a normal propensity curve: preferred price ``mu``, width ``sigma``, height
    ``activity`` and entropic energy scale ``gamma``; ``value`` is a buyer's value or a seller's
    cost (price units)."""

    role = BUYER

    def __init__(self, model, value, mu, sigma, activity, gamma, stock, capacity, cash):
        super().__init__(model)
        self.value = value
        self.mu = mu
        self.sigma = sigma
        self.activity = activity
        self.gamma = gamma
        self.initial_stock = stock
        self.stock = stock
        self.capacity = capacity
        self.initial_cash = cash
        self.cash = cash
        self.partners = []  # trading partners (sellers of a buyer, buyers of a seller)
        self.component = 0  # connected part of the trading network
        self.remaining = 0
        self.start_round()

    # -- every round ------------------------------------------------------------------------
    def start_round(self):
        """Restock (each round is a fresh trading period) and reset this round's capacity."""
        self.stock = self.initial_stock
        self.cash = self.initial_cash
        if self.role == SELLER:
            self.remaining = min(self.capacity, self.stock)
        else:
            self.remaining = self.capacity

    def advance(self):
        """Drift: one exact Ornstein-Uhlenbeck step of the anchor force, then restock.

        The anchor is the trader's own curve around its value: force -k (mu - value) with
        stiffness k = strength gamma / sigma^2, so mu relaxes to its value with rate k / eta and
        stationary variance noise eta / k (Uhlenbeck and Ornstein 1930; Gillespie 1996).
        """
        model = self.model
        if model.drift:
            k = model.strength * self.gamma / (self.sigma * self.sigma)
            decay = math.exp(-k * model.dt / model.eta)
            offset = (self.mu - self.value) * decay
            if model.noise > 0.0:
                sd = math.sqrt(model.noise * model.eta / k * (1.0 - decay * decay))
                offset += sd * self.random.gauss(0.0, 1.0)
            self.mu = self.value + offset
        self.start_round()

    def reservation_price(self, threshold):
        """Where the curve crosses ``threshold``: a buyer's highest acceptable price, a seller's
        lowest (None if the curve never reaches the threshold)."""
        if self.activity < threshold:
            return None
        half_width = self.sigma * math.sqrt(2.0 * math.log(self.activity / threshold))
        return self.mu + half_width if self.role == BUYER else self.mu - half_width

    def trade_with(self, seller, price):
        """Move one unit from ``seller`` to this buyer at ``price`` and count it in the model."""
        self.remaining -= 1
        seller.remaining -= 1
        self.stock += 1
        seller.stock -= 1
        self.cash -= price
        seller.cash += price
        model = self.model
        model.volume += 1
        model.price_sum += price


class Buyer(Trader):
    """A buyer: in propensity matching it is the one who goes out and meets sellers."""

    role = BUYER

    def step(self):
        """Meet ``model.meetings`` random partners; each meeting trades with the joint peak."""
        partners = self.partners
        if not partners:
            return
        rnd = self.random
        for _ in range(self.model.meetings):
            if self.remaining <= 0:
                return
            seller = rnd.choice(partners)
            if seller.remaining <= 0:
                continue
            # Product of the two normal curves (Bromiley 2003): peak and normalised price law.
            var_b = self.sigma * self.sigma
            var_s = seller.sigma * seller.sigma
            total = var_b + var_s
            gap = self.mu - seller.mu
            peak = self.activity * seller.activity * math.exp(-gap * gap / (2.0 * total))
            if rnd.random() >= peak:
                continue
            mean = (self.mu * var_s + seller.mu * var_b) / total
            price = rnd.gauss(mean, math.sqrt(var_b * var_s / total))
            if price > self.cash:
                continue
            self.trade_with(seller, price)


class Seller(Trader):
    """A seller: passive in propensity matching."""

    role = SELLER

    def step(self):
        """Sellers wait to be met."""


class PlainMarket(mesa.Model):
    """Shared set-up: traders, an Erdos-Renyi trading network, drift parameters, data collection.

    Parameters
    ----------
    n_buyers, n_sellers : int
        How many of each.
    value, cost : float or (low, high)
        Buyers' values and sellers' costs (constant or uniform), price units.
    shade : float
        Preferred prices start ``shade`` below a buyer's value and above a seller's cost.
    sigma, activity, gamma : float
        Curve width (price units), height in (0, 1], entropic energy scale.
    cash : float
        Buyers' budgets (``inf``: none).
    stock, capacity : int
        Sellers' units per round; most units a trader trades per round.
    mean_degree : float or None
        Expected number of trading partners per trader in a random bipartite (Erdos-Renyi) network
        built with networkx; ``None`` joins every buyer to every seller.
    edges : (list of int, list of int), optional
        Use these buyer-seller edges instead (buyer numbers 0..n_buyers-1, seller numbers
        0..n_sellers-1), e.g. the engine's own network.
    eta, noise, dt, strength : float
        Anchor drift: friction, noise intensity D, time step, force scale.
    drift : bool
        Whether preferred prices drift between rounds.
    rng : int, optional
        Seed of ``model.random`` (Mesa's ``rng`` argument).
    """

    def __init__(
        self,
        n_buyers=50,
        n_sellers=50,
        value=(80.0, 120.0),
        cost=(60.0, 100.0),
        shade=0.0,
        sigma=5.0,
        activity=1.0,
        gamma=1.0,
        cash=math.inf,
        stock=1,
        capacity=1,
        mean_degree=10.0,
        edges=None,
        eta=1.0,
        noise=0.0,
        dt=1.0,
        strength=1.0,
        drift=True,
        rng=None,
    ):
        super().__init__(rng=rng)
        self.eta, self.noise, self.dt, self.strength, self.drift = eta, noise, dt, strength, drift
        rnd = self.random
        self.buyers = []
        for _ in range(n_buyers):
            v = _uniform_or_constant(value, rnd)
            self.buyers.append(Buyer(self, v, v - shade, sigma, activity, gamma, 0, capacity, cash))
        self.sellers = []
        for _ in range(n_sellers):
            c = _uniform_or_constant(cost, rnd)
            self.sellers.append(
                Seller(self, c, c + shade, sigma, activity, gamma, stock, capacity, 0.0)
            )
        self._connect(mean_degree, edges)
        self.volume = 0
        self.price_sum = 0.0
        self.datacollector = mesa.DataCollector(
            model_reporters={"volume": "volume", "mean_price": "mean_price"}
        )

    def _connect(self, mean_degree, edges):
        import networkx as nx

        nb, ns = len(self.buyers), len(self.sellers)
        # Nodes 0..nb-1 are the buyers, nb..nb+ns-1 the sellers.
        if edges is None and mean_degree is None:
            graph = nx.complete_bipartite_graph(nb, ns)
        elif edges is None:
            # Erdos-Renyi bipartite graph: mean degree over all traders = 2 E / n.
            p = min(1.0, mean_degree * (nb + ns) / (2.0 * nb * ns)) if nb and ns else 0.0
            graph = nx.bipartite.random_graph(nb, ns, p, seed=self.random.randrange(2**31))
        else:
            graph = nx.Graph()
            graph.add_nodes_from(range(nb + ns))
            graph.add_edges_from((b, nb + s) for b, s in zip(*edges, strict=True))
        traders = self.buyers + self.sellers
        for u, v in graph.edges():
            buyer, seller = (traders[u], traders[v]) if u < nb else (traders[v], traders[u])
            buyer.partners.append(seller)
            seller.partners.append(buyer)
        for label, part in enumerate(nx.connected_components(graph)):
            for node in part:
                traders[node].component = label

    @property
    def mean_price(self):
        """Mean price of this round's trades (NaN without trades)."""
        return self.price_sum / self.volume if self.volume else math.nan

    def step(self):
        """One round: clear (subclasses), drift every trader, record volume and mean price."""
        self.volume = 0
        self.price_sum = 0.0
        self.clear()
        self.agents.do("advance")
        self.datacollector.collect(self)

    def clear(self):
        raise NotImplementedError


class PlainPropensityMarket(PlainMarket):
    """Propensity matching, trader by trader (see :class:`PlainMarket` for the parameters).

    Extra parameter ``meetings``: partners each buyer meets per round.
    """

    def __init__(self, *args, meetings=1, **kwargs):
        self.meetings = meetings
        super().__init__(*args, **kwargs)

    def clear(self):
        self.agents.shuffle_do("step")


class PlainCallAuctionMarket(PlainMarket):
    """Uniform-price call auction per connected part of the network, trader by trader.

    Extra parameters: ``k`` (price = low + k (high - low) inside the clearing interval) and
    ``threshold`` (acceptance level defining reservation prices). Winners are paired along
    network edges in random order; on a sparse network some winners may find no partner.
    """

    def __init__(self, *args, k=0.5, threshold=0.5, **kwargs):
        self.k = k
        self.threshold = threshold
        super().__init__(*args, **kwargs)

    def clear(self):
        self.bids = {}
        self.asks = {}
        self.agents.shuffle_do(self._post_quote)
        for comp, bids in self.bids.items():
            asks = self.asks.get(comp)
            if asks:
                self._clear_part(bids, asks)

    def _post_quote(self, trader):
        if trader.remaining <= 0:
            return
        price = trader.reservation_price(self.threshold)
        if price is None:
            return
        book = self.bids if trader.role == BUYER else self.asks
        book.setdefault(trader.component, []).append((price, trader))

    def _clear_part(self, bids, asks):
        bids.sort(key=lambda q: -q[0])
        asks.sort(key=lambda q: q[0])
        q = 0
        while q < len(bids) and q < len(asks) and bids[q][0] >= asks[q][0]:
            q += 1
        if q == 0:
            return
        low = max(asks[q - 1][0], bids[q][0] if q < len(bids) else -math.inf)
        high = min(bids[q - 1][0], asks[q][0] if q < len(asks) else math.inf)
        price = low + self.k * (high - low)
        winning_sellers = {s for _, s in asks[:q]}
        pairs = [(b, s) for _, b in bids[:q] for s in b.partners if s in winning_sellers]
        self.random.shuffle(pairs)
        for buyer, seller in pairs:
            if buyer.remaining > 0 and seller.remaining > 0 and price <= buyer.cash:
                buyer.trade_with(seller, price)


class PlainDoubleAuctionMarket(PlainMarket):
    """Continuous double auction with zero-intelligence quotes, one arrival at a time.

    Extra parameters: ``quotes_per_trader`` (arrivals per round = this times the number of
    traders able to trade), ``price_low`` and ``price_high`` (quote range; default the lowest
    cost and highest value), ``strategy`` ``"zi_c"`` (budget-constrained: bids below value,
    asks above cost) or ``"zi_u"`` (anywhere in the range). A bid trades with the lowest
    standing ask among the bidder's partners if it crosses it, at that ask; an ask likewise with
    the highest partner bid. Otherwise the quote stands if it improves on the trader's own
    standing quote. After a trade
    the book of that connected part is cleared (Gode and Sunder 1993).
    """

    def __init__(
        self,
        *args,
        quotes_per_trader=20,
        price_low=None,
        price_high=None,
        strategy="zi_c",
        **kwargs,
    ):
        self.quotes_per_trader = quotes_per_trader
        self.strategy = strategy
        super().__init__(*args, **kwargs)
        values = [b.value for b in self.buyers] + [s.value for s in self.sellers]
        self.price_low = min(values) if price_low is None else price_low
        self.price_high = max(values) if price_high is None else price_high
        for trader in self.agents:
            trader.quote = None

    def clear(self):
        # Quote arrivals come from traders able to trade at the start of the round.
        traders = [t for t in self.agents if t.remaining > 0 and t.partners]
        rnd = self.random
        zi_c = self.strategy == "zi_c"
        books = {}  # connected part -> traders holding a standing quote there
        for _ in range(self.quotes_per_trader * len(traders)):
            trader = rnd.choice(traders)
            if trader.remaining <= 0:
                continue
            book = books.setdefault(trader.component, [])
            if trader.role == BUYER:
                top = trader.value if zi_c else self.price_high
                bid = min(rnd.uniform(min(self.price_low, top), top), trader.cash)
                best = None
                for s in trader.partners:
                    if s.quote is not None and (best is None or s.quote < best.quote):
                        best = s
                if best is not None and best.quote <= bid:
                    trader.trade_with(best, best.quote)
                    self._clear_book(book)
                elif trader.quote is None or bid > trader.quote:  # quotes only improve
                    trader.quote = bid
                    book.append(trader)
            else:
                bottom = trader.value if zi_c else self.price_low
                ask = rnd.uniform(bottom, max(self.price_high, bottom))
                best = None
                for b in trader.partners:
                    if b.quote is not None and (best is None or b.quote > best.quote):
                        best = b
                if best is not None and best.quote >= ask:
                    best.trade_with(trader, best.quote)
                    self._clear_book(book)
                elif trader.quote is None or ask < trader.quote:  # quotes only improve
                    trader.quote = ask
                    book.append(trader)
        for book in books.values():
            self._clear_book(book)

    @staticmethod
    def _clear_book(book):
        """Withdraw every standing quote of one connected part (after a trade)."""
        for t in book:
            t.quote = None
        book.clear()


#: Models by clearing rule name, as the benchmark harness looks them up.
MODELS = {
    "propensity": PlainPropensityMarket,
    "call_auction": PlainCallAuctionMarket,
    "double_auction": PlainDoubleAuctionMarket,
}


def run_plain(model_cls, rounds, **params):
    """Build a plain model, run ``rounds`` rounds and return its DataCollector table."""
    model = model_cls(**params)
    for _ in range(rounds):
        model.step()
    return model.datacollector.get_model_vars_dataframe()
