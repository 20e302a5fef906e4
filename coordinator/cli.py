"""The ``swarmrig`` command.

One ``_add_<command>`` function declares each subcommand and its options (every option has
help text), one ``_cmd_<command>`` function runs it; :func:`main` maps one to the other and
handles what every command shares (a closed output pipe, the exit statuses).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
from pathlib import Path
from typing import Any

__all__ = ["main"]

EXIT_SCENARIO = 2
#: 128 + SIGPIPE, what a shell reports for a command whose reader went away
EXIT_BROKEN_PIPE = 141


# --------------------------------------------------------------------------- arguments


def _seconds(text: str) -> float:
    """A positive, finite number of seconds (argparse type)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected a number of seconds > 0, got {text!r}"
        ) from None
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(f"expected a number of seconds > 0, got {text!r}")
    return value


def _agent_id(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected an agent id (0, 1, ...), got {text!r}"
        ) from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected an agent id (0, 1, ...), got {text!r}")
    return value


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("swarmrig")
    except PackageNotFoundError:  # running from a source tree that was never installed
        return "unknown (not installed)"


def _heartbeat_option(p: argparse.ArgumentParser, *, scaled: bool = False) -> None:
    p.add_argument(
        "--heartbeat-timeout",
        type=_seconds,
        default=None if scaled else 3.0,
        metavar="S",
        help="seconds without a word from the coordinator before an agent exits by itself"
        + (" (default max(3, 0.1 per agent per core))" if scaled else " (default 3)"),
    )


def _add_run(sub: Any) -> None:
    r = sub.add_parser("run", help="run a scenario (or a built-in demo) and write a run directory")
    r.add_argument("scenario", nargs="?", help="scenario TOML file or demo name (default: demo)")
    r.add_argument(
        "--out",
        type=Path,
        metavar="DIR",
        help="the run directory itself (default runs/<name>-<UTC>); refused if not empty",
    )
    r.add_argument(
        "--replace",
        action="store_true",
        help="with --out: delete the earlier run in that directory first",
    )
    r.add_argument(
        "--runs-root",
        type=Path,
        default=Path("runs"),
        metavar="DIR",
        help="where default run directories go (default ./runs)",
    )
    r.add_argument(
        "--quiet",
        action="store_true",
        help="no live view, no summary table: one line (verdict, worst-agent gap, run directory)",
    )
    r.add_argument(
        "--strict-exit",
        action="store_true",
        help="exit 4 when the run ends without reaching tolerance, 5 when it diverged",
    )
    r.add_argument("--json", action="store_true", help="print summary.json on standard output")
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
        help="control endpoint to bind, tcp://HOST:PORT, e.g. tcp://0.0.0.0:5570 (agents on"
        " other machines join it)",
    )
    r.add_argument(
        "--no-launch",
        action="store_true",
        help="start no agents here: wait for `swarmrig node` on other machines (needs --listen)",
    )
    r.add_argument(
        "--inventory",
        type=Path,
        metavar="HOSTS.toml",
        help="start the agents on the machines of this inventory over ssh (deploy/README.md)",
    )
    r.add_argument(
        "--join-timeout",
        type=_seconds,
        metavar="S",
        help="seconds to wait until every agent has joined and is ready"
        " (default 20 + 0.2 per agent)",
    )
    r.add_argument(
        "--keys",
        type=Path,
        metavar="DIR",
        help="key directory (swarmrig keys make): encrypt and authenticate every channel",
    )
    _heartbeat_option(r, scaled=True)


def _add_check(sub: Any) -> None:
    c = sub.add_parser("check", help="validate a scenario, print it resolved; start nothing")
    c.add_argument("scenario", help="scenario TOML file or demo name")
    c.add_argument(
        "--json",
        action="store_true",
        help="print the resolved scenario, graph facts, reference optimum and algorithm"
        " options as JSON",
    )


def _add_node(sub: Any) -> None:
    n = sub.add_parser("node", help="run one agent that joins a coordinator")
    n.add_argument(
        "--join",
        required=True,
        metavar="ENDPOINT",
        help="the coordinator's control endpoint, tcp://HOST:PORT, e.g. tcp://lab-pc:5570",
    )
    n.add_argument(
        "--agent",
        required=True,
        type=_agent_id,
        metavar="ID",
        help="which agent of the scenario this process is (0 to agents - 1)",
    )
    _heartbeat_option(n)
    n.add_argument(
        "--keys",
        type=Path,
        metavar="DIR",
        help="key directory with allow.toml and this agent's secret key",
    )


