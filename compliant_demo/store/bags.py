"""Import and export of demonstrations as ROS 2 bags (SQLite or MCAP storage) with ``rosbags``.

A bag holds ``sensor_msgs/msg/JointState`` on one topic (position rad, velocity rad/s, effort
N*m) and, optionally, ``std_msgs/msg/Float64MultiArray`` on a stiffness topic: ``data`` holds one
stiffness per imported joint, in the order of the imported ``joints``, N*m/rad, NaN for "no
estimate". Each JointState sample takes the latest stiffness message at or before its bag time;
samples before the first one get NaN (counted in the ``stiffness_missing`` flag). No ROS install
is needed.

Bags written by :func:`export_bag` also carry the demonstration's metadata: one
``std_msgs/msg/String`` message on :data:`METADATA_TOPIC` holding a JSON object (the keys of
:data:`compliant_demo.store.io.METADATA_KEYS`, plus ``format``, ``joint_topic``,
``stiffness_topic`` and, when whole nanoseconds cannot carry the sample times exactly, ``time``:
the float64 times in s, little-endian, base64). :func:`import_bag` reads it, so an exported
demonstration comes back with its id, metadata, flags and bit-identical samples.
"""

from __future__ import annotations

import base64
import binascii
import json
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
from rosbags.highlevel import AnyReader, AnyReaderError
from rosbags.rosbag2 import StoragePlugin, Writer, WriterError
from rosbags.typesys import Stores, get_typestore

from compliant_demo.exceptions import InvalidInputError, NotFoundError, one_line
from compliant_demo.store.core import CHUNK_SAMPLES, DemoStore
from compliant_demo.store.io import (
    MAX_IMPORT_BYTES,
    MAX_JOINTS,
    Progress,
    begin_fields,
    check_budget,
    check_joint_names,
    check_metadata,
    demonstration_metadata,
    naming_file,
    parse_json,
    store_import,
)

__all__ = [
    "JOINT_STATE",
    "FLOAT64_ARRAY",
    "STRING",
    "METADATA_TOPIC",
    "BAG_FORMAT",
    "MAX_MESSAGE_NAMES",
    "STORAGES",
    "import_bag",
    "export_bag",
]

JOINT_STATE = "sensor_msgs/msg/JointState"
FLOAT64_ARRAY = "std_msgs/msg/Float64MultiArray"
STRING = "std_msgs/msg/String"
METADATA_TOPIC = "/demonstration_metadata"
BAG_FORMAT = "compliant_demo demonstration"
MAX_MESSAGE_NAMES = 1024
"""Most joint names one JointState message may carry (at most MAX_JOINTS of them imported)."""
STORAGES = {"sqlite3": StoragePlugin.SQLITE3, "mcap": StoragePlugin.MCAP}
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


def _read_metadata(reader: AnyReader, source: str) -> dict[str, Any]:
    """The JSON object on :data:`METADATA_TOPIC` (types checked), or {} for a bag without it."""
    found = [c for c in reader.connections if c.topic == METADATA_TOPIC]
    if not found:
        return {}
    where = f"bag {source!r}, topic {METADATA_TOPIC!r}"
    found = _connections(reader, METADATA_TOPIC, STRING, source)
    if sum(c.msgcount for c in found) != 1:
        raise InvalidInputError(f"{where}: {sum(c.msgcount for c in found)} messages, expected 1")
    text = ""
    for connection, _, raw in reader.messages(connections=found):
        if len(raw) > MAX_IMPORT_BYTES:
            raise InvalidInputError(f"{where}: message of {len(raw)} bytes, beyond the limit")
        try:
            message: Any = reader.deserialize(raw, connection.msgtype)
            text = str(message.data)
        except AnyReaderError as exc:
            raise InvalidInputError(
                f"{where}: message cannot be decoded: {one_line(exc)}"
            ) from None
    raw_meta = parse_json(text, where)
    if not isinstance(raw_meta, dict) or raw_meta.get("format") != BAG_FORMAT:
        raise InvalidInputError(f"{where}: not a JSON object with format {BAG_FORMAT!r}")
    metadata = check_metadata(raw_meta, lambda key: f"{where}, field {key!r}")
    for key, allow_null in (("joint_topic", False), ("stiffness_topic", True), ("time", False)):
        if key not in raw_meta:
            continue
        value = raw_meta[key]
        if not (isinstance(value, str) or (allow_null and value is None)):
            raise InvalidInputError(f"{where}, field {key!r}: must be a string, got {value!r}")
        metadata[key] = value
    return metadata


