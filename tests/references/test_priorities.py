"""The priority-weighted method and the priority diagnostics, against Olfati-Saber et al.,
the drop-robust ratio consensus, and the worked path-graph examples of methods.md."""

from __future__ import annotations

import json
from collections.abc import Callable

import numpy as np
import pytest

from coordinator._priority_diagnostics import (
    effective_priorities,
    influence,
    mixing_matrix,
    priority_report,
)
from coordinator._reference import reference_optimum, total_objective
from node._algorithm import Received
from node._memory import run_in_memory
from node._priority import PriorityWeighted
from node._rng import stream_key, uniform
from tests.references._specs import (
    bernoulli_loss,
    build,
    connected_geometric_graph,
    make_specs,
    metropolis,
    path_adjacency,
    ring_adjacency,
    unit_quadratics,
)
from topologies._errors import ScenarioError, SwarmrigError


def _laplacian(adjacency: np.ndarray) -> np.ndarray:
    return np.diag(adjacency.sum(axis=1)) - adjacency


def _left_perron(a: np.ndarray) -> np.ndarray:
    values, vectors = np.linalg.eig(a.T)
    pi = np.real(vectors[:, np.argmin(np.abs(values - 1.0))])
    return pi / pi.sum()


def _priority_run(
    adjacency: np.ndarray,
    priorities: np.ndarray,
    iterations: int,
    params: dict,
    deliver: Callable[[int, int, int], bool] | None = None,
    on_step: Callable[[int, list], None] | None = None,
) -> list:
    n = adjacency.shape[0]
    specs = make_specs(
        metropolis(adjacency),
        unit_quadratics(np.zeros((n, 1))),
        np.zeros((n, 1)),
        priorities=priorities,
        step=0.0,
        params=params,
    )
    return run_in_memory(build(PriorityWeighted, specs), iterations, deliver, on_step)


# ---------------------------------------------------------------------------------------------
# Priority averaging: Olfati-Saber, Fax, Murray, Proc. IEEE 95 (2007)


@pytest.mark.parametrize("graph", ["ring", "geometric"])
def test_laplacian_priority_averaging_contracts_at_the_spectral_rate(graph: str) -> None:
    if graph == "ring":
        adjacency, gain = ring_adjacency(10), 0.25
    else:
        adjacency, _ = connected_geometric_graph(14, 0.45, first_seed=3)
        gain = 0.9 / adjacency.sum(axis=1).max()
    n = adjacency.shape[0]
    # W = I - cL: its disagreement part I - cL - 11^T/n bounds the per-step contraction
    rho = float(
        np.max(np.abs(np.linalg.eigvalsh(np.eye(n) - gain * _laplacian(adjacency) - 1.0 / n)))
    )
    if graph == "ring":
        # methods.md [derived]: ring n = 10, c = 0.25 gives rho(I - cL) = 0.904508
        assert rho == pytest.approx(1 - 0.25 * (2 - 2 * np.cos(2 * np.pi / 10)), abs=1e-12)
    priorities = np.random.default_rng(5).dirichlet(np.ones(n), size=n)
    average = priorities.mean(axis=0)
    errors = [float(np.linalg.norm(priorities - average))]
    drift = [0.0]

    def record(k: int, states: list) -> None:
        w = np.array([s.priorities for s in states])
        errors.append(float(np.linalg.norm(w - average)))
        drift[0] = max(drift[0], float(np.max(np.abs(w.mean(axis=0) - average))))

    iterations = int(np.ceil(np.log(1e-10) / np.log(rho)))
    _priority_run(adjacency, priorities, iterations, {"gain": gain}, on_step=record)
    e = np.array(errors)
    # per step ||E(k+1)|| <= rho ||E(k)||, up to rounding of the entries (~1e-16 each)
    assert np.all(e[1:] <= rho * e[:-1] + 1e-15)
    # and the bound is attained once the slowest mode dominates (the check is tight)
    assert (e[1:] / e[:-1])[-20:].max() > rho - 1e-3
    assert e[-1] < 1e-9 * e[0]
    assert drift[0] < 1e-14  # 1^T(I - cL) = 1^T: the average never moves


def test_gain_zero_keeps_the_initial_vectors() -> None:
    priorities = np.random.default_rng(1).dirichlet(np.ones(5), size=5)
    states = _priority_run(ring_adjacency(5), priorities, 20, {"gain": 0.0})
    assert all(np.array_equal(s.priorities, p) for s, p in zip(states, priorities, strict=True))


