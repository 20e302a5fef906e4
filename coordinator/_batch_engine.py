"""The joint loop of the batch engine (see :mod:`coordinator._batch`): one block holding
every agent of every seed, one :class:`node._linkarrays.LinkArrays` for every directed link,
and each seed's samples, counters and final reports, handed to its coordinator.
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

from coordinator._lockstep import ROUNDS_PER_FLUSH, _round_limit
from coordinator._run import RunFailed
from node._algorithm import Block, BlockAlgorithm, Heard, algorithm_class
from node._linkarrays import LinkArrays, rounds_lag
from node._links import LinkFault
from node._runtime import DIVERGED, spec_from_plan

if TYPE_CHECKING:
    from coordinator._batch import BatchCoordinator

__all__ = ["Engine"]


class Engine:
    """The joint state of a batch: one block, one set of links, every seed's bookkeeping."""

    def __init__(self, coords: Sequence[BatchCoordinator]) -> None:
        self.coords = list(coords)
        first = coords[0]
        self.period = first.period_s
        self.limit = _round_limit(first.s.iterations, first.s.seconds, self.period)
        for c in coords[1:]:
            if (
                c.period_s != self.period
                or _round_limit(c.s.iterations, c.s.seconds, c.period_s) != self.limit
            ):
                raise RunFailed("a batch runs seeds of one scenario: period or budget differ")
        specs, group, self.offsets = [], [], []
        for s, c in enumerate(coords):
            self.offsets.append(len(specs))
            for i in range(c.n):
                specs.append(spec_from_plan(c.swarm.plan(i, 0)))
                group.append(s)
        self.offsets.append(len(specs))
        rows = {(g, sp.id): b for b, (g, sp) in enumerate(zip(group, specs, strict=True))}
        self.block = b = Block.of(specs, rows, group)
        self.group = np.asarray(group)
        self.alg: BlockAlgorithm = algorithm_class(first.swarm.algorithm["name"])(b)  # type: ignore[assignment]
        self.sizes = dict(self.alg.payload_sizes())
        if (b.link_src_row < 0).any():
            raise RunFailed("a batch block has a link from outside the block")
        dst_ids = b.ids[b.link_dst]
        seeds = [coords[g].s.seed for g in self.group[b.link_dst]]
        self.links = LinkArrays(seeds, b.link_src, dst_ids)
        self.link_of = {
            (int(g), int(src), int(dst)): li
            for li, (g, src, dst) in enumerate(
                zip(self.group[b.link_dst], b.link_src, dst_ids, strict=True)
            )
        }
        for s, c in enumerate(coords):
            c.engine, c.seed_index = self, s
            for dst, entries in c.swarm.armed_faults.items():
                for e in entries:
                    self.switch(s, dst, LinkFault.from_wire(e["fault"]), e["from"], True)
        tel = first.swarm.telemetry
        self.every_it = int(tel["every_iterations"])
        self.every_s = float(tel["every_ms"]) / 1000.0
        self.keep_delays = bool(tel.get("delay_samples", False))
        L = b.links
        self.values = {k: np.zeros((L, size)) for k, size in self.sizes.items()}
        self.ever = np.zeros(L, dtype=bool)
        self.fresh = np.zeros(L, dtype=bool)
        self.latest_iter = np.full(L, -1, dtype=np.int64)
        self.dropped = np.zeros(L, dtype=np.int64)
        self.rejected = np.zeros(L, dtype=np.int64)
        self.duplicated = np.zeros(L, dtype=np.int64)
        self.accepted = np.zeros(L, dtype=np.int64)
        self.released = np.zeros(L, dtype=np.int64)
        self.last_release = np.zeros(L, dtype=np.int64)
        self.free_rounds = 0  # rounds without any fault: every link delivered at once
        self.pending: dict[int, list[tuple[int, np.ndarray, dict[str, np.ndarray]]]] = {}
        #: delayed messages: (links, iteration sent, release round)
        self.delayed: list[tuple[np.ndarray, int, np.ndarray]] = []
        self.rounds = 0
        self.samples: list[tuple[int, float, Any, Any, Any, Any]] = []
        self.stopped: list[int | None] = [None] * len(coords)
        self.finished = [False] * len(coords)
        self.snap: dict[int, dict[str, Any]] = {}
        self.failed_rows: set[int] = set()
        self._tables: dict[int, dict[int, list[float]]] = {}

    # -- faults -------------------------------------------------------------------------
    def switch(
        self, seed: int, dst: int, fault: LinkFault, senders: Sequence[int], on: bool
    ) -> None:
        idx = [self.link_of[(seed, int(j), int(dst))] for j in senders]
        self.links.apply(fault, np.asarray(idx, dtype=np.int64), on)

    # -- the loop -----------------------------------------------------------------------
    def run(self) -> None:
        """Run every seed to its stop, then hand each its telemetry and final reports."""
        try:
            self._loop()
        finally:
            for s, c in enumerate(self.coords):
                if self.stopped[s] is not None:
                    self.finish(s, c.exit_reason)

    def _loop(self) -> None:
        alg, b, period = self.alg, self.block, self.period
        for c in self.coords:
            c.build_timeline()
            c.vnow = 0.0
            c.t_go = c.clock()
            c.event("go", agents=c.n, lead_s=0.0, engine="batch")
        state, out = alg.start()
        self.state = state
        self._sample(state, 0, 0.0)
        next_sample = 0.0
        src_row = b.link_src_row
        view = any(c.view is not None for c in self.coords)
        with np.errstate(all="ignore"):
            for k in range(self.limit):
                now = k * period
                for s, c in enumerate(self.coords):
                    if self.stopped[s] is not None:
                        continue
                    c.vnow = now
                    while c.timeline and c.timeline[0][0] <= now:
                        _, _, _what, action = c.timeline.pop(0)
                        action()
                self._deliver(k, now, out, src_row)
                heard = Heard(self.values, self.ever, self.fresh)
                try:
                    state, out = alg.advance(state, heard, k)
                except Exception as exc:  # what a node reports for a step that raised
                    self.rounds = k + 1
                    self._fail_seeds(exc, k)
                    return
                self.rounds = k + 1
                self.state = state
                if self.every_it > 0:
                    due = (k + 1) % self.every_it == 0
                else:
                    due = now >= next_sample
                    if due:
                        next_sample = now + self.every_s
                if due:  # (an agent that diverges now has this sample dropped)
                    self._sample(state, k + 1, now)
                xx = (state.x * state.x).sum(axis=1)
                if not (xx < DIVERGED * DIVERGED).all():
                    self._diverged(state, k, xx)
                    if all(s is not None for s in self.stopped):
                        return
                if view and (k + 1) % ROUNDS_PER_FLUSH == 0:
                    for c in self.coords:
                        c.show()
                # (a seed that stopped on its own, diverged say, has stop_requested set too;
                # only a request on a seed still running stops the others)
                if any(
                    c.stop_requested for s, c in enumerate(self.coords) if self.stopped[s] is None
                ):
                    for s, c in enumerate(self.coords):
                        if self.stopped[s] is None:
                            self._stop(s, c.stop_requested or "interrupted", 130)
                    return
        for s, c in enumerate(self.coords):
            if self.stopped[s] is None:
                c.vnow = self.limit * period
                self._stop(s, "budget", 0, final_t=self.limit * period)

    def _deliver(self, k: int, now: float, out: Mapping[str, np.ndarray], src_row: Any) -> None:
        """Round k's messages through every in-link's decision, then the release."""
        d = self.links.decide(k, k, now)
        if d is None and not self.pending:
            for name, arr in out.items():
                np.take(arr, src_row, axis=0, out=self.values[name])
            self.fresh[:] = True
            self.ever[:] = True
            self.latest_iter[:] = k
            self.free_rounds += 1
            return
        self.fresh[:] = False
        if d is None:
            ok = np.ones(self.block.links, dtype=bool)
            key = np.full(self.block.links, k, dtype=np.int64)
        else:
            self.dropped += d.dropped
            self.rejected += d.corrupt
            ok = ~d.dropped & ~d.corrupt
            self.duplicated += d.duplicate & ok
            key = k + rounds_lag(d.delay_s, self.period)
            key = np.where(d.fifo & (key < self.last_release), self.last_release, key)
        self.last_release = np.where(ok, np.maximum(self.last_release, key), self.last_release)
        self.accepted += ok
        for it, idx, vals in self.pending.pop(k, []):  # older sequence numbers first
            self._visible(idx, it, vals)
        now_idx = np.flatnonzero(ok & (key == k))
        self._visible(now_idx, k, {n: a[src_row[now_idx]] for n, a in out.items()})
        late = np.flatnonzero(ok & (key > k))
        if len(late):
            self.delayed.append((late, k, key[late]))
            for when in np.unique(key[late]).tolist():
                if when >= self.limit:
                    continue  # held until the end: in flight at stop
                idx = late[key[late] == when]
                vals = {n: a[src_row[idx]] for n, a in out.items()}
                self.pending.setdefault(int(when), []).append((k, idx, vals))

    def _visible(self, idx: np.ndarray, it: int, vals: Mapping[str, np.ndarray]) -> None:
        if not len(idx):
            return
        for name, v in vals.items():
            self.values[name][idx] = v
        self.fresh[idx] = True
        self.ever[idx] = True
        self.latest_iter[idx] = it
        self.released[idx] += 1

    # -- samples and reports -----------------------------------------------------------
    def _sample(self, state: Any, iteration: int, t: float) -> None:
        alg = self.alg
        pr = alg.priority_rows(state)
        rows = None
        if alg.has_rows:
            rows = (state.a_self.copy(), state.a_link.copy())
        self.samples.append(
            (
                iteration,
                t,
                state.x.copy(),
                None if pr is None else pr.copy(),
                alg.local_values(state.x),
                rows,
            )
        )

    def _diverged(self, state: Any, k: int, xx: np.ndarray) -> None:
        bad = np.flatnonzero(~(xx < DIVERGED * DIVERGED))
        for s in sorted({int(self.group[r]) for r in bad}):
            if self.stopped[s] is not None:
                continue
            c = self.coords[s]
            rows = [int(r) for r in bad if self.group[r] == s]
            self._snapshot(s, state)
            for r in rows:
                self.failed_rows.add(r)
                i = r - self.offsets[s]
                self._flush(s, i, final=False)
                c.to_coordinator(
                    i,
                    "failed",
                    error=f"diverged: agent {i} state left the bounded region at iteration {k + 1}",
                )
                self._gone(c, i)
            c.verdict = "diverged"
            self._stop(s, c.first_diverged or "diverged", 0, final_t=k * self.period)

    def _fail_seeds(self, exc: Exception, k: int) -> None:
        """A step raised (a user objective, say): every seed still running fails with it,
        reported by the agent the error names (the block cannot tell which seed)."""
        named = re.match(r"agent (\d+):", str(exc))
        for s, c in enumerate(self.coords):
            if self.stopped[s] is not None:
                continue
            i = int(named.group(1)) if named and int(named.group(1)) < c.n else 0
            self._snapshot(s, self.state)
            self.failed_rows.add(self.offsets[s] + i)
            c.to_coordinator(i, "failed", error=f"agent {i}: {type(exc).__name__}: {exc}")
            self._gone(c, i)
            self._stop(s, "agent failure: " + c.failures[0], 3, final_t=k * self.period)

    @staticmethod
    def _gone(c: BatchCoordinator, i: int) -> None:
        a = c.agents[i]
        a.dead = True
        a.record.alive = False

    def _snapshot(self, s: int, state: Any) -> None:
        if s not in self.snap:
            self.snap[s] = {
                "rounds": self.rounds,
                "state": state,
                "counts": self._counts(),
                "latest_iter": self.latest_iter.copy(),
                "samples": len(self.samples),
            }

    def _stop(self, s: int, reason: str, code: int, final_t: float | None = None) -> None:
        c = self.coords[s]
        self._snapshot(s, self.state)
        self.stopped[s] = self.snap[s]["rounds"]
        c.exit_reason, c.exit_code = reason, code
        c.t_end = c.clock()
        c.vnow = final_t if final_t is not None else c.vnow
        c.stop_requested = c.stop_requested or reason
        # its reports are handed over when the loop ends, outside every seed's run time

    def _counts(self) -> dict[str, np.ndarray]:
        f = self.free_rounds
        held = self.accepted - self.released
        return {
            "received": np.full(self.block.links, self.rounds, dtype=np.int64),
            "delivered": self.released + f,
            "dropped": self.dropped.copy(),
            "rejected": self.rejected.copy(),
            "duplicated": self.duplicated.copy(),
            "held": held,
        }

    def finish(self, s: int, reason: str) -> None:
        """Hand seed s's telemetry and final reports to its coordinator (once)."""
        if self.finished[s]:
            return
        self.finished[s] = True
        c = self.coords[s]
        snap = self.snap.get(s)
        if snap is None:
            return
        state = snap["state"]
        alg = self.alg
        lo = self.offsets[s]
        pr = alg.priority_rows(state)
        snap["final"] = (
            snap["rounds"],
            c.vnow,
            state.x,
            pr,
            alg.local_values(state.x),
            (state.a_self, state.a_link) if alg.has_rows else None,
        )
        for i in range(c.n):
            if lo + i in self.failed_rows:
                continue
            self._flush(s, i, final=True)
            x = state.x[lo + i]
            final_state: dict[str, Any] = {"x": x.tolist()}
            if pr is not None:
                final_state["priorities"] = pr[lo + i].tolist()
            if alg.has_rows:
                final_state["mixing_row"] = self._row(lo + i, state.a_self, state.a_link)
            c.to_coordinator(
                i,
                "final",
                state=final_state,
                iteration=snap["rounds"],
                links=self._link_report(s, i, with_delays=self.keep_delays),
                counters=self._counters(s, i),
                reason=reason,
            )

    def _row(self, r: int, a_self: np.ndarray, a_link: np.ndarray) -> dict[int, float]:
        b = self.block
        row = {int(b.ids[r]): float(a_self[r])}
        lo, hi = int(b.indptr[r]) - r, int(b.indptr[r + 1]) - r - 1
        for li in range(lo, hi):
            if a_link[li] != 0.0:
                row[int(b.link_src[li])] = float(a_link[li])
        return row

    def _flush(self, s: int, i: int, final: bool) -> None:
        """Agent i's samples (the final one last) as one telemetry batch."""
        c = self.coords[s]
        snap = self.snap[s]
        r = self.offsets[s] + i
        taken = self.samples[: snap["samples"]]
        # a failed agent has no sample of its last round; a finished one its final sample
        last = [snap["final"]] if final else []
        taken = [q for q in taken if final or q[0] < snap["rounds"]] + last
        samples = [
            [
                int(it),
                float(t),
                x[r].tolist(),
                None if p is None else p[r].tolist(),
                float(v[r]),
                None if rows is None else self._row(r, *rows),
            ]
            for it, t, x, p, v, rows in taken
        ]
        c.on_telemetry(
            c.agents[i],
            {
                "samples": samples,
                "links": self._link_report(s, i),
                "counters": self._counters(s, i),
            },
        )

    def _counters(self, s: int, i: int) -> dict[str, Any]:
        snap = self.snap[s]
        r = self.offsets[s] + i
        b = self.block
        lo, hi = int(b.indptr[r]) - r, int(b.indptr[r + 1]) - r - 1
        latest = snap["latest_iter"][lo:hi]
        seen = latest[latest >= 0]
        age = float(np.mean(snap["rounds"] - seen)) if len(seen) else 0.0
        return {
            "sent": snap["rounds"],
            "epoch": 0,
            "unattributed_rejected": 0,
            "refused_control": 0,
            "telemetry_dropped": 0,
            "age": age,
        }

    def _link_report(self, s: int, i: int, with_delays: bool = False) -> dict[int, Any]:
        snap = self.snap[s]
        rounds = snap["rounds"]
        cnt = snap["counts"]
        r = self.offsets[s] + i
        b = self.block
        lo, hi = int(b.indptr[r]) - r, int(b.indptr[r + 1]) - r - 1
        out: dict[int, Any] = {}
        for li in range(lo, hi):
            j = int(b.link_src[li])
            if rounds == 0:
                out[j] = {}
                continue
            delivered = int(cnt["delivered"][li])
            delays = self._delays(li, rounds, delivered)
            row: list[Any] = [
                rounds,
                delivered,
                int(cnt["dropped"][li]),
                int(cnt["rejected"][li]),
                int(cnt["duplicated"][li]),
                0,
                rounds - 1,
                int(cnt["held"][li]),
                0,
            ]
            if delays is None:
                row += [None, None, None]
            elif not np.any(delays):
                row += [0.0, 0.0, 0.0]
            else:
                d = np.asarray(delays) * 1000.0
                row += [float(np.median(d)), float(np.percentile(d, 95)), float(d.max())]
            if with_delays:
                row.append([] if delays is None else list(delays))
            out[j] = {0: row}
        return out

    def _delays(self, li: int, rounds: int, delivered: int) -> list[float] | None:
        """The delays (seconds) of the messages delivered on link li in the first rounds:
        release time minus send time on the virtual clock, as a receiver measures them."""
        if delivered == 0:
            return None
        late = self._delay_table(rounds).get(li, [])
        return [0.0] * (delivered - len(late)) + late

    def _delay_table(self, rounds: int) -> dict[int, list[float]]:
        cached = self._tables.get(rounds)
        if cached is not None:
            return cached
        table: dict[int, list[float]] = {}
        if self.delayed:
            idx = np.concatenate([d[0] for d in self.delayed])
            sent = np.concatenate([np.full(len(d[0]), d[1], dtype=np.int64) for d in self.delayed])
            when = np.concatenate([d[2] for d in self.delayed])
            keep = when < rounds
            idx, sent, when = idx[keep], sent[keep], when[keep]
            delay = when * self.period - sent * self.period
            order = np.argsort(idx, kind="stable")
            idx, delay = idx[order], delay[order]
            links, starts = np.unique(idx, return_index=True)
            for li, part in zip(links.tolist(), np.split(delay, starts[1:]), strict=True):
                table[li] = part.tolist()
        self._tables[rounds] = table
        return table
