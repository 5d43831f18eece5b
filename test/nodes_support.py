"""Helpers for tests that run our nodes as real processes over loopback DDS.

Every process (the test's own rclpy context included) gets ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST
and the test module's own ROS_DOMAIN_ID, so parallel runs do not talk to each other.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Mapping, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from compliant_demo.app.launch_file import read_launch_file
from compliant_demo.app.supervisor import (
    Child,
    node_environment,
    run_child,
    start_child,
    stop_children,
)

ROOT = Path(__file__).resolve().parent.parent
LAUNCH = ROOT / "launch"
#: How long a test waits for a node to come up (its services, its subscriptions), s: a replay
#: node on a fresh machine first compiles its simulator (about 30 s,
#: :func:`compliant_demo.replay.warm_up`).
NODE_READY_S = 120.0


def ros_env(domain_id: int) -> dict[str, str]:
    """This process's environment restricted to loopback discovery on ``domain_id``."""
    env = node_environment(domain_id)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(ROOT), env.get("PYTHONPATH")) if p)
    return env


def run_cli(arguments: Sequence[str], domain_id: int, timeout_s: float
            ) -> subprocess.CompletedProcess:
    """``compliant-demo ARGUMENTS`` as a child that dies with the test, output captured."""
    command = [sys.executable, "-c", "import sys; from compliant_demo.cli import main; "
               "sys.exit(main(sys.argv[1:]))", *arguments]
    return run_child("compliant-demo", command, timeout_s=timeout_s, env=ros_env(domain_id),
                     cwd=ROOT)


class Nodes:
    """Processes started from a launch file (or a module), with their logs in one folder."""

    def __init__(self, children: list[Child], logs: list[Path]):
        self.children = children
        self.processes = [child.process for child in children]
        self.names = [child.name for child in children]
        self.logs = logs

    def __getitem__(self, name: str) -> subprocess.Popen:
        return self.processes[self.names.index(name)]

    def log(self, name: str) -> str:
        return self.logs[self.names.index(name)].read_text(errors="replace")

    def all_logs(self) -> str:
        return "\n".join(f"--- {n} ---\n{self.log(n)}" for n in self.names)

    def wait(self, name: str, timeout_s: float) -> int:
        """Exit status of node ``name``; fails the test (with the logs) on timeout."""
        try:
            return self[name].wait(timeout_s)
        except subprocess.TimeoutExpired:
            raise AssertionError(f"{name} still running after {timeout_s} s\n"
                                 f"{self.all_logs()}") from None

    def interrupt(self, name: str, timeout_s: float = 15.0) -> int:
        """SIGINT node ``name`` and return its exit status."""
        self[name].send_signal(signal.SIGINT)
        return self.wait(name, timeout_s)

    def close(self) -> None:
        """Stop whatever still runs (SIGINT, then SIGTERM, then SIGKILL) and reap it."""
        stop_children(self.children)


@contextmanager
def launched(
    launch_file: str,
    arguments: Mapping[str, str],
    domain_id: int,
    log_dir: Path,
    extra_parameters: Mapping[str, Mapping[str, str]] | None = None,
):
    """Start the nodes ``launch/<launch_file>`` declares, each with the command line
    ``compliant-demo launch`` uses (declared name, parameter files and values, then extras)."""
    description = read_launch_file(LAUNCH / launch_file, arguments)
    names = [node.name or node.executable for node in description.nodes]
    logs = [log_dir / f"{name}.log" for name in names]
    handles = [path.open("wb") for path in logs]
    children: list[Child] = []
    try:
        for name, node, handle in zip(names, description.nodes, handles, strict=True):
            extra = (extra_parameters or {}).get(node.name or "")
            children.append(start_child(name, node.command_line(extra), env=ros_env(domain_id),
                                        stdout=handle, stderr=subprocess.STDOUT))
        nodes = Nodes(children, logs)
        yield nodes
    finally:
        stop_children(children)
        for handle in handles:
            handle.close()


