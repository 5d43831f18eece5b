"""What one recorded sample of the simulator holds, compiled: every channel of a batch at once.

The recorder of :class:`~compliant_demo.sim.integrate.Simulator` calls :func:`observe_batch`
after the compiled state derivative (:mod:`.step_kernel`) at the current state, which leaves the
torques and the actuators' rates in place; it writes the channels of one row of the record
(``FLOAT_CHANNELS`` and ``BOOL_CHANNELS`` order) and the actuator outputs. Left to the caller:
the commands' clamp flags, sensor noise (numpy's generator), the reaction of held joints and,
on a coupled arm, the kinetic and gravity energy of the chain (:mod:`.rigid_body`).
"""

from __future__ import annotations

import math

import numba
import numpy as np

from compliant_demo.sim.rigid_body import _DistinctArgumentsCompiler
from compliant_demo.sim.step_kernel import IDEAL, PARAM_ROWS

__all__ = ["BOOL_CHANNELS", "FLOAT_CHANNELS", "observe_batch"]

# recorded channels, (J, S) each per sample
FLOAT_CHANNELS = (
    "q", "dq", "q_measured", "tau_mechanism", "tau_measured", "tau_external",
    "stiffness_realised", "damping_realised", "equilibrium_realised", "kinetic",
    "spring_potential", "gravity_potential", "end_stop_potential", "actuator_work",
    "perturbation_work", "dissipated", "stiffness_injection", "spring_tension", "motor_torque",
)
BOOL_CHANNELS = ("commands_clamped", "held", "in_contact")
(_Q, _DQ, _Q_MEASURED, _TAU_MECH, _TAU_MEASURED, _TAU_EXT, _STIFFNESS, _DAMPING, _EQUILIBRIUM,
 _KINETIC, _SPRING_POT, _GRAVITY_POT, _STOP_POT, _ACTUATOR_WORK, _PERTURBATION_WORK,
 _DISSIPATED, _INJECTION, _TENSION, _MOTOR) = range(len(FLOAT_CHANNELS))
_HELD, _CONTACT = (BOOL_CHANNELS.index(name) for name in ("held", "in_contact"))
_ROW = {name: PARAM_ROWS.index(name) for name in PARAM_ROWS}
_INERTIA, _RESOLUTION, _NEG_MGL, _OFFSET = (
    _ROW[n] for n in ("inertia", "encoder_resolution", "neg_mgl", "gravity_offset"))
_LOWER, _UPPER, _K_STOP, _K1, _K2 = (_ROW[n] for n in ("lower", "upper", "stop_stiffness", "k1",
                                                      "k2"))
_INV_TC, _RATE, _MOTOR_INERTIA, _MOTOR_OFFSET = (
    _ROW[n] for n in ("inv_time_constant_0", "rate_limit_0", "motor_inertia", "motor_offset"))
assert PARAM_ROWS[_INV_TC + 1] == "inv_time_constant_1" and PARAM_ROWS[_RATE + 1] == "rate_limit_1"


@numba.njit(cache=True, nogil=True, error_model="numpy",
            pipeline_class=_DistinctArgumentsCompiler)
