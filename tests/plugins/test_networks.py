"""Network builders and the networkx conversion: degrees, exact edges, agreement with networkx."""

from __future__ import annotations

import math

import networkx as nx
import numpy as np
import pytest

from propensim.plugins.contracts import NetworkBuilder
from propensim.plugins.networks import (
    MAX_EDGES,
    Complete,
    EdgeListFile,
    ErdosRenyi,
    GraphMLFile,
    RandomBipartite,
    Regions,
    ScaleFree,
    SmallWorld,
    build_network,
    from_graph,
)
from propensim.plugins.registry import UnknownPluginError, get_plugin


def roles(n_buyers: int, n_sellers: int) -> np.ndarray:
    return np.repeat([0, 1], [n_buyers, n_sellers]).astype(np.int8)


def check_well_formed(net, role):
    """Invariants of every TradingNetwork a builder returns."""
    assert np.all(role[net.buyer] == 0) and np.all(role[net.seller] == 1)
    key = net.buyer * net.n + net.seller
    assert np.all(np.diff(key) > 0)  # sorted, no repeats
    u, v = net.social
    assert np.all(u != v)  # no self-loops
    # social holds every edge in both directions
    skey = np.sort(u * net.n + v)
    rkey = np.sort(v * net.n + u)
    assert np.array_equal(skey, rkey)
    # every trading edge is a social edge
    assert np.all(np.isin(key, skey))


def components_as_sets(labels: np.ndarray) -> set[frozenset[int]]:
    out: dict[int, set[int]] = {}
    for i, c in enumerate(labels.tolist()):
        out.setdefault(c, set()).add(i)
    return {frozenset(s) for s in out.values()}


def to_networkx(net) -> nx.Graph:
    g = nx.Graph()
    g.add_nodes_from(range(net.n))
    g.add_edges_from(zip(net.buyer.tolist(), net.seller.tolist(), strict=True))
    return g


# -- from_graph -----------------------------------------------------------------------------------
def test_from_graph_on_a_handmade_graph():
    g = nx.Graph()
    g.add_nodes_from(["y", "b", "x", "a"])
    nx.set_node_attributes(g, {"a": "buyer", "b": "buyer", "x": "seller", "y": 1}, "role")
    g.add_edges_from([("a", "x"), ("a", "b"), ("b", "y"), ("x", "y"), ("y", "a")])
    net, role = from_graph(g)
    # sorted order a, b, x, y -> rows 0, 1, 2, 3
    assert net.labels == ["a", "b", "x", "y"]
    assert role.tolist() == [0, 0, 1, 1]
    assert list(zip(net.buyer.tolist(), net.seller.tolist(), strict=True)) == [
        (0, 2),
        (0, 3),
        (1, 3),
    ]
    u, v = net.social
    assert sorted(zip(u.tolist(), v.tolist(), strict=True)) == sorted(
        [(0, 2), (2, 0), (0, 1), (1, 0), (1, 3), (3, 1), (2, 3), (3, 2), (3, 0), (0, 3)]
    )
    assert not net.complete
    check_well_formed(net, role)


def test_from_graph_integer_labels_in_numeric_order_and_by_count():
    g = nx.Graph([(10, 2), (2, 1), (1, 10)])
    net, role = from_graph(g, n_buyers=1)
    assert net.labels == [1, 2, 10]
    assert role.tolist() == [0, 1, 1]
    assert net.buyer.tolist() == [0, 0] and net.seller.tolist() == [1, 2]
    net2, _ = from_graph(nx.Graph([("10", "2"), ("2", "1")]), n_buyers=2)
    assert net2.labels == ["1", "2", "10"]  # integer text is ordered by value too


def test_from_graph_role_array_and_mapping_and_complete_flag():
    g = nx.complete_bipartite_graph(2, 3)
    net, role = from_graph(g, role=[0, 0, 1, 1, 1])
    assert net.n_edges == 6 and net.complete
    net2, role2 = from_graph(g, role={0: "buyer", 1: "buyer", 2: "seller", 3: 1, 4: "1"})
    assert np.array_equal(role, role2) and np.array_equal(net.buyer, net2.buyer)


