"""``propensim new-plugin KIND NAME``: a small installable package holding one plugin.

The package has a ``pyproject.toml`` whose entry point puts the plugin in the group
``propensim.KIND`` under ``NAME``, a module ``NAME/plugin.py`` implementing the kind's contract
(with a comment on each required piece), tests that run the conformance kit and a small market,
an ``example.toml`` spec that uses it and a README. The templates live in
``experiments/plugin_templates``; every kind has one, and clearing and drift also a per-agent
one (``--per-agent``). The folder is written whole or not at all: an existing folder is never
touched.
"""

from __future__ import annotations

import difflib
import importlib.util
import keyword
import os
import shutil
import tempfile
from importlib import resources
from pathlib import Path

__all__ = ["KIND_DETAILS", "NewPluginError", "new_plugin"]


class NewPluginError(ValueError):
    """Bad input to ``new-plugin``: unknown kind, bad name, existing folder (exit code 2)."""


#: Per kind: the conformance check the generated tests call, the bad-parameter test, a market
#: configuration that uses the plugin, and the lines the example spec adds.
KIND_DETAILS: dict[str, dict[str, str]] = {
    "clearing": {
        "kit": "check_clearing_rule",
        "kit_call": 'volume = check_clearing_rule(__CLASS__())\n    assert volume["complete"] > 0'
        "  # it traded somewhere",
        "bad": "markup=-1.0",
        "bad_name": "markup",
        "market": '"clearing": "__NAME__"',
        "spec": '\n[clearing]\nname = "__NAME__"\nmarkup = 0.0\n',
    },
    "drift": {
        "kit": "check_drift_rule",
        "kit_call": "check_drift_rule(__CLASS__())",
        "bad": "rate=2.0",
        "bad_name": "rate",
        "market": '"drift": "__NAME__"',
        "spec": '\n[drift]\nname = "__NAME__"\nrate = 0.2\n',
    },
    "metrics": {
        "kit": "check_metric",
        "kit_call": "check_metric(__CLASS__())",
        "bad": 'role="trader"',
        "bad_name": "role",
        "market": '"metrics": ["volume", "__NAME__"]',
        "spec": '\n[collect]\nmetrics = ["volume", "vwap", "__NAME__"]\n',
    },
    "networks": {
        "kit": "check_network_builder",
        "kit_call": "edges = check_network_builder(__CLASS__())\n"
        '    assert edges["buyers first"] > 0',
        "bad": "k=0",
        "bad_name": "k",
        "market": '"network": {"name": "__NAME__", "k": 2}',
        "spec": '\n[network]\nname = "__NAME__"\nk = 3\n',
    },
    "curves": {
        "kit": "check_curve_family",
        "kit_call": "check_curve_family(__CLASS__)",
        "bad": "mu=100.0, sigma=-1.0",
        "bad_name": "sigma",
        "market": '"population": {"n_buyers": 20, "n_sellers": 20, "curve": "__NAME__"}',
        "spec": 'curve = "__NAME__"\n',
    },
    "interventions": {
        "kit": "check_intervention",
        "kit_call": "check_intervention(__CLASS__(share=0.5, start=1, until=3))",
        "bad": "share=1.5",
        "bad_name": "share",
        "market": '"interventions": [{"name": "__NAME__", "start": 2, "until": 4}]',
        "spec": '\n[[interventions]]\nname = "__NAME__"\nshare = 0.5\nstart = 5\nuntil = 10\n',
    },
}

PER_AGENT_KINDS = ("clearing", "drift")


def _class_name(name: str) -> str:
    camel = "".join(part[:1].upper() + part[1:] for part in name.split("_") if part)
    return camel or "Plugin"


def _check(kind: str, name: str, per_agent: bool, target: Path) -> None:
    from propensim.plugins import registry

    if kind not in KIND_DETAILS:
        close = difflib.get_close_matches(str(kind), list(KIND_DETAILS), n=1)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        raise NewPluginError(
            f"KIND: unknown plugin kind {kind!r}{hint}; allowed: {', '.join(KIND_DETAILS)}"
        )
    if not (name.isascii() and name.isidentifier()) or keyword.iskeyword(name):
        raise NewPluginError(
            f"NAME: {name!r} is not a valid Python identifier (letters, digits and _, not "
            "starting with a digit, not a keyword); it names the package and the plugin"
        )
    if importlib.util.find_spec(name) is not None:
        raise NewPluginError(
            f"NAME: {name!r} is already an importable module here; pick another name (the "
            "package would hide it)"
        )
    if name in registry.names(kind):
        raise NewPluginError(
            f"NAME: {kind} plugin {name!r} exists already; pick another name "
            "(propensim plugins lists the taken ones)"
        )
    if per_agent and kind not in PER_AGENT_KINDS:
        raise NewPluginError(
            f"--per-agent: only for {' and '.join(PER_AGENT_KINDS)} plugins, not {kind!r}"
        )
    if target.exists() or target.is_symlink():
        raise NewPluginError(
            f"--dir: {str(target)!r} exists; nothing was written; give a new folder"
        )
    if not target.parent.is_dir():
        raise NewPluginError(f"--dir: parent folder {str(target.parent)!r} does not exist")


