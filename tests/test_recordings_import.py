"""Importing a lab's recordings: real rosbag2 bags (sqlite3 and MCAP, written with rosbags) and CSV files."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from conftest import FAST, cli_env

from coreach.config.check import compose_config
from coreach.episodes import load_parquet
from coreach.errors import DataError
from coreach.host.registry import build_plugin
from coreach.recordings.import_command import import_recordings

rosbag2 = pytest.importorskip("rosbags.rosbag2")
from rosbags.typesys import Stores, get_typestore  # noqa: E402

COREACH = str(Path(sys.executable).parent / "coreach")
STORE = get_typestore(Stores.LATEST)
JOINTS = [f"joint_{i}" for i in range(1, 8)]  # the shipped seven_joint_arm
# near the arm's home, with the elbow at 2.0 rad so the +-0.3 rad swing stays inside its 2.40 rad limit
HOME = np.array([0.0, -0.15, 0.0, 2.0, 0.0, 0.45, 0.0])
AMP, OMEGA = 0.3, 1.5  # rad, rad/s: peak speed 0.45 rad/s, under every joint's 1.2-1.5 rad/s limit
T0_NS = 1_700_000_000 * 10**9  # a wall-clock origin: float seconds since 1970 would lose the milliseconds


def motion(t: np.ndarray) -> np.ndarray:
    """Known joint positions [K, 7] at times t (s): each joint swings around home with its own phase."""
    return HOME + AMP * np.sin(OMEGA * t[:, None] + np.arange(7))


def motion_speed(t: np.ndarray) -> np.ndarray:
    return AMP * OMEGA * np.cos(OMEGA * t[:, None] + np.arange(7))


def uneven_times(seconds: float, seed: int = 0) -> np.ndarray:
    """Sample times at an uneven rate: intervals drawn from 5-15 ms (about 100 Hz with jitter)."""
    rng = np.random.default_rng(seed)
    return np.cumsum(np.r_[0.0, rng.uniform(0.005, 0.015, int(seconds / 0.005))])[: int(seconds / 0.01)]


def _stamp(ns: int):
    Time = STORE.types["builtin_interfaces/msg/Time"]
    Header = STORE.types["std_msgs/msg/Header"]
    return Header(stamp=Time(sec=ns // 10**9, nanosec=ns % 10**9), frame_id="")


def write_bag(path: Path, storage: str, t: np.ndarray, *, q: np.ndarray | None = None, names=None,
              stamps: np.ndarray | None = None, goals=(("bottle", 0.0),), joy_every: int = 5,
              topics=("/joint_states", "/joy", "/goal"), velocities: np.ndarray | None = None) -> Path:
    """A real bag: JointState (names reversed, plus a gripper joint the arm lacks), Joy, goal labels.
    `stamps` (s) are the header stamps when they should differ from the recorder's clock `t`."""
    from rosbags.rosbag2 import StoragePlugin, Writer

    JS, Joy, String = (STORE.types[n] for n in ("sensor_msgs/msg/JointState", "sensor_msgs/msg/Joy",
                                                "std_msgs/msg/String"))  # fmt: skip
    q = motion(t) if q is None else q
    names = list(reversed(JOINTS)) + ["gripper"] if names is None else names
    order = [JOINTS.index(n) if n in JOINTS else None for n in names]
    stamps = t if stamps is None else stamps
    plugin = {"sqlite3": StoragePlugin.SQLITE3, "mcap": StoragePlugin.MCAP}[storage]
    with Writer(path, version=9, storage_plugin=plugin) as w:
        js = w.add_connection(topics[0], JS.__msgtype__, typestore=STORE)
        joy = w.add_connection(topics[1], Joy.__msgtype__, typestore=STORE) if topics[1] else None
        goal = w.add_connection(topics[2], String.__msgtype__, typestore=STORE) if topics[2] else None
        pending = sorted(goals, key=lambda g: g[1])
        for k, tk in enumerate(t):
            ns = T0_NS + int(round(tk * 1e9))
            while goal is not None and pending and pending[0][1] <= tk:
                w.write(goal, ns, STORE.serialize_cdr(String(data=pending.pop(0)[0]), String.__msgtype__))
            pos = np.array([q[k, i] if i is not None else 0.01 for i in order])
            vel = np.array([]) if velocities is None else np.array([velocities[k, i] if i is not None else 0.0
                                                                    for i in order])  # fmt: skip
            msg = JS(header=_stamp(T0_NS + int(round(stamps[k] * 1e9))), name=names, position=pos,
                     velocity=vel, effort=np.array([], dtype=np.float64))  # fmt: skip
            w.write(js, ns, STORE.serialize_cdr(msg, JS.__msgtype__))
            if joy is not None and k % joy_every == 0:
                axes = np.array([np.sin(tk), np.cos(tk)], dtype=np.float32)
                jm = Joy(header=_stamp(ns), axes=axes, buttons=np.array([], dtype=np.int32))
                w.write(joy, ns, STORE.serialize_cdr(jm, Joy.__msgtype__))
    return path


