"""Shared machinery of the reliability, fuzz and security tests and of ``bench/bench_faults.py``.

Holds the SIGKILL trial harness (a forkserver child records through the store API and reports
each call after it returned; the parent kills it at a random moment and checks the file), the
deterministic chunk generator both sides agree on, the recorder flood (a real recorder process and a
publisher process on loopback DDS, with the recorder's resident memory sampled), small adapters
over the store's records, the shared hypothesis settings and strategies, and a counter of fuzz
cases that the benchmark reads after running the fuzz tests in-process.
"""

from __future__ import annotations

import collections
import contextlib
import faulthandler
import hashlib
import multiprocessing
import os
import signal
import sqlite3
import tempfile
import threading
import time
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from hypothesis import HealthCheck, Phase, settings
from hypothesis import strategies as st

__all__ = [
    "JOINTS",
    "JUNK_SCALARS",
    "CHUNK_SAMPLES",
    "RATE_HZ",
    "FUZZ_COUNTER",
    "FUZZ_SETTINGS",
    "FLOOD_EPOCH_S",
    "FLOOD_JOINTS",
    "KillTrialResult",
    "channel",
    "chunk_arrays",
    "count_case",
    "demo_seed",
    "expected_samples",
    "field",
    "flood_driver_main",
    "fuzz_file",
    "integrity",
    "mutated_tree",
    "no_hang",
    "ros_environment",
    "run_flood",
    "run_kill_trials",
    "sample_digest",
    "write_demo",
]

JOINTS = ["shoulder", "elbow"]
CHUNK_SAMPLES = 50
RATE_HZ = 1000.0
CHANNELS = ("position", "velocity", "torque", "stiffness")

# Scalars of every JSON/YAML kind, the non-finite floats and huge integers included: the common
# leaves of the fuzzers' values (each adds the words of its own parser).
JUNK_SCALARS = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(2**100), max_value=2**100),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=20),
)

# Counts every fuzz case a fuzz test body ran; the benchmark runs the fuzz tests in-process and
# reads this after pytest returns.
FUZZ_COUNTER: collections.Counter[str] = collections.Counter()

# Derandomized so every run explores the same inputs (tests seed every RNG); the benchmark raises
# the example count through the environment. No shrinking and one bug per test: a failing fuzz
# test then costs seconds, not minutes, and the failing input is still printed.
FUZZ_SETTINGS = settings(
    max_examples=int(os.environ.get("COMPLIANT_DEMO_FUZZ_EXAMPLES", "40")),
    deadline=None,
    derandomize=True,
    database=None,
    phases=[Phase.explicit, Phase.generate],
    report_multiple_bugs=False,
    suppress_health_check=[
        HealthCheck.too_slow,
        HealthCheck.function_scoped_fixture,
        HealthCheck.data_too_large,
    ],
)


def count_case(parser: str) -> None:
    """Record that one fuzz case of ``parser`` ran to completion."""
    FUZZ_COUNTER[parser] += 1


@contextlib.contextmanager
def no_hang(seconds: float) -> Iterator[None]:
    """Raise TimeoutError in the main thread if the body runs longer than ``seconds`` (a hang).

    A hang inside C code (SQLite, a parser extension) holds the thread where no signal handler
    can run; for that case the process dumps every thread's stack and exits after four times the
    limit, so the suite fails loudly instead of waiting for ever.
    """

    def _alarm(signum: int, frame: object) -> None:
        raise TimeoutError(f"parser still running after {seconds} s: treated as a hang")

    previous = signal.signal(signal.SIGALRM, _alarm)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    faulthandler.dump_traceback_later(4 * seconds, exit=True)
    try:
        yield
    finally:
        faulthandler.cancel_dump_traceback_later()
        signal.setitimer(signal.ITIMER_REAL, 0.0)
        signal.signal(signal.SIGALRM, previous)


def _paths(tree: object, prefix: tuple = ()) -> list[tuple]:
    """Every path (tuple of keys and indices) to a node of a parsed YAML tree."""
    found = [prefix]
    if isinstance(tree, dict):
        for key, value in tree.items():
            found += _paths(value, (*prefix, key))
    elif isinstance(tree, list):
        for index, value in enumerate(tree):
            found += _paths(value, (*prefix, index))
    return found


