"""Bad input to the joint and mechanism records and to the simulator: named errors only."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from compliant_demo.exceptions import InvalidInputError, UnstableStepError
from compliant_demo.models import (
    AntagonisticParams,
    IdealImpedanceParams,
    JointParams,
    model_from_mapping,
)
from compliant_demo.perturbation import PerturbationSchedule, Sinusoid, TorqueStep, Wall
from compliant_demo.sim import Simulator, check_step_stability, simulate

JOINT = JointParams()
IDEAL = IdealImpedanceParams()


def _run(**overrides):
    n = 10
    args = {
        "joints": [JOINT],
        "mechanism": IDEAL,
        "equilibrium": np.zeros((n, 1)),
        "stiffness": np.full((n, 1), 50.0),
    }
    args.update(overrides)
    return simulate(**args)


@pytest.mark.parametrize(
    "model, data, match",
    [
        (JointParams, {"inertia": 0.0}, r"'inertia' = 0\.0"),
        (JointParams, {"inertia": -1.0}, r"'inertia' = -1\.0"),
        (JointParams, {"viscous_damping": -0.1}, r"'viscous_damping' = -0\.1"),
        (JointParams, {"lower_limit": 1.0, "upper_limit": 0.5}, r"lower_limit \(1\.0\)"),
        (IdealImpedanceParams, {"stiffness_min": 300.0}, r"stiffness_min \(300\.0\) is above"),
        (IdealImpedanceParams, {"damping_min": -1.0}, r"'damping_min' = -1\.0"),
        (AntagonisticParams, {"stiffness_min": 250.0}, r"stiffness_min \(250\.0\) is above"),
        (AntagonisticParams, {"k2": 0.0}, r"'k2' = 0\.0"),
        (AntagonisticParams, {"stiffness_min": 5.0}, r"below 2\*k1"),
    ],
)
def test_bad_parameters_are_named(model, data, match):
    with pytest.raises(InvalidInputError, match=match):
        model_from_mapping(model, data)


@pytest.mark.parametrize(
    "overrides, match",
    [
        (
            {"equilibrium": np.array([[0.0], [np.nan]] + [[0.0]] * 8)},
            r"equilibrium\[\(1, 0\)\] = nan",
        ),
        ({"stiffness": np.array([[50.0]] * 9 + [[np.inf]])}, r"stiffness\[\(9, 0\)\] = inf"),
        ({"damping": np.full((10, 1), -0.5)}, r"damping\[\(0, 0\)\] = -0\.5: must be >= 0"),
        ({"stiffness": np.full((10, 1), -1.0)}, r"stiffness\[\(0, 0\)\] = -1\.0"),
        ({"equilibrium": np.zeros((10, 2))}, r"equilibrium: shape \(10, 2\)"),
        ({"stiffness": np.full((9, 1), 50.0)}, r"stiffness: shape \(9, 1\) does not match"),
        ({"equilibrium": np.zeros((0, 1))}, r"n_steps >= 1"),
        ({"equilibrium": "flat"}, r"equilibrium: not a numeric array"),
        ({"method": "leapfrog"}, r"method = 'leapfrog'"),
        ({"decimation": 0}, r"decimation = 0"),
        ({"dt": -1e-3}, r"dt = -0\.001"),
        ({"dt": float("nan")}, r"dt = nan"),
        ({"q0": [0.1, 0.2]}, r"q0: shape \(2,\)"),
        ({"joints": []}, r"joints: expected a non-empty"),
        ({"mechanism": [IDEAL, IDEAL]}, r"got 2 records for 1 joints"),
        ({"schedules": []}, r"schedules: empty"),
        (
            {"schedules": [PerturbationSchedule(perturbations=[TorqueStep(joint=3)])]},
            r"perturbations\[0\]\.joint = 3",
        ),
        (
            {"schedules": [PerturbationSchedule(perturbations=[Sinusoid(frequency_hz=600)])]},
            r"frequency_hz = 600\.0: at or above the Nyquist",
        ),
        (
            {"equilibrium": np.zeros((10, 3, 1)), "schedules": [PerturbationSchedule()] * 2},
            r"does not match 10 steps and 2 scenarios",
        ),
    ],
)
def test_bad_simulation_input_is_named(overrides, match):
    with pytest.raises(InvalidInputError, match=match):
        _run(**overrides)


def test_unstable_step_names_the_largest_stable_step():
    with pytest.raises(UnstableStepError, match=r"dt = 0\.02 s is above the largest stable step"):
        _run(dt=0.02)
    with pytest.raises(UnstableStepError, match=r"joint 'joint1'"):
        check_step_stability([JOINT], IDEAL, 0.02, "symplectic_euler")
    with pytest.raises(InvalidInputError, match=r"dt = 0"):
        check_step_stability([JOINT], IDEAL, 0.0)


def test_bad_step_api_input_is_named():
    sim = Simulator([JOINT], IDEAL, n_scenarios=2)
    with pytest.raises(InvalidInputError, match=r"equilibrium: shape \(3,\)"):
        sim.step([0.0, 0.0, 0.0], [50.0])
    with pytest.raises(InvalidInputError, match=r"stiffness\[\(1, 0\)\] = nan"):
        sim.step([0.0], [[50.0], [np.nan]])
    with pytest.raises(InvalidInputError, match=r"damping\[\(1, 0\)\] = -2\.0: must be >= 0"):
        sim.step([0.0], [50.0], damping=[[1.0], [-2.0]])
    with pytest.raises(InvalidInputError, match=r"external_torque\[\(0, 0\)\] = inf"):
        sim.step([0.0], [50.0], external_torque=[np.inf])
    with pytest.raises(InvalidInputError, match=r"schedules: 1 given for n_scenarios = 2"):
        Simulator([JOINT], IDEAL, n_scenarios=2, schedules=[PerturbationSchedule()])
    with pytest.raises(InvalidInputError, match=r"n_scenarios = 0"):
        Simulator([JOINT], IDEAL, n_scenarios=0)


def test_warnings_for_ignored_damping_and_late_perturbations():
    with pytest.warns(UserWarning, match="damping commands are ignored"):
        _run(mechanism=AntagonisticParams(), damping=np.ones((10, 1)))
    late = PerturbationSchedule(perturbations=[Wall(onset_s=5.0)])
    expected = r"1 perturbation\(s\) start after the run's 10 steps and never act: schedules\[0\]"
    with pytest.warns(UserWarning, match=expected):
        _run(schedules=[late])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        _run(schedules=[PerturbationSchedule(perturbations=[Wall(onset_s=0.005)])])
