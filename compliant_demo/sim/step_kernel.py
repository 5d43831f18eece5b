"""The simulator's step, compiled: every torque, the dynamics and the integration of a batch.

One call advances all scenarios by one step of the chosen method: the mechanism's spring and
damping torques, viscous and Coulomb friction, end stops, walls, external torques, the link
dynamics (independent pendulums, or the coupled arm's forward dynamics of :mod:`.rigid_body`),
the actuators' lag, the three work integrals and the stiffness-injection integral. Scenarios go
through in the blocks of :mod:`.rigid_body`, each block through all stages of the step before the
next (its arrays stay in cache), every innermost loop running over the scenarios of a block so it
compiles to SIMD instructions; ``parallel=True`` spreads the blocks over numba's threads. The
Python side (:class:`~compliant_demo.sim.integrate.Simulator`) keeps events, commands and
recording; per-joint constants come packed in one ``(N_PARAMS, n_joints)`` array.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numba
import numpy as np

from compliant_demo.sim.rigid_body import (
    _block_forward,
    _DistinctUncountedCompiler,
    _lane,
    _sincos,
    _UncountedCompiler,
)

__all__ = [
    "CONTACT_DAMPING_DEPTH",
    "IDEAL",
    "ANTAGONISTIC",
    "METHOD_CODES",
    "N_PARAMS",
    "PARAM_ROWS",
    "contact_force",
    "rhs_batch",
    "step_batch",
]

CONTACT_DAMPING_DEPTH = 2e-3  # rad of penetration over which contact damping ramps in
IDEAL, ANTAGONISTIC = 0, 1  # mechanism kinds
METHOD_CODES = {"rk4": 0, "symplectic_euler": 1, "explicit_euler": 2}
# rows of the packed per-joint constants
PARAM_ROWS = ("neg_viscous", "neg_coulomb", "inv_smoothing", "neg_mgl", "gravity_offset",
              "lower", "upper", "stop_stiffness", "stop_damping", "k1", "k2",
              "inv_time_constant_0", "inv_time_constant_1", "rate_limit_0", "rate_limit_1",
              # read by the recording only (observe_kernel)
              "inertia", "encoder_resolution", "motor_inertia", "motor_offset")
N_PARAMS = len(PARAM_ROWS)
(_NEG_VISCOUS, _NEG_COULOMB, _INV_SMOOTHING, _NEG_MGL, _OFFSET, _LOWER, _UPPER, _K_STOP,
 _B_STOP, _K1, _K2, _INV_TC, _, _RATE, _, _, _, _, _) = range(N_PARAMS)
_INV_DEPTH = 1.0 / CONTACT_DAMPING_DEPTH
# tanh in a form the compiler vectorises (libm's is an opaque call): tanh|x| = e / (e + 2) with
# e = expm1(2|x|) (fdlibm's s_tanh.c identity), expm1 by Cody-Waite reduction by ln 2 and its
# Taylor series to r^13/13! on |r| <= ln2/2 (next term below 5e-18 relative); a few ulp
_LN2_HI, _LN2_LO = 6.93147180369123816490e-01, 1.90821492927058770002e-10
_EXPM1_TAYLOR = tuple(1.0 / math.factorial(n) for n in range(13, 1, -1))
_TANH_SATURATED = 20.0  # tanh(20) rounds to 1.0 in double precision
_compiled = numba.njit(cache=True, nogil=True, error_model="numpy", fastmath=True)
_parallel = numba.njit(cache=True, nogil=True, error_model="numpy", fastmath=True, parallel=True)
# the batch's arrays never overlap: declared so, and without reference counting (the kernels
# allocate nothing; see rigid_body)
_distinct = numba.njit(cache=True, nogil=True, error_model="numpy", fastmath=True,
                       pipeline_class=_DistinctUncountedCompiler)


@_compiled
def contact_force(penetration, rate, stiffness, damping):
    """Force of a one-sided spring-damper contact (end stop or wall), >= 0, pushing out.

    Parameters
    ----------
    penetration : float, rad; depth into the contact (<= 0: no contact)
    rate : float, rad/s; d(penetration)/dt
    stiffness : N*m/rad; damping : N*m*s/rad

    Notes
    -----
    ``max(k*x + b*dx/dt * clip(x/x_d, 0, 1), 0)`` with x_d = CONTACT_DAMPING_DEPTH: the damping
    ramps in over the first x_d of penetration so the force is continuous at impact (a plain
    Kelvin-Voigt contact jumps by b*dx/dt there, which costs a fixed-step method an O(h) error
    per impact), in the spirit of Hunt and Crossley, J. Appl. Mech. 42(2), 1975. It never pulls.
    """
    ramp = min(max(penetration * _INV_DEPTH, 0.0), 1.0)
    return max(ramp * rate * damping + stiffness * penetration, 0.0)


@numba.njit(cache=True, nogil=True, error_model="numpy",
            fastmath={"nnan", "ninf", "nsz", "contract"})
def _tanh(x):
    """tanh(x) without a library call (see ``_EXPM1_TAYLOR``); no reassociation is allowed
    here, the reduction and ``2^k p + (2^k - 1)`` depend on the order of their operations."""
    y = 2.0 * min(abs(x), _TANH_SATURATED)
    turns = np.rint(y * (1.0 / math.log(2.0)))
    r = (y - turns * _LN2_HI) - turns * _LN2_LO
    poly = _EXPM1_TAYLOR[0]
    for c in _EXPM1_TAYLOR[1:]:
        poly = poly * r + c
    poly = (poly * r * r) + r  # expm1(r)
    scale = float(np.int64(1) << np.int64(turns))  # 2^k, k <= 58: exact
    e = scale * poly + (scale - 1.0)
    return math.copysign(e / (e + 2.0), x)


@_distinct
def _block_rhs(s0, nb, b, x, tg, ext, e, has_ext, prm, walls, kind, coupled, free, accel_scale,
               model, ws, zero, torques, mech, grav, f):
    """State derivative ``f`` at the state rows ``x`` (q, dq, two actuator rows) for scenarios
    s0 + k, k < nb, of block b; torques (spring, passive, external), the mechanism's damping
    torque and (independent joints) gravity are left in ``torques``, ``mech`` and ``grav``.

    Every branch sits outside the loops over scenarios, so each of those compiles to SIMD."""
    n_j = x.shape[1]
    e0 = s0 + nb
    for j in range(n_j):
        neg_viscous, k1, k2 = prm[_NEG_VISCOUS, j], prm[_K1, j], prm[_K2, j]
        inv_tc0, inv_tc1 = prm[_INV_TC, j], prm[_INV_TC + 1, j]
        rate0, rate1 = prm[_RATE, j], prm[_RATE + 1, j]
        # one-row views of this joint's block (see rigid_body), one array written per loop
        q, dq, act0, act1 = x[0, j, s0:e0], x[1, j, s0:e0], x[2, j, s0:e0], x[3, j, s0:e0]
        spring, passive, external = (torques[0, j, s0:e0], torques[1, j, s0:e0],
                                     torques[2, j, s0:e0])
        damping = mech[j, s0:e0]
        if kind == IDEAL:
            target = tg[2, j, s0:e0]
            for k in range(nb):
                spring[k] = act0[k] * (target[k] - q[k])
                damping[k] = -(act1[k] * dq[k])
        else:
            for k in range(nb):
                # t(p1) - t(p2) = (p1 - p2) * (k1 + k2*(p1 + p2)) for t(p) = k1*p + k2*p^2
                p1, p2 = max(act0[k] - q[k], 0.0), max(q[k] - act1[k], 0.0)
                spring[k] = ((p1 + p2) * k2 + k1) * (p1 - p2)
                damping[k] = 0.0
        target0, target1 = tg[0, j, s0:e0], tg[1, j, s0:e0]
        angle_rate, rate_0, rate_1 = f[0, j, s0:e0], f[2, j, s0:e0], f[3, j, s0:e0]
        lower, upper = prm[_LOWER, j], prm[_UPPER, j]
        k_stop, b_stop = prm[_K_STOP, j], prm[_B_STOP, j]
        # everything else but friction and perturbations in one pass
        for k in range(nb):
            qk, dqk = q[k], dq[k]
            passive[k] = (neg_viscous * dqk + damping[k]
                          + (contact_force(lower - qk, -dqk, k_stop, b_stop)
                             - contact_force(qk - upper, dqk, k_stop, b_stop)))
            angle_rate[k] = dqk
            rate_0[k] = min(max((target0[k] - act0[k]) * inv_tc0, -rate0), rate0)
            rate_1[k] = min(max((target1[k] - act1[k]) * inv_tc1, -rate1), rate1)
        neg_coulomb, inv_smoothing = prm[_NEG_COULOMB, j], prm[_INV_SMOOTHING, j]
        if neg_coulomb != 0.0:  # only on joints that have friction
            for k in range(nb):
                passive[k] += neg_coulomb * _tanh(dq[k] * inv_smoothing)
        if has_ext:
            given = ext[e, j, s0:e0]
            for k in range(nb):
                external[k] = given[k]
        else:
            external[:] = 0.0
        for layer in range(walls.shape[1]):
            position, side, stiffness, wall_damping = (
                walls[0, layer, j, s0:e0], walls[1, layer, j, s0:e0], walls[2, layer, j, s0:e0],
                walls[3, layer, j, s0:e0])
            for k in range(nb):
                force = contact_force((q[k] - position[k]) * side[k], side[k] * dq[k],
                                      stiffness[k], wall_damping[k])
                external[k] -= force * side[k]
        power_spring, power_passive, power_external = (f[4, j, s0:e0], f[5, j, s0:e0],
                                                       f[6, j, s0:e0])
        accel = f[1, j, s0:e0]
        for k in range(nb):
            power_spring[k] = spring[k] * dq[k]
            power_passive[k] = passive[k] * dq[k]
            power_external[k] = external[k] * dq[k]
            accel[k] = (spring[k] + passive[k]) + external[k]
        if not coupled:
            neg_mgl, offset = prm[_NEG_MGL, j], prm[_OFFSET, j]
            gravity, scale = grav[j, s0:e0], accel_scale[j, s0:e0]
            for k in range(nb):
                gravity[k] = neg_mgl * _sincos(q[k] - offset)[0]
            for k in range(nb):
                accel[k] = (accel[k] + gravity[k]) * scale[k]
    if coupled:
        slot = b % ws[1].shape[0]  # see rigid_body.block_workspace
        _block_forward(x[0], x[1], f[1], free, zero, s0, nb, *model, ws[0][slot], ws[1][slot],
                       ws[2][slot], ws[3][slot], ws[4][slot], ws[5][slot], ws[6][slot],
                       ws[7][slot], f[1])


def _rhs_blocks(x, tg, ext, has_ext, prm, walls, kind, coupled, free, accel_scale, model, ws,
                zero, torques, mech, grav, f):
    n_s = x.shape[2]
    block = ws[1].shape[2]  # from the workspace: a cached build never sees a stale block size
    for b in range((n_s + block - 1) // block):
        s0 = b * block
        _block_rhs(s0, min(block, n_s - s0), b, x, tg, ext, 0, has_ext, prm, walls, kind,
                   coupled, free, accel_scale, model, ws, zero, torques, mech, grav, f)


def _step_blocks(method, h, y, tg, ext, has_ext, prm, walls, kind, coupled, free, accel_scale,
                 model, ws, zero, stages, ys, acc, torques, mech, grav, deflection, injection):
    n_rows, n_j, n_s = y.shape
    n_dyn = 4
    block = ws[1].shape[2]
    for b in numba.prange((n_s + block - 1) // block):
        s0 = b * block
        nb = min(block, n_s - s0)
        _block_rhs(s0, nb, b, y, tg, ext, 0, has_ext, prm, walls, kind, coupled, free,
                   accel_scale, model, ws, zero, torques, mech, grav, stages[0])
        e0 = s0 + nb
        for j in range(n_j):
            q, out = y[0, j, s0:e0], deflection[j, s0:e0]
            if kind == IDEAL:
                target = tg[2, j, s0:e0]
                for k in range(nb):
                    out[k] = q[k] - target[k]
            else:
                act0, act1 = y[2, j, s0:e0], y[3, j, s0:e0]
                for k in range(nb):
                    out[k] = q[k] - 0.5 * (act0[k] + act1[k])
        if method == 0:
            for i in range(3):
                step = 0.5 * h if i < 2 else h
                for r in range(n_dyn):
                    for j in range(n_j):
                        rate, start, into = (stages[i, r, j, s0:e0], y[r, j, s0:e0],
                                             ys[r, j, s0:e0])
                        for k in range(nb):
                            into[k] = rate[k] * step + start[k]
                _block_rhs(s0, nb, b, ys, tg, ext, 1 if i < 2 else 2, has_ext, prm, walls, kind,
                           coupled, free, accel_scale, model, ws, zero, torques, mech, grav,
                           stages[i + 1])
            sixth = h / 6.0
            for r in range(n_rows):
                for j in range(n_j):
                    k1, k2, k3, k4 = (stages[0, r, j, s0:e0], stages[1, r, j, s0:e0],
                                      stages[2, r, j, s0:e0], stages[3, r, j, s0:e0])
                    increment, state = acc[r, j, s0:e0], y[r, j, s0:e0]
                    for k in range(nb):
                        change = ((k2[k] + k3[k]) * 2.0 + k1[k] + k4[k]) * sixth
                        increment[k] = change
                        state[k] += change
        else:
            for r in range(n_rows):
                for j in range(n_j):
                    for k in range(nb):
                        s = _lane(s0, k)
                        acc[r, j, s] = stages[0, r, j, s] * h
                        if method == 2 or r != 0:
                            y[r, j, s] += acc[r, j, s]
            if method == 1:  # symplectic: the angle moves with the new velocity
                for j in range(n_j):
                    for k in range(nb):
                        s = _lane(s0, k)
                        acc[0, j, s] = y[1, j, s] * h
                        y[0, j, s] += acc[0, j, s]
        # midpoint rule for 1/2 * dK/dt * deflection^2 over the step, from the step's increments:
        # deflection at mid-step is the one before plus half the change of angle minus half the
        # change of the set equilibrium
        for j in range(n_j):
            k2 = prm[_K2, j]
            d_q, d0, d1 = acc[0, j, s0:e0], acc[2, j, s0:e0], acc[3, j, s0:e0]
            before, into = deflection[j, s0:e0], injection[j, s0:e0]
            if kind == IDEAL:
                for k in range(nb):
                    middle = d_q[k] * 0.5 + before[k]
                    into[k] += middle * middle * d0[k] * 0.5
            else:
                for k in range(nb):
                    middle = (d_q[k] - (d0[k] + d1[k]) * 0.5) * 0.5 + before[k]
                    into[k] += middle * middle * ((d0[k] - d1[k]) * k2 * 2.0) * 0.5


# the state derivative of a whole batch (see _block_rhs), on one thread: what recording reads
rhs_batch: Callable[..., None] = _distinct(_rhs_blocks)
# one step of a whole batch: on one thread (the default: campaigns already run one process per
# core, and GNU OpenMP, numba's threading layer here, aborts a process forked after it started,
# as campaign workers are), or over numba's threads
_step_serial = _distinct(_step_blocks)
_step_parallel = _parallel(_step_blocks)


@numba.njit(cache=True, nogil=True, error_model="numpy", fastmath=True,
            pipeline_class=_UncountedCompiler)
def _steps_serial(method, h, y, tg, ext, has_ext, c0, c1, prm, walls, kind, coupled, free,
                  accel_scale, model, ws, zero, stages, ys, acc, torques, mech, grav, deflection,
                  injection):
    """Steps c0 .. c1 - 1 of a chunk in one call: targets tg[c], stage torques ext[c] (ext[0],
    unread, without them); the rest as :func:`_step_blocks`."""
    for c in range(c0, c1):
        _step_serial(method, h, y, tg[c], ext[c if has_ext else 0], has_ext, prm, walls, kind,
                     coupled, free, accel_scale, model, ws, zero, stages, ys, acc, torques, mech,
                     grav, deflection, injection)


@_compiled
def _steps_parallel(method, h, y, tg, ext, has_ext, c0, c1, prm, walls, kind, coupled, free,
                    accel_scale, model, ws, zero, stages, ys, acc, torques, mech, grav,
                    deflection, injection):
    """:func:`_steps_serial` with each step's blocks over numba's threads."""
    for c in range(c0, c1):
        _step_parallel(method, h, y, tg[c], ext[c if has_ext else 0], has_ext, prm, walls,
                       kind, coupled, free, accel_scale, model, ws, zero, stages, ys, acc,
                       torques, mech, grav, deflection, injection)


# steps c0 .. c1 - 1 of a chunk of commands: [0] on one thread, [1] over numba's threads
step_batch: tuple[Callable[..., None], Callable[..., None]] = (_steps_serial, _steps_parallel)
