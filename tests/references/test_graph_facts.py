"""Graph facts against closed forms, published results and numpy/networkx linear algebra."""

from __future__ import annotations

import math
from pathlib import Path

import networkx as nx
import numpy as np
import pytest

from topologies import (
    Topology,
    build,
    graph_facts,
    laplacian,
    laplacian_step_bound,
    laplacian_step_limit,
    load,
    metropolis_weights,
    spectral_facts,
)

DATA = Path(__file__).parent.parent / "unit" / "data"

SHAPES = [
    ("ring", 10, {}),
    ("path", 9, {}),
    ("star", 8, {}),
    ("complete", 6, {}),
    ("grid", 12, {"rows": 3, "cols": 4}),
    ("random-geometric", 25, {"radius": 0.45}),
    ("erdos-renyi", 20, {"p": 0.3}),
    ("small-world", 20, {"k": 4, "p": 0.3}),
]
SHAPE_IDS = [s for s, _, _ in SHAPES]


def in_neighbour_average(top: Topology) -> np.ndarray:
    """Row-stochastic mix: each agent averages itself and everyone it hears, equally."""
    n = top.n
    a = np.zeros((n, n))
    for i in range(n):
        group = (i, *top.in_neighbours(i))
        a[i, list(group)] = 1.0 / len(group)
    return a


def push_split(top: Topology) -> np.ndarray:
    """Column-stochastic mix: each agent splits equally among itself and its out-neighbours."""
    n = top.n
    b = np.zeros((n, n))
    for j in range(n):
        group = (j, *top.out_neighbours(j))
        b[list(group), j] = 1.0 / len(group)
    return b


# Laplacian spectra -------------------------------------------------------------------------


@pytest.mark.parametrize("n", [3, 4, 5, 10, 17])
def test_cycle_laplacian_eigenvalues_closed_form(n):
    # [derived] methods.md: cycle Laplacian eigenvalues 2 - 2cos(2πk/n)
    expected = np.sort(2 - 2 * np.cos(2 * np.pi * np.arange(n) / n))
    ours = np.linalg.eigvalsh(laplacian(build("ring", n, seed=0)))
    np.testing.assert_allclose(ours, expected, atol=1e-12)


@pytest.mark.parametrize("n", [2, 3, 6, 11])
def test_path_laplacian_eigenvalues_closed_form(n):
    # [derived] methods.md: path Laplacian eigenvalues 2 - 2cos(πk/n), k = 0..n-1
    expected = np.sort(2 - 2 * np.cos(np.pi * np.arange(n) / n))
    top = build("path", n, seed=0)
    np.testing.assert_allclose(np.linalg.eigvalsh(laplacian(top)), expected, atol=1e-12)
    facts = graph_facts(top)
    assert facts.algebraic_connectivity == pytest.approx(2 - 2 * math.cos(math.pi / n))
    assert facts.laplacian_max == pytest.approx(2 - 2 * math.cos(math.pi * (n - 1) / n))
    assert facts.laplacian_step_limit == pytest.approx(2 / facts.laplacian_max)


def test_complete_and_star_spectra():
    # Textbook spectra (from memory): K_n has 0 and n (n-1 times); the star on n agents
    # has 0, 1 (n-2 times) and n. networkx's own spectrum is checked for every shape below.
    n = 7
    np.testing.assert_allclose(
        np.linalg.eigvalsh(laplacian(build("complete", n, seed=0))), [0] + [n] * (n - 1), atol=1e-12
    )
    np.testing.assert_allclose(
        np.linalg.eigvalsh(laplacian(build("star", n, seed=0))),
        [0] + [1] * (n - 2) + [n],
        atol=1e-12,
    )


