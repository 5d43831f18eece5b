"""Replay node: a stored skill on the simulated joint, with scheduled and live perturbations."""

from __future__ import annotations

import time

from rclpy.node import Node
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray
from std_srvs.srv import Trigger

from compliant_demo.exceptions import CompliantDemoError
from compliant_demo.nodes._common import (
    check_parameter_changes,
    declare,
    float_array,
    list_parameter,
    open_store,
    run_node,
    to_stamp,
)
from compliant_demo.runtime import ReplayRun, load_plant
from compliant_demo.store import ReplayParameters

__all__ = ["ReplayNode", "main"]


class ReplayNode(Node):
    """Serves ``run``; publishes ``joint_states``, ``stiffness_commanded``, ``stiffness_realised``
    and ``perturbation``; takes live torques (N*m per joint) on ``perturbation_command``."""

    def __init__(self) -> None:
        super().__init__("replay")
        d = declare
        self._store_path = d(self, "store_path", "", "Store file; empty = the default store.")
        d(self, "skill", "cork_seat", "Skill to replay.", read_only=False)
        d(self, "skill_version", 0, "Skill version; 0 = the latest.", low=0, high=1000000,
          read_only=False)
        d(self, "plant_file", "", "Plant YAML (joints, mechanism); empty = the teaching "
          "scenario's joints with the ideal mechanism.", read_only=False)
        d(self, "schedule_file", "", "Perturbation schedule YAML; empty = none.", read_only=False)
        d(self, "control_rate_hz", 1000.0, "Control rate, Hz.", low=10.0, high=20000.0,
          read_only=False)
        d(self, "duration_s", 0.0, "Movement duration, s; 0 = the demonstrated one.",
          low=0.0, high=3600.0, read_only=False)
        d(self, "settle_s", 0.5, "Time simulated after the movement, s.", low=0.0, high=60.0,
          read_only=False)
        d(self, "goal", [], "New goal per joint, rad; empty = the demonstrated one.",
          read_only=False)
        d(self, "seed", 0, "Seed of sensor noise and random perturbations.", low=0,
          high=2**31 - 1, read_only=False)
        d(self, "method", "rk4", "Integrator: rk4, symplectic_euler or explicit_euler.",
          read_only=False)
        d(self, "max_stiffness_rate", 5000.0, "Largest commanded stiffness rate before a "
          "safety stop, N*m/rad/s.", low=1e-3, high=1e9, read_only=False)
        d(self, "real_time", True, "Pace steps by the wall clock; false = as fast as possible.",
          read_only=False)
        d(self, "publish_decimation", 10, "Publish every n-th step.", low=1, high=100000,
          read_only=False)
        self._tick_s = d(self, "tick_period_s", 0.01, "Timer period; due steps run per tick, s.",
                         low=0.001, high=0.1)
        d(self, "run_when_available", False, "Run once by itself as soon as the skill exists.")
        d(self, "exit_after_run", False, "End the node after the automatic run.")
        self._joint_states = self.create_publisher(JointState, "joint_states", 100)
        self._commanded = self.create_publisher(Float64MultiArray, "stiffness_commanded", 100)
        self._realised = self.create_publisher(Float64MultiArray, "stiffness_realised", 100)
        self._perturbation = self.create_publisher(Float64MultiArray, "perturbation", 100)
        # Live pushes are commands: keep only the latest, reliably.
        self.create_subscription(
            Float64MultiArray, "perturbation_command", self._on_live_torque, 10
        )
        check_parameter_changes(self, _check_parameters)
        self.create_service(Trigger, "run", self._on_run)
        self.done = False
        self.exit_status = 0
        self._run: ReplayRun | None = None
        self._skill_id = ""
        self._replay_parameters: ReplayParameters | None = None
        self._live: list[float] | None = None
        self._waiting_for_skill = self.get_parameter("run_when_available").value
        self._end_after_run = False
        self._started_wall = 0.0
        self._stamp_origin = 0.0
        self.create_timer(self._tick_s, self._tick)

    def _value(self, name: str):
        return self.get_parameter(name).value

    def _prepare(self) -> tuple[bool, str]:
        from compliant_demo.learning import load_skill
        from compliant_demo.perturbation import load_schedule_yaml

        version = self._value("skill_version") or None
        name = self._value("skill")
        try:
            with open_store(self._store_path, read_only=True) as store:
                record = store.load_skill(name, version)
                skill = load_skill(store, name, record.version)
            schedule_file = self._value("schedule_file")
            schedule = load_schedule_yaml(schedule_file) if schedule_file else None
            self._run = ReplayRun(
                skill,
                load_plant(self._value("plant_file")),
                schedule,
                dt=1.0 / self._value("control_rate_hz"),
                duration_s=self._value("duration_s") or None,
                settle_s=self._value("settle_s"),
                goal=list_parameter(self, "goal", float) or None,
                method=self._value("method"),
                seed=self._value("seed"),
                max_stiffness_rate=self._value("max_stiffness_rate"),
            )
        except CompliantDemoError as exc:
            return False, str(exc)
        self._skill_id = record.id
        self._replay_parameters = ReplayParameters(
            source="node",
            kind="+".join(schedule.kinds) if schedule and schedule.kinds else "none",
            schedule=None if schedule is None else schedule.model_dump(mode="json"),
            skill_version=record.version,
            plant_file=self._value("plant_file") or None,
            schedule_file=schedule_file or None,
            dt=self._run.dt,
            duration_s=self._value("duration_s") or None,
            settle_s=self._value("settle_s"),
            goal=list_parameter(self, "goal", float) or None,
            seed=self._value("seed"),
            method=self._value("method"),
            max_stiffness_rate=self._value("max_stiffness_rate"),
            real_time=self._value("real_time"),
        )
        self._started_wall = time.monotonic()
        self._stamp_origin = time.time()
        self._live = None
        return True, (f"replaying {name!r} version {record.version}: "
                      f"{self._run.n_steps} steps of {self._run.dt * 1e3:.3g} ms")

    def _on_run(self, _request: Trigger.Request, response: Trigger.Response):
        if self._run is not None:
            response.success, response.message = False, "a replay is already running"
        else:
            response.success, response.message = self._prepare()
        # rclpy refuses one call site logging at two severities, hence two calls.
        if response.success:
            self.get_logger().info(f"run: {response.message}")
        else:
            self.get_logger().error(f"run refused: {response.message}")
        return response

    def _on_live_torque(self, msg: Float64MultiArray) -> None:
        run = self._run
        if run is not None and len(msg.data) == len(run.joints):
            self._live = list(msg.data)
        else:
            self.get_logger().warning("perturbation_command ignored: no replay running or "
                                   "not one torque per joint", throttle_duration_sec=5.0)

    def _tick(self) -> None:
        if self._run is None:
            if self._waiting_for_skill:
                self._try_auto_start()
            return
        run = self._run
        if self._value("real_time"):
            due = int((time.monotonic() - self._started_wall) / run.dt)
        else:
            due = run.steps_done + 200  # a batch per tick keeps services and topics served
        decimation = self._value("publish_decimation")
        while run.steps_done < due and not run.finished:
            state = run.step(self._live)
            if run.steps_done % decimation == 0 or run.finished:
                self._publish(run, state)
        if run.finished:
            self._finish(run)

    def _publish(self, run: ReplayRun, state) -> None:
        k = run.steps_done - 1
        message = JointState()
        message.header.stamp = to_stamp(self._stamp_origin + state.t)
        message.name = list(run.skill.joints)
        message.position = state.q[0].tolist()
        message.velocity = state.dq[0].tolist()
        message.effort = state.tau_mechanism[0].tolist()
        self._joint_states.publish(message)
        self._commanded.publish(float_array(run.commands(k)[1]))
        self._realised.publish(float_array(state.stiffness_realised[0]))
        self._perturbation.publish(float_array(state.tau_external[0]))

    def _finish(self, run: ReplayRun) -> None:
        self._run = None
        status, reason, metrics, trace = run.outcome()
        if reason:
            self.get_logger().warning(f"replay {status}: {reason}")
        try:
            with open_store(self._store_path) as store:
                result_id = store.save_replay_result(
                    skill_id=self._skill_id, metrics=metrics, parameters=self._replay_parameters,
                    status=status, reason=reason, trace=trace,
                )
        except CompliantDemoError as exc:
            self.get_logger().error(f"replay result not stored: {exc}")
            self.exit_status = 1
        else:
            self.get_logger().info(
                f"replay {status} after {metrics['steps']} of {metrics['steps_planned']} steps: "
                f"goal error {metrics.get('goal_error_max_rad', float('nan')):.3g} rad; "
                f"result {result_id}"
            )
            if status != "ok":
                self.exit_status = 1
        self.done = self._end_after_run

    def _try_auto_start(self) -> None:
        try:
            with open_store(self._store_path, read_only=True) as store:
                store.load_skill(self._value("skill"), self._value("skill_version") or None)
        except CompliantDemoError:
            return
        self._waiting_for_skill = False
        self._end_after_run = self._value("exit_after_run")
        success, message = self._prepare()
        self.get_logger().info(f"automatic run: {message}")
        if not success:
            self.exit_status = 2
            self.done = self._end_after_run


def _check_parameters(values: dict) -> str | None:
    from compliant_demo.sim import METHODS

    if not values["skill"]:
        return "skill must not be empty"
    if values["method"] not in METHODS:
        return f"method must be one of {', '.join(METHODS)}, got {values['method']!r}"
    return None


def main(args: list[str] | None = None) -> int:
    """Run the replay node until Ctrl-C, shutdown, or the end of an automatic run."""
    return run_node(ReplayNode, args)


if __name__ == "__main__":
    raise SystemExit(main())