@pytest.mark.parametrize(
    ("graph", "kwargs", "pattern"),
    [
        (nx.Graph(), {}, "empty"),
        (nx.Graph([(0, 1)]), {}, "node 0 has no 'role' attribute"),
        (nx.Graph([(0, 1)]), {"role": ["buyer", "trader"]}, "unknown role 'trader'"),
        (nx.Graph([(0, 1)]), {"n_buyers": 3}, "n_buyers"),
        (nx.Graph([(0, 1)]), {"role": [0]}, "role has 1 entries"),
    ],
)
def test_from_graph_errors_are_one_line(graph, kwargs, pattern):
    with pytest.raises(ValueError, match=pattern) as err:
        from_graph(graph, **kwargs)
    assert "\n" not in str(err.value)


# -- builders -------------------------------------------------------------------------------------
def test_complete_matches_networkx_complete_bipartite():
    role = roles(7, 5)
    net = Complete().build(role, np.random.default_rng(0))
    # networkx.complete_bipartite_graph(7, 5) has 7 x 5 edges
    assert net.n_edges == nx.complete_bipartite_graph(7, 5).number_of_edges() == 35
    assert net.complete
    check_well_formed(net, role)


def test_complete_refuses_huge_networks_with_a_clear_message():
    role = roles(8_000, 7_000)  # 5.6e7 edges
    with pytest.raises(ValueError, match="limit") as err:
        Complete().build(role, np.random.default_rng(0))
    assert "complete network would have" in str(err.value) and "\n" not in str(err.value)
    assert 8_000 * 7_000 > MAX_EDGES


@pytest.mark.parametrize(("n_b", "n_s"), [(1000, 1000), (1500, 500)])
def test_erdos_renyi_mean_degree_sparse_path(n_b, n_s):
    # G(n_b, n_s, p): expected edges n_b n_s p = mean_degree n / 2 (Erdos-Renyi 1960, bipartite)
    role = roles(n_b, n_s)
    builder = ErdosRenyi(mean_degree=10.0)
    p = builder.probability(role)
    assert p < 0.02  # the sparse sampler
    net = builder.build(role, np.random.default_rng(1))
    check_well_formed(net, role)
    n = n_b + n_s
    # edges ~ Binomial(n_b n_s, p): sd about 100 -> mean degree sd about 0.1
    assert net.degree.mean() == pytest.approx(10.0, abs=0.5)
    assert net.degree[role == 0].mean() == pytest.approx(p * n_s, rel=0.05)
    assert net.n_edges == pytest.approx(10.0 * n / 2, rel=0.05)


def test_erdos_renyi_dense_path_edge_count_over_seeds():
    role = roles(50, 50)
    builder = ErdosRenyi(mean_degree=10.0)
    p = builder.probability(role)
    assert p == pytest.approx(0.2)  # the block Bernoulli sampler
    counts = [builder.build(role, np.random.default_rng(s)).n_edges for s in range(40)]
    # Binomial(2500, 0.2): mean 500, sd 20; the mean of 40 has sd 3.2
    assert np.mean(counts) == pytest.approx(500, abs=13)
    assert np.std(counts) == pytest.approx(20, rel=0.35)


def test_random_bipartite_probability_and_edge_cases():
    role = roles(300, 200)
    net = RandomBipartite(p=0.05).build(role, np.random.default_rng(2))
    check_well_formed(net, role)
    # Binomial(60000, 0.05): mean 3000, sd 53
    assert net.n_edges == pytest.approx(3000, abs=220)
    assert RandomBipartite(p=0.0).build(role, np.random.default_rng(0)).n_edges == 0
    full = RandomBipartite(p=1.0).build(role, np.random.default_rng(0))
    assert full.n_edges == 60_000 and full.complete
    assert ErdosRenyi().build(roles(10, 0), np.random.default_rng(0)).n_edges == 0


