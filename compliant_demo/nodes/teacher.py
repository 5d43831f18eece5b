"""Teacher node: a simulated operator guides the joints; publishes joint states and stiffness.

With ``publish_motor_states`` it also publishes ``motor_states`` (sensor_msgs/JointState,
``<joint>_motor_1``/``_motor_2`` angles in rad, same stamps): the ``plant_file`` arm's
antagonistic motors set to the hand's stiffness about the guided link
(:func:`compliant_demo.model_stiffness.teaching_motor_angles`), for the recorder's model channel.

It reads the recorder's ``diagnostics`` (any participant can publish there): a status that is
not well formed is ignored and counted in the teacher's own ``diagnostics`` status.
"""

from __future__ import annotations

import time
from pathlib import Path

from diagnostic_msgs.msg import DiagnosticArray
from rclpy.client import Client
from rclpy.node import Node
from rclpy.task import Future
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray
from std_srvs.srv import Trigger

from compliant_demo.model_stiffness import motor_joint_names, teaching_motor_angles
from compliant_demo.models import load_yaml_model, model_from_mapping
from compliant_demo.nodes._common import (
    RejectCounter,
    check_parameter_changes,
    declare,
    diagnostic_array,
    float_array,
    recorded_qos,
    run_node,
    to_stamp,
)
from compliant_demo.nodes._files import load_file_parameter
from compliant_demo.teaching import TeachingScenario, TeachingSession, cork_seat_scenario

__all__ = ["TeacherNode", "main"]

# A diagnostics message holds a handful of statuses and values; more is not from our recorder.
_MAX_STATUSES = 64
_MAX_VALUES = 256


