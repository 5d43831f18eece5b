"""Published stability checks of a schedule: gravity in the damping ratio, Kronander and Billard's
condition for varying impedance, and the energy tank with damping inflow, against closed forms."""

from __future__ import annotations

import numpy as np
import pytest

from compliant_demo.evaluation import FLAG_KINDS, check_schedule
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.impedance_stability import common_alpha, gravity_stiffness
from compliant_demo.models import BodyParams, ChainParams, IdealImpedanceParams, JointParams
from compliant_demo.primitives import Rollout
from compliant_demo.sim import GRAVITY, simulate

IDEAL = IdealImpedanceParams(stiffness_min=1.0, stiffness_max=500.0, damping_max=20.0)


def _path(t, position, stiffness, damping, joint="elbow") -> Rollout:
    """One-joint rollout along ``position`` (rad) with its finite-difference velocity."""
    n = t.size
    q = np.broadcast_to(np.asarray(position, dtype=float), (n,)).reshape(n, 1)
    dq = np.gradient(q, t, axis=0)
    return Rollout(t, q, dq, np.zeros_like(q),
                   np.broadcast_to(np.asarray(stiffness, dtype=float), (n,)).reshape(n, 1),
                   np.broadcast_to(np.asarray(damping, dtype=float), (n,)).reshape(n, 1),
                   (joint,), float(t[-1]))


# --- damping ratio with the gravity stiffness --------------------------------------------------


def test_pendulum_damping_ratio_and_static_instability():
    inertia, mass, length, stiffness, damping = 0.05, 1.0, 0.3, 2.0, 0.4
    mgl = mass * GRAVITY * length
    pendulum = JointParams(name="elbow", inertia=inertia, gravity_mass=mass, com_distance=length,
                           viscous_damping=0.0)
    t = np.linspace(0.0, 10.0, 10001)
    angle = np.pi * t / 10.0  # from hanging (0) to upright (pi), slowly
    report = check_schedule(_path(t, angle, stiffness, damping), [pendulum], IDEAL)
    # Linearised pendulum on a spring: I e'' + d e' + (k + m g l cos q) e = 0 (common practice),
    # zeta = d / (2 sqrt((k + m g l cos q) I)); gravity stiffness m g l cos q.
    effective = stiffness + mgl * np.cos(angle)
    np.testing.assert_allclose(report.gravity_stiffness[:, 0], mgl * np.cos(angle), rtol=1e-12)
    holding = effective > 0
    np.testing.assert_allclose(report.damping_ratio[holding, 0],
                               damping / (2 * np.sqrt(effective[holding] * inertia)), rtol=1e-12)
    assert np.isnan(report.damping_ratio[~holding, 0]).all()
    # Above q* = arccos(-k / (m g l)) gravity outweighs the spring: statically unstable.
    unstable = [s for s in report.stretches if s.kind == "statically_unstable"]
    assert len(unstable) == 1
    crossing = 10.0 * np.arccos(-stiffness / mgl) / np.pi
    assert unstable[0].t_start == pytest.approx(crossing, abs=1e-3)
    assert unstable[0].t_end == pytest.approx(10.0)
    assert unstable[0].worst == pytest.approx(stiffness - mgl, rel=1e-9)
    assert report.summary["statically_unstable_fraction"][0] == pytest.approx(
        1 - crossing / 10.0, abs=1e-3)
    # Where the ratio is undefined it is not also reported as under-damped.
    for stretch in report.stretches:
        if stretch.kind == "under_damped":
            assert stretch.t_end < crossing


@pytest.mark.parametrize(("stiffness", "unstable"), [(1.5, True), (6.0, False)])
def test_statically_unstable_flag_predicts_the_upright_pendulum_falling(stiffness, unstable):
    # Upright (gravity_offset = pi: gravity stiffness -m g l = -2.94 N*m/rad at q = 0): a weaker
    # spring lets it fall, a stiffer one holds it (linearised I e'' + d e' + (k - m g l) e = 0,
    # common practice), in the simulator from a 0.01 rad offset.
    joint = JointParams(name="elbow", inertia=0.05, gravity_mass=1.0, com_distance=0.3,
                        gravity_offset=np.pi, viscous_damping=0.0)
    t = np.linspace(0.0, 1.0, 101)
    report = check_schedule(_path(t, 0.0, stiffness, 0.2), [joint], IDEAL)
    flagged = any(s.kind == "statically_unstable" for s in report.stretches)
    assert flagged == unstable
    n = 2000
    result = simulate([joint], IDEAL, np.zeros((n, 1)), np.full((n, 1), stiffness),
                      np.full((n, 1), 0.2), q0=[0.01], dt=1e-3)
    drift = np.abs(result.q[:, 0, 0]).max()
    assert (drift > 0.3) == unstable and (drift < 0.02) == (not unstable)