def start_module(
    module: str, parameters: Sequence[str], domain_id: int, log: Path, name: str,
    remaps: Sequence[str] = (),
) -> Nodes:
    """``python -m module --ros-args -p ... -r ...`` as one node."""
    handle = log.open("wb")
    command = [sys.executable, "-m", module, "--ros-args"]
    for parameter in parameters:
        command += ["-p", parameter]
    for remap in remaps:
        command += ["-r", remap]
    child = start_child(name, command, env=ros_env(domain_id), stdout=handle,
                        stderr=subprocess.STDOUT)
    handle.close()
    return Nodes([child], [log])


def wait_for(
    predicate: Callable[[], Any],
    timeout_s: float,
    what: str,
    idle: Callable[[], Any] = lambda: time.sleep(0.1),
) -> Any:
    """Call ``idle`` until ``predicate`` returns something truthy; fail naming ``what`` on
    timeout."""
    deadline = time.monotonic() + timeout_s
    while True:
        value = predicate()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout_s} s waiting for {what}")
        idle()


def simulate_rollout(joints, mechanism, rollout, schedule, seed: int, dt: float = 1e-3):
    """The rollout's commands through the core simulation directly (one scenario)."""
    from compliant_demo.sim import simulate

    n = len(rollout.t) - 1
    return simulate(joints, mechanism, rollout.position[:n], rollout.stiffness[:n],
                    rollout.damping[:n], schedules=None if schedule is None else [schedule],
                    q0=rollout.position[0], dt=dt, seed=seed)


class TestClient:
    """The test's own rclpy node in a private context on ``domain_id``."""

    __test__ = False  # not a test class

    def __init__(self, domain_id: int, name: str = "test_client"):
        os.environ["ROS_AUTOMATIC_DISCOVERY_RANGE"] = "LOCALHOST"
        os.environ["ROS_DOMAIN_ID"] = str(domain_id)
        import rclpy
        from rclpy.executors import SingleThreadedExecutor
        from rclpy.node import Node

        self.rclpy = rclpy
        self.context = rclpy.Context()
        rclpy.init(context=self.context)
        self.node = Node(name, context=self.context)
        self.executor = SingleThreadedExecutor(context=self.context)
        self.executor.add_node(self.node)
        self._clients: dict[str, Any] = {}
        self._resent: set[str] = set()

    def spin_for(self, seconds: float) -> None:
        deadline = time.monotonic() + seconds
        while time.monotonic() < deadline:
            self.executor.spin_once(timeout_sec=0.02)

    def spin_until(self, predicate: Callable[[], Any], timeout_s: float, what: str) -> Any:
        return wait_for(predicate, timeout_s, what,
                        lambda: self.executor.spin_once(timeout_sec=0.02))

    def call_trigger(self, service: str, timeout_s: float = 10.0,
                     resend_after_s: float | None = None) -> Any:
        """Call Trigger ``service``; wait up to :data:`NODE_READY_S` for it to exist, then up to
        ``timeout_s`` for the reply.

        A reply can be lost while the server's response writer has not yet matched this client's
        reader (``service_is_ready`` only sees the request side). With ``resend_after_s``, a
        request unanswered that long is sent again, until ``timeout_s``; :meth:`resent` then says
        so, and the reply may be the server's answer to a request it already took.
        """
        from std_srvs.srv import Trigger

        # One client per service for the whole test: a fresh client's response reader may not be
        # matched yet when the server answers, and that answer would be lost.
        client = self._clients.get(service)
        if client is None:
            client = self._clients[service] = self.node.create_client(Trigger, service)
        self.spin_until(client.service_is_ready, NODE_READY_S, f"service {service}")
        deadline = time.monotonic() + timeout_s
        self._resent.discard(service)
        while True:
            future = client.call_async(Trigger.Request())
            wait = deadline - time.monotonic()
            if resend_after_s is not None:
                wait = min(wait, resend_after_s)
            try:
                self.spin_until(future.done, max(wait, 0.0), f"response of {service}")
                return future.result()
            except AssertionError:
                client.remove_pending_request(future)
                if time.monotonic() >= deadline:
                    raise AssertionError(
                        f"timed out after {timeout_s} s waiting for response of {service}"
                    ) from None
                self._resent.add(service)

    def resent(self, service: str) -> bool:
        """True if the last :meth:`call_trigger` of ``service`` had to send its request again."""
        return service in self._resent

    def close(self) -> None:
        self.executor.shutdown()
        self.node.destroy_node()
        self.rclpy.try_shutdown(context=self.context)