def _add_keys(sub: Any) -> None:
    k = sub.add_parser("keys", help="make the key material of a swarm")
    ksub = k.add_subparsers(dest="keys_command", required=True, help="make or pack")
    km = ksub.add_parser(
        "make",
        help="coordinator key pair, one key pair per agent or per host, allow.toml",
    )
    km.add_argument("dir", type=Path, help="new (or empty) directory for the key files")
    km.add_argument("--agents", type=int, metavar="N", help="one key pair per agent 0..N-1")
    km.add_argument(
        "--host",
        action="append",
        default=[],
        metavar="NAME=IDS",
        help="one key pair for a host running these agents, e.g. rover-a=0,1,2 (repeatable)",
    )
    kp = ksub.add_parser("pack", help="copy what one host needs into a directory of its own")
    kp.add_argument("dir", type=Path, help="the swarm's key directory")
    kp.add_argument("out", type=Path, help="directory to fill (for that host)")
    kp.add_argument("--agents", required=True, metavar="IDS", help="the host's agents: 0,1,2")


def _add_salvage(sub: Any) -> None:
    s = sub.add_parser(
        "salvage",
        help="finish a run directory whose coordinator died, from the telemetry on disk",
    )
    s.add_argument("run_dir", type=Path, metavar="RUN_DIR", help="the run directory to finish")


def _add_bench(sub: Any) -> None:
    b = sub.add_parser("bench", help="measure what this machine can hold")
    b.add_argument("--json", action="store_true", help="print the figures as JSON")
    b.add_argument(
        "--quick",
        action="store_true",
        help="smaller sizes and one measurement each: a smoke test of a minute or so",
    )


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="swarmrig",
        description="Run distributed optimization swarms as real processes and measure how "
        "network and process faults hurt them.",
    )
    p.add_argument("--version", action="version", version=f"swarmrig {_version()}")
    sub = p.add_subparsers(dest="command", required=True)
    _add_run(sub)
    _add_check(sub)
    _add_node(sub)
    _add_bench(sub)
    _add_keys(sub)
    _add_salvage(sub)
    from coordinator._study_cli import add_study_parsers

    add_study_parsers(sub)
    return p


# --------------------------------------------------------------------------- helpers


def _err(msg: str) -> None:
    print(f"swarmrig: error: {msg}", file=sys.stderr)


def _demo_hint(target: str) -> str:
    """' (did you mean the demo "x"?)' when ``target`` is no file but close to a demo name."""
    from coordinator._demos import closest_demo
    from coordinator._scenario import is_file

    if is_file(Path(target)) or os.sep in target:
        return ""
    close = closest_demo(Path(target).stem if target.endswith(".toml") else target)
    return f' (did you mean the demo "{close}"?)' if close else ""


def _load_or_explain(target: str, call: Any) -> Any:
    """``call(target)``; a refused scenario prints its message (with a demo hint) and
    returns None."""
    from topologies._errors import ScenarioError

    try:
        return call(target)
    except ScenarioError as exc:
        _err(str(exc) + _demo_hint(target))
        return None


def _endpoint(text: str, option: str, *, bind: bool) -> bool:
    from coordinator._endpoints import EndpointError, check_endpoint

    try:
        check_endpoint(text, option=option, bind=bind)
    except EndpointError as exc:
        _err(str(exc))
        return False
    return True


class _JoinProgress:
    """'joined k of n' on standard error while agents started by hand come in."""

    def __init__(self) -> None:
        self.shown: tuple[int, int] | None = None
        self.tty = sys.stderr.isatty()

    def __call__(self, endpoint: str, joined: int, expected: int) -> None:
        if self.shown is None:
            print(
                f"swarmrig: waiting for {expected} agents at {endpoint}; start each with\n"
                f"  swarmrig node --join {endpoint} --agent ID",
                file=sys.stderr,
            )
        if self.shown == (joined, expected):
            return
        self.shown = (joined, expected)
        line = f"joined {joined} of {expected}"
        if self.tty:
            end = "\n" if joined == expected else ""
            print(f"\r{line}", end=end, file=sys.stderr, flush=True)
        else:
            print(line, file=sys.stderr, flush=True)


# --------------------------------------------------------------------------- commands