def _stiffness_topic(
    reader: AnyReader, given: str | None, metadata: dict[str, Any], source: str
) -> str | None:
    """The stiffness topic: as given ("" for none), as the metadata says, else the one
    Float64MultiArray topic with messages whose last name part contains "stiffness"."""
    if given is not None:
        return given or None
    if "stiffness_topic" in metadata:
        return metadata["stiffness_topic"]  # type: ignore[no-any-return]
    candidates = sorted(
        {
            c.topic
            for c in reader.connections
            if c.msgtype == FLOAT64_ARRAY and c.msgcount and "stiffness" in c.topic.split("/")[-1]
        }
    )
    if len(candidates) > 1:
        raise InvalidInputError(
            f"bag {source!r} has several stiffness topics ({', '.join(candidates)}): choose one "
            "with stiffness_topic=... ('' for none)"
        )
    return candidates[0] if candidates else None


class _BagSamples:
    """Collects the samples of time-ordered messages in blocks, counting what it skips."""

    def __init__(
        self,
        *,
        joints: Sequence[str] | None,
        topics: tuple[str, str | None],
        use_header_stamp: bool,
        skip_bad: bool,
        source: str,
    ) -> None:
        self.source = source
        self.joints = None if joints is None else check_joint_names(list(joints), "joints")
        self.joint_topic, self.stiffness_topic = topics
        self.use_header_stamp = use_header_stamp
        self.skip_bad = skip_bad
        self.last_ns: int | None = None
        self.last_bag_ns: int | None = None
        self.stiffness: np.ndarray | None = None
        self.stiffness_index = -1
        self.flags = dict.fromkeys(
            ("skipped_messages", "non_increasing", "nan_messages", "infinite_stiffness",
             "undecodable_messages", "stiffness_missing"), 0,
        )  # fmt: skip
        self.names_seen: set[str] = set()
        self.known_names: list[str] | None = None
        self.columns: list[int] | None = None
        self.rows: list[tuple[int, np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]] = []
        self.blocks: list[dict[str, np.ndarray]] = []
        self.n_samples = 0

    def where(self, index: int, topic: str | None) -> str:
        """Names a message in error texts: the bag, the message's index and its topic."""
        return f"bag {self.source!r}, message {index} on {topic!r}"

    def bad(self, key: str, message: str) -> None:
        """Refuse the bag, or count one dropped message under ``key`` when skipping."""
        if not self.skip_bad:
            raise InvalidInputError(message + " (import with skip_bad=True to drop such samples)")
        self.flags[key] += 1

    def _check_width(self, data: np.ndarray, index: int) -> None:
        if self.joints is not None and data.size != len(self.joints):
            raise InvalidInputError(
                f"{self.where(index, self.stiffness_topic)}: data has {data.size} values for "
                f"{len(self.joints)} joints ({', '.join(self.joints)})"
            )

    def on_stiffness(self, index: int, bag_ns: int, msg: Any) -> None:
        data = np.asarray(msg.data, dtype=np.float64)
        self._check_width(data, index)
        if np.isinf(data).any():
            self.bad("infinite_stiffness", f"{self.where(index, self.stiffness_topic)}: data "
                     f"{data[:MAX_JOINTS]} holds an infinite value")  # fmt: skip
            return
        self.stiffness, self.stiffness_index = data, index
        if self.rows and bag_ns == self.last_bag_ns:  # same time as the last sample: it applies
            ns, q, v, e, _ = self.rows[-1]
            self.rows[-1] = (ns, q, v, e, data)

    def _columns(self, names: list[str], where: str) -> list[int] | None:
        """Positions of our joints among ``names`` (None when one is missing); linear time."""
        if names == self.known_names:
            return self.columns
        if len(names) > MAX_MESSAGE_NAMES:
            raise InvalidInputError(
                f"{where}: {len(names)} joint names, more than the {MAX_MESSAGE_NAMES} a message "
                f"may carry (at most {MAX_JOINTS} joints are imported)"
            )
        if self.joints is None:
            self.joints = check_joint_names(names, f"{where}: joints")
        position = {name: i for i, name in enumerate(names)}
        if len(position) != len(names):
            raise InvalidInputError(f"{where}: joint names repeat in the message")
        self.names_seen.update(names)
        found = [position.get(name) for name in self.joints]
        self.known_names = names
        self.columns = None if None in found else [int(i) for i in found]  # type: ignore[arg-type]
        return self.columns

    def on_joint_state(self, index: int, bag_ns: int, msg: Any) -> None:
        names = list(msg.name)
        where = self.where(index, self.joint_topic)
        columns = self._columns(names, where)
        if columns is None:
            self.flags["skipped_messages"] += 1
            return
        if self.stiffness is not None:
            self._check_width(self.stiffness, self.stiffness_index)
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
        if len(self.rows) >= CHUNK_SAMPLES:
            self._flush()
        self.last_ns, self.last_bag_ns = ns, bag_ns
        self.n_samples += 1
        channels = 3 if self.stiffness_topic is None else 4
        check_budget(self.n_samples * (1 + channels * len(columns)), where)
        position, velocity, effort = fields
        self.rows.append((ns, position, velocity, effort, self.stiffness))

    def _flush(self) -> None:
        rows, self.rows = self.rows, []
        block = {
            name: np.array([row[i] for row in rows])
            for i, name in enumerate(("position", "velocity", "torque"), start=1)
        }
        block["ns"] = np.array([row[0] for row in rows], dtype=np.int64)
        if self.stiffness_topic is not None:
            missing = np.full(block["position"].shape[1], np.nan)
            self.flags["stiffness_missing"] += sum(row[4] is None for row in rows)
            block["stiffness"] = np.array([missing if row[4] is None else row[4] for row in rows])
        self.blocks.append(block)

    def arrays(self) -> dict[str, np.ndarray]:
        """Every sample as arrays: ``ns`` (int64 stamps) and the channels."""
        if self.rows:
            self._flush()
        if not self.blocks:
            missing = [j for j in self.joints or [] if j not in self.names_seen]
            detail = (
                f"joint {missing[0]!r} is in no JointState message (names seen: "
                f"{', '.join(sorted(self.names_seen))})"
                if missing
                else "no usable JointState sample"
            )
            raise InvalidInputError(f"bag {self.source!r}, topic {self.joint_topic!r}: {detail}")
        blocks, self.blocks = self.blocks, []
        return {key: np.concatenate([b[key] for b in blocks]) for key in blocks[0]}


