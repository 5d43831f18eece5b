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
_BLOCK = 256
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


class _UncountedCompiler(CompilerBase):
    """numba's nopython pipeline without its reference counting of arrays (NRT), for kernels
    that allocate nothing: the views they take and pass on then cost no atomic counter
    updates, which were about half of a step's cost per block of scenarios (a two-scenario
    step took 11 us instead of 6). A kernel that allocates fails to compile ("NRT required but
    not enabled")."""

    def __init__(self, typingctx, targetctx, library, args, return_type, flags, locals):
        flags.nrt = False  # the flags of this compilation, before its target context is made
        super().__init__(typingctx, targetctx, library, args, return_type, flags, locals)

    def define_pipelines(self):
        return [DefaultPassBuilder.define_nopython_pipeline(self.state)]


class _DistinctUncountedCompiler(_DistinctArgumentsCompiler, _UncountedCompiler):
    """Both: arguments that never overlap, no reference counting."""


_vector_kernel = numba.njit(cache=True, nogil=True, error_model="numpy", fastmath=True,
                            pipeline_class=_DistinctUncountedCompiler)
_view_kernel = numba.njit(cache=True, nogil=True, error_model="numpy", fastmath=True,
                          pipeline_class=_UncountedCompiler)
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


@_view_kernel
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


@_view_kernel
def _lane(s0, k):
    """Scenario s0 + k of a block as an unsigned index: numba then leaves out the wrap-around of
    negative indices, which would turn a vectorised loop's loads and stores into gathers and
    scatters."""
    return np.uint64(s0) + np.uint64(k)


# Every loop over a block's scenarios reads one- or two-dimensional views taken outside it and
# writes into arrays it does not read (values carried from joint to joint go through per-joint
# helpers given the parent's and the child's rows as distinct arguments), and branches only on
# values that stay the same over the loop: otherwise the compiler cannot rule out that a store
# changes a later load, and keeps the loop scalar.
#
# The kernels work in joint frames turned at model build so that every joint turns about its
# own z axis (see :func:`z_axis_model`): a joint's rotation is then Rz(q) (a cosine and a sine,
# two components mix), the axis' cross products and projections pick components, and the
# constant placement rotation between two frames is applied only where it is not the identity
# (``turned``; never on a planar arm).


@_vector_kernel
def _block_rotations(q, s0, nb, rot):
    """rot[i, 0, k], rot[i, 1, k]: cosine and sine of joint i's angle in scenario s0 + k."""
    for i in range(q.shape[0]):
        qi, cosine, sine = q[i, s0:s0 + nb], rot[i, 0], rot[i, 1]
        for k in range(nb):
            sine[k], cosine[k] = _sincos(qi[k])


