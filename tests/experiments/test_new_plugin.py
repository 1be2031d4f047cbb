"""``propensim new-plugin``: a package for every kind that passes ruff and its own tests.

The fast tests here import the generated module from its folder and register it for the
session; test_new_plugin_install.py installs the packages for real (slow).
"""

from __future__ import annotations

import importlib.util
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from propensim.experiments.cli import main
from propensim.experiments.new_plugin import KIND_DETAILS, NewPluginError, new_plugin
from propensim.plugins import registry

#: (kind, per_agent): every template
VARIANTS = [(kind, False) for kind in KIND_DETAILS] + [("clearing", True), ("drift", True)]


def _name(kind: str, per_agent: bool) -> str:
    return f"stud14_{kind}{'_pa' if per_agent else ''}"


def _ruff() -> list[str]:
    exe = shutil.which("ruff", path=str(Path(sys.executable).parent))
    return [exe] if exe else [sys.executable, "-m", "ruff"]


@pytest.fixture(scope="module")
def generated(tmp_path_factory):
    root = tmp_path_factory.mktemp("plugins")
    folders = {}
    for kind, per_agent in VARIANTS:
        name = _name(kind, per_agent)
        folders[(kind, per_agent)] = new_plugin(
            kind, name, per_agent=per_agent, directory=root / name
        )
    return root, folders


def test_every_kind_gets_the_package_files(generated):
    _, folders = generated
    for (kind, per_agent), folder in folders.items():
        name = folder.name
        files = sorted(str(p.relative_to(folder)) for p in folder.rglob("*") if p.is_file())
        assert files == [
            "README.md",
            "example.toml",
            "pyproject.toml",
            f"{name}/__init__.py",
            f"{name}/plugin.py",
            f"tests/test_{name}.py",
        ]
        project = tomllib.loads((folder / "pyproject.toml").read_text())
        group = project["project"]["entry-points"][f"propensim.{kind}"]
        cls = "".join(p.capitalize() for p in name.split("_"))
        assert group == {name: f"{name}.plugin:{cls}"}
        readme = (folder / "README.md").read_text()
        assert "pip install -e ." in readme and "again" in readme  # the reinstall step
        plugin = (folder / name / "plugin.py").read_text()
        assert "description" in plugin and "# Required" in plugin
        assert ("per_agent = True" in plugin or "agent_drift" in plugin) == per_agent


def test_generated_code_passes_ruff(generated):
    root, _ = generated
    lint = subprocess.run([*_ruff(), "check", "--no-cache", str(root)], capture_output=True)
    assert lint.returncode == 0, lint.stdout.decode() + lint.stderr.decode()
    fmt = subprocess.run(
        [*_ruff(), "format", "--check", "--no-cache", str(root)], capture_output=True
    )
    assert fmt.returncode == 0, fmt.stdout.decode() + fmt.stderr.decode()


def _load(path: Path, name: str):
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.mark.parametrize(("kind", "per_agent"), VARIANTS)
def test_generated_tests_pass_with_the_plugin_registered_for_the_session(
    generated, kind, per_agent, monkeypatch
):
    _, folders = generated
    folder = folders[(kind, per_agent)]
    name = folder.name
    monkeypatch.syspath_prepend(str(folder))
    tests = _load(folder / "tests" / f"test_{name}.py", f"_generated_test_{name}")
    cls = importlib.import_module(f"{name}.plugin").__dict__[
        "".join(p.capitalize() for p in name.split("_"))
    ]
    tests.test_passes_the_conformance_kit()
    tests.test_check_refuses_a_bad_parameter()
    with pytest.raises(registry.UnknownPluginError):  # not installed: the entry point is missing
        tests.test_found_through_its_entry_point()
    registry.register(kind, name)(cls)
    try:
        tests.test_found_through_its_entry_point()
        tests.test_runs_in_a_market()
    finally:
        registry.unregister(kind, name)
        for mod in [m for m in sys.modules if m == name or m.startswith(name + ".")]:
            monkeypatch.delitem(sys.modules, mod)


def test_the_example_spec_is_valid_with_the_plugin_registered(generated, monkeypatch):
    from propensim.experiments.spec import load_spec

    _, folders = generated
    for (kind, per_agent), folder in folders.items():
        name = folder.name
        monkeypatch.syspath_prepend(str(folder))
        module = importlib.import_module(f"{name}.plugin")
        cls = getattr(module, "".join(p.capitalize() for p in name.split("_")))
        registry.register(kind, name)(cls)
        try:
            spec = load_spec(folder / "example.toml")
            assert name in str(spec.resolved()), (kind, per_agent)
        finally:
            registry.unregister(kind, name)


# -- bad input --------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("argv", "expected"),
    [
        (["bogus", "x14"], "KIND: unknown plugin kind 'bogus'"),
        (["clearng", "x14"], "did you mean 'clearing'?"),
        (["drift", "9lives"], "NAME: '9lives' is not a valid Python identifier"),
        (["drift", "my-rule"], "is not a valid Python identifier"),
        (["drift", "class"], "is not a valid Python identifier"),
        (["drift", "prix_\u00e9"], "is not a valid Python identifier"),
        (["metrics", "numpy"], "is already an importable module"),
        (["metrics", "volume"], "metrics plugin 'volume' exists already"),
        (["metrics", "x14", "--per-agent"], "--per-agent: only for clearing and drift"),
    ],
)
def test_bad_input_is_one_line_exit_2_and_writes_nothing(
    tmp_path, monkeypatch, capsys, argv, expected
):
    monkeypatch.chdir(tmp_path)
    assert main(["new-plugin", *argv]) == 2
    out, err = capsys.readouterr()
    assert err.startswith("propensim: error: ") and err.count("\n") == 1, err
    assert expected in err and "Traceback" not in err and out == ""
    assert list(tmp_path.iterdir()) == []


def test_an_existing_folder_is_left_as_it_was(tmp_path, capsys):
    target = tmp_path / "mine"
    target.mkdir()
    (target / "keep.txt").write_text("my work")
    assert main(["new-plugin", "drift", "stud14_keep", "--dir", str(target)]) == 2
    err = capsys.readouterr().err
    assert "--dir:" in err and "exists; nothing was written" in err
    assert [p.name for p in target.iterdir()] == ["keep.txt"]
    assert (target / "keep.txt").read_text() == "my work"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mine"]  # no half-written folder


def test_the_cli_writes_the_package_and_says_what_next(tmp_path, capsys):
    assert main(["new-plugin", "networks", "stud14_cli", "--dir", str(tmp_path / "p")]) == 0
    out = capsys.readouterr().out
    assert "written:" in out and "pip install -e ." in out
    assert (tmp_path / "p" / "stud14_cli" / "plugin.py").is_file()


def test_the_python_function_raises_the_same_errors(tmp_path):
    with pytest.raises(NewPluginError, match="unknown plugin kind"):
        new_plugin("nope", "x14", directory=tmp_path / "x")
    with pytest.raises(NewPluginError, match="parent folder"):
        new_plugin("drift", "x14", directory=tmp_path / "missing" / "x")
