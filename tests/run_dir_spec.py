"""What the run directory must hold: the names and keys scripts rely on (fixed by design)."""

RUN_FILES = (
    "scenario.toml",
    "agents.json",
    "run.json",
    "telemetry",
    "events.jsonl",
    "links.csv",
    "metrics.csv",
    "summary.json",
)
SUMMARY_KEYS = (
    "scenario",
    "agents",
    "algorithm",
    "mode",
    "wall_s",
    "startup_s",
    "iterations_per_s",
    "x_star",
    "F_star",
    "x_hat",
    "final_gap",
    "final_consensus_error",
    "time_to_tolerance_s",
    "messages",
    "verdict",
    "exit",
)
MESSAGE_KEYS = ("sent", "delivered", "dropped_injected", "lost_transport", "rejected", "in_flight")