@_vector_kernel
def _rnea_link(parent, turn, qd, qdd, nb, offset, m, com, inertia, f):
    """Forward pass of one link: from the parent's angular velocity, angular acceleration and
    origin acceleration (parent rows 6-14, in the joint's frame before it turns) into f the
    link's (rows 6-14) and the force and moment it needs about its joint origin (rows 0-5),
    its own frame."""
    d0, d1, d2 = offset[0], offset[1], offset[2]
    cc0, cc1, cc2 = com[0], com[1], com[2]
    i00, i01, i02 = inertia[0, 0], inertia[0, 1], inertia[0, 2]
    i11, i12, i22 = inertia[1, 1], inertia[1, 2], inertia[2, 2]
    cos_q, sin_q = turn[0], turn[1]
    for k in range(nb):
        w0, w1, w2 = parent[6, k], parent[7, k], parent[8, k]
        dw0, dw1, dw2 = parent[9, k], parent[10, k], parent[11, k]
        a0, a1, a2 = parent[12, k], parent[13, k], parent[14, k]
        # the parent's point at the joint origin, in the joint's frame before it turns
        e0 = w1 * d2 - w2 * d1
        e1 = w2 * d0 - w0 * d2
        e2 = w0 * d1 - w1 * d0
        b0 = a0 + dw1 * d2 - dw2 * d1 + w1 * e2 - w2 * e1
        b1 = a1 + dw2 * d0 - dw0 * d2 + w2 * e0 - w0 * e2
        b2 = a2 + dw0 * d1 - dw1 * d0 + w0 * e1 - w1 * e0
        c, s = cos_q[k], sin_q[k]
        q_d, q_dd = qd[k], qdd[k]
        # Rz(q)^T, then the joint's own rate about z
        u0, u1 = c * w0 + s * w1, c * w1 - s * w0
        v0, v1 = c * dw0 + s * dw1, c * dw1 - s * dw0
        a0, a1 = c * b0 + s * b1, c * b1 - s * b0
        a2 = b2
        w0, w1, w2 = u0, u1, w2 + q_d
        dw0, dw1, dw2 = v0 + u1 * q_d, v1 - u0 * q_d, dw2 + q_dd
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
        f[3, k] = i00 * dw0 + i01 * dw1 + i02 * dw2 + w1 * h2 - w2 * h1 + cc1 * fz - cc2 * fy
        f[4, k] = i01 * dw0 + i11 * dw1 + i12 * dw2 + w2 * h0 - w0 * h2 + cc2 * fx - cc0 * fz
        f[5, k] = i02 * dw0 + i12 * dw1 + i22 * dw2 + w0 * h1 - w1 * h0 + cc0 * fy - cc1 * fx
        f[6, k], f[7, k], f[8, k] = w0, w1, w2
        f[9, k], f[10, k], f[11, k] = dw0, dw1, dw2
        f[12, k], f[13, k], f[14, k] = a0, a1, a2


@_vector_kernel
def _motion_to_placed(parent, place, nb, into):
    """Rows 6-14 of into: the three vectors in rows 6-14 of parent turned by place^T (from the
    parent's frame into a joint's frame before it turns; a separate pass, so the common loop
    of :func:`_rnea_link` holds no branch)."""
    for k in range(nb):
        for v in range(6, 15, 3):
            x0, x1, x2 = parent[v, k], parent[v + 1, k], parent[v + 2, k]
            into[v, k] = place[0, 0] * x0 + place[1, 0] * x1 + place[2, 0] * x2
            into[v + 1, k] = place[0, 1] * x0 + place[1, 1] * x1 + place[2, 1] * x2
            into[v + 2, k] = place[0, 2] * x0 + place[1, 2] * x1 + place[2, 2] * x2


@_view_kernel
def _turn(r, x0, x1, x2):
    """r x for a constant 3 x 3 rotation r."""
    return (r[0, 0] * x0 + r[0, 1] * x1 + r[0, 2] * x2, r[1, 0] * x0 + r[1, 1] * x1
            + r[1, 2] * x2, r[2, 0] * x0 + r[2, 1] * x1 + r[2, 2] * x2)


@_vector_kernel
def _force_to_parent(child, turn, nb, offset, base, into, axial):
    """into = base + the force and moment about its joint origin of rows 0-5 of ``child`` (the
    child's frame) moved to the parent's joint origin, in the child's joint frame before it
    turns (the parent's frame unless the joint is ``turned``, see :func:`_force_turned`);
    axial = its moment about z (row 5 of into)."""
    d0, d1, d2 = offset[0], offset[1], offset[2]
    cos_q, sin_q = turn[0], turn[1]
    for k in range(nb):
        c, s = cos_q[k], sin_q[k]
        f0, f1, f2 = child[0, k], child[1, k], child[2, k]
        n0, n1, n2 = child[3, k], child[4, k], child[5, k]
        g0, g1, g2 = c * f0 - s * f1, s * f0 + c * f1, f2
        e0 = c * n0 - s * n1 + d1 * g2 - d2 * g1
        e1 = s * n0 + c * n1 + d2 * g0 - d0 * g2
        e2 = n2 + d0 * g1 - d1 * g0
        _add_force(base, k, g0, g1, g2, e0, e1, e2, into, axial)