# ---------------------------------------------------------------------------------------------
# Under packet loss: Fagnani & Zampieri, IEEE JSAC (2008/2009) for the plain rule;
# Vaidya, Hadjicostis, Domínguez-García (2011) for running-sum ratio consensus


def _symmetric_loss(seed: int, rate: float) -> Callable[[int, int, int], bool]:
    def deliver(src: int, dst: int, k: int) -> bool:
        return uniform(stream_key(seed, min(src, dst), max(src, dst)), k) >= rate

    return deliver


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_laplacian_drifts_under_loss_while_ratio_consensus_does_not(seed: int) -> None:
    adjacency = ring_adjacency(10)
    priorities = np.random.default_rng(12).dirichlet(np.ones(10), size=10)
    intended = priorities.mean(axis=0)
    deliver = bernoulli_loss(seed, 0.3)
    plain = _priority_run(adjacency, priorities, 800, {"gain": 0.25}, deliver)
    ratio = _priority_run(adjacency, priorities, 800, {"priority_averaging": "ratio"}, deliver)
    plain_w = np.array([s.priorities for s in plain])
    ratio_w = np.array([s.priorities for s in ratio])
    # the plain rule stays row-stochastic: the agents agree, on the wrong vector
    # (measured drift for seeds 0..3: 0.0106, 0.0074, 0.0332, 0.0188)
    assert np.max(np.abs(plain_w - plain_w.mean(axis=0))) < 1e-12
    assert np.max(np.abs(plain_w.mean(axis=0) - intended)) > 3e-3
    # ratio consensus reaches the intended average (measured error ~3e-14)
    assert np.max(np.abs(ratio_w - intended)) < 1e-10


def test_symmetric_drops_keep_the_exact_average() -> None:
    # methods.md [derived]: dropping both directions of an edge together keeps 1^T W = 1^T
    priorities = np.random.default_rng(12).dirichlet(np.ones(10), size=10)
    states = _priority_run(
        ring_adjacency(10), priorities, 800, {"gain": 0.25}, _symmetric_loss(4, 0.3)
    )
    w = np.array([s.priorities for s in states])
    assert np.max(np.abs(w - priorities.mean(axis=0))) < 1e-10


@pytest.mark.parametrize("loss", [0.0, 0.3])
def test_ratio_priority_mass_invariant(loss: float) -> None:
    # methods.md [derived]: sum_i y_i + sum_(j->i) (sigma_j - rho_ji) = sum x0 at every step
    adjacency = ring_adjacency(8)
    priorities = np.random.default_rng(3).dirichlet(np.ones(8), size=8)
    expected = np.append(priorities.sum(axis=0), 8.0)
    ins = [tuple(int(j) for j in np.flatnonzero(adjacency[i])) for i in range(8)]
    worst = [0.0]

    def check(k: int, states: list) -> None:
        total = np.sum([s.p_held for s in states], axis=0)
        for i, neighbours in enumerate(ins):
            for link, j in enumerate(neighbours):  # p_rho: one row per in-link, in order
                rho = states[i].p_rho[link]
                total = total + states[j].p_sent - rho
        worst[0] = max(worst[0], float(np.max(np.abs(total - expected))))

    deliver = bernoulli_loss(21, loss) if loss else None
    _priority_run(adjacency, priorities, 300, {"priority_averaging": "ratio"}, deliver, check)
    assert worst[0] < 1e-11


# ---------------------------------------------------------------------------------------------
# Worked path-graph examples of methods.md [derived]: path 1-2-3, f_i = (x - b_i)^2, b = (0, 1, 4)

B = np.array([0.0, 1.0, 4.0])
AGREED = np.array([0.5, 0.3, 0.2])
UNEQUAL = np.array([[0.5, 0.3, 0.2], [0.2, 0.2, 0.6], [0.1, 0.1, 0.8]])


def _path_run(
    priorities: np.ndarray,
    step: float,
    iterations: int,
    deliver: Callable[[int, int, int], bool] | None = None,
    gain: float = 0.0,
) -> tuple[np.ndarray, np.ndarray, list]:
    objectives = unit_quadratics(B[:, None], curvature=2.0)  # (x - b)^2 = 1/2 * 2 (x - b)^2
    specs = make_specs(
        metropolis(path_adjacency(3)),
        objectives,
        np.zeros((3, 1)),
        priorities=priorities,
        step=step,
        params={"gain": gain},
    )
    states = run_in_memory(build(PriorityWeighted, specs), iterations, deliver)
    a = mixing_matrix({i: s.mixing_row for i, s in enumerate(states)}, 3)
    return np.array([s.x[0] for s in states]), a, states


