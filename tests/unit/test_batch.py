"""The batch engine and its array helpers against the per-link and per-agent code they
replace: the same decisions, sums, states, counts and series, bit for bit."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import coordinator
from coordinator._api import load
from coordinator._run import RunOptions, execute
from node import AgentSpec, Block, StepRule, objective_from_spec
from node._linkarrays import LinkArrays, uniform_array
from node._links import LinkFault, LinkModel
from node._rng import stream_key, uniform
from topologies._errors import ScenarioError

FAULTS = [
    LinkFault(index=0, kind="loss", params={"rate": 0.3}, start_iteration=5, end_iteration=50),
    LinkFault(
        index=1, kind="burst-loss", params={"p_enter": 0.1, "p_leave": 0.3, "loss_good": 0.05}
    ),
    LinkFault(
        index=2,
        kind="delay",
        params={
            "distribution": "lognormal",
            "median_ms": 2.0,
            "sigma": 0.7,
            "jitter_ms": 0.5,
            "fifo": True,
        },
    ),
    LinkFault(index=3, kind="duplicate", params={"rate": 0.2}, start_s=0.01, end_s=0.05),
    LinkFault(index=4, kind="corrupt", params={"rate": 0.1}),
    LinkFault(
        index=5, kind="delay", params={"distribution": "pareto", "scale_ms": 1.0, "shape": 1.5}
    ),
    LinkFault(index=6, kind="outage", params={}, start_iteration=70, end_iteration=75),
    LinkFault(
        index=7, kind="delay", params={"distribution": "normal", "mean_ms": 1.0, "sd_ms": 2.0}
    ),
]


def test_uniforms_are_the_scalar_ones() -> None:
    keys = [stream_key(s, 1, 2, 3) for s in range(50)]
    got = uniform_array(np.array(keys, dtype=np.uint64), 12345)
    assert got.tolist() == [uniform(k, 12345) for k in keys]


def test_link_arrays_decide_what_each_link_model_decides() -> None:
    seeds, src, dst = [3, 3, 9, 9, 9], [0, 1, 0, 2, 4], [1, 0, 2, 0, 0]
    arrays = LinkArrays(seeds, src, dst)
    models = [LinkModel(s, a, b, FAULTS) for s, a, b in zip(seeds, src, dst, strict=True)]
    for f in FAULTS:
        arrays.apply(f, np.arange(len(src)), True)
    for k in range(150):
        now = k * 0.001
        d = arrays.decide(k, k, now)
        assert d is not None
        for link, model in enumerate(models):
            e = model.decide(k, k, now)
            assert (not e.deliver) == d.dropped[link], (k, link)
            if e.deliver:
                assert e.corrupt == d.corrupt[link]
                assert (e.copies == 2) == d.duplicate[link]
                assert e.delay_s == d.delay_s[link]
                assert e.fifo == d.fifo[link]


def test_block_mix_sums_in_in_neighbour_order() -> None:
    rng = np.random.default_rng(4)
    n = 6
    specs = []
    for i in range(n):
        ins = tuple(int(j) for j in rng.permutation([j for j in range(n) if j != i])[:3])
        w = rng.dirichlet(np.ones(4))
        specs.append(
            AgentSpec(
                id=i,
                n_agents=n,
                dimension=2,
                in_neighbours=ins,
                out_neighbours=(),
                weights={i: w[0], **{j: w[1 + k] for k, j in enumerate(ins)}},
                objective=objective_from_spec(
                    {"kind": "quadratic", "target": [0.0, 0.0], "curvature": np.eye(2).tolist()}
                ),
                initial_state=np.zeros(2),
                initial_priorities=None,
                step=StepRule(step=0.1),
            )
        )
    block = Block.of(specs)
    own = rng.normal(size=(n, 2)) * 1e3
    links = rng.normal(size=(block.links, 2))
    got = block.mix(block.coefficients(block.self_weight, block.link_weight), own, links)
    link = 0
    for i, sp in enumerate(specs):
        acc = sp.weights[i] * own[i]
        for j in sp.in_neighbours:
            acc = acc + sp.weights[j] * links[link]
            link += 1
        assert np.array_equal(got[i], acc)  # the same additions in the same order


ALGORITHMS = {
    "dgd": {"name": "dgd", "step": 0.05},
    "dgd/self/diminishing": {
        "name": "dgd",
        "step": {"rule": "diminishing", "scale": 0.5, "power": 0.6},
        "params": {"missing": "self"},
    },
    "gradient-tracking/reuse": {
        "name": "gradient-tracking",
        "step": 0.05,
        "params": {"missing": "reuse"},
    },
    "push-sum/average": {"name": "push-sum", "params": {"mode": "average"}},
    "ratio-consensus": {"name": "ratio-consensus"},
    "priority-weighted/ratio/reuse": {
        "name": "priority-weighted",
        "step": 0.05,
        "params": {"priority_averaging": "ratio", "missing": "reuse"},
    },
}

SCENARIO_FAULTS = [
    {"kind": "loss", "links": "all", "rate": 0.2},
    {"kind": "burst-loss", "links": "all", "p_enter": 0.1, "p_leave": 0.4, "start_s": 0.05},
    {
        "kind": "delay",
        "links": "all",
        "distribution": "uniform",
        "low_ms": 0.0,
        "high_ms": 3.0,
        "fifo": True,
    },
    {"kind": "duplicate", "links": "all", "rate": 0.1, "start_iteration": 20},
    {"kind": "corrupt", "links": "all", "rate": 0.05},
    {"kind": "outage", "links": {"from": 1}, "start_s": 0.1, "duration_s": 0.05},
]


def _scenario(alg: dict, seed: int = 5) -> dict:
    return {
        "swarm": {
            "name": "batch-check",
            "agents": 8,
            "dimension": 2,
            "seed": seed,
            "mode": "rounds",
            "iterations": 220,
        },
        "topology": {"shape": "random-geometric", "radius": 0.6},
        "objective": {"kind": "quadratic", "spread": 5.0},
        "algorithm": alg,
        "fault": SCENARIO_FAULTS,
        "timing": {"period_ms": 1.0},
    }


def _rows(result: coordinator.RunResult) -> tuple:
    return result.summary["messages"], result.links, result.metrics


@pytest.mark.parametrize("name", sorted(ALGORITHMS))
def test_batch_repeats_lockstep_exactly(name: str, tmp_path: Path) -> None:
    sc = _scenario(ALGORITHMS[name])
    a = execute(load(sc), RunOptions(out=tmp_path / "lockstep", engine="lockstep"))
    b = execute(load(sc), RunOptions(out=tmp_path / "batch", engine="batch"))
    assert b.summary["engine"] == "batch"
    assert a.summary["x_hat"] == b.summary["x_hat"]
    assert _rows(a) == _rows(b)
    assert a.summary["verdict"] == b.summary["verdict"]
    assert sorted(p.name for p in (tmp_path / "batch").iterdir()) == sorted(
        p.name for p in (tmp_path / "lockstep").iterdir()
    )


def test_seeds_batched_are_the_seeds_run_alone(tmp_path: Path) -> None:
    sc = _scenario({"name": "priority-weighted", "step": 0.05})
    seeds = [1, 2, 3]
    summaries = coordinator.run_batch(sc, seeds=seeds, out=tmp_path)
    for seed, summary in zip(seeds, summaries, strict=True):
        alone = {**sc, "swarm": {**sc["swarm"], "seed": seed}}
        r = execute(load(alone), RunOptions(out=tmp_path / f"alone-{seed}", engine="lockstep"))
        assert summary["seed"] == seed
        assert summary["x_hat"] == r.summary["x_hat"]
        assert summary["messages"] == r.summary["messages"]
        assert (tmp_path / f"seed-{seed}" / "summary.json").exists()


def test_batch_refuses_what_it_cannot_reproduce() -> None:
    sc = _scenario({"name": "dgd"})
    with pytest.raises(ScenarioError, match=r"\[swarm\]\.mode"):
        coordinator.check_batch(load({**sc, "swarm": {**sc["swarm"], "mode": "async"}}))
    crash = {**sc, "fault": [{"kind": "crash", "agents": [1], "start_s": 0.1}]}
    with pytest.raises(ScenarioError, match=r"fault\[0\]\.kind"):
        coordinator.check_batch(load(crash))
    user = {**sc, "algorithm": {"name": "lazy-dgd", "module": "tests.plugins.lazy_dgd"}}
    with pytest.raises(ScenarioError, match=r"\[algorithm\]\.name: 'lazy-dgd'"):
        coordinator.check_batch(load(user))
