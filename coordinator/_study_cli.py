"""The ``swarmrig study`` and ``swarmrig report`` subcommands (parsers and handlers)."""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path
from typing import Any

__all__ = ["add_study_parsers", "cmd_report", "cmd_study"]

EXIT_SCENARIO = 2
EXIT_INTERRUPTED = 130


def add_study_parsers(sub: Any) -> None:
    s = sub.add_parser(
        "study",
        help="many runs of one scenario: a grid, a break-point search or a priority front",
    )
    s.add_argument("study", type=Path, help="study TOML file")
    s.add_argument("--out", type=Path, help="the study directory (default studies/<name>)")
    s.add_argument(
        "--workers",
        type=int,
        default=os.cpu_count() or 1,
        help="runs at a time (default: the core count)",
    )
    s.add_argument(
        "--engine",
        choices=("auto", "batch", "lockstep", "processes"),
        help="override [study].engine (auto: batch where allowed, else lockstep, else processes)",
    )
    s.add_argument(
        "--keep-runs",
        type=int,
        metavar="N",
        help="keep the run directories of the first N seeds of each point only (default: all)",
    )
    s.add_argument(
        "--cluster",
        metavar="ADDRESS",
        help="send the runs to a Dask distributed scheduler, e.g. tcp://lab-pc:8786",
    )
    s.add_argument("--quiet", action="store_true", help="no progress, only the closing line")

    r = sub.add_parser("report", help="write report.html for a run or a study directory")
    r.add_argument("directory", type=Path, help="a run directory or a study directory")


def _err(msg: str) -> None:
    print(f"swarmrig: error: {msg}", file=sys.stderr)


def cmd_study(args: argparse.Namespace) -> int:
    from coordinator._study import StudyOptions, progress_printer, run_study
    from coordinator._study_spec import load_study_spec
    from topologies._errors import ScenarioError

    if args.workers < 1:
        _err(f"--workers: expected at least 1, got {args.workers}")
        return EXIT_SCENARIO
    if args.keep_runs is not None and args.keep_runs < 0:
        _err(f"--keep-runs: expected N >= 0, got {args.keep_runs}")
        return EXIT_SCENARIO
    try:
        name = load_study_spec(args.study).name
    except ScenarioError as exc:
        _err(str(exc))
        return EXIT_SCENARIO
    update, close = (None, lambda: None) if args.quiet else progress_printer(f"study {name}")
    opts = StudyOptions(
        out=args.out,
        workers=args.workers,
        keep_runs=args.keep_runs,
        engine=args.engine,
        cluster=args.cluster,
        progress=update,
    )
    try:
        out = run_study(args.study, opts)
    except ScenarioError as exc:
        close()
        _err(str(exc))
        return EXIT_SCENARIO
    except KeyboardInterrupt:
        close()
        print(
            "swarmrig: study interrupted; finished runs are kept. Run the same command again"
            " to resume.",
            file=sys.stderr,
        )
        return EXIT_INTERRUPTED
    close()
    print(_closing_line(out))
    return 0


def _closing_line(out: Path) -> str:
    import json

    text = f"study directory: {out}  (report: {out / 'report.html'})"
    bp = out / "breakpoint.json"
    if bp.exists():
        text = json.loads(bp.read_text())["statement"] + "\n" + text
    return text


def cmd_report(args: argparse.Namespace) -> int:
    from coordinator._report import write_report

    d = args.directory
    if not (d / "study.json").exists() and not (d / "summary.json").exists():
        _err(f"{d}: neither a run directory (summary.json) nor a study directory (study.json)")
        return EXIT_SCENARIO
    if (d / "study.json").exists():
        from coordinator._figures import study_figures

        study_figures(d)
    path = write_report(d)
    print(f"report: {path}")
    return 0
