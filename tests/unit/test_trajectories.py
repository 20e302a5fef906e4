"""Telemetry for users: plain msgpack with string keys, read back by every reader, and the
per-agent trajectories as a labelled pandas table that matches a numpy recomputation."""

from __future__ import annotations

import io
from pathlib import Path

import msgpack
import numpy as np
import pandas as pd
import pytest

import coordinator
from coordinator._rundir import RunDir, read_telemetry


def _batch(epoch: int, samples: list) -> dict:
    # the shape the coordinator writes: link counters keyed by sender id, then epoch
    return {
        "epoch": epoch,
        "offset": 0.25,
        "t_go": 10.0,
        "samples": samples,
        "links": {1: {epoch: [5, 4, 0, 1, 0, 0, 0, None, None, None]}},
        "counters": {"rejected": 0},
    }


def test_telemetry_files_open_with_msgpack_defaults(tmp_path: Path) -> None:
    rd = RunDir(tmp_path / "run")
    rd.telemetry(0, _batch(0, [[1, 10.5, [1.0, 2.0], None, 3.0, {1: 0.5, 0: 0.5}]]))
    rd.close()
    path = tmp_path / "run" / "telemetry" / "agent-0.msgpack"
    # msgpack's own defaults (strict_map_key=True) refuse integer keys: these are strings
    (plain,) = list(msgpack.Unpacker(io.BytesIO(path.read_bytes())))
    assert plain["links"] == {"1": {"0": [5, 4, 0, 1, 0, 0, 0, None, None, None]}}
    assert plain["samples"][0][5] == {"1": 0.5, "0": 0.5}
    # the project's reader gives integers back, as the code reading links expects
    (ours,) = read_telemetry(path)
    assert ours["links"] == {1: {0: [5, 4, 0, 1, 0, 0, 0, None, None, None]}}
    assert ours["samples"][0][5] == {1: 0.5, 0: 0.5}


def test_older_files_with_integer_keys_still_read(tmp_path: Path) -> None:
    path = tmp_path / "agent-2.msgpack"
    path.write_bytes(msgpack.packb(_batch(1, [])) + msgpack.packb(_batch(1, []))[:-3])
    batches = read_telemetry(path)  # the torn second batch is skipped
    assert len(batches) == 1 and batches[0]["links"] == {
        1: {1: [5, 4, 0, 1, 0, 0, 0, None, None, None]}
    }


def test_trajectories_are_one_labelled_row_per_sample(tmp_path: Path) -> None:
    rd = RunDir(tmp_path / "run")
    rd.telemetry(1, _batch(0, [[0, 10.25, [0.0, 1.0], [0.5, 0.5], 7.0, None]]))
    rd.telemetry(1, _batch(1, [[4, 12.25, [2.0, 3.0], [0.25, 0.75], 6.0, None]]))
    rd.telemetry(0, _batch(0, [[3, 11.25, [4.0, 5.0], [1.0, 0.0], 5.0, None]]))
    rd.close()
    df = coordinator.read_trajectories(tmp_path / "run")
    expected = pd.DataFrame(
        {
            "agent": [0, 1, 1],
            "epoch": [0, 0, 1],
            "iteration": [3, 0, 4],
            # agent time minus (go time + the agent's clock offset)
            "t_s": [1.0, 0.0, 2.0],
            "local_value": [5.0, 7.0, 6.0],
            "x_0": [4.0, 0.0, 2.0],
            "x_1": [5.0, 1.0, 3.0],
            "p_0": [1.0, 0.5, 0.25],
            "p_1": [0.0, 0.5, 0.75],
        }
    )
    pd.testing.assert_frame_equal(df, expected)


def test_no_telemetry_folder_is_a_clear_error(tmp_path: Path) -> None:
    with pytest.raises(FileNotFoundError, match="no telemetry/ folder"):
        coordinator.read_trajectories(tmp_path)


def test_trajectories_of_a_run_match_a_numpy_recomputation(tmp_path: Path) -> None:
    # DGD (Nedić & Ozdaglar, IEEE TAC 54 (2009)): x_i(k+1) = sum_j w_ij x_j(k)
    # - alpha (x_i(k) - b_i) for unit quadratics, with Metropolis–Hastings weights
    # w_ij = 1 / (1 + max(deg_i, deg_j)) (Xiao, Boyd, Kim, JPDC 67 (2007)); the lockstep
    # engine runs the real agent code in rounds mode, without faults exactly these steps.
    import json

    n, d, alpha, iterations = 5, 2, 0.1, 30
    scenario = {
        "swarm": {"agents": n, "dimension": d, "seed": 11, "iterations": iterations},
        "topology": {"shape": "ring"},
        "algorithm": {"name": "dgd", "step": alpha},
        "telemetry": {"every_iterations": 1},
    }
    out = tmp_path / "run"
    coordinator.run(scenario, out=out, engine="lockstep")
    agents = json.loads((out / "agents.json").read_text())
    b = np.array([a["objective"]["target"] for a in agents])
    x = np.array([a["initial_state"] for a in agents])
    deg = [len(a["in_neighbours"]) for a in agents]
    w = np.zeros((n, n))
    for a in agents:
        i = a["id"]
        for j in a["in_neighbours"]:
            w[i, j] = 1.0 / (1 + max(deg[i], deg[j]))
        w[i, i] = 1.0 - w[i].sum()
    expected = {0: x.copy()}
    for k in range(1, iterations + 1):
        x = w @ x - alpha * (x - b)
        expected[k] = x.copy()
    df = coordinator.read_trajectories(out)
    assert list(df.columns) == ["agent", "epoch", "iteration", "t_s", "local_value", "x_0", "x_1"]
    assert set(df.agent) == set(range(n)) and set(df.epoch) == {0}
    assert df.groupby("agent").iteration.max().tolist() == [iterations] * n
    for row in df.itertuples():
        np.testing.assert_allclose(
            [row.x_0, row.x_1], expected[row.iteration][row.agent], rtol=1e-12, atol=1e-12
        )
        # f_i(x) = |x - b_i|^2 / 2
        assert row.local_value == pytest.approx(
            0.5 * np.sum((expected[row.iteration][row.agent] - b[row.agent]) ** 2),
            rel=1e-9,
            abs=1e-12,
        )
    assert (df.groupby("agent").t_s.diff().dropna() >= 0).all()
