"""Movement primitives: reproduction, generalisation, integration, stiffness and damping, JSON."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from compliant_demo import __version__
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.primitives import DMP, DampingPolicy, Skill, fit_skill

JOINTS = ["shoulder", "elbow"]
START = np.array([0.1, -0.3])
GOAL = np.array([1.2, 0.4])


def minimum_jerk(t: np.ndarray, x0: np.ndarray, xf: np.ndarray, duration: float) -> np.ndarray:
    """Flash and Hogan, J. Neurosci. 5(7) 1985, eq. (7): x0 + (xf - x0)(10s^3 - 15s^4 + 6s^5)."""
    s = (t / duration)[:, None]
    return x0 + (xf - x0) * (10 * s**3 - 15 * s**4 + 6 * s**5)


def bell_stiffness(t: np.ndarray, duration: float) -> np.ndarray:
    """Invented demo profile: soft approach, stiff press, soft retreat, N*m/rad."""
    s = t / duration
    return np.column_stack([20 + 150 * np.sin(np.pi * s) ** 2, 10 + 60 * np.sin(np.pi * s) ** 2])


@pytest.fixture(scope="module")
def demo():
    t = np.linspace(0.0, 1.0, 1001)
    return t, minimum_jerk(t, START, GOAL, 1.0), bell_stiffness(t, 1.0)


def _skill(demo, **kwargs):
    t, q, k = demo
    options = {"joints": JOINTS, "stiffness_range": (5.0, 200.0),
               "target_inertia": [0.05, 0.02]}
    options.update(kwargs)
    return fit_skill(t, q, k, **options)


# Relative RMSE bounds (RMSE / |xf - x0|) measured for this basis layout with margin. LWR's error
# falls with the basis count; ridge is limited by the Euler step and finite-difference targets.
MIN_JERK_BOUNDS = {
    ("lwr", 20): 0.03, ("lwr", 50): 0.006, ("lwr", 100): 0.002,
    ("ridge", 20): 5e-4, ("ridge", 50): 5e-4, ("ridge", 100): 5e-4,
}


@pytest.mark.parametrize("formulation", ["classic", "goal_robust"])
@pytest.mark.parametrize(("method", "n_basis"), sorted(MIN_JERK_BOUNDS))
def test_minimum_jerk_reproduced(demo, method, n_basis, formulation):
    t, q, _ = demo
    skill = _skill(demo, n_basis=n_basis, method=method, formulation=formulation)
    rollout = skill.rollout(dt=1e-3)
    # Reference: closed-form minimum-jerk trajectory, Flash and Hogan 1985, eq. (7).
    relative_rmse = np.sqrt(((rollout.position - q) ** 2).mean(axis=0)) / np.abs(GOAL - START)
    assert np.all(relative_rmse < MIN_JERK_BOUNDS[(method, n_basis)])
    np.testing.assert_allclose(skill.provenance.fit_rmse,
                               np.sqrt(((rollout.position - q) ** 2).mean(axis=0)), rtol=1e-9)


@pytest.mark.parametrize("formulation", ["classic", "goal_robust"])
def test_converges_to_new_goal(demo, formulation):
    skill = _skill(demo, formulation=formulation)
    goal = np.array([0.7, -0.9])
    rollout = skill.rollout(start=[0.0, 0.2], goal=goal, horizon_s=3.0)
    # The transformation system is a critically damped spring (beta_z = alpha_z/4,
    # Ijspeert et al. 2013, sec. 2.1) and the forcing decays with the phase: y -> g.
    np.testing.assert_allclose(rollout.position[-1], goal, atol=1e-6)
    np.testing.assert_allclose(rollout.velocity[-1], 0.0, atol=1e-5)


def test_temporal_scaling_is_first_order_in_dt(demo):
    skill = _skill(demo)
    errors = []
    for dt in (2e-3, 1e-3):
        fast = skill.rollout(duration_s=1.0, dt=dt)
        slow = skill.rollout(duration_s=2.0, dt=dt)
        # Time scaling of the DMP (Ijspeert et al. 2013, sec. 2.1.3): y_2T(2t) = y_T(t), exact in
        # continuous time; the Euler step dt/tau differs between the two, so the gap is O(dt).
        errors.append(np.abs(slow.position[::2] - fast.position).max())
        np.testing.assert_allclose(slow.velocity[::2][1:], 0.5 * fast.velocity[1:],
                                   atol=50 * dt)
        # The stiffness follows the phase only, so it stretches exactly.
        np.testing.assert_allclose(slow.stiffness[::2], fast.stiffness, rtol=1e-12)
    assert errors[1] < 5e-3
    assert 1.6 < errors[0] / errors[1] < 2.4


def test_classic_spatial_scaling_is_exact(demo):
    skill = _skill(demo, formulation="classic")
    base = skill.rollout()
    new_start, new_goal = np.array([-0.4, 0.5]), np.array([2.0, -1.0])
    moved = skill.rollout(start=new_start, goal=new_goal)
    # Linear system with forcing scaled by (g - y0) (Ijspeert et al. 2013, eq. 2.3 and sec. 3.1):
    # y'(t) = y0' + (g' - y0')/(g - y0) * (y(t) - y0) holds exactly, step by step.
    ratio = (new_goal - new_start) / (GOAL - START)
    np.testing.assert_allclose(moved.position, new_start + ratio * (base.position - START),
                               rtol=0, atol=1e-12)


angles = st.floats(min_value=-2.0, max_value=2.0, allow_nan=False)


@settings(derandomize=True, max_examples=40, deadline=None)
@given(a0=angles, a1=angles, b0=angles, b1=angles)
def test_classic_rollout_is_affine_in_start_and_goal(demo, a0, a1, b0, b1):
    skill = _skill(demo, n_basis=20)
    start, goal = np.array([a0, a1]), np.array([b0, b1])
    moved = skill.rollout(start=start, goal=goal, dt=5e-3)
    base = skill.rollout(dt=5e-3)
    # Ijspeert et al. 2013, sec. 3.1: invariance of the classic form under the affine map
    # y -> y0' + (g' - y0')/(g - y0) * (y - y0), checked for arbitrary starts and goals.
    ratio = (goal - start) / (GOAL - START)
    np.testing.assert_allclose(moved.position, start + ratio * (base.position - START),
                               rtol=0, atol=1e-11)


def _bump(t: np.ndarray, end_offset: float) -> np.ndarray:
    """Out-and-back motion of 0.5 rad peak, ending ``end_offset`` from its start (invented)."""
    s = t / t[-1]
    return (0.5 * np.sin(np.pi * s) ** 2 + end_offset * (10 * s**3 - 15 * s**4 + 6 * s**5))[:, None]


def test_goal_robust_handles_start_equal_goal():
    t = np.linspace(0.0, 1.0, 801)
    q = _bump(t, 0.0)
    with pytest.warns(UserWarning, match="end where they start"):
        classic = fit_skill(t, q, None, joints=["elbow"], stiffness_range=(5.0, 50.0),
                            target_inertia=[0.02])
    robust = fit_skill(t, q, None, joints=["elbow"], formulation="goal_robust",
                       stiffness_range=(5.0, 50.0), target_inertia=[0.02])
    # Hoffmann et al., ICRA 2009, sec. II-III: the goal-robust form keeps the demonstrated shape
    # when g = y0; the classic form can only be fitted unscaled there.
    assert robust.provenance.fit_rmse[0] < 0.01
    assert classic.provenance.fit_rmse[0] < 0.02
    moved = robust.rollout(goal=[0.05])
    assert 0.4 < moved.position.max() < 0.65


def test_classic_mirrors_near_degenerate_goal_and_goal_robust_does_not():
    t = np.linspace(0.0, 1.0, 801)
    q = _bump(t, 0.01)
    kwargs = {"joints": ["elbow"], "stiffness_range": (5.0, 50.0), "target_inertia": [0.02]}
    classic = fit_skill(t, q, None, **kwargs)
    robust = fit_skill(t, q, None, formulation="goal_robust", **kwargs)
    # Hoffmann et al., ICRA 2009, sec. II: with x*(g - y0) scaling, a goal on the other side of a
    # start it nearly equals mirrors and amplifies the movement; the goal-robust form does not.
    mirrored = classic.rollout(goal=[-0.01]).position
    kept = robust.rollout(goal=[-0.01]).position
    assert mirrored.min() < -0.4
    assert kept.max() > 0.4 and kept.min() > -0.05


@pytest.mark.parametrize("formulation", ["classic", "goal_robust"])
def test_moving_goal(demo, formulation):
    skill = _skill(demo, formulation=formulation)
    t = np.arange(2001) * 1e-3
    fixed = skill.rollout(goal=[0.8, -0.2], horizon_s=2.0)
    held = skill.rollout(goal=np.tile([0.8, -0.2], (t.size, 1)), horizon_s=2.0)
    # A goal path that never moves is the fixed goal: same linear recurrence, same input.
    np.testing.assert_allclose(held.position, fixed.position, rtol=0, atol=1e-12)
    np.testing.assert_allclose(held.acceleration, fixed.acceleration, rtol=0, atol=1e-9)
    # Goal switched to the other side of the start mid-motion (Hoffmann et al., ICRA 2009,
    # sec. IV): the attractor follows, the path stays continuous and settles on the new goal.
    switched = np.where(t[:, None] < 0.4, [0.8, -0.2], [-0.5, 0.6])
    moved = skill.rollout(goal=switched, horizon_s=2.0)
    np.testing.assert_allclose(moved.position[-1], [-0.5, 0.6], atol=1e-4)
    assert np.abs(np.diff(moved.position, axis=0)).max() < 0.02


def test_lfilter_integration_equals_per_step_loop(demo):
    skill = _skill(demo, formulation="goal_robust")
    start, goal, dt, tau = np.array([0.3, 0.1]), np.array([-0.2, 0.9]), 2e-3, 0.8
    rollout = skill.rollout(start=start, goal=goal, duration_s=tau, dt=dt)
    dmp = skill.dmp
    k_gain, d_gain = dmp.alpha_z * dmp.beta_z, dmp.alpha_z
    y, z = start.copy(), np.zeros(2)
    expected = [y.copy()]
    for k in range(rollout.t.size - 1):
        x = np.exp(-dmp.alpha_x * rollout.t[k] / tau)
        psi = np.exp(-dmp.basis.widths * (x - dmp.basis.centres) ** 2)
        shape = x * (np.asarray(skill.weights) @ psi) / psi.sum()
        # Hoffmann et al. 2009, eq. (5)-(6): tau*v' = K(g-x) - Dv - K(g-x0)s + K f(s)
        zdot = k_gain * (goal - y) - d_gain * z - k_gain * (goal - start) * x + k_gain * shape
        z = z + dt / tau * zdot  # semi-implicit Euler, common practice
        y = y + dt / tau * z
        expected.append(y.copy())
    np.testing.assert_allclose(rollout.position, np.array(expected), rtol=0, atol=1e-10)


def test_multi_demonstration_fit_reproduces_each(demo):
    t = demo[0]
    starts = [np.array([0.0, 0.0]), np.array([0.2, -0.5]), np.array([-0.3, 0.1])]
    goals = [np.array([1.0, 0.5]), np.array([1.5, 0.2]), np.array([0.7, 0.9])]
    stack = np.stack([minimum_jerk(t, a, b, 1.0) for a, b in zip(starts, goals, strict=True)])
    skill = fit_skill(t, stack, np.stack([bell_stiffness(t, 1.0)] * 3), joints=JOINTS,
                      n_basis=50, method="ridge", stiffness_range=(5.0, 200.0),
                      target_inertia=[0.05, 0.02])
    assert skill.provenance.n_demonstrations == 3
    np.testing.assert_allclose(skill.goal, np.mean(goals, axis=0))
    for a, b, q in zip(starts, goals, stack, strict=True):
        rollout = skill.rollout(start=a, goal=b)
        # Same minimum-jerk shape (Flash and Hogan 1985) at every amplitude.
        assert np.abs(rollout.position - q).max() < 2e-3


def test_uneven_sampling_and_smoothing(demo):
    rng = np.random.default_rng(3)
    t = np.sort(np.concatenate([[0.0, 1.0], rng.uniform(0.0, 1.0, 1499)]))
    q = minimum_jerk(t, START, GOAL, 1.0)
    skill = fit_skill(t, q, bell_stiffness(t, 1.0), joints=JOINTS, method="ridge",
                      target_inertia=[0.05, 0.02])
    rollout = skill.rollout(dt=1e-3)
    # Closed-form minimum jerk (Flash and Hogan 1985) on the rollout's uniform grid.
    reference = minimum_jerk(rollout.t, START, GOAL, 1.0)
    assert np.abs(rollout.position - reference).max() < 5e-3
    assert max(skill.provenance.fit_rmse) < 2e-3
    smoothed = _skill(demo, method="ridge", smoothing_window=21)
    assert max(smoothed.provenance.fit_rmse) < 1e-3


def test_stiffness_profile_learned_in_log_space_and_clamped(demo):
    t, _, k = demo
    skill = _skill(demo, n_basis=50, method="ridge", stiffness_range=(15.0, 150.0))
    rollout = skill.rollout()
    expected = np.clip(k, 15.0, 150.0)
    np.testing.assert_allclose(rollout.stiffness, expected, rtol=0.02)
    assert rollout.stiffness.min() >= 15.0 and rollout.stiffness.max() <= 150.0
    wide = skill.rollout(stiffness_range=(1.0, 500.0))
    assert wide.stiffness.max() == pytest.approx(170.0, rel=0.02)


def test_ratio_damping_keeps_zeta_on_target_joint(demo):
    skill = _skill(demo, damping_policy=DampingPolicy(kind="ratio", zeta=0.8))
    inertia = np.array([0.3, 0.01])
    rollout = skill.rollout(target_inertia=inertia)
    # Second-order system m q'' + d q' + k q: zeta = d / (2 sqrt(k m)), common practice.
    zeta = rollout.damping / (2 * np.sqrt(rollout.stiffness * inertia))
    np.testing.assert_allclose(zeta, 0.8, rtol=1e-12)
    stored = skill.rollout()
    np.testing.assert_allclose(stored.damping, 2 * 0.8 * np.sqrt(stored.stiffness * [0.05, 0.02]))


def test_learned_damping_follows_recorded_profile(demo):
    t, q, k = demo
    recorded = 0.2 + 0.5 * (t / t[-1])[:, None] * np.ones((1, 2))
    skill = fit_skill(t, q, k, joints=JOINTS, n_basis=50, method="ridge",
                      damping_policy=DampingPolicy(kind="learned"), damping=recorded)
    rollout = skill.rollout()
    np.testing.assert_allclose(rollout.damping, recorded, rtol=0.01)


def test_json_round_trip_reproduces_rollout(demo):
    skill = _skill(demo, formulation="goal_robust", method="ridge",
                   provenance={"demonstration_ids": ["a1", "b2"],
                               "alignment": {"method": "none"}})
    text = skill.model_dump_json()
    again = Skill.model_validate_json(text)
    assert again.provenance.demonstration_ids == ["a1", "b2"]
    assert again.provenance.package_version == __version__
    assert again.provenance.n_basis == 50 and len(again.provenance.fit_rmse) == 2
    first, second = skill.rollout(goal=[0.5, 0.5]), again.rollout(goal=[0.5, 0.5])
    np.testing.assert_array_equal(first.position, second.position)
    np.testing.assert_array_equal(first.damping, second.damping)


def test_rollout_shapes_and_units(demo):
    rollout = _skill(demo).rollout(duration_s=0.5, dt=1e-3, horizon_s=0.6)
    assert rollout.t.shape == (601,)
    for array in (rollout.position, rollout.velocity, rollout.acceleration, rollout.stiffness,
                  rollout.damping):
        assert array.shape == (601, 2)
    assert rollout.joints == tuple(JOINTS) and rollout.duration_s == 0.5
    # Velocity is the backward difference of position (semi-implicit Euler).
    np.testing.assert_allclose(rollout.velocity[1:], np.diff(rollout.position, axis=0) / 1e-3)


# --- bad input -------------------------------------------------------------------------------


def test_fewer_samples_than_basis_functions():
    t = np.linspace(0, 1, 10)
    with pytest.raises(InvalidInputError, match=r"t: 10 samples are fewer than n_basis = 20"):
        fit_skill(t, np.zeros((10, 1)), None, joints=["elbow"], n_basis=20,
                  stiffness_range=(1, 2))


@pytest.mark.parametrize("n_basis", [1, 0, 2.5, True])
def test_basis_count_below_two(demo, n_basis):
    with pytest.raises(InvalidInputError, match=r"n_basis: need an integer of at least 2, got"):
        _skill(demo, n_basis=n_basis)


@pytest.mark.parametrize(
    ("channel", "index", "value", "message"),
    [
        (1, (17, 1), np.nan, r"position: non-finite value nan at index \(17, 1\)"),
        (2, (3, 0), np.inf, r"stiffness: non-finite value inf at index \(3, 0\)"),
    ],
)
def test_non_finite_samples(demo, channel, index, value, message):
    arrays = [array.copy() for array in demo]
    arrays[channel][index] = value
    with pytest.raises(InvalidInputError, match=message):
        fit_skill(*arrays, joints=JOINTS)


def test_non_increasing_time(demo):
    t, q, k = demo
    bad = t.copy()
    bad[5] = bad[4]
    with pytest.raises(InvalidInputError, match=r"t: time must be strictly increasing; t\[5\]"):
        fit_skill(bad, q, k, joints=JOINTS)


def test_zero_duration_rollout(demo):
    with pytest.raises(InvalidInputError, match=r"duration_s: need a positive duration, got 0"):
        _skill(demo).rollout(duration_s=0.0)


def test_zero_duration_demonstration():
    with pytest.raises(InvalidInputError, match=r"t: time must be strictly increasing"):
        fit_skill(np.zeros(60), np.zeros((60, 1)), None, joints=["elbow"], n_basis=10,
                  stiffness_range=(1, 2))


def test_goal_outside_joint_limits(demo):
    skill = _skill(demo, position_limits=(-2.5, 2.5))
    with pytest.raises(InvalidInputError,
                       match=r"goal: 3\.0 rad for joint 'elbow' is outside its limits"):
        skill.rollout(goal=[1.0, 3.0])
    with pytest.raises(InvalidInputError, match=r"start: -2\.6 rad for joint 'shoulder'"):
        skill.rollout(start=[-2.6, 0.0])
    moving = np.zeros((1001, 2))
    moving[700, 1] = 2.7
    with pytest.raises(InvalidInputError, match=r"goal: 2\.7 rad for joint 'elbow' is outside"):
        skill.rollout(goal=moving)
    with pytest.raises(InvalidInputError, match=r"goal: a moving goal needs shape \(1001, 2\)"):
        skill.rollout(goal=moving[:10])


def test_joint_name_count_mismatch(demo):
    t, q, k = demo
    with pytest.raises(InvalidInputError, match=r"joints: 1 names \['elbow'\] for 2 position"):
        fit_skill(t, q, k, joints=["elbow"])


def test_stiffness_and_damping_shape_mismatch(demo):
    t, q, k = demo
    with pytest.raises(InvalidInputError, match=r"stiffness: shape \(1, 1001, 1\) does not"):
        fit_skill(t, q, k[:, :1], joints=JOINTS)
    with pytest.raises(InvalidInputError, match=r"damping: shape \(2, 1001, 2\) does not match"):
        fit_skill(t, np.stack([q] * 3), k, joints=JOINTS, damping=np.ones((2, 1001, 2)),
                  damping_policy=DampingPolicy(kind="learned"))


def test_non_positive_stiffness(demo):
    t, q, k = demo
    with pytest.raises(InvalidInputError, match=r"values must be positive, got -1\.0"):
        fit_skill(t, q, np.where(t[:, None] > 0.5, -1.0, k), joints=JOINTS)


def test_missing_stiffness_needs_range(demo):
    t, q, _ = demo
    with pytest.raises(InvalidInputError, match=r"stiffness_range: required when no stiffness"):
        fit_skill(t, q, None, joints=JOINTS)


def test_inverted_stiffness_range(demo):
    with pytest.raises(InvalidInputError, match=r"stiffness_range: low 200\.0 above high 5\.0"):
        _skill(demo, stiffness_range=(200.0, 5.0))


def test_non_positive_stiffness_range(demo):
    with pytest.raises(InvalidInputError, match=r"stiffness_range: low 0\.0 for joint 0 must be"):
        _skill(demo, stiffness_range=(0.0, 50.0))
    with pytest.raises(InvalidInputError, match=r"stiffness_range: low -1\.0 for joint 1"):
        _skill(demo).rollout(stiffness_range=[(1.0, 5.0), (-1.0, 5.0)])


@pytest.mark.parametrize("window", [4, 3, 7.0, 2001])
def test_bad_smoothing_window(demo, window):
    with pytest.raises(InvalidInputError,
                       match=r"smoothing_window: need an odd sample count from 5 to 1001"):
        _skill(demo, smoothing_window=window)


def test_smoothing_needs_uniform_time(demo):
    t, q, k = demo
    uneven = t + 1e-4 * np.sin(np.arange(t.size))
    with pytest.raises(InvalidInputError, match=r"smoothing_window: needs uniformly sampled t"):
        fit_skill(uneven, q, k, joints=JOINTS, smoothing_window=11)


def test_bad_skill_fields(demo):
    with pytest.raises(InvalidInputError, match=r"fit_skill: field 'name' = ''"):
        _skill(demo, name="")
    with pytest.raises(InvalidInputError, match=r"fit_skill: field 'provenance\.origin'"):
        _skill(demo, provenance={"origin": "bench"})


def test_unknown_method_and_formulation(demo):
    with pytest.raises(InvalidInputError, match=r"method: expected 'lwr' or 'ridge', got 'gp'"):
        _skill(demo, method="gp")
    with pytest.raises(InvalidInputError, match=r"formulation: expected 'classic' or"):
        DMP(10, "spline")


def test_ratio_policy_needs_inertia(demo):
    skill = _skill(demo, target_inertia=None)
    with pytest.raises(InvalidInputError, match=r"target_inertia: the ratio damping policy needs"):
        skill.rollout()
    with pytest.raises(InvalidInputError, match=r"target_inertia: .* got \[0\.0, 0\.1\]"):
        skill.rollout(target_inertia=[0.0, 0.1])


def test_learned_policy_needs_damping(demo):
    with pytest.raises(InvalidInputError, match=r"damping: a learned damping policy needs"):
        _skill(demo, damping_policy=DampingPolicy(kind="learned"))


def test_bad_step_and_shapes(demo):
    skill = _skill(demo)
    with pytest.raises(InvalidInputError, match=r"dt: need 0 < dt <= horizon"):
        skill.rollout(dt=-1e-3)
    with pytest.raises(InvalidInputError, match=r"goal: expected shape \(2,\), got \(3,\)"):
        skill.rollout(goal=[0.0, 0.1, 0.2])
    with pytest.raises(InvalidInputError, match=r"position: expected shape \(1001, n_joints\)"):
        fit_skill(demo[0], demo[1][:500], None, joints=JOINTS, stiffness_range=(1, 2))


@pytest.mark.parametrize(
    ("field", "value", "message"),
    [
        ("alpha_z", -1.0, r"alpha_z\n  Input should be greater than 0"),
        ("alpha_x", 0.0, r"alpha_x\n  Input should be greater than 0"),
        ("duration_s", 1e308, r"horizon_s: 1e\+308 s at dt = 0\.01 s would be inf samples"),
        ("goal", 1e308, r"rollout's position of joint 'shoulder' is (-?inf|nan)"),
        ("start", 1e308, r"rollout's position of joint 'shoulder' is (-?inf|nan)"),
        ("alpha_x", 1e-300, r"rollout's \w+ of joint 'shoulder' is (-?inf|nan)"),
        ("beta_z", 1e308, r"rollout's position of joint 'shoulder' is (-?inf|nan)"),
    ],
)
def test_hostile_skill_file_is_refused_by_name(demo, field, value, message):
    """A skill file from anywhere: values that would overflow the rollout are refused with a
    named error, without numpy's overflow warnings on the way."""
    data = _skill(demo).model_dump(mode="json")
    if isinstance(data[field], list):
        row = data[field][0]
        if isinstance(row, list):
            row[:] = [value] * len(row)
        else:
            data[field][0] = value
    else:
        data[field] = value
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises((InvalidInputError, ValidationError), match=message):
            Skill.model_validate(data).rollout(dt=0.01)