def _replace(tree: object, path: tuple, value: object) -> object:
    if not path:
        return value
    head, rest = path[0], path[1:]
    if isinstance(tree, dict):
        return {**tree, head: _replace(tree[head], rest, value)}
    copy = list(tree)  # type: ignore[call-overload]
    copy[head] = _replace(copy[head], rest, value)
    return copy


def _delete(tree: object, path: tuple) -> object:
    if len(path) == 1:
        if isinstance(tree, dict):
            return {k: v for k, v in tree.items() if k != path[0]}
        return [v for i, v in enumerate(tree) if i != path[0]]  # type: ignore[arg-type]
    head = path[0]
    if isinstance(tree, dict):
        return {**tree, head: _delete(tree[head], path[1:])}
    copy = list(tree)  # type: ignore[call-overload]
    copy[head] = _delete(copy[head], path[1:])
    return copy


@st.composite
def mutated_tree(draw: st.DrawFn, tree: object, leaves: st.SearchStrategy) -> object:
    """``tree`` (parsed YAML or JSON) with 1-4 nodes replaced by ``leaves``, deleted or added."""
    for _ in range(draw(st.integers(1, 4))):
        path = draw(st.sampled_from(_paths(tree)))
        action = draw(st.sampled_from(["replace", "delete", "add"]))
        if action == "delete" and path:
            tree = _delete(tree, path)
        elif action == "add":
            target = tree
            for part in path:
                target = target[part]  # type: ignore[index]
            if isinstance(target, dict):
                key = draw(st.sampled_from(["kind", "low", "high", "extra", "seed", "onset_s"]))
                tree = _replace(tree, path, {**target, key: draw(leaves)})
            else:
                tree = _replace(tree, path, draw(leaves))
        else:
            tree = _replace(tree, path, draw(leaves))
    return tree


@contextlib.contextmanager
def fuzz_file(name: str, content: bytes) -> Iterator[Path]:
    """A fresh temporary file ``name`` holding ``content``, removed afterwards."""
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / name
        path.write_bytes(content)
        yield path


def field(record: Any, name: str) -> Any:
    """Read ``name`` from a store record, whether it is a mapping or an object with attributes."""
    if isinstance(record, Mapping):
        return record[name]
    return getattr(record, name)


def channel(loaded: Any, name: str) -> np.ndarray | None:
    """One channel (``t``, ``position``, ...) of a loaded demonstration as an array, or None."""
    try:
        value = field(loaded, name)
    except (KeyError, AttributeError):
        return None
    return None if value is None else np.asarray(value)


def sample_digest(loaded: Any) -> str:
    """SHA-256 over the exact bytes of every channel of a loaded demonstration."""
    digest = hashlib.sha256()
    for name in ("t", *CHANNELS):
        values = channel(loaded, name)
        digest.update(name.encode())
        if values is not None:
            digest.update(str(values.shape).encode())
            digest.update(np.ascontiguousarray(values, dtype="<f8").tobytes())
    return digest.hexdigest()


def integrity(path: str | Path) -> str:
    """``PRAGMA integrity_check`` of a store file through plain sqlite3 (joined result rows)."""
    connection = sqlite3.connect(str(path), timeout=10.0)
    try:
        rows = connection.execute("PRAGMA integrity_check").fetchall()
    finally:
        connection.close()
    return "; ".join(str(row[0]) for row in rows)


def chunk_arrays(seed: int, index: int, n_joints: int = len(JOINTS)) -> dict[str, np.ndarray]:
    """The deterministic chunk ``index`` of trial ``seed``: ``t`` (n,) s and (n, n_joints) channels.

    Values are drawn from a seeded generator so that a reader can regenerate exactly what the
    writer appended, bit for bit.
    """
    rng = np.random.default_rng([seed, index])
    start = index * CHUNK_SAMPLES
    t = (start + np.arange(CHUNK_SAMPLES)) / RATE_HZ
    shape = (CHUNK_SAMPLES, n_joints)
    return {
        "t": t,
        "position": rng.uniform(-2.0, 2.0, shape),
        "velocity": rng.normal(0.0, 1.0, shape),
        "torque": rng.normal(0.0, 5.0, shape),
        "stiffness": rng.uniform(5.0, 200.0, shape),
    }


