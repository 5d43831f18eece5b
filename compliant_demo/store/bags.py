"""Import and export of demonstrations as ROS 2 bags (SQLite or MCAP storage) with ``rosbags``.

A bag holds ``sensor_msgs/msg/JointState`` on one topic (position rad, velocity rad/s, effort
N*m) and, optionally, ``std_msgs/msg/Float64MultiArray`` on a stiffness topic: ``data`` holds one
stiffness per imported joint, in the order of the imported ``joints``, N*m/rad. No ROS install is
needed. Each JointState sample takes the latest stiffness message at or before it; samples before
the first stiffness message take the first one (counted in the ``stiffness_backfilled`` flag).
"""

from __future__ import annotations

import os
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np
from rosbags.highlevel import AnyReader, AnyReaderError
from rosbags.rosbag2 import StoragePlugin, Writer, WriterError
from rosbags.typesys import Stores, get_typestore
from tqdm import tqdm

from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.store._codec import validate_joints
from compliant_demo.store.core import CHUNK_SAMPLES, DemoStore
from compliant_demo.store.io import show_progress, streaming_import

__all__ = ["JOINT_STATE", "FLOAT64_ARRAY", "STORAGES", "import_bag", "export_bag"]

JOINT_STATE = "sensor_msgs/msg/JointState"
FLOAT64_ARRAY = "std_msgs/msg/Float64MultiArray"
STORAGES = {"sqlite3": StoragePlugin.SQLITE3, "mcap": StoragePlugin.MCAP}
_PROGRESS_MESSAGES = 20_000
_NS = 1_000_000_000


def _typestore() -> Any:
    return get_typestore(Stores.ROS2_HUMBLE)


def _connections(reader: AnyReader, topic: str, msgtype: str, source: str) -> list[Any]:
    found = [c for c in reader.connections if c.topic == topic]
    if not found:
        topics = sorted({c.topic for c in reader.connections})
        raise NotFoundError(f"bag {source!r} has no topic {topic!r} (topics: {', '.join(topics)})")
    wrong = [c.msgtype for c in found if c.msgtype != msgtype]
    if wrong:
        raise InvalidInputError(f"topic {topic!r} in {source!r} carries {wrong[0]}, not {msgtype}")
    if sum(c.msgcount for c in found) == 0:
        raise InvalidInputError(f"topic {topic!r} in {source!r} has no messages")
    return found


class _BagSamples:
    """Turns the time-ordered messages of a bag into chunks of samples, counting what it skips."""

    def __init__(
        self,
        *,
        joints: Sequence[str] | None,
        joint_topic: str,
        stiffness_topic: str | None,
        use_header_stamp: bool,
        skip_bad: bool,
        source: str,
    ) -> None:
        self.source = source
        self.joints = None if joints is None else list(validate_joints(joints))
        self.joint_topic = joint_topic
        self.stiffness_topic = stiffness_topic
        self.use_header_stamp = use_header_stamp
        self.skip_bad = skip_bad
        self.start_ns: int | None = None
        self.last_ns: int | None = None
        self.stiffness: np.ndarray | None = None
        self.flags = {
            "skipped_messages": 0,
            "non_increasing": 0,
            "nan_messages": 0,
            "undecodable_messages": 0,
        }
        self.backfilled = 0
        self.names_seen: set[str] = set()
        self.rows: list[tuple[int, np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]] = []

    def where(self, index: int, topic: str | None) -> str:
        """Names a message in error texts: the bag, the message's index and its topic."""
        return f"bag {self.source!r}, message {index} on {topic!r}"

    def bad(self, key: str, message: str) -> None:
        """Refuse the bag, or count one dropped message under ``key`` when skipping."""
        if not self.skip_bad:
            raise InvalidInputError(message + " (import with skip_bad=True to drop such samples)")
        self.flags[key] += 1

    def on_stiffness(self, index: int, msg: Any) -> None:
        data = np.asarray(msg.data, dtype=np.float64)
        if self.joints is not None and data.size != len(self.joints):
            raise InvalidInputError(
                f"{self.where(index, self.stiffness_topic)}: data has {data.size} values for "
                f"{len(self.joints)} joints ({', '.join(self.joints)})"
            )
        if not np.isfinite(data).all():
            self.bad("nan_messages", f"{self.where(index, self.stiffness_topic)}: data {data} "
                      "is not finite")  # fmt: skip
            return
        if self.stiffness is None:
            self.backfilled = len(self.rows)
            self.rows = [(ns, q, v, e, data) for ns, q, v, e, _ in self.rows]
        self.stiffness = data

    def on_joint_state(self, index: int, bag_ns: int, msg: Any) -> None:
        names = list(msg.name)
        self.names_seen.update(names)
        if self.joints is None:
            self.joints = list(validate_joints(names))
        where = self.where(index, self.joint_topic)
        if any(name not in names for name in self.joints):
            self.flags["skipped_messages"] += 1
            return
        columns = [names.index(name) for name in self.joints]
        fields = []
        for field in ("position", "velocity", "effort"):
            values = np.asarray(getattr(msg, field), dtype=np.float64)
            if values.size != len(names):
                raise InvalidInputError(
                    f"{where}: {field} has {values.size} values for {len(names)} names"
                )
            fields.append(values[columns])
        if not all(np.isfinite(f).all() for f in fields):
            self.bad("nan_messages", f"{where}: position/velocity/effort not finite")
            return
        stamp = msg.header.stamp
        stamp_ns = stamp.sec * _NS + stamp.nanosec
        ns = stamp_ns if self.use_header_stamp and stamp_ns > 0 else bag_ns
        if self.last_ns is not None and ns <= self.last_ns:
            word = "repeats" if ns == self.last_ns else "goes backwards"
            self.bad("non_increasing", f"{where}: time stamp {ns} ns {word} (previous "
                      f"{self.last_ns} ns)")  # fmt: skip
            return
        if self.start_ns is None:
            self.start_ns = ns
        self.last_ns = ns
        position, velocity, effort = fields
        self.rows.append((ns, position, velocity, effort, self.stiffness))

    def take(self, final: bool) -> tuple[np.ndarray, dict[str, np.ndarray]] | None:
        """A chunk of buffered samples when enough are ready (all of them when ``final``)."""
        waiting = self.stiffness_topic is not None and self.stiffness is None
        if not self.rows or waiting or (len(self.rows) < CHUNK_SAMPLES and not final):
            return None
        rows, self.rows = self.rows, []
        assert self.start_ns is not None
        ns = np.array([row[0] for row in rows], dtype=np.int64)
        arrays = {
            name: np.array([row[i] for row in rows])
            for i, name in enumerate(("position", "velocity", "torque"), start=1)
        }
        if self.stiffness_topic is not None:
            arrays["stiffness"] = np.array([row[4] for row in rows])
        return (ns - self.start_ns) / _NS, arrays


