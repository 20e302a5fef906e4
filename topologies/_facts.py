"""Facts about a topology: degrees, matrices, weight rules, spectra, link lengths.

Matrix convention (the one the algorithms use): ``A[i, j] = 1`` when the link ``j -> i``
exists, i.e. agent ``i`` hears from agent ``j``, so a consensus step reads row ``i`` of a
mixing matrix as "what ``i`` does with what it hears". Dense numpy arrays throughout:
swarms are small (hundreds of agents), and dense eigen-solvers are exact and simple.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import sparse
from scipy.sparse import csgraph

from topologies._build import Topology
from topologies._errors import TopologyError

__all__ = [
    "GraphFacts",
    "SpectralFacts",
    "adjacency",
    "degrees",
    "graph_facts",
    "laplacian",
    "laplacian_step_bound",
    "laplacian_step_limit",
    "link_lengths",
    "max_degree",
    "metropolis_weights",
    "spectral_facts",
]

# Relative tolerance for "this matrix is symmetric / stochastic": rounding of weights
# computed in floating point, far below any meaningful asymmetry.
_TOL = 1e-10

# Disagreement shrink factor behind mixing_time_hint.
_SHRINK = 1e-3


def degrees(top: Topology) -> np.ndarray:
    """Out-degree of every agent (index = agent id, int64); the degree if undirected."""
    return np.array([top.graph.out_degree(i) for i in range(top.n)], dtype=np.int64)


def max_degree(top: Topology) -> int:
    """The largest out-degree (the largest degree, if undirected)."""
    return int(degrees(top).max())


def adjacency(top: Topology) -> np.ndarray:
    """The n x n 0/1 matrix with ``A[i, j] = 1`` iff the link ``j -> i`` exists.

    Row ``i`` marks the agents ``i`` hears from (its in-neighbours); symmetric when the
    topology is undirected. Edge attributes such as GraphML weights are ignored.
    """
    n = top.n
    a = np.zeros((n, n))
    links = top.edges()
    if links:
        src, dst = np.array(links).T
        a[dst, src] = 1.0
    return a


def laplacian(top: Topology) -> np.ndarray:
    """The in-degree Laplacian ``L = D_in - A`` for the convention of :func:`adjacency`.

    Rows sum to zero, so ``x <- x - c L x`` moves each agent towards what it hears;
    symmetric (the usual graph Laplacian) when the topology is undirected.
    """
    a = adjacency(top)
    return np.diag(a.sum(axis=1)) - a


def _require_undirected(top: Topology, what: str, instead: str) -> None:
    if top.directed:
        raise TopologyError(
            f"topology ({top.shape}): {what} needs an undirected graph and this one is"
            f" directed; {instead}"
        )


def metropolis_weights(top: Topology) -> np.ndarray:
    """Metropolis–Hastings mixing matrix: symmetric, doubly stochastic, nonnegative.

    ``w_ij = 1 / (1 + max(d_i, d_j))`` for every edge, ``w_ii = 1 - sum_j w_ij``, zero
    elsewhere (Xiao, Boyd, Lall, IPSN 2005). Undirected topologies only.
    """
    _require_undirected(
        top,
        "Metropolis–Hastings weights",
        "use push-sum or a row-stochastic in-neighbour mix for directed links",
    )
    d = degrees(top)
    n = top.n
    w = np.zeros((n, n))
    pairs = top.undirected_edges()
    if pairs:
        u, v = np.array(pairs).T
        weight = 1.0 / (1.0 + np.maximum(d[u], d[v]))
        w[u, v] = weight
        w[v, u] = weight
    np.fill_diagonal(w, 1.0 - w.sum(axis=1))
    return w


def laplacian_step_bound(top: Topology) -> float:
    """``1 / Δ`` with ``Δ`` the largest in-degree: gains ``0 < c < 1/Δ`` keep ``I - cL``
    nonnegative and give consensus on a connected graph (Olfati-Saber, Fax, Murray,
    Proc. IEEE 95 (2007)). For undirected graphs Δ is the largest degree.
    ``inf`` for a single agent.
    """
    biggest = int(adjacency(top).sum(axis=1).max())
    return math.inf if biggest == 0 else 1.0 / biggest


def laplacian_step_limit(top: Topology) -> float:
    """``2 / λn(L)``: ``x <- (I - cL) x`` converges to the average iff ``0 < c`` is below
    it (Olfati-Saber, Fax, Murray, Proc. IEEE 95 (2007)). Undirected only; ``inf`` for a
    single agent.
    """
    _require_undirected(
        top, "the exact Laplacian step limit", "use laplacian_step_bound() for directed links"
    )
    return _step_limit(float(np.linalg.eigvalsh(laplacian(top))[-1]))


def _step_limit(lambda_max: float) -> float:
    return math.inf if lambda_max <= _TOL else 2.0 / lambda_max


@dataclass(frozen=True, slots=True, kw_only=True)
class SpectralFacts:
    """What the spectrum of a mixing matrix W says about ``x <- W x``."""

    #: every eigenvalue, by descending real part (ties: descending imaginary part); float
    #: if W is symmetric or all eigenvalues are real, complex otherwise
    eigenvalues: np.ndarray
    #: W equals its transpose (to rounding)
    symmetric: bool
    #: W is nonnegative and each row sums to one (agreement: W 1 = 1)
    row_stochastic: bool
    #: W is nonnegative and each column sums to one (the sum of states is kept: 1ᵀ W = 1ᵀ)
    column_stochastic: bool
    #: second largest eigenvalue: algebraically if W is symmetric, by modulus otherwise
    #: (None for a 1 x 1 matrix)
    lambda2: float | complex | None
    #: smallest eigenvalue (symmetric W) or the one with the smallest real part
    lambda_min: float | complex
    #: spectral radius of W - v πᵀ with π the left and v the right Perron vector
    #: (πᵀ v = 1): W - 1 πᵀ when rows sum to one, W - 11ᵀ/n when W is doubly
    #: stochastic; the disagreement shrinks like rhoᵏ (Xiao & Boyd, Systems & Control
    #: Letters 53 (2004)). None when neither rows nor columns of W sum to one
    rho: float | None
    #: left Perron vector π: πᵀ W = πᵀ, entries summing to one; the weight each agent's
    #: initial state gets in the consensus value when rows sum to one. None when neither
    #: rows nor columns of W sum to one
    perron: np.ndarray | None
    #: iterations to shrink the disagreement by 1e-3, ceil(log(1e-3) / log(rho));
    #: None if rho is None or rho >= 1 - 1e-10 (no convergence, to rounding)
    mixing_time_hint: int | None

    def as_dict(self) -> dict[str, Any]:
        """Plain JSON-able values: floats, lists, None; a complex number is ``[re, im]``."""
        return {
            "eigenvalues": _plain(self.eigenvalues),
            "symmetric": self.symmetric,
            "row_stochastic": self.row_stochastic,
            "column_stochastic": self.column_stochastic,
            "lambda2": _plain(self.lambda2),
            "lambda_min": _plain(self.lambda_min),
            "rho": _plain(self.rho),
            "perron": _plain(self.perron),
            "mixing_time_hint": self.mixing_time_hint,
        }


def _plain(value: Any) -> Any:
    if value is None or isinstance(value, bool | int | str):
        return value
    if isinstance(value, np.ndarray):
        return [_plain(v) for v in value.tolist()]
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, complex | np.complexfloating):
        if value.imag == 0:
            return _plain(float(value.real))
        return [_plain(float(value.real)), _plain(float(value.imag))]
    if isinstance(value, np.integer):
        return int(value)
    f = float(value)
    return f if math.isfinite(f) else None


def _sum_one(sums: np.ndarray, scale: float) -> bool:
    return bool(np.all(np.abs(sums - 1.0) <= _TOL * max(1.0, scale)))


def _null_vector(m: np.ndarray, constraint: np.ndarray) -> np.ndarray:
    """x with m x = 0 and constraint · x = 1 (least squares: exact when solvable)."""
    system = np.vstack([m, constraint])
    rhs = np.zeros(system.shape[0])
    rhs[-1] = 1.0
    return np.linalg.lstsq(system, rhs, rcond=None)[0]


def spectral_facts(W: np.ndarray, *, where: str = "mixing matrix") -> SpectralFacts:
    """Spectral facts of a square, finite mixing matrix ``W`` (see :class:`SpectralFacts`).

    Raises :class:`TopologyError` (message starting with ``where``) if W is not a finite
    square matrix. Cost: one dense eigen-decomposition, O(n^3).
    """
    try:
        w = np.array(W, dtype=float)
    except (TypeError, ValueError):
        raise TopologyError(f"{where}: expected a square matrix of numbers") from None
    if w.ndim != 2 or w.shape[0] != w.shape[1] or w.shape[0] == 0:
        raise TopologyError(f"{where}: expected a non-empty square matrix, got shape {w.shape}")
    if not np.all(np.isfinite(w)):
        bad = tuple(int(i) for i in np.argwhere(~np.isfinite(w))[0])
        raise TopologyError(f"{where}: expected finite entries, got {w[bad]} at {bad}")
    n = w.shape[0]
    scale = float(np.abs(w).max())
    tol = _TOL * max(1.0, scale)
    symmetric = bool(np.allclose(w, w.T, rtol=0.0, atol=tol))
    nonnegative = bool(np.all(w >= -tol))
    rows_one = _sum_one(w.sum(axis=1), scale * n)
    cols_one = _sum_one(w.sum(axis=0), scale * n)

    if symmetric:
        eig: np.ndarray = np.linalg.eigvalsh((w + w.T) / 2)[::-1]
        lambda2: float | complex | None = float(eig[1]) if n > 1 else None
        lambda_min: float | complex = float(eig[-1])
    else:
        raw = np.linalg.eigvals(w)
        raw = raw[np.lexsort((-raw.imag, -raw.real))]
        eig = raw.real if np.all(np.abs(raw.imag) <= tol) else raw
        by_modulus = eig[np.argsort(-np.abs(eig), kind="stable")]
        lambda2 = _scalar(by_modulus[1]) if n > 1 else None
        lambda_min = _scalar(eig[-1])

    perron: np.ndarray | None
    rho: float | None
    if symmetric and rows_one:
        # Doubly stochastic (in the sum sense): π = 1/n exactly. W - 11ᵀ/n has W's
        # eigenvalues with one eigenvalue 1 (eigenvector 1) replaced by 0.
        perron = np.full(n, 1.0 / n)
        rest = np.delete(eig, np.argmin(np.abs(eig - 1.0)))
        rho = float(np.max(np.abs(rest))) if rest.size else 0.0
    elif rows_one or cols_one:
        ones = np.ones(n)
        if rows_one:
            right = ones
            perron = _null_vector(w.T - np.eye(n), ones)
        else:
            perron = ones / n
            right = _null_vector(w - np.eye(n), perron)
        rho = float(np.max(np.abs(np.linalg.eigvals(w - np.outer(right, perron)))))
    else:
        perron, rho = None, None

    if rho is None or rho >= 1.0 - _TOL:  # rounding leaves a repeated eigenvalue 1 just below 1
        hint = None
    elif rho <= 1e-300:
        hint = 1
    else:
        hint = max(1, math.ceil(math.log(_SHRINK) / math.log(rho)))
    return SpectralFacts(
        eigenvalues=eig,
        symmetric=symmetric,
        row_stochastic=rows_one and nonnegative,
        column_stochastic=cols_one and nonnegative,
        lambda2=lambda2,
        lambda_min=lambda_min,
        rho=rho,
        perron=perron,
        mixing_time_hint=hint,
    )


def _scalar(z: complex | float) -> float | complex:
    z = complex(z)
    return z.real if z.imag == 0 else z


@dataclass(frozen=True, slots=True, kw_only=True)
class GraphFacts:
    """Headline facts of one topology, for printing, JSON and parameter checks."""

    #: number of agents
    n: int
    #: number of directed links (twice the edges if undirected)
    links: int
    #: undirected edges; equals ``links`` for a directed topology
    edges: int
    #: whether the topology has one-way links
    directed: bool
    #: smallest out-degree (degree, if undirected)
    min_degree: int
    #: largest out-degree (degree, if undirected)
    max_degree: int
    #: mean out-degree (links / n)
    mean_degree: float
    #: longest shortest path in hops (directed paths if directed); None if not connected
    diameter: int | None
    #: λ2(L), the algebraic connectivity (Fiedler, Czech. Math. J. 23 (1973));
    #: None if directed
    algebraic_connectivity: float | None
    #: λn(L), the largest Laplacian eigenvalue; None if directed
    laplacian_max: float | None
    #: spectral facts of the Metropolis–Hastings matrix; None if directed
    metropolis: SpectralFacts | None
    #: 1 / largest in-degree: Laplacian gains must stay below it (see laplacian_step_bound)
    laplacian_step_bound: float
    #: 2 / λn(L), the exact limit for the Laplacian gain; None if directed
    laplacian_step_limit: float | None

    def as_dict(self) -> dict[str, Any]:
        """Plain JSON-able values (ints, floats, lists, None); infinities become None."""
        return {
            "n": self.n,
            "links": self.links,
            "edges": self.edges,
            "directed": self.directed,
            "min_degree": self.min_degree,
            "max_degree": self.max_degree,
            "mean_degree": _plain(self.mean_degree),
            "diameter": self.diameter,
            "algebraic_connectivity": _plain(self.algebraic_connectivity),
            "laplacian_max": _plain(self.laplacian_max),
            "metropolis": None if self.metropolis is None else self.metropolis.as_dict(),
            "laplacian_step_bound": _plain(self.laplacian_step_bound),
            "laplacian_step_limit": _plain(self.laplacian_step_limit),
        }


def graph_facts(top: Topology) -> GraphFacts:
    """Compute :class:`GraphFacts` for ``top``. Cost: O(n^3) (dense eigen-solvers)
    plus O(n · links) for the diameter (breadth-first search from every agent)."""
    d = degrees(top)
    links = top.graph.number_of_edges()
    # all-pairs hop counts by breadth-first search in compiled code; row u = paths from u
    src, dst = np.array(top.edges(), dtype=np.int64).reshape(-1, 2).T
    links_matrix = sparse.csr_array((np.ones(src.size), (src, dst)), shape=(top.n, top.n))
    hops = csgraph.shortest_path(links_matrix, method="D", directed=True, unweighted=True)
    diameter = int(hops.max()) if np.all(np.isfinite(hops)) else None
    if top.directed:
        lam2 = lam_n = limit = None
        metropolis = None
    else:
        spectrum = np.linalg.eigvalsh(laplacian(top))
        lam2 = float(spectrum[1]) if top.n > 1 else 0.0
        lam_n = float(spectrum[-1])
        limit = _step_limit(lam_n)
        metropolis = spectral_facts(metropolis_weights(top), where="Metropolis–Hastings weights")
    return GraphFacts(
        n=top.n,
        links=links,
        edges=links if top.directed else links // 2,
        directed=top.directed,
        min_degree=int(d.min()),
        max_degree=int(d.max()),
        mean_degree=float(d.mean()),
        diameter=diameter,
        algebraic_connectivity=lam2,
        laplacian_max=lam_n,
        metropolis=metropolis,
        laplacian_step_bound=laplacian_step_bound(top),
        laplacian_step_limit=limit,
    )


def link_lengths(top: Topology) -> dict[tuple[int, int], float]:
    """Euclidean length of every directed link ``(j, i)``, from ``top.positions``.

    Raises :class:`TopologyError` if the topology has no positions (only random-geometric
    and grid shapes, and files with x/y node data, have them).
    """
    if top.positions is None:
        raise TopologyError(
            f"topology ({top.shape}): has no agent positions, so links have no length;"
            " positions exist for random-geometric and grid shapes and for GraphML files"
            " with x/y node data"
        )
    pos = top.positions
    return {
        (u, v): math.hypot(pos[u][0] - pos[v][0], pos[u][1] - pos[v][1]) for u, v in top.edges()
    }