def expected_samples(seed: int, n_chunks: int, n_joints: int = len(JOINTS)) -> dict[str, Any]:
    """The first ``n_chunks`` chunks of trial ``seed`` concatenated per channel."""
    chunks = [chunk_arrays(seed, index, n_joints) for index in range(n_chunks)]
    if not chunks:
        return {name: np.empty((0,) if name == "t" else (0, n_joints)) for name in ("t", *CHANNELS)}
    return {name: np.concatenate([chunk[name] for chunk in chunks]) for name in chunks[0]}


def demo_seed(seed: int, cycle: int) -> int:
    """Seed of the chunks of demonstration number ``cycle`` of writer ``seed``."""
    return seed * 1000 + cycle


def _writer_main(
    path: str, progress_path: str, seed: int, chunks_per_demo: int, n_demos: int = 1_000_000
) -> None:
    """Child of a kill trial: record ``n_demos`` demonstrations one after another (or until killed).

    Each demonstration gets ``chunks_per_demo`` chunks and is finished "complete"; progress
    lines ``D k id`` (begun), ``C k i`` (chunk i committed) and ``F k`` (finished) are written
    with single small ``os.write`` calls after the store call returned, so a line either reached
    the file in full or not at all when SIGKILL arrives: whatever is reported was committed.
    """
    from compliant_demo.store import DemoStore

    fd = os.open(progress_path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o600)
    with DemoStore(path) as store:
        for cycle in range(n_demos):
            demo_id = store.begin_demonstration(
                skill="cork_seat", joints=JOINTS, operator="operator_a", notes=f"cycle {cycle}"
            )
            os.write(fd, f"D {cycle} {demo_id}\n".encode())
            for index in range(chunks_per_demo):
                store.append_chunk(demo_id, **chunk_arrays(demo_seed(seed, cycle), index))
                os.write(fd, f"C {cycle} {index}\n".encode())
            store.finish_demonstration(demo_id, "complete")
            os.write(fd, f"F {cycle}\n".encode())
    os.close(fd)


@dataclass
class _Reported:
    """What the writer reported about one demonstration before it was killed."""

    demo_id: str
    chunks: int = 0
    finished: bool = False


@dataclass
class KillTrialResult:
    """What one SIGKILL trial found on the next open of the store (figures of its last demo)."""

    seed: int
    delay_s: float
    demo_id: str | None
    reported_chunks: int
    stored_chunks: int
    integrity: str
    status: str | None
    demos_finished: int
    problem: str | None

    @property
    def intact(self) -> bool:
        """True when the trial kept every reported chunk exactly and the file is sound."""
        return self.problem is None


def _read_progress(progress_path: Path) -> dict[int, _Reported]:
    reported: dict[int, _Reported] = {}
    if not progress_path.exists():
        return reported
    for line in progress_path.read_text().splitlines():
        kind, cycle, *rest = line.split()
        if kind == "D":
            reported[int(cycle)] = _Reported(rest[0])
        elif kind == "C":
            reported[int(cycle)].chunks = int(rest[0]) + 1
        elif kind == "F":
            reported[int(cycle)].finished = True
    return reported


def _alive(process: Any, lock: threading.Lock) -> bool:
    # Process.start() in another thread polls every child (multiprocessing's _cleanup); two polls
    # of one forkserver child at once can lose its exit code (reported as 255), hence the lock.
    with lock:
        return process.is_alive()


def _wait_for_start(progress_path: Path, process: Any, lock: threading.Lock, timeout_s: float
                    ) -> None:  # fmt: skip
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline and _alive(process, lock):
        if progress_path.exists() and progress_path.stat().st_size > 0:
            return
        time.sleep(0.0005)


