"""The folder-to-namespace mapping works from a built wheel, not only from the editable install."""

import subprocess
import sys
import sysconfig
import textwrap
import venv
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
LAYERS = ("agents", "plugins", "markets", "experiments")


@pytest.mark.slow
def test_wheel_installs_every_layer(tmp_path):
    dist = tmp_path / "dist"
    subprocess.run(
        [
            sys.executable,
            "-m",
            "pip",
            "wheel",
            str(ROOT),
            "--no-deps",
            "-w",
            str(dist),
            "-q",
        ],
        check=True,
    )
    wheel = next(dist.glob("propensim-*.whl"))
    env_dir = tmp_path / "venv"
    venv.create(env_dir, with_pip=True)
    py = env_dir / "bin" / "python"
    # Dependencies come from this environment's site-packages (no download); propensim itself
    # only from the wheel: a plain path entry does not run the editable install's finder.
    site = subprocess.run(
        [str(py), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
        check=True,
        capture_output=True,
        text=True,
    ).stdout.strip()
    Path(site, "_deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    subprocess.run([str(py), "-m", "pip", "install", "--no-deps", "-q", str(wheel)], check=True)
    code = textwrap.dedent(
        f"""
        import importlib, json
        out = {{}}
        for layer in {LAYERS!r}:
            mod = importlib.import_module("propensim." + layer)
            out[layer] = mod.__file__
        from propensim.plugins import names
        out["clearing"] = names("clearing")
        from propensim.agents import build_population
        out["n"] = len(build_population(2, 3, rng=0))
        print(json.dumps(out))
        """
    )
    res = subprocess.run(
        [str(py), "-c", code], check=True, capture_output=True, text=True, cwd=tmp_path
    )
    import json

    out = json.loads(res.stdout)
    for layer in LAYERS:
        assert out[layer].startswith(site), (layer, out[layer])
    assert "propensity" in out["clearing"] and "call_auction" in out["clearing"]
    assert out["n"] == 5
    cli = subprocess.run(
        [str(env_dir / "bin" / "propensim"), "--help"], capture_output=True, text=True, cwd=tmp_path
    )
    assert cli.returncode == 0 and "propensim" in cli.stdout
