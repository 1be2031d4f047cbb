"""Network builders: who may trade with whom.

A builder turns the population's roles (int8 array, 0 buyer, 1 seller) and the network random
stream into a :class:`~propensim.plugins.types.TradingNetwork`: sorted arrays of buyer-seller
edges (only those can trade) plus all edges of the source graph in both directions (``social``,
felt by drift rules such as :class:`~propensim.plugins.drift.SocialDrift`).

Builders meant for large markets (:class:`Complete`, :class:`ErdosRenyi`,
:class:`RandomBipartite`, :class:`Regions`, :class:`EdgeListFile`) work on numpy arrays and scale
to a million traders; :class:`SmallWorld`, :class:`ScaleFree` and :class:`GraphMLFile` go through
networkx (a Python object per node and edge: fine up to about 1e5 traders). Any networkx graph
can be converted once with :func:`from_graph`.

Randomness: networkx generators get the seed ``int(rng.integers(2**31))`` drawn from the stream
they are handed, so a network is a pure function of that stream. A builder may return a network
without edges; the market warns about it.
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping
from typing import Any, ClassVar

import numpy as np

from propensim.agents.population import BUYER, SELLER
from propensim.plugins.types import TradingNetwork

__all__ = [
    "MAX_EDGES",
    "Complete",
    "EdgeListFile",
    "ErdosRenyi",
    "GraphMLFile",
    "RandomBipartite",
    "Regions",
    "ScaleFree",
    "SmallWorld",
    "build_network",
    "from_graph",
]

#: Largest number of buyer-seller edges a builder will create (about 0.8 GB per edge array).
MAX_EDGES = 50_000_000

_ROLE_WORDS = {"buyer": BUYER, "seller": SELLER, "0": BUYER, "1": SELLER}


# -- helpers -------------------------------------------------------------------------------------
def _check_role(role) -> np.ndarray:
    arr = np.asarray(role)
    if arr.ndim != 1 or arr.size == 0:
        raise ValueError("role must be a non-empty 1-D array of 0 (buyer) and 1 (seller)")
    if not np.all((arr == BUYER) | (arr == SELLER)):
        raise ValueError("role must contain only 0 (buyer) and 1 (seller)")
    return arr.astype(np.int8)


def _require(owner: str, name: str, value, ok, allowed: str) -> None:
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{owner}: {name} must be a number, got {value!r}") from None
    if math.isnan(x) or not ok(x):
        raise ValueError(f"{owner}: {name} must be {allowed}, got {value!r}")


def _require_int(owner: str, name: str, value, low: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < low:
        raise ValueError(f"{owner}: {name} must be a whole number >= {low}, got {value!r}")


def _seed(rng: np.random.Generator) -> int:
    """A networkx seed drawn from the stream."""
    return int(rng.integers(2**31))


def _from_edges(role: np.ndarray, u: np.ndarray, v: np.ndarray, **extra) -> TradingNetwork:
    """Network over rows with ``role`` from undirected edges ``(u, v)`` (any roles, any order).

    Self-loops are dropped; buyer-seller edges become trading edges; every edge goes into
    ``social`` in both directions, repeats removed (left to the network to derive lazily when
    every edge joins a buyer and a seller).
    """
    n = role.shape[0]
    u = np.asarray(u, dtype=np.int64).reshape(-1)
    v = np.asarray(v, dtype=np.int64).reshape(-1)
    not_loop = u != v  # shape: (n_raw,)
    u, v = u[not_loop], v[not_loop]
    mixed = role[u] != role[v]  # shape: (n_raw,): a buyer and a seller
    u_is_buyer = role[u] == BUYER  # shape: (n_raw,)
    buyer = np.where(u_is_buyer, u, v)[mixed]  # shape: (n_edges,)
    seller = np.where(u_is_buyer, v, u)[mixed]  # shape: (n_edges,)
    if mixed.all():  # no same-role edges: the network derives social edges when asked
        return TradingNetwork(n=n, buyer=buyer, seller=seller, **extra)
    su = np.concatenate([u, v])  # shape: (2 n_raw,)
    sv = np.concatenate([v, u])
    key = np.sort(su * np.int64(n) + sv)
    first = np.ones(key.size, dtype=bool)
    first[1:] = key[1:] != key[:-1]
    key = key[first]
    social = (key // n, key % n)
    return TradingNetwork(n=n, buyer=buyer, seller=seller, social=social, **extra)


def _pairs_to_network(
    role: np.ndarray, flat: np.ndarray, buyers: np.ndarray, sellers: np.ndarray, **extra
) -> TradingNetwork:
    """Trading network from sorted flat pair indices ``i_buyer * n_sellers + j_seller``."""
    ns = sellers.size
    buyer = buyers[flat // ns]  # shape: (n_edges,)
    seller = sellers[flat % ns]  # shape: (n_edges,)
    return TradingNetwork(n=role.shape[0], buyer=buyer, seller=seller, **extra)


def _bernoulli_pairs(n_pairs: int, p: float, rng: np.random.Generator, owner: str) -> np.ndarray:
    """Sorted indices of the pairs kept, each of ``n_pairs`` independently with probability p.

    Sparse case (``p < 1/50``): the count is Binomial(n_pairs, p) and the pairs a uniform
    sample without replacement (numpy's set-based sampler: memory linear in edges). Middle case
    (``1/50 <= p < 1/5``): the gaps between kept pairs, which are Geometric(p), drawn in batches
    and summed (Batagelj and Brandes 2005): one draw per edge instead of one per pair, 0.11 ms
    instead of 1.1 ms for 1e3 traders of mean degree 10. Dense case: Bernoulli draws in blocks
    of about 4e6 pairs. All three give exactly the G(n_b, n_s, p) law.

    References
    ----------
    V. Batagelj and U. Brandes, "Efficient generation of large random networks", Phys. Rev. E
    71:036113 (2005) (geometric skips over the pairs).
    """
    if p <= 0 or n_pairs == 0:
        return np.zeros(0, dtype=np.int64)
    expected = n_pairs * p
    if expected > MAX_EDGES:
        raise ValueError(
            f"{owner}: about {expected:.3g} edges expected, more than the limit "
            f"{MAX_EDGES:.0e}; use a smaller degree or probability"
        )
    if p >= 1:
        return np.arange(n_pairs, dtype=np.int64)
    if p < 0.02:
        m = int(rng.binomial(n_pairs, p))
        flat = rng.choice(n_pairs, size=m, replace=False, shuffle=False).astype(np.int64)
        flat.sort()
        return flat
    if p < 0.2:
        return _geometric_pairs(n_pairs, p, rng)
    block = 1 << 22
    parts = []
    for start in range(0, n_pairs, block):  # loop over blocks of pairs, not traders
        stop = min(start + block, n_pairs)
        kept = rng.random(stop - start) < p  # shape: (block,)
        parts.append(start + np.flatnonzero(kept))
    return np.concatenate(parts).astype(np.int64)


def _geometric_pairs(n_pairs: int, p: float, rng: np.random.Generator) -> np.ndarray:
    """Ascending positions of the successes among ``n_pairs`` Bernoulli(p) trials.

    The first success is at ``G_1 - 1`` and each next one ``G_k`` further on, ``G_k``
    independent Geometric(p) on 1, 2, ...; batches of gaps are drawn until one runs past the
    end (a batch holds the expected count left plus six standard deviations).
    """
    parts = []
    last = -1  # position of the last success so far
    while True:
        left = n_pairs - 1 - last
        size = int(left * p + 6.0 * math.sqrt(left * p) + 16)
        at = last + np.cumsum(rng.geometric(p, size=size))  # shape: (size,) ascending
        inside = at[at < n_pairs]
        parts.append(inside)
        if inside.size < size:
            return np.concatenate(parts).astype(np.int64)
        last = int(at[-1])


def _natural_order(nodes: list) -> list:
    """Nodes in a stated order.

    By integer value when every label is an integer (or an integer written as text), else
    sorted, else (labels that cannot be compared) as the graph lists them.
    """
    try:
        as_int = [int(x) for x in nodes]
        if all(str(i) == str(x).strip() for i, x in zip(as_int, nodes, strict=True)):
            if len(set(as_int)) == len(as_int):
                return [x for _, x in sorted(zip(as_int, nodes, strict=True), key=lambda t: t[0])]
    except (TypeError, ValueError):
        pass
    try:
        return sorted(nodes)
    except TypeError:
        return list(nodes)


def _parse_role(value, node) -> int:
    if isinstance(value, np.generic):
        value = value.item()
    key = str(value).strip().lower()
    if isinstance(value, bool) or key not in _ROLE_WORDS:
        raise ValueError(
            f"node {node!r} has unknown role {value!r}; allowed: 'buyer', 'seller', 0, 1"
        )
    return _ROLE_WORDS[key]


# -- conversion from networkx --------------------------------------------------------------------
def from_graph(
    graph, role=None, *, role_attr: str = "role", n_buyers: int | None = None
) -> tuple[TradingNetwork, np.ndarray]:
    """Convert a networkx graph once into a trading network and a role array.

    Nodes are relabelled ``0..n-1`` in a stated order: by integer value when every label is an
    integer (or integer text such as ``"12"``), otherwise in sorted order, otherwise (labels that
    cannot be compared with each other) in the graph's own node order. Directed graphs are read
    as undirected; self-loops are dropped; repeated edges count once.

    Parameters
    ----------
    graph : networkx.Graph
        Any networkx graph.
    role : array-like or mapping, optional
        Roles in that row order (``0``/``1`` or ``"buyer"``/``"seller"``), or a mapping
        node -> role. Takes precedence over the other two ways.
    role_attr : str
        Node attribute holding each node's role, used when neither ``role`` nor ``n_buyers`` is
        given.
    n_buyers : int, optional
        The first ``n_buyers`` nodes in row order are buyers, the rest sellers.

    Returns
    -------
    network : TradingNetwork
        Buyer-seller edges become trading edges; ``social`` holds every edge in both directions;
        ``labels`` the original node labels in row order.
    role : ndarray of int8, shape (n,)

    Raises
    ------
    ValueError
        For an empty graph, a node lacking the role attribute (named), an unknown role value, or
        ``n_buyers`` out of range.

    Examples
    --------
    >>> import networkx as nx
    >>> g = nx.Graph([("a", "x"), ("a", "b"), ("b", "y")])
    >>> net, role = from_graph(g, n_buyers=2)
    >>> role.tolist(), net.buyer.tolist(), net.seller.tolist()
    ([0, 0, 1, 1], [0, 1], [2, 3])
    """
    if graph.number_of_nodes() == 0:
        raise ValueError("graph is empty: it has no nodes")
    nodes = _natural_order(list(graph.nodes))
    n = len(nodes)
    index = {node: i for i, node in enumerate(nodes)}
    if role is not None:
        if isinstance(role, Mapping):
            missing = [node for node in nodes if node not in role]
            if missing:
                raise ValueError(f"role mapping has no entry for node {missing[0]!r}")
            roles = np.array([_parse_role(role[node], node) for node in nodes], dtype=np.int8)
        else:
            given = np.asarray(role).reshape(-1).tolist()
            if len(given) != n:
                raise ValueError(f"role has {len(given)} entries but the graph has {n} nodes")
            roles = np.array(
                [_parse_role(r, node) for r, node in zip(given, nodes, strict=True)], dtype=np.int8
            )
    elif n_buyers is not None:
        if isinstance(n_buyers, bool) or not isinstance(n_buyers, int | np.integer):
            raise ValueError(f"n_buyers must be a whole number in 0..{n}, got {n_buyers!r}")
        if not 0 <= n_buyers <= n:
            raise ValueError(f"n_buyers must be in 0..{n} (the number of nodes), got {n_buyers}")
        roles = np.where(np.arange(n) < n_buyers, BUYER, SELLER).astype(np.int8)
    else:
        attrs = graph.nodes
        lacking = [node for node in nodes if role_attr not in attrs[node]]
        if lacking:
            raise ValueError(
                f"node {lacking[0]!r} has no {role_attr!r} attribute "
                f"({len(lacking)} of {n} nodes lack it); give role= or n_buyers="
            )
        roles = np.array([_parse_role(attrs[node][role_attr], node) for node in nodes], np.int8)
    m = graph.number_of_edges()
    u = np.fromiter((index[a] for a, _ in graph.edges()), dtype=np.int64, count=m)
    v = np.fromiter((index[b] for _, b in graph.edges()), dtype=np.int64, count=m)
    net = _from_edges(roles, u, v, labels=nodes, attributes=_node_attributes(graph, nodes))
    n_b = int(np.count_nonzero(roles == BUYER))
    net.complete = net.n_edges > 0 and net.n_edges == n_b * (n - n_b)
    return net, roles


def _node_attributes(graph, nodes: list) -> dict[str, np.ndarray]:
    """Node attributes every node carries (other than the role), as columns in row order."""
    data = graph.nodes
    keys = set.intersection(*(set(data[node]) for node in nodes)) if nodes else set()
    keys.discard("role")
    return {k: np.array([data[node][k] for node in nodes]) for k in sorted(keys)}


# -- builders ------------------------------------------------------------------------------------
class Complete:
    """Every buyer may trade with every seller.

    ``n_buyers * n_sellers`` edges; refused above :data:`MAX_EDGES` (5e7). ``complete=True`` lets
    clearing rules take their faster paths.
    """

    description: ClassVar[str] = "complete bipartite: every buyer may trade with every seller"
    odd_notes: ClassVar[dict[str, str]] = {
        "interaction": ("Every buyer may trade with every seller (a well-mixed market)."),
    }

    def __init__(self) -> None:
        pass

    def build(self, role: np.ndarray, rng: np.random.Generator) -> TradingNetwork:
        """All buyer-seller pairs (``rng`` is not used)."""
        role = _check_role(role)
        buyers = np.flatnonzero(role == BUYER)
        sellers = np.flatnonzero(role == SELLER)
        n_pairs = buyers.size * sellers.size
        if n_pairs > MAX_EDGES:
            raise ValueError(
                f"complete network would have {n_pairs:.3g} edges ({buyers.size} buyers x "
                f"{sellers.size} sellers), more than the limit {MAX_EDGES:.0e}; use a sparse "
                "network such as erdos_renyi"
            )
        flat = np.arange(n_pairs, dtype=np.int64)
        return _pairs_to_network(role, flat, buyers, sellers, complete=n_pairs > 0)


class ErdosRenyi:
    """Random buyer-seller edges with a given mean trading degree.

    Each buyer-seller pair is joined independently with probability
    ``p = mean_degree * n / (2 n_buyers n_sellers)`` (capped at 1), so the expected number of
    trading partners averaged over all ``n`` traders is ``mean_degree`` (a buyer's own expected
    degree is ``p n_sellers``). The pairs are sampled directly with numpy (count
    Binomial(n_b n_s, p), then distinct pairs uniformly), linear in edges: a million traders with
    1e7 edges take seconds. Only buyer-seller edges exist (no same-role edges).

    Parameters
    ----------
    mean_degree : float
        Expected trading degree per trader (>= 0).

    References
    ----------
    P. Erdős and A. Rényi, Publ. Math. Inst. Hung. Acad. Sci. 5:17-61 (1960) (random graphs);
    its bipartite variant G(n_b, n_s, p).
    """

    description: ClassVar[str] = "random buyer-seller edges with a given mean trading degree"
    odd_notes: ClassVar[dict[str, str]] = {
        "interaction": ("Random buyer-seller links with a given mean trading degree."),
        "stochasticity": ("The links are drawn at random (the network stream)."),
    }

    def __init__(self, mean_degree: float = 10.0) -> None:
        self.mean_degree = mean_degree

    def check(self) -> None:
        """Raise ValueError naming a parameter out of range."""
        _require("ErdosRenyi", "mean_degree", self.mean_degree, lambda x: 0 <= x < math.inf, ">= 0")

    def probability(self, role: np.ndarray) -> float:
        """The edge probability used for these roles."""
        role = _check_role(role)
        n_b = int(np.count_nonzero(role == BUYER))
        n_s = role.size - n_b
        if n_b == 0 or n_s == 0:
            return 0.0
        return min(1.0, float(self.mean_degree) * role.size / (2.0 * n_b * n_s))

    def build(self, role: np.ndarray, rng: np.random.Generator) -> TradingNetwork:
        """Sample the edges."""
        self.check()
        role = _check_role(role)
        buyers = np.flatnonzero(role == BUYER)
        sellers = np.flatnonzero(role == SELLER)
        p = self.probability(role)
        flat = _bernoulli_pairs(buyers.size * sellers.size, p, rng, "ErdosRenyi")
        return _pairs_to_network(role, flat, buyers, sellers, complete=p >= 1 and flat.size > 0)


class RandomBipartite:
    """Each buyer-seller pair is joined independently with probability ``p``.

    Array-native like :class:`ErdosRenyi` (which sets ``p`` from a target degree instead).

    Parameters
    ----------
    p : float
        Edge probability, in [0, 1].

    References
    ----------
    E. N. Gilbert, "Random graphs", Ann. Math. Stat. 30:1141-1144 (1959) (the G(n, p) model).
    """

    description: ClassVar[str] = "each buyer-seller pair joined independently with probability p"
    odd_notes: ClassVar[dict[str, str]] = {
        "interaction": ("Each buyer-seller pair is linked independently with probability p."),
        "stochasticity": ("The links are drawn at random (the network stream)."),
    }

    def __init__(self, p: float = 0.1) -> None:
        self.p = p

    def check(self) -> None:
        """Raise ValueError naming a parameter out of range."""
        _require("RandomBipartite", "p", self.p, lambda x: 0 <= x <= 1, "in [0, 1]")

    def build(self, role: np.ndarray, rng: np.random.Generator) -> TradingNetwork:
        """Sample the edges."""
        self.check()
        role = _check_role(role)
        buyers = np.flatnonzero(role == BUYER)
        sellers = np.flatnonzero(role == SELLER)
        p = float(self.p)
        flat = _bernoulli_pairs(buyers.size * sellers.size, p, rng, "RandomBipartite")
        return _pairs_to_network(role, flat, buyers, sellers, complete=p >= 1 and flat.size > 0)


class SmallWorld:
    """Watts-Strogatz small world: a ring lattice with a fraction of edges rewired.

    Traders are placed on the ring in a random order drawn from ``rng`` (with buyers listed
    first, an unshuffled ring would join buyers mostly to buyers). Roles stay as given; only
    buyer-seller edges carry trade, all edges are ``social``. Built with
    ``networkx.watts_strogatz_graph`` (about 1e5 traders at most).

    Parameters
    ----------
    k : int
        Each node joined to its ``k`` nearest ring neighbours (``k // 2`` each side), 2 <= k < n.
    p : float
        Rewiring probability, in [0, 1].

    References
    ----------
    D. J. Watts and S. H. Strogatz, "Collective dynamics of 'small-world' networks",
    Nature 393:440-442 (1998).
    """

    description: ClassVar[str] = "Watts-Strogatz small world over traders in random ring order"
    odd_notes: ClassVar[dict[str, str]] = {
        "interaction": (
            "A ring of traders with local links and a share of random shortcuts (Watts-Strogatz)."
        ),
        "stochasticity": ("Ring order and rewiring are random (the network stream)."),
    }

    def __init__(self, k: int = 10, p: float = 0.1) -> None:
        self.k = k
        self.p = p

    def check(self) -> None:
        """Raise ValueError naming a parameter out of range."""
        _require_int("SmallWorld", "k", self.k, 2)
        _require("SmallWorld", "p", self.p, lambda x: 0 <= x <= 1, "in [0, 1]")

    def build(self, role: np.ndarray, rng: np.random.Generator) -> TradingNetwork:
        """Build the ring, rewire, convert."""
        import networkx as nx

        self.check()
        role = _check_role(role)
        n = role.size
        if self.k >= n:
            raise ValueError(
                f"SmallWorld: k must be < n (the number of traders, {n}), got {self.k}"
            )
        graph = nx.watts_strogatz_graph(n, int(self.k), float(self.p), seed=_seed(rng))
        position = rng.permutation(n)  # ring position i holds trader position[i]
        edges = np.array(graph.edges(), dtype=np.int64).reshape(-1, 2)
        return _from_edges(role, position[edges[:, 0]], position[edges[:, 1]])


class ScaleFree:
    """Barabási-Albert preferential attachment: a few hubs, many traders with few partners.

    Traders join the growing graph in a random order drawn from ``rng`` (so hubs are buyers or
    sellers by chance, not by their row). Built with ``networkx.barabasi_albert_graph``.

    Parameters
    ----------
    m : int
        Edges each arriving node attaches, 1 <= m < n.

    References
    ----------
    A.-L. Barabási and R. Albert, "Emergence of scaling in random networks",
    Science 286:509-512 (1999).
    """

    description: ClassVar[str] = "Barabasi-Albert preferential attachment (hubs) over traders"
    odd_notes: ClassVar[dict[str, str]] = {
        "interaction": (
            "Preferential attachment: a few hubs with many partners, most traders with few "
            "(Barabasi-Albert)."
        ),
        "stochasticity": ("Attachment is random (the network stream)."),
    }

    def __init__(self, m: int = 5) -> None:
        self.m = m

    def check(self) -> None:
        """Raise ValueError naming a parameter out of range."""
        _require_int("ScaleFree", "m", self.m, 1)

    def build(self, role: np.ndarray, rng: np.random.Generator) -> TradingNetwork:
        """Grow the graph, convert."""
        import networkx as nx

        self.check()
        role = _check_role(role)
        n = role.size
        if self.m >= n:
            raise ValueError(f"ScaleFree: m must be < n (the number of traders, {n}), got {self.m}")
        graph = nx.barabasi_albert_graph(n, int(self.m), seed=_seed(rng))
        order = rng.permutation(n)  # graph node i is trader order[i]
        edges = np.array(graph.edges(), dtype=np.int64).reshape(-1, 2)
        return _from_edges(role, order[edges[:, 0]], order[edges[:, 1]])


class Regions:
    """Traders in regions of the unit square, linked when closer than ``radius``.

    ``n_regions`` centres are drawn uniformly in the unit square; each trader joins a region at
    random and sits at its centre plus normal noise of standard deviation ``spread`` (clipped to
    the square). With ``spread=None`` traders are uniform over the whole square and the result is
    a plain random geometric graph. Two traders at distance ``<= radius`` are joined. Array-native
    (brute force up to 2000 traders, ``scipy.spatial.cKDTree`` beyond); :meth:`place` returns
    the positions.

    Parameters
    ----------
    n_regions : int
        Number of regions (>= 1).
    radius : float
        Link distance (> 0, unit-square units).
    spread : float or None
        Standard deviation of positions around the region centre (>= 0), or None for uniform.

    References
    ----------
    M. Penrose, Random Geometric Graphs, Oxford University Press (2003); networkx's
    ``random_geometric_graph`` gives the same edges for the same positions.
    """

    description: ClassVar[str] = "traders in regions of the unit square, linked within a radius"
    odd_notes: ClassVar[dict[str, str]] = {
        "interaction": (
            "Traders placed around region centres in the unit square, linked when close: "
            "trade is local."
        ),
        "collectives": (
            "Regions are groups of traders (the network attribute 'region'); they do not act "
            "as agents."
        ),
        "stochasticity": ("Centres, membership and positions are random (the network stream)."),
    }

    def __init__(self, n_regions: int = 4, radius: float = 0.2, spread: float | None = 0.1) -> None:
        self.n_regions = n_regions
        self.radius = radius
        self.spread = spread

    def check(self) -> None:
        """Raise ValueError naming a parameter out of range."""
        _require_int("Regions", "n_regions", self.n_regions, 1)
        _require("Regions", "radius", self.radius, lambda x: 0 < x < math.inf, "> 0")
        if self.spread is not None:
            _require("Regions", "spread", self.spread, lambda x: 0 <= x < math.inf, ">= 0 or None")

    def place(self, role: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """Positions ``(n, 2)`` in the unit square and region labels ``(n,)``.

        :meth:`build` calls this first, so the same stream state gives the same positions.
        """
        self.check()
        n = _check_role(role).size
        centres = rng.uniform(0.0, 1.0, size=(int(self.n_regions), 2))  # shape: (n_regions, 2)
        region = rng.integers(int(self.n_regions), size=n)  # shape: (n,)
        if self.spread is None:
            xy = rng.uniform(0.0, 1.0, size=(n, 2))
        else:
            xy = centres[region] + rng.normal(0.0, float(self.spread), size=(n, 2))
        return np.clip(xy, 0.0, 1.0), region

    def build(self, role: np.ndarray, rng: np.random.Generator) -> TradingNetwork:
        """Place the traders and link the close pairs."""
        role = _check_role(role)
        xy, region = self.place(role, rng)
        pairs = _close_pairs(xy, float(self.radius))  # shape: (n_pairs, 2)
        return _from_edges(role, pairs[:, 0], pairs[:, 1], attributes={"region": region})


#: Up to this many points, close pairs are found by brute force (no scipy.spatial import,
#: which costs ~0.5 s and would slow ``propensim check`` on small markets).
_BRUTE_FORCE_POINTS = 2000


def _close_pairs(xy: np.ndarray, radius: float) -> np.ndarray:
    """Pairs ``i < j`` of points at distance ``<= radius``, sorted, shape (n_pairs, 2)."""
    n = xy.shape[0]
    if n <= _BRUTE_FORCE_POINTS:
        i, j = np.triu_indices(n, k=1)  # shape: (n (n - 1) / 2,)
        close = np.hypot(xy[i, 0] - xy[j, 0], xy[i, 1] - xy[j, 1]) <= radius
        pairs = np.stack([i[close], j[close]], axis=1).astype(np.int64)
    else:
        from scipy.spatial import cKDTree

        pairs = cKDTree(xy).query_pairs(radius, output_type="ndarray")
        pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    order = np.lexsort((pairs[:, 1], pairs[:, 0]))
    return pairs[order]


def _file_error(kind: str, path, exc: Exception) -> ValueError:
    first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return ValueError(f"{kind} file {os.fspath(path)!r} could not be read: {first}")


class EdgeListFile:
    """Edges read from a text file, one ``u v`` pair a line.

    Whitespace-separated (comma-separated when the file name ends in ``.csv`` or ``delimiter=","``);
    ``#`` starts a comment; columns after the second (weights) are ignored. When every label is an
    integer, labels are the population rows and must lie in ``0..n-1``; otherwise the distinct
    labels, sorted, become rows ``0..m-1`` (``m <= n``; rows beyond have no edges). Read with
    numpy: array-native, fine for 1e7 edges. Roles come from the population.

    Parameters
    ----------
    path : str or os.PathLike
        The file.
    delimiter : str, optional
        Column separator (default: whitespace, or ``","`` for ``.csv``).
    """

    description: ClassVar[str] = "edges read from a text edge-list file (one 'u v' pair a line)"
    odd_notes: ClassVar[dict[str, str]] = {
        "interaction": ("Links read from an edge-list file (input data)."),
    }
    #: Parameters naming files: a spec resolves them against its own folder and fingerprints
    #: their content (sha256), so an edited file is never mistaken for the old one.
    file_parameters: ClassVar[tuple[str, ...]] = ("path",)

    def __init__(self, path: str | os.PathLike = "", delimiter: str | None = None) -> None:
        self.path = path
        self.delimiter = delimiter

    def check(self) -> None:
        """Raise ValueError when the path is missing."""
        if not str(self.path):
            raise ValueError("EdgeListFile: path must name an edge-list file")

    def build(self, role: np.ndarray, rng: np.random.Generator) -> TradingNetwork:
        """Read the file (``rng`` is not used)."""
        import warnings

        self.check()
        role = _check_role(role)
        n = role.size
        path = os.fspath(self.path)
        if not os.path.isfile(path):
            raise ValueError(f"edge_list file {path!r} not found")
        delimiter = self.delimiter
        if delimiter is None and path.lower().endswith(".csv"):
            delimiter = ","
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)  # numpy warns on an empty file
                tokens = np.loadtxt(
                    path, dtype=str, comments="#", delimiter=delimiter, usecols=(0, 1), ndmin=2
                )
        except Exception as exc:  # any parse failure becomes one line naming the file
            raise _file_error("edge_list", path, exc) from None
        tokens = np.char.strip(tokens)  # shape: (n_lines, 2)
        try:
            rows = tokens.astype(np.int64)  # shape: (n_lines, 2)
            labels = list(range(n))
        except ValueError:
            names, inverse = np.unique(tokens, return_inverse=True)
            if names.size > n:
                raise ValueError(
                    f"edge_list file {path!r} names {names.size} traders but the population has {n}"
                ) from None
            rows = inverse.reshape(tokens.shape).astype(np.int64)
            labels = [str(x) for x in names] + list(range(names.size, n))
        if rows.size and (rows.min() < 0 or rows.max() >= n):
            bad = rows.max() if rows.max() >= n else rows.min()
            raise ValueError(
                f"edge_list file {path!r} names trader {bad}, outside 0..{n - 1} "
                "(the population's rows)"
            )
        return _from_edges(role, rows[:, 0], rows[:, 1], labels=labels)


class GraphMLFile:
    """A network read from a GraphML file (through networkx).

    The file must have exactly one node per trader; nodes are matched to rows in the order of
    :func:`from_graph` (integer labels by value, else sorted). If the nodes carry ``role_attr``
    it must agree with the population's roles.

    Parameters
    ----------
    path : str or os.PathLike
        The file.
    role_attr : str
        Node attribute with ``"buyer"``/``"seller"`` or 0/1 (optional in the file).

    References
    ----------
    U. Brandes et al., "GraphML progress report", Graph Drawing 2001, LNCS 2265 (the format).
    """

    description: ClassVar[str] = "network read from a GraphML file (node roles checked if present)"
    odd_notes: ClassVar[dict[str, str]] = {
        "interaction": ("Links (and node attributes) read from a GraphML file (input data)."),
    }
    #: Parameters naming files (see EdgeListFile.file_parameters).
    file_parameters: ClassVar[tuple[str, ...]] = ("path",)

    def __init__(self, path: str | os.PathLike = "", role_attr: str = "role") -> None:
        self.path = path
        self.role_attr = role_attr

    def check(self) -> None:
        """Raise ValueError when the path is missing."""
        if not str(self.path):
            raise ValueError("GraphMLFile: path must name a GraphML file")

    def build(self, role: np.ndarray, rng: np.random.Generator) -> TradingNetwork:
        """Read and convert (``rng`` is not used)."""
        import networkx as nx

        self.check()
        role = _check_role(role)
        path = os.fspath(self.path)
        if not os.path.isfile(path):
            raise ValueError(f"graphml file {path!r} not found")
        try:
            graph = nx.read_graphml(path)
        except Exception as exc:  # XML or GraphML errors become one line naming the file
            raise _file_error("graphml", path, exc) from None
        if graph.number_of_nodes() != role.size:
            raise ValueError(
                f"graphml file {path!r} has {graph.number_of_nodes()} nodes but the population "
                f"has {role.size} traders"
            )
        tagged = [node for node, data in graph.nodes(data=True) if self.role_attr in data]
        if tagged:
            try:
                net, file_role = from_graph(graph, role_attr=self.role_attr)
            except ValueError as exc:
                raise ValueError(f"graphml file {path!r}: {exc}") from None
            differ = np.flatnonzero(file_role != role)
            if differ.size:
                row = int(differ[0])
                raise ValueError(
                    f"graphml file {path!r}: node {net.labels[row]!r} is a "
                    f"{('buyer', 'seller')[file_role[row]]} in the file but population row {row} "
                    f"is a {('buyer', 'seller')[role[row]]}"
                )
            return net
        net, _ = from_graph(graph, role=role)
        return net


def build_network(
    name: str, role: np.ndarray, rng: np.random.Generator | int | None = None, **params: Any
) -> TradingNetwork:
    """Build a registered network by name.

    Parameters
    ----------
    name : str
        A ``propensim.networks`` plugin name (``"erdos_renyi"``, ``"complete"``, ...).
    role : ndarray of int8, shape (n,)
        0 buyer, 1 seller.
    rng : numpy.random.Generator or int, optional
        The network stream (normalised with ``numpy.random.default_rng``).
    **params
        The builder's parameters.

    Examples
    --------
    >>> net = build_network("complete", np.array([0, 0, 1]))
    >>> net.n_edges
    2
    """
    from propensim.plugins.registry import make_plugin

    builder = make_plugin("networks", name, **params)
    return builder.build(_check_role(role), np.random.default_rng(rng))