def _check_demo(loaded: Any, seed: int, report: _Reported | None, chunks_per_demo: int
                ) -> tuple[int, str | None]:  # fmt: skip
    """(stored chunks, problem) of one demonstration of a killed writer."""
    status = loaded.info.status
    t = channel(loaded, "t")
    n_samples = 0 if t is None else t.shape[0]
    stored, remainder = divmod(n_samples, CHUNK_SAMPLES)
    if remainder:
        return stored, f"{n_samples} samples is not a whole number of chunks"
    reported = 0 if report is None else report.chunks
    if report is not None and report.finished:
        if status != "complete" or stored != chunks_per_demo:
            return stored, f"a finished demonstration is {status!r} with {stored} chunks"
    elif not reported <= stored <= reported + 1:
        return stored, f"{reported} chunks reported committed but {stored} stored"
    elif status != "incomplete" and not (status == "complete" and stored == chunks_per_demo):
        return stored, f"interrupted demonstration has status {status!r}"
    for name, want in expected_samples(seed, stored).items():
        got = channel(loaded, name)
        if got is None or got.shape != want.shape or not np.array_equal(got, want):
            return stored, f"channel {name} differs from what was appended"
    return stored, None


def _verify_trial(path: Path, seed: int, reported: dict[int, _Reported], chunks_per_demo: int
                  ) -> KillTrialResult:  # fmt: skip
    from compliant_demo.store import DemoStore

    last = reported[max(reported)] if reported else None
    result = KillTrialResult(
        seed=seed, delay_s=0.0, demo_id=None if last is None else last.demo_id,
        reported_chunks=0 if last is None else last.chunks, stored_chunks=0, integrity="",
        status=None, demos_finished=sum(r.finished for r in reported.values()), problem=None,
    )  # fmt: skip
    if not path.exists():
        if reported:
            result.problem = "store file missing although a demonstration was begun"
        return result
    result.integrity = integrity(path)
    if result.integrity != "ok":
        result.problem = f"integrity_check: {result.integrity}"
        return result
    by_id = {report.demo_id: (cycle, report) for cycle, report in reported.items()}
    with DemoStore(str(path)) as store:
        infos = list(store.find_demonstrations())
        missing = set(by_id) - {info.id for info in infos}
        if missing:
            result.problem = f"reported demonstrations missing: {sorted(missing)}"
            return result
        for info in infos:
            cycle, report = by_id.get(info.id, (int(info.notes.split()[-1]), None))
            loaded = store.load_demonstration(info.id)
            stored, problem = _check_demo(loaded, demo_seed(seed, cycle), report, chunks_per_demo)
            if report is last and last is not None:
                result.stored_chunks, result.status = stored, loaded.info.status
            if problem is not None:
                result.problem = f"demonstration {cycle}: {problem}"
                return result
    return result


def write_demo(
    store: Any, seed: int, n_chunks: int, *, finish: str | None = "complete", **meta: Any
) -> str:
    """Begin a demonstration, append ``n_chunks`` chunks of trial ``seed``; return its id."""
    meta.setdefault("skill", "cork_seat")
    meta.setdefault("operator", "operator_a")
    demo_id = store.begin_demonstration(joints=JOINTS, **meta)
    for index in range(n_chunks):
        store.append_chunk(demo_id, **chunk_arrays(seed, index))
    if finish is not None:
        store.finish_demonstration(demo_id, finish)
    return demo_id


def _one_trial(context: Any, start_lock: threading.Lock, folder: Path, seed: int,
               max_delay_s: float, chunks_per_demo: int) -> KillTrialResult:  # fmt: skip
    rng = np.random.default_rng(seed)
    path = folder / f"trial_{seed}.sqlite"
    progress = folder / f"trial_{seed}.progress"
    # One trial in ten is killed counting from the fork, so some kills land while the store file
    # and its schema are being created; the rest count from the first report (demonstration begun).
    from_fork = rng.random() < 0.1
    delay = float(rng.uniform(0.0, max_delay_s / (4 if from_fork else 1)))
    with start_lock:
        process = context.Process(
            target=_writer_main, args=(str(path), str(progress), seed, chunks_per_demo),
            daemon=True,
        )  # fmt: skip
        process.start()
    if not from_fork:
        _wait_for_start(progress, process, start_lock, timeout_s=30.0)
    time.sleep(delay)
    if _alive(process, start_lock):
        os.kill(process.pid, signal.SIGKILL)
    deadline = time.monotonic() + 30.0
    while _alive(process, start_lock) and time.monotonic() < deadline:
        time.sleep(0.001)
    trial = _verify_trial(path, seed, _read_progress(progress), chunks_per_demo)
    trial.delay_s = delay
    with start_lock:
        exitcode = process.exitcode
    if exitcode != -signal.SIGKILL and trial.problem is None:
        trial.problem = f"writer exited with {exitcode} before it was killed"
    return trial