def start_replay(client: TestClient, nodes: Any, service: str = "run") -> str:
    """Start a replay by its Trigger ``service`` and return the reply's message; fail with the
    nodes' logs if it does not start. A reply lost in transit is asked for again: the second
    request then finds the first replay running, which counts as started."""
    reply = client.call_trigger(service, timeout_s=30.0, resend_after_s=5.0)
    started = reply.success or (client.resent(service)
                                and reply.message == "a replay is already running")
    assert started, reply.message + nodes.all_logs()
    return reply.message


def parameter_value(value: Any) -> Any:
    """``value`` (bool, int, float, str, or a list of one of them) as an rcl ParameterValue;
    None gives the type "not set", which asks a node to undeclare the parameter."""
    from rcl_interfaces.msg import ParameterType, ParameterValue

    if value is None:
        return ParameterValue(type=ParameterType.PARAMETER_NOT_SET)
    if isinstance(value, bool):
        return ParameterValue(type=ParameterType.PARAMETER_BOOL, bool_value=value)
    if isinstance(value, int):
        return ParameterValue(type=ParameterType.PARAMETER_INTEGER, integer_value=value)
    if isinstance(value, float):
        return ParameterValue(type=ParameterType.PARAMETER_DOUBLE, double_value=value)
    if isinstance(value, str):
        return ParameterValue(type=ParameterType.PARAMETER_STRING, string_value=value)
    if all(isinstance(v, float) for v in value):
        return ParameterValue(type=ParameterType.PARAMETER_DOUBLE_ARRAY, double_array_value=value)
    if all(isinstance(v, int) and not isinstance(v, bool) for v in value):
        return ParameterValue(type=ParameterType.PARAMETER_INTEGER_ARRAY,
                              integer_array_value=value)
    return ParameterValue(type=ParameterType.PARAMETER_STRING_ARRAY, string_array_value=value)


def set_parameter(client: TestClient, node: str, name: str, value: Any) -> Any:
    """Ask node ``node`` (its full name, e.g. "/replay") to set one parameter, as any participant
    could; returns the SetParametersResult (successful, reason)."""
    from rcl_interfaces.msg import Parameter
    from rcl_interfaces.srv import SetParameters

    key = f"{node}/set_parameters"
    service = client._clients.get(key)
    if service is None:
        service = client._clients[key] = client.node.create_client(SetParameters, key)
    client.spin_until(service.service_is_ready, NODE_READY_S,
                     f"the parameter service of {node}")
    request = SetParameters.Request(parameters=[Parameter(name=name,
                                                          value=parameter_value(value))])
    # A response can be lost while the node's response writer has not yet matched this fresh
    # client's reader (service_is_ready only sees the request side); setting a parameter is
    # idempotent, so ask again, a bounded number of times.
    for attempt in range(4):
        future = service.call_async(request)
        try:
            client.spin_until(future.done, 5.0, "set_parameters")
            break
        except AssertionError:
            if attempt == 3:
                raise
    (result,) = future.result().results
    return result


class DiagnosticsOf:
    """The latest diagnostics status named ``name``, as key -> value, from a subscription."""

    def __init__(self, client: TestClient, name: str, topic: str = "diagnostics"):
        from diagnostic_msgs.msg import DiagnosticArray

        self.name = name
        self.seen: list[dict[str, str]] = []
        self.levels: list[int] = []
        self._subscription = client.node.create_subscription(
            DiagnosticArray, topic, self._on_message, 10
        )
        self._client = client

    def _on_message(self, message: Any) -> None:
        for status in message.status:
            if status.name == self.name:
                self.seen.append({kv.key: kv.value for kv in status.values})
                self.levels.append(status.level)

    @property
    def latest(self) -> dict[str, str]:
        return self.seen[-1] if self.seen else {}

    def close(self) -> None:
        self._client.node.destroy_subscription(self._subscription)
