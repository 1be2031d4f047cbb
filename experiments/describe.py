"""A spec's model written out under the ODD protocol, as Markdown.

The document has the seven elements of the ODD protocol in the order and wording of its 2020
update (Grimm et al. 2020): purpose and patterns; entities, state variables, and scales; process
overview and scheduling; design concepts; initialization; input data; submodels. The design
concepts section takes the eleven concepts in turn and addresses each, or marks it not
applicable.

What it says comes from the spec (population, network, clearing, drift, metrics, rounds, seeds,
design, arms) and from each plugin in use: its one-line ``description``, the first paragraph of
its docstring, and its optional design-concept notes, a class attribute
``odd_notes: dict[str, str]`` keyed by concept (``"adaptation"``, ``"sensing"``, ...; the keys of
:data:`CONCEPTS`, case and spaces ignored). A plugin without notes gets a visible placeholder, so
the gap shows in the document rather than being papered over.

References
----------
Grimm, V., Railsback, S. F., Vincenot, C. E., Berger, U., Gallagher, C., DeAngelis, D. L.,
Edmonds, B., Ge, J., Giske, J., Groeneveld, J., Johnston, A. S. A., Milles, A., Nabe-Nielsen, J.,
Polhill, J. G., Radchuk, V., Rohwaeder, M.-S., Stillman, R. A., Thiele, J. C. and Ayllon, D.
(2020). The ODD protocol for describing agent-based and other simulation models: A second update
to improve clarity, replication, and structural realism. Journal of Artificial Societies and
Social Simulation 23(2), 7.
"""

from __future__ import annotations

import inspect
import json
from typing import Any

__all__ = ["CONCEPTS", "ELEMENTS", "describe_spec", "plugin_notes"]

#: The seven elements, in the protocol's order and wording (Grimm et al. 2020).
ELEMENTS = (
    "Purpose and patterns",
    "Entities, state variables, and scales",
    "Process overview and scheduling",
    "Design concepts",
    "Initialization",
    "Input data",
    "Submodels",
)
#: The eleven design concepts (Grimm et al. 2020), key -> heading.
CONCEPTS = {
    "basic_principles": "Basic principles",
    "emergence": "Emergence",
    "adaptation": "Adaptation",
    "objectives": "Objectives",
    "learning": "Learning",
    "prediction": "Prediction",
    "sensing": "Sensing",
    "interaction": "Interaction",
    "stochasticity": "Stochasticity",
    "collectives": "Collectives",
    "observation": "Observation",
}
NOT_APPLICABLE = "Not applicable"


def _key(text: str) -> str:
    return "_".join(str(text).lower().replace("-", " ").split())


def plugin_notes(obj: Any) -> dict[str, str] | None:
    """A plugin's design-concept notes by concept key, or None when it has none.

    Read with ``getattr(obj, "odd_notes", None)``; keys are normalised (``"Basic principles"``
    -> ``"basic_principles"``); unknown keys are kept under their normalised name.
    """
    notes = getattr(obj, "odd_notes", None)
    if not isinstance(notes, dict) or not notes:
        return None
    return {_key(k): " ".join(str(v).split()) for k, v in notes.items() if str(v).strip()}


def _first_paragraph(obj: Any) -> str:
    doc = inspect.getdoc(obj) or ""
    return " ".join(doc.split("\n\n")[0].split())


def _plugins(spec) -> list[tuple[str, str, Any, dict]]:
    """(role, name, class, parameters) of every plugin the base configuration uses."""
    from propensim.plugins import registry

    out = []

    def add(role, kind, table):
        name = table.get("name")
        try:
            obj = registry.get_plugin(kind, name)
        except registry.UnknownPluginError:
            obj = None
        out.append((role, name, obj, {k: v for k, v in table.items() if k != "name"}))

    add("trader curves", "curves", {"name": spec.population.get("curve", "normal")})
    add("trading network", "networks", spec.network)
    add("clearing rule", "clearing", spec.clearing)
    drift = spec.drift
    if "rules" in drift:
        for rule in drift["rules"]:
            add("drift rule", "drift", rule)
    else:
        add("drift rule", "drift", drift)
    for m in spec.metrics:
        add("metric", "metrics", {"name": m})
    for item in spec.resolved().get("interventions") or []:
        add("intervention", "interventions", item)
    for arm in spec.arms:
        for item in arm.get("interventions") or []:
            add(f"intervention in arm {arm['name']}", "interventions", item)
        for path, value in arm["set"].items():
            section = path.split(".")[0]
            kind = {"clearing": "clearing", "network": "networks", "drift": "drift"}.get(section)
            if kind and path.endswith(".name") or (kind and path == section):
                if all(p[1] != value for p in out):
                    add(f"{section} in arm {arm['name']}", kind, {"name": value})
    return out