def run_kill_trials(
    folder: str | Path, n_trials: int, *, parallel: int = 3, max_delay_s: float = 0.12,
    first_seed: int = 1000, chunks_per_demo: int = 1_000_000,
) -> list[KillTrialResult]:
    """Run ``n_trials`` SIGKILL trials, ``parallel`` at a time, each in its own store file.

    With the default ``chunks_per_demo`` the writer appends to one demonstration until killed;
    a small value makes it record short demonstrations one after another, so kills also land in
    ``begin_demonstration`` and ``finish_demonstration``. Writers are forked from a forkserver
    that has imported the store once, so a trial costs a fork rather than an interpreter start.
    """
    from concurrent.futures import ThreadPoolExecutor

    folder = Path(folder)
    context = multiprocessing.get_context("forkserver")
    context.set_forkserver_preload(["numpy", "compliant_demo.store", __name__])
    start_lock = threading.Lock()
    with ThreadPoolExecutor(max_workers=parallel) as pool:
        futures = [
            pool.submit(_one_trial, context, start_lock, folder, first_seed + k, max_delay_s,
                        chunks_per_demo)
            for k in range(n_trials)
        ]  # fmt: skip
        return [future.result() for future in futures]


# -- recorder flood -------------------------------------------------------------------------------

FLOOD_JOINTS = [f"joint_{i}" for i in range(1, 8)]
FLOOD_EPOCH_S = 1000  # header stamps count from here, so relative times stay exact in float64


def ros_environment(domain_id: int) -> dict[str, str]:
    """This process's environment with loopback-only discovery on ``domain_id``."""
    return {
        **os.environ,
        "ROS_DOMAIN_ID": str(domain_id),
        "ROS_AUTOMATIC_DISCOVERY_RANGE": "LOCALHOST",
        "PYTHONUNBUFFERED": "1",
    }


def _diagnostic_values(msg: Any) -> dict[str, str] | None:
    for status in msg.status:
        if status.name == "recorder":  # not its "recorder/teaching_feedback" status
            return {kv.key: kv.value for kv in status.values}
    return None


