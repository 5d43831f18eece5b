"""Simulated kinesthetic teaching: an operator's hand guides the joints while the robot dithers.

The operator is modelled per joint as a hand and forearm of inertia M_h(t) held by a
spring-damper of stiffness K_h(t) and damping D_h(t) toward the trajectory the operator intends;
inertia and damping rise with the stiffness (co-contraction). The robot, in gravity-compensated
teaching mode, superimposes a small seeded dither torque. The joint torque channel reports the
interaction torque between hand and link, with sensor noise, so that band-passing both channels
around the dither exposes the hand's impedance, which is known here as ground truth. Between
demonstrations the intended trajectory varies least where the operator is stiff (the
minimum-intervention idea of optimal feedback control). Scenarios are pydantic records; one seed
fixes a demonstration, including its natural variation from the nominal task, and
:class:`TeachingStream` hands the same samples out in chunks for the teacher node.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numba
import numpy as np
from pydantic import BaseModel, ConfigDict, Field, model_validator

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import JointParams, model_from_mapping

__all__ = [
    "Waypoint",
    "TeachingScenario",
    "TeachingRecord",
    "TeachingChunk",
    "cork_seat_scenario",
    "simulate_teaching",
    "teaching_series",
    "TeachingStream",
    "windowed_truth",
    "TeachingSession",
]


class Waypoint(BaseModel):
    """A point the operator passes: when, where and how stiffly they hold each joint."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    time_fraction: float = Field(ge=0, le=1, description="Time as a fraction of the duration.")
    position: tuple[float, ...] = Field(description="Intended joint angles, rad, one per joint.")
    hand_stiffness: tuple[float, ...] = Field(
        description="Hand stiffness at this point, N*m/rad, one per joint."
    )


def _default_joints() -> tuple[JointParams, ...]:
    return (
        JointParams.model_validate({"name": "shoulder", "inertia": 0.08, "viscous_damping": 0.05}),
        JointParams.model_validate({"name": "elbow", "inertia": 0.03, "viscous_damping": 0.03}),
    )


def _cork_seat_waypoints() -> tuple[Waypoint, ...]:
    # Soft approach, stiffen above the bottle, stiff press that seats the cork, soft retreat.
    return (
        Waypoint(time_fraction=0.0, position=(0.0, 0.3), hand_stiffness=(6.0, 4.0)),
        Waypoint(time_fraction=0.35, position=(0.5, 0.9), hand_stiffness=(6.0, 4.0)),
        Waypoint(time_fraction=0.45, position=(0.5, 0.9), hand_stiffness=(40.0, 30.0)),
        Waypoint(time_fraction=0.65, position=(0.56, 1.05), hand_stiffness=(40.0, 30.0)),
        Waypoint(time_fraction=0.72, position=(0.56, 1.05), hand_stiffness=(6.0, 4.0)),
        Waypoint(time_fraction=1.0, position=(0.15, 0.45), hand_stiffness=(6.0, 4.0)),
    )


