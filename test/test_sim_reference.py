"""Batched integration against scipy's solve_ivp, and the step-size stability bound.

The reference (compliant_demo.sim.reference) writes the joint and mechanism equations out again
per scenario and integrates them with scipy.integrate.solve_ivp (RK45, rtol 1e-9) between the
step boundaries where commands or perturbations change. Book sections cited beside the
stability checks were written from memory.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from compliant_demo.exceptions import UnstableStepError
from compliant_demo.models import AntagonisticParams, IdealImpedanceParams, JointParams
from compliant_demo.perturbation import (
    Hold,
    Impulse,
    PerturbationSchedule,
    RandomTorque,
    Sinusoid,
    TorqueStep,
    TorqueWindow,
    Wall,
)
from compliant_demo.sim import check_step_stability, largest_stable_step, simulate
from compliant_demo.sim.reference import reference_solve

JOINTS = [
    JointParams(name="shoulder", inertia=0.06, viscous_damping=0.03, coulomb_friction=0.02,
                friction_smoothing_velocity=0.05, gravity_mass=0.4, com_distance=0.12),
    JointParams(name="elbow", inertia=0.03, viscous_damping=0.01, upper_limit=0.22),
]
SCHEDULES = [
    PerturbationSchedule(name="bump", perturbations=[Impulse(onset_s=0.1, magnitude=0.03)]),
    PerturbationSchedule(
        name="push", perturbations=[TorqueWindow(onset_s=0.05, duration_s=0.3, magnitude=1.5,
                                                 ramp_s=0.05, joint=1)]
    ),
    PerturbationSchedule(
        name="shake", perturbations=[Sinusoid(onset_s=0.1, magnitude=0.8, frequency_hz=4.0),
                                     RandomTorque(onset_s=0.2, duration_s=0.4, magnitude=0.5,
                                                  joint=1)]
    ),
    PerturbationSchedule(
        name="lean", perturbations=[TorqueStep(onset_s=0.1, magnitude=3.0, joint=1)]
    ),
    PerturbationSchedule(
        name="obstacle", perturbations=[Wall(onset_s=0.05, position=0.02, relative=True,
                                             magnitude=400.0, damping=0.5)]
    ),
    PerturbationSchedule(
        name="grab", perturbations=[Hold(onset_s=0.1, duration_s=0.15),
                                    Impulse(onset_s=0.3, duration_s=0.02, magnitude=0.02,
                                            sign=-1, joint=1)]
    ),
]


def _commands(n: int) -> tuple[np.ndarray, np.ndarray]:
    t = np.arange(n) * 1e-3
    # a 100 Hz command stream held at 1 kHz: the reference restarts where commands change
    held = np.floor(t / 0.01) * 0.01
    eq = np.stack([0.4 * np.sin(3 * held), 0.2 * np.cos(2 * held)], axis=1)
    k = np.stack([70 + 30 * np.sin(4 * held), 60 + 40 * held], axis=1)
    return eq, k


@pytest.mark.parametrize(
    "mechanism",
    [IdealImpedanceParams(damping_min=0.05), AntagonisticParams(pretension_offset=0.02)],
    ids=["ideal", "antagonistic"],
)
def test_batch_agrees_with_solve_ivp(mechanism):
    eq, k = _commands(600)
    result = simulate(JOINTS, mechanism, eq, k, schedules=SCHEDULES, seed=5)
    for s, schedule in enumerate(SCHEDULES):
        q, dq = reference_solve(
            JOINTS, mechanism, eq, k, schedules=SCHEDULES, scenario=s, seed=5, rtol=1e-9,
            atol=1e-11,
        )
        # RK4 at h*omega_n <= 0.06 on smooth parts; a contact's force kink inside a step breaks
        # the smoothness RK4's order needs (Hairer, Norsett, Wanner, Solving ODEs I, sec. II.3)
        contact = result.in_contact[:, s].any()
        bound_q, bound_dq = (5e-5, 5e-3) if contact else (3e-6, 2e-4)
        assert np.max(np.abs(result.q[:, s] - q)) <= bound_q, schedule.name
        assert np.max(np.abs(result.dq[:, s] - dq)) <= bound_dq, schedule.name


def test_contact_scenarios_really_touch():
    eq, k = _commands(600)
    result = simulate(JOINTS, AntagonisticParams(), eq, k, schedules=SCHEDULES)
    # the elbow leans into its end stop, the shoulder runs into the wall; bump and shake don't
    assert result.in_contact[:, 3, 1].any() and result.in_contact[:, 4, 0].any()
    assert not result.in_contact[:, [0, 2]].any()


def _undamped(stiffness_max: float) -> tuple[list[JointParams], IdealImpedanceParams]:
    joint = JointParams(inertia=0.05, viscous_damping=0.0, limit_stiffness=1e-9, limit_damping=0.0)
    mech = IdealImpedanceParams(stiffness_max=stiffness_max, damping_min=0.0, damping_max=0.0,
                                time_constant=1.0)
    return [joint], mech


@pytest.mark.parametrize("method, limit", [("symplectic_euler", 2.0), ("rk4", 2 * math.sqrt(2))])
def test_largest_stable_step_matches_closed_form(method, limit):
    joints, mech = _undamped(200.0)
    omega = math.sqrt(200.0 / 0.05)
    # Hairer, Lubich, Wanner, Geometric Numerical Integration, sec. I.1 / VII: symplectic
    # Euler is stable on the harmonic oscillator for h*omega < 2; classical RK4's stability
    # region meets the imaginary axis at 2*sqrt(2) (Hairer and Wanner, Solving ODEs II, IV.2).
    # Section numbers from memory.
    bound, _ = largest_stable_step(joints, mech, method)
    assert bound * omega == pytest.approx(limit, rel=1e-9)


@pytest.mark.parametrize("method", ["symplectic_euler", "rk4"])
def test_step_just_above_the_bound_raises_just_below_runs(method):
    joints, mech = _undamped(200.0)
    bound, _ = largest_stable_step(joints, mech, method)
    n = 300  # enough to diverge by orders of magnitude past the bound, short of overflow
    eq, k = np.zeros((n, 1)), np.full((n, 1), 200.0)
    with pytest.raises(UnstableStepError, match="largest stable step"):
        simulate(joints, mech, eq, k, q0=0.1, dt=bound * 1.01, method=method)
    below = simulate(joints, mech, eq, k, q0=0.1, dt=bound * 0.99, method=method).q[:, 0, 0]
    assert np.all(np.isfinite(below)) and np.max(np.abs(below[-100:])) <= 10 * 0.1
    above = simulate(joints, mech, eq, k, q0=0.1, dt=bound * 1.01, method=method,
                     check_stability=False).q[:, 0, 0]
    assert np.max(np.abs(above[-100:])) >= 100 * 0.1  # it really diverges past the bound


def test_stability_check_counts_end_stops_walls_and_lags():
    joint = JointParams(inertia=0.05, limit_stiffness=2000.0)
    mech = IdealImpedanceParams(stiffness_max=200.0, time_constant=0.02)
    plain, _ = largest_stable_step([joint], mech, "symplectic_euler")
    with_wall, reason = largest_stable_step(
        [joint], mech, "symplectic_euler", extra_stiffness=[3000.0], extra_damping=[1.0]
    )
    assert with_wall < plain and "wall 3000" in reason
    lagged, reason = largest_stable_step(
        [JointParams(inertia=100.0)], IdealImpedanceParams(time_constant=1e-4), "rk4"
    )
    # real eigenvalue -1/T: RK4 is stable while |R(z)| <= 1 at z = -h/T, with its stability
    # function R(z) = 1 + z + z^2/2 + z^3/6 + z^4/24 (the degree-4 Taylor polynomial of e^z;
    # Hairer and Wanner, Solving ODEs II, sec. IV.2, section from memory). R is positive on the
    # real axis, so the limit is where R(z) = 1, i.e. the real root of
    # 1 + z/2 + z^2/6 + z^3/24 = 0, about -2.785293563 (computed here, not taken from the code).
    roots = np.roots([1 / 24, 1 / 6, 1 / 2, 1])
    real_limit = -float(roots[np.abs(roots.imag) < 1e-12].real.item())
    assert lagged == pytest.approx(real_limit * 1e-4, rel=1e-9) and "time constant" in reason
    wall = PerturbationSchedule(perturbations=[Wall(magnitude=5e5)])
    with pytest.raises(UnstableStepError, match=r"wall 500000"):
        simulate([joint], mech, np.zeros((5, 1)), np.full((5, 1), 50.0), schedules=[wall])
    assert check_step_stability([joint], mech, 1e-3) >= 1e-3
