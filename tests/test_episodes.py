"""Episode sets and their Parquet files: round trips keep the fingerprint, bad files name file, episode and column."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import torch
from scipy.spatial.transform import Rotation

from coreach.episodes import Episode, EpisodeSet, load_parquet, save_parquet, to_table
from coreach.errors import ConfigError, DataError
from coreach_plugins.dataset.parquet_file import ParquetFile

GOALS = ["switch", "cup", "knob"]


class TwoLink:
    """Test robot: planar 2-link arm (l1 = 0.4, l2 = 0.3) about the base z-axis."""

    name = "two_link"
    joint_names = ["shoulder", "elbow"]
    dof = 2
    q_lower = torch.tensor([-3.0, -3.0], dtype=torch.float64)
    q_upper = torch.tensor([3.0, 3.0], dtype=torch.float64)
    qd_max = torch.tensor([1.0, 1.0], dtype=torch.float64)
    q_home = torch.tensor([0.0, 1.0], dtype=torch.float64)

    def fk(self, q):
        a1, a12 = q[..., 0], q[..., 0] + q[..., 1]
        x = 0.4 * torch.cos(a1) + 0.3 * torch.cos(a12)
        y = 0.4 * torch.sin(a1) + 0.3 * torch.sin(a12)
        c, s, z, o = torch.cos(a12), torch.sin(a12), torch.zeros_like(a12), torch.ones_like(a12)
        return torch.stack([x, y, z], -1), torch.stack([c, -s, z, s, c, z, z, z, o], -1).reshape(*a12.shape, 3, 3)

    def jacobian(self, q):  # pragma: no cover - not needed by the loader
        raise NotImplementedError


def _unit_quats(rng, shape):
    q = rng.normal(size=(*shape, 4))
    return q / np.linalg.norm(q, axis=-1, keepdims=True)


def make_set(n_episodes: int = 14, seed: int = 0) -> EpisodeSet:
    """Random but well-formed episodes (lengths 2..9) on the 2-joint test robot."""
    rng = np.random.default_rng(seed)
    eps = []
    for i in range(n_episodes):
        T = int(rng.integers(2, 10))
        q = rng.uniform(-1, 1, size=(T, 2))
        pos, R = TwoLink().fk(torch.tensor(q))
        xyzw = Rotation.from_matrix(R.numpy()).as_quat()
        eps.append(
            Episode(
                episode_id=i,
                goal=int(rng.integers(len(GOALS))),
                q=q,
                qd=rng.uniform(-1.0, 1.0, size=(T, 2)),  # within TwoLink's 1 rad/s
                ee_pos=pos.numpy(),
                ee_quat=np.concatenate([xyzw[:, 3:], xyzw[:, :3]], axis=1),
                goal_pos=rng.uniform(0.3, 0.7, size=(len(GOALS), 3)),
                goal_quat=_unit_quats(rng, (len(GOALS),)),
                goal_fine=rng.uniform(-0.1, 0.1, size=(len(GOALS), 3)),
            )
        )
    return EpisodeSet(eps, GOALS, TwoLink.joint_names, 0.1, source="test")


@pytest.fixture
def saved(tmp_path) -> tuple[EpisodeSet, Path]:
    es = make_set()
    return es, save_parquet(es, tmp_path / "demos.parquet")


def rows_of(table: pa.Table, episode: int) -> np.ndarray:
    return np.flatnonzero(table.column("episode").to_numpy() == episode)


def replace_column(table: pa.Table, name: str, array: pa.Array) -> pa.Table:
    return table.set_column(table.column_names.index(name), name, array)


def write(table: pa.Table, path: Path) -> Path:
    pq.write_table(table, path)
    return path


def expect_error(path, *parts, robot=None, **kw):
    with pytest.raises(DataError) as err:
        load_parquet(path, robot=robot, **kw)
    msg = str(err.value)
    for part in (str(path), *parts):
        assert part in msg, f"{part!r} not in {msg!r}"
    return err.value


# ------------------------------------------------------------------------------------ round trip


def test_round_trip_keeps_fingerprint_and_values(saved):
    es, path = saved
    back = load_parquet(path, robot=TwoLink())
    assert back.fingerprint() == es.fingerprint()
    assert len(back) == len(es) == 14 and back.total_steps == es.total_steps == sum(len(e) for e in es)
    assert back.goal_names == GOALS and back.joint_names == TwoLink.joint_names and back.dt == 0.1
    for a, b in zip(es, back):
        assert (a.episode_id, a.goal) == (b.episode_id, b.goal)
        np.testing.assert_array_equal(a.qd, b.qd)
        np.testing.assert_array_equal(a.goal_fine, b.goal_fine)
    assert load_parquet(path).fingerprint() == es.fingerprint()  # no robot needed when the file is complete


def test_fingerprint_is_sensitive_and_deterministic():
    a, b = make_set(), make_set()
    assert a.fingerprint() == b.fingerprint() and len(a.fingerprint()) == 64
    b.episodes[3].qd[1, 0] += 1e-12
    assert make_set().fingerprint() != b.fingerprint() != EpisodeSet([], GOALS, TwoLink.joint_names, 0.1).fingerprint()
    c = make_set()
    c.dt = 0.05
    assert c.fingerprint() != a.fingerprint()


def test_schema_and_metadata(saved):
    es, path = saved
    schema = pq.read_schema(path)
    f64 = pa.float64()
    assert schema.field("episode").type == pa.int64()
    assert schema.field("step").type == pa.int32()
    assert schema.field("goal").type == pa.string()
    assert schema.field("q").type == pa.list_(f64, 2) and schema.field("qd").type == pa.list_(f64, 2)
    assert schema.field("ee_pos").type == pa.list_(f64, 3) and schema.field("ee_quat").type == pa.list_(f64, 4)
    assert schema.field("goal_pos").type == pa.list_(pa.list_(f64, 3))
    assert schema.field("goal_quat").type == pa.list_(pa.list_(f64, 4))
    meta = schema.metadata
    assert meta[b"coreach.schema_version"] == b"1"
    assert json.loads(meta[b"coreach.goal_names"]) == GOALS
    assert json.loads(meta[b"coreach.joint_names"]) == TwoLink.joint_names
    assert float(meta[b"coreach.dt"]) == 0.1
    table = pq.read_table(path)
    assert table.num_rows == es.total_steps
    r = rows_of(table, 5)
    assert table.column("step").to_numpy()[r].tolist() == list(range(len(es[5])))
    assert set(table.column("goal").to_numpy(zero_copy_only=False)[r]) == {GOALS[es[5].goal]}
    np.testing.assert_array_equal(np.array(table.column("goal_pos")[int(r[-1])].as_py()), es[5].goal_pos)


def test_save_is_atomic(saved, monkeypatch):
    es, path = saved
    before = path.read_bytes()

    def crash(table, where, **kw):
        Path(where).write_bytes(b"PAR1 half")
        raise OSError("disk full")

    monkeypatch.setattr(pq, "write_table", crash)
    with pytest.raises(OSError):
        save_parquet(make_set(seed=9), path)
    assert path.read_bytes() == before
    assert sorted(p.name for p in path.parent.iterdir()) == ["demos.parquet"]  # no temp file left behind


def test_rows_in_any_order_are_grouped(saved, tmp_path):
    es, path = saved
    table = pq.read_table(path)
    shuffled = table.take(np.random.default_rng(0).permutation(table.num_rows))
    back = load_parquet(write(shuffled, tmp_path / "shuffled.parquet"))
    assert back.fingerprint() == es.fingerprint()


# ------------------------------------------------------------------------------------ lab files


def lab_table(es: EpisodeSet) -> pa.Table:
    """Only the required columns, with plain list<double> / float32 types as a lab might write them."""
    full = to_table(es)
    cols = {
        "episode": full.column("episode").cast(pa.int32()),
        "step": full.column("step").cast(pa.int64()),
        "goal": full.column("goal"),
        "q": full.column("q").cast(pa.list_(pa.float64())),
        "qd": full.column("qd").cast(pa.list_(pa.float32())),
        "goal_pos": full.column("goal_pos"),
        "goal_quat": full.column("goal_quat"),
        "goal_fine": full.column("goal_fine"),
    }
    meta = {b"coreach.goal_names": json.dumps(GOALS).encode(), b"coreach.dt": b"0.1"}
    return pa.table(cols).replace_schema_metadata(meta)


def test_lab_file_with_required_columns_only(tmp_path):
    es = make_set()
    path = write(lab_table(es), tmp_path / "lab.parquet")
    back = ParquetFile(str(path)).load(TwoLink())
    assert back.joint_names == TwoLink.joint_names  # taken from the robot when the file has none
    for a, b in zip(es, back):
        np.testing.assert_allclose(b.ee_pos, a.ee_pos, atol=1e-12)  # recomputed by forward kinematics
        # Quaternions compared up to sign (q and -q are one rotation).
        assert np.minimum(np.abs(b.ee_quat - a.ee_quat), np.abs(b.ee_quat + a.ee_quat)).max() < 1e-12
        np.testing.assert_allclose(b.qd, a.qd, rtol=1e-6)  # float32 in the file
    expect_error(path, "column ee_pos", "robot")  # without a robot there is no way to fill ee_pos


# ------------------------------------------------------------------------------------ bad files


def test_missing_or_not_parquet(tmp_path):
    expect_error(tmp_path / "nowhere.parquet", "not found")
    text = tmp_path / "notes.parquet"
    text.write_text("episode,step\n0,0\n")
    expect_error(text, "not a readable Parquet file")
    with pytest.raises(DataError, match="not found"):
        ParquetFile(str(tmp_path / "nowhere.parquet")).load(TwoLink())


@pytest.mark.parametrize("column", ["qd", "goal_pos", "episode"])
def test_missing_column(saved, tmp_path, column):
    _, path = saved
    table = pq.read_table(path)
    expect_error(write(table.drop_columns([column]), tmp_path / "bad.parquet"), f"column {column}", "missing")


@pytest.mark.parametrize(("column", "value"), [("qd", np.nan), ("q", np.inf), ("ee_pos", -np.inf), ("ee_quat", np.nan)])
def test_non_finite_values(saved, tmp_path, column, value):
    es, path = saved
    table = pq.read_table(path)
    width = table.schema.field(column).type.list_size
    flat = np.stack(table.column(column).to_numpy(zero_copy_only=False)).copy()
    flat[rows_of(table, 12)[1], width - 1] = value
    bad = replace_column(table, column, pa.FixedSizeListArray.from_arrays(pa.array(flat.ravel()), width))
    expect_error(write(bad, tmp_path / "bad.parquet"), "episode 12", f"column {column}", "NaN or Inf", "step 1")


def test_non_finite_goal_layout(saved, tmp_path):
    es, path = saved
    table = pq.read_table(path)
    vals = np.array(table.column("goal_fine").to_pylist())  # [rows, G, 3]
    vals[rows_of(table, 7)[0], 2, 1] = np.nan
    arr = pa.array(vals.tolist(), type=pa.list_(pa.list_(pa.float64(), 3)))
    expect_error(write(replace_column(table, "goal_fine", arr), tmp_path / "bad.parquet"), "episode 7", "column goal_fine")


def test_null_value(saved, tmp_path):
    _, path = saved
    table = pq.read_table(path)
    qd = table.column("qd").to_pylist()
    qd[rows_of(table, 4)[0]] = None
    arr = pa.array(qd, type=pa.list_(pa.float64()))  # variable-length lists, as a lab file may use
    expect_error(write(replace_column(table, "qd", arr), tmp_path / "bad.parquet"), "episode 4", "column qd", "null")


def test_joint_count_must_match_robot(saved):
    _, path = saved

    class ThreeJoints(TwoLink):
        joint_names = ["a", "b", "c"]
        dof = 3

    expect_error(path, "episode 0", "column q", "expected 3", robot=ThreeJoints())


def test_joint_names_must_match_robot(saved):
    _, path = saved

    class Renamed(TwoLink):
        joint_names = ["hip", "knee"]

    expect_error(path, "coreach.joint_names", "hip", robot=Renamed())


def test_short_episode(saved, tmp_path):
    es, path = saved
    table = pq.read_table(path)
    drop = rows_of(table, 9)[1:]  # keep only step 0 of episode 9
    short = table.filter(pa.array(~np.isin(np.arange(table.num_rows), drop)))
    expect_error(write(short, tmp_path / "bad.parquet"), "episode 9", "column step", "at least 2")
    assert len(load_parquet(tmp_path / "bad.parquet", min_steps=1)) == 14


def test_unknown_goal_name(saved, tmp_path):
    _, path = saved
    table = pq.read_table(path)
    goals = table.column("goal").to_pylist()
    for r in rows_of(table, 11):
        goals[r] = "teapot"
    expect_error(write(replace_column(table, "goal", pa.array(goals)), tmp_path / "bad.parquet"), "episode 11", "column goal", "teapot")


@pytest.mark.parametrize("change", ["gap", "duplicate", "start_at_one"])
def test_steps_not_contiguous(saved, tmp_path, change):
    es, path = saved
    table = pq.read_table(path)
    steps = table.column("step").to_numpy().copy()
    r = rows_of(table, 6)
    if change == "gap":
        steps[r[-1]] += 1
    elif change == "duplicate":
        steps[r[1]] = 0
    else:
        steps[r] += 1
    bad = replace_column(table, "step", pa.array(steps, type=pa.int32()))
    expect_error(write(bad, tmp_path / "bad.parquet"), "episode 6", "column step", "not contiguous")


def test_wrong_length_rows_and_quaternions(saved, tmp_path):
    es, path = saved
    table = pq.read_table(path)
    q = table.column("q").to_pylist()
    q[rows_of(table, 3)[2]] = [0.1, 0.2, 0.3]
    bad = replace_column(table, "q", pa.array(q, type=pa.list_(pa.float64())))
    expect_error(write(bad, tmp_path / "bad.parquet"), "episode 3", "column q", "expected 2", "got 3")

    quat = np.stack(table.column("ee_quat").to_numpy(zero_copy_only=False)).copy()
    quat[rows_of(table, 8)[0]] *= 2
    bad = replace_column(table, "ee_quat", pa.FixedSizeListArray.from_arrays(pa.array(quat.ravel()), 4))
    expect_error(write(bad, tmp_path / "bad2.parquet"), "episode 8", "column ee_quat", "unit quaternions")


def test_metadata_problems(saved, tmp_path):
    _, path = saved
    table = pq.read_table(path)
    meta = dict(table.schema.metadata)
    for key, value, expected in [
        (b"coreach.goal_names", None, "coreach.goal_names"),
        (b"coreach.dt", b"fast", "coreach.dt"),
        (b"coreach.schema_version", b"2", "coreach.schema_version"),
        (b"coreach.goal_names", b"[1, 2]", "coreach.goal_names"),
    ]:
        m = {k: v for k, v in meta.items() if k != key}
        if value is not None:
            m[key] = value
        expect_error(write(table.replace_schema_metadata(m), tmp_path / "bad.parquet"), expected)


def test_parquet_file_plugin_validates_options():
    from coreach.errors import ConfigError

    with pytest.raises(ConfigError, match="dataset.path"):
        ParquetFile("???")


def test_velocities_far_beyond_the_robot_limits_are_refused(saved, tmp_path):
    es, _ = saved
    es.episodes[3].qd[2, 1] = 20.0  # rad/s against TwoLink's 1 rad/s, e.g. a recording in deg/s
    path = save_parquet(es, tmp_path / "fast.parquet")
    expect_error(path, "episode 3", "column qd", "joint elbow at 20 rad/s (step 2)", "velocity limit 1 rad/s",
                 robot=TwoLink())  # fmt: skip
    es.episodes[3].qd[2, 1] = 1.4  # within half again the limit: kept
    assert len(load_parquet(save_parquet(es, tmp_path / "ok.parquet"), robot=TwoLink())) == len(es)


def test_a_demonstrations_file_is_not_taken_for_a_recorded_drive(saved):
    """Drive commands read only recorded test drives; a demonstrations file gets one line naming what is missing."""
    from coreach.episodes.drive_files import check_drive_file

    _, path = saved
    with pytest.raises(DataError, match=r"not a recorded test drive \(missing metadata coreach.bundle_manifest_sha256, "
                                        r"column arrived, column phase\)"):  # fmt: skip
        check_drive_file(path)


def test_one_drive_file_given_without_brackets_is_one_entry(saved, tmp_path):
    """`drives=x.parquet` on the command line arrives as a string: one entry, not one per character."""
    from coreach.episodes.drive_files import drive_files

    _, path = saved
    assert drive_files(str(path), "drives") == [path]
    with pytest.raises(ConfigError, match=f"option drives: {tmp_path / 'gone.parquet'}: no such file"):
        drive_files(str(tmp_path / "gone.parquet"), "drives")
