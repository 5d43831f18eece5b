"""The energy tank on increments and over simulated replays, against closed forms and a loop."""

from __future__ import annotations

import numpy as np
import pytest

from compliant_demo.energy_tank import (
    TANK_INITIAL_ENERGY_J,
    TANK_MAX_ENERGY_J,
    replay_energy_metrics,
    scenario_energy,
    tank_levels,
)
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import IdealImpedanceParams, JointParams
from compliant_demo.sim import simulate


@pytest.mark.parametrize(("initial", "upper"), [(0.0, 0.0), (0.05, 0.5), (0.3, 0.3), (1.0, 4.0)])
def test_tank_levels_equal_the_recursion(initial, upper):
    rng = np.random.default_rng(14)
    increments = rng.normal(0.0, 0.05, size=(2000, 3))
    # Reference: level_k = min(upper, level_{k-1} + increment_k) written as a loop (the tank of
    # Ferraguti, Secchi, Fantuzzi, ICRA 2013, with its valve closed when full; from memory).
    level = np.full(3, initial)
    expected = []
    for row in increments:
        level = np.minimum(upper, level + row)
        expected.append(level)
    np.testing.assert_allclose(tank_levels(increments, initial, upper), expected, atol=1e-12)


def test_defaults_are_ordered():
    assert 0 < TANK_INITIAL_ENERGY_J <= TANK_MAX_ENERGY_J


def test_damped_decay_fills_the_tank_with_the_spring_energy():
    # Released 0.1 rad from a 40 N*m/rad spring with mechanism damping 0.5 N*m*s/rad and no
    # friction: after the decay the damper has dissipated the spring's 1/2 k x0^2 = 0.2 J (energy
    # balance, closed form); the tank holds it, capped at its bound.
    joint = JointParams(name="elbow", inertia=0.03, viscous_damping=0.0)
    mechanism = IdealImpedanceParams(stiffness_min=1.0, stiffness_max=100.0, damping_max=5.0,
                                     time_constant=1e-3)
    n = 4000
    result = simulate([joint], mechanism, np.zeros((n, 1)), np.full((n, 1), 40.0),
                      np.full((n, 1), 0.5), q0=[0.1], dt=1e-3, decimation=4)
    traces = scenario_energy(result, 0)
    assert traces["damping_dissipated"][-1, 0] == pytest.approx(0.2, rel=1e-3)
    # the simulator's own dissipation term (damper only here) agrees to the sample spacing
    assert traces["damping_dissipated"][-1, 0] == pytest.approx(
        result.energy.dissipated[-1, 0, 0], rel=2e-3)
    metrics = replay_energy_metrics(traces["stiffness_injection"], traces["damping_dissipated"],
                                    initial_energy=0.0, max_energy=0.15)
    assert metrics["energy_injected_J"] == pytest.approx(0.0, abs=1e-12)
    assert metrics["energy_tank_deficit_J"] == 0.0
    assert scenario_energy(result, 0, slice(2, 5))["kinetic"].shape == (3, 1)


def test_replay_energy_bad_input():
    with pytest.raises(InvalidInputError, match=r"stiffness_injection: expected \(n_samples, "
                                                r"n_joints\), got shape \(3,\)"):
        replay_energy_metrics([0.0, 0.1, 0.2])
    with pytest.raises(InvalidInputError, match=r"stiffness_injection: non-finite value nan"):
        replay_energy_metrics([[0.0], [np.nan]])
    with pytest.raises(InvalidInputError, match=r"energy_budget: must be >= 0 J, got -0.1"):
        replay_energy_metrics([[0.0], [0.1]], initial_energy=-0.1)
    with pytest.raises(InvalidInputError, match=r"tank_max_energy: must be finite"):
        tank_levels(np.zeros((2, 1)), 0.1, float("inf"))
