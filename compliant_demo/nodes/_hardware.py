"""Hardware mode of the replay node: a skill sent to a joint impedance controller, enveloped.

Per command interface one ``std_msgs/Float64MultiArray`` topic, one value per joint in the order
of ``command_joints`` (the form ros2_control's forward command controllers take): equilibrium
(rad), stiffness (N*m/rad) and, where the skill commands one, damping (N*m*s/rad); optionally a
``trajectory_msgs/JointTrajectory`` with the equilibrium as its one point. Feedback is
``sensor_msgs/JointState`` on ``feedback_topic``, joints picked by name; a sample with an unset
or invalid stamp, or stamped more than 0.5 s ahead of the node's clock, is refused (counted in
diagnostics). Every command passes the
:class:`compliant_demo.handoff.envelope.SafetyEnvelope` (soft start, clamps, watchdogs, stop) in a
thread of its own on absolute deadlines (:class:`PeriodicThread`).

QoS, chosen on purpose:

- commands: reliable, keep-last 1, volatile. A forward command controller subscribes reliably
  (a best-effort publisher would not match it), and only the newest command counts: a deeper
  queue would deliver stale set-points after a stall.
- feedback: the sensor-data profile (best effort, keep-last 5). It matches reliable and
  best-effort publishers alike; a lost sample is replaced by the next one, a retransmitted one
  would arrive stale, and the stale-feedback watchdog covers a stream that stops.

One commander per robot: publishers are created when the node starts, so others discover them;
``run`` is refused until the node has watched the graph for ``commander_check_s`` and while any
other node publishes on a command topic (named in the reason); during a run the same check every
0.1 s stops the run (reason ``other_commander``). Limits: only participants DDS discovers on the
same domain are seen (another domain, a direct hardware interface, a teach pendant or a remapped
topic are not); two nodes started within the discovery time of each other can both pass the
start check and are then both stopped within 0.1 s plus the discovery time.
"""

from __future__ import annotations

import math
import threading
import time
from dataclasses import asdict
from typing import Any

import numpy as np
from rclpy.node import Node
from rclpy.qos import (
    DurabilityPolicy,
    HistoryPolicy,
    QoSProfile,
    ReliabilityPolicy,
    qos_profile_sensor_data,
)
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray
from std_srvs.srv import Trigger

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.handoff.envelope import EnvelopeLimits, SafetyEnvelope
from compliant_demo.handoff.gate import GateDecision, gate_decision
from compliant_demo.nodes._common import (
    RejectCounter,
    declare,
    float_array,
    guarded_service,
    list_parameter,
    stamp_seconds,
)
from compliant_demo.nodes._periodic import PeriodicThread, use_realtime_priority
from compliant_demo.replay import ReplaySetup
from compliant_demo.stamps import invalid_stamp

__all__ = ["COMMAND_QOS", "HardwareMode", "HardwareOutcome", "hardware_gate"]

#: Commands: reliable (a controller's reliable subscription matches), newest only.
COMMAND_QOS = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                         history=HistoryPolicy.KEEP_LAST, durability=DurabilityPolicy.VOLATILE)

_COMMANDER_CHECK_PERIOD_S = 0.1
# What rmw reports as the name of a publisher whose node DDS discovery has not described yet.
_UNNAMED = "_NODE_NAME_UNKNOWN_"
# A run starts from a joint state at most this old (or the stale timeout, if longer), s: the
# service call waits in the same executor as the feedback, so the very last sample may be queued.
_START_FEEDBACK_AGE_S = 0.5

# A joint state stamped further ahead of the node's clock than this is refused, s: freshness is
# judged by newer stamps, so one sample from the future would make every real one after it stale.
_FUTURE_STAMP_S = 0.5

HardwareOutcome = tuple[str, "str | None", dict[str, Any], dict[str, np.ndarray]]


def hardware_gate(store: Any, record: Any, plant: Any, criteria: Any, bench_override: bool
                  ) -> GateDecision:
    """The gate's decision for skill version ``record`` on ``plant`` (a ReplayPlant) under
    ``criteria`` (readiness Criteria): its latest verdict for the same plant and criteria
    digests, through :func:`compliant_demo.handoff.gate.gate_decision`."""
    verdict = store.latest_verdict(record.id, plant_digest=plant.digest,
                                   criteria_digest=criteria.digest)
    return gate_decision(verdict, skill=f"{record.name!r} version {record.version}",
                         bench_override=bench_override)


