"""Stability of a joint whose stiffness and damping vary along a path.

Two views of the deviation dynamics I*e'' + d(t)*e' + k(t)*e = 0 of each joint about its path, with
k the mechanism's stiffness plus the gravity stiffness dtau_g/dq there: the damping ratio with the
gravity term (and where k is not positive, the joint cannot hold the path statically at all), and
the sufficient condition of Kronander and Billard for stability when k and d vary in time.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from compliant_demo.models import ChainParams, JointParams
from compliant_demo.sim import GRAVITY
from compliant_demo.sim.rigid_body import ChainKernel

__all__ = ["gravity_stiffness", "damping_ratio", "common_alpha"]

# Central-difference step for the chain's gravity gradient, rad: truncation ~ h^2 * g''' and
# rounding ~ eps * |g| / h balance near 1e-5 for torques of order 1 to 100 N*m (common practice).
_GRADIENT_STEP = 1e-5


def gravity_stiffness(
    joints: Sequence[JointParams], position: NDArray[np.float64], chain: ChainParams | None = None
) -> NDArray[np.float64]:
    """Gravity stiffness dtau_g/dq of each joint along a path, (n_samples, n_joints), N*m/rad.

    Parameters
    ----------
    joints : JointParams per column
    position : (n_samples, n_joints) rad
    chain : the coupled arm of the joints, or None (independent joints)

    Notes
    -----
    tau_g is the gravity torque in the equation of motion I*q'' + tau_g(q) + ... = tau, i.e. the
    torque the spring must supply to hold the link. Its slope adds to the spring's stiffness in
    the linearised dynamics: positive where gravity pulls the link back (a pendulum hanging below
    its axis, m*g*l*cos(q - q_g) > 0), negative where it pulls the link further away (above the
    axis). Independent joint: tau_g = m*g*l*sin(q - q_g), so dtau_g/dq = m*g*l*cos(q - q_g). On a
    chain, the diagonal of the Jacobian of g(q) by central differences: joint j's own gravity
    stiffness with the other joints held.
    """
    q = np.asarray(position, dtype=float)
    if chain is None:
        mgl = np.array([j.gravity_mass * GRAVITY * j.com_distance for j in joints])
        offset = np.array([j.gravity_offset for j in joints])
        return np.asarray(mgl * np.cos(q - offset))
    kernel = ChainKernel(chain)
    zeros = np.zeros_like(q.T)
    slope = np.empty_like(q)
    for j in range(q.shape[1]):
        step = np.zeros(q.shape[1])
        step[j] = _GRADIENT_STEP
        above = kernel.inverse((q + step).T, zeros, zeros)[j]
        below = kernel.inverse((q - step).T, zeros, zeros)[j]
        slope[:, j] = (above - below) / (2.0 * _GRADIENT_STEP)
    return slope


def damping_ratio(
    damping: NDArray[np.float64], stiffness: NDArray[np.float64], inertia: NDArray[np.float64]
) -> NDArray[np.float64]:
    """zeta = d / (2*sqrt(k*I)), 1; NaN where k <= 0 (no oscillator: statically unstable).

    Parameters
    ----------
    damping : N*m*s/rad; stiffness : N*m/rad (spring plus gravity stiffness); inertia : kg*m^2;
        broadcastable arrays

    Notes
    -----
    The ratio of I*e'' + d*e' + k*e = 0 (common practice).
    """
    k = np.asarray(stiffness, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.asarray(damping, dtype=float) / (2.0 * np.sqrt(np.where(k > 0, k, np.nan)
                                                                  * inertia))
    return np.asarray(ratio)


def common_alpha(
    t: NDArray[np.float64],
    inertia: NDArray[np.float64],
    stiffness: NDArray[np.float64],
    damping: NDArray[np.float64],
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Kronander and Billard's sufficient condition for stability with varying k(t) and d(t).

    Parameters
    ----------
    t : (n_samples,) s
    inertia : (n_samples, n_joints) or (n_joints,) kg*m^2
    stiffness : (n_samples, n_joints) N*m/rad
    damping : (n_samples, n_joints) N*m*s/rad

    Returns
    -------
    alpha : (n_joints,) 1/s; per joint, the alpha that satisfies the condition at the most samples
        (NaN when no sample admits any)
    lower, upper : (n_samples, n_joints) 1/s; at each sample the condition holds exactly for
        alpha in the open interval (lower, upper) (empty where lower >= upper)

    Notes
    -----
    Kronander and Billard ("Stability considerations for variable impedance control", IEEE T-RO
    2016; equation numbers not checked here, from memory) show that m*e'' + d(t)*e' + k(t)*e = 0
    is stable if one constant alpha > 0 gives, at all times,

        d(t) - alpha*m > 0   and   dk/dt + alpha*dd/dt - 2*alpha*k(t) < 0.

    Derivation (checked here): with V = 1/2*m*(e' + alpha*e)^2 + 1/2*(k + alpha*d - alpha^2*m)*e^2,
    positive when k >= 0 and d > alpha*m, the cross terms cancel and
    dV/dt = -(d - alpha*m)*e'^2 + 1/2*(dk/dt + alpha*dd/dt - 2*alpha*k)*e^2 < 0. Constant k and d
    admit an alpha exactly when k > 0 and d > 0, the Routh-Hurwitz condition of the oscillator.
    Per sample, with a = dd/dt - 2*k and b = -dk/dt, the second inequality reads alpha*a < b, so
    alpha > b/a where a < 0 and alpha < b/a where a > 0 (a = 0 needs b > 0). The condition wants
    one alpha for the whole schedule: this function takes the alpha inside the most per-sample
    intervals, and the samples whose interval misses it are where stability is not shown. The
    inertia is the joint's own (diagonal of M(q) on a chain), evaluated where the path is; the
    derivation takes it constant.
    """
    k = np.asarray(stiffness, dtype=float)
    d = np.asarray(damping, dtype=float)
    m = np.broadcast_to(np.asarray(inertia, dtype=float), k.shape)
    k_rate = _rate(k, t)
    d_rate = _rate(d, t)
    a = d_rate - 2.0 * k
    b = -k_rate
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = b / a
    lower = np.where(a < 0, np.maximum(ratio, 0.0), 0.0)
    upper = np.where(a > 0, np.minimum(ratio, d / m), d / m)
    # a == 0: the second inequality is b > 0, free of alpha; if not, no alpha > 0 works
    upper = np.where((a == 0) & ~(b > 0), 0.0, upper)
    alpha = np.array([_most_covered(lower[:, j], upper[:, j]) for j in range(k.shape[1])])
    return alpha, lower, upper


