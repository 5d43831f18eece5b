"""What a simulation returns: recorded traces of a batch, the state after one step, energy terms.

Plain frozen records kept apart from the integrator that fills them
(:mod:`compliant_demo.sim.integrate`), so that readers of results need not know how they were
computed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["EnergyTraces", "SimResult", "StepState"]


@dataclass(frozen=True)
class EnergyTraces:
    """Energy terms per recorded sample, scenario and joint, J: ``(n_rec, n_scen, n_joints)``.

    Attributes
    ----------
    kinetic : 1/2 * I * dq^2
    spring_potential : energy in the mechanism's springs
    gravity_potential : m*g*l*(1 - cos(q - gravity_offset))
    end_stop_potential : energy in compressed end stops
    actuator_work : work done by the actuators on the mechanism since the start
    perturbation_work : work done on the link by perturbations (torques, walls, impulses, holds)
    dissipated : energy removed by friction, mechanism damping and end-stop damping (>= 0)
    stiffness_injection : integral of 1/2 * dK/dt * deflection^2 with K the stiffness the
        actuators are set to and the deflection from the equilibrium they are set to
    initial_total : (n_scen, n_joints) kinetic plus potentials at t = 0, before perturbations
    """

    kinetic: np.ndarray
    spring_potential: np.ndarray
    gravity_potential: np.ndarray
    end_stop_potential: np.ndarray
    actuator_work: np.ndarray
    perturbation_work: np.ndarray
    dissipated: np.ndarray
    stiffness_injection: np.ndarray
    initial_total: np.ndarray

    def total(self) -> np.ndarray:
        """Kinetic plus all potential energy, (n_rec, n_scen, n_joints), J."""
        return (
            self.kinetic + self.spring_potential + self.gravity_potential + self.end_stop_potential
        )

    def balance_residual(self) -> np.ndarray:
        """Energy change minus net work in, (n_rec, n_scen, n_joints), J; zero up to the method."""
        net_in = self.actuator_work + self.perturbation_work - self.dissipated
        return self.total() - self.initial_total - net_in

    def at(self, row: int) -> dict[str, np.ndarray]:
        """Each term at recorded sample ``row``, (n_scen, n_joints), J."""
        names = (
            "kinetic", "spring_potential", "gravity_potential", "end_stop_potential",
            "actuator_work", "perturbation_work", "dissipated", "stiffness_injection",
        )
        return {name: getattr(self, name)[row] for name in names}

    def final(self) -> dict[str, np.ndarray]:
        """Each term at the last sample, (n_scen, n_joints), J."""
        return self.at(-1)


@dataclass(frozen=True)
class _Channels:
    q: np.ndarray
    dq: np.ndarray
    q_measured: np.ndarray
    tau_mechanism: np.ndarray
    tau_measured: np.ndarray
    tau_external: np.ndarray
    stiffness_realised: np.ndarray
    damping_realised: np.ndarray
    commands_clamped: np.ndarray
    held: np.ndarray
    spring_tension: np.ndarray
    motor_torque: np.ndarray


@dataclass(frozen=True)
class SimResult(_Channels):
    """Recorded traces of a batch; per-sample arrays are ``(n_rec, n_scen, n_joints)``.

    Per-sample arrays are transposed views of joint-major buffers (not C-contiguous).

    Attributes
    ----------
    t : (n_rec,) array, s; sample times, every ``decimation`` steps from 0 to the end
    q, dq : rad, rad/s; true link angle and velocity
    q_measured : rad; angle through the encoder quantisation
    tau_mechanism : N*m; torque the mechanism puts on the link (springs plus its damping)
    tau_measured : N*m; tau_mechanism plus seeded torque-sensor noise
    tau_external : N*m; perturbation torque on the link (torques, walls, hold reaction)
    stiffness_realised : N*m/rad; mechanism stiffness at the state
    damping_realised : N*m*s/rad; mechanism damping (zero for the antagonistic springs)
    commands_clamped : bool; the command in force at the sample was clamped
    held : bool; the link is blocked by a hold
    spring_tension : N*m; the larger tension of the joint's two antagonistic springs (0 for the
        ideal mechanism)
    motor_torque : N*m; the larger |torque| of its two motors, reflected inertia included (0 for
        the ideal mechanism)
    actuators : (n_rec, 2, n_scen, n_joints); ideal: realised stiffness and damping;
        antagonistic: motor angles theta1, theta2 (rad)
    equilibrium_realised : rad; link angle the actuators are set to
    clamp_counts : {"stiffness" | "damping" | "equilibrium": (n_scen, n_joints) int}; steps
        whose command was clamped, over the whole run
    in_contact : bool; an end stop or wall is compressed
    energy : :class:`EnergyTraces`
    dt : integration step, s; decimation : steps per sample; method : integrator name
    joint_names : names of the joints
    """

    t: np.ndarray
    actuators: np.ndarray
    equilibrium_realised: np.ndarray
    clamp_counts: dict[str, np.ndarray]
    in_contact: np.ndarray
    energy: EnergyTraces
    dt: float
    decimation: int
    method: str
    joint_names: tuple[str, ...]

    @property
    def n_scenarios(self) -> int:
        return self.q.shape[1]


@dataclass(frozen=True)
class StepState(_Channels):
    """State after one :meth:`Simulator.step`: the channels of :class:`SimResult` as
    ``(n_scen, n_joints)`` arrays, same units, and the time ``t`` (s) they belong to."""

    t: float
