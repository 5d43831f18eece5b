"""Model-based stiffness: the stiffness a mechanism realises, computed from its own state.

For a mechanism whose stiffness follows from measured positions and a known spring law (two
antagonistic tension-only springs on two motors), the stiffness channel needs no estimate at
all: it is the derivative of the spring torque at the measured link and motor angles. The
spring law itself has one home, :func:`compliant_demo.sim.mechanisms.antagonistic_stiffness`.

On ROS the motor angles travel as ``sensor_msgs/JointState`` on ``motor_states``, named
:func:`motor_joint_names` (``<joint>_motor_1`` for theta1, ``<joint>_motor_2`` for theta2);
:func:`teaching_motor_angles` gives them for the simulated teacher's arm.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import AntagonisticParams
from compliant_demo.sim.mechanisms import antagonistic_motor_angles, antagonistic_stiffness
from compliant_demo.stamps import invalid_stamp

__all__ = ["model_stiffness", "motor_joint_names", "held_model_stiffness", "MotorAngleGate",
           "teaching_motor_angles", "compare_with_estimate"]


def motor_joint_names(joints: Sequence[str]) -> list[str]:
    """Names of the motor angles of ``joints``: ``<joint>_motor_1``, ``<joint>_motor_2``, ...
    (theta1 and theta2 of :class:`AntagonisticParams`), in joint order."""
    return [f"{joint}_motor_{motor}" for joint in joints for motor in (1, 2)]


def _antagonistic(mechanisms: Sequence[object]) -> list[AntagonisticParams]:
    joints = list(mechanisms)
    if not joints or not all(isinstance(m, AntagonisticParams) for m in joints):
        kinds = [getattr(m, "kind", type(m).__name__) for m in joints]
        raise InvalidInputError(
            f"mechanisms: model stiffness needs one antagonistic mechanism per joint, got {kinds}"
        )
    return joints  # type: ignore[return-value]


def held_model_stiffness(mechanisms: Sequence[object]):
    """The recorder's "model" channel: ``f(position (n, n_joints), held (n, 2 n_joints))`` ->
    stiffness (n, n_joints), N*m/rad, NaN for samples taken before any motor angle arrived."""
    joints = _antagonistic(mechanisms)

    def stiffness(position: np.ndarray, held: np.ndarray) -> np.ndarray:
        q = np.asarray(position, dtype=float)
        motors = np.asarray(held, dtype=float).reshape(len(q), len(joints), 2)
        known = np.isfinite(motors).all(axis=(1, 2))
        result = np.full(q.shape, np.nan)
        if known.any():
            result[known] = model_stiffness(joints, q[known], motors[known])
        return result

    return stiffness


class MotorAngleGate:
    """What the "model" channel holds from one ``motor_states`` message, or why it holds nothing.

    A message is refused (reason, detail) when it has more than ``max_entries`` names or
    positions, a position count unlike its name count, a repeated name, lacks a motor of the
    recorder's joints, has an angle that is not finite or outside the mechanism's motor range
    ``[motor_lower, motor_upper]`` (a motor cannot be there, and the spring law would turn it into
    a stiffness far beyond the mechanism's), has an invalid stamp, or a stamp not after the last
    accepted one since :meth:`restart` (an older message would replace newer angles).

    Parameters
    ----------
    joints : sequence of str
        The recorder's joints; their motors are named by :func:`motor_joint_names`.
    mechanisms : one AntagonisticParams per joint
    max_entries : int
        Most names or positions one message may carry.
    """

    def __init__(self, joints: Sequence[str], mechanisms: Sequence[object], max_entries: int):
        springs = _antagonistic(mechanisms)
        self.motor_names = motor_joint_names(joints)
        self._ranges = [(p.motor_lower, p.motor_upper) for p in springs for _ in (1, 2)]
        self.max_entries = max_entries
        self.last_stamp = -math.inf

    def restart(self) -> None:
        """Accept any valid stamp next (a new demonstration; a restarted publisher)."""
        self.last_stamp = -math.inf

    def check(
        self, sec: int, nanosec: int, names: Sequence[str], position: Sequence[float]
    ) -> tuple[list[float] | None, tuple[str, str] | None]:
        """``(angles in motor_names order, rad, None)`` or ``(None, (reason, detail))``."""
        largest = max(len(names), len(position))
        if largest > self.max_entries:
            return None, ("oversized", f"{largest} entries, at most {self.max_entries}")
        if len(position) != len(names):
            return None, ("wrong_length", f"{len(position)} positions for {len(names)} names")
        if len(set(names)) != len(names):
            return None, ("duplicate_names", f"{len(names)} names, {len(set(names))} distinct")
        given = dict(zip(names, position, strict=True))
        missing = [name for name in self.motor_names if name not in given]
        if missing:
            return None, ("missing_motors", f"no {', '.join(missing[:4])}")
        angles = [float(given[name]) for name in self.motor_names]
        for name, angle, (low, high) in zip(self.motor_names, angles, self._ranges, strict=True):
            if not math.isfinite(angle):
                return None, ("non_finite", f"{name} = {angle}")
            if not low <= angle <= high:
                return None, ("out_of_range",
                              f"{name} = {angle:.6g} rad, motor range [{low}, {high}] rad")
        refused = invalid_stamp(sec, nanosec)
        if refused is not None:
            return None, refused
        stamp = sec + nanosec * 1e-9
        if stamp <= self.last_stamp:
            return None, ("out_of_order",
                          f"stamp {stamp:.9f} s not after {self.last_stamp:.9f} s")
        self.last_stamp = stamp
        return angles, None


def teaching_motor_angles(
    mechanisms: Sequence[object], position: object, stiffness: object
) -> np.ndarray:
    """Motor angles of an arm whose springs follow the guided link at a given stiffness, rad.

    Parameters
    ----------
    mechanisms : one AntagonisticParams per joint
    position : (n, n_joints) array, rad; link angles, taken as the springs' equilibrium
    stiffness : (n, n_joints) array, N*m/rad; set stiffness (clamped to the mechanism's range)

    Returns
    -------
    (n, n_joints, 2) array, rad
        theta1, theta2 from the inverse map
        :func:`compliant_demo.sim.mechanisms.antagonistic_motor_angles`.

    Notes
    -----
    The simulated teacher's arm in teaching mode: the motors keep the springs' equilibrium at
    the link, so the springs put no torque on it, and set the stiffness the operator's hand
    holds (a robot mirroring the hand, as from a grip or muscle-activity reference). The spring
    torque is not part of the teaching simulation's link dynamics.
    """
    joints = _antagonistic(mechanisms)
    q = np.atleast_2d(np.asarray(position, dtype=float))
    k = np.atleast_2d(np.asarray(stiffness, dtype=float))
    if q.shape != k.shape or q.shape[1] != len(joints):
        raise InvalidInputError(f"position and stiffness: expected (n, {len(joints)}) arrays, "
                                f"got {q.shape} and {k.shape}")
    angles = np.empty((*q.shape, 2))
    for j, params in enumerate(joints):
        theta1, theta2, _, _ = antagonistic_motor_angles(params, q[:, j], k[:, j])
        angles[:, j, 0], angles[:, j, 1] = theta1, theta2
    return angles


def model_stiffness(
    mechanisms: Sequence[AntagonisticParams], position: object, motor_position: object
) -> np.ndarray:
    """Stiffness per sample and joint from link and motor angles, N*m/rad.

    Parameters
    ----------
    mechanisms : sequence of AntagonisticParams, one per joint
        Spring law of each joint (k1, k2, pre-tension offset).
    position : (n, n_joints) array, rad
        Measured link angles (a single sample may be given as (n_joints,)).
    motor_position : (n, n_joints, 2) array, rad
        Measured angles of each joint's two motors (theta1, theta2); a single sample may be
        given as (n_joints, 2).

    Returns
    -------
    (n, n_joints) array, N*m/rad
        ``-d(torque)/dq`` at each state: ``k1 + 2 k2 phi`` for each taut spring of elongation
        ``phi`` (``2 k1 + 2 k2 (theta1 - theta2 + 2 d0)`` while both are taut; Migliore, Brown
        and DeWeerth, ICRA 2005), nothing for a slack one.
    """
    joints = _antagonistic(mechanisms)
    q = np.asarray(position, dtype=float)
    motors = np.asarray(motor_position, dtype=float)
    if q.ndim == 1:
        q, motors = q[None], motors[None]
    n_joints = len(joints)
    if q.ndim != 2 or q.shape[1] != n_joints or motors.shape != (*q.shape, 2):
        raise InvalidInputError(
            f"position (n, {n_joints}) and motor_position (n, {n_joints}, 2) expected, got "
            f"{q.shape} and {motors.shape}"
        )
    for name, values in (("position", q), ("motor_position", motors)):
        if not np.isfinite(values).all():
            index = tuple(int(i) for i in np.argwhere(~np.isfinite(values))[0])
            raise InvalidInputError(f"{name}{list(index)} = {values[index]} is not finite")
    return np.column_stack([
        antagonistic_stiffness(params, q[:, j], motors[:, j, 0], motors[:, j, 1])
        for j, params in enumerate(joints)
    ])


def compare_with_estimate(
    t: object, position: object, torque: object, model: object,
    estimator_settings: Mapping[str, Any],
) -> list[dict[str, float]]:
    """The model-based stiffness of a demonstration against the estimate from its own samples.

    Parameters
    ----------
    t : (n,) array, s
    position : (n, n_joints) array, rad
    torque : (n, n_joints) array, N*m
    model : (n, n_joints) array, N*m/rad; the stored model channel (NaN: unknown)
    estimator_settings : keyword arguments of
        :class:`compliant_demo.estimation.SlidingStiffnessEstimator` (as the recorder's)

    Returns
    -------
    list of dict, one per joint
        ``compared`` (share of samples where both exist), ``model_median`` and
        ``estimate_median`` (N*m/rad), ``relative_difference_median`` (median of
        (estimate - model) / model) and ``rms_difference`` (N*m/rad), over those samples; NaN
        where there are none.

    Notes
    -----
    The sliding-window estimate (:func:`compliant_demo.estimation.estimate_stiffness_series`)
    describes the stiffness its latency earlier, so it is moved back by
    :attr:`SlidingStiffnessEstimator.latency_s` before the samples are paired.
    """
    from compliant_demo.estimation import SlidingStiffnessEstimator, estimate_stiffness_series

    times = np.asarray(t, dtype=float)
    k_model = np.asarray(model, dtype=float)
    series = estimate_stiffness_series(times, position, torque, **estimator_settings)
    rate = 1.0 / float(np.median(np.diff(times)))
    latency = SlidingStiffnessEstimator(k_model.shape[1], rate_hz=rate,
                                        **estimator_settings).latency_s
    rows = []
    for j in range(k_model.shape[1]):
        estimate = np.interp(times + latency, times, series.stiffness[:, j], right=np.nan)
        both = np.isfinite(estimate) & np.isfinite(k_model[:, j])
        m, e = k_model[both, j], estimate[both]
        nan = math.nan
        rows.append({
            "compared": float(both.mean()),
            "model_median": float(np.median(m)) if both.any() else nan,
            "estimate_median": float(np.median(e)) if both.any() else nan,
            "relative_difference_median": float(np.median((e - m) / m)) if both.any() else nan,
            "rms_difference": float(np.sqrt(np.mean((e - m) ** 2))) if both.any() else nan,
        })
    return rows
