"""Seeds to independent streams, and counter-based uniforms for pure per-message decisions.

One helper turns the scenario seed into independent per-agent and per-link streams
(numpy ``SeedSequence.spawn``); fault decisions use :func:`uniform`, a pure function of
(seed, stream key, counter) so that the same seed drops the same messages however the
processes happen to be scheduled.
"""

from __future__ import annotations

import numpy as np

__all__ = ["agent_generator", "mix64", "stream_key", "uniform"]

_MASK = (1 << 64) - 1


def mix64(z: int) -> int:
    """SplitMix64 finalizer (Steele, Lea, Flood, OOPSLA 2014): a bijection on 64-bit ints."""
    z = (z + 0x9E3779B97F4A7C15) & _MASK
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _MASK
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _MASK
    return z ^ (z >> 31)


def stream_key(seed: int, *parts: int) -> int:
    """Fold a seed and integer parts (link ends, fault index, purpose) into one 64-bit key."""
    key = mix64(seed & _MASK)
    for p in parts:
        key = mix64(key ^ (p & _MASK))
    return key


def uniform(key: int, counter: int) -> float:
    """A uniform in [0, 1) that depends only on (key, counter); 53 random bits."""
    return (mix64(key ^ mix64(counter & _MASK)) >> 11) * (1.0 / (1 << 53))


def agent_generator(seed: int, agent: int, purpose: int = 0) -> np.random.Generator:
    """An independent numpy Generator for one agent and one purpose, from the scenario seed."""
    ss = np.random.SeedSequence(entropy=seed, spawn_key=(agent, purpose))
    return np.random.Generator(np.random.PCG64(ss))
