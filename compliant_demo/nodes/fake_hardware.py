"""Fake hardware node: the simulated plant behind a joint impedance controller's command topics.

Takes the topics the replay node's hardware mode sends (equilibrium, stiffness and damping as
``std_msgs/Float64MultiArray`` in ``joints`` order), holds the latest of each as a forward command
controller does, steps :class:`compliant_demo.handoff.fake_hardware.FakeHardware` at ``rate_hz``
in a thread on absolute deadlines, and publishes ``sensor_msgs/JointState`` on ``feedback_topic``
with the injected faults (delay, dropped samples, frozen feedback, torque spikes; their times
count from the first command received). For tests and demos only: it is not a robot.

Every parameter is read-only. When feedback freezes, the node measures how long it took until an
equilibrium command arrived at exactly the frozen angles (what the replay node's stop commands)
and reports it in ``diagnostics`` as ``freeze_to_stop_ms``.
"""

from __future__ import annotations

import functools
import math
import threading
import time

import numpy as np
from diagnostic_msgs.msg import DiagnosticArray
from rclpy.node import Node
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray

from compliant_demo.handoff.fake_hardware import FakeHardware, Faults, JointSample
from compliant_demo.nodes._common import (
    RejectCounter,
    check_parameter_changes,
    declare,
    diagnostic_array,
    list_parameter,
    run_node,
    to_stamp,
)
from compliant_demo.nodes._files import load_file_parameter
from compliant_demo.nodes._hardware import COMMAND_QOS
from compliant_demo.nodes._periodic import PeriodicThread, use_realtime_priority
from compliant_demo.plant import load_plant

__all__ = ["FakeHardwareNode", "main"]

_NEVER = -1.0


