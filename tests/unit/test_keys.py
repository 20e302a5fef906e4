"""Key material: swarmrig keys make / pack, the allow-list, and the permission checks."""

from __future__ import annotations

import os
import stat
from pathlib import Path

import pytest
import zmq

from coordinator._keys import make_keys, pack_keys, parse_host_spec
from coordinator.cli import main
from node._security import (
    ALLOW_FILE,
    KeyMaterialError,
    is_loopback,
    load_agent_keys,
    load_coordinator_keys,
    read_allow_list,
    read_secret,
)
from topologies._errors import ScenarioError


def mode(path: Path) -> int:
    return stat.S_IMODE(path.stat().st_mode)


def test_make_writes_private_secrets_and_a_matching_allow_list(tmp_path: Path) -> None:
    d = make_keys(tmp_path / "k", agents=3)
    assert mode(d) == 0o700
    for name in ("coordinator", "agent-0", "agent-1", "agent-2"):
        assert mode(d / f"{name}.key_secret") == 0o600, name
        assert mode(d / f"{name}.key") == 0o644, name
        public, secret = read_secret(d / f"{name}.key_secret")
        # the public half is the one libzmq derives from the secret (pyzmq's curve_public)
        assert zmq.curve_public(secret) == public
    allow = read_allow_list(d)
    assert allow.agents == {0: "agent-0", 1: "agent-1", 2: "agent-2"}
    assert allow.coordinator == read_secret(d / "coordinator.key_secret")[0]
    keys = load_agent_keys(d, 2)
    assert keys.public == allow.key_of(2) and keys.coordinator == allow.coordinator
    coord = load_coordinator_keys(d, 3)
    assert coord.public == allow.coordinator
    # every key pair is distinct
    assert len({allow.coordinator, *allow.keys.values()}) == 4


def test_host_keys_share_one_pair_per_host(tmp_path: Path) -> None:
    d = make_keys(tmp_path / "k", agents=5, hosts=["rover-a=0,1", "lab-pc=2-3"])
    allow = read_allow_list(d)
    assert allow.agents == {0: "rover-a", 1: "rover-a", 2: "lab-pc", 3: "lab-pc", 4: "agent-4"}
    assert load_agent_keys(d, 1).public == load_agent_keys(d, 0).public
    assert load_agent_keys(d, 2).public != load_agent_keys(d, 0).public


@pytest.mark.parametrize("spec", ["rover", "=1", "coordinator=1", "a=x", "a=1-", "a b=1"])
def test_bad_host_specs_are_refused(spec: str) -> None:
    with pytest.raises(KeyMaterialError, match="--host"):
        parse_host_spec(spec)


def test_an_agent_on_two_hosts_is_refused(tmp_path: Path) -> None:
    with pytest.raises(KeyMaterialError, match="agent 1 is in --host a and --host b"):
        make_keys(tmp_path / "k", hosts=["a=0,1", "b=1,2"])


def test_keys_are_never_overwritten(tmp_path: Path) -> None:
    d = make_keys(tmp_path / "k", agents=2)
    before = (d / "coordinator.key_secret").read_bytes()
    with pytest.raises(KeyMaterialError, match="not empty"):
        make_keys(d, agents=2)
    assert (d / "coordinator.key_secret").read_bytes() == before


@pytest.mark.parametrize("loose", [0o640, 0o604, 0o660, 0o644, 0o602])
def test_a_secret_key_others_can_read_is_refused(tmp_path: Path, loose: int) -> None:
    d = make_keys(tmp_path / "k", agents=2)
    secret = d / "agent-1.key_secret"
    os.chmod(secret, loose)
    with pytest.raises(KeyMaterialError) as info:
        load_agent_keys(d, 1)
    text = str(info.value)
    assert str(secret) in text and f"{loose:04o}" in text and "chmod 600" in text, text
    assert isinstance(info.value, ScenarioError)
    load_agent_keys(d, 0)  # the others are fine


