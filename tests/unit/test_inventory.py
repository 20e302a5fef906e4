"""The inventory file: validation with errors naming file and key; the ssh command line."""

from __future__ import annotations

import shlex
from pathlib import Path

import pytest

from coordinator._inventory import InventoryError, load_inventory
from coordinator._keys import make_keys
from coordinator._remote import ssh_command
from node._security import read_allow_list
from topologies._errors import ScenarioError

ROOT = Path(__file__).resolve().parents[2]

GOOD = """
coordinator = "tcp://10.0.0.5:5570"

[defaults]
python = "/opt/swarmrig/.venv/bin/python"

[[host]]
name = "rover-a"
ssh = "lab@rover-a.local"
agents = [0, 1]

[[host]]
name = "lab-pc-2"
ssh = "lab-pc-2.local"
agents = [2]
venv = "/home/lab/venv"
ssh_options = ["-p", "2222"]
"""


def write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "hosts.toml"
    p.write_text(text)
    return p


def test_a_good_inventory_and_its_defaults(tmp_path):
    inv = load_inventory(write(tmp_path, GOOD))
    assert inv.coordinator == "tcp://10.0.0.5:5570"
    assert inv.listen == "tcp://0.0.0.0:5570"  # the coordinator's port on every interface
    a, b = inv.hosts
    assert a.python == "/opt/swarmrig/.venv/bin/python" and a.ssh_options == ()
    assert b.python == "/home/lab/venv/bin/python" and b.ssh_options == ("-p", "2222")
    assert inv.host_of(2) is b
    inv.check_swarm(3, "lab", {"host": "0.0.0.0"})


def test_the_example_inventory_is_valid():
    inv = load_inventory(ROOT / "deploy" / "inventory.example.toml")
    assert inv.hosts


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (('coordinator = "tcp://10.0.0.5:5570"', ""), "hosts.toml: coordinator: missing"),
        (("tcp://10.0.0.5:5570", "10.0.0.5:5570"), "hosts.toml: coordinator: expected"),
        (("tcp://10.0.0.5:5570", "tcp://10.0.0.5:99999"), "port 99999 is not in 1..65535"),
        (("[defaults]", "colour = 1\n[defaults]"), "hosts.toml: unknown key 'colour'"),
        (("agents = [2]", "agents = [1]"), "name='lab-pc-2': agents: agent 1 is already on"),
        (("agents = [2]", "agents = []"), "name='lab-pc-2': agents: expected a non-empty"),
        (("agents = [2]", "agents = [true]"), "name='lab-pc-2': agents: expected"),
        (("agents = [2]", "agents = [2, 2]"), "lists an id twice"),
        (('ssh = "lab-pc-2.local"', 'ssh = "-oProxyCommand=x"'), "ssh: expected an ssh"),
        (('ssh = "lab-pc-2.local"', 'ssh = "a b"'), "ssh: expected an ssh"),
        (('name = "lab-pc-2"', 'name = "rover-a"'), "name='rover-a': name: used twice"),
        (('name = "lab-pc-2"', 'name = "x y"'), "[[host]] #2: name: expected"),
        (('venv = "/home/lab/venv"', 'venv = "venv"'), "venv: 'venv': give an absolute"),
        (('venv = "/home/lab/venv"', "venv = 1"), "venv: expected a path"),
        (
            ('venv = "/home/lab/venv"', 'venv = "/v"\npython = "/p"'),
            "give python or venv, not both",
        ),
        (('ssh_options = ["-p", "2222"]', 'ssh_options = "-p 2222"'), "ssh_options:"),
        (('ssh_options = ["-p", "2222"]', "port = 22"), "unknown key 'port'"),
        (('venv = "/home/lab/venv"', 'venv = "/v"\nkeys = "lab-keys"'), "keys: 'lab-keys': give"),
        (('venv = "/home/lab/venv"', 'venv = "/v"\nkeys = 3'), "keys: expected a directory"),
    ],
)
def test_bad_inventories_are_refused_naming_file_and_key(tmp_path, change, message):
    old, new = change
    assert old in GOOD
    with pytest.raises(InventoryError) as err:
        load_inventory(write(tmp_path, GOOD.replace(old, new, 1)))
    assert message in str(err.value)
    assert str(err.value).startswith("hosts.toml")


def test_no_hosts_not_toml_and_missing_file(tmp_path):
    with pytest.raises(InventoryError, match="at least one"):
        load_inventory(write(tmp_path, 'coordinator = "tcp://a:1"\n'))
    with pytest.raises(InventoryError, match="not valid TOML"):
        load_inventory(write(tmp_path, "coordinator = \n"))
    with pytest.raises(InventoryError, match="no such inventory file"):
        load_inventory(tmp_path / "absent.toml")


def test_the_inventory_must_cover_the_scenario_exactly(tmp_path):
    inv = load_inventory(write(tmp_path, GOOD))
    with pytest.raises(InventoryError, match=r"agents \[3\] of scenario 'lab' have no"):
        inv.check_swarm(4, "lab", {"host": "0.0.0.0"})
    with pytest.raises(InventoryError, match=r"name='lab-pc-2': agents: \[2\] are not agents"):
        inv.check_swarm(2, "lab", {"host": "0.0.0.0"})
    with pytest.raises(ScenarioError, match=r"\[network\].host = '127.0.0.1'"):
        inv.check_swarm(3, "lab", {"host": "127.0.0.1"})


def test_the_ssh_command_quotes_the_remote_side(tmp_path):
    inv = load_inventory(write(tmp_path, GOOD.replace("/home/lab/venv", "/home/lab/my venv")))
    cmd = ssh_command(inv.hosts[1], 4.0)
    # the inventory's options first (ssh keeps the first value of an option), never a shell
    assert cmd[:3] == ["ssh", "-p", "2222"] and cmd[-2:-1] == ["lab-pc-2.local"]
    assert cmd[-3] == "--"
    remote = shlex.split(cmd[-1])
    assert remote[0] == "exec" and "/home/lab/my venv/bin/python" in remote
    assert remote[-3:] == ["node._forkserver", "--idle-timeout", "4"]


def test_key_directories_per_host_with_keys_and_none_without(tmp_path):
    keyed = GOOD.replace("[defaults]", '[defaults]\nkeys = "~/swarm-keys"').replace(
        'venv = "/home/lab/venv"', 'venv = "/home/lab/venv"\nkeys = "/etc/pc2-keys"'
    )
    inv = load_inventory(write(tmp_path, keyed))
    assert [h.keys for h in inv.hosts] == ["~/swarm-keys", "/etc/pc2-keys"]
    allow = read_allow_list(make_keys(tmp_path / "k", agents=3))
    inv.check_keys(allow)
    with pytest.raises(InventoryError, match=r"name='rover-a': keys = '~/swarm-keys', but this"):
        inv.check_keys(None)
    short = read_allow_list(make_keys(tmp_path / "k2", agents=2))
    with pytest.raises(InventoryError, match=r"name='lab-pc-2': agents \[2\] have no key in"):
        inv.check_keys(short)
    plain = load_inventory(write(tmp_path, GOOD))
    plain.check_keys(None)
    with pytest.raises(InventoryError) as err:
        plain.check_keys(allow)
    assert "name='rover-a': keys: missing" in str(err.value)
    assert "swarmrig keys pack DIR OUT --agents 0,1" in str(err.value)