class FakeHardwareNode(Node):
    """Serves the command topics and publishes joint states of the simulated plant."""

    def __init__(self) -> None:
        super().__init__("fake_hardware")
        d = declare
        plant_file = d(self, "plant_file", "", "Plant YAML in an allowed config folder; empty = "
                       "the package's default plant.")
        d(self, "joints", [], "Joint order of commands and states; empty = the plant's.")
        d(self, "initial_positions", [], "Angles at start, rad; empty = mid-range.")
        rate = d(self, "rate_hz", 500.0, "Simulation step and joint-state rate, Hz.", low=50.0,
                 high=5000.0)
        stiffness = d(self, "initial_stiffness", 20.0, "Stiffness held before the first "
                      "command, N*m/rad.", low=0.0, high=1e5)
        topics = {name: d(self, f"{name}_topic", default, f"{name.capitalize()} command topic.")
                  for name, default in (("equilibrium", "joint_equilibrium_controller/commands"),
                                        ("stiffness", "joint_stiffness_controller/commands"),
                                        ("damping", "joint_damping_controller/commands"))}
        feedback_topic = d(self, "feedback_topic", "joint_states", "Joint-state topic.")
        faults = Faults(
            delay_s=d(self, "delay_s", 0.0, "Fault: feedback delay, s.", low=0.0, high=10.0),
            drop_probability=d(self, "drop_probability", 0.0, "Fault: chance a joint state is "
                               "dropped.", low=0.0, high=1.0),
            freeze_at_s=_time(d(self, "freeze_at_s", _NEVER, "Fault: feedback freezes this long "
                                "after the first command, s; -1 = never.", low=-1.0, high=1e6)),
            freeze_for_s=_time(d(self, "freeze_for_s", _NEVER, "Fault: how long it stays "
                                 "frozen, s; -1 = for good.", low=-1.0, high=1e6)),
            spike_at_s=_time(d(self, "spike_at_s", _NEVER, "Fault: torque spike this long after "
                               "the first command, s; -1 = never.", low=-1.0, high=1e6)),
            spike_for_s=d(self, "spike_for_s", 0.05, "Fault: spike duration, s.", low=0.0,
                          high=60.0),
            spike_torque=d(self, "spike_torque", 0.0, "Fault: spike torque on every joint, N*m.",
                           low=-1e3, high=1e3),
            seed=d(self, "fault_seed", 0, "Seed of dropped samples.", low=0, high=2**31 - 1),
        )
        seed = d(self, "seed", 0, "Seed of the sensor noise.", low=0, high=2**31 - 1)
        priority = d(self, "realtime_priority", 0, "SCHED_FIFO priority of the node's threads "
                     "(1-98); 0 = the normal scheduler.", low=0, high=98)
        diagnostics_period = d(self, "diagnostics_period_s", 1.0, "Diagnostics period, s.",
                               low=0.05, high=60.0)
        check_parameter_changes(self)
        plant = (load_file_parameter("plant_file", plant_file, load_plant) if plant_file
                 else load_plant())
        self.joints = list_parameter(self, "joints", str) or [j.name for j in plant.joints]
        q0 = list_parameter(self, "initial_positions", float)
        self._hardware = FakeHardware(plant, self.joints, 1.0 / rate, faults,
                                      q0=np.array(q0) if q0 else None,
                                      initial_stiffness=stiffness, seed=seed)
        self._hardware.armed = False
        self.rejects = RejectCounter(self)
        self._lock = threading.Lock()
        self._pending: dict[str, np.ndarray] = {}
        self._commands_received = 0
        self._frozen: JointSample | None = None
        self._frozen_since = 0.0
        self.freeze_to_stop_ms: float | None = None
        self._wall_origin = time.time()
        # Joint states: reliable, shallow, as a joint-state broadcaster publishes them.
        self._states = self.create_publisher(JointState, feedback_topic, 10)
        self._diagnostics = self.create_publisher(DiagnosticArray, "diagnostics", 10)
        for name, topic in topics.items():
            if topic:
                self.create_subscription(
                    Float64MultiArray, topic,
                    self.rejects.guard(topic, functools.partial(self._on_command, name, topic)),
                    COMMAND_QOS)
        self.create_timer(diagnostics_period, self._publish_diagnostics)
        failure = use_realtime_priority(priority)
        if failure is not None:
            self.get_logger().warning(f"realtime_priority {priority} not taken: {failure}")
        self._thread = PeriodicThread(1.0 / rate, self._step, "fake_hardware",
                                      priority=priority)
        self._thread.start()

    def _on_command(self, name: str, topic: str, message: Float64MultiArray) -> None:
        values = np.asarray(message.data, dtype=float)
        if values.shape != (len(self.joints),) or not np.isfinite(values).all():
            self.rejects.reject(topic, "wrong_length_or_non_finite",
                                f"{len(values)} values for {len(self.joints)} joints")
            return
        if name != "equilibrium" and (values < 0).any():  # the simulator refuses it mid-step
            self.rejects.reject(topic, "negative", f"{name} below 0")
            return
        arrived = time.monotonic()
        with self._lock:
            self._pending[name] = values
            self._commands_received += 1
            frozen = self._frozen
        if (name == "equilibrium" and frozen is not None and self.freeze_to_stop_ms is None
                and np.array_equal(values, frozen.position)):
            self.freeze_to_stop_ms = (arrived - self._frozen_since) * 1e3
            self.get_logger().info(f"stop command {self.freeze_to_stop_ms:.3f} ms after the "
                                   "feedback froze")

    def _step(self, now: float) -> bool:
        hardware = self._hardware
        with self._lock:
            pending, self._pending = self._pending, {}
        if pending:
            hardware.command(**pending)
            if not hardware.armed:
                hardware.arm_faults()
        samples = hardware.step()
        frozen = hardware.frozen_sample
        if frozen is not None and self._frozen is None:
            self._frozen_since = now
        with self._lock:
            self._frozen = frozen
        for sample in samples:
            message = JointState()
            message.header.stamp = to_stamp(self._wall_origin + sample.t)
            message.name = self.joints
            message.position = sample.position.tolist()
            message.velocity = sample.velocity.tolist()
            message.effort = sample.effort.tolist()
            self._states.publish(message)
        return True

    def _publish_diagnostics(self) -> None:
        hardware = self._hardware
        values = {"t_s": f"{hardware.t:.3f}", "commands_received": str(self._commands_received),
                  "frozen": str(self._frozen is not None).lower(),
                  "freeze_to_stop_ms": ("none" if self.freeze_to_stop_ms is None
                                        else f"{self.freeze_to_stop_ms:.4f}"),
                  "missed_periods": str(self._thread.missed), **self.rejects.values()}
        self._diagnostics.publish(diagnostic_array(self, "fake_hardware", "ok", "simulating",
                                                   values))

    def close(self) -> None:
        """Stop the simulation thread."""
        self._thread.stop()


def _time(value: float) -> float:
    """A fault time parameter: negative means never (inf)."""
    return math.inf if value < 0 else float(value)


def main(args: list[str] | None = None) -> int:
    """Run the fake hardware until Ctrl-C or shutdown."""
    return run_node(FakeHardwareNode, args)


if __name__ == "__main__":
    raise SystemExit(main())
