"""Reading graph files: plain edge lists and GraphML.

Edge list: one link ``u v`` per line, the two agent ids separated by whitespace or a
comma; ``#`` starts a comment; blank lines are ignored. A comment line ``# directed``
before the first link marks every line as the one-way link ``u -> v``; otherwise (or with
``# undirected``) each line is a two-way link. GraphML: directed iff the file's
``edgedefault`` says so; node ids are the agent numbers, written ``0``, ``1``, ... or
``n0``, ``n1``, ... (the GraphML primer's form), and ``x``/``y`` node data become
positions. In both formats agents must be numbered ``0..n-1`` and self-loops are refused.
"""

from __future__ import annotations

import re
from pathlib import Path

import networkx as nx

from topologies._build import Topology, _listing, from_graph
from topologies._errors import TopologyError

__all__ = ["load"]

_SEPARATORS = re.compile(r"[\s,]+")
_AGENT_ID = re.compile(r"[0-9]+")
_GRAPHML_ID = re.compile(r"(n?)([0-9]+)")


def load(path: str | Path, *, directed: bool | None = None) -> Topology:
    """Read a connected topology from an edge-list or GraphML (``.graphml``) file.

    ``directed=None`` follows the file (edge list: the ``# directed`` marker; GraphML:
    ``edgedefault``). ``True`` reads every edge-list line as the one-way link ``u -> v``;
    ``False`` makes every link two-way. An undirected GraphML file cannot be read as
    directed, since it holds no link directions. Every :class:`TopologyError` names the
    file (and the line, for edge lists). The result has ``shape="file"`` and
    ``params={"file": str(path)}``.
    """
    if directed is not None and not isinstance(directed, bool):
        raise TopologyError(f"{path}: directed must be True, False or None, got {directed!r}")
    p = Path(path)
    name = str(path)
    if p.suffix.lower() == ".graphml":
        graph, is_directed = _read_graphml(p, name, directed)
    else:
        graph, is_directed = _read_edge_list(p, name, directed)
    return from_graph(graph, directed=is_directed, shape="file", params={"file": name}, where=name)


def _read_text(p: Path, name: str) -> str:
    try:
        return p.read_text(encoding="utf-8")
    except OSError as exc:
        raise TopologyError(f"{name}: cannot read the graph file: {exc.strerror or exc}") from None
    except UnicodeDecodeError as exc:
        raise TopologyError(
            f"{name}: not a UTF-8 text file (byte {exc.start}); expected an edge list"
            " or a .graphml file"
        ) from None


def _read_edge_list(p: Path, name: str, directed: bool | None) -> tuple[nx.Graph, bool]:
    marked: bool | None = None
    links: list[tuple[int, int]] = []
    for lineno, raw in enumerate(_read_text(p, name).splitlines(), start=1):
        content, _, comment = raw.partition("#")
        content = content.strip()
        if not content:
            word = comment.strip().lower()
            if raw.lstrip().startswith("#") and word in ("directed", "undirected"):
                if links:
                    raise TopologyError(
                        f"{name}, line {lineno}: the '# {word}' marker must come before"
                        " the first link"
                    )
                marked = word == "directed"
            continue
        fields = [f for f in _SEPARATORS.split(content) if f]
        # Messages describe the line and never quote it: the path may name any readable file,
        # and an error must not show its contents.
        if len(fields) != 2:
            raise TopologyError(
                f"{name}, line {lineno}: expected one link 'u v' (two agent ids), got a line"
                f" of {len(fields)} field{'' if len(fields) == 1 else 's'}; is this an edge list?"
            )
        ends = []
        for position, token in enumerate(fields, start=1):
            if not _AGENT_ID.fullmatch(token):
                raise TopologyError(
                    f"{name}, line {lineno}: field {position} is not a non-negative integer;"
                    " expected agents numbered 0..n-1"
                )
            ends.append(int(token))
        u, v = ends
        if u == v:
            raise TopologyError(
                f"{name}, line {lineno}: self-loop on agent {u} is not allowed"
                " (an agent always keeps its own state)"
            )
        links.append((u, v))
    if not links:
        raise TopologyError(f"{name}: no links found; expected one 'u v' per line")
    is_directed = directed if directed is not None else bool(marked)
    n = max(max(u, v) for u, v in links) + 1
    seen = {a for link in links for a in link}
    missing = [i for i in range(n) if i not in seen]
    if missing:
        raise TopologyError(
            f"{name}: agents {_listing(missing)} appear on no line; expected agents"
            f" numbered 0..{n - 1}, each on at least one link"
        )
    graph: nx.Graph = nx.DiGraph() if is_directed else nx.Graph()
    graph.add_nodes_from(range(n))
    graph.add_edges_from(links)
    return graph, is_directed


def _read_graphml(p: Path, name: str, directed: bool | None) -> tuple[nx.Graph, bool]:
    _read_text(p, name)  # uniform messages for a missing or binary file
    try:
        graph = nx.read_graphml(p)
    except (SyntaxError, nx.NetworkXError, ValueError, KeyError, TypeError, AttributeError) as exc:
        # xml.etree's ParseError is a SyntaxError; networkx raises the others on bad content
        raise TopologyError(f"{name}: not a readable GraphML file: {exc}") from None
    if graph.is_multigraph():
        graph = nx.DiGraph(graph) if graph.is_directed() else nx.Graph(graph)
    if directed is True and not graph.is_directed():
        raise TopologyError(
            f"{name}: the file is undirected (edgedefault='undirected') and holds no link"
            " directions; set edgedefault='directed' in the file to read it as directed"
        )
    mapping: dict[str, int] = {}
    prefixes = set()
    for label in graph.nodes:
        m = _GRAPHML_ID.fullmatch(str(label))
        if m is None:
            raise TopologyError(
                f"{name}: GraphML node id {label!r} is not an agent number; expected ids"
                " '0', '1', ... (or 'n0', 'n1', ...) numbering the agents 0..n-1"
            )
        prefixes.add(m.group(1))
        mapping[label] = int(m.group(2))
    if len(prefixes) > 1:
        raise TopologyError(
            f"{name}: GraphML node ids mix the forms '3' and 'n3'; expected one form throughout"
        )
    n = graph.number_of_nodes()
    wrong = [repr(label) for label in sorted(label for label, i in mapping.items() if i >= n)]
    if wrong or len(set(mapping.values())) != n:
        missing = sorted(set(range(n)) - set(mapping.values()))
        raise TopologyError(
            f"{name}: GraphML node ids must number the agents 0..{n - 1}; node ids"
            f" {_listing(wrong)} are out of range and agents {_listing(missing)} are missing"
        )
    graph = nx.relabel_nodes(graph, mapping, copy=True)
    is_directed = graph.is_directed() if directed is None else directed
    return graph, is_directed
