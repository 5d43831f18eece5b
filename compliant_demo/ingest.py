"""The recorder's ingest path without ROS: message checks, counters, chunk buffering, writer.

A recorder callback hands each joint-state message to :class:`RecordingSession`, which checks it
(stamp order and gaps, non-finite values, field lengths, missing or unknown joints), counts what
is wrong and appends good samples to a bounded :class:`ChunkBuffer`. A :class:`ChunkWriter`
thread takes the buffer at most every flush interval, adds the online stiffness estimate (or the
held external reference) and appends one atomic chunk per flush to the demonstration store, so no
callback ever waits on disk and a crash loses at most one flush interval of samples.
"""

from __future__ import annotations

import math
import queue
import threading
import time
from array import array
from collections.abc import Callable, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any, Literal

import numpy as np

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.motion_trigger import MotionTrigger

__all__ = [
    "IngestCounters",
    "SampleChecker",
    "Chunk",
    "ChunkBuffer",
    "MotionTrigger",
    "DemonstrationRequest",
    "ChunkWriter",
    "RecordingSession",
    "StiffnessChannel",
    "STIFFNESS_MODEL_FLAG",
]

StiffnessChannel = Literal["estimate", "reference", "model", "none"]
_STIFFNESS_CHANNELS = ("estimate", "reference", "model", "none")
#: Demonstration flag set when the stiffness channel holds the mechanism's model stiffness.
STIFFNESS_MODEL_FLAG = "stiffness_from_model"


@dataclass
class IngestCounters:
    """Counts of what arrived and what was wrong with it during one demonstration (or idle)."""

    received: int = 0
    accepted: int = 0
    gaps: int = 0
    missing_samples_estimate: int = 0
    repeated_stamps: int = 0
    backwards_stamps: int = 0
    non_finite: int = 0
    wrong_lengths: int = 0
    missing_joints: int = 0
    unknown_joints: int = 0
    dropped_buffer_full: int = 0

    @property
    def rejected(self) -> int:
        """Messages that were not stored: every reason except gaps and unknown extra joints."""
        return (
            self.repeated_stamps
            + self.backwards_stamps
            + self.non_finite
            + self.wrong_lengths
            + self.missing_joints
            + self.dropped_buffer_full
        )

    def anomalies(self) -> dict[str, int]:
        """The non-zero anomaly counters (everything except received and accepted)."""
        return {
            key: value
            for key, value in asdict(self).items()
            if key not in ("received", "accepted") and value
        }

    def as_dict(self) -> dict[str, int]:
        """Every counter by name."""
        return asdict(self)