@_vector_kernel
def _force_turned(moved, place, nb, base, into, axial):
    """into = base + rows 0-5 of ``moved`` (force and moment) turned by the constant ``place``;
    axial = row 5 of into. A pass of its own, so the loops of the common case hold no branch."""
    for k in range(nb):
        f0, f1, f2 = _turn(place, moved[0, k], moved[1, k], moved[2, k])
        n0, n1, n2 = _turn(place, moved[3, k], moved[4, k], moved[5, k])
        _add_force(base, k, f0, f1, f2, n0, n1, n2, into, axial)


@_view_kernel
def _add_force(base, k, f0, f1, f2, n0, n1, n2, into, axial):
    """Column k of into = base + (force f, moment n); axial[k] = the moment's z."""
    into[0, k], into[1, k], into[2, k] = base[0, k] + f0, base[1, k] + f1, base[2, k] + f2
    into[3, k], into[4, k] = base[3, k] + n0, base[4, k] + n1
    moment = base[5, k] + n2
    into[5, k] = moment
    axial[k] = moment


@_view_kernel
def _block_rnea(dq, ddq, s0, nb, gravity_on, rot, place, offset, turned, mass, com, inertia,
                gravity, sa, fm, sb, zero_rows, tau):
    """tau[i, k] = inverse dynamics of scenarios s0 + k at (rot, dq, ddq); sa, sb (15, B) and
    fm (n, 15, B) scratch, zero_rows (6, B) zeros: fm[i] holds link i's force and moment about
    its joint origin (rows 0-5, then with the links after it) and its angular velocity, angular
    acceleration and the acceleration of its origin (rows 6-14), frame i."""
    n = dq.shape[0]
    g0, g1, g2 = (-gravity[0], -gravity[1], -gravity[2]) if gravity_on else (0.0, 0.0, 0.0)
    for c in range(6, 12):
        sa[c, :nb] = 0.0
    sa[12, :nb], sa[13, :nb], sa[14, :nb] = g0, g1, g2
    for i in range(n):
        parent = sa if i == 0 else fm[i - 1]
        if turned[i]:
            _motion_to_placed(parent, place[i], nb, sb)
            parent = sb
        _rnea_link(parent, rot[i], dq[i, s0:s0 + nb], ddq[i, s0:s0 + nb], nb, offset[i],
                   mass[i], com[i], inertia[i], fm[i])
    # the links i + 1.. pull on link i: their sum goes back and forth between two arrays
    child, spare = fm[n - 1], sa
    for k in range(nb):
        tau[n - 1, k] = child[5, k]
    for i in range(n - 2, -1, -1):
        if turned[i + 1]:
            _force_to_parent(child, rot[i + 1], nb, offset[i + 1], zero_rows, spare, tau[i])
            _force_turned(spare, place[i + 1], nb, fm[i], child, tau[i])
        else:
            _force_to_parent(child, rot[i + 1], nb, offset[i + 1], fm[i], spare, tau[i])
            child, spare = spare, child


