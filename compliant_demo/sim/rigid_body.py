"""Coupled rigid-body dynamics of a serial arm, compiled and batched over scenarios.

A :class:`ChainKernel` holds a chain's constant arrays (the model); its methods take joint-major
``(n_joints, n_scenarios)`` arrays (the data) and run compiled loops, parallel over scenarios.
Per scenario, inverse dynamics is the recursive Newton-Euler algorithm (Luh, Walker, Paul,
J. Dyn. Sys. Meas. Control 102, 1980; Craig, Introduction to Robotics, 3rd ed., sec. 6.5, from
memory), gravity entering as an upward acceleration of the base; the mass matrix is the
composite-rigid-body algorithm (Walker and Orin, J. Dyn. Sys. Meas. Control 104, 1982;
Featherstone, Rigid Body Dynamics Algorithms, 2008, ch. 6, from memory); forward dynamics solves
``M(q) qdd = tau - h(q, dq)`` by Cholesky. Held joints are locked: their rows and columns leave
the system and their acceleration is zero. The tests check every function against Pinocchio.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numba
import numpy as np

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import ChainParams, JointParams

__all__ = ["ChainKernel", "chain_kernel", "apparent_inertia"]



@numba.njit(cache=True, nogil=True)
def _cross(a0, a1, a2, b0, b1, b2):
    return a1 * b2 - a2 * b1, a2 * b0 - a0 * b2, a0 * b1 - a1 * b0


@numba.njit(cache=True, nogil=True)
def _rotations(q, s, place, axis, rot):
    """rot[i] = placement rotation of joint i times the rotation by q[i, s] about its axis."""
    n = q.shape[0]
    for i in range(n):
        c, sn = math.cos(q[i, s]), math.sin(q[i, s])
        k0, k1, k2 = axis[i, 0], axis[i, 1], axis[i, 2]
        t = 1.0 - c
        # Rodrigues' formula: c*I + sin*[k]x + (1 - c)*k*k^T
        r00, r01, r02 = c + t * k0 * k0, t * k0 * k1 - sn * k2, t * k0 * k2 + sn * k1
        r10, r11, r12 = t * k1 * k0 + sn * k2, c + t * k1 * k1, t * k1 * k2 - sn * k0
        r20, r21, r22 = t * k2 * k0 - sn * k1, t * k2 * k1 + sn * k0, c + t * k2 * k2
        for a in range(3):
            p0, p1, p2 = place[i, a, 0], place[i, a, 1], place[i, a, 2]
            rot[i, a, 0] = p0 * r00 + p1 * r10 + p2 * r20
            rot[i, a, 1] = p0 * r01 + p1 * r11 + p2 * r21
            rot[i, a, 2] = p0 * r02 + p1 * r12 + p2 * r22


@numba.njit(cache=True, nogil=True)
def _rnea(dq, ddq, gravity_on, rot, pos, axis, mass, com, inertia, gravity, work, tau):
    """Joint torques tau (n,) at velocities dq (n,) and accelerations ddq (n,); rot from
    _rotations at the angles. work : (n, 6) scratch, force and moment of each subtree."""
    n = dq.shape[0]
    w0 = w1 = w2 = 0.0
    dw0 = dw1 = dw2 = 0.0
    a0 = a1 = a2 = 0.0
    if gravity_on:
        a0, a1, a2 = -gravity[0], -gravity[1], -gravity[2]
    for i in range(n):
        p0, p1, p2 = pos[i, 0], pos[i, 1], pos[i, 2]
        # parent's point at the joint origin, in the parent frame
        c0, c1, c2 = _cross(dw0, dw1, dw2, p0, p1, p2)
        e0, e1, e2 = _cross(w0, w1, w2, p0, p1, p2)
        f0, f1, f2 = _cross(w0, w1, w2, e0, e1, e2)
        b0, b1, b2 = a0 + c0 + f0, a1 + c1 + f1, a2 + c2 + f2
        # rotate into the child frame (R^T x)
        r = rot[i]
        a0 = r[0, 0] * b0 + r[1, 0] * b1 + r[2, 0] * b2
        a1 = r[0, 1] * b0 + r[1, 1] * b1 + r[2, 1] * b2
        a2 = r[0, 2] * b0 + r[1, 2] * b1 + r[2, 2] * b2
        u0 = r[0, 0] * w0 + r[1, 0] * w1 + r[2, 0] * w2
        u1 = r[0, 1] * w0 + r[1, 1] * w1 + r[2, 1] * w2
        u2 = r[0, 2] * w0 + r[1, 2] * w1 + r[2, 2] * w2
        v0 = r[0, 0] * dw0 + r[1, 0] * dw1 + r[2, 0] * dw2
        v1 = r[0, 1] * dw0 + r[1, 1] * dw1 + r[2, 1] * dw2
        v2 = r[0, 2] * dw0 + r[1, 2] * dw1 + r[2, 2] * dw2
        k0, k1, k2 = axis[i, 0], axis[i, 1], axis[i, 2]
        qd, qdd = dq[i], ddq[i]
        x0, x1, x2 = _cross(u0, u1, u2, k0 * qd, k1 * qd, k2 * qd)
        w0, w1, w2 = u0 + k0 * qd, u1 + k1 * qd, u2 + k2 * qd
        dw0, dw1, dw2 = v0 + k0 * qdd + x0, v1 + k1 * qdd + x1, v2 + k2 * qdd + x2
        # acceleration of the centre of mass, force and moment about it
        m = mass[i]
        cc0, cc1, cc2 = com[i, 0], com[i, 1], com[i, 2]
        c0, c1, c2 = _cross(dw0, dw1, dw2, cc0, cc1, cc2)
        e0, e1, e2 = _cross(w0, w1, w2, cc0, cc1, cc2)
        f0, f1, f2 = _cross(w0, w1, w2, e0, e1, e2)
        fx, fy, fz = m * (a0 + c0 + f0), m * (a1 + c1 + f1), m * (a2 + c2 + f2)
        ii = inertia[i]
        h0 = ii[0, 0] * w0 + ii[0, 1] * w1 + ii[0, 2] * w2
        h1 = ii[1, 0] * w0 + ii[1, 1] * w1 + ii[1, 2] * w2
        h2 = ii[2, 0] * w0 + ii[2, 1] * w1 + ii[2, 2] * w2
        g0, g1, g2 = _cross(w0, w1, w2, h0, h1, h2)
        m0 = ii[0, 0] * dw0 + ii[0, 1] * dw1 + ii[0, 2] * dw2 + g0
        m1 = ii[1, 0] * dw0 + ii[1, 1] * dw1 + ii[1, 2] * dw2 + g1
        m2 = ii[2, 0] * dw0 + ii[2, 1] * dw1 + ii[2, 2] * dw2 + g2
        # moment about the joint origin
        l0, l1, l2 = _cross(cc0, cc1, cc2, fx, fy, fz)
        work[i, 0], work[i, 1], work[i, 2] = fx, fy, fz
        work[i, 3], work[i, 4], work[i, 5] = m0 + l0, m1 + l1, m2 + l2
    # backward: add each child's force and moment, carried into the parent frame
    for i in range(n - 1, -1, -1):
        if i + 1 < n:
            r = rot[i + 1]
            cf0, cf1, cf2 = work[i + 1, 0], work[i + 1, 1], work[i + 1, 2]
            cn0, cn1, cn2 = work[i + 1, 3], work[i + 1, 4], work[i + 1, 5]
            f0 = r[0, 0] * cf0 + r[0, 1] * cf1 + r[0, 2] * cf2
            f1 = r[1, 0] * cf0 + r[1, 1] * cf1 + r[1, 2] * cf2
            f2 = r[2, 0] * cf0 + r[2, 1] * cf1 + r[2, 2] * cf2
            l0, l1, l2 = _cross(pos[i + 1, 0], pos[i + 1, 1], pos[i + 1, 2], f0, f1, f2)
            work[i, 0] += f0
            work[i, 1] += f1
            work[i, 2] += f2
            work[i, 3] += r[0, 0] * cn0 + r[0, 1] * cn1 + r[0, 2] * cn2 + l0
            work[i, 4] += r[1, 0] * cn0 + r[1, 1] * cn1 + r[1, 2] * cn2 + l1
            work[i, 5] += r[2, 0] * cn0 + r[2, 1] * cn1 + r[2, 2] * cn2 + l2
        tau[i] = axis[i, 0] * work[i, 3] + axis[i, 1] * work[i, 4] + axis[i, 2] * work[i, 5]


@numba.njit(cache=True, nogil=True)
def _crba(rot, pos, axis, mass, com, inertia, comp, mm):
    """Mass matrix mm (n, n) from rot; comp (n, 13) scratch: mass, first moment, 3x3 inertia
    about the joint origin of each subtree, in its joint frame."""
    n = rot.shape[0]
    for i in range(n):
        m = mass[i]
        c0, c1, c2 = com[i, 0], com[i, 1], com[i, 2]
        comp[i, 0] = m
        comp[i, 1], comp[i, 2], comp[i, 3] = m * c0, m * c1, m * c2
        cc = c0 * c0 + c1 * c1 + c2 * c2
        cv = (c0, c1, c2)
        for a in range(3):
            for b in range(3):
                # parallel axis: I_c + m*(|c|^2 * 1 - c c^T)
                comp[i, 4 + 3 * a + b] = inertia[i, a, b] + m * (
                    (cc if a == b else 0.0) - cv[a] * cv[b])
    for i in range(n - 1, 0, -1):
        # carry subtree i into frame i - 1: h' = R h, I' = R I R^T, then shift to origin i - 1
        r = rot[i]
        m = comp[i, 0]
        hx, hy, hz = comp[i, 1], comp[i, 2], comp[i, 3]
        h0 = r[0, 0] * hx + r[0, 1] * hy + r[0, 2] * hz
        h1 = r[1, 0] * hx + r[1, 1] * hy + r[1, 2] * hz
        h2 = r[2, 0] * hx + r[2, 1] * hy + r[2, 2] * hz
        p = (pos[i, 0], pos[i, 1], pos[i, 2])
        h = (h0, h1, h2)
        pp = p[0] * p[0] + p[1] * p[1] + p[2] * p[2]
        ph = p[0] * h0 + p[1] * h1 + p[2] * h2
        for a in range(3):
            for b in range(3):
                rir = 0.0
                for c in range(3):
                    row = 0.0
                    for d in range(3):
                        row += comp[i, 4 + 3 * c + d] * r[b, d]
                    rir += r[a, c] * row
                # -m[p]x[p]x - [p]x[h]x - [h]x[p]x, with [u]x[v]x = v u^T - (u.v) 1
                shift = m * ((pp if a == b else 0.0) - p[a] * p[b])
                shift += 2.0 * (ph if a == b else 0.0) - h[a] * p[b] - p[a] * h[b]
                comp[i - 1, 4 + 3 * a + b] += rir + shift
        comp[i - 1, 0] += m
        comp[i - 1, 1] += m * p[0] + h0
        comp[i - 1, 2] += m * p[1] + h1
        comp[i - 1, 3] += m * p[2] + h2
    for i in range(n):
        k0, k1, k2 = axis[i, 0], axis[i, 1], axis[i, 2]
        # force and moment (about origin i) of subtree i under a unit acceleration of joint i
        f0, f1, f2 = _cross(k0, k1, k2, comp[i, 1], comp[i, 2], comp[i, 3])
        n0 = comp[i, 4] * k0 + comp[i, 5] * k1 + comp[i, 6] * k2
        n1 = comp[i, 7] * k0 + comp[i, 8] * k1 + comp[i, 9] * k2
        n2 = comp[i, 10] * k0 + comp[i, 11] * k1 + comp[i, 12] * k2
        mm[i, i] = k0 * n0 + k1 * n1 + k2 * n2
        for j in range(i - 1, -1, -1):
            r = rot[j + 1]
            g0 = r[0, 0] * f0 + r[0, 1] * f1 + r[0, 2] * f2
            g1 = r[1, 0] * f0 + r[1, 1] * f1 + r[1, 2] * f2
            g2 = r[2, 0] * f0 + r[2, 1] * f1 + r[2, 2] * f2
            l0, l1, l2 = _cross(pos[j + 1, 0], pos[j + 1, 1], pos[j + 1, 2], g0, g1, g2)
            e0 = r[0, 0] * n0 + r[0, 1] * n1 + r[0, 2] * n2 + l0
            e1 = r[1, 0] * n0 + r[1, 1] * n1 + r[1, 2] * n2 + l1
            e2 = r[2, 0] * n0 + r[2, 1] * n1 + r[2, 2] * n2 + l2
            f0, f1, f2, n0, n1, n2 = g0, g1, g2, e0, e1, e2
            value = axis[j, 0] * n0 + axis[j, 1] * n1 + axis[j, 2] * n2
            mm[i, j] = value
            mm[j, i] = value


@numba.njit(cache=True, nogil=True)
def _solve_locked(mm, rhs, free, s, out):
    """Solve mm x = rhs over the free joints (free[i, s] != 0), x = 0 on locked ones, in place
    by Cholesky (mm is symmetric positive definite); writes out[:, s]."""
    n = mm.shape[0]
    for i in range(n):
        if free[i, s] == 0.0:
            for j in range(n):
                mm[i, j] = 0.0
                mm[j, i] = 0.0
            mm[i, i] = 1.0
            rhs[i] = 0.0
    for j in range(n):
        d = mm[j, j]
        for k in range(j):
            d -= mm[j, k] * mm[j, k]
        d = math.sqrt(d)
        mm[j, j] = d
        for i in range(j + 1, n):
            v = mm[i, j]
            for k in range(j):
                v -= mm[i, k] * mm[j, k]
            mm[i, j] = v / d
    for i in range(n):
        v = rhs[i]
        for k in range(i):
            v -= mm[i, k] * rhs[k]
        rhs[i] = v / mm[i, i]
    for i in range(n - 1, -1, -1):
        v = rhs[i]
        for k in range(i + 1, n):
            v -= mm[k, i] * rhs[k]
        rhs[i] = v / mm[i, i]
    for i in range(n):
        out[i, s] = rhs[i]


@numba.njit(cache=True, nogil=True, parallel=True)
def _forward_batch(q, dq, tau, free, place, pos, axis, mass, com, inertia, gravity, rot, work,
                   comp, mm, vec, out):
    n, n_scen = q.shape
    zero = np.zeros(n)
    for s in numba.prange(n_scen):
        _rotations(q, s, place, axis, rot[s])
        _rnea(dq[:, s], zero, True, rot[s], pos, axis, mass, com, inertia, gravity, work[s],
              vec[s])
        for i in range(n):
            vec[s, i] = tau[i, s] - vec[s, i]
        _crba(rot[s], pos, axis, mass, com, inertia, comp[s], mm[s])
        _solve_locked(mm[s], vec[s], free, s, out)


@numba.njit(cache=True, nogil=True, parallel=True)
def _inverse_batch(q, dq, ddq, gravity_on, place, pos, axis, mass, com, inertia, gravity, rot,
                   work, vec, out):
    n, n_scen = q.shape
    for s in numba.prange(n_scen):
        _rotations(q, s, place, axis, rot[s])
        _rnea(dq[:, s], ddq[:, s], gravity_on, rot[s], pos, axis, mass, com, inertia, gravity,
              work[s], vec[s])
        for i in range(n):
            out[i, s] = vec[s, i]


@numba.njit(cache=True, nogil=True, parallel=True)
def _mass_batch(q, place, pos, axis, mass, com, inertia, rot, comp, out):
    n_scen = q.shape[1]
    for s in numba.prange(n_scen):
        _rotations(q, s, place, axis, rot[s])
        _crba(rot[s], pos, axis, mass, com, inertia, comp[s], out[s])


class ChainKernel:
    """Compiled dynamics of one chain for batches of ``(n_joints, n_scenarios)`` states.

    Parameters
    ----------
    chain : the serial arm
    """

    def __init__(self, chain: ChainParams) -> None:
        bodies = chain.bodies
        self.chain = chain
        self.n_joints = len(bodies)
        self._place = np.array([np.reshape(b.placement_rotation, (3, 3)) for b in bodies])
        self._pos = np.array([b.placement_xyz for b in bodies], dtype=float)
        self._axis = np.array([b.axis for b in bodies], dtype=float)
        self._mass = np.array([b.mass for b in bodies], dtype=float)
        self._com = np.array([b.com for b in bodies], dtype=float)
        self._inertia = np.array([
            [[b.inertia[0], b.inertia[1], b.inertia[2]],
             [b.inertia[1], b.inertia[3], b.inertia[4]],
             [b.inertia[2], b.inertia[4], b.inertia[5]]] for b in bodies])
        self._gravity = np.array(chain.gravity, dtype=float)
        self._model = (self._place, self._pos, self._axis, self._mass, self._com,
                       self._inertia)
        self._scratch: dict[int, dict[str, np.ndarray]] = {}

    def _work(self, n_scen: int) -> dict[str, np.ndarray]:
        """Per-scenario scratch arrays, one set per batch size met."""
        n = self.n_joints
        if n_scen not in self._scratch:
            self._scratch[n_scen] = {
                "rot": np.zeros((n_scen, n, 3, 3)), "work": np.zeros((n_scen, n, 6)),
                "comp": np.zeros((n_scen, n, 13)), "mm": np.zeros((n_scen, n, n)),
                "vec": np.zeros((n_scen, n)),
            }
        return self._scratch[n_scen]

    def forward(self, q: np.ndarray, dq: np.ndarray, tau: np.ndarray, free: np.ndarray,
                out: np.ndarray) -> None:
        """Joint accelerations ``M(q)^-1 (tau - h(q, dq))`` into ``out``, rad/s^2.

        q (rad), dq (rad/s), tau (N*m), free (1 free, 0 locked), out: ``(n_joints, n_scen)``.
        """
        w = self._work(q.shape[1])
        _forward_batch(q, dq, tau, free, *self._model, self._gravity, w["rot"], w["work"],
                       w["comp"], w["mm"], w["vec"], out)

    def inverse(self, q: np.ndarray, dq: np.ndarray, ddq: np.ndarray,
                gravity: bool = True) -> np.ndarray:
        """Joint torques ``M(q) ddq + C(q, dq) dq + g(q)`` (without g if not ``gravity``), N*m,
        for ``(n_joints, n_scen)`` arrays."""
        q, dq, ddq = (np.ascontiguousarray(x, dtype=float) for x in (q, dq, ddq))
        out = np.empty_like(q)
        w = self._work(q.shape[1])
        _inverse_batch(q, dq, ddq, gravity, *self._model, self._gravity, w["rot"], w["work"],
                       w["vec"], out)
        return out

    def mass_matrix(self, q: np.ndarray) -> np.ndarray:
        """Mass matrices ``(n_scen, n_joints, n_joints)``, kg*m^2, at ``(n_joints, n_scen)`` q."""
        q = np.ascontiguousarray(q, dtype=float)
        out = np.zeros((q.shape[1], self.n_joints, self.n_joints))
        w = self._work(q.shape[1])
        _mass_batch(q, *self._model, w["rot"], w["comp"], out)
        return out

    def kinetic_split(self, q: np.ndarray, dq: np.ndarray) -> np.ndarray:
        """``1/2 * dq_j * (M(q) dq)_j`` per joint, J: sums over joints to the kinetic energy."""
        momentum = self.inverse(q, np.zeros_like(q), dq, gravity=False)
        return 0.5 * dq * momentum

    def gravity_potential(self, q: np.ndarray) -> np.ndarray:
        """``-m_i g . (c_i(q) - c_i(0))`` of the link each joint moves, J, ``(n_joints, n_scen)``:
        sums over joints to the potential energy, zero at q = 0."""
        return self._heights(q) - self._heights(np.zeros_like(q))

    def _heights(self, q: np.ndarray) -> np.ndarray:
        n, n_scen = q.shape
        rot = np.broadcast_to(np.eye(3), (n_scen, 3, 3))
        origin = np.zeros((n_scen, 3))
        out = np.empty((n, n_scen))
        for i in range(n):
            angle = q[i][:, None, None]
            k = self._axis[i]
            skew = np.array([[0, -k[2], k[1]], [k[2], 0, -k[0]], [-k[1], k[0], 0]])
            turn = (np.cos(angle) * np.eye(3) + np.sin(angle) * skew
                    + (1 - np.cos(angle)) * np.outer(k, k))
            origin = origin + rot @ self._pos[i]
            rot = rot @ self._place[i] @ turn
            centre = origin + rot @ self._com[i]
            out[i] = -self._mass[i] * (centre @ self._gravity)
        return out


def chain_kernel(chain: ChainParams, joints: Sequence[JointParams]) -> ChainKernel:
    """The compiled model of ``chain`` after checking it moves exactly ``joints`` (same names and
    order) and that they carry no gravity load of their own; InvalidInputError otherwise."""
    names = tuple(j.name for j in joints)
    if chain.joint_names != names:
        raise InvalidInputError(
            f"chain: joints {list(chain.joint_names)} differ from the simulated joints "
            f"{list(names)} (same names in the same order)"
        )
    loaded = [j.name for j in joints if j.gravity_mass * j.com_distance > 0]
    if loaded:
        raise InvalidInputError(
            f"joints {loaded}: gravity_mass and com_distance must be 0 with a chain (its links "
            "carry the gravity load)"
        )
    return ChainKernel(chain)


def apparent_inertia(joints: Sequence[JointParams], kernel: ChainKernel) -> list[JointParams]:
    """Joints with the smallest apparent inertia ``1 / (M^-1)_jj`` over their range (64 seeded
    configurations and the zero one): the stiffest a step of the coupled arm can meet."""
    rng = np.random.default_rng(0)
    lower = np.array([[j.lower_limit] for j in joints])
    upper = np.array([[j.upper_limit] for j in joints])
    q = lower + (upper - lower) * rng.random((len(joints), 64))
    q = np.concatenate([np.zeros((len(joints), 1)), q], axis=1)
    apparent = 1.0 / np.linalg.inv(kernel.mass_matrix(q)).diagonal(axis1=1, axis2=2).max(axis=0)
    return [j.model_copy(update={"inertia": float(a)}) for j, a in zip(joints, apparent,
                                                                        strict=True)]