class SampleChecker:
    """Check joint-state messages against the configured joints and the previous stamp.

    Parameters
    ----------
    joints : sequence of str
        Joint names in the order samples are stored.
    nominal_rate_hz : float, Hz
        Expected message rate; a stamp step above ``gap_factor / nominal_rate_hz`` counts as a gap.
    gap_factor : float
        Multiple of the nominal period beyond which a step is a gap (> 1).
    """

    def __init__(self, joints: Sequence[str], nominal_rate_hz: float, gap_factor: float = 1.5):
        joints = tuple(joints)
        if not joints or len(set(joints)) != len(joints) or not all(joints):
            raise InvalidInputError(f"joints: need distinct non-empty names, got {list(joints)}")
        if not (math.isfinite(nominal_rate_hz) and nominal_rate_hz > 0):
            raise InvalidInputError(f"nominal_rate_hz: must be positive, got {nominal_rate_hz}")
        if not (math.isfinite(gap_factor) and gap_factor > 1):
            raise InvalidInputError(f"gap_factor: must be above 1, got {gap_factor}")
        self.joints = joints
        self._joint_set = frozenset(joints)  # membership in O(1): checks stay linear in names
        self.nominal_period_s = 1.0 / nominal_rate_hz
        self.gap_threshold_s = gap_factor / nominal_rate_hz
        self.last_stamp: float | None = None
        self._layouts: dict[tuple[str, ...], tuple[tuple[int, ...] | None, bool, bool]] = {}

    def reset(self) -> None:
        """Forget the previous stamp (a new demonstration starts)."""
        self.last_stamp = None

    def check(
        self,
        counters: IngestCounters,
        stamp: float,
        names: Sequence[str],
        position: Sequence[float],
        velocity: Sequence[float],
        effort: Sequence[float],
    ) -> tuple[Sequence[float], Sequence[float], Sequence[float]] | None:
        """Validate one message; return (position, velocity, effort) in joint order, or None.

        Parameters
        ----------
        counters : IngestCounters
            Updated in place with what was found.
        stamp : float, s
            Header stamp of the message.
        names, position, velocity, effort
            The JointState fields (rad, rad/s, N*m), each as long as ``names``.

        Returns
        -------
        (q, qd, tau) : three (n_joints,) float sequences, or None when the message is rejected.

        Notes
        -----
        Plain Python on purpose: at several kHz a per-message numpy call costs more than the
        checks themselves; arrays are built once per chunk in the writer thread.
        """
        counters.received += 1
        n = len(names)
        if len(position) != n or len(velocity) != n or len(effort) != n:
            counters.wrong_lengths += 1
            return None
        index, missing, unknown = self._layout(names)
        if missing:
            counters.missing_joints += 1
            return None
        if unknown:
            counters.unknown_joints += 1
        if index is not None:
            position = [position[i] for i in index]
            velocity = [velocity[i] for i in index]
            effort = [effort[i] for i in index]
        # One finite total proves every value finite (NaN and inf propagate through a sum);
        # only a non-finite total, which huge finite values could also give, is looked into.
        total = stamp + sum(position) + sum(velocity) + sum(effort)
        if not math.isfinite(total) and not (
            math.isfinite(stamp) and _all_finite(position) and _all_finite(velocity)
            and _all_finite(effort)
        ):
            counters.non_finite += 1
            return None
        if self.last_stamp is not None:
            step = stamp - self.last_stamp
            if step == 0.0:
                counters.repeated_stamps += 1
                return None
            if step < 0.0:
                counters.backwards_stamps += 1
                return None
            if step > self.gap_threshold_s:
                counters.gaps += 1
                counters.missing_samples_estimate += max(
                    0, round(step / self.nominal_period_s) - 1
                )
        self.last_stamp = stamp
        return position, velocity, effort

    def _layout(self, names: Sequence[str]) -> tuple[tuple[int, ...] | None, bool, bool]:
        """Column selection for a name list (cached: publishers keep one layout)."""
        key = tuple(names)
        layout = self._layouts.get(key)
        if layout is None:
            position_of = {name: i for i, name in enumerate(key)}
            missing = any(joint not in position_of for joint in self.joints)
            unknown = (any(name not in self._joint_set for name in key)
                       or len(position_of) != len(key))
            index = None
            if not missing and key != self.joints:
                index = tuple(position_of[joint] for joint in self.joints)
            layout = (index, missing, unknown)
            if len(self._layouts) < 64:
                self._layouts[key] = layout
        return layout


def _all_finite(values: Sequence[float]) -> bool:
    """True when no value is NaN or infinite."""
    return all(map(math.isfinite, values))


def _as_float64(values: Sequence[float]) -> array:
    """``values`` as ``array('d')`` (message fields already are; reordered lists are not)."""
    if isinstance(values, array) and values.typecode == "d":
        return values
    return array("d", values)


@dataclass
class Chunk:
    """Samples taken from the buffer in one flush.

    t : (n,) array, s, absolute stamps; position, velocity, torque : (n, n_joints) arrays in rad,
    rad/s, N*m; reference : (n, held_width) array, the values held when each sample arrived (the
    stiffness reference, N*m/rad, or the motor angles, rad; NaN before the first arrived).
    """

    t: np.ndarray
    position: np.ndarray
    velocity: np.ndarray
    torque: np.ndarray
    reference: np.ndarray

    def __len__(self) -> int:
        return len(self.t)