def _market_config(entry: str) -> str:
    """The generated test's market configuration, laid out as ruff format would."""
    lines = ["{"]
    if not entry.startswith('"population"'):
        lines.append('    "population": {"n_buyers": 20, "n_sellers": 20},')
    lines += [f"    {entry},", "}"]
    return "\n".join(lines)


def _template(name: str) -> str:
    return resources.files("propensim.experiments.plugin_templates").joinpath(name).read_text()


def _fill(text: str, values: dict[str, str]) -> str:
    for key, value in values.items():
        text = text.replace(key, value)
    return text


def new_plugin(kind: str, name: str, *, per_agent: bool = False, directory=None) -> Path:
    """Write a plugin package for ``kind`` named ``name``; returns its folder.

    Parameters
    ----------
    kind : str
        One of clearing, drift, metrics, networks, curves, interventions.
    name : str
        A Python identifier: the package, the plugin's registry name and (in CamelCase) its
        class.
    per_agent : bool
        For clearing and drift: the per-agent template (one call per trader).
    directory : str or Path, optional
        The folder to create (default ``./NAME``); it must not exist.

    Raises
    ------
    NewPluginError
        Unknown kind, bad name, ``per_agent`` for another kind, or an existing folder.
    """
    kind, name = str(kind).strip(), str(name).strip()
    target = Path(directory if directory is not None else name).expanduser()
    _check(kind, name, per_agent, target)
    cls = _class_name(name)
    details = KIND_DETAILS.get(kind, {})
    module = _template(f"{kind}{'_per_agent' if per_agent else ''}.py.in")
    description = next(
        (
            line.split("=", 1)[1].strip().strip("\"'")
            for line in module.splitlines()
            if line.strip().startswith("description") and "=" in line
        ),
        f"A propensim {kind} plugin.",
    )
    values = {
        "__KIT_CALL__": details["kit_call"],
        "__KIT__": details["kit"],
        "__BAD_PARAM__": details["bad"],
        "__BAD_NAME__": details["bad_name"],
        "__MARKET_CONFIG__": _market_config(details["market"]),
        "__SPEC__": details["spec"],
        "__PER_AGENT_FLAG__": " --per-agent" if per_agent else "",
        "__DESCRIPTION__": description.replace('"', "'"),
        "__DIST__": name.replace("_", "-"),
        "__CLASS__": cls,
        "__KIND__": kind,
        "__NAME__": name,
    }
    files = {
        "pyproject.toml": _template("pyproject.toml.in"),
        "README.md": _template("README.md.in"),
        "example.toml": _template("example.toml.in"),
        f"{name}/__init__.py": f'"""The {name} {kind} plugin for propensim."""\n\n'
        f"from {name}.plugin import {cls}\n\n__all__ = [{cls!r}]\n".replace("'", '"'),
        f"{name}/plugin.py": module,
        f"tests/test_{name}.py": _template("test_plugin.py.in"),
    }
    if kind == "curves":  # a dataclass whose constructor itself refuses a bad width
        files[f"tests/test_{name}.py"] = files[f"tests/test_{name}.py"].replace(
            _BAD_TEST, _BAD_CURVE_TEST
        )
    tmp = Path(tempfile.mkdtemp(prefix=f".{name}-", dir=target.parent))
    try:
        for rel, text in files.items():
            path = tmp / rel
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_text(_fill(_fill(text, values), values), encoding="utf-8")
        os.chmod(tmp, 0o755)  # mkdtemp makes it private
        os.rename(tmp, target)  # whole or nothing; fails rather than replace a folder
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return target


_BAD_TEST = """    plugin = __CLASS__(__BAD_PARAM__)
    try:
        plugin.check()
    except ValueError as exc:"""

_BAD_CURVE_TEST = """    try:
        __CLASS__(__BAD_PARAM__)
    except ValueError as exc:"""
