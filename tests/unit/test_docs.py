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
    load_scenario(tomllib.loads(block))


def test_demos_are_named_in_the_readme():
    for name, _ in list_demos():
        assert name in README, name


def test_safety_caution_is_there():
    assert "not a safety case" in README and "local" in README and "regulations" in README