class ChunkBuffer:
    """A bounded buffer of samples; :meth:`take` swaps it out and builds the arrays.

    Parameters
    ----------
    n_joints : int
    capacity : int
        Most samples held between two flushes; beyond it samples are refused (and counted).
    held_width : int, optional
        Values of the held channel per sample (default ``n_joints``).

    Notes
    -----
    Each channel accumulates raw float64 bytes (message fields arrive as ``array('d')``), so a
    sample costs a few buffer appends under a lock and creates no Python object that the cyclic
    garbage collector would have to scan; :meth:`take` turns the bytes into arrays without a copy
    per sample.
    """

    def __init__(self, n_joints: int, capacity: int, held_width: int | None = None):
        if n_joints < 1:
            raise InvalidInputError(f"n_joints: must be at least 1, got {n_joints}")
        if capacity < 1:
            raise InvalidInputError(f"capacity: must be at least 1, got {capacity}")
        self.n_joints = n_joints
        self.capacity = capacity
        self.held_width = n_joints if held_width is None else held_width
        self._lock = threading.Lock()
        self._channels = self._empty()

    @staticmethod
    def _empty() -> tuple[array, bytearray, bytearray, bytearray, bytearray]:
        return array("d"), bytearray(), bytearray(), bytearray(), bytearray()

    def __len__(self) -> int:
        return len(self._channels[0])

    @property
    def fill_fraction(self) -> float:
        """Fraction of the capacity in use (0 to 1)."""
        return len(self._channels[0]) / self.capacity

    def append(
        self,
        stamp: float,
        position: Sequence[float],
        velocity: Sequence[float],
        torque: Sequence[float],
        reference: Sequence[float],
    ) -> bool:
        """Add one sample (sequences of n_joints floats); False when full and not kept."""
        values = (_as_float64(position), _as_float64(velocity), _as_float64(torque),
                  _as_float64(reference))
        if [len(v) for v in values] != [self.n_joints] * 3 + [self.held_width]:
            raise InvalidInputError(
                f"sample at stamp {stamp}: expected {self.n_joints} values per channel and "
                f"{self.held_width} held, got {[len(v) for v in values]}"
            )
        with self._lock:
            stamps, *channels = self._channels
            if len(stamps) >= self.capacity:
                return False
            stamps.append(stamp)
            for channel, value in zip(channels, values, strict=True):
                channel += value
        return True

    def take(self) -> Chunk | None:
        """Remove and return everything buffered as arrays, or None when empty."""
        with self._lock:
            taken, self._channels = self._channels, self._empty()
        stamps, *channels = taken
        if not stamps:
            return None
        shape = (len(stamps), self.n_joints)
        position, velocity, torque = (
            np.frombuffer(channel, dtype=np.float64).reshape(shape) for channel in channels[:3]
        )
        reference = np.frombuffer(channels[3], dtype=np.float64).reshape(len(stamps), -1)
        return Chunk(
            t=np.frombuffer(stamps, dtype=np.float64).copy(),
            position=position,
            velocity=velocity,
            torque=torque,
            reference=reference,
        )


@dataclass(frozen=True)
class DemonstrationRequest:
    """What the store needs to begin a demonstration (taken from recorder parameters)."""

    skill: str
    joints: tuple[str, ...]
    operator: str = ""
    tags: tuple[str, ...] = ()
    notes: str = ""
    nominal_rate_hz: float = 1000.0
    stiffness_channel: StiffnessChannel = "estimate"

    def __post_init__(self) -> None:
        if not self.skill:
            raise InvalidInputError("skill: must not be empty")
        if self.stiffness_channel not in _STIFFNESS_CHANNELS:
            raise InvalidInputError(
                f"stiffness_channel: must be one of {_STIFFNESS_CHANNELS}, "
                f"got {self.stiffness_channel!r}"
            )


@dataclass
class _Demonstration:
    """Writer-side state of one demonstration."""

    request: DemonstrationRequest
    buffer: ChunkBuffer
    counters: IngestCounters
    demonstration_id: str | None = None
    first_stamp: float | None = None
    stored_samples: int = 0
    estimator: Any = None
    write_error: str | None = None
    final_status: str | None = None
    finished: threading.Event = field(default_factory=threading.Event)