def test_builders_are_deterministic_given_the_stream():
    role = roles(40, 60)
    for builder in (ErdosRenyi(mean_degree=4), SmallWorld(k=4), ScaleFree(m=2), Regions()):
        a = builder.build(role, np.random.default_rng(7))
        b = builder.build(role, np.random.default_rng(7))
        c = builder.build(role, np.random.default_rng(8))
        assert np.array_equal(a.buyer, b.buyer) and np.array_equal(a.seller, b.seller)
        assert not (a.n_edges == c.n_edges and np.array_equal(a.buyer, c.buyer))


def test_erdos_renyi_components_agree_with_networkx():
    role = roles(300, 300)
    net = ErdosRenyi(mean_degree=1.5).build(role, np.random.default_rng(3))
    ours = components_as_sets(net.component)
    theirs = {frozenset(c) for c in nx.connected_components(to_networkx(net))}
    assert ours == theirs and len(ours) > 10  # sparse enough to split


def test_small_world_keeps_edge_count_and_mixes_roles():
    role = roles(100, 100)
    net = SmallWorld(k=6, p=0.1).build(role, np.random.default_rng(4))
    check_well_formed(net, role)
    # Watts & Strogatz (1998): rewiring keeps n k / 2 edges
    assert net.social[0].size == 2 * 200 * 6 // 2
    # roles are placed on the ring at random: about half the edges join a buyer and a seller
    assert 0.35 < net.n_edges / 600 < 0.65
    with pytest.raises(ValueError, match="k must be < n"):
        SmallWorld(k=10).build(roles(3, 3), np.random.default_rng(0))


def test_scale_free_edge_count_and_hubs():
    role = roles(250, 250)
    net = ScaleFree(m=3).build(role, np.random.default_rng(5))
    check_well_formed(net, role)
    # networkx barabasi_albert_graph: m (n - m) edges (star of m + 1 nodes, then m per node)
    assert net.social[0].size == 2 * 3 * (500 - 3)
    degree = np.bincount(net.social[0], minlength=500)
    assert degree.min() >= 3 and degree.max() > 5 * degree.mean()  # hubs (Barabasi-Albert 1999)


def test_regions_match_networkx_random_geometric_graph():
    role = roles(150, 150)
    builder = Regions(n_regions=3, radius=0.08, spread=0.1)
    xy, region = builder.place(role, np.random.default_rng(6))
    net = builder.build(role, np.random.default_rng(6))
    check_well_formed(net, role)
    # networkx.random_geometric_graph joins nodes at distance <= radius: same positions, same edges
    g = nx.random_geometric_graph(300, 0.08, pos={i: tuple(p) for i, p in enumerate(xy)})
    theirs = {tuple(sorted(e)) for e in g.edges()}
    u, v = net.social
    ours = {(a, b) for a, b in zip(u.tolist(), v.tolist(), strict=True) if a < b}
    assert ours == theirs and len(ours) > 100
    assert set(region.tolist()) == {0, 1, 2} and np.all((xy >= 0) & (xy <= 1))
    ours_c = components_as_sets(net.component)
    trading = nx.Graph()
    trading.add_nodes_from(range(300))
    trading.add_edges_from((a, b) for a, b in theirs if role[a] != role[b])
    assert ours_c == {frozenset(c) for c in nx.connected_components(trading)}


def test_regions_uniform_is_a_plain_random_geometric_graph():
    role = roles(200, 200)
    xy, _ = Regions(radius=0.1, spread=None).place(role, np.random.default_rng(1))
    # uniform positions: mean 0.5, variance 1/12 per axis (common practice, no source)
    assert xy.mean() == pytest.approx(0.5, abs=0.03)
    assert xy.var() == pytest.approx(1 / 12, abs=0.01)


