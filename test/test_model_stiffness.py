"""Tests of the model-based stiffness channel (antagonistic springs) against closed forms."""

import numpy as np
import pytest

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.model_stiffness import model_stiffness
from compliant_demo.models import AntagonisticParams, IdealImpedanceParams
from compliant_demo.sim.mechanisms import antagonistic_motor_angles, antagonistic_torque

SPRINGS = (
    AntagonisticParams(k1=10.0, k2=100.0, pretension_offset=0.05),
    AntagonisticParams(k1=5.0, k2=40.0),
)


def test_both_springs_taut_closed_form():
    # Migliore, Brown and DeWeerth (ICRA 2005): K = 2 k1 + 2 k2 (theta1 - theta2 + 2 d0) while
    # both springs are taut, independent of the link angle.
    q = np.array([[0.1, -0.2], [0.12, -0.18]])
    motors = np.array([[[0.3, -0.1], [0.0, -0.4]], [[0.35, -0.05], [0.05, -0.45]]])
    k = model_stiffness(SPRINGS, q, motors)
    expected_0 = 2 * 10.0 + 2 * 100.0 * (motors[:, 0, 0] - motors[:, 0, 1] + 0.1)
    expected_1 = 2 * 5.0 + 2 * 40.0 * (motors[:, 1, 0] - motors[:, 1, 1])
    np.testing.assert_allclose(k, np.column_stack([expected_0, expected_1]), rtol=1e-12)


def test_round_trip_with_the_commanded_stiffness_and_the_torque_slope():
    # The motor angles the mechanism sets for a commanded (equilibrium, stiffness) give back
    # that stiffness at the equilibrium, and it is minus the slope of the spring torque
    # (central difference, step 1e-6 rad; the torque is quadratic, so the difference is exact
    # up to rounding).
    params = SPRINGS[0]
    theta1, theta2, _, _ = antagonistic_motor_angles(params, 0.2, np.array([40.0, 120.0]))
    k = model_stiffness([params], np.full((2, 1), 0.2), np.stack([theta1, theta2], -1)[:, None])
    np.testing.assert_allclose(k[:, 0], [40.0, 120.0], rtol=1e-9)
    h = 1e-6
    slope = (antagonistic_torque(params, 0.2 + h, theta1, theta2)
             - antagonistic_torque(params, 0.2 - h, theta1, theta2)) / (2 * h)
    np.testing.assert_allclose(k[:, 0], -slope, rtol=1e-6)


def test_slack_spring_adds_nothing():
    # theta1 - q + d0 < 0: spring 1 is slack, only spring 2 (elongation 0.3) contributes
    # k1 + 2 k2 phi = 5 + 80 * 0.3 = 29.
    k = model_stiffness([SPRINGS[1]], [0.2], [[0.1, -0.1]])
    np.testing.assert_allclose(k, [[29.0]])


def test_bad_input():
    with pytest.raises(InvalidInputError, match="one antagonistic mechanism per joint, got"):
        model_stiffness([IdealImpedanceParams()], [0.0], [[0.0, 0.0]])
    with pytest.raises(InvalidInputError, match=r"motor_position \(n, 2, 2\) expected"):
        model_stiffness(SPRINGS, np.zeros((3, 2)), np.zeros((3, 2)))
    with pytest.raises(InvalidInputError, match=r"motor_position\[0, 1, 0\] = nan is not finite"):
        model_stiffness(SPRINGS, np.zeros((1, 2)), np.array([[[0.0, 0.0], [np.nan, 0.0]]]))


def test_motor_names_and_the_held_channel_before_any_motor_angle():
    from compliant_demo.model_stiffness import held_model_stiffness, motor_joint_names

    assert motor_joint_names(["shoulder", "elbow"]) == [
        "shoulder_motor_1", "shoulder_motor_2", "elbow_motor_1", "elbow_motor_2"]
    channel = held_model_stiffness(SPRINGS)
    held = np.array([[np.nan] * 4, [0.3, -0.1, 0.0, -0.4]])
    k = channel(np.array([[0.1, -0.2], [0.1, -0.2]]), held)
    assert np.isnan(k[0]).all()
    # K = 2 k1 + 2 k2 (theta1 - theta2 + 2 d0) while both are taut (Migliore et al., ICRA 2005)
    np.testing.assert_allclose(k[1], [20 + 200 * 0.5, 10 + 80 * 0.4], rtol=1e-12)
    with pytest.raises(InvalidInputError, match="one antagonistic mechanism per joint"):
        held_model_stiffness([IdealImpedanceParams()])


def test_teaching_motor_angles_give_back_the_clamped_stiffness_at_the_link():
    from compliant_demo.model_stiffness import teaching_motor_angles

    params = AntagonisticParams(k1=6.0, k2=90.0, pretension_offset=0.02, stiffness_min=15.0,
                                stiffness_max=180.0)
    rng = np.random.default_rng(11)
    q = rng.uniform(-1.0, 1.5, size=(50, 2))
    wanted = rng.uniform(5.0, 250.0, size=(50, 2))
    motors = teaching_motor_angles([params, params], q, wanted)
    # The inverse map's round trip: the springs' stiffness at the link is the wanted one,
    # clamped to [stiffness_min, stiffness_max]; their torque there is zero.
    np.testing.assert_allclose(model_stiffness([params, params], q, motors),
                               np.clip(wanted, 15.0, 180.0), rtol=1e-10)
    np.testing.assert_allclose(antagonistic_torque(params, q, motors[..., 0], motors[..., 1]),
                               0.0, atol=1e-10)
    with pytest.raises(InvalidInputError, match=r"expected \(n, 2\) arrays, got \(50, 2\) and"):
        teaching_motor_angles([params, params], q, wanted[:3])


