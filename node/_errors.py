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
