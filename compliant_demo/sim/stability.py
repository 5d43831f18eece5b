"""Step-size stability of the fixed-step integrators on the stiffest joint setting.

The link near its stiffest, most (or least) damped state behaves like the linear oscillator
``I*ddq = -K*q - c*dq``; a fixed-step method is stable on it when the spectral radius of its
one-step matrix is at most one. Without damping that gives the familiar bounds h*omega_n < 2 for
symplectic Euler and h*omega_n < 2*sqrt(2) for classical RK4 (Hairer, Lubich, Wanner, Geometric
Numerical Integration, 2nd ed., ch. I and VII; Hairer and Wanner, Solving ODEs II, sec. IV.2).
Actuator lags add real eigenvalues -1/T. :func:`check_step_stability` finds the largest stable
step and raises :class:`UnstableStepError` stating it.
"""

from __future__ import annotations

import functools
from collections.abc import Sequence

import numpy as np

from compliant_demo.exceptions import InvalidInputError, UnstableStepError
from compliant_demo.models import JointParams
from compliant_demo.sim.mechanisms import MechanismLike, make_mechanism

__all__ = ["METHODS", "largest_stable_step", "check_step_stability"]

METHODS = ("rk4", "symplectic_euler", "explicit_euler")
_RK4_REAL_LIMIT = 2.785293563405282


def _one_step_matrices(method: str, h: np.ndarray, omega2: float, c: float) -> np.ndarray:
    """One-step matrices ``(len(h), 2, 2)`` of the method on q'' = -omega2*q - c*q'."""
    a = np.array([[0.0, 1.0], [-omega2, -c]])
    ha = h[:, None, None] * a
    if method == "rk4":
        eye = np.broadcast_to(np.eye(2), ha.shape)
        term = eye.copy()
        total = eye.copy()
        for order in range(1, 5):
            term = term @ ha / order
            total = total + term
        return total
    # symplectic (semi-implicit) Euler: velocity first, then position with the new velocity;
    # explicit Euler is checked against the same bound (it is unstable on any undamped
    # oscillator, its energy grows every step, and is kept for comparison only)
    v_gain = 1.0 - h * c
    return np.stack(
        [
            np.stack([1.0 - h**2 * omega2, h * v_gain], axis=-1),
            np.stack([-h * omega2, v_gain], axis=-1),
        ],
        axis=-2,
    )


@functools.lru_cache(maxsize=1024)
def _largest_step(method: str, omega2: float, c: float) -> float:
    """Largest h with spectral radius <= 1, by a scan then bisection (remembered: a campaign
    checks the same plant for every batch)."""
    scale = max(np.sqrt(omega2), c, 1e-12)
    grid = np.linspace(0.0, 4.0 / scale, 4001)[1:]
    radius = np.abs(np.linalg.eigvals(_one_step_matrices(method, grid, omega2, c))).max(axis=1)
    unstable = np.nonzero(radius > 1.0 + 1e-12)[0]
    if unstable.size == 0:
        return float(grid[-1])
    hi = float(grid[unstable[0]])
    lo = float(grid[unstable[0] - 1]) if unstable[0] > 0 else 0.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        r = np.abs(np.linalg.eigvals(_one_step_matrices(method, np.array([mid]), omega2, c)))
        lo, hi = (mid, hi) if r.max() <= 1.0 + 1e-12 else (lo, mid)
    return lo


def _lag_step(method: str, time_constant: float) -> float:
    # real eigenvalue -1/T: both Euler methods need h < 2T; for RK4 the real root of
    # x + x^2/2 + x^3/6 + x^4/24 = 0, x = -2.7852935634 (Hairer and Wanner, Solving ODEs II,
    # sec. IV.2, stability function of the classical RK4)
    return (_RK4_REAL_LIMIT if method == "rk4" else 2.0) * time_constant