class ChunkWriter:
    """Background thread that owns the store connection and writes buffered chunks.

    Parameters
    ----------
    open_store : callable returning a DemoStore-like context manager
        Called once, inside the writer thread (SQLite connections stay in their thread).
    make_estimator : callable (n_joints) -> estimator, or None
        Builds a fresh online estimator (``update(position, torque) -> (k, k_std, excited)``;
        its ``latency_s``, when it has one, is stored in the demonstration's flags)
        for each demonstration whose stiffness source is "estimate".
    flush_interval_s : float, s
        Longest time a sample waits in memory before it is written (0 < value <= 0.2).
    model_stiffness : callable (position (n, n_joints), held (n, 2 n_joints)) -> (n, n_joints)
        The "model" channel: stiffness from the link and the held motor angles, N*m/rad.
    observer : object with ``chunk(demonstration_id, request, t, position, estimator)`` and
        ``finished(status)``, optional
        Told in this thread about each stored chunk (t in s from the demonstration's start) and
        each finished demonstration that stored any samples (e.g.
        :class:`compliant_demo.teaching_feedback.LiveFeedback`).
    """

    def __init__(
        self,
        open_store: Callable[[], Any],
        make_estimator: Callable[[int], Any] | None,
        flush_interval_s: float = 0.1,
        model_stiffness: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None,
        observer: Any = None,
    ):
        if not 0 < flush_interval_s <= 0.2:
            raise InvalidInputError(
                f"flush_interval_s: must be in (0, 0.2] s, got {flush_interval_s}"
            )
        self.flush_interval_s = flush_interval_s
        self._open_store = open_store
        self._make_estimator = make_estimator
        self._model_stiffness = model_stiffness
        self._observer = observer
        self._commands: queue.Queue[tuple[str, Any]] = queue.Queue()
        self._active: _Demonstration | None = None
        self._closing: list[_Demonstration] = []
        self._stop = threading.Event()
        self._ready = threading.Event()
        self.open_error: BaseException | None = None
        self.write_errors = 0
        self.observer_errors = 0
        self.last_error: str | None = None
        self._thread = threading.Thread(target=self._run, name="chunk-writer", daemon=True)

    def start(self, timeout_s: float = 10.0) -> None:
        """Start the thread and wait until the store is open; re-raise an opening error."""
        self._thread.start()
        self._ready.wait(timeout_s)
        if self.open_error is not None:
            raise self.open_error

    def activate(self, demonstration: _Demonstration) -> None:
        """Make ``demonstration`` the one the periodic flush writes."""
        self._commands.put(("activate", demonstration))

    def finish(self, demonstration: _Demonstration, status: str, flags: Mapping[str, Any]) -> None:
        """Write what is left of ``demonstration`` and mark it ``status`` with ``flags``."""
        self._commands.put(("finish", (demonstration, status, dict(flags))))

    def close(self, timeout_s: float = 10.0) -> bool:
        """Process every pending command, close the store; False if the thread did not end."""
        self._stop.set()
        self._commands.put(("stop", None))
        if self._thread.is_alive():
            self._thread.join(timeout_s)
        return not self._thread.is_alive()

    def _run(self) -> None:
        try:
            store_context = self._open_store()
            store = store_context.__enter__()
        except BaseException as exc:  # reported to start(), which re-raises in the caller
            self.open_error = exc
            self._ready.set()
            return
        self._ready.set()
        try:
            self._loop(store)
        finally:
            try:
                store_context.__exit__(None, None, None)
            except Exception as exc:  # e.g. a full disk; the next open recovers the store
                self.write_errors += 1
                self.last_error = f"closing the store: {type(exc).__name__}: {exc}"

    def _loop(self, store: Any) -> None:
        next_flush = time.monotonic() + self.flush_interval_s
        while True:
            timeout = max(0.0, next_flush - time.monotonic())
            try:
                command, payload = self._commands.get(timeout=timeout)
            except queue.Empty:
                command, payload = "flush", None
            if command == "activate":
                self._active = payload
            elif command == "finish":
                demonstration, status, flags = payload
                self._finish(store, demonstration, status, flags)
                if self._active is demonstration:
                    self._active = None
            elif command == "stop":
                if self._active is not None:
                    self._flush(store, self._active)
                return
            if time.monotonic() >= next_flush:
                if self._active is not None:
                    self._flush(store, self._active)
                next_flush = time.monotonic() + self.flush_interval_s

    def _flush(self, store: Any, demonstration: _Demonstration) -> None:
        chunk = demonstration.buffer.take()
        if chunk is None or demonstration.write_error is not None:
            return
        try:
            self._write(store, demonstration, chunk)
        except Exception as exc:  # the recorder reports it; the thread must keep serving
            demonstration.write_error = f"{type(exc).__name__}: {exc}"
            self.write_errors += 1
            self.last_error = demonstration.write_error

    def _write(self, store: Any, demonstration: _Demonstration, chunk: Chunk) -> None:
        request = demonstration.request
        if demonstration.demonstration_id is None:
            demonstration.first_stamp = float(chunk.t[0])
            demonstration.demonstration_id = store.begin_demonstration(
                skill=request.skill,
                joints=list(request.joints),
                operator=request.operator,
                tags=list(request.tags),
                notes=request.notes,
                source="recorded",
                nominal_rate_hz=request.nominal_rate_hz,
                start_time=demonstration.first_stamp,
                with_stiffness=request.stiffness_channel != "none",
            )
            if request.stiffness_channel == "estimate" and self._make_estimator is not None:
                demonstration.estimator = self._make_estimator(len(request.joints))
        stiffness = None
        if request.stiffness_channel == "reference":
            stiffness = chunk.reference
        elif request.stiffness_channel == "model" and self._model_stiffness is not None:
            stiffness = self._model_stiffness(chunk.position, chunk.reference)
        elif demonstration.estimator is not None:
            stiffness = np.asarray(demonstration.estimator.update(chunk.position, chunk.torque)[0])
        store.append_chunk(
            demonstration.demonstration_id,
            chunk.t - demonstration.first_stamp,
            chunk.position,
            chunk.velocity,
            chunk.torque,
            stiffness=stiffness,
        )
        demonstration.stored_samples += len(chunk)
        self._tell_observer("chunk", demonstration.demonstration_id, request,
                            chunk.t - demonstration.first_stamp, chunk.position,
                            demonstration.estimator)

    def _tell_observer(self, method: str, *arguments: Any) -> None:
        # The observer only advises: its failure is counted, never the stored data's.
        if self._observer is None:
            return
        try:
            getattr(self._observer, method)(*arguments)
        except Exception:  # counted in diagnostics (feedback_errors); the writer goes on
            self.observer_errors += 1

    def _finish(
        self, store: Any, demonstration: _Demonstration, status: str, flags: dict[str, Any]
    ) -> None:
        self._flush(store, demonstration)
        if demonstration.write_error is not None:
            status = "incomplete"
        if demonstration.demonstration_id is not None:
            flags = dict(flags, stored_samples=demonstration.stored_samples)
            summary = getattr(demonstration.estimator, "summary_flags", None)
            if summary is not None:
                # Learners and reports advance the stored estimate by its latency to undo its
                # lag; the excited share and interval width say how far to trust it.
                flags.update(summary())
            if demonstration.request.stiffness_channel == "model":
                flags[STIFFNESS_MODEL_FLAG] = 1
            if demonstration.write_error is not None:
                flags["store_write_failed"] = 1  # the error text is logged and in diagnostics
            try:
                store.finish_demonstration(
                    demonstration.demonstration_id, status=status, flags=flags
                )
            except Exception as exc:  # reported through the demonstration and the counters
                demonstration.write_error = f"{type(exc).__name__}: {exc}"
                self.write_errors += 1
                self.last_error = demonstration.write_error
                status = "incomplete"
        demonstration.final_status = status
        if demonstration.demonstration_id is not None:
            self._tell_observer("finished", status)
        demonstration.finished.set()