def _interventions(items: list) -> str:
    """``name`` (parameters, rounds) for each intervention table."""
    out = []
    for item in items:
        params = {k: v for k, v in item.items() if k not in ("name", "start", "until")}
        until = item.get("until")
        when = f"from round {item.get('start', 0)}" + (
            f" until {until}" if until is not None else ""
        )
        out.append(f"`{item['name']}` ({_params(params)}; {when})")
    return "; ".join(out)


def _params(d: dict) -> str:
    return ", ".join(f"`{k} = {json.dumps(v)}`" for k, v in d.items()) or "no parameters"


def _framework_concepts(spec) -> dict[str, str]:
    """What the engine itself contributes to each concept (plugins add their own notes)."""
    drift_name = "a sum of drift rules" if "rules" in spec.drift else f"`{spec.drift.get('name')}`"
    moving = spec.drift.get("name") != "none"
    return {
        "basic_principles": "Traders are described by propensity curves, the probability of "
        "accepting a trade at each price, instead of utility functions. A curve implies an "
        "entropic force F = gamma d ln P / dx that holds a trader's price near where it is "
        "likely to trade; a buyer and a seller trade at a price only if both accept it, so "
        "their joint curve is the product of the two.",
        "emergence": "Prices, volumes, price dispersion, efficiency and the split of surplus "
        "emerge from many pairwise meetings under the clearing rule; none is imposed.",
        "adaptation": (
            f"Between rounds the drift ({drift_name}) moves each trader's preferred price "
            "(and, for some rules, its width) in response to its own outcomes and forces."
            if moving
            else NOT_APPLICABLE + ": with drift `none` curves do not change between rounds."
        ),
        "objectives": "Traders do not maximise an explicit objective; acceptance "
        "probabilities stand in for preferences. Surplus (value minus price for a buyer, price "
        "minus cost for a seller) is measured, not pursued.",
        "learning": NOT_APPLICABLE + ": the rules traders use do not change with experience "
        "(drift changes the curves' parameters, not the rules).",
        "prediction": NOT_APPLICABLE + ": traders do not forecast prices or outcomes.",
        "sensing": "A trader sees only the traders it is linked to in the trading network, "
        "and whatever the clearing and drift rules give it (their notes below).",
        "interaction": "Direct, pairwise and local: only a buyer and a seller joined by an edge "
        "of the trading network can trade; the clearing rule decides who meets and at what "
        "price.",
        "stochasticity": f"Populations, networks, meetings, prices and drift noise are random. "
        f"Each run draws from named streams spawned from its seed (root seed {spec.seed}, "
        "spawn key (point, replicate)); arms of a replicate share them (common random "
        "numbers), so a run is a pure function of its configuration and seed.",
        "collectives": NOT_APPLICABLE + ": traders form no groups that act as units (towns "
        "or regions of a network shape who meets whom but do not act).",
        "observation": f"Every round each metric records one number ({', '.join(spec.metrics)}); "
        "a run's summary is each metric's aggregate over its rounds, stored per run with "
        "its parameters and seed; round tables"
        + (", trader snapshots" if spec.collect.get("traders_every") else "")
        + (" and the ledger of trades" if spec.collect.get("ledger") else "")
        + " are kept as the spec's collect section asks.",
    }


