"""Graph shapes and their facts (pure; used by node and coordinator).

Links are directed ``j -> i`` ("i hears from j"); matrices follow the same convention,
``A[i, j] = 1`` when ``i`` hears from ``j``. Undirected shapes carry both directions.
"""

from topologies._build import SHAPES, Topology, build, from_graph, require_connected
from topologies._errors import ScenarioError, SwarmrigError, TopologyError
from topologies._facts import (
    GraphFacts,
    SpectralFacts,
    adjacency,
    degrees,
    graph_facts,
    laplacian,
    laplacian_step_bound,
    laplacian_step_limit,
    link_lengths,
    max_degree,
    metropolis_weights,
    spectral_facts,
)
from topologies._io import load

__all__ = [
    "SHAPES",
    "GraphFacts",
    "ScenarioError",
    "SpectralFacts",
    "SwarmrigError",
    "Topology",
    "TopologyError",
    "adjacency",
    "build",
    "degrees",
    "from_graph",
    "graph_facts",
    "laplacian",
    "laplacian_step_bound",
    "laplacian_step_limit",
    "link_lengths",
    "load",
    "max_degree",
    "metropolis_weights",
    "require_connected",
    "spectral_facts",
]
