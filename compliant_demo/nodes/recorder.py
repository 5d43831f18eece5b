"""Recorder node: joint states (and an optional stiffness reference) into the store.

Topics: subscribes ``joint_states`` (sensor_msgs/JointState: position rad, velocity rad/s, effort
N*m; header stamps in s) and ``stiffness_reference`` (std_msgs/Float64MultiArray, one value per
joint in ``joints`` order, N*m/rad); publishes ``diagnostics`` (diagnostic_msgs/DiagnosticArray,
keys: the counters of :class:`compliant_demo.ingest.IngestCounters`, rate_hz, buffer_fill,
recording, demonstration_id, store_write_errors, reference_rejected, feedback_errors, and
``rejected`` plus ``rejected/<topic>/<reason>`` for messages refused before they reach the
session), and a second status ``recorder/teaching_feedback``
(:mod:`compliant_demo.teaching_feedback`: excitation share, deviation from the earlier
demonstrations, advice), also published on ``teaching_feedback`` (diagnostic_msgs/DiagnosticArray,
reliable, keep last 10, volatile) every
``feedback_period_s`` and at once after ``stop``. With ``stiffness_channel`` ``model`` it
subscribes ``motor_states`` (sensor_msgs/JointState, ``<joint>_motor_1``/``_motor_2`` angles in
rad) and stores the stiffness of the ``plant_file`` mechanism's springs (NaN for samples stamped
more than ``motor_states_max_age_s`` after the last accepted motor angles). Services
(std_srvs/Trigger): ``start``, ``stop``, ``discard`` (refused unless the read-only
``allow_discard`` is true). The sample checks, counters, bounded buffer and background writer
live in :mod:`compliant_demo.ingest`; the demonstration's flags on stop carry received, accepted,
stored_samples and every non-zero anomaly counter. Here, before that: messages larger than
``max_message_joints``, with repeated joint names, a finite value above 1e6 (rad, rad/s, N*m)
or an invalid stamp, or (``stamp_tolerance_s``
> 0) a stamp that far from the node's clock, and stiffness references that are not one finite,
non-negative value per joint; and motor_states that :class:`compliant_demo.model_stiffness.
MotorAngleGate` refuses (oversized, wrong_length, duplicate_names, missing_motors, non_finite,
out_of_range of the plant's motor range, invalid_stamp, out_of_order within a demonstration).
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from itertools import chain

from diagnostic_msgs.msg import DiagnosticArray
from rclpy.node import Node
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray
from std_srvs.srv import Trigger

from compliant_demo.exceptions import CompliantDemoError, InvalidInputError
from compliant_demo.ingest import (
    ChunkWriter,
    DemonstrationRequest,
    MotionTrigger,
    RecordingSession,
    SampleChecker,
)
from compliant_demo.model_stiffness import MotorAngleGate, held_model_stiffness
from compliant_demo.nodes._common import (
    RejectCounter,
    check_parameter_changes,
    declare,
    diagnostic_array,
    guarded_service,
    list_parameter,
    open_store,
    recorded_qos,
    run_node,
    text_problem,
)
from compliant_demo.nodes._common import stamp_seconds as _seconds
from compliant_demo.nodes._files import load_file_parameter
from compliant_demo.stamps import invalid_stamp
from compliant_demo.store.location import default_store_path
from compliant_demo.teaching_feedback import FeedbackSettings, LiveFeedback, earlier_demonstrations

__all__ = ["RecorderNode", "main"]

# stop and discard answer once the rest is stored, so the answer can say whether it was; the
# reliable subscription's history holds the messages that arrive meanwhile.
_STOP_WAIT_S = 5.0
_MAX_NOTES_CHARS = 4000
# Largest position (rad), velocity (rad/s) or effort (N*m) a joint state may carry: far beyond
# any joint, and small enough that its square cannot overflow the estimator's running sums and
# band-pass state (one value near 1e200 left the estimate NaN for the rest of a demonstration).
_MAX_ABS_VALUE = 1e6


class RecorderNode(Node):
    """Subscribes to ``joint_states``; serves ``start``, ``stop``, ``discard``; ``diagnostics``."""

    def __init__(self) -> None:
        super().__init__("recorder")
        p = self._declare_parameters()
        check_parameter_changes(self, _check_parameters)
        self.feedback = LiveFeedback(_reference_loader(p["store_path"]), FeedbackSettings(
            p["feedback_min_excited_fraction"], p["feedback_max_deviation_rad"],
            p["feedback_max_references"]))
        mechanisms, model = _model_channel(p) if p["stiffness_channel"] == "model" else ([], None)
        writer = ChunkWriter(
            open_store=lambda: open_store(p["store_path"]),
            make_estimator=_estimator_factory(p),
            flush_interval_s=p["flush_interval_s"],
            model_stiffness=model,
            observer=self.feedback,
        )
        writer.start()
        trigger = None
        if p["auto_start"]:
            trigger = MotionTrigger(
                p["auto_start_speed"], p["auto_stop_speed"], p["auto_stop_hold_s"]
            )
        self.session = RecordingSession(
            writer,
            SampleChecker(p["joints"], p["nominal_rate_hz"], p["gap_factor"]),
            self._request(),
            buffer_capacity=p["buffer_capacity"],
            trigger=trigger,
            held_width=2 * len(p["joints"]) if model else None,
        )
        self._settings = p
        # Demonstrations that motion starts have no start call to read the metadata then.
        self.add_post_set_parameters_callback(lambda _changed: self.session.configure(
            self._request()))
        self.rejects = RejectCounter(self)
        qos = recorded_qos(p["queue_depth"])
        guard = self.rejects.guard
        self.create_subscription(
            JointState, "joint_states", guard("joint_states", self._on_joint_state), qos
        )
        self.create_subscription(Float64MultiArray, "stiffness_reference",
                                 guard("stiffness_reference", self._on_reference), qos)
        for service, callback in (("start", self._on_start), ("stop", self._on_stop),
                                  ("discard", self._on_discard)):
            self.create_service(Trigger, service, guarded_service(self, service, callback))
        self._motor_gate: MotorAngleGate | None = None
        if model:
            self._motor_gate = MotorAngleGate(p["joints"], mechanisms, p["max_message_joints"])
            self._motor_demonstration: object = None
            self.create_subscription(JointState, "motor_states",
                                     guard("motor_states", self._on_motor_states), qos)
        self._diagnostics = self.create_publisher(DiagnosticArray, "diagnostics", 10)
        # Reliable, shallow, volatile: advice a watcher must not miss, read only while it runs.
        self._feedback = self.create_publisher(DiagnosticArray, "teaching_feedback", 10)
        self.create_timer(p["feedback_period_s"], self._publish_feedback)
        self._last_health = time.monotonic()
        self.create_timer(p["diagnostics_period_s"], self._publish_diagnostics)
        self.get_logger().info(
            f"recording joints {p['joints']} into {p['store_path'] or default_store_path()}"
        )

    def _declare_parameters(self) -> dict:
        d = declare
        return {
            "store_path": d(self, "store_path", "", "Store file; empty = the default store."),
            "joints": d(self, "joints", ["shoulder", "elbow"], "Joint names in stored order."),
            "skill": d(self, "skill", "cork_seat", "Skill name of new demos.", read_only=False),
            "operator": d(self, "operator", "operator_a", "Who demonstrates.", read_only=False),
            "tags": d(self, "tags", [], "Tags of new demonstrations.", read_only=False),
            "notes": d(self, "notes", "", "Free-text notes of new demos.", read_only=False),
            "nominal_rate_hz": d(self, "nominal_rate_hz", 1000.0, "Expected rate, Hz.",
                                 low=1.0, high=20000.0),
            "gap_factor": d(self, "gap_factor", 1.5,
                            "A stamp step above this many nominal periods is a gap.",
                            low=1.05, high=100.0),
            "flush_interval_s": d(self, "flush_interval_s", 0.1,
                                  "Longest time a sample waits before it is written, s.",
                                  low=0.01, high=0.2),
            "buffer_capacity": d(self, "buffer_capacity", 200000,
                                 "Most samples held in memory between flushes.",
                                 low=1000, high=10000000),
            "queue_depth": d(self, "queue_depth", 5000,
                             "History depth of the reliable joint_states subscription.",
                             low=10, high=100000),
            "stiffness_channel": d(self, "stiffness_channel", "estimate",
                                  "Stored stiffness: estimate, reference (topic), model "
                                  "(motor_states and plant_file springs) or none."),
            "motor_states_max_age_s": d(
                self, "motor_states_max_age_s", 0.5,
                "Model channel: a joint state stamped this long after the last accepted "
                "motor_states stamp gets NaN stiffness (the motor angles are unknown), s.",
                low=0.001, high=60.0),
            "plant_file": d(self, "plant_file", "", "Plant YAML in an allowed config folder "
                            "whose antagonistic springs give the model channel; empty = the "
                            "package's default plant."),
            "feedback_period_s": d(self, "feedback_period_s", 0.5,
                                   "Period of the teaching_feedback topic, s.",
                                   low=0.05, high=60.0),
            "feedback_min_excited_fraction": d(
                self, "feedback_min_excited_fraction", 0.6,
                "Least share of estimator windows with an estimate before advising a retake.",
                low=0.0, high=1.0),
            "feedback_max_deviation_rad": d(
                self, "feedback_max_deviation_rad", 0.05,
                "Largest RMS deviation from the earlier demonstrations' aligned mean, rad.",
                low=1e-4, high=10.0),
            "feedback_max_references": d(self, "feedback_max_references", 10,
                                         "Most earlier demonstrations in the aligned mean.",
                                         low=1, high=100),
            "estimator_window_s": d(self, "estimator_window_s", 0.5,
                                    "Sliding estimation window, s.", low=0.01, high=10.0),
            "estimator_noise_variance_ratio": d(
                self, "estimator_noise_variance_ratio", 1.0,
                "Torque-noise over angle-noise variance ratio for TLS, (N*m/rad)^2.",
                low=1e-12, high=1e12),
            "estimator_band_low_hz": d(self, "estimator_band_low_hz", 0.0,
                                       "Band-pass low edge, Hz (0 and 0 = no band-pass).",
                                       low=0.0, high=5000.0),
            "estimator_band_high_hz": d(self, "estimator_band_high_hz", 0.0,
                                        "Band-pass high edge, Hz.", low=0.0, high=5000.0),
            "estimator_min_excitation_rad": d(
                self, "estimator_min_excitation_rad", 1e-3,
                "Least angle excitation in a window for an estimate, rad.",
                low=0.0, high=1.0),
            "estimator_torque_sensor": d(
                self, "estimator_torque_sensor", "hand",
                "Where the torque is measured: hand (operator side) or joint (drive side)."),
            "estimator_link_inertia": d(
                self, "estimator_link_inertia", [],
                "Link inertia to subtract per joint, joint-side sensor only, 0-100 kg*m^2."),
            "estimator_model_inertia": d(self, "estimator_model_inertia", True,
                                         "Identify an inertia with stiffness and damping."),
            "estimator_min_conditioning": d(
                self, "estimator_min_conditioning", 0.02,
                "Least share of deflection not explained by rate and acceleration.",
                low=0.0, high=1.0),
            "auto_start": d(self, "auto_start", False, "Start and stop on motion."),
            "auto_start_speed": d(self, "auto_start_speed", 0.05,
                                  "Speed that starts a demonstration, rad/s.",
                                  low=1e-6, high=100.0),
            "auto_stop_speed": d(self, "auto_stop_speed", 0.02,
                                 "Speed below which joints count as still, rad/s.",
                                 low=1e-6, high=100.0),
            "auto_stop_hold_s": d(self, "auto_stop_hold_s", 1.0,
                                  "Stillness that stops a demonstration, s.",
                                  low=0.01, high=60.0),
            "diagnostics_period_s": d(self, "diagnostics_period_s", 1.0,
                                      "Diagnostics period, s.", low=0.05, high=60.0),
            "allow_discard": d(self, "allow_discard", False,
                               "Whether the discard service may reject the open demonstration "
                               "(any participant on the domain can call it)."),
            "max_message_joints": d(self, "max_message_joints", 256,
                                    "Most entries per joint-state field; larger messages are "
                                    "ignored.", low=1, high=100000),
            "stamp_tolerance_s": d(self, "stamp_tolerance_s", 0.0,
                                   "Ignore stamps further than this from the node's clock, s "
                                   "(0 = no check, for replayed stamps).", low=0.0, high=1e6),
        }

    def _request(self) -> DemonstrationRequest:
        value = self.get_parameter
        return DemonstrationRequest(
            skill=value("skill").value,
            joints=tuple(value("joints").value),
            operator=value("operator").value,
            tags=tuple(list_parameter(self, "tags", str)),
            notes=value("notes").value,
            nominal_rate_hz=value("nominal_rate_hz").value,
            stiffness_channel=value("stiffness_channel").value,
        )

    def _on_joint_state(self, msg: JointState) -> None:
        problem = self._joint_state_problem(msg)
        if problem is not None:
            self.rejects.reject("joint_states", *problem)
            return
        stamp = _seconds(msg.header.stamp)
        if (self._motor_gate is not None and stamp - self._motor_gate.last_stamp
                > self._settings["motor_states_max_age_s"]):
            self.session.forget_reference()  # motor_states stopped: stiffness unknown, not stale
        self.session.ingest(stamp, msg.name, msg.position, msg.velocity, msg.effort)

    def _joint_state_problem(self, msg: JointState) -> tuple[str, str] | None:
        """(reason, detail) when a message must not reach the session at all."""
        largest = max(len(msg.name), len(msg.position), len(msg.velocity), len(msg.effort))
        if largest > self._settings["max_message_joints"]:
            return "oversized", f"{largest} entries, at most {self._settings['max_message_joints']}"
        if len(set(msg.name)) != len(msg.name):
            return "duplicate_names", f"{len(msg.name)} names, {len(set(msg.name))} distinct"
        largest_value = max((abs(v) for v in chain(msg.position, msg.velocity, msg.effort)
                             if math.isfinite(v)), default=0.0)  # not finite: the session's count
        if largest_value > _MAX_ABS_VALUE:
            return "implausible", f"|value| = {largest_value:.3g}, at most {_MAX_ABS_VALUE:g}"
        stamp = msg.header.stamp
        refused = invalid_stamp(stamp.sec, stamp.nanosec)
        if refused is not None:
            return refused
        tolerance = self._settings["stamp_tolerance_s"]
        if tolerance > 0:
            offset = _seconds(stamp) - self.get_clock().now().nanoseconds * 1e-9
            if abs(offset) > tolerance:
                return "stamp_off_clock", f"{offset:+.3g} s from the node's clock"
        return None

    def _on_reference(self, msg: Float64MultiArray) -> None:
        values = msg.data
        n_joints = len(self._settings["joints"])
        if len(values) != n_joints:
            self.rejects.reject("stiffness_reference", "wrong_length",
                                f"{len(values)} values for {n_joints} joints")
        elif not all(map(math.isfinite, values)):
            self.rejects.reject("stiffness_reference", "non_finite", "NaN or infinite value")
        elif min(values) < 0:
            self.rejects.reject("stiffness_reference", "negative", "stiffness below 0 N*m/rad")
        else:
            self.session.set_reference(values)

    def _on_motor_states(self, msg: JointState) -> None:
        gate = self._motor_gate
        if gate is None:  # subscribed only with the model channel
            return
        # Each demonstration orders its motor stamps afresh (a publisher may have restarted).
        if self.session.current is not self._motor_demonstration:
            self._motor_demonstration = self.session.current
            gate.restart()
        stamp = msg.header.stamp
        angles, problem = gate.check(stamp.sec, stamp.nanosec, msg.name, msg.position)
        if problem is not None:
            self.rejects.reject("motor_states", *problem)
        elif angles is not None:
            self.session.set_reference(angles)

    def _publish_feedback(self, topic: str = "teaching_feedback") -> None:
        report = self.feedback.report()
        array = diagnostic_array(self, "recorder/teaching_feedback", report.level,
                                 report.message, report.values())
        (self._diagnostics if topic == "diagnostics" else self._feedback).publish(array)

    def _on_start(self, _request: Trigger.Request, response: Trigger.Response):
        try:
            self.session.configure(self._request())
        except CompliantDemoError as exc:
            response.success, response.message = False, str(exc)
        else:
            response.success, response.message = self.session.start()
        self.get_logger().info(f"start: {response.message}")
        return response

    def _on_stop(self, _request: Trigger.Request, response: Trigger.Response):
        response.success, response.message = self.session.stop("complete", wait_s=_STOP_WAIT_S)
        self.get_logger().info(f"stop: {response.message}")
        self._publish_feedback()
        return response

    def _on_discard(self, _request: Trigger.Request, response: Trigger.Response):
        if not self._settings["allow_discard"]:
            response.success = False
            response.message = ("discard refused: allow_discard is false on this recorder (set "
                                "it at launch); nothing changed")
            self.get_logger().warning(response.message, throttle_duration_sec=5.0)
            return response
        response.success, response.message = self.session.stop(
            "rejected", wait_s=_STOP_WAIT_S, discarded=1
        )
        self.get_logger().info(f"discard: {response.message}")
        return response

    def _publish_diagnostics(self) -> None:
        now = time.monotonic()
        level, message, values = self.session.health(now - self._last_health)
        self._last_health = now
        values.update(self.rejects.values())
        if level == "ok" and self.rejects.total:
            level, message = "warn", f"{self.rejects.total} messages ignored"
        self._diagnostics.publish(diagnostic_array(self, "recorder", level, message, values))
        self._publish_feedback("diagnostics")
        if level == "error":
            self.get_logger().error(message, throttle_duration_sec=10.0)

    def close(self) -> None:
        """Finish an open demonstration as incomplete and close the store."""
        was_recording = self.session.recording
        if not self.session.shutdown():
            self.get_logger().error("store writer did not finish within its timeout")
        elif was_recording:
            self.get_logger().info("open demonstration finished as incomplete (interrupted)")


def _estimator_factory(p: dict):
    if p["stiffness_channel"] != "estimate":
        return None
    from compliant_demo.estimation import SlidingStiffnessEstimator

    band = (p["estimator_band_low_hz"], p["estimator_band_high_hz"])
    return lambda n_joints: SlidingStiffnessEstimator(
        n_joints,
        window_s=p["estimator_window_s"],
        rate_hz=p["nominal_rate_hz"],
        noise_variance_ratio=p["estimator_noise_variance_ratio"],
        band_hz=band if band[1] > band[0] else None,
        min_excitation_rad=p["estimator_min_excitation_rad"],
        link_inertia=list(p["estimator_link_inertia"]) or None,
        model_inertia=p["estimator_model_inertia"],
        min_conditioning=p["estimator_min_conditioning"],
    )


def _reference_loader(store_path: str):
    def load(skill: str, tags, joints, limit: int):
        with open_store(store_path, read_only=True) as store:
            return earlier_demonstrations(store, skill, tags, joints, limit)

    return load


def _model_channel(p: dict) -> tuple[list, Callable]:
    """The joints' mechanisms and the channel's stiffness function (held_model_stiffness)."""
    from compliant_demo.plant import load_plant

    plant = (load_file_parameter("plant_file", p["plant_file"], load_plant) if p["plant_file"]
             else load_plant())
    try:
        mechanisms = plant.mechanisms_for(p["joints"])
        return mechanisms, held_model_stiffness(mechanisms)
    except InvalidInputError as exc:
        raise InvalidInputError(f"stiffness_channel model, plant_file = {p['plant_file']!r}: "
                                f"{exc}") from None


def _check_parameters(values: dict) -> str | None:
    if not values["skill"]:
        return "skill must not be empty"
    sensor, inertia = values["estimator_torque_sensor"], list(values["estimator_link_inertia"])
    if sensor not in ("hand", "joint"):
        return f"estimator_torque_sensor must be hand or joint, got {sensor!r}"
    if inertia and (sensor != "joint" or len(inertia) != len(values["joints"])
                    or not all(isinstance(v, float | int) and 0.0 <= v <= 100.0
                               for v in inertia)):
        return (f"estimator_link_inertia = {inertia}: one value per joint, 0 to 100 kg*m^2, "
                "with estimator_torque_sensor joint")
    if sensor == "joint" and not (inertia or values["estimator_model_inertia"]):
        return "estimator_torque_sensor joint needs estimator_link_inertia or model_inertia"
    return text_problem(values, ("skill", "operator", "tags")) or text_problem(
        values, ("notes",), _MAX_NOTES_CHARS
    )


def main(args: list[str] | None = None) -> int:
    """Run the recorder node until Ctrl-C or shutdown; returns the exit status."""
    return run_node(RecorderNode, args)


if __name__ == "__main__":
    raise SystemExit(main())