def run_import(inputs, out: Path, *overrides: str) -> dict:
    cfg = compose_config("import_recordings", [f"inputs=[{','.join(map(str, inputs))}]", f"out={out}", *overrides])
    return import_recordings(cfg)


@pytest.fixture(scope="module")
def robot():
    return build_plugin(compose_config("import_recordings", ["inputs=[x]"]).robot, "robot")


@pytest.mark.parametrize("storage", ["sqlite3", "mcap"])
def test_bag_is_resampled_like_numpy_interp_and_cut_at_the_goal_change(tmp_path, robot, storage):
    t = uneven_times(6.0)
    bag = write_bag(tmp_path / f"run_{storage}", storage, t, goals=(("bottle", 0.0), ("book", 3.02)))
    summary = run_import([bag], tmp_path / "out.parquet")
    assert summary["episodes"] == 2 and summary["found"] == {"gaps": 0, "duplicates": 0, "backwards": 0}
    assert summary["recordings"][0]["action"] == "finite differences of positions"
    es = load_parquet(tmp_path / "out.parquet", robot=robot)
    assert es.dt == 0.1 and es.joint_names == JOINTS
    assert [es.goal_names[e.goal] for e in es] == ["bottle", "book"]
    grid = t[0] + 0.1 * np.arange(int((t[-1] - t[0]) / 0.1 + 1e-9) + 1)
    q_ref = motion(t)  # the recorded samples, in the arm's joint order (the bag lists them reversed)
    # reference: numpy.interp of every joint onto the uniform grid; the last grid point only closes a step
    expected = np.stack([np.interp(grid, t, q_ref[:, j]) for j in range(7)], axis=1)
    q = np.concatenate([e.q for e in es])
    np.testing.assert_allclose(q, expected[:-1], rtol=0, atol=1e-9)  # stamps are whole nanoseconds
    # labels: steps before the "book" message at 3.02 s are "bottle"
    assert len(es[0]) == int(np.sum(grid[:-1] < 3.02))
    # actions: the forward difference of the interpolated positions, and close to the known motion's speed
    # at mid-step (central-difference error AMP * OMEGA^3 * dt^2 / 24 = 4e-4 rad/s, plus interpolation)
    qd = np.concatenate([e.qd for e in es])
    np.testing.assert_allclose(qd, np.diff(expected, axis=0) / 0.1, rtol=0, atol=1e-8)
    np.testing.assert_allclose(qd, motion_speed(grid[:-1] + 0.05), rtol=0, atol=2e-3)
    # tool poses: the arm's forward kinematics at q
    import torch

    pos, _ = robot.fk(torch.as_tensor(es[1].q))
    np.testing.assert_allclose(es[1].ee_pos, pos.numpy(), atol=1e-9)
    # the stick rides along as an extra column: the Joy axes last published at each step (float32 on the wire)
    stick = np.array(pq.read_table(tmp_path / "out.parquet").column("stick").to_pylist())
    joy_t = t[::5]
    held = joy_t[np.searchsorted(joy_t, grid[:-1], side="right") - 1]
    np.testing.assert_allclose(stick, np.c_[np.sin(held), np.cos(held)], atol=1e-6)


