"""Per-in-link fault models: pure decisions the runtime only obeys.

Rules (the runtime, the lockstep runner and the tests rely on them):

* A :class:`LinkModel` belongs to one directed link ``src -> dst`` and holds the faults
  currently applied to it. ``decide(seq, iteration, now_s)`` returns a :class:`Decision`
  for the message with per-link sequence number ``seq``.
* Every random choice is a pure function of (seed, src, dst, fault index, seq, purpose)
  through :func:`node._rng.stream_key` and :func:`node._rng.uniform`: the same seed drops,
  delays, duplicates and corrupts the same messages whatever the call order or the process
  scheduling. No Generator is consumed per message.
* Windows: an iteration window tests the *message's* iteration (so rounds mode repeats
  exactly); a time window tests ``now_s``, seconds since the run's start. Both are
  half-open, ``start <= t < end``; an end of None lasts until the end of the run.
* Several active faults: an outage or any loss that fires drops the message, and the cause
  is the first dropping fault in index order; otherwise delays add up, a duplicate sets
  ``copies = 2`` and a corrupt sets ``corrupt = True``.
* Gilbert–Elliott (Gilbert, BSTJ 39 (1960); Elliott, BSTJ 42 (1963)) is a Markov chain over
  the link's sequence numbers: good at seq 0, one transition per seq, inside or outside the
  fault's window and through seqs never seen. Its state at seq n depends on (seed, link,
  fault index, n) only.
"""

from __future__ import annotations

import json
import math
import numbers
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from statistics import NormalDist
from typing import Any

from node._rng import stream_key, uniform
from topologies._errors import ScenarioError

__all__ = [
    "DELAY_MAX_MS",
    "DELIVER",
    "FAULT_KINDS",
    "Decision",
    "LinkFault",
    "LinkModel",
    "corrupt_bytes",
    "validate_fault_params",
]

#: link fault kinds this module decides (process faults belong to the coordinator)
FAULT_KINDS = ("loss", "burst-loss", "delay", "duplicate", "corrupt", "outage")
DELAY_DISTRIBUTIONS = ("constant", "uniform", "normal", "lognormal", "pareto")

# Purposes: the last part of every stream key, so that each kind of draw is independent.
_P_LOSS = 1
_P_DUPLICATE = 2
_P_CORRUPT = 3
_P_DELAY = 4
_P_JITTER = 5
_P_GE_STEP = 6
_P_GE_LOSS = 7
_P_CORRUPT_BYTES = 8
# Stands in for a fault index in link-level keys; fault indices are kept below it.
_LINK_PART = 1 << 32

_STD_NORMAL = NormalDist()
_TINY = 2.0**-54  # replaces u = 0 where an inverse CDF needs an open interval
_ONE_MINUS = 1.0 - 2.0**-53

_WIRE_KEYS = frozenset(
    {"index", "kind", "params", "start_s", "end_s", "start_iteration", "end_iteration"}
)


# ---------------------------------------------------------------------------- validation
#
# The one validator of link-fault parameters: the scenario loader calls it for every link
# [[fault]] table, and LinkFault calls it for every directive an agent receives, so the two
# can never disagree. Messages read "<where>: <key>: expected ..., got ...", where ``where``
# locates the fault, e.g. "dock.toml: [[fault]] #2".

#: the largest delay one fault may draw, in ms: delays of several faults add up and are
#: counted in whole rounds, and both must stay finite (float64 overflows at 1.8e308)
DELAY_MAX_MS = 1e100