@_vector_kernel
def _composite_to_parent(child, turn, nb, offset, link, into):
    """into = link + the composite body ``child`` (rows: mass, first moment, rotational
    inertia 00, 01, 02, 11, 12, 22 about the child's joint origin, child's frame) carried about
    the parent's joint origin, in the child's joint frame before it turns (see
    :func:`_composite_turned`): h' = Rz h, I' = Rz I Rz^T, shifted by
    m (|d|^2 1 - d d^T) + 2 (d.h') 1 - h' d^T - d h'^T (parallel axes)."""
    d0, d1, d2 = offset[0], offset[1], offset[2]
    dd = d0 * d0 + d1 * d1 + d2 * d2
    cos_q, sin_q = turn[0], turn[1]
    for k in range(nb):
        c, s = cos_q[k], sin_q[k]
        ms, h0, h1, h2 = child[0, k], child[1, k], child[2, k], child[3, k]
        j00, j01, j02 = child[4, k], child[5, k], child[6, k]
        j11, j12, j22 = child[7, k], child[8, k], child[9, k]
        # Rz I Rz^T
        cc, ss, cs = c * c, s * s, c * s
        t00 = cc * j00 - 2.0 * cs * j01 + ss * j11
        t11 = ss * j00 + 2.0 * cs * j01 + cc * j11
        t01 = cs * (j00 - j11) + (cc - ss) * j01
        t02, t12 = c * j02 - s * j12, s * j02 + c * j12
        g0, g1, g2 = c * h0 - s * h1, s * h0 + c * h1, h2
        dh2 = 2.0 * (d0 * g0 + d1 * g1 + d2 * g2)
        u00 = t00 + ms * (dd - d0 * d0) + dh2 - 2.0 * g0 * d0
        u11 = t11 + ms * (dd - d1 * d1) + dh2 - 2.0 * g1 * d1
        u22 = j22 + ms * (dd - d2 * d2) + dh2 - 2.0 * g2 * d2
        u01 = t01 - ms * d0 * d1 - g0 * d1 - d0 * g1
        u02 = t02 - ms * d0 * d2 - g0 * d2 - d0 * g2
        u12 = t12 - ms * d1 * d2 - g1 * d2 - d1 * g2
        g0, g1, g2 = g0 + ms * d0, g1 + ms * d1, g2 + ms * d2
        into[0, k], into[1, k] = link[0] + ms, link[1] + g0
        into[2, k], into[3, k] = link[2] + g1, link[3] + g2
        into[4, k], into[5, k], into[6, k] = link[4] + u00, link[5] + u01, link[6] + u02
        into[7, k], into[8, k], into[9, k] = link[7] + u11, link[8] + u12, link[9] + u22


@_vector_kernel
def _composite_turned(body, place, nb, link, into):
    """into = link + the composite ``body`` turned by the constant ``place`` (P h, P I P^T)."""
    for k in range(nb):
        g0, g1, g2 = _turn(place, body[1, k], body[2, k], body[3, k])
        u00, u01, u02 = body[4, k], body[5, k], body[6, k]
        u11, u12, u22 = body[7, k], body[8, k], body[9, k]
        x0, x1, x2 = _turn(place, u00, u01, u02)  # P I, column by column
        y0, y1, y2 = _turn(place, u01, u11, u12)
        z0, z1, z2 = _turn(place, u02, u12, u22)
        u00, u01, u02 = _turn(place, x0, y0, z0)  # (P I) P^T, row by row
        u11, u12 = _turn(place, x1, y1, z1)[1:]
        u22 = _turn(place, x2, y2, z2)[2]
        into[0, k], into[1, k] = link[0] + body[0, k], link[1] + g0
        into[2, k], into[3, k] = link[2] + g1, link[3] + g2
        into[4, k], into[5, k], into[6, k] = link[4] + u00, link[5] + u01, link[6] + u02
        into[7, k], into[8, k], into[9, k] = link[7] + u11, link[8] + u12, link[9] + u22


@_vector_kernel
def _unit_column(body, nb, into, diagonal):
    """Force and moment (rows 0-5) the composite ``body`` needs for a unit acceleration of its
    joint (z), about its joint origin; diagonal = their moment about z."""
    for k in range(nb):
        into[0, k], into[1, k], into[2, k] = -body[2, k], body[1, k], 0.0
        into[3, k], into[4, k], into[5, k] = body[6, k], body[8, k], body[9, k]
        diagonal[k] = body[9, k]


@_vector_kernel
def _fill_rows(values, nb, into):
    """into[c, :nb] = values[c]."""
    for c in range(values.shape[0]):
        row, value = into[c], values[c]
        for k in range(nb):
            row[k] = value


