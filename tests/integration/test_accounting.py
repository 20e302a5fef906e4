"""Every message sent is accounted for exactly once, on every link and in the totals:

    sent == delivered + dropped_injected + lost_transport + rejected + in_flight

with injected duplicates counted apart (the run directory design: links.csv and summary.json). In rounds
mode the split is also predicted message by message from the decision model
(node._links.LinkModel rebuilt from the resolved scenario.toml): what it drops is dropped,
what it corrupts is rejected, what it duplicates is duplicated, and what its delay pushes
past the last round is still in flight.
"""

from __future__ import annotations

import pytest

from tests.integration.test_fault_models import (
    base,
    batches,
    decided_seqs,
    events,
    final_report,
    in_counters,
    link_model,
    link_rows,
    resolved,
    rounds_decisions,
    run_swarm,
)

pytestmark = pytest.mark.integration

TOTAL_KEYS = (
    "sent",
    "delivered",
    "dropped_injected",
    "lost_transport",
    "rejected",
    "duplicated",
    "in_flight",
)


def assert_closes(result) -> dict[tuple[int, int], dict[str, float]]:
    """The identity on every links.csv row and on summary.json's totals, which must be
    the column sums."""
    rows = link_rows(result.run_dir)
    for link, r in rows.items():
        accounted = (
            r["delivered"]
            + r["dropped_injected"]
            + r["lost_transport"]
            + r["rejected"]
            + r["in_flight"]
        )
        assert r["sent"] == accounted, (link, r)
        assert min(r[k] for k in TOTAL_KEYS) >= 0, (link, r)
    totals = result.summary["messages"]
    for key in TOTAL_KEYS:
        assert totals[key] == sum(r[key] for r in rows.values()), key
    assert totals["sent"] == (
        totals["delivered"]
        + totals["dropped_injected"]
        + totals["lost_transport"]
        + totals["rejected"]
        + totals["in_flight"]
    ), totals
    return rows


def mixed_faults(delay: dict) -> list[dict]:
    return [
        {"kind": "loss", "links": "all", "rate": 0.1},
        {"kind": "duplicate", "links": "all", "rate": 0.1},
        {"kind": "corrupt", "links": "all", "rate": 0.05},
        {"kind": "delay", "links": {"edge": [0, 1]}, "distribution": "uniform", **delay},
    ]


def test_rounds_mode_accounts_each_message_as_the_model_decided(processes, tmp_path):
    iterations = 800
    sc = base("accounting-rounds", agents=4, iterations=iterations)
    sc["timing"] = {"period_ms": 1.0}
    # 0.5 to 4 ms at a 1 ms period: visible 0 to 3 rounds late, the last ones never
    sc["fault"] = mixed_faults({"low_ms": 0.5, "high_ms": 4.0})
    result = run_swarm(processes, tmp_path / "run", sc)
    rows = assert_closes(result)
    totals = result.summary["messages"]
    assert totals["dropped_injected"] > 0 and totals["rejected"] > 0
    assert totals["duplicated"] > 0 and totals["in_flight"] > 0
    assert totals["lost_transport"] == 0, totals
    period = float(resolved(result.run_dir)["timing"]["period_ms"]) / 1000.0
    for (src, dst), r in rows.items():
        c = in_counters(final_report(result.run_dir, dst), src)
        seqs = decided_seqs(c)
        assert seqs == range(iterations), (src, dst, seqs)
        want = dict.fromkeys(("dropped", "rejected", "duplicated", "held", "delivered"), 0)
        for s, d in zip(
            seqs, rounds_decisions(link_model(result.run_dir, src, dst), seqs), strict=True
        ):
            if not d.deliver:
                want["dropped"] += 1
            elif d.corrupt:
                want["rejected"] += 1
            else:
                want["duplicated"] += d.copies - 1
                # the receiver's rule: a delay counts in whole round periods
                lag = int(d.delay_s / period) if d.delay_s > 0.0 else 0
                want["held" if s + lag > iterations - 1 else "delivered"] += 1
        got = {
            "dropped": r["dropped_injected"],
            "rejected": r["rejected"],
            "duplicated": r["duplicated"],
            "held": r["in_flight"],
            "delivered": r["delivered"],
        }
        assert got == want, (src, dst)


def test_async_mode_accounting_closes_under_every_fault_at_once(processes, tmp_path):
    sc = base("accounting-async", agents=4, mode="async", seconds=1.5)
    sc["timing"] = {"period_ms": 2.0, "jitter": 0.2}
    sc["fault"] = mixed_faults({"low_ms": 1.0, "high_ms": 20.0})
    result = run_swarm(processes, tmp_path / "run", sc)
    rows = assert_closes(result)
    totals = result.summary["messages"]
    for key in ("dropped_injected", "rejected", "duplicated", "delivered"):
        assert totals[key] > 0, (key, totals)
    for (src, dst), r in rows.items():
        c = in_counters(final_report(result.run_dir, dst), src)
        # what the receiver saw, by its own counters, is the part of the row it reported
        assert (
            c["received"] == c["delivered"] + c["dropped_injected"] + c["rejected"] + c["held"]
        ), (src, dst, c)
        assert r["delivered"] == c["delivered"] and r["duplicated"] == c["duplicated"]
        assert r["sent"] >= c["max_seq"] + 1


@pytest.mark.parametrize("mode", ["rounds", "async"])
def test_without_faults_nothing_is_lost_or_rejected(processes, tmp_path, mode):
    budget = {"iterations": 500} if mode == "rounds" else {"seconds": 1.0}
    sc = base(f"clean-{mode}", agents=4, mode=mode, **budget)
    sc["timing"] = {"period_ms": 2.0}
    result = run_swarm(processes, tmp_path / "run", sc)
    rows = assert_closes(result)
    for link, r in rows.items():
        assert r["lost_transport"] == 0 and r["rejected"] == 0, (link, r)
        assert r["dropped_injected"] == 0 and r["duplicated"] == 0, (link, r)
        assert r["delivered"] > 0.8 * r["sent"], (link, r)
    for i in range(4):
        assert final_report(result.run_dir, i)["counters"]["unattributed_rejected"] == 0


def test_messages_a_live_receiver_still_holds_from_a_crashed_sender_are_in_flight(
    processes, tmp_path
):
    """Agent 2 dies for good at 1.75 s; agent 1 still holds what 2 sent in its last 0.5 s
    behind a 0.5 s delay when the run stops at 2 s. Those messages arrived: they are in
    flight (held by a delay at a live receiver), not lost in transport. Only what agent 1
    never saw of the dead sender counts as lost."""
    sc = base("crash-held", agents=4, mode="async", seconds=2.0)
    sc["timing"] = {"period_ms": 2.0, "jitter": 0.1}
    sc["fault"] = [
        {"kind": "delay", "links": {"from": 2, "to": 1}, "distribution": "constant", "ms": 500.0},
        {"kind": "crash", "agents": [2], "start_s": 1.75},
    ]
    result = run_swarm(processes, tmp_path / "run", sc)
    rows = assert_closes(result)
    assert any(e["event"] == "crash" for e in events(result.run_dir))
    assert not [b for b in batches(result.run_dir, 2) if "final" in b], "agent 2 did not die"
    c = in_counters(final_report(result.run_dir, 1), 2)
    assert c["held"] > 0.25 * 0.5 / 2e-3 and c["lost_transport"] == 0, c
    row = rows[(2, 1)]
    assert row["in_flight"] == c["held"], (row, c)
    assert row["lost_transport"] == row["sent"] - (c["max_seq"] + 1), (row, c)
