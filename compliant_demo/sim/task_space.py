"""The task-space view of a coupled arm: end-effector path and the stiffness felt there.

The end effector is the chain's tool point (``ChainParams.tip_xyz``). Its position and the
linear part of its geometric Jacobian come from the chain's forward kinematics. A diagonal joint
stiffness ``K_q`` produces at the end effector the Cartesian stiffness
``K_x = J^-T K_q J^-1`` (Siciliano, Sciavicco, Villani, Oriolo, Robotics: Modelling, Planning
and Control, Springer 2009, the chapter on force control, compliance and stiffness mapping; from
memory), written here through the compliance ``C_x = J K_q^-1 J^T``, ``K_x = C_x^-1``, which is
the same matrix for a square, invertible J and stays defined for a redundant arm. The view works
in a plane: the arm's plane of motion when all joint axes are parallel, else the two main
directions of the path. Where J restricted to that plane loses rank (a stretched or folded arm)
``J^-1`` does not exist: the stiffness is NaN and the sample is marked singular.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import ChainParams
from compliant_demo.sim.rigid_body import link_frames

__all__ = [
    "SINGULAR_CONDITION",
    "TaskSpaceView",
    "end_effector",
    "motion_plane",
    "cartesian_stiffness",
    "task_space_view",
]

#: J (in the plane) counts as singular above this condition number (largest over smallest
#: singular value): its inverse does not exist or would draw an ellipse of no meaning.
SINGULAR_CONDITION = 1e3


def _chain_arrays(chain: ChainParams) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    place = np.array([np.reshape(b.placement_rotation, (3, 3)) for b in chain.bodies])
    pos = np.array([b.placement_xyz for b in chain.bodies], dtype=float)
    axis = np.array([b.axis for b in chain.bodies], dtype=float)
    return place, pos, axis


def _angles(chain: ChainParams, q) -> np.ndarray:
    q = np.asarray(q, dtype=float)
    n_joints = len(chain.bodies)
    if q.ndim != 2 or q.shape[1] != n_joints:
        raise InvalidInputError(f"q: shape {q.shape}, expected (n_samples, {n_joints})")
    if not np.isfinite(q).all():
        raise InvalidInputError("q: values must be finite")
    return q


def end_effector(chain: ChainParams, q) -> tuple[np.ndarray, np.ndarray]:
    """Position and linear Jacobian of the end effector in the base frame.

    Parameters
    ----------
    chain : the arm
    q : (n_samples, n_joints) array, rad

    Returns
    -------
    position : (n_samples, 3) array, m
    jacobian : (n_samples, 3, n_joints) array, m/rad; column i is ``z_i x (p - o_i)`` for joint
        axis z_i through o_i (the geometric Jacobian of a revolute chain; Siciliano et al., the
        differential kinematics chapter, from memory)
    """
    q = _angles(chain, q)
    place, pos, axis = _chain_arrays(chain)
    frames = link_frames(place, pos, axis, q.T)
    origin, rot = frames[-1]
    tip = origin + rot @ np.asarray(chain.tip_xyz, dtype=float)
    jacobian = np.empty((q.shape[0], 3, q.shape[1]))
    for i, (o_i, r_i) in enumerate(frames):
        jacobian[:, :, i] = np.cross(r_i @ axis[i], tip - o_i)
    return tip, jacobian


def motion_plane(chain: ChainParams, position: np.ndarray) -> np.ndarray:
    """Orthonormal rows ``(2, 3)`` spanning the plane the view draws in, base frame.

    The plane normal to the joint axes when they are all parallel (a planar arm); else the two
    main directions of the end-effector path ``position`` (n_samples, 3), m.
    """
    place, pos, axis = _chain_arrays(chain)
    zero = np.zeros((len(chain.bodies), 1))
    axes = np.array([(rot @ axis[i])[0] for i, (_, rot) in
                     enumerate(link_frames(place, pos, axis, zero))])
    normal = axes[0]
    if np.allclose(np.abs(axes @ normal), 1.0, atol=1e-9):
        aligned = np.abs(normal) > 1.0 - 1e-9
        if aligned.any():  # normal along a base axis: the other two base axes, in order
            return np.eye(3)[~aligned]
        first = np.cross(normal, np.eye(3)[int(np.argmin(np.abs(normal)))])
        first /= np.linalg.norm(first)
        return np.array([first, np.cross(normal, first)])
    spread = np.asarray(position, dtype=float) - np.mean(position, axis=0)
    return np.linalg.svd(spread, full_matrices=True)[2][:2]


def cartesian_stiffness(jacobian: np.ndarray, stiffness: np.ndarray, plane: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Cartesian stiffness ``K_x = J^-T K_q J^-1`` in a plane, per sample.

    Parameters
    ----------
    jacobian : (n_samples, 3, n_joints) array, m/rad
    stiffness : (n_samples, n_joints) array, N*m/rad, > 0 (diagonal joint stiffness)
    plane : (2, 3) orthonormal rows

    Returns
    -------
    k_x : (n_samples, 2, 2) array, N/m, in plane coordinates; NaN where singular
    singular : (n_samples,) bool; J in the plane has a condition number above
        :data:`SINGULAR_CONDITION` (or lost rank), so J^-1 does not exist there
    """
    jacobian = np.asarray(jacobian, dtype=float)
    stiffness = np.asarray(stiffness, dtype=float)
    if jacobian.ndim != 3 or jacobian.shape[1] != 3:
        raise InvalidInputError(f"jacobian: shape {jacobian.shape}, expected (n, 3, n_joints)")
    if stiffness.shape != (jacobian.shape[0], jacobian.shape[2]):
        raise InvalidInputError(
            f"stiffness: shape {stiffness.shape}, expected {(jacobian.shape[0], jacobian.shape[2])}"
        )
    if not (np.isfinite(stiffness).all() and (stiffness > 0).all()):
        raise InvalidInputError("stiffness: values must be finite and > 0 N*m/rad")
    planar = np.asarray(plane, dtype=float) @ jacobian  # (n, 2, n_joints)
    sigma = np.linalg.svd(planar, compute_uv=False)
    singular = ~(sigma[:, -1] * SINGULAR_CONDITION > sigma[:, 0])
    compliance = (planar / stiffness[:, None, :]) @ planar.transpose(0, 2, 1)
    k_x = np.full(compliance.shape, np.nan)
    k_x[~singular] = np.linalg.inv(compliance[~singular])
    return k_x, singular