class TeacherNode(Node):
    """Publishes ``joint_states`` and ``stiffness_truth`` in real time, demo after demo.

    With ``control_recorder`` it calls the recorder's ``start`` and ``stop`` services around
    each demonstration, calling ``stop`` only once the recorder's diagnostics count every
    published sample (or ``confirm_timeout_s`` passed), and ends (``exit_when_done``) after the
    last one was stopped.
    """

    def __init__(self) -> None:
        super().__init__("teacher")
        d = declare
        scenario_file = d(self, "scenario_file", "", "Teaching scenario YAML in an allowed "
                          "config folder; empty = cork_seat.")
        n_demos = d(self, "n_demonstrations", 3, "Demonstrations to run.", low=1, high=10000)
        seed = d(self, "seed", 1, "Seed of demo 0; demo i uses seed + i.", low=0, high=2**31 - 1)
        d(self, "operator", "", "Operator name; empty = the scenario's.")
        d(self, "rate_hz", 0.0, "Sample rate, Hz; 0 = the scenario's.", low=0.0, high=20000.0)
        d(self, "duration_s", 0.0, "Nominal demo duration, s; 0 = the scenario's.",
          low=0.0, high=3600.0)
        period = d(self, "publish_period_s", 0.01, "Publishing timer period (samples due are "
                   "sent in one go), s.", low=0.001, high=0.1)
        self._pause_s = d(self, "pause_s", 0.5, "Pause between demonstrations, s.",
                          low=0.0, high=600.0)
        self._settle_s = d(self, "settle_s", 0.5, "Wait after the last sample before stopping "
                           "the recorder, s.", low=0.0, high=60.0)
        self._confirm_s = d(self, "confirm_timeout_s", 5.0, "Longest further wait for the "
                            "recorder's diagnostics to count every published sample, s.",
                            low=0.0, high=600.0)
        self._control = d(self, "control_recorder", True, "Call the recorder's start/stop.")
        self._subscribers = d(self, "wait_for_subscribers", 1, "Joint-state subscribers to wait "
                              "for before the first demonstration.", low=0, high=100)
        self._exit_when_done = d(self, "exit_when_done", True, "End after the last demo.")
        self._truth_path = d(self, "truth_path", "", "Optional .npz for sample counts and "
                             "ground-truth stiffness per demonstration.")
        depth = d(self, "queue_depth", 5000, "History depth of the reliable publishers.",
                  low=10, high=100000)
        plant_file = d(self, "plant_file", "", "Plant YAML in an allowed config folder whose "
                       "antagonistic motors motor_states reports; empty = the default plant.")
        motors = d(self, "publish_motor_states", True, "Publish the arm's motor angles.")
        check_parameter_changes(self)  # every parameter is read-only; use_sim_time too
        self.session = TeachingSession(self._scenario(scenario_file), n_demos, seed)
        self._joints = list(self.session.scenario.joint_names)
        qos = recorded_qos(depth)  # reliable: every published sample is meant to be recorded
        self._joint_states = self.create_publisher(JointState, "joint_states", qos)
        self._truth = self.create_publisher(Float64MultiArray, "stiffness_truth", qos)
        self._mechanisms = self._motor_mechanisms(plant_file) if motors else None
        self._motor_states = self.create_publisher(JointState, "motor_states", qos)
        self._motor_names = motor_joint_names(self._joints)
        self._start: Client = self.create_client(Trigger, "start")
        self._stop: Client = self.create_client(Trigger, "stop")
        self.done = False
        self.exit_status = 0
        self._state = "waiting"
        self._pending: Future | None = None
        self._state_since = time.monotonic()
        self._demo_start_wall = 0.0
        # The recorder's own count of received samples, from diagnostics seen while settling.
        self._recorder_received = -1
        self.rejects = RejectCounter(self)
        # Diagnostics: reliable, a few deep; only the latest status matters to a reader.
        self._diagnostics = self.create_publisher(DiagnosticArray, "diagnostics", 10)
        self.create_subscription(DiagnosticArray, "diagnostics",
                                 self.rejects.guard("diagnostics", self._on_diagnostics), 10)
        self.create_timer(period, self._tick)
        self.create_timer(1.0, self._publish_diagnostics)

    def _scenario(self, scenario_file: str) -> TeachingScenario:
        value = self.get_parameter
        changes = {
            key: value(key).value
            for key in ("operator", "rate_hz", "duration_s")
            if value(key).value
        }
        if not scenario_file:
            return cork_seat_scenario(**changes)

        def load(path: Path) -> TeachingScenario:
            base = load_yaml_model(TeachingScenario, path).model_dump()
            return model_from_mapping(TeachingScenario, {**base, **changes}, source=str(path))

        return load_file_parameter("scenario_file", scenario_file, load)

    def _motor_mechanisms(self, plant_file: str) -> list:
        from compliant_demo.plant import load_plant

        plant = (load_file_parameter("plant_file", plant_file, load_plant) if plant_file
                 else load_plant())
        mechanisms = plant.mechanisms_for(self._joints)
        teaching_motor_angles(mechanisms, [[0.0] * len(self._joints)],
                              [[mechanisms[0].stiffness_min] * len(self._joints)])
        return mechanisms

    def _enter(self, state: str) -> None:
        self._state = state
        self._state_since = time.monotonic()

    def _tick(self) -> None:
        elapsed = time.monotonic() - self._state_since
        if self._state == "waiting":
            ready = self._joint_states.get_subscription_count() >= self._subscribers
            if ready and (not self._control or self._start.service_is_ready()):
                self._begin_demonstration()
        elif self._state == "starting" and self._replied():
            result = self._reply()
            if not result.success:
                self._fail(f"recorder refused to start: {result.message[:500]}")
                return
            self._enter("publishing")
            self._demo_start_wall = time.time()
        elif self._state == "publishing":
            self._publish_due(elapsed)
        elif self._state == "settling" and elapsed >= self._settle_s:
            confirmed = self._recorder_received >= self.session.current_published
            if confirmed or not self._control or elapsed >= self._settle_s + self._confirm_s:
                if not confirmed and self._control:
                    self.get_logger().warning(
                        f"recorder diagnostics count {self._recorder_received} of "
                        f"{self.session.current_published} samples; stopping anyway"
                    )
                self._end_demonstration()
        elif self._state == "stopping" and self._replied():
            result = self._reply()
            if result.success:
                self.get_logger().info(f"recorder: {result.message[:500]}")
            else:  # rclpy refuses one call site logging at two severities
                self.get_logger().error(f"recorder refused to stop: {result.message[:500]}")
            self._after_demonstration()
        elif self._state == "pausing" and elapsed >= self._pause_s:
            self._begin_demonstration()

    def _on_diagnostics(self, msg: DiagnosticArray) -> None:
        if self._state != "settling":
            return
        for status in msg.status[:_MAX_STATUSES]:
            if status.name != "recorder":
                continue
            values = {kv.key: kv.value for kv in status.values[:_MAX_VALUES]}
            received = values.get("received", "")
            if values.get("recording") != "true":
                continue
            if not (received.isascii() and received.isdigit() and len(received) < 19):
                self.rejects.reject("diagnostics", "malformed",
                                    f"recorder status with received = {received[:40]!r}")
                continue
            self._recorder_received = int(received)

    def _publish_diagnostics(self) -> None:
        values = {"state": self._state, "published": str(self.session.current_published),
                  **self.rejects.values()}
        level, message = ("warn", f"{self.rejects.total} messages ignored") if (
            self.rejects.total) else ("ok", self._state)
        self._diagnostics.publish(diagnostic_array(self, "teacher", level, message, values))

    def _replied(self) -> bool:
        return self._pending is not None and self._pending.done()

    def _reply(self) -> Trigger.Response:
        """The recorder's answer; a failed call reads as a refusal with the exception text."""
        assert self._pending is not None
        result = self._pending.result()
        if result is None:
            return Trigger.Response(success=False, message=str(self._pending.exception()))
        return result

    def _begin_demonstration(self) -> None:
        index = self.session.next_demonstration()
        self.get_logger().info(
            f"demonstration {index + 1}/{self.session.n_demonstrations} "
            f"({self.session.current_samples} samples)"
        )
        if self._control:
            self._pending = self._start.call_async(Trigger.Request())
            self._enter("starting")
        else:
            self._enter("publishing")
            self._demo_start_wall = time.time()

    def _publish_due(self, elapsed: float) -> None:
        due = list(self.session.due(elapsed))
        motors: list = [None] * len(due)
        if self._mechanisms is not None and due:
            angles = teaching_motor_angles(self._mechanisms, [s[1] for s in due],
                                           [s[4] for s in due])
            motors = angles.reshape(len(due), -1).tolist()
        for (t, position, velocity, torque, stiffness), motor in zip(due, motors, strict=True):
            message = JointState()
            message.header.stamp = to_stamp(self._demo_start_wall + t)
            message.name = self._joints
            message.position = position
            message.velocity = velocity
            message.effort = torque
            self._joint_states.publish(message)
            self._truth.publish(float_array(stiffness))
            if motor is not None:
                self._motor_states.publish(JointState(
                    header=message.header, name=self._motor_names, position=motor))
        if self.session.current_finished:
            self.get_logger().info(f"published {self.session.current_published} samples")
            self._recorder_received = -1
            self._enter("settling")

    def _end_demonstration(self) -> None:
        if self._control:
            self._pending = self._stop.call_async(Trigger.Request())
            self._enter("stopping")
        else:
            self._after_demonstration()

    def _after_demonstration(self) -> None:
        if not self.session.all_finished:
            self._enter("pausing")
            return
        if self._truth_path:
            self.session.save_truth(Path(self._truth_path))
        self.get_logger().info(
            f"all {self.session.n_demonstrations} demonstrations published "
            f"({self.session.published_counts} samples)"
        )
        self._enter("done")
        self.done = self._exit_when_done

    def close(self) -> None:
        """Ended early (Ctrl-C, SIGTERM): write the ground truth of what was published so far."""
        if self._truth_path and self._state != "done":
            self.session.save_truth(Path(self._truth_path))
            self.get_logger().info(f"ended early: ground truth so far in {self._truth_path}")

    def _fail(self, reason: str) -> None:
        self.get_logger().error(reason)
        self.exit_status = 1
        self._enter("done")
        self.done = True


def main(args: list[str] | None = None) -> int:
    """Run the teacher node until its demonstrations are done, Ctrl-C or shutdown."""
    return run_node(TeacherNode, args)


if __name__ == "__main__":
    raise SystemExit(main())