def largest_stable_step(
    joints: Sequence[JointParams],
    mechanism: MechanismLike | Sequence[MechanismLike],
    method: str = "rk4",
    extra_stiffness: Sequence[float] | np.ndarray | None = None,
    extra_damping: Sequence[float] | np.ndarray | None = None,
) -> tuple[float, str]:
    """Largest stable step over all joints, s, and a sentence saying what limits it.

    Parameters
    ----------
    joints : joint parameters
    mechanism : mechanism record, shared or one per joint
    method : "rk4", "symplectic_euler" or "explicit_euler"
    extra_stiffness : (n_joints,) array, N*m/rad; stiffest contact besides the end stops (walls)
    extra_damping : (n_joints,) array, N*m*s/rad; damping of that contact

    Notes
    -----
    Per joint, the stiffness is the mechanism's stiffest state plus end-stop plus wall
    stiffness (all engaged at once); damping is checked at its lowest (joint viscous plus the
    mechanism's lowest) and highest (adding the mechanism's highest, the end stop, the wall and
    the slope c/v_s of the smoothed Coulomb friction) values, and at zero stiffness with the
    highest damping. Actuator lags add the real eigenvalue -1/T.
    """
    if method not in METHODS:
        raise InvalidInputError(f"method = {method!r}: expected one of {', '.join(METHODS)}")
    n = len(joints)
    kernel = make_mechanism(mechanism, n)
    wall_k = np.zeros(n) if extra_stiffness is None else np.asarray(extra_stiffness, dtype=float)
    wall_d = np.zeros(n) if extra_damping is None else np.asarray(extra_damping, dtype=float)
    k_mech = kernel.highest_stiffness(np.array([j.torque_limit for j in joints]))
    d_min, d_max = kernel.damping_range()
    best, reason = np.inf, ""
    for i, joint in enumerate(joints):
        stiffness = k_mech[i] + joint.limit_stiffness + wall_k[i]
        low_c = (joint.viscous_damping + d_min[i]) / joint.inertia
        high_c = (
            joint.viscous_damping
            + d_max[i]
            + joint.limit_damping
            + wall_d[i]
            + joint.coulomb_friction / joint.friction_smoothing_velocity
        ) / joint.inertia
        omega2 = stiffness / joint.inertia
        for omega2_case, c in ((omega2, low_c), (omega2, high_c), (0.0, high_c)):
            h = _largest_step(method, omega2_case, c)
            if h < best:
                best = h
                reason = (
                    f"joint {joint.name!r}: stiffness {omega2_case * joint.inertia:.6g} N*m/rad "
                    f"(mechanism {k_mech[i]:.6g} + end stop {joint.limit_stiffness:.6g} + wall "
                    f"{wall_k[i]:.6g}), inertia {joint.inertia:.6g} kg*m^2, damping "
                    f"{c * joint.inertia:.6g} N*m*s/rad, omega_n = {np.sqrt(omega2_case):.6g} "
                    f"rad/s, h*omega_n limit {h * np.sqrt(omega2_case):.4g}"
                )
        lag = _lag_step(method, float(kernel.time_constant[i, 0]))
        if lag < best:
            best = lag
            reason = (
                f"joint {joint.name!r}: actuator time constant "
                f"{float(kernel.time_constant[i, 0]):.6g} s"
            )
    return float(best), reason


def check_step_stability(
    joints: Sequence[JointParams],
    mechanism: MechanismLike | Sequence[MechanismLike],
    dt: float,
    method: str = "rk4",
    extra_stiffness: Sequence[float] | np.ndarray | None = None,
    extra_damping: Sequence[float] | np.ndarray | None = None,
) -> float:
    """Raise :class:`UnstableStepError` if ``dt`` is above the largest stable step; return it.

    Returns
    -------
    float
        The largest stable step, s (see :func:`largest_stable_step`).
    """
    if not np.isfinite(dt) or dt <= 0:
        raise InvalidInputError(f"dt = {dt!r}: expected a positive, finite step in s")
    bound, reason = largest_stable_step(joints, mechanism, method, extra_stiffness, extra_damping)
    if dt > bound:
        raise UnstableStepError(
            f"dt = {dt:.6g} s is above the largest stable step {bound:.6g} s for method "
            f"{method!r}; {reason}"
        )
    return bound