@_view_kernel
def _block_crba(nb, rot, place, offset, turned, links, comp, mm, sa, sb, zero):
    """Lower triangle mm[i, j, k] (i >= j) of the mass matrix of scenarios k < nb; comp (n, 10,
    B), sa and sb (15, B) scratch, zero (6, B) zeros; links (n, 10): each link alone as a
    composite body (see :func:`_composite_to_parent`).

    comp[i] is the composite body of links i.. about joint i's origin in frame i."""
    n = rot.shape[0]
    _fill_rows(links[n - 1], nb, comp[n - 1])
    for i in range(n - 2, -1, -1):
        if turned[i + 1]:
            # zero[0]: a row of zeros as the link, then the turn and the link in a pass
            _composite_to_parent(comp[i + 1], rot[i + 1], nb, offset[i + 1], zero[0], sb)
            _composite_turned(sb, place[i + 1], nb, links[i], comp[i])
        else:
            _composite_to_parent(comp[i + 1], rot[i + 1], nb, offset[i + 1], links[i], comp[i])
    for i in range(n):
        # force and moment the unit acceleration of joint i asks of subtree i, carried down
        # the chain; their moment about each joint's axis is a row of the mass matrix
        column, spare = sa, sb
        _unit_column(comp[i], nb, column, mm[i, i])
        for j in range(i - 1, -1, -1):
            _force_to_parent(column, rot[j + 1], nb, offset[j + 1], zero, spare, mm[i, j])
            if turned[j + 1]:
                _force_turned(spare, place[j + 1], nb, zero, column, mm[i, j])
            else:
                column, spare = spare, column


@_vector_kernel
def _block_solve(mm, rhs, free, s0, nb, out):
    """Cholesky solve of mm x = rhs per scenario over its free joints (mm's lower triangle is
    read and overwritten); out[:, s0 + k] = x.

    A held joint (free 0) gets the row and column of the identity and a zero right-hand side,
    as products with free (exact for 0 and 1), so no loop over scenarios branches."""
    n = mm.shape[0]
    for i in range(n):
        fi = free[i, s0:s0 + nb]
        ri = rhs[i]
        for j in range(i + 1):
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


@_view_kernel
def _block_forward(q, dq, tau, free, zero, s0, nb, place, offset, turned, mass, com, inertia,
                   links, gravity, rot, sa, fm, vec, comp, mm, sb, zero_block, out):
    """out[:, s0 + k] = M^-1 (tau - h) of scenarios s0 + k, k < nb, over their free joints;
    zero is (n, n_scen) zeros, the rest (block-sized) scratch (see :func:`block_workspace`)."""
    n = q.shape[0]
    _block_rotations(q, s0, nb, rot)
    _block_rnea(dq, zero, s0, nb, True, rot, place, offset, turned, mass, com, inertia, gravity,
                sa, fm, sb, zero_block, vec)
    for i in range(n):
        ti, vi = tau[i, s0:s0 + nb], vec[i]
        for k in range(nb):
            vi[k] = ti[k] - vi[k]
    _block_crba(nb, rot, place, offset, turned, links, comp, mm, sa, sb, zero_block)
    _block_solve(mm, vec, free, s0, nb, out)