def flood_driver_main(result_path: str, flood_s: float, rate_hz: float, slow_s: float,
                      slow_rate_hz: float, call_stop: bool = True, namespace: str = ""
                      ) -> None:  # fmt: skip
    """Publisher process of the flood: start, flood, fall back, stop; results as JSON.

    Header stamps advance one 1/rate_hz tick per message through both phases, so the slow phase
    continues the same sample clock: any stamp missing from the store is a lost sample. The file
    ``<result_path>.publishing`` appears when the flood begins.
    """
    import json

    import rclpy
    from diagnostic_msgs.msg import DiagnosticArray
    from rclpy.qos import HistoryPolicy, QoSProfile, ReliabilityPolicy
    from sensor_msgs.msg import JointState
    from std_srvs.srv import Trigger

    rclpy.init(args=["--ros-args", "-r", f"__ns:=/{namespace}"] if namespace else None)
    node = rclpy.create_node("flood_driver")
    qos = QoSProfile(depth=1000, reliability=ReliabilityPolicy.RELIABLE,
                     history=HistoryPolicy.KEEP_LAST)  # fmt: skip
    publisher = node.create_publisher(JointState, "joint_states", qos)
    diagnostics: list[tuple[float, dict[str, str]]] = []

    def on_diagnostics(msg: Any) -> None:
        values = _diagnostic_values(msg)
        if values is not None:
            diagnostics.append((time.time(), values))

    node.create_subscription(DiagnosticArray, "diagnostics", on_diagnostics, 50)
    result: dict[str, Any] = {}

    def call(name: str) -> tuple[bool, str]:
        client = node.create_client(Trigger, name)
        if not client.wait_for_service(timeout_sec=30.0):
            return False, f"service {name} not available"
        future = client.call_async(Trigger.Request())
        rclpy.spin_until_future_complete(node, future, timeout_sec=30.0)
        response = future.result()
        return (False, "no response") if response is None else (response.success, response.message)

    def spin_for(seconds: float) -> None:
        end = time.monotonic() + seconds
        while time.monotonic() < end:
            rclpy.spin_once(node, timeout_sec=0.02)

    def settled(quiet_s: float = 1.5, limit_s: float = 30.0) -> dict[str, str] | None:
        """The recorder's diagnostics once its received count has stood still for quiet_s.

        A loaded machine may still be delivering the last messages of a phase; reading the
        counters before they stop moving would compare them with an unfinished phase.
        """
        spin_for(0.5)
        deadline = time.monotonic() + limit_s
        last, still_since = None, time.monotonic()
        while time.monotonic() < deadline:
            spin_for(0.1)
            current = diagnostics[-1][1].get("received") if diagnostics else None
            if current != last:
                last, still_since = current, time.monotonic()
            elif time.monotonic() - still_since >= quiet_s:
                break
        return diagnostics[-1][1] if diagnostics else None

    msg = JointState()
    msg.name = list(FLOOD_JOINTS)
    tick = 0

    def publish_retrying(msg: Any) -> None:
        """Publish ``msg``; a reliable writer whose history is full refuses for a moment on a
        loaded machine ("cannot publish data"), so the same message is offered again, bounded."""
        from rclpy._rclpy_pybind11 import RCLError

        deadline = time.monotonic() + 2.0
        while True:
            try:
                publisher.publish(msg)
                return
            except RCLError:
                if time.monotonic() >= deadline:
                    raise
                rclpy.spin_once(node, timeout_sec=0.001)

    def publish_at(rate: float, seconds: float) -> int:
        nonlocal tick
        start = time.perf_counter()
        sent = 0
        while True:
            elapsed = time.perf_counter() - start
            if elapsed >= seconds:
                return sent
            due = int(elapsed * rate) + 1
            while sent < due:  # catch up in a burst when behind: the offered rate is the target
                sec, rest = divmod(tick, int(rate_hz))
                msg.header.stamp.sec = FLOOD_EPOCH_S + sec
                msg.header.stamp.nanosec = int(round(rest * 1e9 / rate_hz))
                value = [1e-4 * tick] * len(FLOOD_JOINTS)
                msg.position, msg.velocity, msg.effort = value, value, value
                publish_retrying(msg)
                tick += 1
                sent += 1
            if sent % 200 == 0 or rate < 1000:
                rclpy.spin_once(node, timeout_sec=0.0)
            if rate < 1000:
                time.sleep(max(0.0, (sent / rate) - (time.perf_counter() - start)))

    try:
        deadline = time.monotonic() + 30.0
        while publisher.get_subscription_count() == 0 and time.monotonic() < deadline:
            spin_for(0.05)
        result["start"] = call("start")
        result["t_flood_start"] = time.time()
        Path(f"{result_path}.publishing").touch()
        result["flood_sent"] = publish_at(rate_hz, flood_s)
        result["t_flood_end"] = time.time()
        result["diag_after_flood"] = settled()
        result["first_slow_tick"] = tick
        result["slow_sent"] = publish_at(slow_rate_hz, slow_s)
        result["diag_after_slow"] = settled()
        result["last_tick"] = tick - 1
        result["stop"] = call("stop") if call_stop else None
        result["t_end"] = time.time()
        result["diagnostics_seen"] = len(diagnostics)
        result["max_buffer_fill"] = max(
            (float(values.get("buffer_fill", 0.0)) for _, values in diagnostics), default=0.0
        )
    finally:
        Path(result_path).write_text(json.dumps(result))
        node.destroy_node()
        rclpy.try_shutdown()


