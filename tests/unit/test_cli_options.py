"""The command line as a new user meets it: help for every option, a version, bounded values,
progress from bench, and the algorithm options `check` shows being the ones agents use."""

from __future__ import annotations

import argparse
from importlib.metadata import version

import numpy as np
import pytest

from coordinator import _bench
from coordinator._endpoints import EndpointError, check_endpoint
from coordinator.cli import _parser, main
from node import algorithm_class, algorithm_names
from node._memory import run_in_memory
from tests.references._specs import build, make_specs, metropolis, ring_adjacency, unit_quadratics


def _subparsers(p: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    (sub,) = [a for a in p._actions if isinstance(a, argparse._SubParsersAction)]
    return dict(sub.choices)


def test_every_option_of_every_command_has_help() -> None:
    for name, sub in _subparsers(_parser()).items():
        for action in sub._actions:
            assert action.help and action.help != argparse.SUPPRESS, (name, action.dest)


def test_version_is_the_installed_one(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stop:
        main(["--version"])
    assert stop.value.code == 0
    assert capsys.readouterr().out.strip() == f"swarmrig {version('swarmrig')}"


@pytest.mark.parametrize(
    "argv",
    [
        ["run", "--heartbeat-timeout", "-1"],
        ["run", "--heartbeat-timeout", "nan"],
        ["run", "--join-timeout", "0"],
        ["node", "--join", "tcp://127.0.0.1:5570", "--agent", "-2"],
        ["node", "--join", "tcp://127.0.0.1:5570", "--agent", "1", "--heartbeat-timeout", "inf"],
    ],
)
def test_bad_option_values_are_refused_by_the_parser(
    argv: list[str], capsys: pytest.CaptureFixture[str]
) -> None:
    with pytest.raises(SystemExit) as stop:
        _parser().parse_args(argv)
    assert stop.value.code == 2
    assert "expected" in capsys.readouterr().err


@pytest.mark.parametrize(
    ("text", "bind", "message"),
    [
        (
            "127.0.0.1:5575",
            True,
            "--x 127.0.0.1:5575: expected tcp://HOST:PORT, e.g. tcp://0.0.0.0:5570"
            " (did you mean tcp://127.0.0.1:5575?)",
        ),
        (
            "localhost:5574",
            False,
            "--x localhost:5574: expected tcp://HOST:PORT, e.g. tcp://lab-pc:5570"
            " (did you mean tcp://localhost:5574?)",
        ),
        ("tcp://localhost", False, "--x tcp://localhost: expected tcp://HOST:PORT"),
        ("udp://lab:1", False, "(the scheme udp:// is not one ZeroMQ binds here)"),
        ("tcp://lab:70000", True, "--x tcp://lab:70000: port 70000 is not in 1..65535"),
        ("tcp://lab:*", False, "a wildcard host or port can be bound, not joined"),
        ("", True, "--x: expected tcp://HOST:PORT"),
    ],
)
def test_malformed_endpoints_are_explained(text: str, bind: bool, message: str) -> None:
    with pytest.raises(EndpointError) as err:
        check_endpoint(text, option="--x", bind=bind)
    assert message in str(err.value)


@pytest.mark.parametrize(
    ("text", "bind"),
    [
        ("tcp://0.0.0.0:5570", True),
        ("tcp://127.0.0.1:*", True),
        ("tcp://*:5570", True),
        ("tcp://[::1]:5570", False),
        ("tcp://lab-pc-3.local:5570", False),
        ("ipc:///tmp/swarm.sock", False),
    ],
)
def test_well_formed_endpoints_pass(text: str, bind: bool) -> None:
    assert check_endpoint(text, option="--x", bind=bind) == text


def test_bench_reports_progress_before_every_measurement(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # the measurements themselves are benchmarks; here only the order of the reports counts
    measured: list[str] = []
    monkeypatch.setattr(_bench, "spawn_time", lambda n: measured.append("spawn") or 1.0)
    monkeypatch.setattr(_bench, "rounds_rate", lambda n, k: measured.append("rounds") or 1.0)
    monkeypatch.setattr(_bench, "bare_ring_rate", lambda n, k: measured.append("bare") or 1.0)
    monkeypatch.setattr(
        _bench, "batch_rate", lambda n, k, seeds, shape: measured.append("batch") or 1.0
    )
    monkeypatch.setattr(
        _bench,
        "message_path",
        lambda count, node_path, fault=None, transport="ipc", curve=False: (
            measured.append("path") or {"msgs_per_s": 1.0}
        ),
    )
    monkeypatch.setattr(
        _bench, "curve_rounds_rate", lambda n, k, curve: measured.append("curve") or 1.0
    )
    reports: list[tuple[int, int, str, int]] = []
    _bench.bench(
        quick=False, repeats=2, progress=lambda d, t, w: reports.append((d, t, w, len(measured)))
    )
    total = len(measured)
    assert total == 2 * (3 + 2 + 2 + 3 + 3 + 4)
    assert [r[0] for r in reports] == list(range(total + 1))
    assert {r[1] for r in reports} == {total}
    # each report comes before its measurement: nothing measured yet at report k but k
    assert [r[3] for r in reports] == list(range(total + 1))
    assert reports[0][2] == "spawn time, 32 agents" and reports[-1][2] == "done"


@pytest.mark.parametrize("name", algorithm_names())
def test_declared_option_defaults_are_what_the_algorithm_does(name: str) -> None:
    cls = algorithm_class(name)
    adjacency = ring_adjacency(5)
    w = metropolis(adjacency)
    targets = np.arange(10.0).reshape(5, 2)
    x0 = np.zeros((5, 2))
    priorities = np.full((5, 5), 0.2) if cls.uses_priorities else None

    def final(params: dict) -> list[np.ndarray]:
        specs = make_specs(w, unit_quadratics(targets), x0, priorities=priorities, params=params)
        drop_every_third = lambda src, dst, k: (src + dst + k) % 3 != 0  # noqa: E731
        return [s.x for s in run_in_memory(build(cls, specs), 40, deliver=drop_every_third)]

    # writing the declared defaults out must change nothing, under loss too (where the
    # missing policy matters)
    for a, b in zip(final({}), final(dict(cls.option_defaults)), strict=True):
        np.testing.assert_array_equal(a, b)
    for policy in cls.missing_policies:
        assert isinstance(policy, str)
    if "missing" in cls.option_defaults:
        assert cls.option_defaults["missing"] in cls.missing_policies


def test_check_shows_the_options_every_agent_uses(
    tmp_path, capsys: pytest.CaptureFixture[str]
) -> None:
    import coordinator

    base = {"swarm": {"agents": 6, "seed": 1}, "topology": {"shape": "ring"}}
    info = coordinator.check(base)
    assert info["algorithm"] == {"name": "dgd", "step": 0.05, "options": {"missing": "reuse"}}
    pw = coordinator.check({**base, "algorithm": {"name": "priority-weighted"}})
    # the coordinator's gain, 0.5 / max degree on a ring, replaces the class default
    assert pw["algorithm"]["options"] == {
        "gain": 0.25,
        "missing": "same-rule",
        "priority_averaging": "laplacian",
    }
    path = tmp_path / "ring.toml"
    path.write_text('[swarm]\nagents = 6\nseed = 1\n[topology]\nshape = "ring"\n')
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert '# algorithm options every agent uses ("dgd", its own defaults filled)\n' in out
    assert '#   missing = "reuse"\n' in out