@dataclass(frozen=True)
class TaskSpaceView:
    """What the report draws: the path and stiffness ellipses in the plane of motion.

    Attributes
    ----------
    path : (n_samples, 2) array, m, end-effector path in plane coordinates
    sample_index : (n_ellipses,) int array, samples that carry an ellipse
    stiffness : (n_ellipses, 2, 2) array, N/m; NaN where singular
    singular : (n_ellipses,) bool
    plane : (2, 3) array, the plane's axes in the base frame
    """

    @property
    def axis_names(self) -> tuple[str, str]:
        """``"base x"`` etc. for a plane axis along a base axis, else its direction."""
        names = []
        for row in self.plane:
            along = np.flatnonzero(np.abs(row) > 1.0 - 1e-9)
            names.append(f"base {'xyz'[along[0]]}" if along.size else
                         "along (" + ", ".join(f"{c:.2f}" for c in row) + ")")
        return names[0], names[1]

    path: np.ndarray
    sample_index: np.ndarray
    stiffness: np.ndarray
    singular: np.ndarray
    plane: np.ndarray


def task_space_view(chain: ChainParams, q, stiffness, n_ellipses: int = 12) -> TaskSpaceView:
    """End-effector path of joint path ``q`` (n_samples, n_joints), rad, and the stiffness
    ellipses of joint stiffness ``stiffness`` (same shape, N*m/rad) at ``n_ellipses`` samples
    spread evenly along it."""
    q = _angles(chain, q)
    if not isinstance(n_ellipses, int) or n_ellipses < 1:
        raise InvalidInputError(f"n_ellipses = {n_ellipses!r}: expected an integer >= 1")
    position, jacobian = end_effector(chain, q)
    plane = motion_plane(chain, position)
    index = np.unique(np.linspace(0, len(q) - 1, n_ellipses).round().astype(int))
    stiffness = np.asarray(stiffness, dtype=float)
    if stiffness.shape != q.shape:
        raise InvalidInputError(f"stiffness: shape {stiffness.shape}, expected {q.shape}")
    k_x, singular = cartesian_stiffness(jacobian[index], stiffness[index], plane)
    return TaskSpaceView(position @ plane.T, index, k_x, singular, plane)
