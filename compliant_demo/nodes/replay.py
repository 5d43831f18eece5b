"""Replay node: a stored skill on the simulated joint, or on hardware through the envelope.

``mode`` (read-only) chooses: ``simulation`` (default) steps the plant of ``plant_file`` with
scheduled and live perturbations and publishes its joint states; ``hardware`` sends the skill to a
joint impedance controller through the safety envelope (:mod:`compliant_demo.nodes._hardware`),
only when the gate lets it (:mod:`compliant_demo.handoff.gate`), and never publishes
``joint_states`` itself.

Safety limits (``max_stiffness_rate``, ``max_live_torque``, ``max_steps`` and the envelope's) and
files (``store_path``, ``plant_file``, ``schedule_file``, ``criteria_file``) are read-only: set at
launch, never by a participant at run time. The plant and schedule are loaded once at start, from
the places :func:`compliant_demo.nodes._files.allowed_config_dirs` names. A live torque on
``perturbation_command`` that is not one finite value per joint within ``max_live_torque`` is
ignored and counted in ``diagnostics``.
"""

from __future__ import annotations

import math
import time

from diagnostic_msgs.msg import DiagnosticArray
from rclpy.node import Node
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray
from std_srvs.srv import Trigger

from compliant_demo.exceptions import CompliantDemoError, InvalidInputError
from compliant_demo.nodes._common import (
    RejectCounter,
    check_parameter_changes,
    declare,
    diagnostic_array,
    float_array,
    guarded_service,
    is_list,
    list_parameter,
    open_store,
    run_node,
    text_problem,
    to_stamp,
)
from compliant_demo.nodes._files import load_file_parameter
from compliant_demo.nodes._hardware import HardwareMode, hardware_gate
from compliant_demo.plant import load_plant
from compliant_demo.replay import DEFAULT_SETTLE_S, ReplayRun, ReplaySetup, warm_up
from compliant_demo.store import ReplayParameters

__all__ = ["MODES", "ReplayNode", "main"]

#: What the replay node drives: the simulated plant or a joint impedance controller.
MODES = ("simulation", "hardware")