def _times(ns: np.ndarray, metadata: dict[str, Any], source: str) -> tuple[np.ndarray, float]:
    """Sample times relative to the start, s, and the start (Unix s) for stamps ``ns``."""
    if "start_time" not in metadata:
        return (ns - ns[0]) / _NS, int(ns[0]) / _NS
    start_time = float(metadata["start_time"])
    relative = ns - round(start_time * _NS)
    if "time" not in metadata:
        return relative / _NS, start_time
    where = f"bag {source!r}, topic {METADATA_TOPIC!r}, field 'time'"
    try:
        exact = np.frombuffer(base64.b64decode(metadata["time"], validate=True), dtype="<f8")
    except (binascii.Error, ValueError) as exc:
        raise InvalidInputError(f"{where}: not base64 float64 values ({one_line(exc)})") from None
    if exact.shape != ns.shape or not np.array_equal(
        np.round(exact * _NS).astype(np.int64), relative
    ):
        raise InvalidInputError(
            f"{where}: {exact.size} times that do not match the {ns.size} JointState stamps "
            "(was the bag edited? import it with the metadata topic removed)"
        )
    return exact.astype(np.float64), start_time


def import_bag(
    store: DemoStore,
    path: str | os.PathLike[str],
    *,
    skill: str | None = None,
    joint_topic: str | None = None,
    stiffness_topic: str | None = None,
    joints: Sequence[str] | None = None,
    use_header_stamp: bool = True,
    skip_bad: bool = False,
    keep_id: bool = True,
    progress: Progress | None = None,
    **overrides: Any,
) -> str:
    """Import one demonstration from a ROS 2 bag directory (SQLite or MCAP storage).

    Parameters
    ----------
    store : DemoStore
    path : path of the bag directory (with its metadata.yaml)
    skill : str, optional
        Skill name; needed unless the bag carries our metadata topic.
    joint_topic : str, optional
        Topic of ``sensor_msgs/msg/JointState``; default the metadata's, else "/joint_states".
    stiffness_topic : str, optional
        Topic of ``std_msgs/msg/Float64MultiArray`` stiffness, N*m/rad, in ``joints`` order;
        "" for none. Default: the metadata's, else the one Float64MultiArray topic with messages
        whose name contains "stiffness" (several such topics are an error).
    joints : sequence of str, optional
        Joints to import, in this order; default: the names of the first JointState message.
        Messages lacking one of them are skipped (``skipped_messages`` flag); a joint in no
        message at all is an error. At most 64 joints.
    use_header_stamp : bool
        Time from ``header.stamp`` (falls back to the bag's receive time when it is zero).
    skip_bad : bool
        Drop samples with non-finite values (infinite stiffness), non-increasing time or
        undecodable bytes and count them in the flags ``nan_messages``, ``infinite_stiffness``,
        ``non_increasing`` and ``undecodable_messages``, instead of refusing the bag.
    keep_id : bool
        Reuse the id in the bag's metadata (refused if the store holds it already).
    progress : callable(done, total), optional
        Called with the messages read so far and the bag's message count.
    **overrides
        Metadata replacing the bag's (operator, tags, notes, source, nominal_rate_hz,
        start_time).

    Returns
    -------
    str
        Id of the demonstration, stored in one transaction (nothing is stored on any error).
    """
    source = str(path)
    bag = Path(path)
    if not bag.exists():
        raise NotFoundError(f"bag {source!r} does not exist")
    try:
        reader = AnyReader([bag], default_typestore=_typestore())
        reader.open()
    except (AnyReaderError, OSError, ValueError) as exc:
        raise InvalidInputError(
            f"{source!r} is not a readable ROS 2 bag: {one_line(exc)}"
        ) from None
    try:
        metadata = _read_metadata(reader, source)
        topic = joint_topic or metadata.get("joint_topic") or "/joint_states"
        wanted = _connections(reader, topic, JOINT_STATE, source)
        k_topic = _stiffness_topic(reader, stiffness_topic, metadata, source)
        if k_topic is not None:
            wanted += _connections(reader, k_topic, FLOAT64_ARRAY, source)
        samples = _BagSamples(
            joints=joints, topics=(topic, k_topic), use_header_stamp=use_header_stamp,
            skip_bad=skip_bad, source=source,
        )  # fmt: skip
        _read_samples(reader, wanted, samples, progress)
    finally:
        reader.close()
    arrays = samples.arrays()
    t, start_time = _times(arrays.pop("ns"), metadata, source)
    with naming_file(source):
        begin = begin_fields(
            {"start_time": start_time, **metadata}, {"skill": skill, **overrides}, keep_id
        )
    begin.update(joints=samples.joints, with_stiffness=k_topic is not None)
    counters = {k: v for k, v in samples.flags.items() if v}
    return store_import(
        store, {"t": t, **arrays}, begin, source=source,
        status=metadata.get("status", "complete"), status_reason=metadata.get("status_reason"),
        flags={**metadata.get("flags", {}), **counters},
    )  # fmt: skip


