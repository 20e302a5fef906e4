"""The sans-IO algorithm contract, the registry, and the step-size rules.

Rules (the runtime, the lockstep runner and the tests all rely on them):

* An algorithm instance holds only immutable configuration (its :class:`AgentSpec`).
  All evolving data lives in a state record returned by :meth:`Algorithm.init` and
  :meth:`Algorithm.step`; a state is never mutated after it is returned.
* ``step(state, inbox, k)`` is pure: no sockets, no clocks, no randomness. ``inbox`` maps
  each in-neighbour id to the latest :class:`Received` from it (absent if nothing ever
  arrived); ``Received.fresh`` says whether it arrived since the previous step.
* Every algorithm broadcasts one payload to all its out-neighbours per step: a mapping of
  names to 1-D float64 arrays whose lengths are declared by :meth:`Algorithm.payload_sizes`.
* Every state exposes ``x`` (the agent's estimate, shape (d,)) and ``priorities``
  (shape (n,) or None); the telemetry reads only these two and ``local_value``.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar, NamedTuple

import numpy as np

from node._errors import ObjectiveError
from node._objectives import Objective
from topologies._errors import ScenarioError

__all__ = [
    "AgentSpec",
    "Algorithm",
    "Payload",
    "Received",
    "StepRule",
    "algorithm_class",
    "algorithm_names",
    "register_algorithm",
]

Payload = dict[str, np.ndarray]

_REGISTRY: dict[str, type[Algorithm]] = {}


@dataclass(frozen=True, slots=True, kw_only=True)
class StepRule:
    """alpha_k = step (constant) or scale / (k + 1) ** power (diminishing)."""

    rule: str = "constant"
    step: float = 0.05
    scale: float = 0.5
    power: float = 0.6

    def __call__(self, k: int) -> float:
        if self.rule == "constant":
            return self.step
        return self.scale / (k + 1) ** self.power

    @classmethod
    def from_spec(cls, spec: float | Mapping[str, Any]) -> StepRule:
        if isinstance(spec, int | float):
            return cls(rule="constant", step=float(spec))
        return cls(
            rule=str(spec.get("rule", "constant")),
            step=float(spec.get("step", 0.05)),
            scale=float(spec.get("scale", 0.5)),
            power=float(spec.get("power", 0.6)),
        )

    def spec(self) -> float | dict[str, Any]:
        if self.rule == "constant":
            return self.step
        return {"rule": self.rule, "scale": self.scale, "power": self.power}


@dataclass(frozen=True, slots=True, kw_only=True)
class AgentSpec:
    """Everything one agent knows: its plan, received over the control channel."""

    id: int
    n_agents: int
    dimension: int
    in_neighbours: tuple[int, ...]
    out_neighbours: tuple[int, ...]
    #: mixing row: weight of each in-neighbour and of itself (key ``id``); rows sum to one
    weights: Mapping[int, float]
    objective: Objective
    initial_state: np.ndarray
    #: this agent's priority vector over all agents, or None (uniform, no averaging)
    initial_priorities: np.ndarray | None
    step: StepRule
    #: out-degree of every in-neighbour (push-sum style methods divide by it)
    in_neighbour_out_degree: Mapping[int, int] = field(default_factory=dict)
    #: algorithm-specific options from the scenario's [algorithm] table
    params: Mapping[str, Any] = field(default_factory=dict)


class Received(NamedTuple):
    """The latest message from one in-neighbour, as the algorithm sees it.

    A named tuple rather than a frozen dataclass: one is built per neighbour per step on
    the hot path, and a tuple is three times cheaper to build while just as immutable.
    """

    iteration: int
    payload: Mapping[str, np.ndarray]
    fresh: bool


class Algorithm:
    """Base class: subclass, set ``name``, decorate with :func:`register_algorithm`."""

    name: ClassVar[str] = ""
    #: whether the method needs every agent to hold a priority vector
    uses_priorities: ClassVar[bool] = False
    #: whether the method is meant for directed graphs (skips the symmetric-weights check)
    directed_ok: ClassVar[bool] = False
    #: the [algorithm] options this method reads, with their values when a scenario leaves
    #: them out (read them through :meth:`option`, so that this table is their one home)
    option_defaults: ClassVar[Mapping[str, Any]] = {}
    #: the values [algorithm].missing accepts (what a silent in-neighbour counts as); empty:
    #: the method has no such option
    missing_policies: ClassVar[tuple[str, ...]] = ()

    def __init__(self, spec: AgentSpec) -> None:
        self.spec = spec

    def payload_sizes(self) -> Mapping[str, int]:
        """Name -> length of every array this algorithm broadcasts."""
        raise NotImplementedError

    def init(self) -> tuple[Any, Payload]:
        raise NotImplementedError

    def step(self, state: Any, inbox: Mapping[int, Received], k: int) -> tuple[Any, Payload]:
        raise NotImplementedError

    # Helpers shared by implementations -------------------------------------------------
    def option(self, key: str) -> Any:
        """``spec.params[key]``, or its entry in :attr:`option_defaults` when absent."""
        return self.spec.params.get(key, self.option_defaults[key])

    def gradient(self, x: np.ndarray) -> np.ndarray:
        """The local gradient, checked: shape (d,) and finite, else ObjectiveError."""
        try:
            g = np.asarray(self.spec.objective.grad(x), dtype=float)
        except ObjectiveError:
            raise
        except Exception as exc:  # a user-defined objective raised
            raise ObjectiveError(
                f"agent {self.spec.id}: objective {self.spec.objective.kind!r} raised"
                f" {type(exc).__name__}: {exc}"
            ) from exc
        if g.shape != (self.spec.dimension,):
            raise ObjectiveError(
                f"agent {self.spec.id}: objective {self.spec.objective.kind!r} returned a"
                f" gradient of shape {g.shape}; expected ({self.spec.dimension},)"
            )
        if not float(g @ g) < math.inf:  # one reduction: NaN and infinity both fail it
            raise ObjectiveError(
                f"agent {self.spec.id}: objective {self.spec.objective.kind!r} returned a"
                f" non-finite gradient {g.tolist()} at x = {np.asarray(x).tolist()}"
            )
        return g

    def local_value(self, x: np.ndarray) -> float:
        return float(self.spec.objective.value(x))


def register_algorithm(cls: type[Algorithm]) -> type[Algorithm]:
    if not cls.name:
        raise TypeError(f"{cls.__name__} has no name")
    _REGISTRY[cls.name] = cls
    return cls


def algorithm_names() -> list[str]:
    return sorted(_REGISTRY)


def algorithm_class(name: str) -> type[Algorithm]:
    try:
        return _REGISTRY[name]
    except KeyError:
        raise ScenarioError(
            f"algorithm {name!r} is not known; expected one of {algorithm_names()}"
        ) from None


_Factory = Callable[[AgentSpec], Algorithm]
