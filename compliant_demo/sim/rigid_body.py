"""Coupled rigid-body dynamics of a serial arm, compiled and batched over scenarios.

A :class:`ChainKernel` holds a chain's constant arrays (the model); its methods take joint-major
``(n_joints, n_scenarios)`` arrays (the data) and run compiled loops, parallel over scenarios.
Per scenario, inverse dynamics is the recursive Newton-Euler algorithm (Luh, Walker, Paul,
J. Dyn. Sys. Meas. Control 102, 1980; Craig, Introduction to Robotics, 3rd ed., sec. 6.5, from
memory), gravity entering as an upward acceleration of the base; the mass matrix is the
composite-rigid-body algorithm (Walker and Orin, J. Dyn. Sys. Meas. Control 104, 1982;
Featherstone, Rigid Body Dynamics Algorithms, 2008, ch. 6, from memory); forward dynamics solves
``M(q) qdd = tau - h(q, dq)`` by Cholesky. Held joints are locked: their rows and columns leave
the system and their acceleration is zero. Scenarios are processed in blocks laid out
scenario-last, so each arithmetic loop runs over the scenarios of a block and compiles to SIMD
instructions (``fastmath`` lets the compiler fuse multiply-adds; the block kernels are compiled
with their array arguments declared non-overlapping, see ``_DistinctArgumentsCompiler``); on
request
(``ChainKernel(parallel=True)``) blocks run in parallel over the cores (``numba.prange``). The
tests check every function against Pinocchio.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numba
import numpy as np
from numba.core.compiler import CompilerBase, DefaultPassBuilder

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import ChainParams, JointParams

__all__ = ["ChainKernel", "chain_kernel", "apparent_inertia"]



# Scenarios go through in blocks: every loop over a block's scenarios is the innermost one, so
# the compiler vectorises it (one SIMD lane per scenario); blocks run in parallel.
_BLOCK = 128
_kernel = numba.njit(cache=True, nogil=True, error_model="numpy", fastmath=True)


class _DistinctArgumentsCompiler(CompilerBase):
    """numba's nopython pipeline with every argument's memory declared not to overlap any
    other's (LLVM ``noalias``): without it the compiler must assume a store through one array
    may change what another reads, and keeps the block loops scalar (about seven times slower
    here). Only for functions that are never given two overlapping arrays of which one is
    written."""

    def define_pipelines(self):
        self.state.flags.noalias = True
        return [DefaultPassBuilder.define_nopython_pipeline(self.state)]


_vector_kernel = numba.njit(cache=True, nogil=True, error_model="numpy", fastmath=True,
                            pipeline_class=_DistinctArgumentsCompiler)
_parallel_kernel = numba.njit(cache=True, nogil=True, error_model="numpy", fastmath=True,
                              parallel=True)


# sin and cos in a form the compiler vectorises (libm's are opaque calls): Cody-Waite reduction by
# pi/2 and the fdlibm kernel polynomials on [-pi/4, pi/4] (Sun Microsystems' fdlibm, k_sin.c and
# k_cos.c coefficients; about one ulp there)
_PIO2_HI, _PIO2_LO = 1.57079632673412561417e+00, 6.07710050650619224932e-11
_S = (-1.66666666666666324348e-01, 8.33333333332248946124e-03, -1.98412698298579493134e-04,
      2.75573137070700676789e-06, -2.50507602534068634195e-08, 1.58969099521155010221e-10)
_C = (4.16666666666666019037e-02, -1.38888888888741095749e-03, 2.48015872894767294178e-05,
      -2.75573143513906633035e-07, 2.08757232129817482790e-09, -1.13596475577881948265e-11)


@_kernel
def _sincos(x):
    turns = np.rint(x * (2.0 / math.pi))
    r = (x - turns * _PIO2_HI) - turns * _PIO2_LO
    z = r * r
    sine = r + r * z * (_S[0] + z * (_S[1] + z * (_S[2] + z * (_S[3] + z * (_S[4] + z * _S[5])))))
    cosine = 1.0 - 0.5 * z + z * z * (_C[0] + z * (_C[1] + z * (_C[2] + z * (_C[3] + z * (
        _C[4] + z * _C[5])))))
    quadrant = np.int64(turns) & 3
    odd = float(quadrant & 1)  # a blend, not a branch, keeps the loop vectorisable
    s_sign = 1.0 - 2.0 * ((quadrant >> 1) & 1)
    c_sign = 1.0 - 2.0 * (((quadrant + 1) >> 1) & 1)
    return (s_sign * (odd * cosine + (1.0 - odd) * sine),
            c_sign * (odd * sine + (1.0 - odd) * cosine))


@_kernel
def _lane(s0, k):
    """Scenario s0 + k of a block as an unsigned index: numba then leaves out the wrap-around of
    negative indices, which would turn a vectorised loop's loads and stores into gathers and
    scatters."""
    return np.uint64(s0) + np.uint64(k)


# Every loop over a block's scenarios reads one- or two-dimensional views taken outside it and
# writes into one array that it does not read at another index (values carried from joint to
# joint go back and forth between two scratch arrays), and holds no branch: otherwise the
# compiler cannot rule out that a store changes a later load, and keeps the loop scalar.


@_vector_kernel
def _block_rotations(q, s0, nb, place, axis, rot):
    """rot[i, 3*a + b, k] for scenarios s0 + k, k < nb."""
    n = q.shape[0]
    for i in range(n):
        k0, k1, k2 = axis[i, 0], axis[i, 1], axis[i, 2]
        qi = q[i, s0:s0 + nb]
        r = rot[i]
        for k in range(nb):
            sn, c = _sincos(qi[k])
            t = 1.0 - c
            r[0, k], r[1, k] = c + t * k0 * k0, t * k0 * k1 - sn * k2
            r[2, k], r[3, k] = t * k0 * k2 + sn * k1, t * k1 * k0 + sn * k2
            r[4, k], r[5, k] = c + t * k1 * k1, t * k1 * k2 - sn * k0
            r[6, k], r[7, k] = t * k2 * k0 - sn * k1, t * k2 * k1 + sn * k0
            r[8, k] = c + t * k2 * k2
        p = place[i]
        # most URDF joints sit unrotated in their parent: the product with I is skipped (it
        # would give the same numbers)
        if (p[0, 0] == 1.0 and p[1, 1] == 1.0 and p[2, 2] == 1.0 and p[0, 1] == 0.0
                and p[0, 2] == 0.0 and p[1, 0] == 0.0 and p[1, 2] == 0.0 and p[2, 0] == 0.0
                and p[2, 1] == 0.0):
            continue
        p00, p01, p02 = p[0, 0], p[0, 1], p[0, 2]
        p10, p11, p12 = p[1, 0], p[1, 1], p[1, 2]
        p20, p21, p22 = p[2, 0], p[2, 1], p[2, 2]
        for k in range(nb):
            r00, r01, r02 = r[0, k], r[1, k], r[2, k]
            r10, r11, r12 = r[3, k], r[4, k], r[5, k]
            r20, r21, r22 = r[6, k], r[7, k], r[8, k]
            r[0, k] = p00 * r00 + p01 * r10 + p02 * r20
            r[1, k] = p00 * r01 + p01 * r11 + p02 * r21
            r[2, k] = p00 * r02 + p01 * r12 + p02 * r22
            r[3, k] = p10 * r00 + p11 * r10 + p12 * r20
            r[4, k] = p10 * r01 + p11 * r11 + p12 * r21
            r[5, k] = p10 * r02 + p11 * r12 + p12 * r22
            r[6, k] = p20 * r00 + p21 * r10 + p22 * r20
            r[7, k] = p20 * r01 + p21 * r11 + p22 * r21
            r[8, k] = p20 * r02 + p21 * r12 + p22 * r22


@_vector_kernel
def _block_rnea(dq, ddq, s0, nb, gravity_on, rot, pos, axis, mass, com, inertia, gravity, sa,
                fm, sb, tau):
    """tau[i, k] = inverse dynamics of scenarios s0 + k at (rot, dq, ddq); sa, sb (15, B) and
    fm (n, 15, B) scratch.

    fm[i] holds link i's force and moment about its joint origin (rows 0-5) and its angular
    velocity, angular acceleration and the acceleration of its origin (rows 6-14), frame i."""
    n = dq.shape[0]
    g0, g1, g2 = (-gravity[0], -gravity[1], -gravity[2]) if gravity_on else (0.0, 0.0, 0.0)
    for c in range(6):
        sa[c, :nb] = 0.0
    sa[6, :nb], sa[7, :nb], sa[8, :nb] = g0, g1, g2
    for i in range(n):
        p0, p1, p2 = pos[i, 0], pos[i, 1], pos[i, 2]
        k0, k1, k2 = axis[i, 0], axis[i, 1], axis[i, 2]
        m = mass[i]
        cc0, cc1, cc2 = com[i, 0], com[i, 1], com[i, 2]
        i00, i01, i02 = inertia[i, 0, 0], inertia[i, 0, 1], inertia[i, 0, 2]
        i11, i12, i22 = inertia[i, 1, 1], inertia[i, 1, 2], inertia[i, 2, 2]
        r = rot[i]
        f = fm[i]
        dqi = dq[i, s0:s0 + nb]
        ddqi = ddq[i, s0:s0 + nb]
        for k in range(nb):
            w0, w1, w2 = sa[0, k], sa[1, k], sa[2, k]
            dw0, dw1, dw2 = sa[3, k], sa[4, k], sa[5, k]
            a0, a1, a2 = sa[6, k], sa[7, k], sa[8, k]
            # parent's point at the joint origin
            e0 = w1 * p2 - w2 * p1
            e1 = w2 * p0 - w0 * p2
            e2 = w0 * p1 - w1 * p0
            b0 = a0 + dw1 * p2 - dw2 * p1 + w1 * e2 - w2 * e1
            b1 = a1 + dw2 * p0 - dw0 * p2 + w2 * e0 - w0 * e2
            b2 = a2 + dw0 * p1 - dw1 * p0 + w0 * e1 - w1 * e0
            r00, r01, r02 = r[0, k], r[1, k], r[2, k]
            r10, r11, r12 = r[3, k], r[4, k], r[5, k]
            r20, r21, r22 = r[6, k], r[7, k], r[8, k]
            a0 = r00 * b0 + r10 * b1 + r20 * b2
            a1 = r01 * b0 + r11 * b1 + r21 * b2
            a2 = r02 * b0 + r12 * b1 + r22 * b2
            u0 = r00 * w0 + r10 * w1 + r20 * w2
            u1 = r01 * w0 + r11 * w1 + r21 * w2
            u2 = r02 * w0 + r12 * w1 + r22 * w2
            v0 = r00 * dw0 + r10 * dw1 + r20 * dw2
            v1 = r01 * dw0 + r11 * dw1 + r21 * dw2
            v2 = r02 * dw0 + r12 * dw1 + r22 * dw2
            qd = dqi[k]
            qdd = ddqi[k]
            x0 = (u1 * k2 - u2 * k1) * qd
            x1 = (u2 * k0 - u0 * k2) * qd
            x2 = (u0 * k1 - u1 * k0) * qd
            w0, w1, w2 = u0 + k0 * qd, u1 + k1 * qd, u2 + k2 * qd
            dw0, dw1, dw2 = v0 + k0 * qdd + x0, v1 + k1 * qdd + x1, v2 + k2 * qdd + x2
            e0 = w1 * cc2 - w2 * cc1
            e1 = w2 * cc0 - w0 * cc2
            e2 = w0 * cc1 - w1 * cc0
            fx = m * (a0 + dw1 * cc2 - dw2 * cc1 + w1 * e2 - w2 * e1)
            fy = m * (a1 + dw2 * cc0 - dw0 * cc2 + w2 * e0 - w0 * e2)
            fz = m * (a2 + dw0 * cc1 - dw1 * cc0 + w0 * e1 - w1 * e0)
            h0 = i00 * w0 + i01 * w1 + i02 * w2
            h1 = i01 * w0 + i11 * w1 + i12 * w2
            h2 = i02 * w0 + i12 * w1 + i22 * w2
            f[0, k], f[1, k], f[2, k] = fx, fy, fz
            f[3, k] = (i00 * dw0 + i01 * dw1 + i02 * dw2 + w1 * h2 - w2 * h1
                       + cc1 * fz - cc2 * fy)
            f[4, k] = (i01 * dw0 + i11 * dw1 + i12 * dw2 + w2 * h0 - w0 * h2
                       + cc2 * fx - cc0 * fz)
            f[5, k] = (i02 * dw0 + i12 * dw1 + i22 * dw2 + w0 * h1 - w1 * h0
                       + cc0 * fy - cc1 * fx)
            f[6, k], f[7, k], f[8, k] = w0, w1, w2
            f[9, k], f[10, k], f[11, k] = dw0, dw1, dw2
            f[12, k], f[13, k], f[14, k] = a0, a1, a2
        _copy_rows(f, 6, sa, 9, nb)
    # sb: force and moment of the links i + 1.. on link i, frame i + 1
    for i in range(n - 1, -1, -1):
        k0, k1, k2 = axis[i, 0], axis[i, 1], axis[i, 2]
        f = fm[i]
        if i + 1 < n:
            r = rot[i + 1]
            p0, p1, p2 = pos[i + 1, 0], pos[i + 1, 1], pos[i + 1, 2]
            for k in range(nb):
                cf0, cf1, cf2 = sb[0, k], sb[1, k], sb[2, k]
                cn0, cn1, cn2 = sb[3, k], sb[4, k], sb[5, k]
                f0 = r[0, k] * cf0 + r[1, k] * cf1 + r[2, k] * cf2
                f1 = r[3, k] * cf0 + r[4, k] * cf1 + r[5, k] * cf2
                f2 = r[6, k] * cf0 + r[7, k] * cf1 + r[8, k] * cf2
                sa[0, k] = f[0, k] + f0
                sa[1, k] = f[1, k] + f1
                sa[2, k] = f[2, k] + f2
                sa[3, k] = f[3, k] + (r[0, k] * cn0 + r[1, k] * cn1 + r[2, k] * cn2
                                      + p1 * f2 - p2 * f1)
                sa[4, k] = f[4, k] + (r[3, k] * cn0 + r[4, k] * cn1 + r[5, k] * cn2
                                      + p2 * f0 - p0 * f2)
                sa[5, k] = f[5, k] + (r[6, k] * cn0 + r[7, k] * cn1 + r[8, k] * cn2
                                      + p0 * f1 - p1 * f0)
        else:
            _copy_rows(f, 0, sa, 6, nb)
        ti = tau[i]
        for k in range(nb):
            ti[k] = k0 * sa[3, k] + k1 * sa[4, k] + k2 * sa[5, k]
        _copy_rows(sa, 0, sb, 6, nb)


@_vector_kernel
def _copy_rows(src, first, dst, count, nb):
    """dst[c, :nb] = src[first + c, :nb] for c < count."""
    for c in range(count):
        row, into = src[first + c], dst[c]
        for k in range(nb):
            into[k] = row[k]


@_vector_kernel
def _block_crba(nb, rot, pos, axis, mass, com, inertia, comp, mm, sa, sb):
    """mm[i, j, k] mass matrix of scenarios k < nb; comp (n, 13, B), sa and sb (15, B) scratch.

    comp[i] is the composite body of links i.. about joint i's origin in frame i: mass, first
    moment (3) and rotational inertia (3 x 3, row-major)."""
    n = rot.shape[0]
    for i in range(n - 1, -1, -1):
        m = mass[i]
        c0, c1, c2 = com[i, 0], com[i, 1], com[i, 2]
        cc = c0 * c0 + c1 * c1 + c2 * c2
        # link i alone about its joint origin (parallel axes)
        o00 = inertia[i, 0, 0] + m * (cc - c0 * c0)
        o11 = inertia[i, 1, 1] + m * (cc - c1 * c1)
        o22 = inertia[i, 2, 2] + m * (cc - c2 * c2)
        o01 = inertia[i, 0, 1] - m * c0 * c1
        o02 = inertia[i, 0, 2] - m * c0 * c2
        o12 = inertia[i, 1, 2] - m * c1 * c2
        ci = comp[i]
        if i == n - 1:
            ci[0, :nb], ci[1, :nb], ci[2, :nb], ci[3, :nb] = m, m * c0, m * c1, m * c2
            ci[4, :nb], ci[5, :nb], ci[6, :nb] = o00, o01, o02
            ci[7, :nb], ci[8, :nb], ci[9, :nb] = o01, o11, o12
            ci[10, :nb], ci[11, :nb], ci[12, :nb] = o02, o12, o22
        else:
            # add subtree i + 1 (sa) carried into frame i: h' = R h, I' = R I R^T, then shifted
            # to origin i by m*(|p|^2 1 - p p^T) + 2 (p.h') 1 - h' p^T - p h'^T
            r = rot[i + 1]
            p0, p1, p2 = pos[i + 1, 0], pos[i + 1, 1], pos[i + 1, 2]
            pp = p0 * p0 + p1 * p1 + p2 * p2
            for k in range(nb):
                ms, h0, h1, h2 = sa[0, k], sa[1, k], sa[2, k], sa[3, k]
                r00, r01, r02 = r[0, k], r[1, k], r[2, k]
                r10, r11, r12 = r[3, k], r[4, k], r[5, k]
                r20, r21, r22 = r[6, k], r[7, k], r[8, k]
                g0 = r00 * h0 + r01 * h1 + r02 * h2
                g1 = r10 * h0 + r11 * h1 + r12 * h2
                g2 = r20 * h0 + r21 * h1 + r22 * h2
                ph2 = 2.0 * (p0 * g0 + p1 * g1 + p2 * g2)
                j00, j01, j02 = sa[4, k], sa[5, k], sa[6, k]
                j11, j12, j22 = sa[8, k], sa[9, k], sa[12, k]
                # t = R I (I symmetric), then R I R^T = t R^T
                t00 = r00 * j00 + r01 * j01 + r02 * j02
                t01 = r00 * j01 + r01 * j11 + r02 * j12
                t02 = r00 * j02 + r01 * j12 + r02 * j22
                t10 = r10 * j00 + r11 * j01 + r12 * j02
                t11 = r10 * j01 + r11 * j11 + r12 * j12
                t12 = r10 * j02 + r11 * j12 + r12 * j22
                t20 = r20 * j00 + r21 * j01 + r22 * j02
                t21 = r20 * j01 + r21 * j11 + r22 * j12
                t22 = r20 * j02 + r21 * j12 + r22 * j22
                u00 = t00 * r00 + t01 * r01 + t02 * r02 + ms * (pp - p0 * p0) + ph2 - 2.0 * g0 * p0
                u11 = t10 * r10 + t11 * r11 + t12 * r12 + ms * (pp - p1 * p1) + ph2 - 2.0 * g1 * p1
                u22 = t20 * r20 + t21 * r21 + t22 * r22 + ms * (pp - p2 * p2) + ph2 - 2.0 * g2 * p2
                u01 = t00 * r10 + t01 * r11 + t02 * r12 - ms * p0 * p1 - g0 * p1 - p0 * g1
                u02 = t00 * r20 + t01 * r21 + t02 * r22 - ms * p0 * p2 - g0 * p2 - p0 * g2
                u12 = t10 * r20 + t11 * r21 + t12 * r22 - ms * p1 * p2 - g1 * p2 - p1 * g2
                ci[0, k] = m + ms
                ci[1, k] = m * c0 + (ms * p0 + g0)
                ci[2, k] = m * c1 + (ms * p1 + g1)
                ci[3, k] = m * c2 + (ms * p2 + g2)
                ci[4, k], ci[5, k], ci[6, k] = o00 + u00, o01 + u01, o02 + u02
                ci[7, k], ci[8, k], ci[9, k] = o01 + u01, o11 + u11, o12 + u12
                ci[10, k], ci[11, k], ci[12, k] = o02 + u02, o12 + u12, o22 + u22
        _copy_rows(ci, 0, sa, 13, nb)
    for i in range(n):
        # force and moment (rows 0-5) the unit acceleration of joint i asks of subtree i, and
        # their projection on the joint's axis (row 6), carried down the chain
        k0, k1, k2 = axis[i, 0], axis[i, 1], axis[i, 2]
        ci = comp[i]
        for k in range(nb):
            hx, hy, hz = ci[1, k], ci[2, k], ci[3, k]
            sb[0, k] = k1 * hz - k2 * hy
            sb[1, k] = k2 * hx - k0 * hz
            sb[2, k] = k0 * hy - k1 * hx
            n0 = ci[4, k] * k0 + ci[5, k] * k1 + ci[6, k] * k2
            n1 = ci[7, k] * k0 + ci[8, k] * k1 + ci[9, k] * k2
            n2 = ci[10, k] * k0 + ci[11, k] * k1 + ci[12, k] * k2
            sb[3, k], sb[4, k], sb[5, k] = n0, n1, n2
            sb[6, k] = k0 * n0 + k1 * n1 + k2 * n2
        _copy_rows(sb, 6, mm[i, i:i + 1], 1, nb)
        src, dst = sb, sa
        for j in range(i - 1, -1, -1):
            r = rot[j + 1]
            p0, p1, p2 = pos[j + 1, 0], pos[j + 1, 1], pos[j + 1, 2]
            a0, a1, a2 = axis[j, 0], axis[j, 1], axis[j, 2]
            for k in range(nb):
                f0, f1, f2 = src[0, k], src[1, k], src[2, k]
                n0, n1, n2 = src[3, k], src[4, k], src[5, k]
                g0 = r[0, k] * f0 + r[1, k] * f1 + r[2, k] * f2
                g1 = r[3, k] * f0 + r[4, k] * f1 + r[5, k] * f2
                g2 = r[6, k] * f0 + r[7, k] * f1 + r[8, k] * f2
                e0 = r[0, k] * n0 + r[1, k] * n1 + r[2, k] * n2 + p1 * g2 - p2 * g1
                e1 = r[3, k] * n0 + r[4, k] * n1 + r[5, k] * n2 + p2 * g0 - p0 * g2
                e2 = r[6, k] * n0 + r[7, k] * n1 + r[8, k] * n2 + p0 * g1 - p1 * g0
                dst[0, k], dst[1, k], dst[2, k] = g0, g1, g2
                dst[3, k], dst[4, k], dst[5, k] = e0, e1, e2
                dst[6, k] = a0 * e0 + a1 * e1 + a2 * e2
            _copy_rows(dst, 6, mm[i, j:j + 1], 1, nb)
            _copy_rows(dst, 6, mm[j, i:i + 1], 1, nb)
            src, dst = dst, src


@_vector_kernel
def _block_solve(mm, rhs, free, s0, nb, out):
    """Cholesky solve of mm x = rhs per scenario over its free joints; out[:, s0 + k] = x.

    A held joint (free 0) gets the row and column of the identity and a zero right-hand side,
    as products with free (exact for 0 and 1), so no loop over scenarios branches."""
    n = mm.shape[0]
    for i in range(n):
        fi = free[i, s0:s0 + nb]
        ri = rhs[i]
        for j in range(n):
            fj = free[j, s0:s0 + nb]
            mij = mm[i, j]
            if i == j:
                for k in range(nb):
                    mij[k] = mij[k] * fi[k] + (1.0 - fi[k])
            else:
                for k in range(nb):
                    mij[k] = mij[k] * fi[k] * fj[k]
        for k in range(nb):
            ri[k] = ri[k] * fi[k]
    for j in range(n):
        djj = mm[j, j]
        for c in range(j):
            mjc = mm[j, c]
            for k in range(nb):
                djj[k] -= mjc[k] * mjc[k]
        for k in range(nb):
            djj[k] = math.sqrt(djj[k])
        for i in range(j + 1, n):
            mij = mm[i, j]
            for c in range(j):
                mic, mjc = mm[i, c], mm[j, c]
                for k in range(nb):
                    mij[k] -= mic[k] * mjc[k]
            for k in range(nb):
                mij[k] = mij[k] / djj[k]
    for i in range(n):
        ri = rhs[i]
        for c in range(i):
            mic, rc = mm[i, c], rhs[c]
            for k in range(nb):
                ri[k] -= mic[k] * rc[k]
        dii = mm[i, i]
        for k in range(nb):
            ri[k] = ri[k] / dii[k]
    for i in range(n - 1, -1, -1):
        ri = rhs[i]
        for c in range(i + 1, n):
            mci, rc = mm[c, i], rhs[c]
            for k in range(nb):
                ri[k] -= mci[k] * rc[k]
        dii = mm[i, i]
        oi = out[i, s0:s0 + nb]
        for k in range(nb):
            ri[k] = ri[k] / dii[k]
            oi[k] = ri[k]


@_kernel
def _block_forward(q, dq, tau, free, zero, s0, nb, place, pos, axis, mass, com, inertia, gravity,
                   rot, sa, fm, vec, comp, mm, sb, out):
    """out[:, s0 + k] = M^-1 (tau - h) of scenarios s0 + k, k < nb, over their free joints;
    zero is (n, n_scen) zeros, the rest (block-sized) scratch (see :func:`block_workspace`)."""
    n = q.shape[0]
    _block_rotations(q, s0, nb, place, axis, rot)
    _block_rnea(dq, zero, s0, nb, True, rot, pos, axis, mass, com, inertia, gravity, sa, fm, sb,
                vec)
    for i in range(n):
        ti, vi = tau[i, s0:s0 + nb], vec[i]
        for k in range(nb):
            vi[k] = ti[k] - vi[k]
    _block_crba(nb, rot, pos, axis, mass, com, inertia, comp, mm, sa, sb)
    _block_solve(mm, vec, free, s0, nb, out)


def block_workspace(n_joints: int, n_scenarios: int) -> tuple[np.ndarray, ...]:
    """Scratch of :func:`_block_forward` for every block of ``n_scenarios`` (leading axis, so
    blocks on different threads never share it): rot, sa, fm, vec, comp, mm, sb."""
    n_blocks = -(-n_scenarios // _BLOCK)
    return (np.empty((n_blocks, n_joints, 9, _BLOCK)), np.empty((n_blocks, 15, _BLOCK)),
            np.empty((n_blocks, n_joints, 15, _BLOCK)), np.empty((n_blocks, n_joints, _BLOCK)),
            np.empty((n_blocks, n_joints, 13, _BLOCK)),
            np.empty((n_blocks, n_joints, n_joints, _BLOCK)), np.empty((n_blocks, 15, _BLOCK)))


def _forward_blocks(q, dq, tau, free, place, pos, axis, mass, com, inertia, gravity, out):
    n, n_scen = q.shape
    zero = np.zeros((n, n_scen))
    for b in numba.prange((n_scen + _BLOCK - 1) // _BLOCK):
        s0 = b * _BLOCK
        _block_forward(q, dq, tau, free, zero, s0, min(_BLOCK, n_scen - s0), place, pos, axis,
                       mass, com, inertia, gravity, np.empty((n, 9, _BLOCK)),
                       np.empty((15, _BLOCK)), np.empty((n, 15, _BLOCK)), np.empty((n, _BLOCK)),
                       np.empty((n, 13, _BLOCK)), np.empty((n, n, _BLOCK)),
                       np.empty((15, _BLOCK)), out)


def _inverse_blocks(q, dq, ddq, gravity_on, place, pos, axis, mass, com, inertia, gravity,
                   out):
    n, n_scen = q.shape
    for b in numba.prange((n_scen + _BLOCK - 1) // _BLOCK):
        s0 = b * _BLOCK
        nb = min(_BLOCK, n_scen - s0)
        rot = np.empty((n, 9, _BLOCK))
        vec = np.empty((n, _BLOCK))
        _block_rotations(q, s0, nb, place, axis, rot)
        _block_rnea(dq, ddq, s0, nb, gravity_on, rot, pos, axis, mass, com, inertia, gravity,
                    np.empty((15, _BLOCK)), np.empty((n, 15, _BLOCK)), np.empty((15, _BLOCK)),
                    vec)
        for i in range(n):
            for k in range(nb):
                out[i, _lane(s0, k)] = vec[i, k]


def _mass_blocks(q, place, pos, axis, mass, com, inertia, out):
    n, n_scen = q.shape
    for b in numba.prange((n_scen + _BLOCK - 1) // _BLOCK):
        s0 = b * _BLOCK
        nb = min(_BLOCK, n_scen - s0)
        rot = np.empty((n, 9, _BLOCK))
        mm = np.empty((n, n, _BLOCK))
        _block_rotations(q, s0, nb, place, axis, rot)
        _block_crba(nb, rot, pos, axis, mass, com, inertia, np.empty((n, 13, _BLOCK)), mm,
                    np.empty((15, _BLOCK)), np.empty((15, _BLOCK)))
        for k in range(nb):
            for i in range(n):
                for j in range(n):
                    out[_lane(s0, k), i, j] = mm[i, j, k]


# Serial builds by default: campaigns already run one process per core, and GNU OpenMP (numba's
# threading layer here) aborts a process forked after it started, as campaign workers are.
_SERIAL = tuple(_kernel(f) for f in (_forward_blocks, _inverse_blocks, _mass_blocks))
_PARALLEL = tuple(_parallel_kernel(f) for f in (_forward_blocks, _inverse_blocks, _mass_blocks))


class ChainKernel:
    """Compiled dynamics of one chain for batches of ``(n_joints, n_scenarios)`` states.

    Parameters
    ----------
    chain : the serial arm
    parallel : spread the blocks of scenarios over numba's threads (``numba.prange``); off by
        default (see the note above ``_SERIAL``)
    """

    def __init__(self, chain: ChainParams, parallel: bool = False) -> None:
        self._kernels = _PARALLEL if parallel else _SERIAL
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
        self.model = (*self._model, self._gravity)  # the arrays the compiled step reads
        rest = np.zeros((self.n_joints, 1))
        heights = np.empty_like(rest)
        _chain_energies(rest, rest, *self.model, np.zeros(self.n_joints), np.empty_like(rest),
                        heights)
        self._rest_heights = heights[:, 0]

    def forward(self, q: np.ndarray, dq: np.ndarray, tau: np.ndarray, free: np.ndarray,
                out: np.ndarray) -> None:
        """Joint accelerations ``M(q)^-1 (tau - h(q, dq))`` into ``out``, rad/s^2.

        q (rad), dq (rad/s), tau (N*m), free (1 free, 0 locked), out: ``(n_joints, n_scen)``.
        """
        self._kernels[0](q, dq, tau, free, *self._model, self._gravity, out)

    def inverse(self, q: np.ndarray, dq: np.ndarray, ddq: np.ndarray,
                gravity: bool = True) -> np.ndarray:
        """Joint torques ``M(q) ddq + C(q, dq) dq + g(q)`` (without g if not ``gravity``), N*m,
        for ``(n_joints, n_scen)`` arrays."""
        q, dq, ddq = (np.ascontiguousarray(x, dtype=float) for x in (q, dq, ddq))
        out = np.empty_like(q)
        self._kernels[1](q, dq, ddq, gravity, *self._model, self._gravity, out)
        return out

    def mass_matrix(self, q: np.ndarray) -> np.ndarray:
        """Mass matrices ``(n_scen, n_joints, n_joints)``, kg*m^2, at ``(n_joints, n_scen)`` q."""
        q = np.ascontiguousarray(q, dtype=float)
        out = np.zeros((q.shape[1], self.n_joints, self.n_joints))
        self._kernels[2](q, *self._model, out)
        return out

    def kinetic_split(self, q: np.ndarray, dq: np.ndarray) -> np.ndarray:
        """``1/2 * dq_j * (M(q) dq)_j`` per joint, J: sums over joints to the kinetic energy."""
        momentum = self.inverse(q, np.zeros_like(q), dq, gravity=False)
        return 0.5 * dq * momentum

    def energies(self, q: np.ndarray, dq: np.ndarray, kinetic: np.ndarray,
                 potential: np.ndarray) -> None:
        """Into ``kinetic`` as :meth:`kinetic_split` and into ``potential`` the gravity energy
        ``-m_i g . (c_i(q) - c_i(0))`` of the link each joint moves, J; all ``(n_joints,
        n_scen)`` contiguous. Each sums over joints to the arm's energy (zero potential at
        q = 0)."""
        _chain_energies(q, dq, *self.model, self._rest_heights, kinetic, potential)


@_kernel
def _frames(q, place, pos, axis, origins, rots):
    """origins[i, s] and rots[i, s] (row-major) of joint frame i after it turned, base frame."""
    n, n_scen = q.shape
    for s in range(n_scen):
        w00, w01, w02, w10, w11, w12, w20, w21, w22 = 1.0, 0.0, 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 1.0
        o0, o1, o2 = 0.0, 0.0, 0.0
        for i in range(n):
            p0, p1, p2 = pos[i, 0], pos[i, 1], pos[i, 2]
            o0 += w00 * p0 + w01 * p1 + w02 * p2
            o1 += w10 * p0 + w11 * p1 + w12 * p2
            o2 += w20 * p0 + w21 * p1 + w22 * p2
            k0, k1, k2 = axis[i, 0], axis[i, 1], axis[i, 2]
            c, sn = math.cos(q[i, s]), math.sin(q[i, s])
            t = 1.0 - c
            u00, u01, u02 = c + t * k0 * k0, t * k0 * k1 - sn * k2, t * k0 * k2 + sn * k1
            u10, u11, u12 = t * k1 * k0 + sn * k2, c + t * k1 * k1, t * k1 * k2 - sn * k0
            u20, u21, u22 = t * k2 * k0 - sn * k1, t * k2 * k1 + sn * k0, c + t * k2 * k2
            # w <- w @ place[i] @ turn
            a = place[i]
            v00 = w00 * a[0, 0] + w01 * a[1, 0] + w02 * a[2, 0]
            v01 = w00 * a[0, 1] + w01 * a[1, 1] + w02 * a[2, 1]
            v02 = w00 * a[0, 2] + w01 * a[1, 2] + w02 * a[2, 2]
            v10 = w10 * a[0, 0] + w11 * a[1, 0] + w12 * a[2, 0]
            v11 = w10 * a[0, 1] + w11 * a[1, 1] + w12 * a[2, 1]
            v12 = w10 * a[0, 2] + w11 * a[1, 2] + w12 * a[2, 2]
            v20 = w20 * a[0, 0] + w21 * a[1, 0] + w22 * a[2, 0]
            v21 = w20 * a[0, 1] + w21 * a[1, 1] + w22 * a[2, 1]
            v22 = w20 * a[0, 2] + w21 * a[1, 2] + w22 * a[2, 2]
            w00 = v00 * u00 + v01 * u10 + v02 * u20
            w01 = v00 * u01 + v01 * u11 + v02 * u21
            w02 = v00 * u02 + v01 * u12 + v02 * u22
            w10 = v10 * u00 + v11 * u10 + v12 * u20
            w11 = v10 * u01 + v11 * u11 + v12 * u21
            w12 = v10 * u02 + v11 * u12 + v12 * u22
            w20 = v20 * u00 + v21 * u10 + v22 * u20
            w21 = v20 * u01 + v21 * u11 + v22 * u21
            w22 = v20 * u02 + v21 * u12 + v22 * u22
            origins[i, s, 0], origins[i, s, 1], origins[i, s, 2] = o0, o1, o2
            r = rots[i, s]
            r[0, 0], r[0, 1], r[0, 2] = w00, w01, w02
            r[1, 0], r[1, 1], r[1, 2] = w10, w11, w12
            r[2, 0], r[2, 1], r[2, 2] = w20, w21, w22


_inverse_serial = _SERIAL[1]


@_kernel
def _chain_energies(q, dq, place, pos, axis, mass, com, inertia, gravity, rest, kinetic,
                    potential):
    """See :meth:`ChainKernel.energies`; ``rest`` (n,) the links' heights term at q = 0."""
    n, n_scen = q.shape
    _inverse_serial(q, np.zeros((n, n_scen)), dq, False, place, pos, axis, mass, com, inertia,
                    gravity, kinetic)
    origins = np.empty((n, n_scen, 3))
    rots = np.empty((n, n_scen, 3, 3))
    _frames(q, place, pos, axis, origins, rots)
    g0, g1, g2 = gravity[0], gravity[1], gravity[2]
    for i in range(n):
        c0, c1, c2 = com[i, 0], com[i, 1], com[i, 2]
        for s in range(n_scen):
            kinetic[i, s] = 0.5 * dq[i, s] * kinetic[i, s]
            o, r = origins[i, s], rots[i, s]
            x = o[0] + (r[0, 0] * c0 + r[0, 1] * c1 + r[0, 2] * c2)
            y = o[1] + (r[1, 0] * c0 + r[1, 1] * c1 + r[1, 2] * c2)
            z = o[2] + (r[2, 0] * c0 + r[2, 1] * c1 + r[2, 2] * c2)
            potential[i, s] = -mass[i] * (x * g0 + y * g1 + z * g2) - rest[i]


def link_frames(place: np.ndarray, pos: np.ndarray, axis: np.ndarray, q: np.ndarray
                ) -> list[tuple[np.ndarray, np.ndarray]]:
    """Origin ``(n, 3)``, m, and rotation ``(n, 3, 3)`` in the base frame of every joint frame
    after its joint turned, for ``(n_joints, n)`` angles q (rad); place, pos, axis as in
    :class:`ChainKernel` (forward kinematics, Rodrigues' rotation formula; compiled)."""
    q = np.ascontiguousarray(q, dtype=float)
    n_joints, n = q.shape
    origins = np.empty((n_joints, n, 3))
    rots = np.empty((n_joints, n, 3, 3))
    _frames(q, np.ascontiguousarray(place, dtype=float), np.ascontiguousarray(pos, dtype=float),
            np.ascontiguousarray(axis, dtype=float), origins, rots)
    return [(origins[i], rots[i]) for i in range(n_joints)]


def chain_kernel(chain: ChainParams, joints: Sequence[JointParams], parallel: bool = False
                 ) -> ChainKernel:
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
    return ChainKernel(chain, parallel)


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
