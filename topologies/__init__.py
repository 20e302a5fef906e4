"""Graph shapes and their facts (pure; used by node and coordinator)."""

from topologies._errors import ScenarioError, SwarmrigError, TopologyError

__all__ = ["ScenarioError", "SwarmrigError", "TopologyError"]