def test_comparison_with_the_estimate_on_the_simulated_teacher():
    """Reference: the simulated teacher's hand stiffness (ground truth of the simulation). As
    the model channel it must agree with the estimate within the recorder's 5 % median bound
    (test_e2e_pipeline); clamped to a range above the soft hand, the model stays above."""
    from compliant_demo.model_stiffness import compare_with_estimate
    from compliant_demo.teaching import cork_seat_scenario, simulate_teaching

    scenario = cork_seat_scenario()
    record = simulate_teaching(scenario, 3)
    settings = scenario.estimator_settings()
    exact = compare_with_estimate(record.t, record.position, record.torque,
                                  record.hand_stiffness_truth, settings)
    for row in exact:
        assert row["compared"] > 0.5
        assert abs(row["relative_difference_median"]) <= 0.05
    clamped = compare_with_estimate(record.t, record.position, record.torque,
                                    np.clip(record.hand_stiffness_truth, 15.0, 180.0), settings)
    for row, same in zip(clamped, exact, strict=True):
        assert row["model_median"] == 15.0  # the hand is softer than 15 N*m/rad most of the time
        assert row["estimate_median"] == pytest.approx(same["estimate_median"])
        assert row["relative_difference_median"] < -0.5


MOTORS = ["shoulder_motor_1", "shoulder_motor_2", "elbow_motor_1", "elbow_motor_2"]


@pytest.mark.parametrize(("names", "position", "stamp", "reason", "detail"), [
    (MOTORS * 2, [0.0] * 8, (1, 0), "oversized", "8 entries, at most 6"),
    (MOTORS, [0.0] * 3, (1, 0), "wrong_length", "3 positions for 4 names"),
    (MOTORS[:3] + MOTORS[:1], [0.0] * 4, (1, 0), "duplicate_names", "4 names, 3 distinct"),
    (MOTORS[:2] + ["wrist_motor_1", "elbow_motor_2"], [0.0] * 4, (1, 0), "missing_motors",
     "no elbow_motor_1"),
    (MOTORS, [0.0, float("inf"), 0.0, 0.0], (1, 0), "non_finite", "shoulder_motor_2 = inf"),
    (MOTORS, [0.0, 0.0, 1e300, 0.0], (1, 0), "out_of_range",
     "elbow_motor_1 = 1e+300 rad, motor range [-3.5, 3.5] rad"),
    (MOTORS, [0.0, -3.5001, 0.0, 0.0], (1, 0), "out_of_range", "shoulder_motor_2 = -3.5001"),
    (MOTORS, [0.0] * 4, (0, 0), "invalid_stamp", "sec=0, nanosec=0"),
    (MOTORS, [0.0] * 4, (-1, 5), "invalid_stamp", "sec=-1, nanosec=5"),
    (MOTORS, [0.0] * 4, (1, 1_000_000_000), "invalid_stamp", "nanosec=1000000000"),
])
def test_the_motor_gate_refuses_what_the_model_channel_cannot_hold(names, position, stamp,
                                                                      reason, detail):
    from compliant_demo.model_stiffness import MotorAngleGate

    gate = MotorAngleGate(["shoulder", "elbow"], SPRINGS, max_entries=6)
    angles, problem = gate.check(*stamp, names, position)
    assert angles is None and problem is not None
    assert problem[0] == reason and detail in problem[1], problem
    assert gate.last_stamp == -np.inf  # nothing refused moves the order


def test_the_motor_gate_keeps_stamps_in_order_until_restarted():
    from compliant_demo.model_stiffness import MotorAngleGate

    gate = MotorAngleGate(["shoulder", "elbow"], SPRINGS, max_entries=6)
    # names in any order; angles come back in motor_joint_names order, at the range's edges
    angles, problem = gate.check(5, 0, MOTORS[::-1], [0.4, -3.5, 3.5, 0.1])
    assert problem is None and angles == [0.1, 3.5, -3.5, 0.4]
    for sec, nanosec in ((5, 0), (4, 999_999_999)):  # duplicated, then older
        assert gate.check(sec, nanosec, MOTORS, [0.0] * 4) == (
            None, ("out_of_order", f"stamp {sec + nanosec * 1e-9:.9f} s not after "
                                   "5.000000000 s"))
    assert gate.check(5, 1, MOTORS, [0.0] * 4)[1] is None
    gate.restart()
    assert gate.check(1, 0, MOTORS, [0.0] * 4)[1] is None
    with pytest.raises(InvalidInputError, match="one antagonistic mechanism per joint"):
        MotorAngleGate(["shoulder"], [IdealImpedanceParams()], max_entries=6)