def import_bag(
    store: DemoStore,
    path: str | os.PathLike[str],
    *,
    skill: str,
    joint_topic: str = "/joint_states",
    stiffness_topic: str | None = None,
    joints: Sequence[str] | None = None,
    use_header_stamp: bool = True,
    skip_bad: bool = False,
    progress: bool | None = None,
    **begin_kwargs: Any,
) -> str:
    """Import one demonstration from a ROS 2 bag directory (SQLite or MCAP storage).

    Parameters
    ----------
    store : DemoStore
    path : path of the bag directory (with its metadata.yaml)
    skill : str
    joint_topic : str
        Topic of ``sensor_msgs/msg/JointState``.
    stiffness_topic : str, optional
        Topic of ``std_msgs/msg/Float64MultiArray`` stiffness, N*m/rad, in ``joints`` order.
    joints : sequence of str, optional
        Joints to import, in this order; default: the names of the first JointState message.
        Messages lacking one of them are skipped (``skipped_messages`` flag); a joint in no
        message at all is an error.
    use_header_stamp : bool
        Time from ``header.stamp`` (falls back to the bag's receive time when it is zero).
    skip_bad : bool
        Drop samples with non-finite values, non-increasing time or undecodable bytes and count
        them in the flags ``nan_messages``, ``non_increasing`` and ``undecodable_messages``,
        instead of refusing the bag.
    progress : bool, optional
        Progress bar; by default for bags over 20,000 messages on a terminal.
    **begin_kwargs
        Further metadata for :meth:`DemoStore.begin_demonstration` (operator, tags, notes ...).

    Returns
    -------
    str
        Id of the new demonstration (source "imported", start time of its first sample).
    """
    source = str(path)
    bag = Path(path)
    if not bag.exists():
        raise NotFoundError(f"bag {source!r} does not exist")
    try:
        reader = AnyReader([bag], default_typestore=_typestore())
        reader.open()
    except (AnyReaderError, OSError, ValueError) as exc:
        raise InvalidInputError(f"{source!r} is not a readable ROS 2 bag: {exc}") from None
    try:
        wanted = _connections(reader, joint_topic, JOINT_STATE, source)
        if stiffness_topic is not None:
            wanted += _connections(reader, stiffness_topic, FLOAT64_ARRAY, source)
        total = sum(c.msgcount for c in wanted)
        samples = _BagSamples(
            joints=joints, joint_topic=joint_topic, stiffness_topic=stiffness_topic,
            use_header_stamp=use_header_stamp, skip_bad=skip_bad, source=source,
        )  # fmt: skip
        messages = tqdm(
            reader.messages(connections=wanted), total=total, unit="msg", desc=bag.name,
            disable=not show_progress(progress, total, _PROGRESS_MESSAGES),
        )  # fmt: skip
        chunks = _chunks(reader, messages, samples, joint_topic, source)
        first = next(chunks)
        assert samples.joints is not None and samples.start_ns is not None
        begin = {
            "skill": skill,
            "joints": samples.joints,
            "source": "imported",
            "start_time": samples.start_ns / _NS,
            "with_stiffness": stiffness_topic is not None,
            **begin_kwargs,
        }

        def flags() -> dict[str, int]:
            counts = {k: v for k, v in samples.flags.items() if v}
            if samples.backfilled:
                counts["stiffness_backfilled"] = samples.backfilled
            return counts

        def all_chunks() -> Iterator[tuple[np.ndarray, dict[str, np.ndarray]]]:
            yield first
            yield from chunks

        with messages:
            return streaming_import(store, begin, all_chunks(), source=source, flags=flags)
    finally:
        reader.close()