def test_overflowing_log_stiffness_is_clamped_to_the_range_silently(demo):
    data = _skill(demo).model_dump(mode="json")
    data["stiffness_log_weights"][0] = [1e308] * len(data["stiffness_log_weights"][0])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        rollout = Skill.model_validate(data).rollout(dt=0.01)
    assert np.all(rollout.stiffness[:, 0] == data["stiffness_range"][0][1])


def test_rollout_longer_than_the_sample_limit(demo):
    message = r"horizon_s: 2000000\.0 s at dt = 0\.001 s would be 2e\+09 samples, more than 10,0"
    with pytest.raises(InvalidInputError, match=message):
        _skill(demo).rollout(horizon_s=2e6)


@pytest.mark.parametrize("method", ["lwr", "ridge"])
def test_sums_in_blocks_equal_one_full_design_matrix(method, monkeypatch):
    # The regression sums run over blocks of samples; one block holding every sample (the full
    # n_samples x n_basis design matrix) must give the same skill up to rounding.
    from compliant_demo import phase_basis

    t = np.linspace(0.0, 1.0, 10_001)
    q = minimum_jerk(t, START, GOAL, 1.0)
    k = bell_stiffness(t, 1.0)
    kwargs = {"joints": JOINTS, "method": method, "target_inertia": [0.05, 0.02]}
    blocked = fit_skill(t, q, k, **kwargs)
    assert t.size > 2 * phase_basis.REGRESSION_BLOCK
    monkeypatch.setattr(phase_basis, "REGRESSION_BLOCK", t.size)
    whole = fit_skill(t, q, k, **kwargs)
    for field in ("weights", "stiffness_log_weights"):
        np.testing.assert_allclose(getattr(blocked, field), getattr(whole, field), rtol=1e-9,
                                   atol=1e-9)
    np.testing.assert_allclose(blocked.provenance.fit_rmse, whole.provenance.fit_rmse, rtol=1e-6,
                               atol=1e-10)