def _fixed_point(a: np.ndarray, step: float) -> np.ndarray:
    # (I - A) x + alpha * 2 (x - b) = 0
    return np.linalg.solve(np.eye(3) - a + 2 * step * np.eye(3), 2 * step * B)


def test_agreed_priorities_reach_the_intended_weighting() -> None:
    x, a, _ = _path_run(np.tile(AGREED, (3, 1)), 0.05, 600, gain=0.3)
    assert np.allclose(a, [[0.7, 0.3, 0.0], [0.5, 0.3, 0.2], [0.0, 0.3, 0.7]], atol=1e-15)
    pi = _left_perron(a)
    assert np.allclose(pi, AGREED, atol=1e-12)  # reversible chain: pi = w
    assert np.allclose(effective_priorities(a), pi, atol=1e-12)
    x_star = _fixed_point(a, 0.05)
    assert np.allclose(x_star, [0.818182, 1.090909, 1.818182], atol=1e-6)  # methods.md, rounded
    assert np.max(np.abs(x - x_star)) < 1e-10
    # pi^T grad f(x*) = 0 with equal curvatures gives pi^T x* = pi^T b = 1.1 for any alpha
    assert float(pi @ x) == pytest.approx(1.1, abs=1e-10)
    assert reference_optimum(unit_quadratics(B[:, None], 2.0), AGREED).x_star[0] == pytest.approx(
        1.1, abs=1e-12
    )


def test_unequal_fixed_vectors_reach_the_effective_not_the_intended_point() -> None:
    x, a, _ = _path_run(UNEQUAL, 0.05, 800)
    assert np.allclose(a, [[0.7, 0.3, 0.0], [0.2, 0.2, 0.6], [0.0, 0.1, 0.9]], atol=1e-15)
    pi = _left_perron(a)
    assert np.allclose(pi, [0.086957, 0.130435, 0.782609], atol=1e-6)  # methods.md, rounded
    assert np.allclose(effective_priorities(a), pi, atol=1e-12)
    assert np.max(np.abs(x - _fixed_point(a, 0.05))) < 1e-10
    effective = float(pi @ B)
    intended = float(UNEQUAL.mean(axis=0) @ B)
    assert effective == pytest.approx(3.260870, abs=1e-6)
    assert intended == pytest.approx(2.333333, abs=1e-6)
    assert float(pi @ x) == pytest.approx(effective, abs=1e-10)
    # a small step brings every agent near the effective optimum: x*(alpha) -> (pi^T b) 1
    # as alpha -> 0 (measured: agents at 3.199, 3.242, 3.271; intended point 2.333)
    x_small, _, _ = _path_run(UNEQUAL, 0.002, 12000)
    assert np.max(np.abs(x_small - _fixed_point(a, 0.002))) < 1e-9
    assert np.max(np.abs(x_small - effective)) < 0.07
    assert np.min(np.abs(x_small - intended)) > 0.8


def test_one_way_link_failure_ignores_agent_one() -> None:
    # agent 2 (index 1) no longer hears agent 1 (index 0): pi = (0, .6, .4), point 2.2
    def deliver(src: int, dst: int, k: int) -> bool:
        return not (src == 0 and dst == 1)

    x, a, _ = _path_run(np.tile(AGREED, (3, 1)), 0.05, 800, deliver=deliver, gain=0.3)
    assert np.allclose(a, [[0.7, 0.3, 0.0], [0.0, 0.8, 0.2], [0.0, 0.3, 0.7]], atol=1e-15)
    result = influence(a)
    assert np.allclose(result.priorities, [0.0, 0.6, 0.4], atol=1e-12)
    assert result.closed_classes == ((1, 2),) and result.transient == (0,)
    assert "priority 0" in result.note
    # independent: lim A^k = 1 pi^T for a single aperiodic closed class
    assert np.allclose(np.linalg.matrix_power(a, 2000)[0], [0.0, 0.6, 0.4], atol=1e-12)
    assert np.max(np.abs(x - _fixed_point(a, 0.05))) < 1e-10
    assert float(result.priorities @ x) == pytest.approx(2.2, abs=1e-10)


