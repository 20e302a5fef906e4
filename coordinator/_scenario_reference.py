"""The scenario key reference: every key with its default and meaning (the README's scenario
reference is generated from :func:`describe_keys`, and a test checks it row for row).
"""

from __future__ import annotations

import json
from typing import Any

from coordinator import _limits as lim
from coordinator._scenario_schema import (
    _CONDITION_MAX,
    _SCOPE_FORMS,
    DEFAULTS,
    DELAY_DISTRIBUTIONS,
    FAULT_KINDS,
    OBJECTIVE_KINDS,
    TOPOLOGY_SHAPES,
)

# --------------------------------------------------------------------------- reference


def _lit(value: Any) -> str:
    return (
        "false"
        if value is False
        else "true"
        if value is True
        else (json.dumps(value) if isinstance(value, str) else repr(value))
    )


def _missing_policies_text() -> str:
    from node import algorithm_class, algorithm_names

    parts = []
    for name in algorithm_names():
        policies = algorithm_class(name).missing_policies
        if policies:
            parts.append(f"{name}: " + " or ".join(f'"{p}"' for p in policies))
    return "; ".join(parts)


def describe_keys() -> list[tuple[str, str, str]]:
    """Every scenario key as ``(key path, default, meaning)``, in file order.

    The default column quotes :data:`DEFAULTS` (TOML spelling) or says what happens when the
    key is absent. The README's scenario reference is generated from this list.
    """
    D = DEFAULTS
    shapes = ", ".join(TOPOLOGY_SHAPES)
    kinds = ", ".join(FAULT_KINDS)
    dists = ", ".join(DELAY_DISTRIBUTIONS)
    return [
        (
            "[swarm].name",
            "the file name without extension",
            'names the run directory; letters, digits, ".", "_", "-"',
        ),
        (
            "[swarm].agents",
            "required",
            f"number of agents (one OS process each), in [2, {lim.AGENTS_MAX}]",
        ),
        (
            "[swarm].dimension",
            _lit(D["swarm"]["dimension"]),
            f"length of every agent's decision vector, in [1, {lim.DIMENSION_MAX}]"
            f" ({lim.QUADRATIC_DIMENSION_MAX} for quadratic objectives)",
        ),
        (
            "[swarm].seed",
            "drawn at load time and written out",
            "fixes every random choice of the run (targets, graph, faults, timing)",
        ),
        (
            "[swarm].mode",
            _lit(D["swarm"]["mode"]),
            '"rounds" (wait for round k from every in-neighbour) or "async" (own clock)',
        ),
        (
            "[swarm].iterations",
            f"{_lit(D['swarm']['iterations'])} when seconds is absent",
            "budget: iterations per agent, in [1, 2**53]; exclusive with seconds",
        ),
        (
            "[swarm].seconds",
            "absent",
            "budget: seconds of the run phase, > 0 and at most 2**53 periods;"
            " exclusive with iterations",
        ),
        (
            "[swarm].tolerance",
            _lit(D["swarm"]["tolerance"]),
            "reached when gap <= tolerance * max(|F_star|, 1); > 0",
        ),
        ("[topology].shape", "required", f"one of {shapes}"),
        (
            "[topology].radius",
            "required by random-geometric",
            "link range between agents placed in the unit square, in (0, sqrt(2)]",
        ),
        (
            "[topology].p",
            "required by erdos-renyi and small-world",
            "edge probability in (0, 1] (erdos-renyi); rewiring probability in [0, 1] (small-world)",
        ),
        (
            "[topology].k",
            "required by small-world",
            "even number of ring-lattice neighbours before rewiring, 2 <= k < agents",
        ),
        ("[topology].rows", "agents / cols", "grid rows; rows * cols = agents"),
        ("[topology].cols", "agents / rows", "grid columns; rows * cols = agents"),
        (
            "[topology].file",
            "required by file",
            "edge list or GraphML file, relative to the scenario file",
        ),
        (
            "[topology].directed",
            "as the file says",
            "file: true reads one-way links, false makes every link two-way",
        ),
        ("[objective].kind", _lit(D["objective"]["kind"]), ", ".join(OBJECTIVE_KINDS)),
        (
            "[objective].spread",
            _lit(D["objective.quadratic"]["spread"]),
            "quadratic: scale of the targets drawn from the seed (unless given per agent),"
            f" in [0, {lim.MAGNITUDE_MAX:g} / sqrt(dimension)]",
        ),
        (
            "[objective].curvature",
            _lit(D["objective.quadratic"]["curvature"]),
            'quadratic: "identity" or "random" (SPD matrices drawn from the seed)',
        ),
        (
            "[objective].condition",
            f'{_lit(D["objective.quadratic.random"]["condition"])} with curvature = "random"',
            f"quadratic: condition number of the random curvatures, in [1, {_CONDITION_MAX:g}]",
        ),
        (
            "[objective].samples",
            _lit(D["objective.logistic"]["samples"]),
            "logistic, huber: local data points per agent, drawn from the seed, >= 1;"
            f" samples * (dimension + 1) at most {lim.SAMPLE_NUMBERS_MAX}",
        ),
        (
            "[objective].reg",
            f"{_lit(D['objective.logistic']['reg'])} (logistic), "
            f"{_lit(D['objective.huber']['reg'])} (huber)",
            "weight of the ridge term reg/2 |x|^2; > 0 for logistic, >= 0 for huber",
        ),
        (
            "[objective].delta",
            _lit(D["objective.huber"]["delta"]),
            "huber: threshold between the quadratic and the linear part, > 0",
        ),
        (
            "[objective].function",
            "required by custom",
            '"package.module:function" returning (value, gradient)',
        ),
        (
            "[priorities].initial",
            "uniform (no vectors)",
            "one priority vector per agent: n entries >= 0 summing to 1",
        ),
        (
            "[priorities].gain",
            "0.5 / max degree (set by the coordinator)",
            "priority averaging gain, >= 0 and below 1 / max degree; 0 keeps the initial vectors",
        ),
        ("[algorithm].name", _lit(D["algorithm"]["name"]), "a registered algorithm"),
        (
            "[algorithm].step",
            _lit(D["algorithm"]["step"]),
            "constant step > 0, or a table {rule, step | scale, power}",
        ),
        (
            "[algorithm].step.rule",
            _lit(D["algorithm.step"]["rule"]),
            '"constant" or "diminishing" (alpha_k = scale / (k + 1) ** power)',
        ),
        (
            "[algorithm].step.step",
            _lit(D["algorithm.step.constant"]["step"]),
            "constant rule: the step, > 0",
        ),
        (
            "[algorithm].step.scale",
            _lit(D["algorithm.step.diminishing"]["scale"]),
            "diminishing rule: scale, > 0",
        ),
        (
            "[algorithm].step.power",
            _lit(D["algorithm.step.diminishing"]["power"]),
            "diminishing rule: power, > 0",
        ),
        (
            "[algorithm].missing",
            "the algorithm's",
            "what a silent in-neighbour counts as, one of the algorithm's policies"
            f" ({_missing_policies_text()})",
        ),
        ("[algorithm].gain", "the algorithm's", "algorithm-specific gain, >= 0"),
        (
            "[algorithm].priority_averaging",
            "the algorithm's",
            "algorithm-specific priority averaging switch (true, false or a variant name)",
        ),
        (
            "[algorithm].mode",
            "the algorithm's",
            'algorithm-specific variant (push-sum: "average" or "optimize")',
        ),
        ("[algorithm].scale", "the algorithm's", "push-sum: alpha_t = scale / sqrt(t + 1), > 0"),
        (
            "[algorithm].step_rule",
            "the algorithm's",
            'push-sum: "plan" (use [algorithm].step) or a step of its own, like step',
        ),
        (
            "[algorithm].average_priorities",
            "the algorithm's",
            "ratio-consensus: also average the priority vectors",
        ),
        (
            "[algorithm].module",
            "absent",
            "dotted module every agent imports to register a custom algorithm",
        ),
        (
            "[algorithm].params",
            "absent",
            "table of options (numbers, strings, booleans) handed unchanged to the algorithm",
        ),
        (
            "[timing].period_ms",
            _lit(D["timing"]["period_ms"]),
            f"async mode: iteration period, in [{lim.PERIOD_MS_MIN:g}, {lim.POLL_MS_MAX}];"
            f" period_ms * speed * slow factor * (1 + jitter) at most {lim.POLL_MS_MAX}",
        ),
        (
            "[timing].jitter",
            _lit(D["timing"]["jitter"]),
            "async mode: period jitter as a fraction of the period, in [0, 1)",
        ),
        (
            "[timing].speed_spread",
            _lit(D["timing"]["speed_spread"]),
            "async mode: speed factors drawn in [1 - s, 1 + s], s in [0, 1)",
        ),
        (
            "[timing].round_timeout_ms",
            _lit(D["timing"]["round_timeout_ms"]),
            f"rounds mode: how long to wait for an in-neighbour's round, in (0, {lim.POLL_MS_MAX}]",
        ),
        (
            "[telemetry].every_ms",
            _lit(D["telemetry"]["every_ms"]),
            f"async mode: sample interval, in (0, {lim.POLL_MS_MAX}]",
        ),
        (
            "[telemetry].every_iterations",
            _lit(D["telemetry"]["every_iterations"]),
            "sample every this many iterations, in [0, 2**53]; 0 = automatic",
        ),
        (
            "[telemetry].batch_ms",
            _lit(D["telemetry"]["batch_ms"]),
            f"how long an agent gathers samples before pushing a batch, in (0, {lim.POLL_MS_MAX}]",
        ),
        (
            "[telemetry].delay_samples",
            _lit(D["telemetry"]["delay_samples"]),
            "also report every injected delay (for delay statistics per link)",
        ),
        (
            "[network].transport",
            _lit(D["network"]["transport"]),
            '"ipc" (Unix sockets, used only when every agent runs on this machine) or "tcp"',
        ),
        ("[network].host", _lit(D["network"]["host"]), "address the agents bind on"),
        ("[[agent]].id", "required", "the agent these overrides are for, in [0, agents - 1]"),
        (
            "[[agent]].target",
            "drawn from the seed",
            f"quadratic: this agent's target, d numbers, norm at most {lim.MAGNITUDE_MAX:g}",
        ),
        (
            "[[agent]].curvature",
            "from [objective].curvature",
            "quadratic: this agent's d x d symmetric positive definite curvature",
        ),
        (
            "[[agent]].initial_state",
            "the coordinator's",
            f"this agent's starting x, d numbers, norm at most {lim.MAGNITUDE_MAX:g}",
        ),
        (
            "[[agent]].initial_priorities",
            "its row of [priorities].initial, else uniform",
            "this agent's priority vector: n entries >= 0 summing to 1",
        ),
        (
            "[[agent]].speed",
            "drawn from [timing].speed_spread",
            "async mode: this agent's speed factor (its period is multiplied by it), > 0;"
            f" period_ms * speed * (1 + jitter) at most {lim.POLL_MS_MAX}",
        ),
        ("[[fault]].kind", "required", kinds),
        (
            "[[fault]].name",
            "none",
            "optional name, unique in the scenario; a study addresses the fault by it",
        ),
        ("[[fault]].links", "required by link faults", f"which directed links: {_SCOPE_FORMS}"),
        ("[[fault]].agents", "required by crash, pause, slow", "list of agent ids"),
        ("[[fault]].start_s", _lit(D["fault"]["start_s"]), "when it starts, seconds, >= 0"),
        ("[[fault]].duration_s", "until the end", "how long it lasts, seconds, >= 0"),
        (
            "[[fault]].start_iteration",
            _lit(D["fault"]["start_iteration"]),
            "when it starts, iterations, in [0, 2**53] (not mixed with the seconds keys)",
        ),
        (
            "[[fault]].duration_iterations",
            "until the end",
            "how long it lasts, iterations, in [0, 2**53]",
        ),
        (
            "[[fault]].rate",
            "required by loss, duplicate, corrupt",
            "probability per message, in [0, 1]",
        ),
        (
            "[[fault]].p_enter",
            "required by burst-loss",
            "Gilbert–Elliott: P(good -> bad) per message, in (0, 1]",
        ),
        (
            "[[fault]].p_leave",
            "required by burst-loss",
            "Gilbert–Elliott: P(bad -> good) per message, in (0, 1]",
        ),
        (
            "[[fault]].loss_good",
            _lit(D["fault.burst-loss"]["loss_good"]),
            "burst-loss: loss probability in the good state, in [0, 1]",
        ),
        (
            "[[fault]].loss_bad",
            _lit(D["fault.burst-loss"]["loss_bad"]),
            "burst-loss: loss probability in the bad state, in [0, 1]",
        ),
        (
            "[[fault]].distribution",
            _lit(D["fault.delay"]["distribution"]),
            f"delay: one of {dists}; every draw at most {lim.DELAY_MAX_MS:g} ms",
        ),
        ("[[fault]].ms", "required by constant", "delay: the constant delay, ms, >= 0"),
        ("[[fault]].low_ms", "required by uniform", "delay: lower bound, ms, >= 0"),
        ("[[fault]].high_ms", "required by uniform", "delay: upper bound, ms, >= low_ms"),
        ("[[fault]].mean_ms", "required by normal", "delay: mean, ms"),
        ("[[fault]].sd_ms", "required by normal", "delay: standard deviation, ms, > 0"),
        ("[[fault]].median_ms", "required by lognormal", "delay: median, ms, > 0"),
        ("[[fault]].sigma", "required by lognormal", "delay: sigma of the log, >= 0"),
        ("[[fault]].scale_ms", "required by pareto", "delay: minimum (scale), ms, > 0"),
        ("[[fault]].shape", "required by pareto", "delay: Pareto shape (tail index), > 0"),
        (
            "[[fault]].jitter_ms",
            _lit(D["fault.delay"]["jitter_ms"]),
            "delay: extra uniform jitter, ms, >= 0",
        ),
        ("[[fault]].fifo", _lit(D["fault.delay"]["fifo"]), "delay: keep the link's message order"),
        (
            "[[fault]].restart_after_s",
            "absent: stays dead",
            "crash: restart after this many seconds, >= 0",
        ),
        (
            "[[fault]].restart_state",
            _lit(D["fault.crash"]["restart_state"]),
            'crash: restart from the "initial" or the "last" reported state',
        ),
        (
            "[[fault]].factor",
            "required by slow",
            "slow: period multiplied by this, > 0; async mode: period_ms * speed * factor"
            f" * (1 + jitter) at most {lim.POLL_MS_MAX}",
        ),
    ]