def test_sidecar_labels_the_bag_and_commands_become_the_action(tmp_path, robot):
    from rosbags.rosbag2 import StoragePlugin, Writer

    t = uneven_times(2.0, seed=1)
    bag = tmp_path / "run1"
    # one bag: joint states at an uneven rate and 20 Hz velocity commands as Float64MultiArray
    Multi = STORE.types["std_msgs/msg/Float64MultiArray"]
    Layout = STORE.types["std_msgs/msg/MultiArrayLayout"]
    JS = STORE.types["sensor_msgs/msg/JointState"]
    cmd_t = np.arange(0.0, 2.0, 0.05)
    cmd = 0.2 * np.sin(cmd_t)[:, None] * np.ones(7)
    with Writer(bag, version=9, storage_plugin=StoragePlugin.SQLITE3) as w:
        js = w.add_connection("/joint_states", JS.__msgtype__, typestore=STORE)
        cc = w.add_connection("/arm/velocity_command", Multi.__msgtype__, typestore=STORE)
        events = sorted([(tk, "q", k) for k, tk in enumerate(t)] + [(tk, "c", k) for k, tk in enumerate(cmd_t)])
        for tk, kind, k in events:
            ns = T0_NS + int(round(tk * 1e9))
            if kind == "q":
                m = JS(header=_stamp(ns), name=JOINTS, position=motion(t[k:k + 1])[0], velocity=np.array([]),
                       effort=np.array([]))  # fmt: skip
                w.write(js, ns, STORE.serialize_cdr(m, JS.__msgtype__))
            else:
                m = Multi(layout=Layout(dim=[], data_offset=0), data=cmd[k])
                w.write(cc, ns, STORE.serialize_cdr(m, Multi.__msgtype__))
    (tmp_path / "run1.goal.yaml").write_text("goal: drawer_knob\n")
    summary = run_import([bag], tmp_path / "out.parquet", "topics.stick=null", "topics.command=/arm/velocity_command")
    (ep,) = load_parquet(tmp_path / "out.parquet", robot=robot)
    assert summary["recordings"][0]["goals_from"].endswith("run1.goal.yaml") and summary["stick"] is None
    grid = t[0] + 0.1 * np.arange(len(ep))
    # the command in force at each step (zero-order hold of the 20 Hz commands)
    held = cmd[np.searchsorted(cmd_t, grid, side="right") - 1]
    np.testing.assert_allclose(ep.qd, held, atol=1e-12)
    assert "stick" not in pq.read_table(tmp_path / "out.parquet").column_names


def test_csv_import_reads_documented_columns(tmp_path, robot):
    t = uneven_times(3.0, seed=2)
    q = motion(t)
    cols = ["time_s", "goal", *[f"q_{j}" for j in reversed(JOINTS)], "stick_0", "stick_1", "note"]
    lines = [",".join(cols)]
    for k, tk in enumerate(t):
        goal = "lamp_switch" if tk < 1.5 else "bottle"
        lines.append(",".join([f"{tk + 100:.6f}", goal, *[f"{v:.12f}" for v in q[k, ::-1]], "0.5", "-0.25", "x"]))
    path = tmp_path / "export.csv"
    path.write_text("\n".join(lines) + "\n")
    summary = run_import([path], tmp_path / "out.parquet")
    es = load_parquet(tmp_path / "out.parquet", robot=robot)
    assert [es.goal_names[e.goal] for e in es] == ["lamp_switch", "bottle"] and summary["stick"] == 2
    tw = np.array([float(f"{tk + 100:.6f}") for tk in t])  # the times as written
    grid = tw[0] + 0.1 * np.arange(sum(len(e) for e in es))
    # reference: numpy.interp of the written (12-decimal) values
    expected = np.stack([np.interp(grid, tw, np.round(q[:, j], 12)) for j in range(7)], axis=1)
    np.testing.assert_allclose(np.concatenate([e.q for e in es]), expected, atol=1e-9)
    stick = np.array(pq.read_table(tmp_path / "out.parquet").column("stick").to_pylist())
    assert stick.shape == (len(grid), 2) and (stick == [0.5, -0.25]).all()


