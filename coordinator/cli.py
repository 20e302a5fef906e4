"""The ``swarmrig`` command."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

__all__ = ["main"]

EXIT_SCENARIO = 2


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="swarmrig",
        description="Run distributed optimization swarms as real processes and measure how "
        "network and process faults hurt them.",
    )
    sub = p.add_subparsers(dest="command", required=True)

    r = sub.add_parser("run", help="run a scenario (or a built-in demo) and write a run directory")
    r.add_argument("scenario", nargs="?", help="scenario TOML file or demo name (default: demo)")
    r.add_argument("--out", type=Path, help="the run directory itself (default runs/<name>-<UTC>)")
    r.add_argument(
        "--runs-root",
        type=Path,
        default=Path("runs"),
        help="where default run directories go (default ./runs)",
    )
    r.add_argument("--quiet", action="store_true", help="no live view, no summary table")
    r.add_argument("--json", action="store_true", help="print summary.json on stdout")
    r.add_argument(
        "--baseline",
        action="store_true",
        help="also run the scenario without its faults and compare",
    )
    r.add_argument("--list-demos", action="store_true", help="list the built-in demos and exit")
    r.add_argument(
        "--engine",
        choices=("processes", "lockstep", "batch"),
        default="processes",
        help="processes: one OS process per agent (default); lockstep: rounds mode "
        "in this process with the same agent code; batch: rounds mode with the whole "
        "swarm as arrays, for fast studies",
    )
    r.add_argument(
        "--listen",
        metavar="ENDPOINT",
        help="control endpoint to bind, e.g. tcp://0.0.0.0:5570 (agents on other machines join it)",
    )
    r.add_argument(
        "--no-launch",
        action="store_true",
        help="start no agents here: wait for `swarmrig node` on other machines",
    )
    r.add_argument(
        "--inventory",
        type=Path,
        metavar="HOSTS.toml",
        help="start the agents on the machines of this inventory over ssh (deploy/README.md)",
    )
    r.add_argument(
        "--heartbeat-timeout",
        type=float,
        default=3.0,
        help="seconds without the coordinator before an agent exits (default 3)",
    )

    c = sub.add_parser("check", help="validate a scenario, print it resolved; start nothing")
    c.add_argument("scenario")
    c.add_argument("--json", action="store_true")

    n = sub.add_parser("node", help="run one agent that joins a coordinator")
    n.add_argument(
        "--join",
        required=True,
        metavar="ENDPOINT",
        help="the coordinator's control endpoint, e.g. tcp://10.0.0.5:5570",
    )
    n.add_argument("--agent", required=True, type=int, metavar="ID")
    n.add_argument("--heartbeat-timeout", type=float, default=3.0)

    b = sub.add_parser("bench", help="measure what this machine can hold")
    b.add_argument("--json", action="store_true")
    b.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke test")
    return p


def _err(msg: str) -> None:
    print(f"swarmrig: error: {msg}", file=sys.stderr)


def _cmd_run(args: argparse.Namespace) -> int:
    from rich.console import Console

    from coordinator._api import load, run
    from coordinator._demos import DEFAULT_DEMO, list_demos
    from coordinator._view import LiveView, summary_table
    from topologies._errors import ScenarioError

    if args.list_demos:
        for name, text in list_demos():
            print(f"{name:20s} {text}")
        return 0
    if args.engine in ("lockstep", "batch") and (args.listen or args.no_launch):
        _err(
            f"--engine {args.engine} runs every agent in this process: no --listen, no --no-launch"
        )
        return EXIT_SCENARIO
    target = args.scenario or DEFAULT_DEMO
    try:
        swarm = load(target)
    except ScenarioError as exc:
        _err(str(exc))
        return EXIT_SCENARIO
    except FileNotFoundError as exc:
        _err(f"{target}: no such scenario file or demo ({exc.strerror})")
        return EXIT_SCENARIO
    inventory = None
    if args.inventory is not None:
        from coordinator._inventory import load_inventory

        if args.no_launch or args.engine != "processes":
            _err("--inventory starts the agents on its hosts: no --no-launch, no --engine")
            return EXIT_SCENARIO
        try:
            inventory = load_inventory(args.inventory)
            inventory.check_swarm(swarm.n, swarm.scenario.name, swarm.scenario.network)
        except ScenarioError as exc:
            _err(str(exc))
            return EXIT_SCENARIO
    if args.engine in ("lockstep", "batch"):
        from coordinator._batch import check_batch
        from coordinator._lockstep import check_lockstep

        try:
            (check_lockstep if args.engine == "lockstep" else check_batch)(swarm)
        except ScenarioError as exc:
            _err(str(exc))
            return EXIT_SCENARIO
    console = Console(stderr=True)
    view = None if args.quiet else LiveView(console)
    try:
        result = run(
            swarm,
            out=args.out,
            runs_root=args.runs_root,
            view=view,
            baseline=args.baseline,
            launch_local=not args.no_launch,
            engine=args.engine,
            listen=args.listen,
            heartbeat_timeout=args.heartbeat_timeout,
            inventory=inventory,
        )
    finally:
        if view is not None:
            view.close()
    if args.json:
        print(json.dumps(result.summary, indent=2))
    if not args.quiet:
        console.print()
        console.print(summary_table(result.summary))
    return result.exit_code


def _cmd_check(args: argparse.Namespace) -> int:
    from coordinator._api import check
    from topologies._errors import ScenarioError

    try:
        info = check(args.scenario)
    except ScenarioError as exc:
        _err(str(exc))
        return EXIT_SCENARIO
    except FileNotFoundError as exc:
        _err(f"{args.scenario}: no such file ({exc.strerror})")
        return EXIT_SCENARIO
    if args.json:
        info = {k: v for k, v in info.items() if k != "resolved_toml"}
        print(json.dumps(info, indent=2))
        return 0
    print(info["resolved_toml"])
    print("# graph facts")
    for k, v in info["graph"].items():
        if isinstance(v, dict):
            v = {kk: vv for kk, vv in v.items() if kk != "eigenvalues"}
        print(f"#   {k} = {_short(v)}")
    ref = info["reference"]
    print("# reference optimum (" + ref["method"] + ")")
    print(f"#   x_star = {_short(ref['x_star'])}")
    print(f"#   F_star = {ref['F_star']:.12g}")
    return 0


def _short(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:.6g}"
    if isinstance(v, list):
        return "[" + ", ".join(_short(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{k}: {_short(x)}" for k, x in v.items()) + "}"
    return str(v)


def _cmd_node(args: argparse.Namespace) -> int:
    from node._runtime import _set_parent_death_signal
    from node._runtime import main as node_main

    _set_parent_death_signal()
    return node_main(args.join, args.agent, args.heartbeat_timeout)


def _cmd_bench(args: argparse.Namespace) -> int:
    from coordinator._bench import bench, print_bench

    res = bench(quick=args.quick)
    if args.json:
        print(json.dumps(res, indent=2))
    else:
        print_bench(res)
    return 0


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    cmd = {"run": _cmd_run, "check": _cmd_check, "node": _cmd_node, "bench": _cmd_bench}
    return cmd[args.command](args)


if __name__ == "__main__":
    sys.exit(main())