def _cmd_run(args: argparse.Namespace) -> int:
    from coordinator._interrupts import EXIT_INTERRUPTED, Interrupts

    # first, so that a Ctrl-C at any moment is handled (coordinator._interrupts)
    interrupts = Interrupts.for_process()
    try:
        code = _run_command(args)
        return EXIT_INTERRUPTED if interrupts.count and code == 0 else code
    finally:
        interrupts.uninstall()  # the handlers from before (main() called in-process)


def _run_command(args: argparse.Namespace) -> int:
    from rich.console import Console

    from coordinator._api import load, run
    from coordinator._demos import DEFAULT_DEMO, list_demos
    from coordinator._results import quiet_line, strict_exit_status
    from coordinator._rundir import EXIT_WRITE_FAILED, RunDirError
    from coordinator._view import LiveView, summary_table
    from topologies._errors import ScenarioError

    if args.list_demos:
        for name, text in list_demos():
            print(f"{name:20s} {text}")
        return 0
    if args.engine in ("lockstep", "batch") and (args.listen or args.no_launch or args.keys):
        _err(
            f"--engine {args.engine} runs every agent in this process: "
            "no --listen, no --no-launch, no --keys"
        )
        return EXIT_SCENARIO
    if args.no_launch and not args.listen:
        _err(
            "--no-launch waits for agents started on other machines; give them an endpoint"
            " to join with --listen tcp://0.0.0.0:PORT"
        )
        return EXIT_SCENARIO
    # checked before the run directory is written: ZeroMQ would only say "Invalid argument"
    if args.listen and not _endpoint(args.listen, "--listen", bind=True):
        return EXIT_SCENARIO
    from node._security import is_loopback

    if args.listen and not args.keys and not is_loopback(args.listen):
        print(
            f"swarmrig: warning: --listen {args.listen} without --keys: anyone who can reach "
            "this port can join as an agent, feed states into the run and read its plan. "
            "Make keys with `swarmrig keys make DIR --agents N` and pass --keys DIR.",
            file=sys.stderr,
        )
    target = args.scenario or DEFAULT_DEMO
    swarm = _load_or_explain(target, load)
    if swarm is None:
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
        if not args.keys and not is_loopback(inventory.listen):
            print(
                f"swarmrig: warning: {args.inventory.name} listens on {inventory.listen} "
                "without --keys: anyone who can reach this port can join as an agent, feed "
                "states into the run and read its plan. Make keys with `swarmrig keys make`, "
                "give each host its packed directory (keys = ...) and pass --keys DIR.",
                file=sys.stderr,
            )
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
            handshake_timeout=args.join_timeout,
            on_join=_JoinProgress() if args.no_launch else None,
            keys=args.keys,
            replace=args.replace,
        )
    except (ScenarioError, RunDirError) as exc:  # refused (keys, --out) before anything started
        if view is not None:
            view.close()
            view = None
        _err(str(exc))
        return EXIT_WRITE_FAILED if isinstance(exc, RunDirError) else EXIT_SCENARIO
    finally:
        if view is not None:
            view.close()
    if result.exit_code == EXIT_WRITE_FAILED:
        _err(f"{result.run_dir}: {json.dumps(_exit_reason(result.run_dir))}")
        return EXIT_WRITE_FAILED
    if args.json:
        print(json.dumps(result.summary, indent=2))
    if args.quiet:
        if not args.json:  # the JSON already holds verdict, worst-agent gap and run_dir
            print(quiet_line(result.summary))
    else:
        console.print()
        console.print(summary_table(result.summary))
    if args.strict_exit and result.exit_code == 0:
        return strict_exit_status(result.summary)
    return result.exit_code


def _exit_reason(run_dir: Path) -> str:
    """Why run.json says the run ended (or, if run.json cannot be read, that it cannot)."""
    try:
        return str(json.loads((run_dir / "run.json").read_text())["write_failed"])
    except (OSError, ValueError, KeyError):
        return "the run directory could not be written, nor run.json read back"


def _cmd_salvage(args: argparse.Namespace) -> int:
    from coordinator._salvage import SalvageRefused, salvage
    from topologies._errors import ScenarioError

    try:
        summary = salvage(args.run_dir)
    except (SalvageRefused, ScenarioError) as exc:
        _err(str(exc))
        return EXIT_SCENARIO
    print(
        f"recovered {args.run_dir}: verdict {summary.get('verdict')}, final gap"
        f" {_short(summary.get('final_gap'))}, from the telemetry of"
        f" {summary.get('agents')} agents (run.json and summary.json say recovered)"
    )
    return 0


