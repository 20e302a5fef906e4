"""Resolve the ``links`` scope of a link fault to the directed links it covers (pure).

The topology is used only through ``topology.n`` (agent count), ``topology.edges()`` (sorted
directed links ``(src, dst)``) and ``topology.positions`` (id -> (x, y), or None for shapes
without a layout).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any, Protocol

from topologies._errors import ScenarioError

__all__ = ["SCOPE_FORMS", "links_in_scope"]

#: what a scope may look like, quoted in every error message
SCOPE_FORMS = (
    '"all" | { from = a, to = b } | { edge = [a, b] } | { from = a } | { to = a } '
    "| { between = [[...], [...], ...] } | { longer_than = r }"
)


class _Topology(Protocol):
    n: int

    def edges(self) -> list[tuple[int, int]]: ...

    @property
    def positions(self) -> Mapping[int, tuple[float, float]] | None: ...


def _agent(value: Any, topology: _Topology, where: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise ScenarioError(f"{where}: expected an agent id (integer), got {value!r}")
    if not 0 <= value < topology.n:
        raise ScenarioError(
            f"{where}: agent {value} does not exist; expected an id in 0..{topology.n - 1}"
        )
    return value


def _bad(where: str, scope: Any) -> ScenarioError:
    return ScenarioError(f"{where}: expected a link scope {SCOPE_FORMS}, got {scope!r}")


def links_in_scope(scope: Any, topology: _Topology, *, where: str) -> list[tuple[int, int]]:
    """The sorted directed links ``(src, dst)`` of ``topology`` that ``scope`` covers.

    Scopes: ``"all"``; ``{from, to}`` one directed link (it must exist); ``{edge: [a, b]}``
    both directions (those that exist; at least one must); ``{from: a}`` out-links of a;
    ``{to: a}`` in-links of a; ``{between: groups}`` every link whose ends lie in different
    groups (disjoint groups of valid ids; agents in no group are unaffected);
    ``{longer_than: r}`` links longer than r in the plane (the shape must have positions).
    A malformed scope raises :class:`ScenarioError` naming ``where`` and the expected forms.
    """
    edges = list(topology.edges())
    if isinstance(scope, str):
        if scope == "all":
            return sorted(edges)
        raise _bad(where, scope)
    if not isinstance(scope, Mapping) or not scope:
        raise _bad(where, scope)
    keys = frozenset(scope)
    if keys == {"from", "to"}:
        a = _agent(scope["from"], topology, f"{where}.from")
        b = _agent(scope["to"], topology, f"{where}.to")
        if (a, b) not in set(edges):
            raise ScenarioError(f"{where}: the topology has no link {a} -> {b}")
        return [(a, b)]
    if keys == {"from"}:
        a = _agent(scope["from"], topology, f"{where}.from")
        return sorted(e for e in edges if e[0] == a)
    if keys == {"to"}:
        a = _agent(scope["to"], topology, f"{where}.to")
        return sorted(e for e in edges if e[1] == a)
    if keys == {"edge"}:
        return _edge(scope["edge"], topology, edges, f"{where}.edge")
    if keys == {"between"}:
        return _between(scope["between"], topology, edges, f"{where}.between")
    if keys == {"longer_than"}:
        return _longer_than(scope["longer_than"], topology, edges, f"{where}.longer_than")
    raise _bad(where, scope)


def _edge(
    value: Any, topology: _Topology, edges: list[tuple[int, int]], where: str
) -> list[tuple[int, int]]:
    if isinstance(value, str | bytes) or not isinstance(value, Sequence) or len(value) != 2:
        raise ScenarioError(f"{where}: expected a pair of agent ids [a, b], got {value!r}")
    a = _agent(value[0], topology, f"{where}[0]")
    b = _agent(value[1], topology, f"{where}[1]")
    if a == b:
        raise ScenarioError(f"{where}: expected two different agents, got [{a}, {b}]")
    have = set(edges)
    found = sorted(e for e in ((a, b), (b, a)) if e in have)
    if not found:
        raise ScenarioError(f"{where}: the topology has no link between {a} and {b}")
    return found


def _between(
    value: Any, topology: _Topology, edges: list[tuple[int, int]], where: str
) -> list[tuple[int, int]]:
    if isinstance(value, str | bytes) or not isinstance(value, Sequence) or len(value) < 2:
        raise ScenarioError(f"{where}: expected at least two groups of agent ids, got {value!r}")
    group_of: dict[int, int] = {}
    for g, group in enumerate(value):
        if isinstance(group, str | bytes) or not isinstance(group, Sequence) or not group:
            raise ScenarioError(
                f"{where}[{g}]: expected a non-empty list of agent ids, got {group!r}"
            )
        for k, member in enumerate(group):
            a = _agent(member, topology, f"{where}[{g}][{k}]")
            if a in group_of:
                raise ScenarioError(
                    f"{where}[{g}][{k}]: agent {a} is already in group {group_of[a]}; "
                    "expected disjoint groups"
                )
            group_of[a] = g
    return sorted(
        (s, d) for s, d in edges if s in group_of and d in group_of and group_of[s] != group_of[d]
    )


def _longer_than(
    value: Any, topology: _Topology, edges: list[tuple[int, int]], where: str
) -> list[tuple[int, int]]:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise ScenarioError(f"{where}: expected a finite length, got {value!r}")
    if value < 0:
        raise ScenarioError(f"{where}: expected a non-negative length, got {value!r}")
    pos = topology.positions
    if pos is None:
        raise ScenarioError(
            f"{where}: this topology has no agent positions; "
            'the shape must be "random-geometric" or "grid"'
        )
    out = []
    for s, d in edges:
        if s not in pos or d not in pos:
            missing = s if s not in pos else d
            raise ScenarioError(f"{where}: agent {missing} has no position in the topology")
        (x0, y0), (x1, y1) = pos[s], pos[d]
        if math.hypot(x1 - x0, y1 - y0) > value:
            out.append((s, d))
    return sorted(out)