def test_csv_bad_input_names_file_line_and_column(tmp_path):
    good = ["time_s,goal," + ",".join(f"q_{j}" for j in JOINTS)]
    rows = [f"{0.01 * k},bottle," + ",".join(["0.1"] * 7) for k in range(50)]
    rows[6] = rows[6].replace("0.1", "abc", 1)
    path = tmp_path / "bad.csv"
    path.write_text("\n".join(good + rows) + "\n")
    with pytest.raises(DataError, match=r"bad.csv: line 8, column q_joint_1: expected a finite number .* got 'abc'"):
        run_import([path], tmp_path / "out.parquet")
    missing = tmp_path / "missing.csv"
    missing.write_text("time_s,goal,q_joint_1\n0,bottle,0\n0.1,bottle,0\n")
    with pytest.raises(DataError, match=r"missing.csv: column q_joint_2: missing"):
        run_import([missing], tmp_path / "out.parquet")
    assert not (tmp_path / "out.parquet").exists()


@pytest.mark.parametrize("storage,cut", [("sqlite3", 0.6), ("mcap", 0.6)])
def test_truncated_bag_is_refused_in_one_line(tmp_path, storage, cut):
    bag = write_bag(tmp_path / "run", storage, uneven_times(2.0))
    (data_file,) = [p for p in bag.iterdir() if p.suffix in (".db3", ".mcap")]
    data_file.write_bytes(data_file.read_bytes()[: int(cut * data_file.stat().st_size)])
    with pytest.raises(DataError) as err:
        run_import([bag], tmp_path / "out.parquet")
    assert str(err.value).startswith(f"bag {bag}: not readable (truncated or damaged file?)")
    assert "\n" not in str(err.value)


def test_missing_topic_is_refused_in_one_line(tmp_path):
    bag = write_bag(tmp_path / "run", "mcap", uneven_times(1.0), topics=("/arm/joint_states", "/joy", "/goal"))
    with pytest.raises(DataError, match=r"bag .*run: topic /joint_states: missing; the bag has \['/arm/joint_states', "
                                        r"'/goal', '/joy'\] \(set topics.joint_states\)"):  # fmt: skip
        run_import([bag], tmp_path / "out.parquet")
    # the goal may come from a topic or a sidecar; neither is there
    bag2 = write_bag(tmp_path / "run2", "sqlite3", uneven_times(1.0), topics=("/joint_states", "/joy", None))
    with pytest.raises(DataError, match=r"topic /goal: missing, and no sidecar run2.goal.yaml beside the bag"):
        run_import([bag2], tmp_path / "out.parquet")


def test_joint_name_mismatch_with_the_urdf_is_refused_in_one_line(tmp_path):
    names = ["shoulder", *JOINTS[1:]]  # the lab calls joint_1 "shoulder"
    bag = write_bag(tmp_path / "run", "sqlite3", uneven_times(1.0), names=names)
    with pytest.raises(DataError, match=r"topic /joint_states: joint names do not match the robot's: the message "
                                        r"names \['shoulder', .*\], lacking \['joint_1'\]"):  # fmt: skip
        run_import([bag], tmp_path / "out.parquet")


def test_non_monotonic_timestamps_are_refused_in_one_line(tmp_path):
    t = uneven_times(2.0)
    stamps = t.copy()
    stamps[100:] -= 0.3  # the arm's clock steps back 0.3 s once (the recorder's own clock is fine)
    bag = write_bag(tmp_path / "run", "mcap", t, stamps=stamps)
    with pytest.raises(DataError, match=r"topic /joint_states: timestamps are not monotonic: the clock jumps back 1 "
                                        r"time\(s\) \(first at .* s, largest 0\.2\d+ s\); allowed 0"):  # fmt: skip
        run_import([bag], tmp_path / "out.parquet")
    # allowed, the samples that went back are dropped and the jump is reported
    summary = run_import([bag], tmp_path / "out.parquet", "checks.max_backwards=1")
    assert summary["found"]["backwards"] == 1
    assert summary["recordings"][0]["streams"][0]["kept"] < len(t)


def test_gaps_and_duplicates_are_counted_and_refused_past_the_limit(tmp_path):
    t = uneven_times(3.0)
    t = np.r_[t[:100], t[100:] + 0.8]  # the driver stalled for 0.8 s
    t = np.r_[t[:50], t[49], t[50:]]  # and published one sample twice
    bag = write_bag(tmp_path / "run", "sqlite3", t)
    with pytest.raises(DataError, match=r"topic /joint_states: 1 gap\(s\) longer than 0.5 s .*allowed 0 "
                                        r"\(checks.max_gaps\)"):  # fmt: skip
        run_import([bag], tmp_path / "out.parquet")
    with pytest.raises(DataError, match=r"1 duplicated timestamps; allowed 0 \(checks.max_duplicates\)"):
        run_import([bag], tmp_path / "out.parquet", "checks.max_duplicates=0")
    summary = run_import([bag], tmp_path / "out.parquet", "checks.max_gaps=1")
    joints, stick = summary["recordings"][0]["streams"]
    assert (joints["gaps"], joints["duplicates"], stick["gaps"]) == (1, 1, 1)  # the stick stalled too
    assert summary["found"] == {"gaps": 2, "duplicates": 1, "backwards": 0}