class ReplayNode(Node):
    """Serves ``run``; publishes ``joint_states``, ``stiffness_commanded``, ``stiffness_realised``
    and ``perturbation``; takes live torques (N*m per joint) on ``perturbation_command``."""

    def __init__(self) -> None:
        super().__init__("replay")
        d = declare
        mode = d(self, "mode", "simulation", "simulation: replay on the simulated plant; "
                 "hardware: command a joint impedance controller through the safety envelope.")
        if mode not in MODES:
            raise InvalidInputError(f"parameter mode = {str(mode)[:40]!r}: expected one of "
                                    f"{', '.join(MODES)}")
        self._store_path = d(self, "store_path", "", "Store file; empty = the default store.")
        d(self, "skill", "cork_seat", "Skill to replay.", read_only=False)
        d(self, "skill_version", 0, "Skill version; 0 = the latest.", low=0, high=1000000,
          read_only=False)
        plant_file = d(self, "plant_file", "", "Plant YAML (joints, mechanism) in an allowed "
                       "config folder; empty = the package's default plant (the cork_seat arm on "
                       "antagonistic springs).")
        schedule_file = d(self, "schedule_file", "", "Perturbation schedule YAML in an allowed "
                          "config folder; empty = none.")
        d(self, "control_rate_hz", 1000.0, "Control rate, Hz.", low=10.0, high=20000.0,
          read_only=False)
        d(self, "duration_s", 0.0, "Movement duration, s; 0 = the demonstrated one.",
          low=0.0, high=3600.0, read_only=False)
        d(self, "settle_s", DEFAULT_SETTLE_S, "Time simulated after the movement, s.", low=0.0,
          high=60.0,
          read_only=False)
        d(self, "goal", [], "New goal per joint, rad; empty = the demonstrated one.",
          read_only=False)
        d(self, "seed", 0, "Seed of sensor noise and random perturbations.", low=0,
          high=2**31 - 1, read_only=False)
        d(self, "method", "rk4", "Integrator: rk4, symplectic_euler or explicit_euler.",
          read_only=False)
        d(self, "max_stiffness_rate", 5000.0, "Largest commanded stiffness rate before a "
          "safety stop, N*m/rad/s.", low=1e-3, high=1e9)
        self._max_live_torque = d(self, "max_live_torque", 50.0, "Largest live torque taken "
                                  "from perturbation_command, N*m per joint.", low=0.0, high=1e4)
        self._max_steps = d(self, "max_steps", 1_000_000, "Most control steps of one replay "
                            "(bounds its memory).", low=1, high=100_000_000)
        d(self, "real_time", True, "Pace steps by the wall clock; false = as fast as possible.",
          read_only=False)
        d(self, "publish_decimation", 10, "Publish every n-th step.", low=1, high=100000,
          read_only=False)
        self._tick_s = d(self, "tick_period_s", 0.01, "Timer period; due steps run per tick, s.",
                         low=0.001, high=0.1)
        d(self, "run_when_available", False, "Run once by itself as soon as the skill exists.")
        d(self, "exit_after_run", False, "End the node after the automatic run.")
        diagnostics_period = d(self, "diagnostics_period_s", 1.0, "Diagnostics period, s.",
                               low=0.05, high=60.0)
        self._plant = (load_file_parameter("plant_file", plant_file, load_plant) if plant_file
                       else load_plant())
        self._schedule = None
        if schedule_file:
            from compliant_demo.perturbation import load_schedule_yaml

            self._schedule = load_file_parameter("schedule_file", schedule_file,
                                                 load_schedule_yaml)
        criteria_file = d(self, "criteria_file", "", "Hardware: acceptance criteria YAML of the "
                          "verdict the gate asks for, in an allowed config folder; empty = the "
                          "shipped criteria.")
        self._criteria = None
        if mode == "hardware":
            from compliant_demo.readiness import load_criteria

            self._criteria = (load_file_parameter("criteria_file", criteria_file, load_criteria)
                              if criteria_file else load_criteria())
        self.rejects = RejectCounter(self)
        # Diagnostics: reliable, a few deep; only the latest status matters to a reader.
        self._diagnostics = self.create_publisher(DiagnosticArray, "diagnostics", 10)
        self._hardware = HardwareMode(self, self.rejects) if mode == "hardware" else None
        # Every parameter is declared now (hardware mode declares its own). Refused values end
        # the node before the simulator's first compile, not within it.
        check_parameter_changes(self, _check_parameters)
        if self._hardware is None:
            # Before any topic or service exists: a first compile takes tens of seconds, which
            # would otherwise stall the executor in the first run (no diagnostics, no live pushes).
            started = time.monotonic()
            warm_up(self._plant, self._value("method"))
            self.get_logger().info(f"simulator ready in {time.monotonic() - started:.1f} s")
        if self._hardware is None:  # the simulated joint's own topics
            self._joint_states = self.create_publisher(JointState, "joint_states", 100)
            self._commanded = self.create_publisher(Float64MultiArray, "stiffness_commanded",
                                                    100)
            self._realised = self.create_publisher(Float64MultiArray, "stiffness_realised", 100)
            self._perturbation = self.create_publisher(Float64MultiArray, "perturbation", 100)
            # Live pushes are commands: keep only the latest, reliably.
            self.create_subscription(
                Float64MultiArray, "perturbation_command",
                self.rejects.guard("perturbation_command", self._on_live_torque), 10,
            )
        self.create_service(Trigger, "run", guarded_service(self, "run", self._on_run))
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
        self.create_timer(diagnostics_period, self._publish_diagnostics)

    def _value(self, name: str):
        return self.get_parameter(name).value

    def _prepare(self) -> tuple[bool, str]:
        from compliant_demo.learning import load_skill

        version = self._value("skill_version") or None
        name = self._value("skill")
        hardware = self._hardware
        requested_at = time.monotonic()
        try:
            with open_store(self._store_path, read_only=True) as store:
                stored = load_skill(store, name, version)
                record, skill = stored.record, stored.skill
                gate = None if hardware is None else hardware_gate(
                    store, record, self._plant, self._criteria, hardware.bench_override)
            duration_s = self._value("duration_s") or skill.duration_s
            rate_name = "control_rate_hz" if hardware is None else "command_rate_hz"
            rate = self._value(rate_name)
            steps = (duration_s + self._value("settle_s")) * rate
            if steps > self._max_steps:
                return False, (f"{steps:.0f} steps ((duration_s + settle_s) x {rate_name}) "
                               f"exceed max_steps = {self._max_steps}")
            goal = list_parameter(self, "goal", float)
            setup = ReplaySetup(
                skill,
                self._plant,
                dt=1.0 / rate,
                duration_s=self._value("duration_s") or None,
                settle_s=self._value("settle_s"),
                goal=tuple(goal) if goal else None,
                method=self._value("method"),
                max_stiffness_rate=self._value("max_stiffness_rate"),
            )
            if hardware is not None and gate is not None:
                message = hardware.start(setup, gate, requested_at)
            else:
                self._run = ReplayRun(setup, self._schedule, seed=self._value("seed"))
        except CompliantDemoError as exc:
            return False, str(exc)
        self._skill_id = record.id
        simulated = hardware is None
        self._replay_parameters = setup.parameters(
            "node", self._schedule if simulated else None, self._value("seed"),
            skill_version=record.version, plant_file=self._value("plant_file"),
            schedule_file=self._value("schedule_file") if simulated else None,
            real_time=self._value("real_time") if simulated else True,
        )
        if hardware is not None:
            return True, f"{name!r} version {record.version} to hardware: {message}"
        self._started_wall = time.monotonic()
        self._stamp_origin = time.time()
        self._live = None
        return True, (f"replaying {name!r} version {record.version}: "
                      f"{setup.n_steps} steps of {setup.dt * 1e3:.3g} ms")

    def _on_run(self, _request: Trigger.Request, response: Trigger.Response):
        if self._run is not None or (self._hardware is not None and self._hardware.running):
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
        run, torque, reject = self._run, msg.data, self.rejects.reject
        if run is None:
            reject("perturbation_command", "no_replay", "no replay is running")
        elif len(torque) != len(run.joints):
            reject("perturbation_command", "wrong_length",
                   f"{len(torque)} values for {len(run.joints)} joints")
        elif not all(map(math.isfinite, torque)):
            reject("perturbation_command", "non_finite", "NaN or infinite torque")
        elif max(map(abs, torque)) > self._max_live_torque:
            reject("perturbation_command", "too_large",
                   f"beyond max_live_torque = {self._max_live_torque} N*m")
        else:
            self._live = list(torque)

    def _publish_diagnostics(self) -> None:
        run = self._run
        values = {"running": str(run is not None).lower(),
                  "steps": str(run.steps_done if run is not None else 0),
                  **self.rejects.values()}
        level, message = ("warn", f"{self.rejects.total} messages ignored") if (
            self.rejects.total) else ("ok", "replaying" if run is not None else "idle")
        if self._hardware is not None:
            values.update(self._hardware.values())
            if self._hardware.running:
                message = "commanding hardware"
        self._diagnostics.publish(diagnostic_array(self, "replay", level, message, values))

    def _tick(self) -> None:
        if self._hardware is not None:
            self._tick_hardware(self._hardware)
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
        try:
            while run.steps_done < due and not run.finished:
                state = run.step(self._live)
                if run.steps_done % decimation == 0 or run.finished:
                    self._publish(run, state)
        except CompliantDemoError as exc:  # stored as aborted with what was done
            self.get_logger().error(f"replay ended early: {exc}")
            self._finish(run)
            return
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

    def _tick_hardware(self, hardware: HardwareMode) -> None:
        """Report each new stop at once (log and diagnostics) and store a finished run."""
        for stop in hardware.new_stops():
            text = f"stop ({stop['reason']}) at {stop['t_s']:.4f} s: {stop['detail']}"
            if stop["reason"] == "completed":
                self.get_logger().info(text)
            else:
                self.get_logger().warning(text)
            level = "ok" if stop["reason"] == "completed" else "warn"
            self._diagnostics.publish(diagnostic_array(
                self, "replay", level, text, {"stop_reason": str(stop["reason"]),
                                              "stop_t_s": f"{stop['t_s']:.6f}",
                                              "stop_detail": str(stop["detail"])}))
        outcome = hardware.poll()
        if outcome is not None:
            self._store(*outcome)

    def close(self) -> None:
        """End a hardware run with its stop ramp and store it (node shutdown)."""
        if self._hardware is not None and self._hardware.running:
            self._hardware.close()
            self._tick_hardware(self._hardware)

    def _finish(self, run: ReplayRun) -> None:
        self._run = None
        try:
            status, reason, metrics, trace = run.outcome()
        except CompliantDemoError as exc:  # no step was done
            self.get_logger().error(f"replay result not stored: {exc}")
            self.exit_status = 1
            self.done = self._end_after_run
            return
        self._store(status, reason, metrics, trace)

    def _store(self, status: str, reason: str | None, metrics: dict, trace: dict) -> None:
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
            goal = ("" if "goal_error_max_rad" not in metrics
                    else f"goal error {metrics['goal_error_max_rad']:.3g} rad; ")
            self.get_logger().info(
                f"replay {status} after {metrics['steps']} of {metrics['steps_planned']} steps: "
                f"{goal}result {result_id}"
            )
            if status != "ok":
                self.exit_status = 1
        self.done = self._end_after_run

    def _try_auto_start(self) -> None:
        try:
            with open_store(self._store_path, read_only=True) as store:
                store.load_skill_record(self._value("skill"),
                                        self._value("skill_version") or None)
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
    if values["mode"] == "hardware" and values["run_when_available"]:
        return "run_when_available is refused in hardware mode: a person starts a hardware run"
    if values["mode"] == "hardware" and values["schedule_file"]:
        return "schedule_file is refused in hardware mode: perturbations are simulated only"
    if values["method"] not in METHODS:
        return f"method must be one of {', '.join(METHODS)}, got {values['method'][:40]!r}"
    goal = values["goal"]
    if not is_list(goal) or len(goal) > 64 or not all(
        isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v) for v in goal
    ):
        return "goal must be a list of at most 64 finite numbers, rad"
    return text_problem(values, ("skill",))


def main(args: list[str] | None = None) -> int:
    """Run the replay node until Ctrl-C, shutdown, or the end of an automatic run."""
    return run_node(ReplayNode, args)


if __name__ == "__main__":
    raise SystemExit(main())
