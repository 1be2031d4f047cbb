"""Every code block in DEVELOPERS.md runs: Python blocks in order in one session (a block whose
first line is ``# file: NAME`` is written to that file), TOML blocks parse (or are written),
``bash`` blocks run in the same folder; ``console`` and ``text`` blocks are only shown."""

from __future__ import annotations

import os
import re
import subprocess
import sys
import tomllib
import types
from pathlib import Path

import pytest

from propensim.experiments import local_plugins
from propensim.plugins import registry

GUIDE = Path(__file__).resolve().parents[1] / "DEVELOPERS.md"
FENCE = re.compile(r"^```(\w*)\n(.*?)^```", re.DOTALL | re.MULTILINE)
SHOWN_ONLY = {"console", "text"}


def _blocks() -> list[tuple[int, str, str]]:
    text = GUIDE.read_text()
    return [
        (text[: m.start()].count("\n") + 1, m.group(1), m.group(2)) for m in FENCE.finditer(text)
    ]


def test_the_guide_has_every_kind_of_block_and_no_unknown_language():
    langs = [lang for _, lang, _ in _blocks()]
    assert set(langs) <= {"python", "toml", "bash"} | SHOWN_ONLY, set(langs)
    assert langs.count("python") >= 10 and "bash" in langs and "toml" in langs


def test_the_guide_covers_what_a_student_needs():
    text = GUIDE.read_text()
    for needle in (
        "agent.index",
        "seller's cost",
        "`pip install -e .` again",
        "A spec that names code runs that code",
        "propensim new-plugin",
        "plugins = [",
        "check_network_builder",
        "check_curve_family",
        "check_intervention",
        "Publishing a plugin",
        "per_agent = True",
    ):
        assert needle in text, needle


def _file_target(code: str) -> str | None:
    first = code.splitlines()[0] if code.strip() else ""
    return first[len("# file: ") :].strip() if first.startswith("# file: ") else None


def test_every_code_block_runs(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    before = {(k, n) for k, n, _ in registry.runtime_plugins()}
    by_sha, by_entry = dict(local_plugins._BY_SHA), dict(local_plugins._BY_ENTRY)
    module = types.ModuleType("developers_md")
    monkeypatch.setitem(sys.modules, "developers_md", module)
    env = dict(os.environ, PATH=f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}")
    ran = 0
    try:
        for line, lang, code in _blocks():
            where = f"DEVELOPERS.md:{line}"
            target = _file_target(code)
            if lang in SHOWN_ONLY:
                continue
            if target is not None:
                (tmp_path / target).write_text(code)
                if lang == "toml":
                    tomllib.loads(code)
            elif lang == "python":
                exec(compile(code, where, "exec"), module.__dict__)  # noqa: S102 - the guide's code
            elif lang == "toml":
                tomllib.loads(code)
            elif lang == "bash":
                done = subprocess.run(
                    ["bash", "-euo", "pipefail", "-c", code],
                    cwd=tmp_path,
                    env=env,
                    capture_output=True,
                    text=True,
                    timeout=600,
                )
                assert done.returncode == 0, f"{where}\n{done.stdout}\n{done.stderr}"
            ran += 1
    finally:
        for kind, name, _ in registry.runtime_plugins():
            if (kind, name) not in before:
                registry.unregister(kind, name)
        local_plugins._BY_SHA.clear()
        local_plugins._BY_SHA.update(by_sha)
        local_plugins._BY_ENTRY.clear()
        local_plugins._BY_ENTRY.update(by_entry)
    assert ran >= 15
    # what the shell blocks made
    assert (tmp_path / "herding" / "herding" / "plugin.py").is_file()
    assert (tmp_path / "results" / "mine" / "runs.parquet").is_file()


@pytest.mark.parametrize("needle", ["propensim new-plugin drift herding --per-agent"])
def test_the_shell_example_uses_the_per_agent_template(needle):
    assert needle in GUIDE.read_text()
