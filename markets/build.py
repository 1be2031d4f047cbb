"""Building a market from a plain configuration: streams, plugins, population, network.

A run is a pure function of its configuration and seed. The seed is split into named streams
(:data:`STREAMS`) so that a draw added in one place does not reshuffle the others; new streams
are only ever appended, so adding one moves no earlier draw.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from propensim.agents.population import build_population
from propensim.plugins import registry

#: Named random streams of one run, in spawn order. New streams are only ever appended.
#: ``interventions`` is the parent of one child stream per intervention, in spec order.
STREAMS = ("population", "network", "clearing", "drift", "mesa", "interventions")


def seed_sequence(seed) -> np.random.SeedSequence:
    """Normalise an int, a sequence of ints, a SeedSequence or None into a SeedSequence."""
    if isinstance(seed, np.random.SeedSequence):
        return seed
    return np.random.SeedSequence(seed)


def spawn_streams(seed) -> dict[str, np.random.Generator]:
    """One independent generator per name in :data:`STREAMS`, derived purely from ``seed``.

    Unlike ``SeedSequence.spawn``, calling this twice with the same seed gives the same streams.
    """
    ss = seed_sequence(seed)
    return {
        name: np.random.default_rng(
            np.random.SeedSequence(ss.entropy, spawn_key=(*ss.spawn_key, i))
        )
        for i, name in enumerate(STREAMS)
    }


def intervention_streams(seed, count: int) -> list[np.random.Generator]:
    """One generator per intervention (in spec order), children of the ``interventions`` stream.

    Intervention ``i`` always draws from the same child, whatever the others do, so adding an
    intervention after the others moves none of their draws.
    """
    ss = seed_sequence(seed)
    parent = (*ss.spawn_key, STREAMS.index("interventions"))
    return [
        np.random.default_rng(np.random.SeedSequence(ss.entropy, spawn_key=(*parent, i)))
        for i in range(int(count))
    ]


def _plugin_from(kind: str, conf) -> Any:
    """Build a plugin from a name or a mapping ``{"name": ..., **params}``."""
    if isinstance(conf, str):
        return registry.make_plugin(kind, conf)
    if not isinstance(conf, Mapping) or "name" not in conf:
        raise ValueError(f"{kind} must be a plugin name or a table with 'name', got {conf!r}")
    params = {k: v for k, v in conf.items() if k != "name"}
    return registry.make_plugin(kind, conf["name"], **params)


def build_drift(conf):
    """Build a drift rule from a name, a table, or a table ``{"rules": [...], eta, noise, dt}``.

    Several rules are summed as forces (see :func:`propensim.plugins.drift.combine`).
    """
    if conf is None:
        return None
    if isinstance(conf, Mapping) and "rules" in conf:
        from propensim.plugins.drift import combine

        rules = [_plugin_from("drift", r) for r in conf["rules"]]
        options = {k: v for k, v in conf.items() if k != "rules"}
        return combine(rules, **options)
    return _plugin_from("drift", conf)


def build_interventions(conf) -> list:
    """Build intervention plugins from a list of names or tables ``{"name": ..., **params}``."""
    if not conf:
        return []
    if isinstance(conf, str | Mapping):
        raise ValueError("interventions must be a list of tables, each with a 'name'")
    return [_plugin_from("interventions", item) for item in conf]


def build_population_and_network(config: Mapping, streams: Mapping):
    """The population and its network from a configuration, each from its own named stream.

    Every mode (rounds, events, shop) starts from these, so runs with the same seed start from
    the same market.
    """
    from propensim.plugins.networks import build_network

    pop_conf = dict(config.get("population") or {})
    missing = [k for k in ("n_buyers", "n_sellers") if k not in pop_conf]
    if missing:
        raise ValueError(f"population.{missing[0]} is required (a whole number >= 0)")
    population = build_population(rng=streams["population"], **pop_conf)
    net_conf = config.get("network", "complete")
    if isinstance(net_conf, str):
        net_conf = {"name": net_conf}
    net_params = {k: v for k, v in net_conf.items() if k != "name"}
    network = build_network(net_conf["name"], population.role, streams["network"], **net_params)
    return population, network


def build_market(config: Mapping, seed=None, *, mesa: bool = True):
    """Build a market from a plain configuration mapping (the shape a spec file resolves to).

    Parameters
    ----------
    config : mapping
        ``population``: keyword arguments of
        :func:`~propensim.agents.population.build_population` (``n_buyers`` and ``n_sellers``
        required); ``network``: a network plugin name or ``{"name": ..., **params}`` (default
        ``complete``); ``clearing``: a clearing plugin (default ``propensity``); ``drift``: a drift
        plugin, or ``{"rules": [...], "eta":, "noise":, "dt":}`` for a sum of forces (default none);
        ``metrics``: list of metric names; ``interventions``: a list of intervention tables
        ``{"name": ..., "start":, "until":, **params}`` acting in order (see
        :func:`build_interventions`); ``market``: ``replenish``, ``traders_every``,
        ``keep_ledger``, ``keep_totals``, and ``mode``: ``"events"`` builds the continuous-time
        :class:`~propensim.markets.events.EventMarket` (options in ``events``), ``"shop"`` the
        :class:`~propensim.markets.supply_chain.Shop` (options in ``shop``).
    seed : int or SeedSequence
        Root seed of the run; population and network come from their own named streams.
    mesa : bool
        Return a :class:`~propensim.markets.model.Market` (a ``mesa.Model``, default) or, if
        False, the lighter :class:`MarketEngine` (no Mesa import; same results). A per-agent
        clearing rule always gets a Market, since it needs Mesa agents.

    Returns
    -------
    Market or MarketEngine
    """
    from propensim.markets.engine import MarketEngine

    mode = (config.get("market") or {}).get("mode", "rounds")
    if mode in ("events", "shop"):  # continuous time: markets/events.py, markets/supply_chain.py
        from propensim.markets import events, supply_chain

        return (events.build_event_market if mode == "events" else supply_chain.build_shop)(
            config, seed
        )
    streams = spawn_streams(seed)
    population, network = build_population_and_network(config, streams)
    clearing = _plugin_from("clearing", config.get("clearing", "propensity"))
    drift = build_drift(config.get("drift"))
    options = dict(config.get("market") or {})
    options["interventions"] = build_interventions(config.get("interventions"))
    cls = MarketEngine
    if mesa or getattr(clearing, "per_agent", False):
        from propensim.markets.model import Market as cls
    return cls(
        population,
        network,
        clearing,
        drift,
        config.get("metrics"),
        seed=seed,
        **options,
    )
