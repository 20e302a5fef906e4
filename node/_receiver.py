"""The receiving side of one agent, sans IO: validation, accounting, fault models, inboxes.

Both the agent process (:mod:`node._runtime`) and the in-process lockstep runner feed it
the very same frames and read the very same inboxes, which is why a lockstep run and a
multi-process rounds run with one seed agree exactly.

Rules:

* every data frame is counted exactly once per (in-link, sender epoch): delivered (made
  visible to the algorithm), dropped by injection, rejected, or still held at stop; sequence
  numbers never seen below the highest one seen are lost in transport;
* a frame from an old epoch is refused, a replayed sequence number is refused;
* nothing from the network is trusted (a checksum is no authentication): only epochs the
  coordinator announced for the sender (``announce``, from the peer table) are accepted, and
  a frame claiming the sender under another epoch, a non-finite state, or a sequence jump no
  real link makes, is *forged*: counted per in-link (``forged``) and otherwise ignored, so
  that one such frame changes nothing of the link (epoch, sequence, heard, inbox). A jump of
  more than ``_CONFIRM_JUMP`` is taken only once the very next frame continues from it (then the
  refused frame counts as lost in transport, not forged); beyond ``_MAX_SEQ_JUMP`` never;
* in rounds mode a message of iteration k becomes visible at round k + lag, where lag counts
  the whole round periods of its injected delay; in async mode at arrival + delay.
"""

from __future__ import annotations

import math
import zlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from node._algorithm import Received
from node._delaystats import DelayStats
from node._errors import WireError
from node._links import DELIVER, LinkFault, LinkModel
from node._wire import CRC_RESIDUE, DATA, PROBE, DataLayout

__all__ = ["COUNTER_FIELDS", "InLinkCounters", "Receiver"]

#: a sequence number this far past the highest seen is refused as implausible
_MAX_SEQ_JUMP = 1 << 20
#: a jump past this many sequence numbers must be confirmed by the frame after it
_CONFIRM_JUMP = 1 << 10
#: gaps up to this long remember their sequence numbers (for late arrivals)
_TRACKED_GAP = 1 << 16
#: below this many frames a batch is handled frame by frame
_BATCH = 16
_crc32 = zlib.crc32


@dataclass(slots=True)
class InLinkCounters:
    """What one agent saw on one in-link from one sender epoch (receiver side)."""

    #: frames that decoded and came from this sender epoch (probes excluded)
    received: int = 0
    #: messages the algorithm was allowed to see (duplicates not included)
    delivered: int = 0
    #: dropped by an injected fault (loss, burst loss, outage)
    dropped_injected: int = 0
    #: refused: corrupted (checksum), malformed, replayed, or from an old epoch
    rejected: int = 0
    #: extra copies made by an injected duplicate fault
    duplicated: int = 0
    #: sequence numbers never seen below the highest one seen (transport loss)
    lost_transport: int = 0
    #: highest sequence number seen, -1 if none
    max_seq: int = -1
    #: accepted but still held by a delay fault (becomes in-flight at stop)
    held: int = 0
    #: first sequence number seen from this epoch (a restarted receiver starts late)
    first_seq: int = 0
    #: the sequence numbers counted lost (a late arrival is moved to rejected)
    missing: set[int] = field(default_factory=set)
    #: delays of the delivered messages (s), in fixed memory (node._delaystats)
    delays: DelayStats = field(default_factory=DelayStats)

    def as_list(self) -> list[Any]:
        return [
            self.received,
            self.delivered,
            self.dropped_injected,
            self.rejected,
            self.duplicated,
            self.lost_transport,
            self.max_seq,
            self.held,
            self.first_seq,
        ]


COUNTER_FIELDS = (
    "received",
    "delivered",
    "dropped_injected",
    "rejected",
    "duplicated",
    "lost_transport",
    "max_seq",
    "held",
    "first_seq",
)