class _Feedback:
    """The latest measured angles (skill joint order) and when a fresh sample arrived."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.joints: list[str] = []
        self.q: np.ndarray | None = None
        self.positions: dict[str, float] = {}
        self.fresh_at: float | None = None
        self.stamp = -math.inf
        self.received = 0
        self.repeated = 0


class HardwareMode:
    """Declares the hardware parameters on ``node``, creates its topics and the ``stop``
    service, and runs one enveloped command stream at a time."""

    def __init__(self, node: Node, rejects: RejectCounter) -> None:
        self._node, self._rejects = node, rejects
        d = declare
        self.topics = {
            "equilibrium": d(node, "equilibrium_topic", "joint_equilibrium_controller/commands",
                             "Equilibrium command topic (Float64MultiArray, rad, command_joints "
                             "order)."),
            "stiffness": d(node, "stiffness_topic", "joint_stiffness_controller/commands",
                           "Stiffness command topic (Float64MultiArray, N*m/rad)."),
            "damping": d(node, "damping_topic", "joint_damping_controller/commands",
                         "Damping command topic (Float64MultiArray, N*m*s/rad); empty = none "
                         "(also when the skill commands no damping)."),
            "trajectory": d(node, "trajectory_topic", "", "Optional JointTrajectory topic (the "
                            "equilibrium as one point, one period ahead); empty = none."),
        }
        self._feedback_topic = d(node, "feedback_topic", "joint_states",
                                 "Measured joint states (JointState, joints by name).")
        d(node, "command_joints", [], "The controller's joint order; empty = the skill's.")
        self._rate_hz = d(node, "command_rate_hz", 500.0, "Command rate, Hz.", low=10.0,
                          high=2000.0)
        d(node, "feedback_timeout_periods", 1.5, "Stale-feedback timeout, command periods.",
          low=1.0, high=50.0)
        d(node, "soft_start_s", 2.0, "Blend from the measured pose to the skill's first "
          "command, s.", low=0.0, high=60.0)
        d(node, "stiffness_min", 15.0, "Lowest stiffness command, N*m/rad.", low=0.0, high=1e5)
        d(node, "stiffness_max", 180.0, "Highest stiffness command, N*m/rad.", low=0.0, high=1e5)
        d(node, "max_equilibrium_rate", 1.5, "Largest equilibrium change, rad/s.", low=1e-3,
          high=100.0)
        d(node, "max_interaction_torque", 8.0, "Estimated spring torque K*(q_eq - q) that stops "
          "the run, N*m.", low=0.01, high=1e4)
        d(node, "safe_stiffness", 20.0, "Stiffness at the soft start and after a stop, "
          "N*m/rad.", low=0.0, high=1e5)
        d(node, "damping_max", 10.0, "Highest damping command, N*m*s/rad.", low=0.0, high=1e4)
        d(node, "safe_damping", 1.0, "Damping at the soft start and after a stop, N*m*s/rad.",
          low=0.0, high=1e4)
        self._check_s = d(node, "commander_check_s", 1.0, "Time the node watches the graph for "
                          "other commanders before a run may start, s.", low=0.1, high=60.0)
        self._priority = d(node, "realtime_priority", 0, "SCHED_FIFO priority of the node's "
                           "threads (1-98); 0 = the normal scheduler.", low=0, high=98)
        self.bench_override = d(node, "bench_override", False, "Bench test only: send a skill "
                                "without a ready verdict (logged and stored with the run).")
        self._publishers = {
            name: node.create_publisher(Float64MultiArray, topic, COMMAND_QOS)
            for name, topic in self.topics.items() if topic and name != "trajectory"
        }
        self.limits()  # refuses inconsistent limits at start, with the reason
        list_parameter(node, "command_joints", str)
        self._trajectory = None
        if self.topics["trajectory"]:
            try:
                from trajectory_msgs.msg import JointTrajectory
            except ImportError:
                raise InvalidInputError(
                    "trajectory_topic is set but the trajectory_msgs package is not installed"
                ) from None
            self._trajectory = node.create_publisher(JointTrajectory, self.topics["trajectory"],
                                                     COMMAND_QOS)
        self._feedback = _Feedback()
        node.create_subscription(JointState, self._feedback_topic,
                                 rejects.guard(self._feedback_topic, self._on_joint_state),
                                 qos_profile_sensor_data)
        node.create_service(Trigger, "stop", guarded_service(node, "stop", self._on_stop))
        self._created = time.monotonic()
        self._envelope: SafetyEnvelope | None = None
        self._thread: PeriodicThread | None = None
        self._order: list[int] = []
        self._command_joints: list[str] = []
        self._origin = 0.0
        self._stops_reported = 0
        self._gate: GateDecision | None = None
        self._make_envelope: Any = None
        self.start_failure = ""
        self._early_stop: tuple[str, str] | None = None
        self.jitter_p99_ms = 0.0
        node.create_timer(_COMMANDER_CHECK_PERIOD_S, self._check_commanders)
        failure = use_realtime_priority(self._priority)
        if failure is not None:
            node.get_logger().warning(f"realtime_priority {self._priority} not taken: {failure}")

    # -- starting a run --------------------------------------------------------------------

    @property
    def running(self) -> bool:
        """True while a command stream runs."""
        return self._thread is not None

    def limits(self) -> EnvelopeLimits:
        """The envelope from the node's read-only parameters."""
        value = self._node.get_parameter
        names = ("stiffness_min", "stiffness_max", "max_stiffness_rate", "max_equilibrium_rate",
                 "max_interaction_torque", "safe_stiffness", "damping_max", "safe_damping",
                 "soft_start_s")
        return EnvelopeLimits(
            **{name: float(value(name).value) for name in names},
            feedback_timeout_s=value("feedback_timeout_periods").value / self._rate_hz,
        )

    @property
    def dt(self) -> float:
        """Command period, s."""
        return 1.0 / self._rate_hz

    def start(self, setup: ReplaySetup, gate: GateDecision, requested_at: float) -> str:
        """Start the command stream of ``setup`` (its dt must be the command period); the
        message to answer with. Raises InvalidInputError with the reason it cannot start.

        ``requested_at`` (time.monotonic(), s) is when the request came in: feedback is not
        taken while the executor serves it, so the last joint state must be recent then. The
        stream itself starts from the first joint state that arrives after this call.
        """
        if not gate.allowed:
            raise InvalidInputError(gate.reason)
        waited = time.monotonic() - self._created
        if waited < self._check_s:
            raise InvalidInputError(
                f"watching for other commanders for {self._check_s:g} s after start "
                f"({waited:.2f} s so far, commander_check_s); call run again")
        others = self._other_commanders()
        if others:
            raise InvalidInputError(f"another node commands this robot: {others}")
        skill_joints = list(setup.skill.joints)
        command_joints = list_parameter(self._node, "command_joints", str) or skill_joints
        if sorted(command_joints) != sorted(skill_joints):
            raise InvalidInputError(
                f"command_joints {command_joints} must name exactly the skill's joints "
                f"{skill_joints}")
        limits = self.limits()
        commands = setup.commands  # computed here, never in the command thread
        feedback = self._feedback
        with feedback.lock:
            feedback.joints = skill_joints
            known = all(name in feedback.positions for name in skill_joints)
            fresh_at = feedback.fresh_at
        oldest = max(limits.feedback_timeout_s, _START_FEEDBACK_AGE_S)
        if not known or fresh_at is None or requested_at - fresh_at > oldest:
            raise InvalidInputError(
                f"no joint state for {skill_joints} on {self._feedback_topic} in the "
                f"{oldest * 1e3:.3g} ms before the request")
        self._order = [skill_joints.index(name) for name in command_joints]
        self._command_joints = command_joints
        self._gate, self._stops_reported, self._envelope = gate, 0, None
        self._early_stop = None
        self._origin = time.monotonic()
        max_steps = int(self._node.get_parameter("max_steps").value)

        def envelope(q: np.ndarray) -> SafetyEnvelope:
            return SafetyEnvelope(limits, self.dt, commands.equilibrium, commands.stiffness,
                                  commands.damping, q, max_steps=max_steps)

        self._make_envelope = envelope
        self._thread = PeriodicThread(self.dt, self._command_period, "hardware_commands",
                                      priority=self._priority)
        self._thread.start()
        if gate.overridden:
            self._node.get_logger().warning(gate.reason)
        return (f"commanding {len(command_joints)} joints at {self._rate_hz:g} Hz: "
                f"{limits.soft_start_s:g} s soft start, then {setup.n_steps} skill periods")

    def request_stop(self, reason: str, detail: str) -> bool:
        """Stop the running stream (see the envelope's stop); False when none runs."""
        if self._thread is None:
            return False
        envelope = self._envelope
        if envelope is None:  # before the first command: taken when the envelope is made
            self._early_stop = self._early_stop or (reason, detail)
        else:
            envelope.request_stop(reason, detail)
        return True

    # -- the command thread ----------------------------------------------------------------

    def _command_period(self, now: float) -> bool:
        feedback = self._feedback
        with feedback.lock:
            q, fresh_at = feedback.q, feedback.fresh_at
        envelope = self._envelope
        if envelope is None:  # the soft start begins at a joint state measured after the call
            if q is not None and fresh_at is not None and fresh_at > self._origin:
                envelope = self._envelope = self._make_envelope(q)
                if self._early_stop is not None:
                    envelope.request_stop(*self._early_stop)
            elif now - self._origin > _START_FEEDBACK_AGE_S:
                self.start_failure = (f"no joint state on {self._feedback_topic} within "
                                      f"{_START_FEEDBACK_AGE_S * 1e3:.3g} ms of the start")
                return False
            else:
                return True
        command = envelope.tick(now - self._origin, q,
                                None if fresh_at is None else fresh_at - self._origin)
        order = self._order
        self._publishers["equilibrium"].publish(float_array(command.equilibrium[order]))
        self._publishers["stiffness"].publish(float_array(command.stiffness[order]))
        if command.damping is not None and "damping" in self._publishers:
            self._publishers["damping"].publish(float_array(command.damping[order]))
        if self._trajectory is not None:
            self._trajectory.publish(self._trajectory_message(command.equilibrium[order]))
        return not envelope.finished

    def _trajectory_message(self, positions: np.ndarray) -> Any:
        from builtin_interfaces.msg import Duration
        from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint

        nanoseconds = int(round(self.dt * 1e9))
        point = JointTrajectoryPoint(positions=[float(v) for v in positions],
                                     time_from_start=Duration(sec=0, nanosec=nanoseconds))
        return JointTrajectory(joint_names=self._command_joints, points=[point])

    # -- executor-side checks --------------------------------------------------------------

    def _on_joint_state(self, message: JointState) -> None:
        topic, feedback = self._feedback_topic, self._feedback
        if len(message.position) != len(message.name):
            self._rejects.reject(topic, "wrong_lengths",
                                 f"{len(message.position)} positions for {len(message.name)}")
            return
        positions = dict(zip(message.name, message.position, strict=True))
        if len(positions) != len(message.name) or not all(map(math.isfinite, message.position)):
            self._rejects.reject(topic, "non_finite_or_duplicate", "NaN, inf or a repeated name")
            return
        problem = self._stamp_problem(message.header.stamp)
        if problem is not None:
            self._rejects.reject(topic, *problem)
            return
        stamp = stamp_seconds(message.header.stamp)
        arrived = time.monotonic()
        with feedback.lock:
            joints = feedback.joints
            missing = [name for name in joints if name not in positions]
            if missing:
                self._rejects.reject(topic, "missing_joints", f"lacks {missing}")
                return
            feedback.received += 1
            if stamp <= feedback.stamp:  # frozen or replayed: not fresh
                feedback.repeated += 1
                return
            feedback.positions = positions
            feedback.stamp, feedback.fresh_at = stamp, arrived
            if joints:
                feedback.q = np.array([positions[name] for name in joints])

    def _stamp_problem(self, stamp: Any) -> tuple[str, str] | None:
        """(reason, detail) for a stamp freshness cannot be judged by: unset, invalid, or
        ahead of this node's clock (one such sample would make every later one look old)."""
        refused = invalid_stamp(stamp.sec, stamp.nanosec)
        if refused is not None:
            return refused
        ahead = stamp_seconds(stamp) - self._node.get_clock().now().nanoseconds * 1e-9
        if ahead > _FUTURE_STAMP_S:
            return "future_stamp", f"{ahead:+.3g} s ahead of the node's clock"
        return None

    def _other_commanders(self) -> str:
        own = (self._node.get_name(), self._node.get_namespace())
        found = []
        for publisher in self._publishers.values():
            for info in self._node.get_publishers_info_by_topic(publisher.topic_name):
                if (info.node_name, info.node_namespace) != own:
                    where = ("a node discovery has not named yet" if info.node_name == _UNNAMED
                             else info.node_namespace.rstrip("/") + "/" + info.node_name)
                    found.append(f"{where} on {publisher.topic_name}")
        return ", ".join(sorted(set(found)))

    def _check_commanders(self) -> None:
        if self._thread is None:
            return
        others = self._other_commanders()
        if others:
            self.request_stop("other_commander", f"another node commands this robot: {others}")

    def _on_stop(self, _request: Trigger.Request, response: Trigger.Response
                 ) -> Trigger.Response:
        limits = self.limits()
        if self.request_stop("requested", "stop service"):
            response.success = True
            response.message = (f"stopping: holding the measured pose, stiffness to "
                                f"{limits.safe_stiffness:g} N*m/rad at "
                                f"{limits.max_stiffness_rate:g} N*m/rad/s")
        else:
            response.success, response.message = False, "no hardware run to stop"
        self._node.get_logger().info(f"stop: {response.message}")
        return response

    def new_stops(self) -> list[dict[str, object]]:
        """Stops begun since the last call (for diagnostics and the log)."""
        envelope = self._envelope
        if envelope is None:
            return []
        stops = envelope.stops[self._stops_reported:]
        self._stops_reported += len(stops)
        return [stop.as_dict() for stop in stops]

    def poll(self) -> HardwareOutcome | None:
        """The finished run as (status, reason, metrics, trace), once; None while it runs."""
        thread, envelope = self._thread, self._envelope
        if thread is None or thread.running:
            return None
        self._thread = None
        if envelope is None:  # nothing was sent
            self._node.get_logger().error(f"hardware run not started: {self.start_failure}")
            return None
        self.jitter_p99_ms = thread.jitter_ms()
        stops = [stop.as_dict() for stop in envelope.stops]
        problem = stops[0] if stops and stops[0]["reason"] != "completed" else None
        status, reason = "ok", None
        if thread.error is not None:
            status, reason = "aborted", f"command thread failed: {type(thread.error).__name__}"
        elif problem is not None:
            status, reason = "stopped", f"{problem['reason']}: {problem['detail']}"
        gate = self._gate.as_dict() if self._gate is not None else None
        feedback = self._feedback
        metrics = {
            "mode": "hardware", "steps": envelope.skill_step, "steps_planned": envelope.n_steps,
            "periods": envelope.periods, "clamped_periods": envelope.clamped_periods,
            "missed_periods": thread.missed, "stops": stops, "gate": gate,
            "bench_override": bool(self._gate is not None and self._gate.overridden),
            "envelope": asdict(envelope.limits), "command_rate_hz": self._rate_hz,
            "command_period_jitter_p99_ms": self.jitter_p99_ms,
            "command_topics": {k: v for k, v in self.topics.items() if v},
            "command_joints": self._command_joints,
            "feedback_received": feedback.received, "feedback_repeated": feedback.repeated,
        }
        return status, reason, metrics, envelope.trace()

    def values(self) -> dict[str, str]:
        """Diagnostic key-values of the hardware mode."""
        envelope = self._envelope
        with self._feedback.lock:
            fresh_at = self._feedback.fresh_at
            received = self._feedback.received
        age = "none" if fresh_at is None else f"{(time.monotonic() - fresh_at) * 1e3:.1f}"
        values = {"mode": "hardware", "feedback_age_ms": age, "feedback_received": str(received),
                  "commanding": str(self._thread is not None).lower(),
                  "bench_override": str(self.bench_override).lower()}
        if envelope is not None:
            values.update({"phase": envelope.phase, "periods": str(envelope.periods),
                           "clamped_periods": str(envelope.clamped_periods),
                           "stops": str(len(envelope.stops))})
            values.update({f"stop/{i}": f"{s.reason}: {s.detail}"
                           for i, s in enumerate(envelope.stops)})
        return values

    def close(self) -> None:
        """Stop a running stream and send its stop ramp to the end (node shutdown)."""
        thread = self._thread
        if thread is None:
            return
        self.request_stop("shutdown", "the node is ending")
        limits = self.limits()
        ramp_s = abs(limits.stiffness_max - limits.safe_stiffness) / limits.max_stiffness_rate
        thread.stop_when_done(timeout_s=_START_FEEDBACK_AGE_S + ramp_s + 1.0)