def _read_samples(
    reader: AnyReader, wanted: list[Any], samples: _BagSamples, progress: Progress | None
) -> None:
    total = sum(c.msgcount for c in wanted)
    for index, (connection, bag_ns, raw) in enumerate(reader.messages(connections=wanted)):
        if progress is not None:
            progress(index + 1, total)
        try:
            msg = reader.deserialize(raw, connection.msgtype)
        except AnyReaderError as exc:
            samples.bad(
                "undecodable_messages",
                f"{samples.where(index, connection.topic)} cannot be decoded: {one_line(exc)}",
            )
            continue
        if connection.topic == samples.joint_topic:
            samples.on_joint_state(index, bag_ns, msg)
        else:
            samples.on_stiffness(index, bag_ns, msg)


def _stamps(t: np.ndarray, start_time: float, demo_id: str) -> tuple[np.ndarray, str | None]:
    """Whole-nanosecond stamps ``start_time + t`` and, when they cannot carry ``t`` exactly,
    the exact times as base64 little-endian float64."""
    base = round(start_time * _NS)
    scaled = np.round(t * _NS)
    if t.size and not (0 <= base + scaled[0] and base + scaled[-1] < 2**31 * _NS):
        raise InvalidInputError(
            f"demonstration {demo_id!r}: times {start_time!r} + [{float(t[0])!r}, "
            f"{float(t[-1])!r}] s do not fit ROS time stamps (0 to 2^31 s)"
        )
    relative = scaled.astype(np.int64)
    if relative.size > 1 and not (np.diff(relative) > 0).all():
        raise InvalidInputError(
            f"demonstration {demo_id!r}: samples closer than 1 ns cannot be written as bag stamps"
        )
    exact = (relative / _NS).tobytes() == t.astype("<f8").tobytes()
    encoded = None if exact else base64.b64encode(t.astype("<f8").tobytes()).decode("ascii")
    return base + relative, encoded


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
    record; stiffness (when stored) goes to ``stiffness_topic`` with the same stamps, and the
    metadata to :data:`METADATA_TOPIC` (see the module docstring).
    """
    if storage not in STORAGES:
        raise InvalidInputError(f"storage must be one of {', '.join(STORAGES)}, got {storage!r}")
    demo = store.load_demonstration(demo_id)
    stamps, exact_time = _stamps(demo.t, demo.info.start_time, demo_id)
    metadata = {
        "format": BAG_FORMAT,
        **demonstration_metadata(demo),
        "joint_topic": joint_topic,
        "stiffness_topic": stiffness_topic if demo.stiffness is not None else None,
    }
    if exact_time is not None:
        metadata["time"] = exact_time
    types = _typestore()
    try:
        writer = Writer(Path(path), version=9, storage_plugin=STORAGES[storage])
        writer.open()
    except (WriterError, OSError) as exc:
        raise InvalidInputError(f"cannot write bag {str(path)!r}: {one_line(exc)}") from None
    try:
        meta_conn = writer.add_connection(METADATA_TOPIC, STRING, typestore=types)
        first = int(stamps[0]) if stamps.size else round(demo.info.start_time * _NS)
        text = types.types[STRING](data=json.dumps(metadata))
        writer.write(meta_conn, first, types.serialize_cdr(text, STRING))
        _write_samples(writer, types, demo, stamps, (joint_topic, stiffness_topic))
    finally:
        writer.close()
    return Path(path)


def _write_samples(
    writer: Writer, types: Any, demo: Any, stamps: np.ndarray, topics: tuple[str, str]
) -> None:
    joint_state = types.types[JOINT_STATE]
    header = types.types["std_msgs/msg/Header"]
    stamp_type = types.types["builtin_interfaces/msg/Time"]
    array_type = types.types[FLOAT64_ARRAY]
    n_joints = len(demo.joints)
    layout = types.types["std_msgs/msg/MultiArrayLayout"](
        dim=[types.types["std_msgs/msg/MultiArrayDimension"](
            label="joints", size=n_joints, stride=n_joints)],
        data_offset=0,
    )  # fmt: skip
    joints_conn = writer.add_connection(topics[0], JOINT_STATE, typestore=types)
    stiffness_conn = (
        writer.add_connection(topics[1], FLOAT64_ARRAY, typestore=types)
        if demo.stiffness is not None
        else None
    )
    for i, ns in enumerate(stamps.tolist()):
        if stiffness_conn is not None:
            msg = array_type(layout=layout, data=demo.stiffness[i].copy())
            writer.write(stiffness_conn, ns, types.serialize_cdr(msg, FLOAT64_ARRAY))
        msg = joint_state(
            header=header(stamp=stamp_type(sec=ns // _NS, nanosec=ns % _NS), frame_id=""),
            name=list(demo.joints),
            position=demo.position[i].copy(),
            velocity=demo.velocity[i].copy(),
            effort=demo.torque[i].copy(),
        )
        writer.write(joints_conn, ns, types.serialize_cdr(msg, JOINT_STATE))
