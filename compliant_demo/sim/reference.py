"""Slow, independent reference for one scenario: the same model integrated by ``solve_ivp``.

The joint and mechanism equations are written out here a second time, per scenario and in the
plain physical variables (motor angles, not the simulator's offset rows), and integrated with
scipy's adaptive Runge-Kutta segment by segment between the step boundaries where a command or
a perturbation changes. Tests and the benchmark compare :func:`simulate` with it; it shares only
the perturbation profiles and the antagonistic inverse map (tested on their own).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
from scipy.integrate import solve_ivp

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import AntagonisticParams, IdealImpedanceParams, JointParams
from compliant_demo.perturbation import PerturbationSchedule
from compliant_demo.sim.integrate import CONTACT_DAMPING_DEPTH, GRAVITY
from compliant_demo.sim.mechanisms import antagonistic_motor_angles
from compliant_demo.sim.schedule import compile_schedules

__all__ = ["reference_solve"]


def _scenario_commands(arr, scenario: int) -> np.ndarray:
    arr = np.asarray(arr, dtype=float)
    return arr[:, scenario, :] if arr.ndim == 3 else arr


def _targets(mechanism, eq: np.ndarray, k: np.ndarray, d: np.ndarray | None) -> np.ndarray:
    """Actuator targets of one command row: ideal (K, D), antagonistic (theta1, theta2)."""
    if isinstance(mechanism, IdealImpedanceParams):
        damping = np.full_like(k, mechanism.damping_min) if d is None else d
        return np.concatenate(
            [
                np.clip(k, mechanism.stiffness_min, mechanism.stiffness_max),
                np.clip(damping, mechanism.damping_min, mechanism.damping_max),
            ]
        )
    theta1, theta2, _, _ = antagonistic_motor_angles(mechanism, eq, k)
    return np.concatenate([theta1, theta2])


def _ramp(penetration: np.ndarray) -> np.ndarray:
    """Share of the contact damping acting at this penetration (see step_kernel.contact_force)."""
    return np.minimum(penetration / CONTACT_DAMPING_DEPTH, 1.0)


def _tension(phi: np.ndarray, p: AntagonisticParams) -> np.ndarray:
    return np.where(phi > 0, p.k1 * phi + p.k2 * phi**2, 0.0)


def reference_solve(
    joints: Sequence[JointParams],
    mechanism: IdealImpedanceParams | AntagonisticParams,
    equilibrium,
    stiffness,
    damping=None,
    schedules: Sequence[PerturbationSchedule] | None = None,
    scenario: int = 0,
    q0=None,
    dq0=None,
    dt: float = 1e-3,
    seed: int | None = None,
    rtol: float = 1e-8,
    atol: float = 1e-10,
    method: str = "RK45",
    forward_dynamics: Callable[[np.ndarray, np.ndarray, np.ndarray], np.ndarray] | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Angle and velocity of one scenario at every step boundary, by ``solve_ivp``.

    Parameters are those of :func:`simulate` (one mechanism record shared by the joints);
    ``scenario`` picks the schedule and, for 3-D commands, the command slice; ``seed`` must be
    the one given to :func:`simulate` when schedules hold unseeded random torques. ``method``
    "RK4" takes fixed classical Runge-Kutta steps of ``dt`` instead (stage times as the
    simulator's). ``forward_dynamics(q, dq, tau)`` gives the accelerations (rad/s^2) of a
    coupled arm (for example Pinocchio's ``aba``; it carries gravity, so the joints must not):
    then impulses and holds, which the coupled arm handles through its mass matrix, are refused.

    Returns
    -------
    q, dq : (n_steps + 1, n_joints) arrays, rad and rad/s, at t = k*dt
    """
    n_joints = len(joints)
    eq_cmd = _scenario_commands(equilibrium, scenario)
    k_cmd = _scenario_commands(stiffness, scenario)
    d_cmd = None if damping is None else _scenario_commands(damping, scenario)
    n_steps = eq_cmd.shape[0]
    n_scen = 1 if schedules is None else len(schedules)
    compiled = compile_schedules(schedules, n_scen, [j.inertia for j in joints], dt, seed)
    inertia = np.array([j.inertia for j in joints])
    viscous = np.array([j.viscous_damping for j in joints])
    coulomb = np.array([j.coulomb_friction for j in joints])
    v_smooth = np.array([j.friction_smoothing_velocity for j in joints])
    mgl = np.array([j.gravity_mass * GRAVITY * j.com_distance for j in joints])
    offset = np.array([j.gravity_offset for j in joints])
    lower = np.array([j.lower_limit for j in joints])
    upper = np.array([j.upper_limit for j in joints])
    k_stop = np.array([j.limit_stiffness for j in joints])
    b_stop = np.array([j.limit_damping for j in joints])
    ideal = isinstance(mechanism, IdealImpedanceParams)
    if isinstance(mechanism, IdealImpedanceParams):
        lag = mechanism.time_constant
        rate = np.repeat([mechanism.stiffness_rate_limit, mechanism.damping_rate_limit], n_joints)
    else:
        lag = mechanism.motor_time_constant
        rate = np.full(2 * n_joints, mechanism.motor_speed_limit)

    def row(k: int) -> np.ndarray:
        return _targets(mechanism, eq_cmd[k], k_cmd[k], None if d_cmd is None else d_cmd[k])

    def rhs(t, y, k, targets, walls, free):
        q, dq, act = y[:n_joints], y[n_joints : 2 * n_joints], y[2 * n_joints :]
        if ideal:
            tau = act[:n_joints] * (eq_cmd[k] - q) - act[n_joints:] * dq
        else:
            d0 = mechanism.pretension_offset
            tau = _tension(act[:n_joints] - q + d0, mechanism) - _tension(
                q - act[n_joints:] + d0, mechanism
            )
        tau = tau - viscous * dq - coulomb * np.tanh(dq / v_smooth) - mgl * np.sin(q - offset)
        below, above = lower - q, q - upper
        push_up = np.maximum(k_stop * below - b_stop * dq * _ramp(below), 0)
        push_down = np.maximum(k_stop * above + b_stop * dq * _ramp(above), 0)
        tau = tau + np.where(below > 0, push_up, 0) - np.where(above > 0, push_down, 0)
        tau = tau + compiled.torque_at(scenario, t, k)
        for j, surface, side, k_wall, b_wall in walls:
            penetration = side * (q[j] - surface)
            if penetration > 0:
                damping_force = b_wall * side * dq[j] * min(penetration / CONTACT_DAMPING_DEPTH, 1)
                tau[j] -= side * max(k_wall * penetration + damping_force, 0.0)
        act_rate = np.clip((targets - act) / lag, -rate, rate)
        accel = tau / inertia if forward_dynamics is None else forward_dynamics(q, dq, tau)
        return np.concatenate([dq * free, accel * free, act_rate])

    # steps where something changes: commands, impulses, holds, walls, torque terms
    changes = {0, n_steps}
    for arr in (eq_cmd, k_cmd, d_cmd):
        if arr is not None:
            changes.update((np.nonzero(np.any(np.diff(arr, axis=0) != 0, axis=1))[0] + 1).tolist())
    mine_impulses = [(j, k, imp) for s, j, k, imp in compiled.impulses if s == scenario]
    mine_holds = [(j, a, b) for s, j, a, b in compiled.holds if s == scenario]
    mine_walls = [w for w in compiled.walls if w.scenario == scenario]
    if forward_dynamics is not None and (mine_impulses or mine_holds):
        raise InvalidInputError(
            f"scenario {scenario}: impulses and holds are not in the coupled reference")
    for _, k, _ in mine_impulses:
        changes.add(k)
    for _, a, b in mine_holds:
        changes.update((a, b))
    for w in mine_walls:
        changes.update((w.start, w.stop))
    for term in compiled.terms:
        if term.scenario == scenario:
            changes.update((term.start, term.stop))
    bounds = sorted(c for c in changes if 0 <= c <= n_steps)

    targets0 = row(0)
    state = np.zeros(4 * n_joints)
    state[2 * n_joints :] = targets0
    if q0 is not None:
        state[:n_joints] = q0
    elif ideal:
        state[:n_joints] = eq_cmd[0]
    else:
        state[:n_joints] = 0.5 * (targets0[:n_joints] + targets0[n_joints:])
    if dq0 is not None:
        state[n_joints : 2 * n_joints] = dq0
    q_out = np.zeros((n_steps + 1, n_joints))
    dq_out = np.zeros((n_steps + 1, n_joints))
    active_walls: dict[int, tuple] = {}
    for a, b in zip(bounds[:-1], bounds[1:], strict=True):
        for j, start, _ in mine_holds:
            if start == a:
                state[n_joints + j] = 0.0
        free = np.ones(n_joints)
        for j, start, stop in mine_holds:
            if start <= a < stop:
                free[j] = 0.0
        for j, k, impulse in mine_impulses:
            if k == a and free[j]:
                state[n_joints + j] += impulse / inertia[j]
        for index, w in enumerate(mine_walls):
            if w.start == a:
                surface = w.position + (state[w.joint] if w.relative else 0.0)
                active_walls[index] = (w.joint, surface, w.side, w.stiffness, w.damping)
            if w.stop == a:
                active_walls.pop(index, None)
        targets = row(a)
        args = (a, targets, list(active_walls.values()), free)
        if method == "RK4":
            states = _fixed_rk4(rhs, a, b, dt, state, args)
        else:
            states = solve_ivp(rhs, (a * dt, b * dt), state, method=method,
                               t_eval=np.arange(a, b + 1) * dt, rtol=rtol, atol=atol,
                               args=args).y.T
        q_out[a : b + 1] = states[:, :n_joints]
        dq_out[a : b + 1] = states[:, n_joints : 2 * n_joints]
        state = states[-1].copy()
    return q_out, dq_out


def _fixed_rk4(rhs, a: int, b: int, dt: float, state: np.ndarray, args: tuple) -> np.ndarray:
    """States at steps a..b of classical RK4 with step dt (Hairer, Norsett, Wanner, Solving
    ODEs I, sec. II.1, from memory)."""
    states = np.empty((b - a + 1, state.size))
    states[0] = state
    y = state
    for i in range(b - a):
        t = (a + i) * dt
        k1 = rhs(t, y, *args)
        k2 = rhs(t + 0.5 * dt, y + 0.5 * dt * k1, *args)
        k3 = rhs(t + 0.5 * dt, y + 0.5 * dt * k2, *args)
        k4 = rhs(t + dt, y + dt * k3, *args)
        y = y + dt / 6.0 * (k1 + 2.0 * k2 + 2.0 * k3 + k4)
        states[i + 1] = y
    return states