class RecordingSession:
    """Everything a recorder does per message and per service call, without ROS.

    Parameters
    ----------
    writer : ChunkWriter
        Started writer that owns the store.
    checker : SampleChecker
        Message checks for the configured joints.
    buffer_capacity : int
        Most samples held in memory between flushes.
    trigger : MotionTrigger or None
        When given, demonstrations start and stop on motion (service calls still work).
    request : DemonstrationRequest
        Metadata for the next demonstration; replace it with :meth:`configure`.
    held_width : int, optional
        Values :meth:`set_reference` holds (default: one per joint; two motor angles per joint
        for the "model" channel).
    """

    def __init__(
        self,
        writer: ChunkWriter,
        checker: SampleChecker,
        request: DemonstrationRequest,
        buffer_capacity: int,
        trigger: MotionTrigger | None = None,
        held_width: int | None = None,
    ):
        self.writer = writer
        self.checker = checker
        self.request = request
        self.buffer_capacity = buffer_capacity
        self.trigger = trigger
        self.idle_counters = IngestCounters()
        self.current: _Demonstration | None = None
        self.last_finished: _Demonstration | None = None
        self.reference = array("d", [math.nan] * (held_width or len(checker.joints)))
        self.reference_rejected = 0
        self.messages_seen = 0
        self._seen_at_last_health = 0
        self._lock = threading.RLock()

    @property
    def recording(self) -> bool:
        """True while a demonstration is open."""
        return self.current is not None

    @property
    def counters(self) -> IngestCounters:
        """Counters of the open demonstration, else of the messages seen while idle."""
        current = self.current
        return current.counters if current is not None else self.idle_counters

    @property
    def buffer_fill(self) -> float:
        """Fill fraction of the open demonstration's buffer (0 when idle)."""
        current = self.current
        return current.buffer.fill_fraction if current is not None else 0.0

    def configure(self, request: DemonstrationRequest) -> None:
        """Metadata for demonstrations started from now on."""
        if request.joints != self.checker.joints:
            raise InvalidInputError(
                f"joints: {list(request.joints)} differ from the recorder's "
                f"{list(self.checker.joints)}"
            )
        self.request = request

    def set_reference(self, values: Sequence[float]) -> bool:
        """Hold values for the following samples (a stiffness reference, N*m/rad, or the motor
        angles, rad, of the "model" channel); False if refused."""
        held = array("d", values)
        if len(held) != len(self.reference) or not _all_finite(held):
            self.reference_rejected += 1
            return False
        self.reference = held
        return True

    def forget_reference(self) -> None:
        """Hold NaN (unknown) for the following samples until :meth:`set_reference` again."""
        self.reference = array("d", [math.nan] * len(self.reference))

    def start(self) -> tuple[bool, str]:
        """Open a demonstration; returns (success, message)."""
        with self._lock:
            if self.current is not None:
                return False, "already recording; stop or discard first"
            if self.writer.open_error is not None:
                return False, f"store unavailable: {self.writer.open_error}"
            self.current = _Demonstration(
                request=self.request,
                buffer=ChunkBuffer(len(self.checker.joints), self.buffer_capacity,
                                   len(self.reference)),
                counters=IngestCounters(),
            )
            self.checker.reset()
            self.writer.activate(self.current)
        return True, f"recording skill {self.request.skill!r}"

    def stop(
        self, status: str = "complete", *, wait_s: float = 0.0, **extra_flags: Any
    ) -> tuple[bool, str]:
        """Close the open demonstration with ``status``; returns (success, message).

        Parameters
        ----------
        status : {"complete", "incomplete", "rejected"}
        wait_s : float, s
            How long to wait for the writer to store the rest; with a wait, the answer reports
            what was stored (success False when the store failed), else what was accepted.
        extra_flags : int
            Further demonstration flags.
        """
        with self._lock:
            demonstration = self.current
            if demonstration is None:
                return False, "not recording"
            self.current = None
            flags = dict(demonstration.counters.anomalies(), **extra_flags)
            flags["received"] = demonstration.counters.received
            flags["accepted"] = demonstration.counters.accepted
            self.writer.finish(demonstration, status, flags)
            self.last_finished = demonstration
        counters = demonstration.counters
        accepted = f"{counters.accepted} samples accepted of {counters.received} received"
        if wait_s <= 0:
            return True, f"{status}: {accepted}"
        if not demonstration.finished.wait(wait_s):
            return False, f"store still writing after {wait_s} s; {accepted}"
        stored = f"{demonstration.stored_samples} stored, {accepted}"
        if demonstration.write_error is not None:
            return False, (f"{demonstration.final_status}: store write failed "
                           f"({demonstration.write_error}); {stored}")
        if demonstration.demonstration_id is None:
            return False, f"nothing stored: {accepted}"
        return True, f"{demonstration.final_status}: {stored}"

    def ingest(
        self,
        stamp: float,
        names: Sequence[str],
        position: Sequence[float],
        velocity: Sequence[float],
        effort: Sequence[float],
    ) -> bool:
        """Handle one joint-state message; True when a sample was buffered for the store."""
        with self._lock:
            self.messages_seen += 1
            current = self.current
            counters = current.counters if current is not None else self.idle_counters
            sample = self.checker.check(counters, stamp, names, position, velocity, effort)
            if sample is None:
                return False
            if current is None:
                if self.trigger is None or not self.trigger.should_start(sample[1]):
                    return False
                started, _message = self.start()
                current = self.current
                if not started or current is None:
                    return False
                # The triggering sample was received while idle and is also the demo's first.
                current.counters.received += 1
                self.checker.last_stamp = stamp
            elif self.trigger is not None and self.trigger.should_stop(stamp, sample[1]):
                self._append(current, stamp, sample)
                self.stop("complete", auto_stopped=1)
                return True
            return self._append(current, stamp, sample)

    def _append(
        self,
        demonstration: _Demonstration,
        stamp: float,
        sample: tuple[Sequence[float], Sequence[float], Sequence[float]],
    ) -> bool:
        if demonstration.buffer.append(stamp, *sample, self.reference):
            demonstration.counters.accepted += 1
            return True
        demonstration.counters.dropped_buffer_full += 1
        return False

    def health(self, elapsed_s: float) -> tuple[str, str, dict[str, str]]:
        """Summary for a diagnostics message since the previous call.

        Parameters
        ----------
        elapsed_s : float, s
            Time since the previous call (the diagnostics period).

        Returns
        -------
        (level, message, values) : level is "ok", "warn" or "error"; values are strings by key
        (received rate in Hz, counters, buffer fill fraction, store errors).
        """
        counters = self.counters
        seen = self.messages_seen
        rate = (seen - self._seen_at_last_health) / elapsed_s if elapsed_s > 0 else 0.0
        self._seen_at_last_health = seen
        values = {key: str(value) for key, value in counters.as_dict().items()}
        current = self.current
        values.update(
            rate_hz=f"{rate:.1f}",
            buffer_fill=f"{self.buffer_fill:.3f}",
            recording=str(current is not None).lower(),
            demonstration_id=(current.demonstration_id or "") if current is not None else "",
            store_write_errors=str(self.writer.write_errors),
            feedback_errors=str(self.writer.observer_errors),
            reference_rejected=str(self.reference_rejected),
        )
        if self.writer.write_errors or self.writer.open_error is not None:
            error = self.writer.last_error or str(self.writer.open_error)
            return "error", f"store write failed: {error}", values
        anomalies = counters.anomalies()
        if anomalies or self.buffer_fill > 0.5:
            summary = ", ".join(f"{key}={value}" for key, value in sorted(anomalies.items()))
            return "warn", summary or f"buffer {self.buffer_fill:.0%} full", values
        return "ok", "recording" if current is not None else "idle", values

    def wait_finished(self, timeout_s: float) -> bool:
        """Wait until the last stopped demonstration is on disk; False on timeout."""
        last = self.last_finished
        return True if last is None else last.finished.wait(timeout_s)

    def shutdown(self, timeout_s: float = 10.0) -> bool:
        """Finish an open demonstration as incomplete (interrupted), flush and close the store."""
        if self.current is not None:
            self.stop("incomplete", interrupted=1)
        return self.writer.close(timeout_s)