def _show(v: Any) -> str:
    """A value as a scenario spells it, shortened."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, numbers.Integral):
        return str(int(v))
    if isinstance(v, numbers.Real):
        return repr(float(v))
    if isinstance(v, str):
        text = json.dumps(v, ensure_ascii=False)
        return text if len(text) <= 60 else text[:56] + '..."'
    if isinstance(v, Mapping):
        return "a table"
    text = repr(v)
    return text if len(text) <= 60 else text[:56] + "..."


def _range_text(lo: float, lo_open: bool, hi: float, hi_open: bool) -> str:
    if math.isinf(hi):
        return f"a number {'>' if lo_open else '>='} {lo:g}"
    return f"a number in {'(' if lo_open else '['}{lo:g}, {hi:g}{')' if hi_open else ']'}"


def _number(
    params: Mapping[str, Any],
    key: str,
    where: str,
    *,
    lo: float = -math.inf,
    lo_open: bool = False,
    hi: float = math.inf,
    default: float | None = None,
) -> float:
    """``params[key]`` as a float in the range (or ``default`` when absent and not None)."""
    expected = _range_text(lo, lo_open, hi, False) if lo > -math.inf else "a number"
    if key not in params:
        if default is None:
            raise ScenarioError(f"{where}: {key}: missing; expected {expected}")
        return default
    v = params[key]
    if isinstance(v, bool) or not isinstance(v, numbers.Real):
        raise ScenarioError(f"{where}: {key}: expected {expected}, got {_show(v)}")
    x = float(v)
    if not math.isfinite(x):
        raise ScenarioError(f"{where}: {key}: expected a finite number, got {_show(v)}")
    if (x <= lo if lo_open else x < lo) or x > hi:
        raise ScenarioError(f"{where}: {key}: expected {expected}, got {_show(v)}")
    return x


def _no_extra(params: Mapping[str, Any], allowed: set[str], where: str, what: str) -> None:
    extra = sorted(set(params) - allowed, key=str)
    if extra:
        keys = ", ".join(sorted(allowed)) if allowed else "none"
        raise ScenarioError(
            f"{where}: {extra[0]}: unknown parameter for {what}; expected only: {keys}"
        )


def validate_fault_params(kind: str, params: Mapping[str, Any], where: str) -> dict[str, Any]:
    """Check one link fault's parameters and return them with every default filled.

    ``params`` holds only the kind's own parameters (not ``kind``, ``links`` or the window);
    ``where`` locates the fault, e.g. ``"dock.toml: [[fault]] #2"``, and every message reads
    ``"<where>: <key>: expected ..., got ..."``. Raises :class:`ScenarioError`.

    loss, duplicate, corrupt: ``rate`` in [0, 1]. burst-loss: ``p_enter``, ``p_leave`` in
    (0, 1], ``loss_good`` (0.0) and ``loss_bad`` (1.0) in [0, 1]. delay: ``distribution`` and
    its parameters in milliseconds, ``jitter_ms`` >= 0 (0.0), ``fifo`` (False); the largest
    delay it can draw must be at most :data:`DELAY_MAX_MS`. outage: none. A degenerate
    distribution (uniform with ``high_ms == low_ms``, lognormal with ``sigma == 0``) is a
    constant delay and is accepted.
    """
    if not isinstance(params, Mapping):
        raise ScenarioError(f"{where}: expected a table of parameters, got {_show(params)}")
    if kind in ("loss", "duplicate", "corrupt"):
        _no_extra(params, {"rate"}, where, kind)
        return {"rate": _number(params, "rate", where, lo=0.0, hi=1.0)}
    if kind == "burst-loss":
        _no_extra(params, {"p_enter", "p_leave", "loss_good", "loss_bad"}, where, kind)
        return {
            "p_enter": _number(params, "p_enter", where, lo=0.0, lo_open=True, hi=1.0),
            "p_leave": _number(params, "p_leave", where, lo=0.0, lo_open=True, hi=1.0),
            "loss_good": _number(params, "loss_good", where, lo=0.0, hi=1.0, default=0.0),
            "loss_bad": _number(params, "loss_bad", where, lo=0.0, hi=1.0, default=1.0),
        }
    if kind == "outage":
        _no_extra(params, set(), where, kind)
        return {}
    if kind == "delay":
        return _validate_delay(params, where)
    raise ScenarioError(
        f"{where}: kind: expected one of {', '.join(FAULT_KINDS)}, got {_show(kind)}"
    )


def _validate_delay(params: Mapping[str, Any], where: str) -> dict[str, Any]:
    dist = params.get("distribution")
    if dist not in DELAY_DISTRIBUTIONS:
        raise ScenarioError(
            f"{where}: distribution: expected one of {', '.join(DELAY_DISTRIBUTIONS)},"
            f" got {_show(dist)}"
        )
    out: dict[str, Any] = {"distribution": dist}
    if dist == "constant":
        own = ("ms",)
        out["ms"] = _number(params, "ms", where, lo=0.0)
    elif dist == "uniform":
        own = ("low_ms", "high_ms")
        low = out["low_ms"] = _number(params, "low_ms", where, lo=0.0)
        if "high_ms" in params and _number(params, "high_ms", where, lo=0.0) < low:
            raise ScenarioError(
                f"{where}: high_ms: expected a number >= low_ms = {low:g},"
                f" got {_show(params['high_ms'])}"
            )
        out["high_ms"] = _number(params, "high_ms", where, lo=0.0)
    elif dist == "normal":
        own = ("mean_ms", "sd_ms")
        out["mean_ms"] = _number(params, "mean_ms", where)
        out["sd_ms"] = _number(params, "sd_ms", where, lo=0.0, lo_open=True)
    elif dist == "lognormal":
        own = ("median_ms", "sigma")
        out["median_ms"] = _number(params, "median_ms", where, lo=0.0, lo_open=True)
        out["sigma"] = _number(params, "sigma", where, lo=0.0)
    else:  # pareto
        own = ("scale_ms", "shape")
        out["scale_ms"] = _number(params, "scale_ms", where, lo=0.0, lo_open=True)
        out["shape"] = _number(params, "shape", where, lo=0.0, lo_open=True)
    _no_extra(params, {*own, "distribution", "jitter_ms", "fifo"}, where, f"delay {dist}")
    out["jitter_ms"] = _number(params, "jitter_ms", where, lo=0.0, default=0.0)
    fifo = params.get("fifo", False)
    if not isinstance(fifo, bool):
        raise ScenarioError(f"{where}: fifo: expected true or false, got {_show(fifo)}")
    out["fifo"] = fifo
    # The inverse CDF is increasing: its largest draw is at the largest u the streams give.
    try:
        largest = _delay_sampler(out)(_ONE_MINUS) + out["jitter_ms"]
    except OverflowError:
        largest = math.inf
    if not largest <= DELAY_MAX_MS:
        key = "jitter_ms" if out["jitter_ms"] > DELAY_MAX_MS / 2 else own[-1]
        raise ScenarioError(
            f"{where}: {key}: this delay can draw {largest:.3g} ms; expected every draw to be"
            f" at most {DELAY_MAX_MS:g} ms (delays add up and are counted in rounds, and"
            " must stay finite numbers)"
        )
    return out


def _window_bound(value: Any, where: str, integer: bool) -> Any:
    if value is None:
        return None
    if integer:
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            raise ScenarioError(f"{where}: expected a non-negative integer, got {value!r}")
        return value
    if (
        isinstance(value, bool)
        or not isinstance(value, int | float)
        or not math.isfinite(value)
        or value < 0
    ):
        raise ScenarioError(f"{where}: expected a non-negative number of seconds, got {value!r}")
    return float(value)


# ---------------------------------------------------------------------------- records


@dataclass(frozen=True, slots=True, kw_only=True)
class LinkFault:
    """One link fault of the scenario, as applied to a link.

    ``index`` is the fault's position in the scenario's [[fault]] list and part of every
    random key it uses. At most one window kind is set: ``start_s``/``end_s`` (seconds since
    the run's start) or ``start_iteration``/``end_iteration`` (the message's iteration);
    with neither the fault is active for the whole run, and an end of None means until the
    end. Construction validates and normalizes ``params`` (defaults filled), raising
    :class:`ScenarioError`.
    """

    index: int
    kind: str
    params: Mapping[str, Any] = field(default_factory=dict, hash=False)
    start_s: float | None = None
    end_s: float | None = None
    start_iteration: int | None = None
    end_iteration: int | None = None

    def __post_init__(self) -> None:
        where = f"[[fault]] #{self.index}"
        if isinstance(self.index, bool) or not isinstance(self.index, int):
            raise ScenarioError(f"fault index: expected an integer, got {self.index!r}")
        if not 0 <= self.index < _LINK_PART:
            raise ScenarioError(f"{where}: index expected in [0, 2**32), got {self.index}")
        if self.kind not in FAULT_KINDS:
            raise ScenarioError(
                f"{where}: kind: expected one of {', '.join(FAULT_KINDS)}, got {self.kind!r}"
            )
        object.__setattr__(self, "params", validate_fault_params(self.kind, self.params, where))
        s0 = _window_bound(self.start_s, f"{where}: start_s", False)
        s1 = _window_bound(self.end_s, f"{where}: end_s", False)
        i0 = _window_bound(self.start_iteration, f"{where}: start_iteration", True)
        i1 = _window_bound(self.end_iteration, f"{where}: end_iteration", True)
        object.__setattr__(self, "start_s", s0)
        object.__setattr__(self, "end_s", s1)
        if (s0 is not None or s1 is not None) and (i0 is not None or i1 is not None):
            raise ScenarioError(
                f"{where}: expected a time window (start_s/end_s) or an iteration window "
                "(start_iteration/end_iteration), not both"
            )
        for lo, hi, name in ((s0, s1, "s"), (i0, i1, "iteration")):
            if hi is not None and lo is None:
                raise ScenarioError(f"{where}: end_{name}: given without start_{name}")
            if hi is not None and hi < lo:
                raise ScenarioError(
                    f"{where}: end_{name}: expected at least start_{name} = {lo}, got {hi}"
                )

    @property
    def by_iteration(self) -> bool:
        """Whether the window counts message iterations (else seconds)."""
        return self.start_iteration is not None

    def active(self, iteration: int, now_s: float) -> bool:
        """Whether a message of ``iteration`` received at ``now_s`` falls inside the window."""
        if self.start_iteration is not None:
            end = self.end_iteration
            return self.start_iteration <= iteration and (end is None or iteration < end)
        if self.start_s is not None:
            end_s = self.end_s
            return self.start_s <= now_s and (end_s is None or now_s < end_s)
        return True

    def to_wire(self) -> dict[str, Any]:
        """A plain msgpack-able dict; :meth:`from_wire` rebuilds an equal fault."""
        return {
            "index": self.index,
            "kind": self.kind,
            "params": dict(self.params),
            "start_s": self.start_s,
            "end_s": self.end_s,
            "start_iteration": self.start_iteration,
            "end_iteration": self.end_iteration,
        }

    @classmethod
    def from_wire(cls, d: Mapping[str, Any], *, where: str = "fault directive") -> LinkFault:
        """Rebuild a fault from :meth:`to_wire`'s dict; ScenarioError names ``where``."""
        if not isinstance(d, Mapping):
            raise ScenarioError(f"{where}: expected a mapping, got {type(d).__name__}")
        extra = sorted(set(d) - _WIRE_KEYS, key=str)
        if extra:
            raise ScenarioError(
                f"{where}: unknown key {extra[0]!r}; expected only {', '.join(sorted(_WIRE_KEYS))}"
            )
        for key in ("index", "kind"):
            if key not in d:
                raise ScenarioError(f"{where}: missing key {key!r}")
        params = d.get("params", {})
        if not isinstance(params, Mapping):
            raise ScenarioError(f"{where}: params: expected a mapping, got {params!r}")
        try:
            return cls(
                index=d["index"],
                kind=d["kind"],
                params=params,
                start_s=d.get("start_s"),
                end_s=d.get("end_s"),
                start_iteration=d.get("start_iteration"),
                end_iteration=d.get("end_iteration"),
            )
        except ScenarioError as exc:
            raise ScenarioError(f"{where}: {exc}") from None