class _InLink:
    __slots__ = (
        "arrays",
        "candidate",
        "counters",
        "current",
        "epoch",
        "forged",
        "fresh",
        "heard",
        "keep_delays",
        "last_iter",
        "last_release",
        "latest",
        "model",
        "pending",
        "src",
        "stale",
    )

    def __init__(self, src: int, model: LinkModel, keep_delays: bool = False) -> None:
        self.src = src
        self.model = model
        #: keep every delay too ([telemetry].delay_samples)
        self.keep_delays = keep_delays
        self.epoch = -1  # unknown until the peer table says
        self.counters: dict[int, InLinkCounters] = {}
        #: counters of the current epoch once a message of it arrived (the fast path's)
        self.current: InLinkCounters | None = None
        self.heard = False
        self.latest: Any = None  # (iteration, raw payload) of the newest visible message
        self.arrays: dict[str, np.ndarray] | None = None
        self.fresh = False
        #: held messages: (release key, seq, iteration, raw payload, send_time)
        self.pending: list[tuple[float, int, int, dict, float, bool, InLinkCounters]] = []
        #: highest iteration of any message seen from the current epoch (dropped ones too)
        self.last_iter = -1
        self.last_release = 0.0
        #: rounds mode: gave up waiting for this neighbour; not awaited until it speaks
        self.stale = False
        #: frames claiming this sender that it never sent as such (see the module rules)
        self.forged = 0
        #: (epoch, seq) of a refused long jump, taken if the next frame continues from it
        self.candidate: tuple[int, int] | None = None

    def set_epoch(self, epoch: int) -> None:
        """A newer incarnation of the sender: its messages start new counters."""
        if epoch > self.epoch:
            self.epoch = epoch
            self.current = self.counters.get(epoch)
            self.last_iter = -1

    def cur(self) -> InLinkCounters:
        c = self.counters.get(self.epoch)
        if c is None:
            c = self.counters[self.epoch] = InLinkCounters(delays=DelayStats(self.keep_delays))
        return c