def describe_spec(spec) -> str:
    """The ODD description of a loaded spec, as Markdown text.

    Parameters
    ----------
    spec : Spec
        From :func:`propensim.experiments.load_spec`.

    Returns
    -------
    str
        Markdown: a title, the seven ODD elements as numbered sections (design concepts as
        sub-sections), and a note on which plugins gave no design-concept notes.
    """
    plugins = _plugins(spec)
    pop = spec.population
    lines: list[str] = [f"# {spec.name}: model description (ODD protocol)", ""]
    lines += [
        "Written by `propensim describe` from the spec and the plugins' own descriptions, "
        "following the ODD protocol (Grimm et al. 2020, JASSS 23(2):7). Text in *italics "
        "between brackets* marks what a plugin does not say about itself yet.",
        "",
    ]

    def section(i: int) -> None:
        lines.extend([f"## {i + 1}. {ELEMENTS[i]}", ""])

    section(0)
    lines += [
        f"**Purpose.** {spec.description or '*[the spec gives no experiment.description]*'}",
        "",
        "The model is a market of buyers and sellers who each carry a propensity curve; it is "
        "used to compare clearing rules and market structures on the same populations and to "
        "see how prices, volumes and efficiency respond to the traders' price uncertainty and "
        "the network of who can trade with whom.",
        "",
        "**Patterns.** Patterns a run should reproduce to be trusted: trades happen only along "
        "network edges; goods and cash are conserved in every trade; with wide curves or thin "
        "networks, volume and efficiency fall; under a uniform-price call auction prices "
        "settle near the competitive price of the values and costs.",
        "",
    ]
    section(1)
    n_b, n_s = pop.get("n_buyers"), pop.get("n_sellers")
    net_params = {k: v for k, v in spec.network.items() if k != "name"}
    lines += [
        f"**Traders** ({n_b} buyers, {n_s} sellers): role (buyer or seller); preferred price "
        "mu and price uncertainty sigma of the propensity curve (price units); activity (curve "
        "height, in (0, 1]); gamma (energy scale); value (a buyer's value, a seller's unit "
        "cost; price units); cash (budget); stock (units a seller holds); capacity (units per "
        "round).",
        "",
        f"**The trading network**: buyer-seller edges over the traders "
        f"(`{spec.network.get('name')}`, {_params(net_params)}).",
        "",
        f"**Scales.** Time is discrete: a run is {spec.rounds} rounds (trading periods; one "
        "round is one market day in the demo). Prices are in the spec's price units; space, "
        "where a network has it, is abstract (the unit square).",
        "",
    ]
    section(2)
    lines += [
        "Each round, in this order: (1) the clearing rule turns meetings along network edges "
        "into trades (buyer, seller, price, quantity); (2) the market checks and settles them "
        "(goods and cash move, conserved); (3) the drift rule moves preferred prices and widths "
        "from each trader's forces and outcome; (4) every metric records one number. "
        + (
            "Every round starts from the initial stock and cash (`market.replenish = true`)."
            if spec.market.get("replenish", True)
            else "Holdings carry over between rounds (`market.replenish = false`)."
        )
        + " Traders within a round are handled together (array rules) or in a random order "
        "(per-agent rules); the order is drawn from the clearing stream.",
        "",
    ]
    section(3)
    framework = _framework_concepts(spec)
    missing_notes = []
    for role, name, obj, _ in plugins:
        if obj is not None and plugin_notes(obj) is None:
            missing_notes.append(f"{role} `{name}`")
    for key, heading in CONCEPTS.items():
        lines += [f"### 4.{list(CONCEPTS).index(key) + 1} {heading}", "", framework[key]]
        for role, name, obj, _ in plugins:
            notes = plugin_notes(obj) if obj is not None else None
            if notes and key in notes:
                lines.append(f"- {role} `{name}`: {notes[key]}")
        lines.append("")
    if missing_notes:
        lines += [
            "*[No design-concept notes (`odd_notes`) from: "
            + "; ".join(missing_notes)
            + ". The text above is what the engine itself implies; add notes to those plugins "
            "to say more.]*",
            "",
        ]
    section(4)
    lines += [
        f"Each run builds its population and network afresh from its seed (root seed "
        f"{spec.seed}): population settings {_params(pop)}.",
        "",
        f"Design: kind `{spec.design.get('kind')}` over "
        + (", ".join(f"`{k}`" for k in (spec.design.get("parameters") or {})) or "no parameters")
        + f"; {len(spec.points)} design points x {spec.replicates} replicates"
        + (f" x {len(spec.arms)} arms" if spec.arms else "")
        + f" = {spec.n_runs} runs.",
        "",
    ]
    top = spec.resolved().get("interventions") or []
    if top:
        lines += [f"Interventions in every arm, in order: {_interventions(top)}.", ""]
    for arm in spec.arms:
        extra = arm.get("interventions") or []
        lines.append(
            f"- arm `{arm['name']}`: {arm.get('description') or ''} ({_params(arm['set'])})"
            + (f"; interventions: {_interventions(extra)}" if extra else "")
        )
    if spec.arms:
        lines.append("")
    section(5)
    lines += [
        "None: the model uses no external time series; values, costs and curves are drawn from "
        "the distributions in the spec"
        + (
            "; a network read from a file is input data: see the network's parameters above."
            if spec.network.get("name") in ("edge_list", "graphml")
            else "."
        ),
        "",
    ]
    section(6)
    for role, name, obj, params in plugins:
        if obj is None:
            lines += [f"### {role}: `{name}`", "", "*[plugin not installed here]*", ""]
            continue
        lines += [f"### {role}: `{name}`", "", f"{obj.description}", ""]
        para = _first_paragraph(obj)
        if para and para != obj.description:
            lines += [para, ""]
        if params:
            lines += [f"Parameters: {_params(params)}.", ""]
        agg = getattr(obj, "aggregate", None)
        if role == "metric" and agg:
            lines += [f"A run's summary: the `{agg}` of its rounds.", ""]
    return "\n".join(lines).rstrip() + "\n"
