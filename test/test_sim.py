"""Joint simulation against closed forms: second-order responses, spectra, energy, mechanisms.

Every reference value comes from a textbook formula named beside the check, never from a run
of this code. Book sections and paper citations beside the checks were written from memory;
the formulas themselves are standard and are restated in full next to each check.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from compliant_demo.models import AntagonisticParams, IdealImpedanceParams, JointParams
from compliant_demo.perturbation import Hold, Impulse, PerturbationSchedule, TorqueStep, Wall
from compliant_demo.sim import (
    GRAVITY,
    Simulator,
    antagonistic_motor_angles,
    antagonistic_stiffness,
    antagonistic_torque,
    simulate,
)

INERTIA = 0.05
STIFFNESS = 80.0


def _joint(**fields) -> JointParams:
    base = {"inertia": INERTIA, "viscous_damping": 0.0, "limit_damping": 0.0}
    return JointParams(**{**base, **fields})


def _ideal(**fields) -> IdealImpedanceParams:
    base = {"damping_min": 0.0, "stiffness_min": 1.0, "stiffness_max": 200.0}
    return IdealImpedanceParams(**{**base, **fields})


def _constant(value: float, n_steps: int, n_joints: int = 1) -> np.ndarray:
    return np.full((n_steps, n_joints), value)


def _peaks(x: np.ndarray) -> np.ndarray:
    return np.nonzero((x[1:-1] > x[:-2]) & (x[1:-1] >= x[2:]))[0] + 1


@pytest.mark.parametrize("zeta", [0.1, 0.3, 0.6])
def test_step_response_overshoot_and_peak_time(zeta):
    damping = 2 * zeta * math.sqrt(STIFFNESS * INERTIA)
    amplitude, n = 0.2, 600
    result = simulate(
        [_joint()], _ideal(), _constant(amplitude, n), _constant(STIFFNESS, n),
        _constant(damping, n), q0=0.0,
    )
    q = result.q[:, 0, 0]
    peak = int(np.argmax(q))
    omega_n = math.sqrt(STIFFNESS / INERTIA)
    # Ogata, Modern Control Engineering, 5th ed., sec. 5-3 (edition and section from memory):
    # M_p = exp(-zeta*pi/sqrt(1-zeta^2)), t_p = pi / (omega_n*sqrt(1-zeta^2)) for the
    # underdamped second-order step response
    overshoot = math.exp(-zeta * math.pi / math.sqrt(1 - zeta**2))
    t_peak = math.pi / (omega_n * math.sqrt(1 - zeta**2))
    assert q[peak] / amplitude - 1 == pytest.approx(overshoot, rel=1e-4, abs=1e-6)
    assert abs(result.t[peak] - t_peak) <= result.dt


# symplectic Euler is first order: error O(h*omega_n), here 0.04
@pytest.mark.parametrize("method, tol", [("rk4", 1e-7), ("symplectic_euler", 2e-2)])
def test_impulse_response_matches_closed_form(method, tol):
    zeta, impulse, n = 0.2, 0.01, 800
    damping = 2 * zeta * math.sqrt(STIFFNESS * INERTIA)
    schedule = PerturbationSchedule(perturbations=[Impulse(onset_s=0.0, magnitude=impulse)])
    result = simulate(
        [_joint()], _ideal(), _constant(0.0, n), _constant(STIFFNESS, n), _constant(damping, n),
        schedules=[schedule], method=method,
    )
    omega_n = math.sqrt(STIFFNESS / INERTIA)
    omega_d = omega_n * math.sqrt(1 - zeta**2)
    t = result.t
    # Ogata sec. 5-3, impulse response of the second-order system, scaled by the impulse / I
    expected = impulse / INERTIA / omega_d * np.exp(-zeta * omega_n * t) * np.sin(omega_d * t)
    peak = impulse / INERTIA / omega_n
    assert np.max(np.abs(result.q[:, 0, 0] - expected)) <= tol * peak


def test_log_decrement_gives_back_damping_ratio():
    zeta, n = 0.05, 1500
    damping = 2 * zeta * math.sqrt(STIFFNESS * INERTIA)
    result = simulate(
        [_joint()], _ideal(), _constant(0.0, n), _constant(STIFFNESS, n), _constant(damping, n),
        q0=0.1,
    )
    q = result.q[:, 0, 0]
    peaks = _peaks(q)[:4]
    # Ogata sec. 5-3 / Thomson, Theory of Vibration: delta = ln(x_k / x_{k+1}) per period,
    # zeta = delta / sqrt(4*pi^2 + delta^2)
    delta = np.log(q[peaks[:-1]] / q[peaks[1:]])
    estimate = delta / np.sqrt(4 * np.pi**2 + delta**2)
    assert estimate == pytest.approx(np.full(3, zeta), rel=2e-3)


def _spectral_peak_hz(x: np.ndarray, dt: float) -> float:
    window = np.hanning(x.size)
    n_fft = 16 * x.size
    power = np.abs(np.fft.rfft((x - x.mean()) * window, n_fft))
    i = int(np.argmax(power[1:])) + 1
    # parabolic interpolation of the log spectrum around the bin (common practice)
    a, b, c = np.log(power[i - 1 : i + 2])
    offset = 0.5 * (a - c) / (a - 2 * b + c)
    return (i + offset) / (n_fft * dt)


@pytest.mark.parametrize("mechanism", ["ideal", "antagonistic"])
def test_natural_frequency_from_spectrum_is_sqrt_k_over_i(mechanism):
    n = 3000
    if mechanism == "ideal":
        params, k_joint = _ideal(), STIFFNESS
    else:
        params = AntagonisticParams(k1=5.0, k2=60.0, pretension_offset=0.02, stiffness_min=10.0)
        # taut joint stiffness 2*k1 + 2*k2*(theta1 - theta2 + 2*d0) (Migliore et al., ICRA 2005)
        theta1, theta2, _, _ = antagonistic_motor_angles(params, 0.0, STIFFNESS)
        k_joint = 2 * params.k1 + 2 * params.k2 * (theta1 - theta2 + 2 * params.pretension_offset)
    result = simulate(
        [_joint()], params, _constant(0.0, n), _constant(STIFFNESS, n), q0=0.01
    )
    # small oscillation about equilibrium: omega_n = sqrt(k / I) (Ogata sec. 5-3)
    expected_hz = math.sqrt(k_joint / INERTIA) / (2 * math.pi)
    assert _spectral_peak_hz(result.q[:, 0, 0], result.dt) == pytest.approx(expected_hz, rel=1e-3)


def _undamped_energy(method: str, n: int) -> np.ndarray:
    result = simulate(
        [_joint()], _ideal(), _constant(0.0, n), _constant(STIFFNESS, n), q0=0.1, method=method
    )
    return result.energy.total()[:, 0, 0]


def test_symplectic_euler_energy_stays_bounded_explicit_euler_grows():
    n = 10_000
    h_omega = 1e-3 * math.sqrt(STIFFNESS / INERTIA)
    symplectic = _undamped_energy("symplectic_euler", n)
    # Hairer, Lubich, Wanner, Geometric Numerical Integration, ch. I.1 and IX: symplectic Euler
    # keeps a modified energy, so the energy error stays O(h*omega) with no drift; explicit
    # Euler multiplies it by (1 + (h*omega)^2) every step
    assert np.max(np.abs(symplectic / symplectic[0] - 1)) <= h_omega
    first, last = symplectic[:1000], symplectic[-1000:]
    assert abs(last.mean() - first.mean()) <= 1e-3 * first.mean()
    explicit = _undamped_energy("explicit_euler", 2000)
    assert explicit[-1] / explicit[0] == pytest.approx((1 + h_omega**2) ** 2000, rel=1e-6)


def test_energy_balance_closes_with_rk4():
    joints = [_joint(viscous_damping=0.02, coulomb_friction=0.05, gravity_mass=0.3,
                     com_distance=0.1), _joint(upper_limit=0.05, limit_stiffness=400.0,
                                               limit_damping=1.0)]
    n = 1500
    t = np.arange(n) * 1e-3
    eq = np.stack([0.3 * np.sin(2 * t), 0.02 + 0 * t], axis=1)
    k = np.stack([60 + 30 * np.sin(3 * t), 100 + 0 * t], axis=1)
    schedules = [
        PerturbationSchedule(perturbations=[Impulse(onset_s=0.2, magnitude=0.02, joint=1),
                                            TorqueStep(onset_s=0.5, magnitude=0.5)]),
        PerturbationSchedule(perturbations=[Hold(onset_s=0.3, duration_s=0.2)]),
    ]
    for mechanism in (_ideal(damping_min=0.1), AntagonisticParams()):
        energy = simulate(joints, mechanism, eq, k, schedules=schedules).energy
        # conservation of energy (common practice): change of stored energy = net work in
        scale = np.max(np.abs(energy.actuator_work)) + np.max(energy.dissipated)
        assert np.max(np.abs(energy.balance_residual())) <= 1e-5 * scale
        assert np.all(energy.dissipated[-1] >= 0)


def test_stiffness_injection_matches_closed_form_for_a_stiffness_ramp():
    # hold the link (inertia huge, no motion to speak of) deflected by d while K ramps:
    # injected energy = 1/2 * (K_end - K_start) * d^2 (the integrand 1/2*dK/dt*d^2 with d fixed).
    # Textbook / common practice: the energy of a linear spring is 1/2*K*d^2, and its time
    # derivative at fixed d is 1/2*dK/dt*d^2. This is the power term that energy-tank schemes
    # for variable stiffness account for (Ferraguti, Secchi, Fantuzzi, "A tank-based approach to
    # impedance control with variable stiffness", ICRA 2013; reference from memory).
    joint = _joint(inertia=1e9)
    n, d = 500, 0.1
    k = np.linspace(20.0, 120.0, n)[:, None]
    result = simulate([joint], _ideal(time_constant=1e-3, stiffness_rate_limit=1e6), _constant(
        0.0, n), k, q0=d)
    realised = result.stiffness_realised[:, 0, 0]
    injected = result.energy.stiffness_injection[-1, 0, 0]
    assert injected == pytest.approx(0.5 * (realised[-1] - realised[0]) * d**2, rel=1e-6)


def test_ideal_stiffness_follows_rate_limit_then_first_order_lag():
    params = _ideal(time_constant=0.02, stiffness_rate_limit=2000.0)
    n = 200
    k = np.concatenate([_constant(50.0, 1), _constant(150.0, n - 1)])
    result = simulate([_joint(inertia=1e6)], params, _constant(0.0, n), k)
    realised = result.stiffness_realised[:, 0, 0]
    t = result.t - result.dt  # the new command acts from the second step
    # closed form of dK/dt = clip((K_c - K)/T, -r, r): slope r until the gap is r*T, then
    # exponential approach with time constant T (solution of the linear ODE)
    switch = (100.0 - 2000.0 * 0.02) / 2000.0
    expected = np.where(
        t <= switch,
        50.0 + 2000.0 * np.clip(t, 0, None),
        150.0 - 40.0 * np.exp(-(t - switch) / 0.02),
    )
    assert np.max(np.abs(realised - expected)) <= 1e-6


def test_gravity_static_equilibrium():
    joint = _joint(gravity_mass=1.0, com_distance=0.2, viscous_damping=0.5)
    n = 4000
    result = simulate([joint], _ideal(), _constant(0.5, n), _constant(STIFFNESS, n), q0=0.5)
    q = result.q[-1, 0, 0]
    # statics: spring torque balances gravity, K*(0.5 - q) = m*g*l*sin(q). Textbook / common
    # practice: at rest the torques sum to zero (Newton's second law with zero acceleration);
    # a point mass m at distance l pulls with m*g*l*sin(q), q measured from the hanging-down
    # position (the model's convention, gravity_offset 0). g is standard gravity (ISO 80000-3).
    assert STIFFNESS * (0.5 - q) == pytest.approx(1.0 * GRAVITY * 0.2 * math.sin(q), abs=1e-6)


def test_end_stop_and_wall_static_penetration():
    stop = _joint(upper_limit=0.1, limit_stiffness=1000.0, limit_damping=2.0, viscous_damping=0.3)
    n = 3000
    push = PerturbationSchedule(perturbations=[TorqueStep(onset_s=0.0, magnitude=3.0)])
    wall = PerturbationSchedule(
        perturbations=[TorqueStep(onset_s=0.0, magnitude=3.0),
                       Wall(position=-0.05, sign=1, magnitude=600.0, damping=2.0)]
    )
    result = simulate([stop], _ideal(), _constant(0.0, n), _constant(10.0, n),
                      schedules=[push, wall])
    q = result.q[-1, :, 0]
    # statics with linear springs in parallel (common practice):
    # 3 = 10*q + 1000*(q - 0.1) and 3 = 10*q + 600*(q + 0.05)
    assert q[0] == pytest.approx((3.0 + 100.0) / 1010.0, abs=1e-7)
    assert q[1] == pytest.approx((3.0 - 30.0) / 610.0, abs=1e-7)
    assert result.in_contact[-1].all()
    assert result.tau_external[-1, 1, 0] == pytest.approx(3.0 - 600 * (q[1] + 0.05), abs=1e-6)


def test_hold_blocks_the_link_and_reports_the_reaction():
    n = 600
    schedule = PerturbationSchedule(perturbations=[Hold(onset_s=0.1, duration_s=0.3)])
    result = simulate([_joint()], _ideal(), _constant(0.0, n), _constant(STIFFNESS, n),
                      schedules=[schedule], q0=0.05)
    held = result.held[:, 0, 0]
    assert held.sum() == 300
    q_held = result.q[held, 0, 0]
    assert np.all(q_held == q_held[0]) and np.all(result.dq[held, 0, 0] == 0)
    # Newton's second law with zero acceleration (textbook / common practice): the held link
    # neither moves nor accelerates, so the hold's reaction cancels the only other torque on
    # it, the spring's -K*(q - 0) (no damping, no gravity, velocity zero).
    assert np.allclose(result.tau_external[held, 0, 0], STIFFNESS * q_held, atol=1e-12)
    assert not held[-1] and np.abs(result.dq[-1, 0, 0]) > 0


def test_impulse_gives_velocity_jump_and_its_energy():
    n = 10
    schedule = PerturbationSchedule(perturbations=[Impulse(onset_s=0.004, magnitude=0.02)])
    result = simulate([_joint()], _ideal(), _constant(0.0, n), _constant(STIFFNESS, n),
                      schedules=[schedule])
    # angular impulse-momentum theorem (textbook / common practice): from rest, an impulse J
    # gives delta(dq) = J / I, and the work it does is the kinetic energy given, J^2 / (2*I).
    # The link starts at its equilibrium (q = 0, eq = 0), so no other torque acts before it.
    assert result.dq[4, 0, 0] == pytest.approx(0.02 / INERTIA, rel=1e-12)
    assert result.energy.perturbation_work[4, 0, 0] == pytest.approx(
        0.5 * 0.02**2 / INERTIA, rel=1e-12
    )


def test_sensor_noise_and_quantisation_are_seeded():
    joint = _joint(torque_noise_std=0.05, encoder_resolution=1e-3, viscous_damping=0.1)
    n = 4000
    runs = [
        simulate([joint], _ideal(), _constant(0.0, n), _constant(STIFFNESS, n), q0=0.0123, seed=s)
        for s in (7, 7, 8)
    ]
    noise = runs[0].tau_measured - runs[0].tau_mechanism
    assert np.array_equal(runs[0].tau_measured, runs[1].tau_measured)
    assert not np.array_equal(runs[0].tau_measured, runs[2].tau_measured)
    assert np.std(noise) == pytest.approx(0.05, rel=0.05)  # 4001 samples: std error ~1.1 %
    steps = runs[0].q_measured / 1e-3
    assert np.allclose(steps, np.round(steps), atol=1e-9)
    assert np.max(np.abs(runs[0].q_measured - runs[0].q)) <= 0.5e-3 + 1e-12


def test_antagonistic_stiffness_formula_independent_of_link_angle():
    params = AntagonisticParams(k1=8.0, k2=90.0, pretension_offset=0.05)
    theta1, theta2 = 0.3, 0.1
    phi0 = 0.5 * (theta1 - theta2) + params.pretension_offset
    q = np.linspace(0.2 - phi0 + 1e-3, 0.2 + phi0 - 1e-3, 41)  # both springs taut
    # Migliore, Brown, DeWeerth, ICRA 2005 (paper named from memory, no equation number):
    # K = 2*k1 + 2*k2*(theta1 - theta2 + 2*d0); it also follows by differentiating the two
    # quadratic tension laws (common practice), which the central difference below checks.
    expected = 2 * params.k1 + 2 * params.k2 * (theta1 - theta2 + 2 * params.pretension_offset)
    assert np.allclose(antagonistic_stiffness(params, q, theta1, theta2), expected, rtol=1e-12)
    h = 1e-6  # central difference of the torque, independent of the stiffness function
    numeric = -(antagonistic_torque(params, q + h, theta1, theta2)
                - antagonistic_torque(params, q - h, theta1, theta2)) / (2 * h)
    assert np.allclose(numeric, expected, rtol=1e-7)


def test_antagonistic_stiffness_drops_when_one_spring_goes_slack():
    params = AntagonisticParams(k1=8.0, k2=90.0)
    theta1, theta2, _, _ = antagonistic_motor_angles(params, 0.0, 100.0)
    phi0 = 0.5 * float(theta1 - theta2)
    q = np.array([phi0 - 1e-6, phi0 + 1e-6, phi0 + 0.05])
    k = antagonistic_stiffness(params, q, theta1, theta2)
    # past the slack point only spring 2 (elongation q - theta2) acts: K = k1 + 2*k2*phi2.
    # Closed form by differentiation (common practice): each tension-only spring pulls with
    # k1*phi + k2*phi^2 for elongation phi > 0 and nothing when slack, so its stiffness is
    # k1 + 2*k2*phi while taut and 0 when slack. The quadratic spring law is the one of the
    # antagonistic joint of Migliore, Brown, DeWeerth, ICRA 2005 (from memory). At the slack
    # point spring 1 still had phi = 0, so the joint loses exactly k1 there.
    assert k[0] == pytest.approx(100.0, rel=1e-5)
    assert k[1] == pytest.approx(100.0 - params.k1, rel=1e-5)
    assert k[2] == pytest.approx(params.k1 + 2 * params.k2 * (q[2] - theta2), rel=1e-12)


def test_antagonistic_inverse_map_round_trip():
    rng = np.random.default_rng(11)
    params = AntagonisticParams(k1=6.0, k2=80.0, pretension_offset=0.03, stiffness_min=12.0)
    eq = rng.uniform(-1.5, 1.5, 200)
    k = rng.uniform(12.0, 200.0, 200)
    theta1, theta2, eq_clamped, k_clamped = antagonistic_motor_angles(params, eq, k)
    assert not eq_clamped.any() and not k_clamped.any()
    # forward map: zero torque at the commanded equilibrium, commanded stiffness there
    assert np.allclose(antagonistic_torque(params, eq, theta1, theta2), 0.0, atol=1e-12)
    assert np.allclose(antagonistic_stiffness(params, eq, theta1, theta2), k, rtol=1e-12)


def test_out_of_range_commands_are_clamped_and_reported():
    params = AntagonisticParams(motor_lower=-1.0, motor_upper=1.0)
    eq = np.concatenate([_constant(0.0, 25), _constant(1.5, 25)])
    k = np.concatenate([_constant(300.0, 10), _constant(100.0, 40)])
    result = simulate([_joint(viscous_damping=0.5)], params, eq, k)
    assert result.clamp_counts["stiffness"][0, 0] == 10
    assert result.clamp_counts["equilibrium"][0, 0] == 25
    theta1, theta2, eq_flag, k_flag = antagonistic_motor_angles(params, [1.5, 0.0], [100, 300])
    assert eq_flag.tolist() == [True, False] and k_flag.tolist() == [False, True]
    assert np.all(theta1 <= 1.0) and np.all(theta2 >= -1.0)
    assert np.max(result.actuators) <= 1.0 and np.min(result.actuators) >= -1.0
    assert result.commands_clamped[0, 0, 0] and not result.commands_clamped[-30, 0, 0]


def test_batch_equals_single_scenarios_and_step_api():
    joints = [_joint(name="shoulder", viscous_damping=0.05, torque_noise_std=0.01),
              _joint(name="elbow")]
    schedules = [
        PerturbationSchedule(perturbations=[Impulse(onset_s=0.05, magnitude=0.02, joint=1)]),
        PerturbationSchedule(perturbations=[Wall(position=0.01, relative=True, onset_s=0.02)]),
        PerturbationSchedule(perturbations=[Hold(onset_s=0.03, duration_s=0.05)]),
    ]
    n = 150
    t = np.arange(n) * 1e-3
    eq = np.stack([0.2 * np.sin(5 * t), 0.1 * t], axis=1)
    k = np.stack([50 + 0 * t, 90 + 100 * t], axis=1)
    params = AntagonisticParams()
    batch = simulate(joints, params, eq, k, schedules=schedules, seed=3)
    for s, schedule in enumerate(schedules):
        alone = simulate(joints, params, eq, k, schedules=[schedule])
        assert np.allclose(alone.q[:, 0], batch.q[:, s], rtol=0, atol=1e-14)
    sim = Simulator(joints, params, n_scenarios=3, schedules=schedules, seed=3)
    states = [sim.step(eq[i], k[i]) for i in range(n)]
    stepped = np.stack([s.q for s in states])
    assert np.allclose(stepped, batch.q[1:], rtol=0, atol=1e-14)
    measured = np.stack([s.tau_measured for s in states])
    assert np.allclose(measured, batch.tau_measured[1:], rtol=0, atol=1e-12)
    assert states[-1].t == pytest.approx(n * 1e-3)


def test_external_torque_in_step_api_matches_a_torque_step():
    n = 100
    sim = Simulator([_joint()], _ideal())
    for _ in range(n):
        state = sim.step([0.0], [STIFFNESS], external_torque=[0.8])
    schedule = PerturbationSchedule(perturbations=[TorqueStep(onset_s=0.0, magnitude=0.8)])
    batch = simulate([_joint()], _ideal(), _constant(0.0, n), _constant(STIFFNESS, n),
                     schedules=[schedule])
    assert state.q[0, 0] == pytest.approx(batch.q[-1, 0, 0], abs=1e-14)
    assert state.tau_external[0, 0] == pytest.approx(0.8)


def test_two_walls_on_one_joint_add_up():
    n = 2500
    push = TorqueStep(onset_s=0.0, magnitude=3.0)
    twin = [Wall(position=0.02, magnitude=300.0, damping=1.0)] * 2
    schedules = [
        PerturbationSchedule(perturbations=[push, *twin]),
        PerturbationSchedule(perturbations=[push, Wall(position=0.02, magnitude=600.0,
                                                       damping=2.0)]),
    ]
    result = simulate([_joint(viscous_damping=0.3)], _ideal(), _constant(0.0, n),
                      _constant(10.0, n), schedules=schedules)
    # springs in parallel add (common practice): two 300 N*m/rad walls act as one of 600
    assert np.allclose(result.q[:, 0], result.q[:, 1], rtol=0, atol=1e-12)
    assert result.q[-1, 0, 0] == pytest.approx((3.0 + 600 * 0.02) / 610.0, abs=1e-7)


def test_smoothed_coulomb_friction_terminal_velocity():
    # free link (stiffness ~0) pushed by a torque below the friction level: with
    # tau_f = c*tanh(v/v_s) the steady velocity is v = v_s*atanh(tau/c) (closed form of the model)
    joint = _joint(coulomb_friction=0.5, friction_smoothing_velocity=0.02)
    n = 1500
    push = PerturbationSchedule(perturbations=[TorqueStep(onset_s=0.0, magnitude=0.3)])
    mech = _ideal(stiffness_min=1e-9)
    result = simulate([joint], mech, _constant(0.0, n), _constant(0.0, n), schedules=[push])
    assert result.dq[-1, 0, 0] == pytest.approx(0.02 * math.atanh(0.3 / 0.5), rel=1e-6)


def test_vectorisable_tanh_matches_libm():
    """The friction's own tanh (expm1 identity of fdlibm's s_tanh.c, Cody-Waite reduction)
    against the C library's (numpy.tanh): within 4 ulp from tiny to saturated arguments, odd,
    exactly +-1 beyond 20 and at infinity."""
    from compliant_demo.sim.step_kernel import _tanh

    rng = np.random.default_rng(11)
    magnitudes = np.concatenate([rng.uniform(0.0, 25.0, 20000), 10.0 ** rng.uniform(-300, 1, 2000),
                                 [0.0, 0.3465, 0.3466, 19.999, 20.0, 20.001, 1e300, np.inf]])
    for sign in (1.0, -1.0):
        x = sign * magnitudes
        ours = np.array([_tanh(v) for v in x])
        reference = np.tanh(x)
        assert np.all(np.abs(ours - reference) <= 4 * np.spacing(np.abs(reference)))
        assert np.all(np.signbit(ours) == np.signbit(reference))
    assert _tanh(20.5) == 1.0 and _tanh(-np.inf) == -1.0


def test_pendulum_frequency_includes_gravity_stiffness():
    # linearised pendulum on a spring: omega = sqrt((K + m*g*l) / I) (any mechanics text,
    # e.g. Thomson, Theory of Vibration, ch. 2)
    joint = _joint(gravity_mass=0.5, com_distance=0.2)
    n = 3000
    result = simulate([joint], _ideal(), _constant(0.0, n), _constant(STIFFNESS, n), q0=0.005)
    expected_hz = math.sqrt((STIFFNESS + 0.5 * GRAVITY * 0.2) / INERTIA) / (2 * math.pi)
    assert _spectral_peak_hz(result.q[:, 0, 0], result.dt) == pytest.approx(expected_hz, rel=1e-3)


def test_record_in_its_own_memory_outlives_the_run_and_pickles():
    """The record's arrays live in anonymous memory maps (see integrate._record_zeros): they
    start at zero, stay valid and writable after the run, and pickle by value."""
    import gc
    import pickle

    from compliant_demo.sim.integrate import _record_zeros

    zeros = _record_zeros((3, 4, 5), dtype=bool)
    assert zeros.shape == (3, 4, 5) and zeros.dtype == bool and not zeros.any()
    other = _record_zeros((3, 4, 5))
    other[...] = 1.0
    assert not np.shares_memory(zeros, other) and other.sum() == 60.0
    result = simulate([_joint()], _ideal(), _constant(0.2, 200), _constant(40.0, 200),
                      decimation=10)
    gc.collect()
    angles = np.array(result.q)
    assert np.all(np.isfinite(angles)) and angles[-1, 0, 0] != 0.0
    result.q[0, 0, 0] = 1.5  # the caller owns its record
    again = pickle.loads(pickle.dumps(result))
    assert again.q[0, 0, 0] == 1.5 and np.array_equal(again.q[1:], angles[1:])
