"""The README documents what the code accepts and writes (keys cannot drift apart)."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

from coordinator._demos import list_demos
from coordinator._rundir import LINK_COLUMNS, METRIC_COLUMNS
from coordinator._scenario import describe_keys, load_scenario

ROOT = Path(__file__).resolve().parents[2]
README = (ROOT / "README.md").read_text()


def test_every_scenario_key_is_in_the_reference():
    for key, _, _ in describe_keys():
        assert f"`{key}`" in README, key


def test_run_directory_columns_are_documented():
    for col in LINK_COLUMNS + METRIC_COLUMNS:
        assert col in README, col


def test_quickstart_is_two_commands_and_ci_runs_the_second():
    quick = README.split("## Quickstart", 1)[1].split("\n## ", 1)[0]
    commands = re.findall(r"```sh\n(.+?)\n```", quick)
    assert len(commands) == 2, commands
    assert "swarmrig run" in commands[0] and "pytest" in commands[1]
    assert commands[1] in (ROOT / ".ci" / "run").read_text()


def test_the_readme_scenario_example_is_valid():
    block = README.split("### Scenario reference", 1)[0].split("```toml\n")[1].split("```")[0]
    raw = tomllib.loads(block)
    s = load_scenario(raw)
    # what the example says is what the loader takes: every value written in it arrives
    assert (s.name, s.agents, s.dimension, s.seed, s.mode) == (
        raw["swarm"]["name"],
        raw["swarm"]["agents"],
        raw["swarm"]["dimension"],
        raw["swarm"]["seed"],
        raw["swarm"]["mode"],
    )
    assert (s.iterations, s.tolerance) == (raw["swarm"]["iterations"], raw["swarm"]["tolerance"])
    assert s.topology == {"shape": raw["topology"]["shape"]}
    assert s.objective["kind"] == raw["objective"]["kind"]
    assert s.objective["spread"] == raw["objective"]["spread"]
    assert s.algorithm["name"] == raw["algorithm"]["name"]
    assert s.algorithm["step"] == raw["algorithm"]["step"]
    (fault,) = s.faults
    (written,) = raw["fault"]
    assert fault["kind"] == written["kind"] and fault["scope"] == written["links"]
    assert fault["params"] == {"rate": written["rate"]}
    assert (fault["start_s"], fault["duration_s"]) == (written["start_s"], written["duration_s"])


def test_the_scenario_reference_is_describe_keys_row_for_row():
    # the README's table is generated from describe_keys(): bounds and defaults cannot drift
    head = "| key | default | meaning |\n|---|---|---|\n"
    table = README.split(head, 1)[1].split("\n\n", 1)[0].splitlines()

    def cell(text: str) -> str:
        return text.replace("|", "\\|")

    expected = [f"| `{k}` | {cell(d)} | {cell(m)} |" for k, d, m in describe_keys()]
    assert table == expected


def test_no_emulator_product_is_named():
    # other programs are described in general words only (the name is spelled in pieces
    # here so that this file does not name it either)
    PRODUCT = "net" + "em"
    for path in [ROOT / "README.md", ROOT / "DEVELOPERS.md", *ROOT.glob("*/**/*.py")]:
        if ".venv" in path.parts:
            continue
        assert PRODUCT not in path.read_text(errors="replace").lower(), path


def test_demos_are_named_in_the_readme():
    for name, _ in list_demos():
        assert name in README, name


def test_safety_caution_is_there():
    assert "not a safety case" in README and "local" in README and "regulations" in README
