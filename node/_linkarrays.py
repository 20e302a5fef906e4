"""The per-link fault decisions of :mod:`node._links`, evaluated for many links at once.

:class:`LinkArrays` holds the faults applied to a set of directed links (each with its own
seed, so several seeds can share one set) and decides, for one round, the message of
sequence number ``seq`` on every link: exactly what :meth:`node._links.LinkModel.decide`
returns link by link (the same counter-based uniforms of :mod:`node._rng`, the same order
of faults, the same Gilbert–Elliott chain over sequence numbers, the same delay samplers).
It is used by the batch engine, where every agent publishes once per round (seq = round).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from node._links import (
    _P_CORRUPT,
    _P_DELAY,
    _P_DUPLICATE,
    _P_GE_LOSS,
    _P_GE_STEP,
    _P_JITTER,
    _P_LOSS,
    LinkFault,
    _delay_sampler,
)
from node._rng import mix64, stream_key

__all__ = ["LinkArrays", "RoundDecision", "mix64_array", "rounds_lag", "uniform_array"]

_C0 = np.uint64(0x9E3779B97F4A7C15)
_C1 = np.uint64(0xBF58476D1CE4E5B9)
_C2 = np.uint64(0x94D049BB133111EB)
_S30, _S27, _S31, _S11 = np.uint64(30), np.uint64(27), np.uint64(31), np.uint64(11)
_UNIT = 1.0 / (1 << 53)


def mix64_array(z: np.ndarray) -> np.ndarray:
    """:func:`node._rng.mix64` on an array of uint64 (wrapping arithmetic, same bits)."""
    z = z + _C0
    z = (z ^ (z >> _S30)) * _C1
    z = (z ^ (z >> _S27)) * _C2
    return z ^ (z >> _S31)


def uniform_array(keys: np.ndarray, counter: int) -> np.ndarray:
    """:func:`node._rng.uniform` (key, counter) for every key of ``keys`` (uint64)."""
    c = np.uint64(mix64(counter & ((1 << 64) - 1)))
    return (mix64_array(keys ^ c) >> _S11).astype(np.float64) * _UNIT


def _keys(seeds: np.ndarray, src: np.ndarray, dst: np.ndarray, index: int, purpose: int):
    return np.array(
        [
            stream_key(int(a), int(b), int(c), index, purpose)
            for a, b, c in zip(seeds, src, dst, strict=True)
        ],
        dtype=np.uint64,
    )


@dataclass(slots=True)
class _Fault:
    fault: LinkFault
    #: (L,) the fault is applied to the link (armed in the plan, or switched on by directive)
    applied: np.ndarray
    key: np.ndarray
    key2: np.ndarray | None = None
    #: Gilbert–Elliott state at the last decided seq (True = bad)
    bad: np.ndarray | None = None


@dataclass(frozen=True, slots=True)
class RoundDecision:
    """What happens to the message of one round on each link (arrays over links)."""

    #: dropped by an injected fault (loss, burst loss, outage)
    dropped: np.ndarray
    #: corrupted: the receiver's checksum refuses it (counted rejected)
    corrupt: np.ndarray
    #: delivered twice
    duplicate: np.ndarray
    #: extra hold, seconds
    delay_s: np.ndarray
    #: keep the link's order when delaying
    fifo: np.ndarray


class LinkArrays:
    """The faults of L directed links; link l is ``src[l] -> dst[l]`` under ``seeds[l]``."""

    def __init__(self, seeds: Sequence[int], src: Sequence[int], dst: Sequence[int]) -> None:
        self.seeds = np.asarray(seeds, dtype=np.int64)
        self.src = np.asarray(src, dtype=np.int64)
        self.dst = np.asarray(dst, dtype=np.int64)
        self.size = len(self.src)
        self.faults: dict[int, _Fault] = {}
        self._seq = 0

    def apply(self, fault: LinkFault, links: np.ndarray, on: bool) -> None:
        """Apply (``on``) or lift ``fault`` on the links of the index array ``links``."""
        f = self.faults.get(fault.index)
        if f is None:
            if not on:
                return
            f = self._compile(fault)
            self.faults = dict(sorted({**self.faults, fault.index: f}.items()))
        f.applied[links] = on

    def _compile(self, fault: LinkFault) -> _Fault:
        i, kind = fault.index, fault.kind

        def keys(purpose: int) -> np.ndarray:
            return _keys(self.seeds, self.src, self.dst, i, purpose)

        applied = np.zeros(self.size, dtype=bool)
        if kind == "burst-loss":
            f = _Fault(fault, applied, keys(_P_GE_LOSS), keys(_P_GE_STEP))
            f.bad = np.zeros(self.size, dtype=bool)  # good at seq 0
            f.bad = self._chain_to(f, self._seq)
            return f
        purpose = {
            "loss": _P_LOSS,
            "duplicate": _P_DUPLICATE,
            "corrupt": _P_CORRUPT,
            "delay": _P_DELAY,
        }.get(kind)
        key = keys(purpose) if purpose is not None else np.zeros(self.size, dtype=np.uint64)
        key2 = keys(_P_JITTER) if kind == "delay" else None
        return _Fault(fault, applied, key, key2)

    def _chain_to(self, f: _Fault, seq: int, start: int = 0) -> np.ndarray:
        """The chain's state at ``seq`` from its state at ``start`` (one step per seq)."""
        p = f.fault.params
        bad = f.bad
        assert bad is not None and f.key2 is not None
        for s in range(start + 1, seq + 1):
            u = uniform_array(f.key2, s)
            bad = np.where(bad, u >= p["p_leave"], u < p["p_enter"])
        return bad

    def decide(self, seq: int, iteration: int, now_s: float) -> RoundDecision | None:
        """Decisions for the message ``seq`` on every link; None when no fault is applied.

        Sequence numbers must be decided in increasing order (the chains move forward).
        """
        size = self.size
        prev, self._seq = self._seq, seq
        if not self.faults:
            return None
        dropped = np.zeros(size, dtype=bool)
        corrupt = np.zeros(size, dtype=bool)
        duplicate = np.zeros(size, dtype=bool)
        fifo = np.zeros(size, dtype=bool)
        delay_ms = np.zeros(size)
        for f in self.faults.values():
            fault, p = f.fault, f.fault.params
            if fault.kind == "burst-loss" and seq != prev:
                f.bad = self._chain_to(f, seq, prev) if seq > prev else self._chain_to(f, seq)
            if fault.by_iteration:
                t, lo, hi = iteration, fault.start_iteration, fault.end_iteration
            else:
                t, lo, hi = now_s, fault.start_s, fault.end_s
            if (lo is not None and t < lo) or (hi is not None and not t < hi):
                continue
            act = f.applied & ~dropped
            if not act.any():
                continue
            kind = fault.kind
            if kind == "outage":
                dropped |= act
            elif kind == "loss":
                dropped |= act & (uniform_array(f.key, seq) < p["rate"])
            elif kind == "burst-loss":
                loss = np.where(f.bad, p["loss_bad"], p["loss_good"])  # type: ignore[arg-type]
                u = uniform_array(f.key, seq)
                dropped |= act & ((loss >= 1.0) | ((loss > 0.0) & (u < loss)))
            elif kind == "delay":
                # inactive links add 0.0, which leaves their sum as it is
                extra = np.zeros(size)
                extra[act] = _sample(p, uniform_array(f.key[act], seq))
                delay_ms = delay_ms + extra
                if p["jitter_ms"] > 0.0:
                    extra = np.zeros(size)
                    extra[act] = p["jitter_ms"] * uniform_array(f.key2[act], seq)  # type: ignore[index]
                    delay_ms = delay_ms + extra
                if p["fifo"]:
                    fifo |= act
            elif kind == "duplicate":
                duplicate |= act & (uniform_array(f.key, seq) < p["rate"])
            else:  # corrupt
                corrupt |= act & (uniform_array(f.key, seq) < p["rate"])
        live = ~dropped
        return RoundDecision(dropped, corrupt & live, duplicate & live, delay_ms / 1000.0, fifo)


def _sample(p: Mapping[str, Any], u: np.ndarray) -> np.ndarray:
    """The delay sampler of :mod:`node._links` on every uniform (milliseconds)."""
    dist = p["distribution"]
    if dist == "constant":
        return np.full(len(u), float(p["ms"]))
    if dist == "uniform":
        return p["low_ms"] + (p["high_ms"] - p["low_ms"]) * u
    one = _delay_sampler(p)  # the scalar inverse CDF itself, so that every bit agrees
    return np.array([one(v) for v in u.tolist()], dtype=float)


def rounds_lag(delay_s: np.ndarray, period_s: float) -> np.ndarray:
    """Whole round periods of each delay, as :meth:`node._receiver.Receiver.accept` counts."""
    lag = np.floor(delay_s / period_s + 1e-9)
    return np.where(delay_s > 0.0, lag, 0.0).astype(np.int64)