def test_priority_report_on_the_unequal_example() -> None:
    _, a, states = _path_run(UNEQUAL, 0.05, 50)
    objectives = unit_quadratics(B[:, None], curvature=2.0)
    pi = _left_perron(a)
    x_eff = np.array([float(pi @ B)])
    report = priority_report(
        UNEQUAL,
        np.array([s.priorities for s in states]),
        {i: s.mixing_row for i, s in enumerate(states)},
        objectives,
        x_eff,
    )
    json.dumps(report)  # JSON-able, or this raises
    intended = UNEQUAL.mean(axis=0)
    assert np.allclose(report["intended_priorities"], intended, atol=1e-15)
    assert np.allclose(report["agreed_priorities"]["mean"], intended, atol=1e-15)
    assert report["agreed_priorities"]["max_disagreement"] == pytest.approx(
        float(np.max(np.abs(UNEQUAL - intended))), abs=1e-15
    )
    assert np.allclose(report["effective_priorities"], pi, atol=1e-12)
    assert report["gap_to_effective"] == pytest.approx(0.0, abs=1e-12)
    # F_w(x) - F_w* = (sum w) (x - x_w*)^2 for f_i = (x - b_i)^2
    expected_gap = (x_eff[0] - float(intended @ B)) ** 2
    assert report["gap_to_intended"] == pytest.approx(expected_gap, rel=1e-12)
    assert report["gap_to_intended"] == pytest.approx(
        total_objective(objectives, intended, x_eff)
        - reference_optimum(objectives, intended).F_star,
        rel=1e-12,
    )
    assert report["x_star_effective"] == pytest.approx([float(pi @ B)], abs=1e-12)
    assert report["intended_vs_effective_l1"] == pytest.approx(
        float(np.abs(intended - pi).sum()), abs=1e-12
    )


# ---------------------------------------------------------------------------------------------
# The mixing row itself


def test_mixing_row_gives_non_neighbour_mass_to_self() -> None:
    w = np.array([0.1, 0.2, 0.3, 0.4])
    _, _, states = _path4_step(w)
    # agent 0 on the path 0-1-2-3 hears only agent 1: a_00 = w0 + w2 + w3
    assert states[0].mixing_row == pytest.approx({0: 0.8, 1: 0.2})
    assert states[1].mixing_row == pytest.approx({0: 0.1, 1: 0.6, 2: 0.3})


def _path4_step(w: np.ndarray) -> tuple[np.ndarray, np.ndarray, list]:
    specs = make_specs(
        metropolis(path_adjacency(4)),
        unit_quadratics(np.zeros((4, 1))),
        np.arange(4.0)[:, None],
        priorities=np.tile(w, (4, 1)),
        step=0.0,
    )
    states = run_in_memory(build(PriorityWeighted, specs), 1)
    return w, np.array([s.x[0] for s in states]), states


def test_missing_rules_for_a_stale_neighbour() -> None:
    w = np.array([0.1, 0.2, 0.3, 0.4])
    specs = make_specs(
        metropolis(path_adjacency(4)),
        unit_quadratics(np.zeros((4, 1))),
        np.arange(4.0)[:, None],
        priorities=np.tile(w, (4, 1)),
        step=0.0,
        params={"gain": 0.2},
    )
    stale = {
        0: Received(0, {"x": np.array([5.0]), "w": np.array([0.7, 0.1, 0.1, 0.1])}, False),
        2: Received(1, {"x": np.array([7.0]), "w": np.array([0.1, 0.1, 0.7, 0.1])}, True),
    }
    same = PriorityWeighted(specs[1])
    state, _ = same.init()
    new, _ = same.step(state, stale, 1)
    assert new.mixing_row == pytest.approx({1: 0.7, 2: 0.3})
    assert new.x[0] == pytest.approx(0.7 * 1.0 + 0.3 * 7.0, abs=1e-15)
    assert np.allclose(new.priorities, w + 0.2 * (stale[2].payload["w"] - w), atol=1e-15)

    reuse_spec = make_specs(
        metropolis(path_adjacency(4)),
        unit_quadratics(np.zeros((4, 1))),
        np.arange(4.0)[:, None],
        priorities=np.tile(w, (4, 1)),
        step=0.0,
        params={"gain": 0.2, "missing": "reuse"},
    )[1]
    reuse = PriorityWeighted(reuse_spec)
    new, _ = reuse.step(reuse.init()[0], stale, 1)
    assert new.mixing_row == pytest.approx({0: 0.1, 1: 0.6, 2: 0.3})
    assert new.x[0] == pytest.approx(0.1 * 5.0 + 0.6 * 1.0 + 0.3 * 7.0, abs=1e-15)
    pull = stale[0].payload["w"] - w + stale[2].payload["w"] - w
    assert np.allclose(new.priorities, w + 0.2 * pull, atol=1e-15)


