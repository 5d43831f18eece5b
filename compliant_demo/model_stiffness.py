"""Model-based stiffness: the stiffness a mechanism realises, computed from its own state.

For a mechanism whose stiffness follows from measured positions and a known spring law (two
antagonistic tension-only springs on two motors), the stiffness channel needs no estimate at
all: it is the derivative of the spring torque at the measured link and motor angles. The
spring law itself has one home, :func:`compliant_demo.sim.mechanisms.antagonistic_stiffness`.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import AntagonisticParams
from compliant_demo.sim.mechanisms import antagonistic_stiffness

__all__ = ["model_stiffness"]


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
    joints = list(mechanisms)
    if not joints or not all(isinstance(m, AntagonisticParams) for m in joints):
        kinds = [getattr(m, "kind", type(m).__name__) for m in joints]
        raise InvalidInputError(
            f"mechanisms: model stiffness needs one antagonistic mechanism per joint, got {kinds}"
        )
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