def run_flood(folder: str | Path, domain_id: int, *, flood_s: float = 4.0,
              rate_hz: float = 20_000.0, slow_s: float = 2.0, slow_rate_hz: float = 100.0,
              buffer_capacity: int = 1000, kill_after_s: float | None = None,
              namespace: str = "", store_path: Path | None = None) -> dict[str, Any]:  # fmt: skip
    """Flood a real recorder process; return what the driver saw, the RSS trace and the store.

    The recorder runs as ``python -m compliant_demo.nodes.recorder`` with 7 joints, no stiffness
    channel and a small buffer; its resident memory is sampled every 20 ms with psutil. With
    ``kill_after_s`` the recorder is killed with SIGKILL that long after publishing began (and
    the driver does not ask it to stop). ``namespace`` puts recorder and driver under ``/ns``;
    ``store_path`` (default ``folder/flood.sqlite``) may be shared with another recorder.
    """
    import json
    import subprocess
    import sys

    import psutil

    from compliant_demo.app.supervisor import start_child

    folder = Path(folder)
    store_path = folder / "flood.sqlite" if store_path is None else Path(store_path)
    env = ros_environment(domain_id)
    env["PYTHONPATH"] = os.pathsep.join(
        [str(Path(__file__).resolve().parent.parent), str(Path(__file__).resolve().parent),
         env.get("PYTHONPATH", "")]
    )  # fmt: skip
    joints = "[" + ", ".join(FLOOD_JOINTS) + "]"
    recorder_cmd = [
        sys.executable, "-m", "compliant_demo.nodes.recorder", "--ros-args",
        "-p", f"store_path:={store_path}", "-p", f"joints:={joints}",
        "-p", "stiffness_channel:=none", "-p", f"nominal_rate_hz:={rate_hz}",
        "-p", f"buffer_capacity:={buffer_capacity}", "-p", "queue_depth:=1000",
        "-p", "diagnostics_period_s:=0.2", "-p", "flush_interval_s:=0.1",
        *(["-r", f"__ns:=/{namespace}"] if namespace else []),
    ]  # fmt: skip
    log = (folder / "recorder.log").open("w")
    recorder = start_child("recorder", recorder_cmd, env=env, stdout=log,
                           stderr=subprocess.STDOUT).process
    rss: list[tuple[float, float]] = []
    stop_sampling = threading.Event()

    def sample() -> None:
        process = psutil.Process(recorder.pid)
        while not stop_sampling.is_set():
            try:
                rss.append((time.time(), process.memory_info().rss / 2**20))
            except psutil.Error:
                return
            stop_sampling.wait(0.02)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    result_path = folder / "driver.json"
    driver_code = (
        "import reliability_support as r; "
        f"r.flood_driver_main({str(result_path)!r}, {flood_s}, {rate_hz}, {slow_s}, "
        f"{slow_rate_hz}, {kill_after_s is None}, {namespace!r})"
    )

    def kill_when_due() -> None:
        marker = Path(f"{result_path}.publishing")
        while not marker.exists() and recorder.poll() is None and not stop_sampling.is_set():
            time.sleep(0.005)
        time.sleep(kill_after_s or 0.0)
        if recorder.poll() is None:
            recorder.kill()

    if kill_after_s is not None:
        threading.Thread(target=kill_when_due, daemon=True).start()
    try:
        driver = subprocess.run(
            [sys.executable, "-c", driver_code], env=env, capture_output=True, text=True,
            timeout=180,
        )  # fmt: skip
        recorder_alive_after_flood = recorder.poll() is None
    finally:
        recorder.send_signal(signal.SIGINT)
        try:
            recorder.wait(30)
        except subprocess.TimeoutExpired:
            recorder.kill()
            recorder.wait(10)
        stop_sampling.set()
        sampler.join(5)
        log.close()
    result = json.loads(result_path.read_text()) if result_path.exists() else {}
    result.update(
        driver_returncode=driver.returncode,
        driver_stderr=driver.stderr[-2000:],
        recorder_alive_after_flood=recorder_alive_after_flood,
        recorder_returncode=recorder.returncode,
        recorder_log=(folder / "recorder.log").read_text()[-3000:],
        rss_trace=rss,
        store_path=str(store_path),
    )
    flood_start = result.get("t_flood_start", float("inf"))
    before = [mb for t, mb in rss if t < flood_start]
    result["idle_rss_mb"] = max(before) if before else None
    result["peak_rss_mb"] = max((mb for _, mb in rss), default=None)
    return result
