"""Hand-built run plans for the runner, store, compare and CLI tests (no spec file needed)."""

from __future__ import annotations

from propensim.experiments.plan import RunPlan

METRICS = ["volume", "efficiency", "mean_price"]


def make_plans(
    *,
    sigmas=(3.0, 6.0),
    replicates=2,
    arms=(("match", "propensity"), ("auction", "call_auction")),
    rounds=5,
    n=10,
    seed=20261201,
    collect=None,
    bad_arms=(),
):
    """Plans ordered point, replicate, arm; arms of a replicate share ``seed_key``.

    An arm listed in ``bad_arms`` names a clearing plugin that does not exist, so its runs fail.
    """
    collect = {"rounds": True, "traders_every": 0, "ledger": False, **(collect or {})}
    plans = []
    for point, sigma in enumerate(sigmas):
        for rep in range(replicates):
            for arm, clearing in arms:
                config = {
                    "population": {"n_buyers": n, "n_sellers": n, "sigma": sigma},
                    "network": {"name": "complete"},
                    "clearing": {"name": "no_such_rule" if arm in bad_arms else clearing},
                    "metrics": list(METRICS),
                }
                plans.append(
                    RunPlan(
                        index=len(plans),
                        arm=arm,
                        point=point,
                        replicate=rep,
                        params={"population.sigma": sigma},
                        config=config,
                        rounds=rounds,
                        seed_entropy=seed,
                        seed_key=(point, rep),
                        collect=dict(collect),
                    )
                )
    return plans


TINY_SPEC = """
[experiment]
name = "tiny"
seed = 7
rounds = {rounds}
replicates = {replicates}

[population]
n_buyers = {n}
n_sellers = {n}
sigma = 5.0

[clearing]
name = "propensity"

[collect]
metrics = ["volume", "efficiency", "mean_price"]

[design]
kind = "grid"
[design.parameters]
"population.sigma" = [3.0, 6.0]

[[arms]]
name = "match"
set = {{ "clearing.name" = "propensity" }}

[[arms]]
name = "auction"
set = {{ "clearing.name" = "call_auction" }}

[compare]
baseline = "auction"
metrics = ["efficiency", "volume"]
bootstrap = 500
"""


def write_spec(folder, *, rounds=4, replicates=2, n=8, name="tiny.toml"):
    """A small valid spec file with two arms over two design points."""
    path = folder / name
    path.write_text(TINY_SPEC.format(rounds=rounds, replicates=replicates, n=n))
    return path
