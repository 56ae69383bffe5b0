"""Reading a rosbag2 recording (sqlite3 or MCAP storage) with rosbags, without a ROS install."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from rosbags.rosbag2 import Reader
from rosbags.typesys import Stores, get_typestore

from coreach.errors import CoreachError, DataError
from coreach.recordings.recording import Recording, Stream
from coreach.recordings.topics import JOINT_STATE, JOY, MULTI_ARRAY, STRING, TopicMap, sidecar_goal


def read_bag(path: str | Path, joint_names: list[str], topics: TopicMap) -> Recording:
    """The streams of one bag folder, joints reordered by name into `joint_names`. DataError (one line naming
    the bag and topic) for a missing or mistyped topic, a joint-name mismatch or an unreadable file."""
    path = Path(path)
    where = f"bag {path}"
    if not path.is_dir():
        raise DataError(where, "not found; expected a rosbag2 folder (metadata.yaml and a .db3 or .mcap file)")
    if not (path / "metadata.yaml").is_file():
        raise DataError(where, "has no metadata.yaml; expected a rosbag2 folder")
    sidecar = sidecar_goal(path, topics.sidecar_suffix)
    try:
        with Reader(path) as reader:
            return _read_open(reader, path, where, joint_names, topics, sidecar)
    except CoreachError:
        raise
    except Exception as e:  # rosbags, sqlite and the CDR decoder each raise their own types on damaged files
        first = (str(e).splitlines() or [type(e).__name__])[0][:200]
        raise DataError(where, f"not readable (truncated or damaged file?): {type(e).__name__}: {first}") from None


def _read_open(reader, path: Path, where: str, joint_names: list[str], topics: TopicMap,
               sidecar: tuple[str, str] | None) -> Recording:  # fmt: skip
    types = {}
    for c in reader.connections:
        types.setdefault(c.topic, c.msgtype)

    def wanted(topic: str | None, allowed: tuple[str, ...], option: str, required: bool = True) -> str | None:
        if topic is None:
            return None
        if topic not in types:
            if not required:
                return None
            raise DataError(f"{where}: topic {topic}", f"missing; the bag has {sorted(types)} (set {option})")
        if types[topic] not in allowed:
            raise DataError(f"{where}: topic {topic}", f"has type {types[topic]}; expected {' or '.join(allowed)}")
        return topic

    js = wanted(topics.joint_states, (JOINT_STATE,), "topics.joint_states")
    stick = wanted(topics.stick, (JOY,), "topics.stick, or null to leave the stick out")
    command = wanted(topics.command, (JOINT_STATE, MULTI_ARRAY), "topics.command", required=False)
    goal = None
    if sidecar is None:
        if topics.goal is None or topics.goal not in types:
            raise DataError(f"{where}: topic {topics.goal}", f"missing, and no sidecar {path.name}"
                                                             f"{topics.sidecar_suffix} beside the bag; expected "
                                                             "goal labels from one of them")  # fmt: skip
        goal = wanted(topics.goal, (STRING,), "topics.goal")
    chosen = [c for c in reader.connections if c.topic in {js, stick, command, goal}]
    store = get_typestore(Stores.LATEST)
    collect = _Collector(where, joint_names, topics.clock, reader.start_time)
    count = 0
    for conn, stamp, raw in reader.messages(connections=chosen):
        msg = store.deserialize_cdr(raw, conn.msgtype)
        count += 1
        if conn.topic == js:
            collect.joint_state(msg, stamp, js)
        elif conn.topic == stick:
            collect.joy(msg, stamp, stick)
        elif conn.topic == command:
            collect.command(msg, stamp, command)
        else:
            collect.goals.append((collect.bag_time(stamp), str(msg.data)))
    listed = sum(c.msgcount for c in chosen)
    if count < listed:
        raise DataError(where, f"holds {count} of the {listed} messages metadata.yaml lists for the chosen topics "
                               "(truncated recording?)")  # fmt: skip
    return collect.recording(path, js, stick, command, goal, sidecar)


class _Collector:
    """Accumulates samples per stream while messages arrive in bag order."""

    def __init__(self, where: str, joint_names: list[str], clock: str, start_ns: int):
        self.where, self.joint_names, self.clock, self.start_ns = where, list(joint_names), clock, start_ns
        self.q_t, self.q, self.v_t, self.v = [], [], [], []
        self.c_t, self.c, self.s_t, self.s = [], [], [], []
        self.goals: list[tuple[float, str]] = []
        self.seen_names: set[str] = set()
        self._order: dict[tuple[str, ...], np.ndarray | None] = {}

    def bag_time(self, stamp: int) -> float:
        return (stamp - self.start_ns) * 1e-9  # integers first: nanoseconds since 1970 exceed float64 precision

    def time(self, msg, stamp: int) -> float:
        if self.clock == "header":
            s = msg.header.stamp
            ns = int(s.sec) * 1_000_000_000 + int(s.nanosec)
            if ns:
                return (ns - self.start_ns) * 1e-9
        return self.bag_time(stamp)

    def order(self, names: list[str], topic: str) -> np.ndarray | None:
        """Indexes of the robot's joints in a message's names; None when the message names none of them
        (e.g. a gripper published on the same topic)."""
        key = tuple(names)
        if key not in self._order:
            self.seen_names.update(names)
            present = [j for j in self.joint_names if j in names]
            if not present:
                self._order[key] = None
            elif len(present) < len(self.joint_names):
                lacking = [j for j in self.joint_names if j not in names]
                raise DataError(f"{self.where}: topic {topic}", f"joint names do not match the robot's: the message "
                                                                f"names {list(names)}, lacking {lacking} of "
                                                                f"{self.joint_names}")  # fmt: skip
            else:
                self._order[key] = np.array([names.index(j) for j in self.joint_names])
        return self._order[key]

    def joint_state(self, msg, stamp: int, topic: str) -> None:
        names = list(msg.name)
        if len(msg.position) != len(names):
            raise DataError(f"{self.where}: topic {topic}",
                            f"a message has {len(names)} names but {len(msg.position)} positions")  # fmt: skip
        idx = self.order(names, topic)
        if idx is None:
            return
        t = self.time(msg, stamp)
        self.q_t.append(t)
        self.q.append(np.asarray(msg.position, dtype=np.float64)[idx])
        if len(msg.velocity) == len(names):
            self.v_t.append(t)
            self.v.append(np.asarray(msg.velocity, dtype=np.float64)[idx])

    def joy(self, msg, stamp: int, topic: str) -> None:
        axes = np.asarray(msg.axes, dtype=np.float64)
        if self.s and axes.shape != self.s[0].shape:
            raise DataError(f"{self.where}: topic {topic}",
                            f"stick messages have {self.s[0].size} and {axes.size} axes; expected one count")
        self.s_t.append(self.time(msg, stamp))
        self.s.append(axes)

    def command(self, msg, stamp: int, topic: str) -> None:
        if hasattr(msg, "name"):  # JointState: velocities by name
            names = list(msg.name)
            idx = self.order(names, topic)
            if idx is None:
                return
            if len(msg.velocity) != len(names):
                raise DataError(f"{self.where}: topic {topic}",
                                f"a command names {len(names)} joints but has {len(msg.velocity)} velocities")
            self.c_t.append(self.time(msg, stamp))
            self.c.append(np.asarray(msg.velocity, dtype=np.float64)[idx])
            return
        data = np.asarray(msg.data, dtype=np.float64)
        if data.size != len(self.joint_names):
            raise DataError(f"{self.where}: topic {topic}", f"a command has {data.size} values; expected "
                                                            f"{len(self.joint_names)} velocities in the order "
                                                            f"{self.joint_names}")  # fmt: skip
        self.c_t.append(self.bag_time(stamp))
        self.c.append(data)

    def recording(self, path: Path, js: str, stick: str | None, command: str | None, goal: str | None,
                  sidecar: tuple[str, str] | None) -> Recording:  # fmt: skip
        if not self.q:
            raise DataError(f"{self.where}: topic {js}", f"no message names the robot's joints {self.joint_names}; "
                                                         f"the topic names {sorted(self.seen_names)}")  # fmt: skip

        def stream(topic, t, v):
            return Stream(topic, np.array(t, dtype=np.float64), np.array(v, dtype=np.float64)) if t else None

        if stick and not self.s:
            raise DataError(f"{self.where}: topic {stick}", "has no messages; expected the operator's stick")
        if sidecar is not None:
            goals, origin = [(-np.inf, sidecar[0])], sidecar[1]
        else:
            if not self.goals:
                raise DataError(f"{self.where}: topic {goal}", "has no messages; expected goal labels")
            goals, origin = self.goals, f"topic {goal}"
        return Recording(
            source=f"bag {path}", joints=stream(js, self.q_t, self.q), velocities=stream(js, self.v_t, self.v),
            command=stream(command, self.c_t, self.c), stick=stream(stick, self.s_t, self.s), goals=goals,
            goal_origin=origin,
        )  # fmt: skip