def observe_batch(y, tg, f0, torques, mech, prm, kind, coupled, walls, wall_on, free, start,
                  jumps, injection, floats, bools, actuators, row):
    """Write sample ``row`` of the record at the state ``y`` (rows q, dq, two actuators, three
    work integrals; ``(rows, J, S)``) under targets ``tg``.

    Parameters
    ----------
    f0 : the state derivative at ``y`` (its actuator rows give the motors' rates)
    torques : spring, passive and external torques at ``y``, N*m; mech : mechanism damping torque
    prm : per-joint constants (:data:`.step_kernel.PARAM_ROWS`); kind : mechanism code
    coupled : a chain moves the joints (kinetic and gravity energy left to the caller)
    walls, wall_on : the walls' (position, side, stiffness, damping) and which act, per layer
    free : 1 for a free joint, 0 for a held one
    start : spring and end-stop potential at the start, J, ``(2, J, S)``
    jumps : perturbation work done in jumps, J; injection : stiffness-injection integral, J
    floats, bools : ``(channels, n_rec, J, S)`` records; actuators ``(n_rec, 2, J, S)``

    Notes
    -----
    Antagonistic springs: elongations p1 = s1 - q, p2 = q - s2 (internal motor rows), tension
    t(p) = (k1 + k2*p)*p, energy p^2*(k1/2 + k2*p/3), stiffness k1 + 2*k2*p per taut spring;
    a motor's torque is J_m times its acceleration -rate/T within the step (0 on its rate
    limit) plus its spring's tension. Ideal mechanism: energy 1/2*K*(q - q_eq)^2.
    """
    n_j, n_s = y.shape[1], y.shape[2]
    n_layers = walls.shape[1]
    for j in range(n_j):
        resolution, inertia = prm[_RESOLUTION, j], prm[_INERTIA, j]
        neg_mgl, offset = prm[_NEG_MGL, j], prm[_OFFSET, j]
        lower, upper, k_stop = prm[_LOWER, j], prm[_UPPER, j], prm[_K_STOP, j]
        k1, k2 = prm[_K1, j], prm[_K2, j]
        inv_tc0, inv_tc1 = prm[_INV_TC, j], prm[_INV_TC + 1, j]
        rate_limit0, rate_limit1 = prm[_RATE, j], prm[_RATE + 1, j]
        motor_inertia, d0 = prm[_MOTOR_INERTIA, j], prm[_MOTOR_OFFSET, j]
        for s in range(n_s):
            q, dq, act0, act1 = y[0, j, s], y[1, j, s], y[2, j, s], y[3, j, s]
            floats[_Q, row, j, s] = q
            floats[_DQ, row, j, s] = dq
            floats[_Q_MEASURED, row, j, s] = (np.rint(q / resolution) * resolution
                                              if resolution > 0.0 else q)
            tau_mech = torques[0, j, s] + mech[j, s]
            floats[_TAU_MECH, row, j, s] = tau_mech
            floats[_TAU_MEASURED, row, j, s] = tau_mech
            floats[_TAU_EXT, row, j, s] = torques[2, j, s]
            if kind == IDEAL:
                spring = 0.5 * act0 * (q - tg[2, j, s]) ** 2
                floats[_STIFFNESS, row, j, s] = act0
                floats[_DAMPING, row, j, s] = act1
                floats[_EQUILIBRIUM, row, j, s] = tg[2, j, s]
                floats[_TENSION, row, j, s] = 0.0
                floats[_MOTOR, row, j, s] = 0.0
                actuators[row, 0, j, s], actuators[row, 1, j, s] = act0, act1
            else:
                p1, p2 = max(act0 - q, 0.0), max(q - act1, 0.0)
                spring = p1 * p1 * (0.5 * k1 + k2 / 3.0 * p1) + p2 * p2 * (0.5 * k1 + k2 / 3.0 * p2)
                floats[_STIFFNESS, row, j, s] = (
                    (k1 + 2.0 * k2 * p1 if p1 > 0.0 else 0.0)
                    + (k1 + 2.0 * k2 * p2 if p2 > 0.0 else 0.0))
                floats[_DAMPING, row, j, s] = 0.0
                floats[_EQUILIBRIUM, row, j, s] = 0.5 * (act0 + act1)
                t1, t2 = (k1 + k2 * p1) * p1, (k1 + k2 * p2) * p2
                rate0, rate1 = f0[2, j, s], f0[3, j, s]
                accel0 = -rate0 * inv_tc0 if abs(rate0) < rate_limit0 else 0.0
                accel1 = -rate1 * inv_tc1 if abs(rate1) < rate_limit1 else 0.0
                floats[_TENSION, row, j, s] = max(t1, t2)
                floats[_MOTOR, row, j, s] = max(abs(accel0 * motor_inertia + t1),
                                                abs(accel1 * motor_inertia - t2))
                actuators[row, 0, j, s], actuators[row, 1, j, s] = act0 - d0, act1 + d0
            below, above = max(lower - q, 0.0), max(q - upper, 0.0)
            stop = 0.5 * k_stop * (below * below + above * above)
            floats[_SPRING_POT, row, j, s] = spring
            floats[_STOP_POT, row, j, s] = stop
            if not coupled:
                floats[_KINETIC, row, j, s] = 0.5 * inertia * dq * dq
                floats[_GRAVITY_POT, row, j, s] = -neg_mgl * (1.0 - math.cos(q - offset))
            floats[_ACTUATOR_WORK, row, j, s] = spring - start[0, j, s] + y[4, j, s]
            floats[_PERTURBATION_WORK, row, j, s] = y[6, j, s] + jumps[j, s]
            floats[_DISSIPATED, row, j, s] = -y[5, j, s] - (stop - start[1, j, s])
            floats[_INJECTION, row, j, s] = injection[j, s]
            bools[_HELD, row, j, s] = free[j, s] == 0.0
            bools[_CONTACT, row, j, s] = q < lower or q > upper
        # walls in passes of their own: the loop over scenarios stays the innermost one
        contact = bools[_CONTACT, row, j]
        for layer in range(n_layers):
            for s in range(n_s):
                contact[s] |= wall_on[layer, j, s] and (
                    (y[0, j, s] - walls[0, layer, j, s]) * walls[1, layer, j, s] > 0.0)