class TeachingScenario(BaseModel):
    """Everything that defines a simulated teaching session; defaults give the cork_seat task."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    skill: str = Field("cork_seat", min_length=1, description="Skill name.")
    operator: str = Field("operator_a", min_length=1, description="Operator name.")
    joints: tuple[JointParams, ...] = Field(
        default_factory=_default_joints, min_length=1, description="Joints being guided."
    )
    duration_s: float = Field(6.0, gt=0, allow_inf_nan=False, description="Nominal duration, s.")
    rate_hz: float = Field(1000.0, gt=0, le=20000, description="Sample rate, Hz.")
    substeps: int = Field(1, ge=1, le=50, description="Runge-Kutta steps per sample.")
    waypoints: tuple[Waypoint, ...] = Field(
        default_factory=_cork_seat_waypoints,
        min_length=2,
        description="Task waypoints; the first at fraction 0, the last at 1, increasing.",
    )
    hand_damping: tuple[float, ...] = Field(
        (0.3, 0.2), description="Hand damping per joint at zero stiffness, N*m*s/rad."
    )
    # Invented values (no measurement behind them), of plausible size for a hand and forearm
    # on a bench arm's handle: what matters is that the inertia is not negligible against
    # K / w^2 at the dither and that both rise with the stiffness.
    hand_damping_per_stiffness: float = Field(
        0.01, ge=0, allow_inf_nan=False,
        description="Rise of the hand damping with the hand stiffness, s (invented value).",
    )
    hand_inertia: tuple[float, ...] = Field(
        (0.012, 0.006),
        description="Hand and forearm inertia about each joint at zero stiffness, kg*m^2 "
        "(invented values).",
    )
    hand_inertia_per_stiffness: float = Field(
        2e-4, ge=0, allow_inf_nan=False,
        description="Rise of the hand inertia with the hand stiffness, kg*m^2 per N*m/rad "
        "(invented value).",
    )
    torque_sensor: Literal["hand", "joint"] = Field(
        "hand",
        description="Where the torque is measured: 'hand' reports the hand's torque on the link; "
        "'joint' a sensor between drive and link, which also carries the link's inertial torque.",
    )
    dither_amplitude: float = Field(
        0.5, ge=0, allow_inf_nan=False, description="Dither torque amplitude per joint, N*m."
    )
    dither_frequency_hz: float = Field(
        8.0, gt=0, allow_inf_nan=False, description="Centre frequency of the dither, Hz."
    )
    position_noise_std: float = Field(
        2e-5, ge=0, allow_inf_nan=False, description="Joint angle sensor noise, rad."
    )
    velocity_noise_std: float = Field(
        2e-3, ge=0, allow_inf_nan=False, description="Joint velocity sensor noise, rad/s."
    )
    torque_noise_std: float = Field(
        0.005, ge=0, allow_inf_nan=False, description="Interaction torque sensor noise, N*m."
    )
    timing_variation: float = Field(
        0.06, ge=0, lt=0.5, description="Relative std of duration and segment timing between demos."
    )
    amplitude_variation: float = Field(
        0.02, ge=0, allow_inf_nan=False,
        description="Std of the intended trajectory between demos where the hand stiffness "
        "equals variation_reference_stiffness, rad.",
    )
    variation_reference_stiffness: float = Field(
        6.0, gt=0, allow_inf_nan=False,
        description="Hand stiffness at which the trajectory varies by amplitude_variation; the "
        "variance scales with its inverse, N*m/rad.",
    )
    stiffness_variation: float = Field(
        0.1, ge=0, lt=0.5, description="Relative std of the hand stiffness between demos."
    )

    @model_validator(mode="after")
    def _consistent(self) -> TeachingScenario:
        n_joints = len(self.joints)
        names = [joint.name for joint in self.joints]
        if len(set(names)) != n_joints:
            raise ValueError(f"joint names must be distinct, got {names}")
        for name in ("hand_damping", "hand_inertia"):
            values = list(getattr(self, name))
            if len(values) != n_joints or min(values) < 0:
                raise ValueError(f"{name} = {values} needs {n_joints} non-negative values")
        fractions = [w.time_fraction for w in self.waypoints]
        if (
            fractions[0] != 0
            or fractions[-1] != 1
            or any(b <= a for a, b in zip(fractions, fractions[1:], strict=False))
        ):
            raise ValueError(f"waypoint time fractions must increase from 0 to 1, got {fractions}")
        for index, waypoint in enumerate(self.waypoints):
            if len(waypoint.position) != n_joints or len(waypoint.hand_stiffness) != n_joints:
                raise ValueError(
                    f"waypoints[{index}] gives {len(waypoint.position)} positions and "
                    f"{len(waypoint.hand_stiffness)} stiffnesses for {n_joints} joints"
                )
            if min(waypoint.hand_stiffness) <= 0:
                raise ValueError(
                    f"waypoints[{index}].hand_stiffness = {list(waypoint.hand_stiffness)} "
                    "must be positive"
                )
        if self.dither_frequency_hz * 3 > self.rate_hz / 2:
            raise ValueError(
                f"dither_frequency_hz = {self.dither_frequency_hz} is too close to the Nyquist "
                f"frequency of rate_hz = {self.rate_hz}"
            )
        return self

    @property
    def joint_names(self) -> tuple[str, ...]:
        """Joint names in column order."""
        return tuple(joint.name for joint in self.joints)

    @property
    def noise_variance_ratio(self) -> float:
        """var(torque noise) / var(angle noise), (N*m/rad)^2, for the TLS estimator."""
        return (self.torque_noise_std / max(self.position_noise_std, 1e-12)) ** 2

    def estimator_settings(self) -> dict[str, object]:
        """Keyword arguments for the sliding-window estimator that suit this scenario.

        A band of 0.6 to 1.6 times the dither frequency, a window of four dither periods, the
        sensor noise-variance ratio and a minimum excitation of ten times the angle noise; with
        a joint-side torque sensor also the link inertias.
        """
        f = self.dither_frequency_hz
        settings: dict[str, object] = {
            "window_s": 4.0 / f,
            "band_hz": (0.6 * f, 1.6 * f),
            "noise_variance_ratio": self.noise_variance_ratio,
            "min_excitation_rad": max(10 * self.position_noise_std, 1e-5),
        }
        if self.torque_sensor == "joint":
            settings["link_inertia"] = [joint.inertia for joint in self.joints]
        return settings


def cork_seat_scenario(**changes: object) -> TeachingScenario:
    """The demo scenario (two-joint bench arm seating a cork) with optional field changes.

    Bad field values raise InvalidInputError naming the field and the value.
    """
    return model_from_mapping(TeachingScenario, dict(changes), source="cork_seat_scenario")


@dataclass(frozen=True)
class TeachingRecord:
    """One simulated demonstration: what the sensors saw and the ground truth behind it.

    Attributes
    ----------
    t : (n_samples,) array, s
    position : (n_samples, n_joints) array, rad, measured (with noise)
    velocity : (n_samples, n_joints) array, rad/s, measured (with noise)
    torque : (n_samples, n_joints) array, N*m
        Measured torque (with noise): the hand's torque on the link, or with a joint-side sensor
        the hand's torque less the link's inertial torque I q''.
    hand_stiffness_truth : (n_samples, n_joints) array, N*m/rad
    hand_damping : (n_samples, n_joints) array, N*m*s/rad
    hand_inertia_truth : (n_samples, n_joints) array, kg*m^2
    intended_position : (n_samples, n_joints) array, rad
        The trajectory the operator's hand pulls toward.
    intended_velocity : (n_samples, n_joints) array, rad/s
    dither_torque : (n_samples, n_joints) array, N*m
    joint_names : tuple of str
    seed : int
    skill, operator : str
    """

    t: np.ndarray
    position: np.ndarray
    velocity: np.ndarray
    torque: np.ndarray
    hand_stiffness_truth: np.ndarray
    hand_damping: np.ndarray
    hand_inertia_truth: np.ndarray
    intended_position: np.ndarray
    intended_velocity: np.ndarray
    dither_torque: np.ndarray
    joint_names: tuple[str, ...]
    seed: int
    skill: str
    operator: str

    @property
    def n_samples(self) -> int:
        """Number of samples."""
        return int(self.t.size)


@dataclass(frozen=True)
class TeachingChunk:
    """Consecutive samples of one demonstration as handed to the teacher node.

    Attributes
    ----------
    start_index : int
        Index of the first sample in the demonstration.
    t, position, velocity, torque, hand_stiffness_truth
        Slices of the :class:`TeachingRecord` arrays, same units.
    last : bool
        True for the chunk that ends the demonstration.
    """

    start_index: int
    t: np.ndarray
    position: np.ndarray
    velocity: np.ndarray
    torque: np.ndarray
    hand_stiffness_truth: np.ndarray
    last: bool


def _min_jerk(s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Minimum-jerk blend 10 s^3 - 15 s^4 + 6 s^5 on [0, 1] and its derivative (Flash and Hogan,
    J. Neuroscience 5(7), 1985)."""
    return s**3 * (10 - 15 * s + 6 * s * s), 30 * s * s * (1 - s) ** 2