def test_uniform_priorities_when_none_are_given() -> None:
    specs = make_specs(
        metropolis(ring_adjacency(4)), unit_quadratics(np.zeros((4, 1))), np.zeros((4, 1))
    )
    state, payload = PriorityWeighted(specs[0]).init()
    assert np.array_equal(state.priorities, np.full(4, 0.25))
    assert set(payload) == {"x", "w"}
    assert PriorityWeighted(specs[0]).payload_sizes() == {"x": 1, "w": 4}


@pytest.mark.parametrize(
    ("priorities", "params", "message"),
    [
        (None, {"gain": 0.5}, r"agent 0: priority 'gain' = 0.5; expected 0 <= gain < 1 / degree"),
        (None, {"gain": -0.1}, "agent 0: priority 'gain'"),
        (None, {"priority_averaging": "gossip"}, "agent 0: .*'priority_averaging'"),
        (None, {"missing": "skip"}, "agent 0: .*'missing'"),
        (np.full((4, 4), 0.3), {}, "agent 0: initial priorities .* sum to 1"),
        (np.full((4, 3), 1 / 3), {}, r"agent 0: initial priorities have shape \(3,\)"),
    ],
)
def test_bad_options_name_the_agent(
    priorities: np.ndarray | None, params: dict, message: str
) -> None:
    specs = make_specs(
        metropolis(ring_adjacency(4)),
        unit_quadratics(np.zeros((4, 1))),
        np.zeros((4, 1)),
        priorities=priorities,
        params=params,
    )
    with pytest.raises(ScenarioError, match=message):
        PriorityWeighted(specs[0])


# ---------------------------------------------------------------------------------------------
# Effective priorities of general matrices


def test_effective_priorities_of_an_irreducible_matrix_is_the_left_perron_vector() -> None:
    rng = np.random.default_rng(9)
    a = rng.uniform(size=(7, 7)) * (rng.uniform(size=(7, 7)) < 0.5) + np.eye(7)
    a /= a.sum(axis=1, keepdims=True)
    assert influence(a).closed_classes == (tuple(range(7)),)
    assert np.allclose(effective_priorities(a), _left_perron(a), atol=1e-12)


def test_periodic_chain_uses_the_unique_stationary_vector() -> None:
    a = np.roll(np.eye(4), 1, axis=1)  # a 4-cycle: A^k never converges
    cesaro = sum(np.linalg.matrix_power(a, k) for k in range(400)) / 400
    assert np.allclose(effective_priorities(a), cesaro.mean(axis=0), atol=1e-12)


def test_several_closed_classes_follow_the_documented_rule() -> None:
    # closed classes {0, 1} and {2, 3}; agent 4 listens to both: 0.4 to {0,1}, 0.6 to {2,3}
    a = np.array(
        [
            [0.5, 0.5, 0.0, 0.0, 0.0],
            [0.2, 0.8, 0.0, 0.0, 0.0],
            [0.0, 0.0, 0.9, 0.1, 0.0],
            [0.0, 0.0, 0.3, 0.7, 0.0],
            [0.4, 0.0, 0.0, 0.6, 0.0],
        ]
    )
    result = influence(a)
    assert result.closed_classes == ((0, 1), (2, 3)) and result.transient == (4,)
    assert "cannot agree" in result.note
    # the rule: (1/n) 1^T lim A^k, computed independently by numpy matrix powers
    limit = np.linalg.matrix_power(a, 4000)
    assert np.allclose(result.priorities, limit.mean(axis=0), atol=1e-12)
    assert result.priorities.sum() == pytest.approx(1.0, abs=1e-15)


def test_mixing_matrix_rejects_inconsistent_rows() -> None:
    from_json = json.loads(json.dumps({0: {0: 0.25, 1: 0.75}, 1: {1: 1.0}}))
    assert np.array_equal(mixing_matrix(from_json, 2), [[0.25, 0.75], [0.0, 1.0]])
    with pytest.raises(SwarmrigError, match="agent 1 reported no mixing row"):
        mixing_matrix({0: {0: 1.0}}, 2)
    with pytest.raises(SwarmrigError, match=r"agent 0's row sums to 0\.9"):
        mixing_matrix({0: {0: 0.9}, 1: {1: 1.0}}, 2)
    with pytest.raises(SwarmrigError, match="agent 0's row names agent 5"):
        mixing_matrix({0: {5: 1.0}, 1: {1: 1.0}}, 2)
    with pytest.raises(SwarmrigError, match="expected a square, nonnegative"):
        influence(np.array([[0.5, 0.6], [0.0, 1.0]]))