def block_workspace(n_joints: int, n_scenarios: int, parallel: bool = False
                    ) -> tuple[np.ndarray, ...]:
    """Scratch of :func:`_block_forward`: rot, sa, fm, vec, comp, mm, sb, and a block of
    zeros, each with a leading slot axis. Blocks of ``n_scenarios`` that may run at once
    (``parallel``) get a slot each, so threads never share one; one after another they all use
    the one slot (block b uses slot ``b % n_slots``), which stays in cache."""
    n_slots = -(-n_scenarios // _BLOCK) if parallel else min(n_scenarios, 1)
    return (np.empty((n_slots, n_joints, 2, _BLOCK)), np.empty((n_slots, 15, _BLOCK)),
            np.empty((n_slots, n_joints, 15, _BLOCK)), np.empty((n_slots, n_joints, _BLOCK)),
            np.empty((n_slots, n_joints, 10, _BLOCK)),
            np.empty((n_slots, n_joints, n_joints, _BLOCK)), np.empty((n_slots, 15, _BLOCK)),
            np.zeros((n_slots, 6, _BLOCK)))


def _forward_blocks(q, dq, tau, free, place, offset, turned, mass, com, inertia, links, gravity,
                    out):
    n, n_scen = q.shape
    zero = np.zeros((n, n_scen))
    for b in numba.prange((n_scen + _BLOCK - 1) // _BLOCK):
        s0 = b * _BLOCK
        _block_forward(q, dq, tau, free, zero, s0, min(_BLOCK, n_scen - s0), place, offset,
                       turned, mass, com, inertia, links, gravity, np.empty((n, 2, _BLOCK)),
                       np.empty((15, _BLOCK)), np.empty((n, 15, _BLOCK)), np.empty((n, _BLOCK)),
                       np.empty((n, 10, _BLOCK)), np.empty((n, n, _BLOCK)),
                       np.empty((15, _BLOCK)), np.zeros((6, _BLOCK)), out)


def _inverse_blocks(q, dq, ddq, gravity_on, place, offset, turned, mass, com, inertia, links,
                    gravity, out):
    n, n_scen = q.shape
    for b in numba.prange((n_scen + _BLOCK - 1) // _BLOCK):
        s0 = b * _BLOCK
        nb = min(_BLOCK, n_scen - s0)
        rot = np.empty((n, 2, _BLOCK))
        vec = np.empty((n, _BLOCK))
        _block_rotations(q, s0, nb, rot)
        _block_rnea(dq, ddq, s0, nb, gravity_on, rot, place, offset, turned, mass, com, inertia,
                    gravity, np.empty((15, _BLOCK)), np.empty((n, 15, _BLOCK)),
                    np.empty((15, _BLOCK)), np.zeros((6, _BLOCK)), vec)
        for i in range(n):
            for k in range(nb):
                out[i, _lane(s0, k)] = vec[i, k]


def _mass_blocks(q, place, offset, turned, mass, com, inertia, links, gravity, out):
    n, n_scen = q.shape
    for b in numba.prange((n_scen + _BLOCK - 1) // _BLOCK):
        s0 = b * _BLOCK
        nb = min(_BLOCK, n_scen - s0)
        rot = np.empty((n, 2, _BLOCK))
        mm = np.empty((n, n, _BLOCK))
        _block_rotations(q, s0, nb, rot)
        _block_crba(nb, rot, place, offset, turned, links, np.empty((n, 10, _BLOCK)), mm,
                    np.empty((15, _BLOCK)), np.empty((15, _BLOCK)), np.zeros((6, _BLOCK)))
        for k in range(nb):
            for i in range(n):
                for j in range(n):
                    out[_lane(s0, k), i, j] = mm[max(i, j), min(i, j), k]


# Serial builds by default: campaigns already run one process per core, and GNU OpenMP (numba's
# threading layer here) aborts a process forked after it started, as campaign workers are.
_SERIAL = tuple(_kernel(f) for f in (_forward_blocks, _inverse_blocks, _mass_blocks))
_PARALLEL = tuple(_parallel_kernel(f) for f in (_forward_blocks, _inverse_blocks, _mass_blocks))


def _frame_about(axis: np.ndarray) -> np.ndarray:
    """A rotation whose third column is the unit vector ``axis``."""
    helper = np.array([0.0, 1.0, 0.0]) if abs(axis[0]) > 0.9 else np.array([1.0, 0.0, 0.0])
    first = helper - (helper @ axis) * axis
    first /= np.linalg.norm(first)
    return np.column_stack([first, np.cross(axis, first), axis])


def z_axis_model(place: np.ndarray, pos: np.ndarray, axis: np.ndarray, mass: np.ndarray,
                 com: np.ndarray, inertia: np.ndarray, gravity: np.ndarray
                 ) -> tuple[np.ndarray, ...]:
    """The chain in joint frames turned by constant rotations so every joint turns about z.

    Parameters
    ----------
    place, pos, axis, mass, com, inertia, gravity : the chain as :class:`ChainKernel` holds it
        (``(n, 3, 3)``, ``(n, 3)`` m, ``(n, 3)``, ``(n,)`` kg, ``(n, 3)`` m, ``(n, 3, 3)``
        kg*m^2, ``(3,)`` m/s^2)

    Returns
    -------
    place : (n, 3, 3); the constant rotation of joint frame i at zero angle in frame i - 1
    offset : (n, 3) m; joint i's origin from joint i - 1's, in joint i's frame at zero angle
    turned : (n,) bool; place is not the identity
    mass, com, inertia : the links in their turned frames
    links : (n, 10); each link alone as a composite body about its joint origin: mass, first
        moment (3), rotational inertia 00, 01, 02, 11, 12, 22 (parallel axes)
    gravity : (3,) m/s^2 in the turned base frame

    Notes
    -----
    Frame i' = frame i turned by C_i, whose third column is joint i's axis, so that
    Rot(axis_i, q) C_i = C_i Rz(q); joint i' sits in frame (i-1)' turned by
    C_{i-1}^T P_i C_i. C_i = P_i^T C_{i-1} when that already has the axis as third column
    (parallel joints: the placement becomes the identity), and the base frame is turned by
    P_0 C_0, so the first joint's placement is the identity too. Vectors move as x = C x',
    inertias as I = C I' C^T (common practice).
    """
    n = len(mass)
    new_place = np.empty((n, 3, 3))
    offset = np.empty((n, 3))
    turned = np.zeros(n, dtype=bool)
    new_com, new_inertia = np.empty((n, 3)), np.empty((n, 3, 3))
    links = np.empty((n, 10))
    frame = _frame_about(axis[0])
    parent = place[0] @ frame  # the turned base frame
    base = parent
    for i in range(n):
        follow = place[i].T @ parent
        if i > 0 and not np.allclose(follow[:, 2], axis[i], rtol=0.0, atol=1e-12):
            frame = _frame_about(axis[i])
            new_place[i] = parent.T @ place[i] @ frame
            turned[i] = True
        else:
            frame = follow if i > 0 else frame
            new_place[i] = np.eye(3)
        offset[i] = new_place[i].T @ (parent.T @ pos[i])
        c = frame.T @ com[i]
        rotated = frame.T @ inertia[i] @ frame
        new_com[i], new_inertia[i] = c, rotated
        about_origin = rotated + mass[i] * ((c @ c) * np.eye(3) - np.outer(c, c))
        links[i] = (mass[i], *(mass[i] * c), *about_origin[np.triu_indices(3)])
        parent = frame
    return (new_place, offset, turned, mass.copy(), new_com, new_inertia, links,
            base.T @ gravity)


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
        place = np.array([np.reshape(b.placement_rotation, (3, 3)) for b in bodies])
        pos = np.array([b.placement_xyz for b in bodies], dtype=float)
        axis = np.array([b.axis for b in bodies], dtype=float)
        mass = np.array([b.mass for b in bodies], dtype=float)
        com = np.array([b.com for b in bodies], dtype=float)
        inertia = np.array([
            [[b.inertia[0], b.inertia[1], b.inertia[2]],
             [b.inertia[1], b.inertia[3], b.inertia[4]],
             [b.inertia[2], b.inertia[4], b.inertia[5]]] for b in bodies])
        gravity = np.array(chain.gravity, dtype=float)
        # the arrays the compiled kernels and step read (see z_axis_model)
        self.model = z_axis_model(place, pos, axis, mass, com, inertia, gravity)
        rest = np.zeros((self.n_joints, 1))
        heights = np.empty_like(rest)
        _chain_energies(rest, rest, self.model, np.zeros(self.n_joints), np.empty_like(rest),
                        heights)
        self._rest_heights = heights[:, 0]

    def forward(self, q: np.ndarray, dq: np.ndarray, tau: np.ndarray, free: np.ndarray,
                out: np.ndarray) -> None:
        """Joint accelerations ``M(q)^-1 (tau - h(q, dq))`` into ``out``, rad/s^2.

        q (rad), dq (rad/s), tau (N*m), free (1 free, 0 locked), out: ``(n_joints, n_scen)``.
        """
        self._kernels[0](q, dq, tau, free, *self.model, out)

    def inverse(self, q: np.ndarray, dq: np.ndarray, ddq: np.ndarray,
                gravity: bool = True) -> np.ndarray:
        """Joint torques ``M(q) ddq + C(q, dq) dq + g(q)`` (without g if not ``gravity``), N*m,
        for ``(n_joints, n_scen)`` arrays."""
        q, dq, ddq = (np.ascontiguousarray(x, dtype=float) for x in (q, dq, ddq))
        out = np.empty_like(q)
        self._kernels[1](q, dq, ddq, gravity, *self.model, out)
        return out

    def mass_matrix(self, q: np.ndarray) -> np.ndarray:
        """Mass matrices ``(n_scen, n_joints, n_joints)``, kg*m^2, at ``(n_joints, n_scen)`` q."""
        q = np.ascontiguousarray(q, dtype=float)
        out = np.zeros((q.shape[1], self.n_joints, self.n_joints))
        self._kernels[2](q, *self.model, out)
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
        _chain_energies(q, dq, self.model, self._rest_heights, kinetic, potential)


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


@_vector_kernel
def _link_heights(q, place, offset, turned, mass, com, gravity, rest, g0, g1, g2, height,
                  potential):
    """potential[i, s] = -m_i g . c_i(q) - rest[i] for each link's centre of mass c_i, in the
    frames of :func:`z_axis_model`; g0, g1, g2, height (n_scen,) scratch: gravity in the
    current joint's frame and its product with that joint's origin."""
    n, n_scen = q.shape
    g0[:], g1[:], g2[:], height[:] = gravity[0], gravity[1], gravity[2], 0.0
    for i in range(n):
        if turned[i]:
            r = place[i]
            for s in range(n_scen):
                g0[s], g1[s], g2[s] = (
                    r[0, 0] * g0[s] + r[1, 0] * g1[s] + r[2, 0] * g2[s],
                    r[0, 1] * g0[s] + r[1, 1] * g1[s] + r[2, 1] * g2[s],
                    r[0, 2] * g0[s] + r[1, 2] * g1[s] + r[2, 2] * g2[s])
        d0, d1, d2 = offset[i, 0], offset[i, 1], offset[i, 2]
        c0, c1, c2 = com[i, 0], com[i, 1], com[i, 2]
        m, base = mass[i], rest[i]
        qi, out = q[i], potential[i]
        for s in range(n_scen):
            h = height[s] + g0[s] * d0 + g1[s] * d1 + g2[s] * d2
            height[s] = h
            sine, cosine = _sincos(qi[s])
            x0, x1, x2 = g0[s], g1[s], g2[s]
            x0, x1 = cosine * x0 + sine * x1, cosine * x1 - sine * x0
            g0[s], g1[s] = x0, x1
            out[s] = -m * (h + x0 * c0 + x1 * c1 + x2 * c2) - base


@_kernel
def _chain_energies(q, dq, model, rest, kinetic, potential):
    """See :meth:`ChainKernel.energies`; ``model`` the kernels' arrays (:func:`z_axis_model`),
    ``rest`` (n,) the links' heights term at q = 0."""
    n, n_scen = q.shape
    _inverse_serial(q, np.zeros((n, n_scen)), dq, False, *model, kinetic)
    for i in range(n):
        for s in range(n_scen):
            kinetic[i, s] = 0.5 * dq[i, s] * kinetic[i, s]
    place, offset, turned, mass, com, _, _, gravity = model
    _link_heights(q, place, offset, turned, mass, com, gravity, rest, np.empty(n_scen),
                  np.empty(n_scen), np.empty(n_scen), np.empty(n_scen), potential)


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
