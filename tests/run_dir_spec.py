"""What the run directory must hold: the names and keys scripts rely on (fixed by design)."""

RUN_FILES = (
    "scenario.toml",
    "agents.json",
    "run.json",
    "telemetry",
    "events.jsonl",
    "links.csv",
    "metrics.csv",
    "final_states.json",
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
    # every agent's own answer, agreement, settled time and recovery
    "worst_agent_gap",
    "median_agent_gap",
    "worst_agent",
    "agents_within_tolerance",
    "agreement",
    "target_spread",
    "agreement_relative",
    "tolerance_threshold",
    "first_within_tolerance_s",
    "recovery",
)
#: each agent's entry in final_states.json (a list in agent-id order)
FINAL_STATE_KEYS = ("id", "epoch", "iteration", "source", "x", "gap")
#: each fault's entry in summary.json's recovery list
RECOVERY_KEYS = (
    "fault",
    "kind",
    "before",
    "peak",
    "peak_agreement",
    "peak_after_end",
    "end_t_s",
    "recovered_after_s",
    "recovered_after_iterations",
    "recovered_at_s",
    "not_recovered",
)
MESSAGE_KEYS = ("sent", "delivered", "dropped_injected", "lost_transport", "rejected", "in_flight")
