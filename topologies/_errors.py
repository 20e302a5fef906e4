"""The project's one exception root, kept in the bottom layer so every package can share it."""

from __future__ import annotations

__all__ = ["ScenarioError", "SwarmrigError", "TopologyError"]


class SwarmrigError(Exception):
    """Root of every error swarmrig raises on purpose."""


class ScenarioError(SwarmrigError):
    """The user's input is wrong: a scenario file, a key, a graph file.

    The message names the file and the key and says what was expected.
    """


class TopologyError(ScenarioError):
    """A graph cannot be used: disconnected, malformed file, bad parameters."""