def test_speeds_beyond_the_urdf_limits_are_refused_in_one_line(tmp_path):
    t = uneven_times(1.0)
    velocities = motion_speed(t)
    velocities[20, 2] = 4.0  # joint_3's limit is 1.3 rad/s
    bag = write_bag(tmp_path / "run", "mcap", t, velocities=velocities)
    with pytest.raises(DataError, match=r"recorded velocity of joint joint_3 reaches 4 rad/s at .* s, 3.1 times its "
                                        r"URDF limit 1.3 rad/s; allowed up to 1.5 times \(checks.velocity_factor\)"):
        run_import([bag], tmp_path / "out.parquet")
    # a position jump (an encoder glitch) shows up in the velocity derived from positions
    q = motion(t)
    q[50:, 0] += 0.5
    bag2 = write_bag(tmp_path / "run2", "mcap", t, q=q)
    with pytest.raises(DataError, match=r"velocity from positions of joint joint_1 reaches"):
        run_import([bag2], tmp_path / "out.parquet")


def test_positions_outside_the_urdf_limits_are_refused_in_one_line(tmp_path):
    t = uneven_times(1.0)
    q = motion(t)
    q[:, 3] += 0.6  # joint_4 starts at 2.64 rad; its URDF limit is 2.40 rad
    bag = write_bag(tmp_path / "run", "sqlite3", t, q=q)
    with pytest.raises(DataError, match=r"topic /joint_states: joint joint_4 at 2.64\d* rad \(0.000 s\) is outside "
                                        r"its URDF limits \[-2.4, 2.4\] by more than 0.05 rad"):  # fmt: skip
        run_import([bag], tmp_path / "out.parquet")


def test_unknown_goal_label_names_the_scenario_goals(tmp_path):
    bag = write_bag(tmp_path / "run", "sqlite3", uneven_times(1.0), goals=(("teapot", 0.0),))
    with pytest.raises(DataError, match=r"topic /goal: unknown goal 'teapot'; scenario bedside_shelf has"):
        run_import([bag], tmp_path / "out.parquet")


@pytest.mark.parametrize("override,message", [
    ("checks.velocity_factor=abc",
     "option checks.velocity_factor: expected a number in (0.0, inf) x the URDF limit, got 'abc'"),
    ("checks.max_gaps=-1", "option checks.max_gaps: expected an integer >= 0, got -1"),
    ("topics.clock=wall", "option topics.clock: expected one of 'header', 'bag', got 'wall'"),
    ("dt=0", "option dt: expected a number in (0.0, 10.0) s or null, got 0"),
    ("scene=kitchen", "option scene: unknown scenario 'kitchen'"),
])  # fmt: skip
def test_bad_options_name_the_option_and_the_range(tmp_path, override, message):
    from coreach.errors import ConfigError

    with pytest.raises(ConfigError) as err:
        run_import([tmp_path / "run"], tmp_path / "out.parquet", override)
    assert str(err.value).startswith(f"import-recordings, {message}")


