"""The safety envelope on the hardware command stream: soft start, clamps, watchdogs, the stop.

Expected values are closed forms of the envelope's own definitions (module docstring of
compliant_demo.handoff.envelope): a raised-cosine blend, steps of rate * dt, a ramp lasting
|K - K_safe| / rate. Ramp and clamp limits as such are common practice for impedance commands.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.handoff.envelope import EnvelopeLimits, SafetyEnvelope, envelope_violations

DT = 0.002


def limits(**changes: float) -> EnvelopeLimits:
    values = dict(stiffness_min=10.0, stiffness_max=200.0, max_stiffness_rate=500.0,
                  max_equilibrium_rate=1.0, max_interaction_torque=5.0, safe_stiffness=20.0,
                  damping_max=4.0, safe_damping=0.5, soft_start_s=0.1, feedback_timeout_s=0.003)
    values.update(changes)
    return EnvelopeLimits(**values)


def constant(n: int, equilibrium: list[float], stiffness: list[float]):
    return np.tile(equilibrium, (n, 1)), np.tile(stiffness, (n, 1))


def run(envelope: SafetyEnvelope, periods: int, measured=None, *, fresh: bool = True):
    """Tick ``periods`` times with the commanded equilibrium as the measurement (a perfectly
    stiff joint) unless ``measured`` is given; fresh feedback every period unless not."""
    commands = []
    for k in range(periods):
        now = k * DT
        q = envelope._last_equilibrium if measured is None else measured
        commands.append(envelope.tick(now, q, now if fresh else 0.0))
    return commands


def test_soft_start_blends_from_the_measured_pose_with_a_raised_cosine() -> None:
    eq, k = constant(10, [0.05, -0.02], [60.0, 40.0])
    envelope = SafetyEnvelope(limits(max_stiffness_rate=1e6, max_equilibrium_rate=1e3), DT, eq,
                              k, None, np.array([0.0, 0.0]))
    commands = run(envelope, 50)
    n_soft = round(0.1 / DT)
    for j in (0, 9, 24, 49):
        weight = 0.5 * (1 - math.cos(math.pi * (j + 1) / n_soft))
        np.testing.assert_allclose(commands[j].equilibrium, weight * eq[0], rtol=0, atol=1e-15)
        np.testing.assert_allclose(commands[j].stiffness, 20.0 + weight * (k[0] - 20.0),
                                   rtol=1e-15)
    assert commands[49].phase == "starting"
    assert [c.phase for c in run(envelope, 1)] == ["running"]
    assert envelope.skill_step == 1


def test_stiffness_and_equilibrium_changes_are_clamped_to_their_rates() -> None:
    eq, k = constant(200, [0.5], [200.0])
    envelope = SafetyEnvelope(limits(soft_start_s=0.0), DT, eq, k, None, np.array([0.0]))
    commands = run(envelope, 40)
    stiffness = np.array([c.stiffness[0] for c in commands])
    equilibrium = np.array([c.equilibrium[0] for c in commands])
    # one period of soft start reaches the target weight 1, the clamps then step at rate * dt
    np.testing.assert_allclose(np.diff(stiffness), 500.0 * DT, rtol=1e-12)
    np.testing.assert_allclose(np.diff(equilibrium), 1.0 * DT, rtol=1e-12)
    assert all(c.clamped for c in commands)
    assert envelope_violations(envelope.trace(), envelope.limits, DT) == []


def test_stiffness_outside_the_range_is_clamped_into_it() -> None:
    eq, k = constant(50, [0.0], [5.0])
    envelope = SafetyEnvelope(limits(soft_start_s=0.0), DT, eq, k, None, np.array([0.0]))
    commands = run(envelope, 20)
    assert min(c.stiffness[0] for c in commands) == 10.0


def test_stale_feedback_stops_within_two_control_periods() -> None:
    eq, k = constant(500, [0.0, 0.0], [50.0, 50.0])
    envelope = SafetyEnvelope(limits(feedback_timeout_s=1.5 * DT), DT, eq, k, None, np.zeros(2))
    last_fresh = None
    for period in range(200):
        now = period * DT
        if period < 100:  # feedback at the control rate until the freeze at period 100
            last_fresh = now
        command = envelope.tick(now, np.zeros(2), last_fresh)
        if command.stop is not None:
            break
    assert command.stop.reason == "stale_feedback"
    assert (command.stop.t - 100 * DT) <= 2 * DT + 1e-12


def test_missing_feedback_from_the_start_stops_at_once() -> None:
    eq, k = constant(10, [0.0], [50.0])
    envelope = SafetyEnvelope(limits(), DT, eq, k, None, np.zeros(1))
    command = envelope.tick(0.0, None, None)
    assert command.stop is not None and command.stop.reason == "stale_feedback"


def test_interaction_torque_from_the_deflection_stops_and_holds_the_measured_pose() -> None:
    eq, k = constant(500, [0.0], [100.0])
    envelope = SafetyEnvelope(limits(soft_start_s=0.0), DT, eq, k, None, np.zeros(1))
    run(envelope, 200)  # stiffness reaches 100 N*m/rad at 500 N*m/rad/s after 0.16 s
    pushed = np.array([-0.06])  # K * (q_eq - q) = 100 * 0.06 = 6 N*m > 5 N*m
    command = envelope.tick(200 * DT, pushed, 200 * DT)
    assert command.stop is not None and command.stop.reason == "interaction_torque"
    assert "6 N*m beyond 5 N*m" in command.stop.detail
    np.testing.assert_array_equal(command.equilibrium, pushed)
    # the stop ramps 100 -> 20 N*m/rad at 500 N*m/rad/s: 0.16 s = 80 periods, then holds
    ramp = [command] + run(envelope, 100, pushed)
    held = next(i for i, c in enumerate(ramp) if c.phase == "held")
    assert held == math.ceil((100.0 - 20.0) / (500.0 * DT)) - 1
    assert all(c.stiffness[0] == 20.0 and c.equilibrium[0] == pushed[0] for c in ramp[held:])
    assert envelope_violations(envelope.trace(), envelope.limits, DT) == []


def test_a_requested_stop_is_recorded_and_a_second_changes_nothing() -> None:
    eq, k = constant(500, [0.1], [50.0])
    envelope = SafetyEnvelope(limits(), DT, eq, k, np.full((500, 1), 1.0), np.zeros(1))
    run(envelope, 80)
    envelope.request_stop("requested", "stop service")
    first = envelope.tick(80 * DT, np.array([0.09]), 80 * DT)
    assert first.stop.reason == "requested" and first.damping[0] == 0.5
    envelope.request_stop("shutdown", "node ends")
    second = envelope.tick(81 * DT, np.array([0.0]), 81 * DT)
    assert second.stop is None and second.equilibrium[0] == 0.09
    assert [s.reason for s in envelope.stops] == ["requested", "shutdown"]


def test_the_end_of_the_skill_is_a_completed_stop() -> None:
    eq, k = constant(5, [0.0], [20.0])
    envelope = SafetyEnvelope(limits(soft_start_s=0.0), DT, eq, k, None, np.zeros(1))
    commands = run(envelope, 8)
    assert [s.reason for s in envelope.stops] == ["completed"]
    assert commands[-1].phase == "held"


def test_max_steps_stops_the_run() -> None:
    eq, k = constant(100, [0.0], [20.0])
    envelope = SafetyEnvelope(limits(), DT, eq, k, None, np.zeros(1), max_steps=10)
    run(envelope, 12)
    assert envelope.stops[0].reason == "max_steps"


def test_the_violation_check_finds_each_kind_of_excess() -> None:
    lim = limits()
    trace = {
        "t": np.arange(5) * DT,
        "equilibrium": np.array([[0.0], [0.0], [0.01], [0.01], [0.02]]),
        "stiffness": np.array([[20.0], [21.0], [21.0], [300.0], [300.0]]),
        "measured": np.zeros((5, 1)),
        "stop_entry": np.array([0.0, 0.0, 0.0, 1.0, 0.0]),
        "damping": np.array([[0.5], [0.5], [5.0], [0.5], [0.5]]),
    }
    problems = envelope_violations(trace, lim, DT)
    assert "period 3: stiffness outside [10.0, 200.0] N*m/rad" in problems
    assert "period 3: stiffness rate above 500.0 N*m/rad/s" in problems
    assert "period 2: equilibrium rate above 1.0 rad/s" in problems
    assert "period 4: equilibrium moved after the stop" in problems
    assert "period 2: damping outside [0, 4.0] N*m*s/rad" in problems


@pytest.mark.parametrize(
    "changes, message",
    [
        ({"stiffness_min": 300.0}, "stiffness_min = 300.0 is above stiffness_max = 200.0"),
        ({"safe_stiffness": 5.0}, r"safe_stiffness = 5.0: must lie within \[10.0, 200.0\]"),
        ({"safe_damping": 9.0}, "safe_damping = 9.0: must not exceed damping_max = 4.0"),
        ({"max_stiffness_rate": 0.0}, "max_stiffness_rate = 0: must be positive"),
        ({"soft_start_s": math.nan}, "soft_start_s = nan: expected a finite, non-negative"),
        ({"feedback_timeout_s": -1.0}, "feedback_timeout_s = -1.0: expected a finite"),
    ],
)
def test_bad_limits_are_refused_by_name_and_value(changes: dict, message: str) -> None:
    with pytest.raises(InvalidInputError, match=message):
        limits(**changes)


@pytest.mark.parametrize("bad", [np.array([np.nan, 0.0]), np.array([0.0, np.inf]),
                                 np.zeros(3), np.zeros((1, 2))])
def test_an_unusable_joint_state_stops_on_the_last_usable_pose(bad: np.ndarray) -> None:
    # a NaN angle made the torque watchdog blind (NaN > limit is False) and the stop's
    # equilibrium NaN: every command after it would have been NaN
    eq, k = constant(500, [0.1, -0.1], [60.0, 60.0])
    envelope = SafetyEnvelope(limits(soft_start_s=0.0), DT, eq, k, None, np.zeros(2))
    run(envelope, 20)
    last = envelope._last_measured.copy()
    command = envelope.tick(20 * DT, bad, 20 * DT)
    assert command.stop is not None and command.stop.reason == "stale_feedback"
    assert command.stop.detail.startswith(f"unusable joint state: shape {bad.shape}")
    np.testing.assert_array_equal(command.equilibrium, last)
    for later in run(envelope, 100, bad):
        assert np.isfinite(later.equilibrium).all() and np.isfinite(later.stiffness).all()
    assert envelope.finished
    assert envelope_violations(envelope.trace(), envelope.limits, DT) == []


def test_bad_commands_and_stop_reasons_are_refused() -> None:
    eq, k = constant(5, [0.0, 0.0], [20.0, 20.0])
    with pytest.raises(InvalidInputError, match=r"stiffness: shape \(5, 1\), expected \(5, 2\)"):
        SafetyEnvelope(limits(), DT, eq, k[:, :1], None, np.zeros(2))
    with pytest.raises(InvalidInputError, match="equilibrium: values must be finite"):
        SafetyEnvelope(limits(), DT, eq * np.nan, k, None, np.zeros(2))
    with pytest.raises(InvalidInputError, match=r"measured: shape \(1, 3\), expected \(1, 2\)"):
        SafetyEnvelope(limits(), DT, eq, k, None, np.zeros(3))
    with pytest.raises(InvalidInputError, match="dt = 0.0: expected a positive control period"):
        SafetyEnvelope(limits(), 0.0, eq, k, None, np.zeros(2))
    envelope = SafetyEnvelope(limits(), DT, eq, k, None, np.zeros(2))
    with pytest.raises(InvalidInputError, match="reason = 'tired': expected one of"):
        envelope.request_stop("tired", "")