@pytest.mark.parametrize(("shape", "n", "params"), SHAPES, ids=SHAPE_IDS)
def test_graph_facts_match_networkx_and_numpy(shape, n, params):
    top = build(shape, n, seed=3, **params)
    ref = nx.Graph(top.undirected_edges())
    facts = graph_facts(top)
    spectrum = np.sort(nx.laplacian_spectrum(ref))
    assert facts.n == n and not facts.directed
    assert facts.edges == ref.number_of_edges() and facts.links == 2 * facts.edges
    ref_degrees = [d for _, d in ref.degree]
    assert facts.min_degree == min(ref_degrees) and facts.max_degree == max(ref_degrees)
    assert facts.mean_degree == pytest.approx(2 * ref.number_of_edges() / n)
    assert facts.diameter == nx.diameter(ref)
    assert facts.algebraic_connectivity == pytest.approx(spectrum[1], abs=1e-10)
    assert facts.laplacian_max == pytest.approx(spectrum[-1], abs=1e-10)
    assert facts.algebraic_connectivity > 0  # connected (Fiedler, Czech. Math. J. 23 (1973))
    assert facts.laplacian_step_bound == pytest.approx(1 / max(ref_degrees))
    assert facts.laplacian_step_limit == pytest.approx(2 / spectrum[-1])
    # the sufficient bound never exceeds the exact limit: λn <= 2Δ (from memory: Anderson &
    # Morley, Linear and Multilinear Algebra 18 (1985)); checked here numerically anyway
    assert facts.laplacian_step_bound <= facts.laplacian_step_limit + 1e-12


# Metropolis–Hastings weights ----------------------------------------------------------------


@pytest.mark.parametrize(("shape", "n", "params"), SHAPES, ids=SHAPE_IDS)
def test_metropolis_weights_are_symmetric_doubly_stochastic_nonnegative(shape, n, params):
    # Xiao, Boyd, Lall (2005): w_ij = 1/(1 + max(d_i, d_j)) on edges, w_ii = 1 - Σ_j w_ij
    top = build(shape, n, seed=3, **params)
    w = metropolis_weights(top)
    d = np.array([top.graph.out_degree(i) for i in range(n)])
    for i, j in top.edges():
        assert w[i, j] == pytest.approx(1 / (1 + max(d[i], d[j])))
    off = w - np.diag(np.diag(w))
    assert np.count_nonzero(off) == len(top.edges())
    np.testing.assert_array_equal(w, w.T)
    np.testing.assert_allclose(w.sum(axis=0), 1.0, atol=1e-14)
    np.testing.assert_allclose(w.sum(axis=1), 1.0, atol=1e-14)
    assert (w >= 0).all()
    facts = spectral_facts(w)
    assert facts.symmetric and facts.row_stochastic and facts.column_stochastic
    np.testing.assert_allclose(facts.perron, np.full(n, 1 / n))
    np.testing.assert_allclose(facts.eigenvalues, np.linalg.eigvalsh(w)[::-1], atol=1e-12)
    # Xiao & Boyd, Systems & Control Letters 53 (2004): rho = max(|λ2|, |λn|) for symmetric W
    eig = np.linalg.eigvalsh(w)
    assert facts.rho == pytest.approx(max(abs(eig[-2]), abs(eig[0])), abs=1e-12)
    assert facts.lambda2 == pytest.approx(eig[-2], abs=1e-12)
    assert facts.lambda_min == pytest.approx(eig[0], abs=1e-12)
    assert facts.rho < 1


def test_metropolis_on_a_ring_is_a_third_each():
    # [derived] methods.md: Metropolis on a ring is (I + P + Pᵀ)/3
    n = 9
    p = np.roll(np.eye(n), 1, axis=1)
    np.testing.assert_allclose(
        metropolis_weights(build("ring", n, seed=0)), (np.eye(n) + p + p.T) / 3, atol=1e-15
    )


@pytest.mark.parametrize("n", [4, 5, 8, 10, 13, 30])
def test_metropolis_ring_rho_closed_form(n):
    # [derived] methods.md: rho = (1 + 2cos(2π/n))/3 for n >= 4, recomputed with numpy
    w = metropolis_weights(build("ring", n, seed=0))
    numpy_rho = np.max(np.abs(np.linalg.eigvals(w - np.ones((n, n)) / n)))
    closed = (1 + 2 * math.cos(2 * math.pi / n)) / 3
    facts = spectral_facts(w)
    assert facts.rho == pytest.approx(closed, abs=1e-12)
    assert facts.rho == pytest.approx(numpy_rho, abs=1e-12)
    assert facts.mixing_time_hint == math.ceil(math.log(1e-3) / math.log(closed))
    if n == 10:
        assert closed == pytest.approx(0.872678, abs=5e-7)  # methods.md's printed value