def _through_waypoints(
    t: np.ndarray, times: np.ndarray, values: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Minimum-jerk segments through waypoint values and their time derivative, (n, n_joints)."""
    segment = np.clip(np.searchsorted(times, t, side="right") - 1, 0, len(times) - 2)
    start, end = times[segment], times[segment + 1]
    blend, rate = _min_jerk(np.clip((t - start) / (end - start), 0.0, 1.0))
    step = values[segment + 1] - values[segment]
    return values[segment] + blend[:, None] * step, (rate / (end - start))[:, None] * step


def _demo_variation(
    scenario: TeachingScenario, rng: np.random.Generator
) -> tuple[float, np.ndarray, np.ndarray, np.ndarray]:
    """Draw one demonstration's duration, waypoint times and stiffness, and deviation phases."""
    fractions = np.array([w.time_fraction for w in scenario.waypoints])
    stiffness = np.array([w.hand_stiffness for w in scenario.waypoints])
    spread = scenario.timing_variation
    duration = scenario.duration_s * float(np.clip(1 + spread * rng.normal(), 0.5, 1.5))
    widths = np.diff(fractions) * np.clip(1 + spread * rng.normal(size=fractions.size - 1), 0.3, 3)
    times = duration * np.concatenate([[0.0], np.cumsum(widths) / widths.sum()])
    scale = np.clip(1 + scenario.stiffness_variation * rng.normal(size=stiffness.shape), 0.3, 3)
    phases = rng.uniform(0, 2 * math.pi, size=(_DEVIATION_CYCLES.size, len(scenario.joints)))
    return duration, times, stiffness * scale, phases


# Cycles per movement of the deviation's tones: slow against the dither (at most 0.4 Hz for
# the 6 s task). Faster tones (tried: up to 1.3 Hz) make the spread of a few demonstrations a
# better sample of the variance, but leak into the estimator's band as motion of the hand's
# set point and cost the estimate several % of accuracy.
_DEVIATION_CYCLES = np.array([0.6, 1.1, 1.7, 2.3])


def _deviation(
    scenario: TeachingScenario,
    t: np.ndarray,
    duration: float,
    phases: np.ndarray,
    stiffness: tuple[np.ndarray, np.ndarray],
) -> tuple[np.ndarray, np.ndarray]:
    """This demonstration's deviation from the nominal trajectory and its rate, (n, n_joints).

    ``z(t) = sqrt(2 / m) sum_i cos(2 pi c_i t / duration + phi_i)`` with seeded phases has unit
    variance at every t over demonstrations; it is scaled by
    ``amplitude_variation * sqrt(K_ref / K_h(t))``, so the variance between demonstrations is
    inversely proportional to the hand stiffness: the minimum-intervention idea of optimal
    feedback control (Todorov and Jordan, Nature Neuroscience 5(11), 1226-1235, 2002), with
    this particular law our own choice.
    """
    k, k_rate = stiffness
    omega = 2 * math.pi * _DEVIATION_CYCLES / duration
    angle = omega[:, None, None] * t[None, :, None] + phases[:, None, :]
    norm = math.sqrt(2.0 / _DEVIATION_CYCLES.size)
    z = norm * np.cos(angle).sum(axis=0)
    z_rate = -norm * (omega[:, None, None] * np.sin(angle)).sum(axis=0)
    size = scenario.amplitude_variation * np.sqrt(scenario.variation_reference_stiffness / k)
    size_rate = -0.5 * size * k_rate / k
    return size * z, size_rate * z + size * z_rate


def _dither(scenario: TeachingScenario, rng: np.random.Generator, times: np.ndarray) -> np.ndarray:
    """Three-tone dither per joint with seeded phases at ``times`` (any shape), N*m.

    Returns an array of shape ``times.shape + (n_joints,)`` whose peak is at most the amplitude.
    """
    frequencies = scenario.dither_frequency_hz * np.array([0.7, 1.0, 1.4])
    phases = rng.uniform(0, 2 * math.pi, size=(3, len(scenario.joints)))
    angle = 2 * math.pi * times[..., None, None] * frequencies[:, None] + phases
    return scenario.dither_amplitude / 3.0 * np.sin(angle).sum(axis=-2)


@numba.njit(cache=True, nogil=True)
def _accel(j, index, q, dq, inputs, params):  # pragma: no cover - compiled
    intended, intended_velocity, hand_k, hand_d, hand_m, dither = inputs
    inertia, bearing, coulomb, smoothing, lower, upper, stop_k, stop_d = params
    hand = hand_k[index, j] * (intended[index, j] - q) + hand_d[index, j] * (
        intended_velocity[index, j] - dq
    )
    over = max(q - upper[j], 0.0) + min(q - lower[j], 0.0)
    stop = -stop_k[j] * over - (stop_d[j] * dq if over != 0.0 else 0.0)
    friction = bearing[j] * dq + coulomb[j] * math.tanh(dq / smoothing[j])
    # The hand's mass moves with the handle: link and hand accelerate together.
    return (hand + dither[index, j] - friction + stop) / (inertia[j] + hand_m[index, j])


@numba.njit(cache=True, nogil=True)
def _integrate(inputs, params, dt, steps, n_samples):  # pragma: no cover - compiled
    """Classical RK4 per joint on inputs sampled every dt/2; states at every sample."""
    intended, intended_velocity, hand_k, hand_d, hand_m, _ = inputs
    n_joints = intended.shape[1]
    true_q = np.empty((n_samples, n_joints))
    true_dq = np.empty((n_samples, n_joints))
    true_tau = np.empty((n_samples, n_joints))
    true_acc = np.empty((n_samples, n_joints))
    for j in range(n_joints):
        q = intended[0, j]
        dq = intended_velocity[0, j]
        index = 0
        for k in range(n_samples):
            true_q[k, j] = q
            true_dq[k, j] = dq
            true_acc[k, j] = _accel(j, index, q, dq, inputs, params)
            # The torque on the link is what the spring-damper pulls less what moves the hand.
            true_tau[k, j] = (
                hand_k[index, j] * (intended[index, j] - q)
                + hand_d[index, j] * (intended_velocity[index, j] - dq)
                - hand_m[index, j] * true_acc[k, j]
            )
            if k == n_samples - 1:
                break
            for _ in range(steps):
                k1v = dq
                k1a = _accel(j, index, q, dq, inputs, params)
                k2v = dq + 0.5 * dt * k1a
                k2a = _accel(j, index + 1, q + 0.5 * dt * k1v, k2v, inputs, params)
                k3v = dq + 0.5 * dt * k2a
                k3a = _accel(j, index + 1, q + 0.5 * dt * k2v, k3v, inputs, params)
                k4v = dq + dt * k3a
                k4a = _accel(j, index + 2, q + dt * k3v, k4v, inputs, params)
                q = q + dt / 6.0 * (k1v + 2.0 * k2v + 2.0 * k3v + k4v)
                dq = dq + dt / 6.0 * (k1a + 2.0 * k2a + 2.0 * k3a + k4a)
                index += 2
    return true_q, true_dq, true_tau, true_acc


def simulate_teaching(scenario: TeachingScenario, seed: int) -> TeachingRecord:
    """Simulate one kinesthetic demonstration.

    Parameters
    ----------
    scenario : TeachingScenario
    seed : int
        Fixes the demonstration's variation from the nominal task, the dither phases and the
        sensor noise.

    Returns
    -------
    TeachingRecord

    Notes
    -----
    Per joint, with the robot's gravity compensation cancelling the link's weight:
    ``(I + M_h) q'' = tau_s + tau_d - b q' - f_c tanh(q'/v_s) + tau_stop`` with the hand's
    spring-damper ``tau_s = K_h(t) (q_h - q) + D_h(t) (q_h' - q')``, ``D_h = D_0 + c_D K_h`` and
    ``M_h = M_0 + c_M K_h`` (invented values, quasi-static: the rate of change of M_h is not
    modelled), integrated by the classical fourth-order Runge-Kutta method with
    ``scenario.substeps`` steps per sample, so that the sampled angle and velocity are
    consistent to O(dt^4) (a first-order scheme would shift the damping torque by half a step
    against the angle). ``K_h`` and the nominal ``q_h`` follow minimum-jerk segments between
    waypoints; ``q_h`` carries this demonstration's deviation (see ``amplitude_variation``).
    The reported torque is the hand's torque on the link, ``tau_s - M_h q''``, plus noise.
    """
    if not isinstance(seed, int | np.integer) or seed < 0:
        raise InvalidInputError(f"seed must be a non-negative integer, got {seed!r}")
    rng = np.random.default_rng(int(seed))
    duration, times, stiffness, phases = _demo_variation(scenario, rng)
    n_samples = int(round(duration * scenario.rate_hz)) + 1
    steps = scenario.substeps
    dt = 1.0 / (scenario.rate_hz * steps)
    # Inputs on a grid of half integration steps: Runge-Kutta evaluates at t, t + dt/2, t + dt.
    fine_t = np.arange(2 * steps * (n_samples - 1) + 1) * (dt / 2)
    positions = np.array([w.position for w in scenario.waypoints])
    intended, intended_velocity = _through_waypoints(fine_t, times, positions)
    hand_k, hand_k_rate = _through_waypoints(fine_t, times, stiffness)
    deviation, deviation_rate = _deviation(
        scenario, fine_t, duration, phases, (hand_k, hand_k_rate)
    )
    intended = intended + deviation
    intended_velocity = intended_velocity + deviation_rate
    hand_d = np.asarray(scenario.hand_damping) + scenario.hand_damping_per_stiffness * hand_k
    hand_m = np.asarray(scenario.hand_inertia) + scenario.hand_inertia_per_stiffness * hand_k
    dither = _dither(scenario, rng, fine_t)
    joints = scenario.joints
    params = tuple(
        np.array([getattr(joint, name) for joint in joints], dtype=float)
        for name in (
            "inertia",
            "viscous_damping",
            "coulomb_friction",
            "friction_smoothing_velocity",
            "lower_limit",
            "upper_limit",
            "limit_stiffness",
            "limit_damping",
        )
    )
    inputs = (intended, intended_velocity, hand_k, hand_d, hand_m, dither)
    true_q, true_dq, true_tau, true_acc = _integrate(inputs, params, dt, steps, n_samples)
    if scenario.torque_sensor == "joint":
        # A sensor between drive and link sees the hand torque less what accelerates the link.
        true_tau = true_tau - params[0] * true_acc
    samples = slice(None, None, 2 * steps)
    shape = true_q.shape
    return TeachingRecord(
        t=fine_t[samples].copy(),
        position=true_q + scenario.position_noise_std * rng.normal(size=shape),
        velocity=true_dq + scenario.velocity_noise_std * rng.normal(size=shape),
        torque=true_tau + scenario.torque_noise_std * rng.normal(size=shape),
        hand_stiffness_truth=hand_k[samples].copy(),
        hand_damping=hand_d[samples].copy(),
        hand_inertia_truth=hand_m[samples].copy(),
        intended_position=intended[samples].copy(),
        intended_velocity=intended_velocity[samples].copy(),
        dither_torque=dither[samples].copy(),
        joint_names=scenario.joint_names,
        seed=int(seed),
        skill=scenario.skill,
        operator=scenario.operator,
    )


def teaching_series(scenario: TeachingScenario, n_demos: int, seed: int) -> list[TeachingRecord]:
    """``n_demos`` demonstrations with natural variation; demo i is ``simulate_teaching(seed+i)``.

    Parameters
    ----------
    scenario : TeachingScenario
    n_demos : int, at least 1
    seed : int
        Seed of the first demonstration.
    """
    if not isinstance(n_demos, int | np.integer) or n_demos < 1:
        raise InvalidInputError(f"n_demos must be a positive integer, got {n_demos!r}")
    return [simulate_teaching(scenario, int(seed) + index) for index in range(n_demos)]


class TeachingStream:
    """One simulated demonstration handed out in consecutive chunks, in time order.

    Parameters
    ----------
    scenario : TeachingScenario
    seed : int
        As for :func:`simulate_teaching`; the chunks concatenate to exactly that record.
    chunk_size : int
        Samples per chunk (the last chunk may be shorter).

    Notes
    -----
    The teacher node publishes chunk samples at ``scenario.rate_hz``; it needs no arithmetic of
    its own beyond pacing. ``record`` holds the full demonstration including the ground truth.
    """

    def __init__(self, scenario: TeachingScenario, seed: int, chunk_size: int = 10) -> None:
        if not isinstance(chunk_size, int | np.integer) or chunk_size < 1:
            raise InvalidInputError(f"chunk_size must be a positive integer, got {chunk_size!r}")
        self.scenario = scenario
        self.record = simulate_teaching(scenario, seed)
        self.chunk_size = int(chunk_size)
        self._next = 0

    @property
    def n_samples(self) -> int:
        """Samples in the demonstration."""
        return self.record.n_samples

    @property
    def remaining(self) -> int:
        """Samples not yet handed out."""
        return self.n_samples - self._next

    def __iter__(self) -> Iterator[TeachingChunk]:
        return self

    def __next__(self) -> TeachingChunk:
        if self._next >= self.n_samples:
            raise StopIteration
        start, stop = self._next, min(self._next + self.chunk_size, self.n_samples)
        self._next = stop
        record = self.record
        return TeachingChunk(
            start_index=start,
            t=record.t[start:stop],
            position=record.position[start:stop],
            velocity=record.velocity[start:stop],
            torque=record.torque[start:stop],
            hand_stiffness_truth=record.hand_stiffness_truth[start:stop],
            last=stop == self.n_samples,
        )


def windowed_truth(truth: object, window: int) -> tuple[np.ndarray, np.ndarray]:
    """Ground truth as a sliding-window estimator sees it: mean and spread over each window.

    Parameters
    ----------
    truth : (n_samples, n_joints) array, N*m/rad
        ``TeachingRecord.hand_stiffness_truth``.
    window : int
        Estimator window in samples (``SlidingStiffnessEstimator.window``).

    Returns
    -------
    mean : (n_samples, n_joints) array, N*m/rad
        Mean over samples k - window + 1 .. k; NaN for the first window - 1 samples.
    variation : (n_samples, n_joints) array, dimensionless
        max / min - 1 over the same samples (inf where the window is incomplete): windows where
        this is small are those over which a constant stiffness is a fair model.
    """
    values = np.asarray(truth, dtype=float)
    if (
        values.ndim != 2
        or not isinstance(window, int | np.integer)
        or not 1 <= window <= len(values)
    ):
        raise InvalidInputError(
            f"window = {window!r} must be between 1 and the {len(values)} samples of a 2-D truth"
        )
    views = np.lib.stride_tricks.sliding_window_view(values, int(window), axis=0)
    mean = np.full_like(values, np.nan)
    variation = np.full_like(values, np.inf)
    mean[window - 1 :] = views.mean(axis=-1)
    variation[window - 1 :] = views.max(axis=-1) / views.min(axis=-1) - 1.0
    return mean, variation


class TeachingSession:
    """A series of simulated demonstrations, handed out sample by sample as time passes.

    Parameters
    ----------
    scenario : TeachingScenario
    n_demonstrations : int
    seed : int
        Demonstration i is ``simulate_teaching(scenario, seed + i)`` (as ``teaching_series``).
    """

    def __init__(self, scenario: TeachingScenario, n_demonstrations: int, seed: int):
        if n_demonstrations < 1:
            raise InvalidInputError(
                f"n_demonstrations: must be at least 1, got {n_demonstrations}"
            )
        self.scenario = scenario
        self.n_demonstrations = int(n_demonstrations)
        self.seed = int(seed)
        self.published_counts: list[int] = []
        self._truth: list[tuple[np.ndarray, np.ndarray]] = []
        self._record: TeachingRecord | None = None
        self._cursor = 0

    def next_demonstration(self) -> int:
        """Simulate the next demonstration and make it current; returns its index."""
        index = len(self.published_counts)
        if index >= self.n_demonstrations:
            raise InvalidInputError(f"all {self.n_demonstrations} demonstrations were handed out")
        self._record = simulate_teaching(self.scenario, self.seed + index)
        self._cursor = 0
        self.published_counts.append(0)
        return index

    @property
    def current_samples(self) -> int:
        """Samples in the current demonstration."""
        return 0 if self._record is None else self._record.n_samples

    @property
    def current_published(self) -> int:
        """Samples of the current demonstration handed out so far."""
        return self._cursor

    @property
    def current_finished(self) -> bool:
        """True once every sample of the current demonstration was handed out."""
        return self._record is not None and self._cursor >= self._record.n_samples

    @property
    def all_finished(self) -> bool:
        """True once the last demonstration was handed out completely."""
        return len(self.published_counts) == self.n_demonstrations and self.current_finished

    def due(self, elapsed_s: float) -> Iterator[tuple[float, list, list, list, list]]:
        """Samples with ``t <= elapsed_s`` not handed out yet, in time order.

        Yields
        ------
        (t, position, velocity, torque, hand_stiffness_truth) : t in s, then per-joint lists
        in rad, rad/s, N*m and N*m/rad.
        """
        record = self._record
        if record is None:
            return
        start = self._cursor
        stop = int(np.searchsorted(record.t, elapsed_s, side="right"))
        if stop <= start:
            return
        self._cursor = stop
        self.published_counts[-1] = stop
        if stop == record.n_samples:
            self._truth.append((record.t, record.hand_stiffness_truth))
        yield from zip(
            record.t[start:stop].tolist(),
            record.position[start:stop].tolist(),
            record.velocity[start:stop].tolist(),
            record.torque[start:stop].tolist(),
            record.hand_stiffness_truth[start:stop].tolist(),
            strict=True,
        )

    def save_truth(self, path: Path) -> None:
        """Write per-demonstration ``count_<i>``, ``seed_<i>``, ``t_<i>`` (s) and
        ``stiffness_<i>`` ((n, n_joints) N*m/rad ground truth) to an .npz file."""
        arrays: dict[str, np.ndarray] = {}
        for index, count in enumerate(self.published_counts):
            arrays[f"count_{index}"] = np.array(count)
            arrays[f"seed_{index}"] = np.array(self.seed + index)
            if index < len(self._truth):
                arrays[f"t_{index}"], arrays[f"stiffness_{index}"] = self._truth[index]
        arrays["joints"] = np.array(self.scenario.joint_names)
        np.savez(path, **arrays)  # type: ignore[arg-type]