@dataclass(frozen=True, slots=True)
class Decision:
    """What the runtime does with one received message.

    ``deliver`` False means dropped by injection (then the other fields are neutral);
    ``copies`` 2 means the algorithm sees it twice; ``delay_s`` is an extra hold before the
    algorithm may see it; ``corrupt`` asks the runtime to flip bytes before decoding
    (:meth:`LinkModel.corrupt_frame`); ``fifo`` asks it to keep the link's order when
    delaying; ``cause`` is the index of the fault that dropped the message, else of the
    first fault that acted on it, else None.
    """

    deliver: bool
    copies: int
    delay_s: float
    corrupt: bool
    fifo: bool
    cause: int | None


#: the untouched decision, shared so the fault-free path allocates nothing
DELIVER = Decision(True, 1, 0.0, False, False, None)


# ---------------------------------------------------------------------------- models


class _Chain:
    """Gilbert–Elliott state over seqs: a forward cursor plus a checkpoint every 64 seqs.

    Any seq up to the largest one reached costs at most 64 steps; a larger one advances
    the cursor through every seq in between (transport losses included).
    """

    __slots__ = ("bad", "enter", "key", "leave", "marks", "seq")

    _EVERY = 64

    def __init__(self, key: int, p_enter: float, p_leave: float) -> None:
        self.key = key
        self.enter = p_enter
        self.leave = p_leave
        self.seq = 0
        self.bad = False
        # marks[j] is the state at seq j * _EVERY; seq 0 is good by definition
        self.marks = bytearray(1)

    def bad_at(self, n: int) -> bool:
        """State at seq n (True = bad)."""
        s = self.seq
        if n == s:
            return self.bad
        every = self._EVERY
        marks = self.marks
        j = n // every
        if n < s or (j < len(marks) and j * every > s):
            if n < 0:
                raise ValueError(f"sequence number must be non-negative, got {n}")
            s = j * every
            bad = bool(marks[j])
        else:
            bad = self.bad
        key, enter, leave = self.key, self.enter, self.leave
        while s < n:
            s += 1
            u = uniform(key, s)
            bad = u >= leave if bad else u < enter
            if s % every == 0 and s // every == len(marks):
                marks.append(bad)
        self.seq = s
        self.bad = bad
        return bad


