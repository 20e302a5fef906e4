"""Errors raised by an agent: what the user got wrong vs what broke at run time."""

from __future__ import annotations

from topologies._errors import ScenarioError, SwarmrigError

__all__ = ["AgentFailure", "ObjectiveError", "ProtocolError", "WireError"]


class WireError(SwarmrigError, ValueError):
    """A frame could not be decoded or does not fit the schema (counted and dropped)."""


class ProtocolError(SwarmrigError):
    """A message does not fit the agent's current life-cycle state (counted and refused)."""


class ObjectiveError(ScenarioError):
    """A local objective misbehaved: raised, wrong shape, NaN. Names the agent and the function."""


class AgentFailure(SwarmrigError):
    """Something broke at run time inside an agent (lost coordinator, diverged state)."""


class CoordinatorSilent(AgentFailure):
    """No word from the coordinator for the heartbeat timeout: the agent exits by itself
    with EXIT_COORDINATOR_SILENT, after saying so in its log."""


#: an agent's exit status when it left because the coordinator was silent
EXIT_COORDINATOR_SILENT = 7