@pytest.mark.slow
def test_import_command_then_training_on_its_file(workdir):
    """The user's path: `coreach import-recordings` on bags of both storages, then `coreach train` on the file."""
    labels = ["lamp_switch", "bottle", "book", "drawer_knob"] * 2
    goals = tuple((g, 2.0 * i) for i, g in enumerate(labels))
    t = uneven_times(16.0, seed=3)
    write_bag(workdir / "a", "sqlite3", t, goals=goals)
    write_bag(workdir / "b", "mcap", t, goals=tuple((g, 2.0 * i) for i, g in enumerate(reversed(labels))))
    res = subprocess.run([COREACH, "--json", "import-recordings", "inputs=[a,b]", "out=lab/demos.parquet"],
                         cwd=workdir, capture_output=True, text=True, env=cli_env(), timeout=600)  # fmt: skip
    assert res.returncode == 0, res.stderr
    (summary,) = json.loads(res.stdout)["runs"]
    assert summary["episodes"] == 16 and summary["train"].endswith("dataset.path=lab/demos.parquet")
    # the suggested training command repeats the robot options the import was checked against
    res = subprocess.run([COREACH, "--json", "import-recordings", "inputs=[a]", "out=placed.parquet",
                          "robot.base_xyz=[0,0,0]"], cwd=workdir, capture_output=True, text=True, env=cli_env(),
                         timeout=600)  # fmt: skip
    assert res.returncode == 0, res.stderr
    hint = json.loads(res.stdout)["runs"][0]["train"]
    assert hint == "coreach train dataset=parquet_file dataset.path=placed.parquet 'robot.base_xyz=[0,0,0]'"
    assert not [p for p in (workdir / "lab").iterdir() if p.name != "demos.parquet"]  # no temporary file left
    res = subprocess.run([COREACH, "--json", "train", "dataset=parquet_file", "dataset.path=lab/demos.parquet",
                          "model=vae", "trainer.max_epochs=1", *FAST[1:]],
                         cwd=workdir, capture_output=True, text=True, env=cli_env(), timeout=600)  # fmt: skip
    assert res.returncode == 0, res.stderr
    (run,) = json.loads(res.stdout)["runs"]
    assert run["epochs"] == 1 and np.isfinite(run["val_loss"])


def test_cli_prints_one_line_and_exits_2_for_a_refused_bag(tmp_path):
    bag = write_bag(tmp_path / "run", "sqlite3", uneven_times(1.0), names=["a", "b"])
    res = subprocess.run([COREACH, "import-recordings", f"inputs=[{bag}]", f"out={tmp_path / 'o.parquet'}"],
                         cwd=tmp_path, capture_output=True, text=True, env=cli_env(), timeout=600)  # fmt: skip
    assert res.returncode == 2
    (line,) = res.stderr.strip().splitlines()
    assert line.startswith(f"coreach: error: bag {bag}: topic /joint_states: no message names the robot's joints")


def test_one_input_given_without_brackets_is_one_entry():
    """`inputs=run.csv` arrives as a string; it is one input, and a number is refused in one line."""
    from coreach.errors import ConfigError
    from coreach.recordings.options import read_options

    assert read_options(compose_config("import_recordings", ["inputs=run.csv"]))[0] == ["run.csv"]
    with pytest.raises(ConfigError, match="option inputs: expected a list of bag folders"):
        read_options(compose_config("import_recordings", ["inputs=3"]))


def test_train_hint_trains_the_same_arm(tmp_path):
    """The printed follow-up (`train on it: ...`) repeats the import's robot options and quotes the output path,
    and `train` composes from it the very robot config the import used (it used to print robot=<name>, no
    config group option for a URDF arm)."""
    import shlex

    t = uneven_times(3.0, seed=2)
    lines = ["time_s,goal," + ",".join(f"q_{j}" for j in JOINTS)]
    lines += [",".join([f"{tk:.6f}", "bottle", *[f"{v:.12f}" for v in row]]) for tk, row in zip(t, motion(t))]
    (tmp_path / "run.csv").write_text("\n".join(lines) + "\n")
    arm = ["robot.name=myarm", "robot.tool_link=tool", f"robot.home=[{','.join(f'{v:g}' for v in HOME)}]"]
    res = subprocess.run([COREACH, "import-recordings", "inputs=[run.csv]", "out=my demos.parquet", *arm],
                         cwd=tmp_path, capture_output=True, text=True, env=cli_env(), timeout=600)  # fmt: skip
    assert res.returncode == 0, res.stderr
    (hint,) = [ln.split("train on it: ", 1)[1] for ln in res.stdout.splitlines() if "train on it: " in ln]
    words = shlex.split(hint)
    assert words == ["coreach", "train", "dataset=parquet_file", "dataset.path=my demos.parquet", *arm], words
    imported = compose_config("import_recordings", ["inputs=[run.csv]", *arm]).robot
    assert compose_config("train", words[2:]).robot == imported