_OUTAGE, _LOSS, _BURST, _DELAY, _DUPLICATE, _CORRUPT = range(6)
_CODES = {
    "outage": _OUTAGE,
    "loss": _LOSS,
    "burst-loss": _BURST,
    "delay": _DELAY,
    "duplicate": _DUPLICATE,
    "corrupt": _CORRUPT,
}


def _delay_sampler(p: Mapping[str, Any]) -> Callable[[float], float]:
    """Inverse CDF in milliseconds of the configured distribution, u in [0, 1)."""
    dist = p["distribution"]
    if dist == "constant":
        ms = p["ms"]
        return lambda u: ms
    if dist == "uniform":
        low, width = p["low_ms"], p["high_ms"] - p["low_ms"]
        return lambda u: low + width * u
    if dist == "normal":
        mean, sd = p["mean_ms"], p["sd_ms"]
        # Truncation at zero by inverse CDF, on the upper tail: X = mean - sd * inv(S0 * v),
        # S0 = P(X > 0), v = 1 - u in (0, 1]; accurate also when S0 is tiny (negative mean).
        s0 = 0.5 * math.erfc(-mean / (sd * math.sqrt(2.0)))  # erfc keeps the far tail
        inv = _STD_NORMAL.inv_cdf

        def normal(u: float) -> float:
            q = min(max(s0 * (1.0 - u), 5e-324), _ONE_MINUS)
            return max(0.0, mean - sd * inv(q))

        return normal
    if dist == "lognormal":
        median, sigma = p["median_ms"], p["sigma"]
        inv = _STD_NORMAL.inv_cdf
        return lambda u: median * math.exp(sigma * inv(u if u > 0.0 else _TINY))
    scale, exponent = p["scale_ms"], -1.0 / p["shape"]  # classic Pareto, minimum scale_ms
    return lambda u: scale * (1.0 - u) ** exponent


