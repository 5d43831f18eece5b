"""Actuator loads of the antagonistic mechanism: spring tension, motor torque, their limits.

Spring law and pretension: t(phi) = k1*phi + k2*phi^2 per spring; with both taut at stiffness K
each is stretched phi = (K - 2*k1) / (4*k2) (Migliore, Brown, DeWeerth, ICRA 2005, from memory).
Motor torque = reflected inertia times motor acceleration plus the spring's tension (Newton's
second law at the motor, common practice), checked against a central finite difference of the
simulated motor angle.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest

from compliant_demo.evaluation import first_limit_violation, limit_excess
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import AntagonisticParams, JointParams
from compliant_demo.plant import ReplayPlant, load_plant
from compliant_demo.sim import simulate

SPRINGS = {"k1": 6.0, "k2": 90.0, "pretension_offset": 0.02, "stiffness_min": 15.0,
           "stiffness_max": 180.0}


def _joint() -> JointParams:
    return JointParams(inertia=0.08, viscous_damping=0.05, limit_damping=0.0)


def test_spring_tension_at_rest_is_the_pretension_of_the_commanded_stiffness():
    n = 200
    mechanism = AntagonisticParams(**SPRINGS)
    run = simulate([_joint()], mechanism, np.full((n, 1), 0.1), np.full((n, 1), 180.0))
    phi = (180.0 - 2 * 6.0) / (4 * 90.0)
    tension = 6.0 * phi + 90.0 * phi**2
    assert tension == pytest.approx(22.4, abs=0.01)  # the figure of the shipped plant's note
    np.testing.assert_allclose(run.spring_tension[:, 0, 0], tension, rtol=1e-12)
    # at rest the motors just hold their springs
    np.testing.assert_allclose(run.motor_torque[:, 0, 0], tension, rtol=1e-12)


def test_motor_torque_adds_reflected_inertia_times_motor_acceleration():
    dt, n, inertia = 1e-4, 3000, 0.002
    mechanism = AntagonisticParams(**SPRINGS, motor_inertia=inertia, motor_time_constant=0.05)
    equilibrium = np.where(np.arange(n)[:, None] < 100, 0.0, 0.3)  # a step in the command
    run = simulate([_joint()], mechanism, equilibrium, np.full((n, 1), 100.0), dt=dt)
    theta1 = run.actuators[:, 0, 0, 0]
    accel = (theta1[2:] - 2 * theta1[1:-1] + theta1[:-2]) / dt**2
    tension = run.spring_tension[1:-1, 0, 0]
    motor = run.motor_torque[1:-1, 0, 0]
    # away from the command step (a jump of the motor speed; 0.3 rad / 0.05 s stays below the
    # 10 rad/s speed limit, so the lag is never cut)
    window = slice(150, 2500)
    expected = np.abs(inertia * accel + tension)[window]
    assert np.max(np.abs(accel[window])) > 100.0  # the motors do accelerate here
    np.testing.assert_allclose(motor[window], np.maximum(expected, motor[window]), rtol=0,
                               atol=1e-9)
    pulling = np.abs(inertia * accel + tension)[window] >= motor[window] - 1e-3
    np.testing.assert_allclose(motor[window][pulling], expected[pulling], rtol=2e-3)


def test_actuator_limits_default_to_none_and_stay_out_of_stored_records():
    mechanism = AntagonisticParams(**SPRINGS)
    assert math.isinf(mechanism.spring_tension_limit) and mechanism.motor_inertia == 0.0
    assert "spring_tension_limit" not in mechanism.model_dump(mode="json")
    limited = AntagonisticParams(**SPRINGS, spring_tension_limit=30.0)
    assert limited.model_dump(mode="json")["spring_tension_limit"] == 30.0
    shipped = load_plant().mechanism
    assert isinstance(shipped, AntagonisticParams)
    assert (shipped.spring_tension_limit, shipped.motor_torque_limit) == (30.0, 32.0)


@pytest.mark.parametrize("field, value", [("spring_tension_limit", 0.0),
                                          ("motor_torque_limit", float("nan")),
                                          ("motor_inertia", -1.0)])
def test_actuator_limit_fields_are_validated(field, value):
    with pytest.raises(ValueError, match=field):
        AntagonisticParams(**SPRINGS, **{field: value})


@pytest.mark.parametrize("field, reason", [
    ("spring_tension_limit", r"spring tension limit: joint1 22.4 N\*m beyond the 20 N\*m limit"),
    ("motor_torque_limit", r"motor torque limit: joint1 22.4 N\*m beyond the 20 N\*m limit"),
])
def test_first_limit_violation_names_the_actuator_limit(field, reason):
    n = 50
    mechanism = AntagonisticParams(**SPRINGS, **{field: 20.0})
    run = simulate([_joint()], mechanism, np.full((n, 1), 0.1), np.full((n, 1), 180.0))
    loads = {name: getattr(run, name)[:, 0, :] for name in ("spring_tension", "motor_torque")}
    found = first_limit_violation(run.t, run.q[:, 0, :], run.tau_mechanism[:, 0, :], [_joint()],
                                  loads=loads, mechanisms=[mechanism])
    assert found is not None and re.search(reason, found)
    assert "at t = 0.000 s" in found
    with pytest.raises(InvalidInputError, match="one record per joint needed"):
        limit_excess(run.q[:, 0, :], run.tau_mechanism[:, 0, :], [_joint()], loads=loads)


def test_replay_stops_at_the_spring_tension_limit():
    from campaign_support import cork_seat_skill

    from compliant_demo.replay import ReplayRun, ReplaySetup

    base = load_plant()
    weak = base.mechanism.model_copy(update={"spring_tension_limit": 1.0})
    run = ReplayRun(ReplaySetup(cork_seat_skill(), ReplayPlant(joints=base.joints,
                                                                mechanism=weak)))
    while not run.finished:
        run.step()
    assert run.stop_reason is not None
    assert run.stop_reason.startswith("spring tension limit: ")