# -- files ----------------------------------------------------------------------------------------
def test_edge_list_file_integer_rows(tmp_path):
    path = tmp_path / "net.txt"
    path.write_text("# demo network\n0 2\n1 3 0.5\n0 3\n2 0\n")
    role = roles(2, 3)
    net = EdgeListFile(path=path).build(role, np.random.default_rng(0))
    assert list(zip(net.buyer.tolist(), net.seller.tolist(), strict=True)) == [
        (0, 2),
        (0, 3),
        (1, 3),
    ]
    assert net.degree[4] == 0  # trader 4 is not in the file: isolated
    check_well_formed(net, role)


def test_edge_list_file_text_labels_and_csv(tmp_path):
    path = tmp_path / "net.csv"
    path.write_text("ann,zed\nbob,zed\n")
    net = EdgeListFile(path=path).build(roles(2, 1), np.random.default_rng(0))
    assert net.labels == ["ann", "bob", "zed"]
    assert net.buyer.tolist() == [0, 1] and net.seller.tolist() == [2, 2]


@pytest.mark.parametrize(
    ("content", "pattern"),
    [
        (None, "not found"),
        ("0 1\n2\n", "could not be read"),
        ("0 9\n", "outside 0..3"),
        ("a b\nc d\ne f\n", "names 6 traders"),
    ],
)
def test_edge_list_file_errors_name_the_file(tmp_path, content, pattern):
    path = tmp_path / "bad.txt"
    if content is not None:
        path.write_text(content)
    with pytest.raises(ValueError, match=pattern) as err:
        EdgeListFile(path=path).build(roles(2, 2), np.random.default_rng(0))
    assert "bad.txt" in str(err.value) and "\n" not in str(err.value)


def test_graphml_round_trip_and_role_check(tmp_path):
    g = nx.Graph()
    g.add_nodes_from([(0, {"role": "buyer"}), (1, {"role": "buyer"}), (2, {"role": "seller"})])
    g.add_edges_from([(0, 2), (1, 2), (0, 1)])
    path = tmp_path / "g.graphml"
    nx.write_graphml(g, path)
    net = GraphMLFile(path=path).build(roles(2, 1), np.random.default_rng(0))
    assert net.buyer.tolist() == [0, 1] and net.seller.tolist() == [2, 2]
    assert net.social[0].size == 6
    with pytest.raises(ValueError, match="is a buyer in the file") as err:
        GraphMLFile(path=path).build(roles(1, 2), np.random.default_rng(0))
    assert "g.graphml" in str(err.value)
    # a file without roles takes the population's
    plain = tmp_path / "plain.graphml"
    nx.write_graphml(nx.path_graph(4), plain)
    net2 = GraphMLFile(path=plain).build(roles(2, 2), np.random.default_rng(0))
    assert net2.buyer.tolist() == [1] and net2.seller.tolist() == [2]


def test_graphml_errors_name_the_file(tmp_path):
    bad = tmp_path / "broken.graphml"
    bad.write_text("<graphml><graph><node id='a'>")
    for path, pattern in [(tmp_path / "nope.graphml", "not found"), (bad, "could not be read")]:
        with pytest.raises(ValueError, match=pattern) as err:
            GraphMLFile(path=path).build(roles(1, 1), np.random.default_rng(0))
        assert path.name in str(err.value) and "\n" not in str(err.value)


# -- registry and validation ----------------------------------------------------------------------
@pytest.mark.parametrize(
    ("name", "cls"),
    [
        ("complete", Complete),
        ("erdos_renyi", ErdosRenyi),
        ("small_world", SmallWorld),
        ("scale_free", ScaleFree),
        ("bipartite", RandomBipartite),
        ("regions", Regions),
        ("edge_list", EdgeListFile),
        ("graphml", GraphMLFile),
    ],
)
def test_entry_points_resolve(name, cls):
    assert get_plugin("networks", name) is cls
    assert isinstance(cls(), NetworkBuilder)
    assert cls.description and "\n" not in cls.description