def test_chain_gravity_stiffness_equals_the_pendulum_closed_form():
    # One link hanging along -z at q = 0, turning about y: tau_g = m g l sin q (common practice).
    mass, length = 1.5, 0.25
    chain = ChainParams(bodies=(BodyParams(joint="elbow", axis=(0.0, 1.0, 0.0), mass=mass,
                                           com=(0.0, 0.0, -length),
                                           inertia=(0.01, 0.0, 0.0, 0.01, 0.0, 0.01)),))
    q = np.linspace(-3.0, 3.0, 121)[:, None]
    slope = gravity_stiffness([JointParams(name="elbow")], q, chain)
    # Central differences with h = 1e-5 rad: error ~ h^2 m g l / 6 plus rounding, below 1e-8.
    np.testing.assert_allclose(slope[:, 0], mass * GRAVITY * length * np.cos(q[:, 0]),
                               rtol=0, atol=1e-6)


# --- Kronander and Billard's condition ---------------------------------------------------------


@pytest.mark.parametrize(("stiffness", "damping", "holds"), [
    (50.0, 1.0, True), (50.0, 0.0, False), (0.0, 1.0, False), (-5.0, 1.0, False),
    (1e-3, 1e-3, True),
])
def test_constant_impedance_holds_iff_stiffness_and_damping_positive(stiffness, damping, holds):
    # Constant k, d: an alpha in (0, d/m) exists iff k > 0 and d > 0, the Routh-Hurwitz condition
    # of m e'' + d e' + k e = 0 (common practice; Kronander and Billard, T-RO 2016, from memory).
    t = np.linspace(0.0, 1.0, 101)
    k = np.full((t.size, 1), stiffness)
    d = np.full((t.size, 1), damping)
    alpha, lower, upper = common_alpha(t, np.array([0.2]), k, d)
    inside = (lower < alpha) & (alpha < upper)
    assert inside.all() == holds and inside.any() == holds
    if holds:
        assert 0 < alpha[0] < damping / 0.2


def test_stiffening_ramp_is_unproven_until_damping_outpaces_it():
    # m = 1, d = 2, k = 10 + 100 t: the condition at t needs alpha > k'/(2k) = 50/k(t) and
    # alpha < d/m = 2 (hand computed), so no alpha works while k <= 25 N*m/rad (t <= 0.15 s) and
    # any alpha just below 2 works afterwards.
    t = np.linspace(0.0, 1.0, 1001)
    joint = JointParams(name="elbow", inertia=1.0, viscous_damping=0.0)
    report = check_schedule(_path(t, 0.0, 10.0 + 100.0 * t, 2.0), [joint], IDEAL)
    unproven = [s for s in report.stretches if s.kind == "varying_impedance_unproven"]
    assert len(unproven) == 1
    assert unproven[0].t_start == 0.0 and unproven[0].t_end == pytest.approx(0.15, abs=1.5e-3)
    # alpha is in the gap between the last lower bound below 2 and 2
    assert 50.0 / 25.1 < report.stability_alpha[0] < 2.0
    # at t = 0 the interval (5, 2) is empty: the common alpha misses it by 5 - alpha
    assert unproven[0].worst == pytest.approx(5.0 - report.stability_alpha[0], rel=1e-9)
    assert report.summary["stability_alpha_per_s"] == [report.stability_alpha[0]]
    assert (report.stability_excess[t > 0.16, 0] < 0).all()


def test_softening_and_damping_changes_enter_with_alpha():
    # k falling, d rising slowly: a = d' - 2k < 0 and b = -k' > 0, so alpha > b/a is void and any
    # alpha in (0, d/m) works (hand computed).
    t = np.linspace(0.0, 1.0, 501)
    k = (100.0 - 50.0 * t)[:, None]
    d = (1.0 + 4.0 * t)[:, None]
    alpha, lower, upper = common_alpha(t, np.array([0.1]), k, d)
    np.testing.assert_allclose(lower, 0.0)
    np.testing.assert_allclose(upper[:, 0], d[:, 0] / 0.1, rtol=1e-12)
    assert ((lower < alpha) & (alpha < upper)).all()
    # Damping rising faster than 2k at constant k: a = 20 - 10 > 0 and b = 0 need alpha < 0,
    # so no alpha works (hand computed).
    k_flat = np.full_like(k, 5.0)
    _, lower_rise, upper_rise = common_alpha(t, np.array([0.1]), k_flat, (1.0 + 20.0 * t)[:, None])
    assert (lower_rise >= upper_rise).all()


def test_lyapunov_function_of_the_condition_decreases_along_a_solution():
    # The derivation behind common_alpha: where the condition holds for alpha, V = 1/2 m (e' +
    # alpha e)^2 + 1/2 (k + alpha d - alpha^2 m) e^2 decreases along m e'' + d e' + k e = 0.
    # Checked on a solution by scipy's RK45 (rtol 1e-10) for a stiffening, damping-varying case.
    from scipy.integrate import solve_ivp

    m = 0.5

    def k(t):
        return 40.0 + 30.0 * np.sin(1.5 * t)

    def d(t):
        return 3.0 + np.cos(2.0 * t)

    t = np.linspace(0.0, 4.0, 4001)
    alpha, lower, upper = common_alpha(t, np.array([m]), k(t)[:, None], d(t)[:, None])
    assert ((lower < alpha) & (alpha < upper)).all()
    a = alpha[0]
    solution = solve_ivp(lambda s, y: [y[1], -(d(s) * y[1] + k(s) * y[0]) / m], (0.0, 4.0),
                         [0.2, 0.0], t_eval=t, rtol=1e-10, atol=1e-12)
    e, de = solution.y
    lyapunov = 0.5 * m * (de + a * e) ** 2 + 0.5 * (k(t) + a * d(t) - a**2 * m) * e**2
    assert (np.diff(lyapunov) < 1e-12).all() and lyapunov[-1] < 1e-3 * lyapunov[0]