def _cmd_check(args: argparse.Namespace) -> int:
    from coordinator._api import check

    info = _load_or_explain(args.scenario, check)
    if info is None:
        return EXIT_SCENARIO
    if args.json:
        info = {k: v for k, v in info.items() if k != "resolved_toml"}
        print(json.dumps(info, indent=2))
        return 0
    print(info["resolved_toml"])
    alg = info["algorithm"]
    print(f'# algorithm options every agent uses ("{alg["name"]}", its own defaults filled)')
    if alg["options"]:
        for k, v in alg["options"].items():
            print(f"#   {k} = {_short(v)}")
    else:
        print("#   none")
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


#: a list longer than this is shown by its first and last entries and its length
SHORT_LIST = 8


def _short(v: Any) -> str:
    if isinstance(v, list) and len(v) > SHORT_LIST:
        head = ", ".join(_short(x) for x in v[:3])
        return f"[{head}, ..., {_short(v[-1])}] ({len(v)} entries)"
    if isinstance(v, dict) and len(v) > SHORT_LIST:
        items = list(v.items())
        head = ", ".join(f"{k}: {_short(x)}" for k, x in items[:3])
        return f"{{{head}, ...}} ({len(v)} entries)"
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return f"{v:.6g}"
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(_short(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{k}: {_short(x)}" for k, x in v.items()) + "}"
    return str(v)


def _cmd_node(args: argparse.Namespace) -> int:
    # checked here, before the process joins anything: ZeroMQ says only "Invalid argument"
    if not _endpoint(args.join, "--join", bind=False):
        return EXIT_SCENARIO
    from node._runtime import _set_parent_death_signal
    from node._runtime import main as node_main
    from node._security import is_loopback

    _set_parent_death_signal()
    if args.keys is None and not is_loopback(args.join):
        print(
            f"swarmrig: warning: joining {args.join} without --keys: the control and data "
            "channels are plain and open to anyone on the network",
            file=sys.stderr,
        )
    return node_main(args.join, args.agent, args.heartbeat_timeout, keys=args.keys)


def _cmd_keys(args: argparse.Namespace) -> int:
    from coordinator._keys import make_keys, pack_keys
    from topologies._errors import ScenarioError

    try:
        if args.keys_command == "make":
            d = make_keys(args.dir, agents=args.agents, hosts=args.host)
            names = sorted(p.name for p in d.iterdir())
            print(f"wrote {len(names)} files to {d}: " + ", ".join(names))
            print(
                f"keep {d}/coordinator.key_secret on the coordinator's machine; give each "
                f"host allow.toml and its own *.key_secret (swarmrig keys pack {d} OUT --agents "
                "IDS)"
            )
        else:
            ids = [int(x) for x in args.agents.split(",") if x.strip()]
            files = pack_keys(args.dir, args.out, ids)
            print(f"wrote {', '.join(str(f) for f in files)}")
    except ValueError:
        _err(f"--agents {args.agents!r}: expected agent ids separated by commas, e.g. 0,1,2")
        return EXIT_SCENARIO
    except ScenarioError as exc:
        _err(str(exc))
        return EXIT_SCENARIO
    return 0


def _cmd_bench(args: argparse.Namespace) -> int:
    from coordinator._bench import bench, print_bench

    def progress(done: int, total: int, what: str) -> None:
        print(f"bench [{done}/{total}] {what}", file=sys.stderr, flush=True)

    res = bench(quick=args.quick, progress=progress)
    if args.json:
        print(json.dumps(res, indent=2))
    else:
        print_bench(res)
    return 0


_COMMANDS = {
    "run": _cmd_run,
    "check": _cmd_check,
    "node": _cmd_node,
    "bench": _cmd_bench,
    "keys": _cmd_keys,
    "salvage": _cmd_salvage,
}


def _command(name: str) -> Any:
    if name in ("study", "report"):
        from coordinator import _study_cli

        return _study_cli.cmd_study if name == "study" else _study_cli.cmd_report
    return _COMMANDS[name]


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    try:
        code = _command(args.command)(args)
        sys.stdout.flush()
    except BrokenPipeError:
        # The reader went away (`swarmrig check x | head`): no traceback, and nothing more
        # written to the closed pipe when Python flushes standard output at exit.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_BROKEN_PIPE
    return code


if __name__ == "__main__":
    sys.exit(main())