def test_build_network_by_name():
    net = build_network("erdos_renyi", roles(100, 100), 1, mean_degree=4.0)
    same = ErdosRenyi(mean_degree=4.0).build(roles(100, 100), np.random.default_rng(1))
    assert np.array_equal(net.buyer, same.buyer)
    with pytest.raises(UnknownPluginError, match="erdos_renyi"):
        build_network("erdos_reny", roles(2, 2))


@pytest.mark.parametrize(
    ("name", "params", "pattern"),
    [
        ("erdos_renyi", {"mean_degree": -1}, "mean_degree must be >= 0"),
        ("bipartite", {"p": 1.5}, r"p must be in \[0, 1\]"),
        ("small_world", {"k": 1}, "k must be a whole number >= 2"),
        ("scale_free", {"m": 0}, "m must be a whole number >= 1"),
        ("regions", {"radius": 0}, "radius must be > 0"),
        ("regions", {"n_regions": 0}, "n_regions"),
    ],
)
def test_bad_parameters(name, params, pattern):
    with pytest.raises(ValueError, match=pattern):
        build_network(name, roles(5, 5), 0, **params)


def test_bad_roles():
    with pytest.raises(ValueError, match="role must contain only 0"):
        Complete().build(np.array([0, 2]), np.random.default_rng(0))


@pytest.mark.slow
def test_erdos_renyi_million_traders():
    # the large-market path: 1e6 traders, about 1e7 trading edges
    role = roles(500_000, 500_000)
    net = ErdosRenyi(mean_degree=20.0).build(role, np.random.default_rng(0))
    assert net.n_edges == pytest.approx(1e7, rel=0.01)
    assert net.degree.mean() == pytest.approx(20.0, rel=0.01)


def test_regions_brute_force_and_kd_tree_find_the_same_pairs():
    # the KD-tree is scipy's reference answer for fixed-radius pairs (scipy.spatial docs)
    from scipy.spatial import cKDTree

    from propensim.plugins.networks import _close_pairs

    xy = np.random.default_rng(3).random((700, 2))
    ours = _close_pairs(xy, 0.05)
    ref = np.asarray(sorted(map(tuple, cKDTree(xy).query_pairs(0.05, output_type="ndarray"))))
    np.testing.assert_array_equal(ours, ref)
    assert len(ours) > 100


def test_erdos_renyi_middle_path_keeps_the_bernoulli_law():
    # 1/50 <= p < 1/5: geometric gaps between kept pairs (Batagelj and Brandes 2005). Checked
    # against the law itself: the edge count is Binomial(n_pairs, p) and every pair is kept with
    # probability p, independently of its position (scipy.stats for the reference tests).
    from scipy import stats

    from propensim.plugins.networks import _bernoulli_pairs

    n_pairs, p, seeds = 40_000, 0.05, 60
    counts, hits = [], np.zeros(20)
    for seed in range(seeds):
        flat = _bernoulli_pairs(n_pairs, p, np.random.default_rng(seed), "test")
        assert np.all(np.diff(flat) > 0) and flat[0] >= 0 and flat[-1] < n_pairs
        counts.append(flat.size)
        hits += np.bincount(flat * 20 // n_pairs, minlength=20)
    # Binomial(4e4, 0.05): mean 2000, sd 43.6; the mean of 60 counts has sd 5.6
    assert np.mean(counts) == pytest.approx(2000, abs=6 * 5.6)
    assert np.std(counts, ddof=1) == pytest.approx(math.sqrt(n_pairs * p * (1 - p)), rel=0.3)
    # positions: the same share of kept pairs in each twentieth of the pairs
    assert stats.chisquare(hits).pvalue > 1e-3
    # and a middle-path network is a well-formed Erdos-Renyi network of the degree asked for
    role = roles(500, 500)
    builder = ErdosRenyi(mean_degree=10.0)
    assert 0.02 <= builder.probability(role) < 0.2
    net = builder.build(role, np.random.default_rng(3))
    check_well_formed(net, role)
    assert net.degree.mean() == pytest.approx(10.0, abs=0.5)