def test_a_loose_coordinator_key_stops_the_cli_before_anything_starts(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    d = make_keys(tmp_path / "k", agents=3)
    os.chmod(d / "coordinator.key_secret", 0o644)
    scenario = tmp_path / "s.toml"
    scenario.write_text('[swarm]\nagents = 3\n[topology]\nshape = "ring"\n')
    out = tmp_path / "run"
    code = main(["run", str(scenario), "--keys", str(d), "--quiet", "--out", str(out)])
    err = capsys.readouterr().err
    assert code == 2, err
    assert "coordinator.key_secret" in err and "chmod 600" in err, err
    assert not (out / "run.json").exists()


def test_the_allow_list_must_cover_every_agent(tmp_path: Path) -> None:
    d = make_keys(tmp_path / "k", agents=2)
    with pytest.raises(KeyMaterialError, match=r"no key for agent\(s\) \[2, 3\]"):
        load_coordinator_keys(d, 4)


def test_keys_of_two_makes_do_not_mix(tmp_path: Path) -> None:
    a = make_keys(tmp_path / "a", agents=2)
    b = make_keys(tmp_path / "b", agents=2)
    os.replace(b / "coordinator.key_secret", a / "coordinator.key_secret")
    with pytest.raises(KeyMaterialError, match="not the coordinator key"):
        load_coordinator_keys(a, 2)
    os.replace(b / "agent-0.key_secret", a / "agent-0.key_secret")
    with pytest.raises(KeyMaterialError, match=r"not the one allow\.toml lists"):
        load_agent_keys(a, 0)


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("coordinator = 3\n[keys]\n[agents]\n", "coordinator: expected a 40-character"),
        ('coordinator = "{c}"\n[keys]\na = "{c}"\n[agents]\n"0" = "b"\n', "key 'b' is not"),
        ('coordinator = "{c}"\n[keys]\na = "{c}"\n[agents]\n"x" = "a"\n', "agent id is a number"),
        ('coordinator = "{c}"\nextra = 1\n[keys]\na = "{c}"\n[agents]\n"0" = "a"\n', "extra"),
        ('coordinator = "{c}"\n[keys]\na = "short"\n[agents]\n"0" = "a"\n', r"\[keys\] a"),
        ("coordinator = [\n", "not valid TOML"),
    ],
)
def test_a_malformed_allow_list_names_the_file_and_key(
    tmp_path: Path, text: str, match: str
) -> None:
    public = zmq.curve_keypair()[0].decode()
    (tmp_path / ALLOW_FILE).write_text(text.replace("{c}", public))
    with pytest.raises(KeyMaterialError, match=match) as info:
        read_allow_list(tmp_path)
    assert ALLOW_FILE in str(info.value)


def test_pack_copies_only_what_one_host_needs(tmp_path: Path) -> None:
    d = make_keys(tmp_path / "k", agents=4)
    out = tmp_path / "rover"
    files = pack_keys(d, out, [1, 3])
    assert sorted(p.name for p in out.iterdir()) == [
        "agent-1.key_secret",
        "agent-3.key_secret",
        ALLOW_FILE,
    ]
    assert sorted(files) == sorted(out.iterdir())
    assert mode(out) == 0o700 and mode(out / "agent-3.key_secret") == 0o600
    assert load_agent_keys(out, 3).public == load_agent_keys(d, 3).public
    with pytest.raises(KeyMaterialError, match="no such secret key file"):
        load_agent_keys(out, 0)


def test_cli_make_and_pack(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    d = tmp_path / "k"
    assert main(["keys", "make", str(d), "--agents", "2", "--host", "buoy=2,3"]) == 0
    assert read_allow_list(d).agents[3] == "buoy"
    assert main(["keys", "pack", str(d), str(tmp_path / "h"), "--agents", "2,3"]) == 0
    assert (tmp_path / "h" / "buoy.key_secret").exists()
    assert main(["keys", "pack", str(d), str(tmp_path / "h"), "--agents", "two"]) == 2
    assert "expected agent ids" in capsys.readouterr().err


@pytest.mark.parametrize(
    ("endpoint", "loopback"),
    [
        ("tcp://127.0.0.1:5570", True),
        ("tcp://localhost:5570", True),
        ("tcp://[::1]:5570", True),
        ("ipc:///tmp/x", True),
        ("tcp://0.0.0.0:5570", False),
        ("tcp://10.0.0.5:5570", False),
        ("tcp://lab-pc.local:5570", False),
    ],
)
def test_loopback_endpoints(endpoint: str, loopback: bool) -> None:
    assert is_loopback(endpoint) is loopback
