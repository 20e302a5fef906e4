"""Study files: validation, key addressing (faults by name), fingerprints, refusal of a
changed study in an existing study directory."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from coordinator._scenario import load_scenario
from coordinator._study import StudyChanged, _prepare_dir
from coordinator._study_spec import apply_values, load_study_spec, scenario_for
from topologies._errors import ScenarioError

BASE = """
[swarm]
name = "reef"
agents = 4
iterations = 50
seed = 11
[topology]
shape = "ring"
[algorithm]
name = "dgd"
step = 0.1
[[fault]]
kind = "loss"
name = "surf"
links = "all"
rate = 0.1
[[fault]]
kind = "delay"
links = { from = 0 }
ms = 2.0
"""


def _write(tmp: Path, study: str) -> Path:
    (tmp / "reef.toml").write_text(BASE)
    p = tmp / "study.toml"
    p.write_text(study)
    return p


def test_grid_range_and_fault_by_name(tmp_path: Path) -> None:
    p = _write(
        tmp_path,
        """
[study]
kind = "grid"
scenario = "reef.toml"
seeds = 3
[vary]
"fault.surf.rate" = { from = 0.0, to = 0.3, count = 4 }
"algorithm.step" = [0.05, 0.1]
""",
    )
    spec = load_study_spec(p)
    assert spec.seeds == (11, 12, 13)  # a count starts at the base scenario's seed
    assert spec.vary["fault.surf.rate"] == (0.0, 0.1, 0.2, 0.3)
    s = scenario_for(spec, {"fault.surf.rate": 0.2, "algorithm.step": 0.05}, 12)
    assert s.seed == 12
    assert s.faults[0]["name"] == "surf" and s.faults[0]["params"]["rate"] == 0.2
    assert s.algorithm["step"] == 0.05
    # the fault's position addresses it too; the base is not changed
    doc = apply_values(spec.base, {"fault.1.ms": 7.0})
    assert doc["fault"][1]["ms"] == 7.0 and spec.base["fault"][1]["ms"] == 2.0


@pytest.mark.parametrize(
    ("vary", "message"),
    [
        ('"fault.nowhere.rate" = [0.1]', "no fault named 'nowhere'"),
        ('"fault.surf.rate" = [0.1, 2.0]', "rate"),
        ('"algorithm.step" = { from = 0.1, to = 0.2 }', "count"),
    ],
)
def test_bad_grid_is_refused_naming_the_key(tmp_path: Path, vary: str, message: str) -> None:
    p = _write(tmp_path, f'[study]\nkind = "grid"\nscenario = "reef.toml"\n[vary]\n{vary}\n')
    with pytest.raises(ScenarioError, match=message) as err:
        load_study_spec(p)
    assert str(p) in str(err.value)


def test_duplicate_fault_names_are_refused() -> None:
    doc = {
        "swarm": {"agents": 3},
        "topology": {"shape": "ring"},
        "fault": [
            {"kind": "loss", "name": "a", "links": "all", "rate": 0.1},
            {"kind": "loss", "name": "a", "links": "all", "rate": 0.2},
        ],
    }
    with pytest.raises(ScenarioError, match=r"\[\[fault\]\] #1: name: 'a' is already"):
        load_scenario(doc)


def test_inline_scenario_and_front_defaults(tmp_path: Path) -> None:
    p = tmp_path / "f.toml"
    p.write_text(
        """
[study]
kind = "front"
[scenario.swarm]
agents = 3
[scenario.topology]
shape = "complete"
[front]
divisions = 3
"""
    )
    spec = load_study_spec(p)
    assert spec.front["groups"] == [[0], [1], [2]]
    p.write_text(p.read_text().replace("agents = 3", "agents = 5"))
    with pytest.raises(ScenarioError, match="more than 3"):
        load_study_spec(p)


def test_changed_study_is_refused(tmp_path: Path) -> None:
    study = '[study]\nkind = "grid"\nscenario = "reef.toml"\n[vary]\n"algorithm.step" = [0.1]\n'
    p = _write(tmp_path, study)
    out = tmp_path / "out"
    _prepare_dir(load_study_spec(p), out)
    _prepare_dir(load_study_spec(p), out)  # the same study resumes
    p.write_text(study.replace("[0.1]", "[0.1, 0.2]"))
    with pytest.raises(StudyChanged, match=r"different study file \(changed: \[vary\]\)"):
        _prepare_dir(load_study_spec(p), out)
    # a change in the base scenario file is a change of the study too
    p.write_text(study)
    (tmp_path / "reef.toml").write_text(BASE.replace("step = 0.1", "step = 0.2"))
    with pytest.raises(StudyChanged, match=r"\[scenario\]"):
        _prepare_dir(load_study_spec(p), out)


def test_readme_studies_section_examples_load_and_its_figures_exist() -> None:
    root = Path(__file__).resolve().parents[2]
    readme = (root / "README.md").read_text()
    section = readme.split("\n## Studies\n", 1)[1].split("\n## ", 1)[0]
    examples = sorted((root / "examples" / "studies").glob("*.toml"))
    kinds = set()
    for f in examples:
        spec = load_study_spec(f)
        kinds.add(spec.kind)
        assert f"examples/studies/{f.name}" in section, f.name
    assert kinds == {"grid", "breakpoint", "front"}
    images = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", section)
    assert len(images) >= 3
    for img in images:
        assert (root / img).is_file(), img
    assert "not a safety case" in section
