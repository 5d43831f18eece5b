"""Recorder benchmark over loopback DDS with real processes: sample loss, throughput, CPU.

Runs the recorder node (``python -m compliant_demo.nodes.recorder``) against a publisher process
that sends 7-joint sensor_msgs/JointState:

- ``loss_1khz_7j``: fraction of published samples missing from the store after 60 s at 1 kHz
  (``--seconds-1khz``), with ``recorder_cpu_fraction_1khz`` (recorder CPU seconds per wall
  second over the publishing window, from psutil).
- ``loss_5khz_7j``: the same for 20 s at 5 kHz (``--seconds-5khz``).
- ``throughput_vs_bare_subscriber``: messages per second the recording recorder takes in while a
  publisher floods it as fast as it can, divided by what a bare rclpy subscriber that only
  counts (same QoS, same executor as our nodes) takes in from the same kind of flood, measured in
  the same run: ``--flood-pairs`` interleaved pairs, ratio of the medians.

Every process gets ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST and ROS_DOMAIN_ID 131-133. Every child
is started through :mod:`compliant_demo.app.supervisor`, so it dies with the benchmark (even when a
timeout kills it), and every wait and retry loop of a child is bounded by its deadline; SIGTERM
ends the publisher at once. Prints one JSON object per measurement; the last line is
``{"bench": "recorder", ...}``.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:  # run as a plain script from a source checkout
    sys.path.insert(0, str(ROOT))

from compliant_demo.app.supervisor import (  # noqa: E402  (after the source checkout is on the path)
    Child,
    StopGrace,
    node_environment,
    start_child,
    stop_children,
)

JOINTS = [f"joint{i}" for i in range(1, 8)]
QUEUE_DEPTH = 5000


# Publishing, draining and the stop call together never take longer than this after --seconds.
_PUBLISHER_SLACK_S = 60.0
_STOP_GRACE = StopGrace(after_sigint_s=30.0)


def _env(domain_id: int) -> dict[str, str]:
    env = node_environment(domain_id)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(ROOT), env.get("PYTHONPATH")) if p)
    return env


# -- child process roles ------------------------------------------------------------------------


def _init_ros(name: str, *, own_signals: bool = False):
    """rclpy and a node; with ``own_signals`` rclpy installs no signal handlers, so SIGTERM ends
    the process at once and SIGINT raises KeyboardInterrupt wherever the loop is."""
    import rclpy
    from rclpy.node import Node
    from rclpy.signals import SignalHandlerOptions

    if own_signals:
        rclpy.init(signal_handler_options=SignalHandlerOptions.NO)
    else:
        rclpy.init()
    return rclpy, Node(name)


def _publisher_main(rate_hz: float, seconds: float, control: bool) -> None:
    """Publish 7-joint JointState at ``rate_hz`` (0 = as fast as possible) for ``seconds``."""
    from rclpy._rclpy_pybind11 import RCLError
    from sensor_msgs.msg import JointState
    from std_srvs.srv import Trigger

    from compliant_demo.nodes._common import recorded_qos, to_stamp

    rclpy, node = _init_ros("bench_publisher", own_signals=True)
    # Every loop below ends by this deadline, whatever the subscriber does.
    hard_deadline = time.monotonic() + seconds + _PUBLISHER_SLACK_S
    publisher = node.create_publisher(JointState, "joint_states", recorded_qos(QUEUE_DEPTH))
    deadline = min(time.monotonic() + 30.0, hard_deadline)
    while publisher.get_subscription_count() < 1 and time.monotonic() < deadline:
        rclpy.spin_once(node, timeout_sec=0.05)

    def trigger(service: str) -> None:
        client = node.create_client(Trigger, service)
        if not client.wait_for_service(timeout_sec=30.0):
            raise SystemExit(f"service {service} not available")
        future = client.call_async(Trigger.Request())
        rclpy.spin_until_future_complete(node, future, timeout_sec=30.0)
        print(json.dumps({"service": service, "reply": future.result().message}), flush=True)

    if control:
        trigger("start")
    time.sleep(0.5)
    message = JointState()
    message.name = JOINTS
    values = [0.0] * len(JOINTS)
    start_wall = time.time()
    start = time.monotonic()
    print(json.dumps({"event": "publishing"}), flush=True)
    sent = refused = 0
    period = 1.0 / rate_hz if rate_hz > 0 else 0.0
    while True:
        elapsed = time.monotonic() - start
        if elapsed >= seconds:
            break
        due = int(elapsed / period) + 1 if period else sent + 100
        # The deadline is checked on every pass: a subscriber that went away leaves the reliable
        # history full, and every publish is then refused.
        while sent < due and time.monotonic() - start < seconds:
            message.header.stamp = to_stamp(start_wall + sent * (period or 1e-6))
            values[0] = sent * 1e-6
            message.position = values
            message.velocity = values
            message.effort = values
            try:
                publisher.publish(message)
            except RCLError:
                # Reliable delivery pushing back: the history is full of samples the subscriber
                # has not acknowledged yet. Wait and send the same sample again.
                refused += 1
                time.sleep(0.001)
                continue
            sent += 1
        if period:
            time.sleep(min(0.0005, period))
    wall = time.monotonic() - start
    print(json.dumps({"event": "published", "sent": sent, "refused": refused, "seconds": wall}),
          flush=True)
    time.sleep(1.5)  # let the subscriber drain before stop
    if control:
        trigger("stop")
    node.destroy_node()
    rclpy.try_shutdown()


def _bare_main() -> None:
    """Count JointState messages until SIGINT; print the count."""
    from rclpy.executors import ExternalShutdownException
    from sensor_msgs.msg import JointState

    from compliant_demo.nodes._common import _executor, recorded_qos

    rclpy, node = _init_ros("bench_bare_subscriber")
    count = [0]

    def on_message(_message) -> None:
        count[0] += 1

    node.create_subscription(JointState, "joint_states", on_message, recorded_qos(QUEUE_DEPTH))
    executor = _executor()
    executor.add_node(node)
    try:
        while rclpy.ok():
            executor.spin_once(timeout_sec=0.1)
    except (KeyboardInterrupt, ExternalShutdownException):
        pass
    print(json.dumps({"received": count[0]}), flush=True)


# -- orchestration ------------------------------------------------------------------------------


def _start_recorder(store: Path, domain_id: int, log: Path) -> Child:
    joints = "[" + ", ".join(JOINTS) + "]"
    command = [
        sys.executable, "-m", "compliant_demo.nodes.recorder", "--ros-args",
        "-p", f"store_path:={store}", "-p", f"joints:={joints}",
        "-p", "stiffness_source:=none", "-p", f"queue_depth:={QUEUE_DEPTH}",
        "-p", "nominal_rate_hz:=1000.0",
    ]  # fmt: skip
    with log.open("wb") as handle:
        return start_child("recorder", command, env=_env(domain_id), stdout=handle,
                           stderr=subprocess.STDOUT)


def _run_publisher(rate_hz: float, seconds: float, domain_id: int, control: bool,
                   watch_pid: int | None = None) -> dict:
    import psutil

    command = [sys.executable, str(Path(__file__).resolve()), "--role", "publisher",
               "--rate", str(rate_hz), "--seconds", str(seconds)]
    if control:
        command.append("--control")
    child = start_child("publisher", command, env=_env(domain_id), stdout=subprocess.PIPE,
                        text=True)
    process = child.process
    watched = psutil.Process(watch_pid) if watch_pid else None
    result: dict = {}
    cpu_start = wall_start = None
    for line in process.stdout:  # ends when the publisher does (its loops are bounded)
        event = json.loads(line)
        if event.get("event") == "publishing" and watched is not None:
            times = watched.cpu_times()
            cpu_start, wall_start = times.user + times.system, time.monotonic()
        elif event.get("event") == "published":
            result.update(event)
            if watched is not None and cpu_start is not None:
                times = watched.cpu_times()
                cpu = times.user + times.system - cpu_start
                result["cpu_fraction"] = cpu / (time.monotonic() - wall_start)
    try:
        status = process.wait(_PUBLISHER_SLACK_S)
    except subprocess.TimeoutExpired:
        status = stop_children([child])["publisher"]
    if status != 0:
        raise SystemExit(f"publisher failed with {status}")
    return result


def _stop(child: Child) -> None:
    stop_children([child], _STOP_GRACE)


def _stored_samples(store: Path) -> list[int]:
    from compliant_demo.store import DemoStore

    with DemoStore(store, read_only=True) as db:
        return [info.n_samples for info in db.find_demonstrations()]


def _loss_run(rate_hz: float, seconds: float, domain_id: int, work: Path) -> dict:
    store = work / f"loss_{int(rate_hz)}.sqlite"
    recorder = _start_recorder(store, domain_id, work / f"recorder_{int(rate_hz)}.log")
    try:
        published = _run_publisher(rate_hz, seconds, domain_id, True, recorder.pid)
    finally:
        _stop(recorder)
    (stored,) = _stored_samples(store)
    loss = 1.0 - stored / published["sent"]
    row = {"bench": "recorder_loss", "rate_hz": rate_hz, "joints": len(JOINTS),
           "seconds": round(published["seconds"], 2), "published": published["sent"],
           "stored": stored, "loss": loss,
           "recorder_cpu_fraction": round(published["cpu_fraction"], 4)}
    print(json.dumps(row), flush=True)
    return row


def _flood_bare(seconds: float, domain_id: int) -> float:
    """Messages per second a bare counting subscriber takes in from one flood."""
    bare = start_child("bare", [sys.executable, str(Path(__file__).resolve()), "--role", "bare"],
                       env=_env(domain_id), stdout=subprocess.PIPE, text=True)
    try:
        flood = _run_publisher(0.0, seconds, domain_id, False)
        time.sleep(1.0)
    finally:
        stop_children([bare], _STOP_GRACE)
    received = json.loads(bare.process.stdout.read().strip().splitlines()[-1])["received"]
    return received / flood["seconds"]


def _flood_recorder(seconds: float, domain_id: int, store: Path, log: Path) -> float:
    """Messages per second the recording recorder stores from one flood."""
    recorder = _start_recorder(store, domain_id, log)
    try:
        flood = _run_publisher(0.0, seconds, domain_id, True, recorder.pid)
    finally:
        _stop(recorder)
    (stored,) = _stored_samples(store)
    return stored / flood["seconds"]


def _flood_run(seconds: float, domain_id: int, work: Path, pairs: int) -> dict:
    """Interleaved floods (bare, recorder, bare, ...) so a change in machine load during the
    run hits both sides; the ratio of the medians is reported."""
    bare_rates, recorder_rates = [], []
    for index in range(pairs):
        bare_rates.append(_flood_bare(seconds, domain_id + 1))
        recorder_rates.append(_flood_recorder(seconds, domain_id, work / f"flood_{index}.sqlite",
                                              work / f"recorder_flood_{index}.log"))
    bare_rate, recorder_rate = statistics.median(bare_rates), statistics.median(recorder_rates)
    row = {"bench": "recorder_flood", "seconds": seconds, "pairs": pairs,
           "bare_msgs_per_s": [round(r) for r in bare_rates],
           "recorder_msgs_per_s": [round(r) for r in recorder_rates],
           "ratio": recorder_rate / bare_rate}
    print(json.dumps(row), flush=True)
    return {**row, "bare_msgs_per_s": round(bare_rate), "recorder_msgs_per_s": round(recorder_rate)}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--role", choices=("bench", "publisher", "bare"), default="bench")
    parser.add_argument("--rate", type=float, default=1000.0)
    parser.add_argument("--seconds", type=float, default=10.0)
    parser.add_argument("--control", action="store_true")
    parser.add_argument("--seconds-1khz", type=float, default=60.0)
    parser.add_argument("--seconds-5khz", type=float, default=20.0)
    parser.add_argument("--seconds-flood", type=float, default=10.0)
    parser.add_argument("--flood-pairs", type=int, default=3)
    args = parser.parse_args()
    if args.role == "publisher":
        _publisher_main(args.rate, args.seconds, args.control)
        return
    if args.role == "bare":
        _bare_main()
        return
    with tempfile.TemporaryDirectory(prefix="bench_recorder_") as folder:
        work = Path(folder)
        slow = _loss_run(1000.0, args.seconds_1khz, 131, work)
        fast = _loss_run(5000.0, args.seconds_5khz, 131, work)
        flood = _flood_run(args.seconds_flood, 132, work, args.flood_pairs)
    print(json.dumps({
        "bench": "recorder",
        "loss_1khz_7j": slow["loss"],
        "loss_5khz_7j": fast["loss"],
        "throughput_vs_bare_subscriber": round(flood["ratio"], 3),
        "recorder_cpu_fraction_1khz": slow["recorder_cpu_fraction"],
        "seconds_1khz": slow["seconds"],
        "seconds_5khz": fast["seconds"],
        "bare_msgs_per_s": flood["bare_msgs_per_s"],
        "recorder_msgs_per_s": flood["recorder_msgs_per_s"],
    }), flush=True)


if __name__ == "__main__":
    main()