class _Compiled:
    """A fault with its window, keys and thresholds resolved for the hot path."""

    __slots__ = (
        "by_iter",
        "chain",
        "code",
        "dropped",
        "fault",
        "fifo",
        "hi",
        "index",
        "jitter_ms",
        "key",
        "key2",
        "lo",
        "loss_bad",
        "loss_good",
        "rate",
        "sample",
    )

    def __init__(self, fault: LinkFault, seed: int, src: int, dst: int) -> None:
        p = fault.params
        i = fault.index
        self.fault = fault
        self.index = i
        self.code = _CODES[fault.kind]
        self.by_iter = fault.start_iteration is not None
        if self.by_iter:
            self.lo = fault.start_iteration
            self.hi = math.inf if fault.end_iteration is None else fault.end_iteration
        else:
            self.lo = -math.inf if fault.start_s is None else fault.start_s
            self.hi = math.inf if fault.end_s is None else fault.end_s
        self.dropped = Decision(False, 1, 0.0, False, False, i)
        self.rate = p.get("rate", 0.0)
        self.key = self.key2 = 0
        self.chain: _Chain | None = None
        self.sample: Callable[[float], float] | None = None
        self.jitter_ms = 0.0
        self.fifo = False
        self.loss_good = self.loss_bad = 0.0
        code = self.code
        if code == _LOSS:
            self.key = stream_key(seed, src, dst, i, _P_LOSS)
        elif code == _DUPLICATE:
            self.key = stream_key(seed, src, dst, i, _P_DUPLICATE)
        elif code == _CORRUPT:
            self.key = stream_key(seed, src, dst, i, _P_CORRUPT)
        elif code == _BURST:
            self.chain = _Chain(
                stream_key(seed, src, dst, i, _P_GE_STEP), p["p_enter"], p["p_leave"]
            )
            self.key = stream_key(seed, src, dst, i, _P_GE_LOSS)
            self.loss_good, self.loss_bad = p["loss_good"], p["loss_bad"]
        elif code == _DELAY:
            self.key = stream_key(seed, src, dst, i, _P_DELAY)
            self.key2 = stream_key(seed, src, dst, i, _P_JITTER)
            self.sample = _delay_sampler(p)
            self.jitter_ms = p["jitter_ms"]
            self.fifo = p["fifo"]