class Receiver:
    """All in-links of one agent."""

    def __init__(
        self,
        agent: int,
        in_neighbours: Sequence[int],
        sizes: Mapping[str, int],
        *,
        seed: int,
        mode: str,
        period_s: float,
        keep_delays: bool = False,
    ) -> None:
        self.agent = agent
        self.sizes = dict(sizes)
        self.layout = DataLayout(self.sizes)
        self.asynchronous = mode == "async"
        self.mode = mode
        self.period = period_s
        #: the run's start on this agent's clock (time windows of faults count from it)
        self.start = 0.0
        self.unattributed_rejected = 0
        self.inlinks: dict[int, _InLink] = {
            j: _InLink(j, LinkModel(seed, j, agent), keep_delays) for j in in_neighbours
        }

    def add_fault(self, entry: Mapping[str, Any]) -> None:
        """Arm a fault directive entry ``{"fault": wire dict, "from": [senders]}``."""
        fault = LinkFault.from_wire(entry["fault"])
        for src in entry["from"]:
            link = self.inlinks.get(int(src))
            if link is not None:
                link.model.add(fault)

    def remove_fault(self, index: int, senders: Sequence[int]) -> None:
        for src in senders:
            link = self.inlinks.get(int(src))
            if link is not None:
                link.model.remove(index)

    def announce(self, sender: int, epoch: int) -> bool:
        """The coordinator says ``sender`` now runs as ``epoch`` (its peer table); True when
        that is a newer incarnation than known (its frames are accepted from now on)."""
        link = self.inlinks.get(sender)
        if link is None or epoch <= link.epoch:
            return False
        link.set_epoch(epoch)
        link.candidate = None
        return True

    def forged_by_link(self) -> dict[int, int]:
        return {j: link.forged for j, link in self.inlinks.items() if link.forged}

    def all_heard(self) -> bool:
        return all(link.heard for link in self.inlinks.values())

    def on_frame(self, frame: bytes, now: float) -> None:
        """One data frame: validate, account, pass through the link model."""
        try:
            kind, sender, epoch, seq, iteration, send_time, payload = self.layout.decode(frame)
        except WireError:
            self.unattributed_rejected += 1
            return
        link = self.inlinks.get(sender)
        if link is None:
            self.unattributed_rejected += 1
            return
        c = link.current
        if kind == DATA and c is not None and epoch == link.epoch and seq == c.max_seq + 1:
            # The common case, kept short: the next message of the current incarnation.
            if not self.layout.finite(payload):
                link.forged += 1
                return
            c.received += 1
            c.max_seq = seq
            # the real sequence went on: a refused long jump is no longer "the frame before"
            link.candidate = None
            if iteration > link.last_iter:
                link.last_iter = iteration
            link.stale = False  # (heard is already set: the first message took the long path)
            d = link.model.decide(seq, iteration, now - self.start)
            if d is DELIVER:
                if self.asynchronous and not link.pending:
                    link.latest = (iteration, payload)
                    link.arrays = None
                    link.fresh = True
                    c.delivered += 1
                    c.delays.append(now - send_time)
                else:
                    self.accept(link, c, seq, iteration, payload, send_time, now, 0.0, False)
            else:
                self._decided(d, link, c, frame, seq, iteration, payload, send_time, now)
            return
        if kind == PROBE:
            if epoch == link.epoch:
                link.heard = True
            return
        c = link.counters.get(epoch)
        if epoch > link.epoch or (c is None and epoch < link.epoch):
            # An incarnation the coordinator never announced (or one never heard that is
            # gone already): no frame of it can be real.
            link.forged += 1
            return
        if not self.layout.finite(payload):
            link.forged += 1  # a non-finite state: no agent publishes one (it stops first)
            return
        if c is not None and c.max_seq >= 0 and seq - c.max_seq > _CONFIRM_JUMP:
            # No real link skips a million messages in one step, and a long jump is taken
            # only when the next frame continues from it: one forged header would otherwise
            # turn every later real frame into a "replay".
            if seq - c.max_seq > _MAX_SEQ_JUMP or link.candidate != (epoch, seq - 1):
                link.candidate = (epoch, seq)
                link.forged += 1
                return
            # The refused frame was real after all: counted lost in transport (the gap).
            link.forged -= 1
            link.candidate = None
        if c is None:
            c = link.counters[epoch] = InLinkCounters(
                first_seq=seq, delays=DelayStats(link.keep_delays)
            )
        if epoch == link.epoch:
            link.current = c
        c.received += 1
        if seq <= c.max_seq:  # replayed or reordered by the transport: refuse
            c.rejected += 1
            if seq in c.missing:  # it arrived after all: refused, not lost
                c.missing.discard(seq)
                c.lost_transport -= 1
            return
        gap = seq - c.max_seq - 1
        if gap:
            c.lost_transport += gap
            if gap <= _TRACKED_GAP:
                c.missing.update(range(c.max_seq + 1, seq))
        c.max_seq = seq
        if epoch < link.epoch:  # queued by an incarnation that is gone: refuse
            c.rejected += 1
            return
        link.heard = True
        link.stale = False
        if iteration > link.last_iter:
            link.last_iter = iteration
        d = link.model.decide(seq, iteration, now - self.start)
        if d is DELIVER:
            self.accept(link, c, seq, iteration, payload, send_time, now, 0.0, False)
            return
        self._decided(d, link, c, frame, seq, iteration, payload, send_time, now)

    def _decided(
        self,
        d: Any,
        link: _InLink,
        c: InLinkCounters,
        frame: bytes,
        seq: int,
        iteration: int,
        payload: Any,
        send_time: float,
        now: float,
    ) -> None:
        """Obey a fault decision other than plain delivery."""
        if not d.deliver:
            c.dropped_injected += 1
            return
        if d.corrupt:
            try:
                self.layout.decode(link.model.corrupt_frame(frame, seq))
            except WireError:
                c.rejected += 1
                return
            # The checksum makes this unreachable; refuse anyway rather than trust it.
            c.rejected += 1
            return
        self.accept(link, c, seq, iteration, payload, send_time, now, d.delay_s, d.fifo)
        for _ in range(d.copies - 1):
            c.duplicated += 1
            self.accept(
                link, c, seq, iteration, payload, send_time, now, d.delay_s, d.fifo, duplicate=True
            )

    def on_frames(self, frames: list[bytes], now: float) -> None:
        """A batch of frames in arrival order: the same outcome as ``on_frame`` on each.

        Async mode, fast layout, fault-free in-links, consecutive sequence numbers of the
        current incarnation: checked and counted with a few numpy operations per batch
        (the checksum still runs on every frame). Anything else goes frame by frame.
        """
        if len(frames) < _BATCH or not self.asynchronous:
            for f in frames:
                self.on_frame(f, now)
            return
        layout = self.layout
        size = layout.length
        if any(len(f) != size for f in frames) or any(_crc32(f) != CRC_RESIDUE for f in frames):
            for f in frames:
                self.on_frame(f, now)
            return
        buf = b"".join(frames)
        u8 = np.frombuffer(buf, dtype=np.uint8).reshape(len(frames), size)
        pos, expected = layout.skeleton
        head = np.frombuffer(buf, dtype=layout.dtype)
        ok = (u8[:, pos] == expected).all(axis=1) & (head["kind"] == DATA)
        ok &= layout.finite_rows(u8)
        senders = head["sender"]
        for sender in np.unique(senders).tolist():
            idx = np.flatnonzero(senders == sender)
            link = self.inlinks.get(sender)
            c = None if link is None else link.current
            rows = head[idx]
            seqs = rows["seq"]
            if (
                c is None
                or link.pending
                or link.model.faults
                or not ok[idx].all()
                or not np.isfinite(rows["send_time"]).all()
                or (rows["epoch"] != link.epoch).any()
                or int(seqs[0]) != c.max_seq + 1
                or (len(seqs) > 1 and (np.diff(seqs) != 1).any())
            ):
                for i in idx.tolist():
                    self.on_frame(frames[i], now)
                continue
            n = len(idx)
            c.received += n
            c.delivered += n
            c.max_seq = int(seqs[-1])
            it = int(rows["iteration"].max())
            if it > link.last_iter:
                link.last_iter = it
            link.stale = False
            c.delays.extend((now - rows["send_time"]).tolist())
            last = int(idx[-1])
            link.latest = (int(rows["iteration"][-1]), frames[last])
            link.arrays = None
            link.fresh = True

    def accept(
        self,
        link: _InLink,
        c: InLinkCounters,
        seq: int,
        iteration: int,
        raw: dict,
        send_time: float,
        now: float,
        delay_s: float,
        fifo: bool,
        duplicate: bool = False,
    ) -> None:
        if self.mode == "rounds":
            # Delays count in rounds: a delay shorter than one round period arrives in time.
            # (the small epsilon keeps an exact multiple of the period from losing a round)
            lag = math.floor(delay_s / self.period + 1e-9) if delay_s > 0.0 else 0
            key = float(iteration + lag)
        else:
            key = now + delay_s
        if fifo and key < link.last_release:
            key = link.last_release
        link.last_release = max(link.last_release, key)
        if self.mode == "async" and delay_s == 0.0 and not link.pending:
            self.make_visible(link, c, iteration, raw, send_time, now, duplicate)
            return
        link.pending.append((key, seq, iteration, raw, send_time, duplicate, c))
        if not duplicate:
            c.held += 1

    def make_visible(
        self,
        link: _InLink,
        c: InLinkCounters,
        iteration: int,
        raw: dict,
        send_time: float,
        now: float,
        duplicate: bool,
    ) -> None:
        link.latest = (iteration, raw)
        link.arrays = None
        link.fresh = True
        if not duplicate:
            c.delivered += 1
            c.delays.append(now - send_time)

    def release(self, bound: float, now: float) -> None:
        """Make visible every held message whose release key is <= bound."""
        for link in self.inlinks.values():
            pending = link.pending
            if not pending:
                continue
            if len(pending) == 1:  # the common case: this round's message, no delay
                p = pending[0]
                if p[0] > bound:
                    continue
                link.pending = []
                ready = [p]
            else:
                ready = [p for p in pending if p[0] <= bound]
                if not ready:
                    continue
                link.pending = [p for p in pending if p[0] > bound]
                ready.sort(key=lambda p: (p[0], p[1]))
            rounds = self.mode == "rounds"
            for key, _seq, iteration, raw, send_time, dup, c in ready:
                if not dup:
                    c.held -= 1
                # Async: the key is when the link delivered it (arrival plus injected delay);
                # the receiver's own step grid is no part of the link's delay.
                at = now if rounds else key
                self.make_visible(link, c, iteration, raw, send_time, at, dup)

    def inbox(self) -> dict[int, Received]:
        box = {}
        for j, link in self.inlinks.items():
            if link.latest is None:
                continue
            if link.arrays is None:
                link.arrays = self.layout.arrays(link.latest[1])
            box[j] = Received(link.latest[0], link.arrays, link.fresh)
            link.fresh = False
        return box

    # -- telemetry ---------------------------------------------------------------------
    def link_report(self, with_delays: bool = False) -> dict[int, Any]:
        out: dict[int, Any] = {}
        for j, link in self.inlinks.items():
            per = {}
            for ep, c in link.counters.items():
                row: list[Any] = c.as_list()
                row += c.delays.summary_ms()
                if with_delays:
                    row.append(c.delays.values or [])
                per[ep] = row
            out[j] = per
        return out

    def neighbour_age(self, iteration: int) -> float:
        """Mean age, in iterations, of the neighbour information used at the last step."""
        ages = [iteration - link.latest[0] for link in self.inlinks.values() if link.latest]
        return float(np.mean(ages)) if ages else 0.0
