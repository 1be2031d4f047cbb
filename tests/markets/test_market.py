"""The market's round loop, its Mesa face, its random streams and its errors."""

import warnings

import numpy as np
import pandas as pd
import pytest

from propensim.agents import build_population
from propensim.markets import Market, MarketEngine, build_market, spawn_streams
from propensim.plugins import TradingNetwork, UnknownPluginError, make_plugin

BASE = {
    "population": {
        "n_buyers": 40,
        "n_sellers": 40,
        "value": [80, 120],
        "cost": [60, 100],
        "sigma": 6.0,
    },
    "network": {"name": "erdos_renyi", "mean_degree": 6},
    "clearing": {"name": "propensity", "meetings": 2},
    "drift": {"rules": [{"name": "anchor"}, {"name": "outcome", "step": 0.2}], "noise": 0.1},
}


def test_same_seed_same_run_and_engine_equals_mesa_model():
    a = build_market(BASE, seed=7).run(15)
    b = build_market(BASE, seed=7).run(15)
    c = build_market(BASE, seed=7, mesa=False).run(15)
    pd.testing.assert_frame_equal(a, b)
    pd.testing.assert_frame_equal(a, c)
    d = build_market(BASE, seed=8).run(15)
    assert not a.equals(d)


def test_streams_are_pure_functions_of_the_seed():
    s1, s2 = spawn_streams(3), spawn_streams(3)
    for name in s1:
        assert s1[name].random() == s2[name].random()
    draws = {name: g.random() for name, g in spawn_streams(3).items()}
    assert len(set(draws.values())) == len(draws)  # independent streams differ


def test_round_table_and_ledger_agree():
    m = build_market(BASE, seed=1)
    rounds = m.run(10)
    ledger = m.ledger_frame()
    assert list(rounds["round"]) == list(range(10))
    per_round = ledger.groupby("round")["quantity"].sum().reindex(range(10), fill_value=0)
    np.testing.assert_array_equal(per_round.to_numpy(), rounds["volume"].to_numpy())
    assert rounds["volume"].sum() > 0
    # every trade joins a buyer and a seller that share an edge
    assert m.network.has_edge(ledger["buyer"].to_numpy(), ledger["seller"].to_numpy()).all()
    summary = m.summary()
    assert summary["volume"] == rounds["volume"].sum()  # volume aggregates by sum


def test_mesa_agents_are_lazy_views_on_the_columns():
    import mesa

    m = build_market(BASE, seed=2)
    assert isinstance(m, mesa.Model)
    assert m._traders is None  # nothing built until asked for
    agents = m.agents
    assert len(agents) == 80
    t = m.traders[3]
    assert t.index == 3 and t.role == "buyer"
    t.mu = 123.5
    assert m.population.mu[3] == 123.5
    m.population.sigma[3] = 9.0
    assert t.sigma == 9.0
    dc = mesa.DataCollector(agent_reporters={"mu": "mu"})
    dc.collect(m)
    frame = dc.get_agent_vars_dataframe()
    assert len(frame) == 80
    assert frame["mu"].iloc[3] == 123.5


def test_per_agent_rule_runs_through_mesa_agents():
    conf = dict(BASE, clearing={"name": "propensity_per_agent", "meetings": 2})
    m = build_market(conf, seed=4, mesa=False)
    assert isinstance(m, Market)  # per-agent rules always get Mesa agents
    rounds = m.run(5)
    assert rounds["volume"].sum() > 0


def test_replenish_off_lets_stock_run_down_and_conserves_goods():
    conf = dict(BASE, market={"replenish": False})
    m = build_market(conf, seed=5)
    total = m.population.stock.sum()
    m.run(20)
    assert m.population.stock.sum() == total
    # each seller held one unit: total sales can never exceed the number of sellers
    assert m.ledger_frame()["quantity"].sum() <= 40


def test_empty_network_warns_and_trades_nothing():
    pop = build_population(5, 5, rng=0)
    net = TradingNetwork(10, [], [])
    with pytest.warns(RuntimeWarning, match="no buyer-seller edge"):
        m = MarketEngine(pop, net, make_plugin("clearing", "propensity"), seed=0)
    assert m.run(3)["volume"].sum() == 0


def test_part_with_only_buyers_warns():
    pop = build_population(3, 2, rng=0)
    # buyers 0,1 share seller 3; buyer 2 is joined to nobody who sells... it has seller 4 only
    # via no edge, so its part holds a buyer alone.
    net = TradingNetwork(5, [0, 1], [3, 3])
    with pytest.warns(RuntimeWarning, match="only buyers or only sellers"):
        MarketEngine(pop, net, make_plugin("clearing", "propensity"), seed=0)


def test_bad_input_is_one_clear_error():
    pop = build_population(3, 3, rng=0)
    with pytest.raises(ValueError, match="network has 4 traders but population has 6"):
        MarketEngine(pop, TradingNetwork(4, [0], [3]), make_plugin("clearing", "propensity"))
    with pytest.raises(UnknownPluginError, match="known: .*call_auction"):
        build_market(dict(BASE, clearing={"name": "call_auctoin"}), seed=0)
    with pytest.raises(UnknownPluginError, match="did you mean 'call_auction'"):
        build_market(dict(BASE, clearing={"name": "call_auctoin"}), seed=0)
    with pytest.raises(ValueError, match="population.n_sellers is required"):
        build_market({"population": {"n_buyers": 3}}, seed=0)
    with pytest.raises(ValueError, match="rounds must be a whole number"):
        build_market(BASE, seed=0).run(-1)
    with pytest.raises(ValueError, match="sigma must be > 0"):
        build_market(dict(BASE, population=dict(BASE["population"], sigma=-1.0)), seed=0)


def test_no_warning_on_a_healthy_market():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        build_market(dict(BASE, network="complete"), seed=0).run(2)


def test_market_accepts_a_networkx_graph_with_roles():
    import networkx as nx

    # a 2 x 3 complete bipartite graph from networkx, roles as node attributes
    graph = nx.complete_bipartite_graph(2, 3)
    for node in graph:
        graph.nodes[node]["role"] = "buyer" if node < 2 else "seller"
    pop = build_population(2, 3, value=100.0, cost=90.0, sigma=5.0, rng=0)
    m = MarketEngine(pop, graph, make_plugin("clearing", "propensity"), seed=0)
    assert m.network.n_edges == 6  # networkx: |E(K_{2,3})| = 6
    graph.nodes[0]["role"] = "seller"
    with pytest.raises(ValueError, match="node 0 has role 'seller' but population row 0"):
        MarketEngine(pop, graph, make_plugin("clearing", "propensity"), seed=0)
    with pytest.raises(ValueError, match="network has 4 traders"):
        MarketEngine(pop, nx.path_graph(4), make_plugin("clearing", "propensity"))


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_no_partner_count_without_components_matches_the_components(seed):
    # Reference: scipy.sparse.csgraph.connected_components (through TradingNetwork.component),
    # counting the traders in parts that hold only one role; the build counts traders without
    # an edge instead, which is the same when every edge joins a buyer and a seller.
    from propensim.agents.population import build_population
    from propensim.markets.engine import _edges_join_roles, _one_sided_parts
    from propensim.plugins.networks import build_network

    pop = build_population(n_buyers=300, n_sellers=200, rng=seed)
    net = build_network("erdos_renyi", pop.role, rng=seed, mean_degree=1.5)
    assert _edges_join_roles(pop, net)
    lonely = int(np.count_nonzero(net.degree == 0))
    assert lonely > 0  # a sparse network leaves some traders alone
    assert _one_sided_parts(pop, net) == (lonely, lonely)