def _chunks(
    reader: AnyReader, messages: Any, samples: _BagSamples, joint_topic: str, source: str
) -> Iterator[tuple[np.ndarray, dict[str, np.ndarray]]]:
    for index, (connection, bag_ns, raw) in enumerate(messages):
        try:
            msg = reader.deserialize(raw, connection.msgtype)
        except AnyReaderError as exc:
            samples.bad(
                "undecodable_messages",
                f"{samples.where(index, connection.topic)} cannot be decoded: {exc}",
            )
            continue
        if connection.topic == joint_topic:
            samples.on_joint_state(index, bag_ns, msg)
        else:
            samples.on_stiffness(index, msg)
        chunk = samples.take(final=False)
        if chunk is not None:
            yield chunk
    chunk = samples.take(final=True)
    if chunk is not None:
        yield chunk
        return
    if samples.start_ns is None:
        missing = [j for j in samples.joints or [] if j not in samples.names_seen]
        detail = (
            f"joint {missing[0]!r} is in no JointState message (names seen: "
            f"{', '.join(sorted(samples.names_seen))})"
            if missing
            else "no usable JointState sample"
        )
        raise InvalidInputError(f"bag {source!r}, topic {joint_topic!r}: {detail}")
    if samples.rows:
        raise InvalidInputError(
            f"bag {source!r}: no usable message on stiffness topic {samples.stiffness_topic!r}"
        )


def export_bag(
    store: DemoStore,
    demo_id: str,
    path: str | os.PathLike[str],
    *,
    storage: str = "sqlite3",
    joint_topic: str = "/joint_states",
    stiffness_topic: str = "/stiffness",
) -> Path:
    """Write one demonstration as a ROS 2 bag directory (``storage`` "sqlite3" or "mcap").

    Stamps are ``start_time + t`` rounded to whole nanoseconds, in both the header and the bag
    record; stiffness (when stored) goes to ``stiffness_topic`` with the same stamps.
    """
    if storage not in STORAGES:
        raise InvalidInputError(f"storage must be one of {', '.join(STORAGES)}, got {storage!r}")
    demo = store.load_demonstration(demo_id)
    store_types = _typestore()
    joint_state = store_types.types[JOINT_STATE]
    header = store_types.types["std_msgs/msg/Header"]
    stamp_type = store_types.types["builtin_interfaces/msg/Time"]
    array_type = store_types.types[FLOAT64_ARRAY]
    layout = store_types.types["std_msgs/msg/MultiArrayLayout"]
    dimension = store_types.types["std_msgs/msg/MultiArrayDimension"]
    n_joints = len(demo.joints)
    stiffness_layout = layout(
        dim=[dimension(label="joints", size=n_joints, stride=n_joints)], data_offset=0
    )
    stamps = round(demo.info.start_time * _NS) + np.round(demo.t * _NS).astype(np.int64)
    try:
        writer = Writer(Path(path), version=9, storage_plugin=STORAGES[storage])
        writer.open()
    except (WriterError, OSError) as exc:
        raise InvalidInputError(f"cannot write bag {str(path)!r}: {exc}") from None
    try:
        joints_conn = writer.add_connection(joint_topic, JOINT_STATE, typestore=store_types)
        stiffness_conn = (
            writer.add_connection(stiffness_topic, FLOAT64_ARRAY, typestore=store_types)
            if demo.stiffness is not None
            else None
        )
        for i, ns in enumerate(stamps.tolist()):
            stamp = stamp_type(sec=ns // _NS, nanosec=ns % _NS)
            if stiffness_conn is not None and demo.stiffness is not None:
                msg = array_type(layout=stiffness_layout, data=demo.stiffness[i].copy())
                writer.write(stiffness_conn, ns, store_types.serialize_cdr(msg, FLOAT64_ARRAY))
            msg = joint_state(
                header=header(stamp=stamp, frame_id=""),
                name=list(demo.joints),
                position=demo.position[i].copy(),
                velocity=demo.velocity[i].copy(),
                effort=demo.torque[i].copy(),
            )
            writer.write(joints_conn, ns, store_types.serialize_cdr(msg, JOINT_STATE))
    finally:
        writer.close()
    return Path(path)