def _rate(values: NDArray[np.float64], t: NDArray[np.float64]) -> NDArray[np.float64]:
    """d(values)/dt per column, with rounding noise of a constant stretch set to exactly zero.

    np.gradient on unevenly rounded time steps leaves rates of order eps*|x|/dt where x is
    constant; the condition's boundary cases (constant k, d) need them to be zero. Rates within a
    thousand times that are taken as zero (common practice).
    """
    rate = np.gradient(values, t, axis=0)
    noise = 1e3 * np.finfo(float).eps * np.abs(values).max(axis=0) / np.diff(t).min()
    return np.where(np.abs(rate) <= noise, 0.0, rate)


def _most_covered(lower: NDArray[np.float64], upper: NDArray[np.float64]) -> float:
    """A point inside the most open intervals (lower, upper); NaN when every one is empty.

    The count is constant between consecutive endpoints, so the midpoints of those gaps are the
    only candidates (an interval sweep, common practice).
    """
    valid = lower < upper
    if not valid.any():
        return float("nan")
    low, high = np.sort(lower[valid]), np.sort(upper[valid])
    ends = np.unique(np.concatenate([low, high]))
    middles = 0.5 * (ends[:-1] + ends[1:])
    count = (np.searchsorted(low, middles, side="left")
             - np.searchsorted(high, middles, side="right"))
    return float(middles[int(np.argmax(count))])
