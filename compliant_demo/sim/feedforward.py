"""Inverse dynamics of a commanded path on the target plant, and the equilibrium that carries it.

A compliant joint driven only by its spring equilibrium sags under gravity and lags in motion:
the spring must supply the torque the path needs, so its equilibrium has to lead the path by that
torque over the stiffness. For an elastic joint of diagonal stiffness K the feedforward is

    q_eq = q_d + K^-1 * tau_ID(q_d, dq_d, ddq_d)

(the static and dynamic feedforward of elastic-joint robots: Spong, J. Dyn. Sys. Meas. Control
109, 1987; De Luca and Book, Robots with flexible elements, Springer Handbook of Robotics, 2008,
ch. 13; both from memory). It is exact for a linear spring and, with both springs taut, for the
antagonistic pair (its torque is linear in the deflection at fixed motor angles).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from compliant_demo.models import ChainParams, JointParams
from compliant_demo.sim.integrate import GRAVITY
from compliant_demo.sim.rigid_body import ChainKernel

__all__ = ["inverse_dynamics", "feedforward_equilibrium"]


def inverse_dynamics(
    joints: Sequence[JointParams],
    position: NDArray[np.float64],
    velocity: NDArray[np.float64],
    acceleration: NDArray[np.float64],
    chain: ChainParams | None = None,
    damping: NDArray[np.float64] | None = None,
) -> NDArray[np.float64]:
    """Joint torques the path needs, (n_samples, n_joints), N*m.

    Parameters
    ----------
    joints : JointParams per column
    position, velocity, acceleration : (n_samples, n_joints) rad, rad/s, rad/s^2
    chain : the coupled arm of the joints, or None for independent joints
    damping : (n_samples, n_joints) N*m*s/rad, the mechanism's damping command, or None

    Notes
    -----
    Independent joints: ``I*ddq + m*g*l*sin(q - offset) + (b + d)*dq``. A chain:
    ``M(q) ddq + C(q, dq) dq + g(q) + (b + d)*dq`` (recursive Newton-Euler). b is the joint's
    viscous friction, d the damping command. Coulomb friction is left out: its sign is undefined
    at rest (where the goal is held) and its smoothed form is a fraction of a N*m while moving.
    """
    q = np.asarray(position, dtype=float)
    dq = np.asarray(velocity, dtype=float)
    ddq = np.asarray(acceleration, dtype=float)
    viscous = np.array([j.viscous_damping for j in joints])
    drag = viscous * dq if damping is None else (viscous + damping) * dq
    if chain is not None:
        rigid = ChainKernel(chain).inverse(q.T, dq.T, ddq.T).T
        return np.asarray(rigid + drag)
    inertia = np.array([j.inertia for j in joints])
    mgl = np.array([j.gravity_mass * GRAVITY * j.com_distance for j in joints])
    offset = np.array([j.gravity_offset for j in joints])
    return np.asarray(inertia * ddq + mgl * np.sin(q - offset) + drag)


def feedforward_equilibrium(
    position: NDArray[np.float64],
    stiffness: NDArray[np.float64],
    torque: NDArray[np.float64],
) -> NDArray[np.float64]:
    """``q_d + tau / K`` (rad) for (n_samples, n_joints) position (rad), stiffness the joint
    realises (N*m/rad, > 0) and torque (N*m)."""
    return np.asarray(position + torque / stiffness)