def test_consensus_shrinks_like_rho_and_the_mixing_hint_holds():
    # Xiao & Boyd (2004): ‖x(k) - x̄1‖ <= rhoᵏ ‖x(0) - x̄1‖ for symmetric W with W1 = 1
    top = build("random-geometric", 30, seed=5, radius=0.4)
    w = metropolis_weights(top)
    facts = spectral_facts(w)
    rng = np.random.default_rng(0)
    x = rng.normal(size=30)
    mean = x.mean()
    start = np.linalg.norm(x - mean)
    for k in range(1, facts.mixing_time_hint + 1):
        x = w @ x
        assert np.linalg.norm(x - mean) <= facts.rho**k * start * (1 + 1e-9)
    assert np.linalg.norm(x - mean) <= 1e-3 * start
    assert x.sum() == pytest.approx(30 * mean)  # Σx conserved to rounding (methods.md)


# Laplacian steps -------------------------------------------------------------------------------


def test_ring_laplacian_step_rho():
    # [derived] methods.md: ring n = 10, c = 0.25: rho(I - cL) = 0.904508, recomputed with numpy
    n, c = 10, 0.25
    top = build("ring", n, seed=0)
    m = np.eye(n) - c * laplacian(top)
    numpy_rho = np.max(np.abs(np.linalg.eigvals(m - np.ones((n, n)) / n)))
    facts = spectral_facts(m)
    assert facts.rho == pytest.approx(numpy_rho, abs=1e-12)
    assert facts.rho == pytest.approx(1 - c * (2 - 2 * math.cos(2 * math.pi / n)), abs=1e-12)
    assert facts.rho == pytest.approx(0.904508, abs=5e-7)
    assert facts.row_stochastic and facts.column_stochastic and facts.symmetric


def test_laplacian_gain_limits_on_a_ring():
    # Olfati-Saber, Fax, Murray, Proc. IEEE 95 (2007): I - cL converges iff 0 < c < 2/λn(L);
    # c < 1/Δ keeps it nonnegative. Even ring: λn = 4, Δ = 2, so both are 1/2.
    top = build("ring", 10, seed=0)
    assert laplacian_step_limit(top) == pytest.approx(0.5)
    assert laplacian_step_bound(top) == pytest.approx(0.5)
    lap = laplacian(top)
    below = spectral_facts(np.eye(10) - 0.49 * lap)
    above = spectral_facts(np.eye(10) - 0.51 * lap)
    assert below.rho < 1 and below.mixing_time_hint is not None
    assert above.rho > 1 and above.mixing_time_hint is None
    assert not above.row_stochastic  # negative diagonal: rows sum to one, not stochastic
    # odd ring: λn = 2 - 2cos(π(n-1)/n) < 4, so the exact limit is above 1/2 and 1/Δ is
    # only sufficient
    odd = build("ring", 9, seed=0)
    assert laplacian_step_limit(odd) == pytest.approx(2 / (2 - 2 * math.cos(8 * math.pi / 9)))
    assert laplacian_step_limit(odd) > laplacian_step_bound(odd)


def test_best_constant_gain():
    # Olfati-Saber, Fax, Murray (2007) / Xiao & Boyd (2004): c* = 2/(λ2 + λn) minimizes rho
    top = build("grid", 12, seed=0, rows=3, cols=4)
    facts = graph_facts(top)
    lap = laplacian(top)
    best = 2 / (facts.algebraic_connectivity + facts.laplacian_max)
    rho_best = spectral_facts(np.eye(12) - best * lap).rho
    for c in (0.8 * best, 0.95 * best, 1.05 * best, 1.2 * best):
        assert spectral_facts(np.eye(12) - c * lap).rho > rho_best
    lam2, lamn = facts.algebraic_connectivity, facts.laplacian_max
    assert rho_best == pytest.approx((lamn - lam2) / (lamn + lam2), abs=1e-12)


# Directed example of methods.md ----------------------------------------------------------------


def relay() -> Topology:
    return load(DATA / "relay-directed.edges")