class LinkModel:
    """The faults of one directed link ``src -> dst`` and the decisions they make.

    ``decide`` is deterministic in (seed, src, dst, the faults, seq, iteration, now_s): call
    order, repeated calls and skipped seqs never change a decision.
    """

    __slots__ = ("_compiled", "_corrupt_key", "dst", "seed", "src")

    def __init__(self, seed: int, src: int, dst: int, faults: Sequence[LinkFault] = ()) -> None:
        self.seed = seed
        self.src = src
        self.dst = dst
        self._compiled: tuple[_Compiled, ...] = ()
        self._corrupt_key = stream_key(seed, src, dst, _LINK_PART, _P_CORRUPT_BYTES)
        for f in faults:
            self.add(f)

    @property
    def faults(self) -> tuple[LinkFault, ...]:
        """The applied faults in index order."""
        return tuple(c.fault for c in self._compiled)

    def add(self, fault: LinkFault) -> None:
        """Apply ``fault``; one with the same index is replaced (so a re-sent directive is
        harmless, and an identical one keeps its cached Gilbert–Elliott state)."""
        kept = [c for c in self._compiled if c.index != fault.index]
        same = [c for c in self._compiled if c.index == fault.index and c.fault == fault]
        kept.append(same[0] if same else _Compiled(fault, self.seed, self.src, self.dst))
        kept.sort(key=lambda c: c.index)
        self._compiled = tuple(kept)

    def remove(self, index: int) -> bool:
        """Lift the fault with ``index``; False if none was applied (removal is idempotent)."""
        kept = tuple(c for c in self._compiled if c.index != index)
        found = len(kept) != len(self._compiled)
        self._compiled = kept
        return found

    def corrupt_frame(self, frame: bytes, seq: int) -> bytes:
        """:func:`corrupt_bytes` with this link's key: what to do when ``corrupt`` is set."""
        return corrupt_bytes(frame, self._corrupt_key, seq)

    def decide(self, seq: int, iteration: int, now_s: float) -> Decision:
        """The decision for message ``seq`` (its ``iteration``, received at ``now_s``)."""
        compiled = self._compiled
        if not compiled:
            return DELIVER
        acted: int | None = None
        copies = 1
        delay_ms = 0.0
        corrupt = fifo = False
        for c in compiled:
            code = c.code
            if code == _BURST:
                # advance the chain on every message, in the window or not, to spread its cost
                bad = c.chain.bad_at(seq)  # type: ignore[union-attr]
            t = iteration if c.by_iter else now_s
            if not c.lo <= t < c.hi:
                continue
            if code == _LOSS:
                if uniform(c.key, seq) < c.rate:
                    return c.dropped
            elif code == _OUTAGE:
                return c.dropped
            elif code == _BURST:
                loss = c.loss_bad if bad else c.loss_good
                if loss >= 1.0 or (loss > 0.0 and uniform(c.key, seq) < loss):
                    return c.dropped
            elif code == _DELAY:
                delay_ms += c.sample(uniform(c.key, seq))  # type: ignore[misc]
                if c.jitter_ms > 0.0:
                    delay_ms += c.jitter_ms * uniform(c.key2, seq)
                fifo = fifo or c.fifo
                if acted is None:
                    acted = c.index
            elif code == _DUPLICATE:
                if uniform(c.key, seq) < c.rate:
                    copies = 2
                    if acted is None:
                        acted = c.index
            elif uniform(c.key, seq) < c.rate:  # corrupt
                corrupt = True
                if acted is None:
                    acted = c.index
        if acted is None:
            return DELIVER
        return Decision(True, copies, delay_ms / 1000.0, corrupt, fifo, acted)


def corrupt_bytes(frame: bytes, key: int, seq: int) -> bytes:
    """``frame`` with 1 to 3 distinct bytes XORed by nonzero masks chosen from (key, seq).

    Pure and always different from ``frame``; an empty frame becomes one byte, so that it
    too differs.
    """
    n = len(frame)
    if n == 0:
        return b"\xff"
    sub = stream_key(key, seq)
    count = min(1 + int(uniform(sub, 0) * 3), n)
    picks: list[int] = []
    for i in range(count):
        # uniform over the positions not picked yet: step over the earlier picks in order
        r = int(uniform(sub, 1 + i) * (n - i))
        for p in sorted(picks):
            if r >= p:
                r += 1
        picks.append(r)
    buf = bytearray(frame)
    for i, pos in enumerate(picks):
        buf[pos] ^= 1 + int(uniform(sub, 4 + i) * 255)
    return bytes(buf)