def test_undamped_springs_are_unproven_everywhere():
    t = np.linspace(0.0, 1.0, 201)
    joint = JointParams(name="elbow", inertia=0.03, viscous_damping=0.0)
    report = check_schedule(_path(t, 0.0, 50.0, 0.0), [joint], IDEAL)
    unproven = [s for s in report.stretches if s.kind == "varying_impedance_unproven"]
    assert [(s.t_start, s.t_end) for s in unproven] == [(0.0, 1.0)]
    assert np.isnan(report.stability_alpha[0])
    assert report.summary["stability_alpha_per_s"] == [None]
    assert {"statically_unstable", "varying_impedance_unproven"} <= set(FLAG_KINDS)


# --- energy tank with damping inflow, interaction torque ---------------------------------------


def test_tank_fills_from_damping_up_to_its_bound():
    # Constant K, moving at v = 0.5 rad/s with mechanism damping D = 2: the damper dissipates
    # D v^2 = 0.5 W into the tank (Ferraguti, Secchi, Fantuzzi, ICRA 2013, from memory: inflow
    # from the damping's dissipated power), capped at the upper bound (closed form).
    t = np.linspace(0.0, 2.0, 2001)
    joint = JointParams(name="elbow", viscous_damping=0.3, lower_limit=-5, upper_limit=5)
    report = check_schedule(_path(t, 0.5 * t, 50.0, 2.0), [joint], IDEAL,
                            energy_budget=0.1, tank_max_energy=0.6)
    np.testing.assert_allclose(report.dissipation_power[:, 0], 0.5, rtol=1e-9)
    np.testing.assert_allclose(report.tank_energy[:, 0], np.minimum(0.1 + 0.5 * t, 0.6),
                               atol=1e-9)
    assert report.summary["dissipated_energy_J"][0] == pytest.approx(1.0, rel=1e-3)
    assert report.summary["thresholds"]["tank_max_energy_J"] == 0.6


def test_interaction_torque_bounds_the_deflection():
    # Free space, no gravity, at rest: the spring deflects by the interaction torque over K, so
    # a ramp K0 -> K1 injects int 1/2 K' (tau/K)^2 dt = 1/2 tau^2 (1/K0 - 1/K1) (closed form).
    t = np.linspace(0.0, 1.0, 4001)
    stiffness = 20.0 + 80.0 * t
    joint = JointParams(name="elbow", viscous_damping=0.0)
    report = check_schedule(_path(t, 0.0, stiffness, 0.0), [joint], IDEAL, interaction_torque=2.0,
                            energy_budget=0.01, tank_max_energy=0.01)
    np.testing.assert_allclose(report.deflection[:, 0], 2.0 / stiffness, rtol=1e-12)
    expected = 0.5 * 2.0**2 * (1 / 20.0 - 1 / 100.0)
    assert report.summary["injected_energy_J"][0] == pytest.approx(expected, rel=1e-3)
    assert report.summary["tank_deficit_J"][0] == pytest.approx(expected - 0.01, rel=1e-3)
    assert report.summary["thresholds"]["interaction_torque_Nm"] == [2.0]
    free = check_schedule(_path(t, 0.0, stiffness, 0.0), [joint], IDEAL)
    assert free.summary["injected_energy_J"] == [0.0]


def test_bad_tank_and_torque_arguments():
    t = np.linspace(0.0, 1.0, 11)
    rollout = _path(t, 0.0, 50.0, 1.0)
    joint = [JointParams(name="elbow")]
    with pytest.raises(InvalidInputError, match=r"interaction_torque: must be >= 0 N\*m, got"):
        check_schedule(rollout, joint, IDEAL, interaction_torque=-1.0)
    with pytest.raises(InvalidInputError, match=r"interaction_torque: expected a scalar or 1 "):
        check_schedule(rollout, joint, IDEAL, interaction_torque=[1.0, 2.0])
    with pytest.raises(InvalidInputError, match=r"tank_max_energy: must be finite and >= the "
                                                r"initial energy 0.2 J, got 0.1"):
        check_schedule(rollout, joint, IDEAL, energy_budget=0.2, tank_max_energy=0.1)
    with pytest.raises(InvalidInputError, match=r"energy_budget: must be >= 0 J, got nan"):
        check_schedule(rollout, joint, IDEAL, energy_budget=float("nan"))