def test_perron_vector_of_the_directed_example():
    # [derived] methods.md: digraph 0→1, 1→2, 2→0, 0→2, 2→3, 3→0 with row-stochastic
    # in-neighbour averaging (self included): π = (0.3, 0.2, 0.3, 0.2), consensus 3.8
    top = relay()
    a = in_neighbour_average(top)
    facts = spectral_facts(a)
    assert not facts.symmetric and facts.row_stochastic and not facts.column_stochastic
    np.testing.assert_allclose(facts.perron, [0.3, 0.2, 0.3, 0.2], atol=1e-12)
    np.testing.assert_allclose(facts.perron @ a, facts.perron, atol=1e-12)
    # recomputed with numpy: left eigenvector of eigenvalue 1
    vals, vecs = np.linalg.eig(a.T)
    left = np.real(vecs[:, np.argmin(np.abs(vals - 1))])
    np.testing.assert_allclose(facts.perron, left / left.sum(), atol=1e-12)
    x0 = np.array([4.0, 0.0, 2.0, 10.0])
    assert facts.perron @ x0 == pytest.approx(3.8)
    x = np.linalg.matrix_power(a, 200) @ x0
    np.testing.assert_allclose(x, 3.8, atol=1e-9)
    # rho(A - 1πᵀ) is the second largest eigenvalue modulus (the Perron root is simple)
    moduli = np.sort(np.abs(np.linalg.eigvals(a)))[::-1]
    assert facts.rho == pytest.approx(moduli[1], abs=1e-12)
    assert abs(facts.lambda2) == pytest.approx(moduli[1], abs=1e-12)
    assert 0 < facts.rho < 1
    # eigenvalues by descending real part, as numpy's sorted
    expected = np.linalg.eigvals(a)
    expected = expected[np.lexsort((-expected.imag, -expected.real))]
    np.testing.assert_allclose(facts.eigenvalues, expected, atol=1e-12)


def test_push_sum_mix_of_the_directed_example():
    # Kempe, Dobra, Gehrke, FOCS 2003; [derived] methods.md: push-sum ratios reach the
    # average 4.0 of x0 = (4, 0, 2, 10)
    top = relay()
    b = push_split(top)
    facts = spectral_facts(b)
    assert facts.column_stochastic and not facts.row_stochastic
    np.testing.assert_allclose(facts.perron, np.full(4, 0.25), atol=1e-15)
    moduli = np.sort(np.abs(np.linalg.eigvals(b)))[::-1]
    assert facts.rho == pytest.approx(moduli[1], abs=1e-12)
    s = np.array([4.0, 0.0, 2.0, 10.0])
    w = np.ones(4)
    for _ in range(facts.mixing_time_hint * 10):
        s, w = b @ s, b @ w
    np.testing.assert_allclose(s / w, 4.0, atol=1e-9)


def test_directed_facts_and_step_bound():
    top = relay()
    facts = graph_facts(top)
    g = nx.DiGraph(top.edges())
    assert facts.directed and facts.links == facts.edges == 6
    assert facts.diameter == nx.diameter(g)
    assert facts.metropolis is None and facts.laplacian_step_limit is None
    # in-degrees (2, 1, 2, 1): gains below 1/2 keep I - cL nonnegative (Olfati-Saber et al. 2007)
    assert facts.laplacian_step_bound == pytest.approx(0.5)
    lap = laplacian(top)
    assert (np.eye(4) - 0.5 * lap >= 0).all()
    assert (np.eye(4) - 0.51 * lap < 0).any()
    inside = spectral_facts(np.eye(4) - 0.4 * lap)
    assert inside.row_stochastic and inside.rho < 1


def test_neither_stochastic_has_no_perron_facts():
    facts = spectral_facts(np.array([[2.0, 1.0], [0.0, 3.0]]))
    assert facts.perron is None and facts.rho is None and facts.mixing_time_hint is None
    np.testing.assert_allclose(facts.eigenvalues, [3.0, 2.0])
    assert facts.lambda2 == pytest.approx(2.0) and facts.lambda_min == pytest.approx(2.0)


def test_disconnected_mix_has_no_mixing_time():
    # two separate pairs averaging: eigenvalue 1 twice, so disagreement never vanishes
    w = np.kron(np.eye(2), np.full((2, 2), 0.5))
    facts = spectral_facts(w)
    assert facts.rho == pytest.approx(1.0) and facts.mixing_time_hint is None
