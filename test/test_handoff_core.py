"""Fake hardware (simulator behind the command interface, with faults) and the hardware gate."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pytest

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.handoff.fake_hardware import FakeHardware, Faults
from compliant_demo.handoff.gate import gate_decision
from compliant_demo.nodes._periodic import PeriodicThread
from compliant_demo.plant import ReplayPlant, load_plant
from compliant_demo.teaching import cork_seat_scenario

DT = 0.002
JOINTS = ["shoulder", "elbow"]


def ideal_plant() -> ReplayPlant:
    return ReplayPlant(joints=cork_seat_scenario().joints)


def steps(hardware: FakeHardware, n: int) -> list[list]:
    return [hardware.step() for _ in range(n)]


def test_without_faults_every_period_gives_its_own_fresh_sample() -> None:
    hardware = FakeHardware(load_plant(), JOINTS, DT, Faults(), q0=np.array([0.1, 0.2]))
    given = steps(hardware, 50)
    assert all(len(g) == 1 for g in given)
    np.testing.assert_allclose([g[0].t for g in given], (np.arange(50) + 1) * DT, rtol=1e-12)


def test_a_delay_gives_each_sample_that_much_later() -> None:
    delay_periods = 5
    hardware = FakeHardware(load_plant(), JOINTS, DT, Faults(delay_s=delay_periods * DT))
    given = steps(hardware, 30)
    assert all(g == [] for g in given[:delay_periods - 1])
    for period, samples in enumerate(given[delay_periods:], start=delay_periods + 1):
        (sample,) = samples
        assert math.isclose(sample.t, (period - delay_periods) * DT, rel_tol=1e-9)


def test_drops_follow_their_probability_with_a_seed() -> None:
    hardware = FakeHardware(load_plant(), JOINTS, DT, Faults(drop_probability=0.3, seed=4))
    given = sum(len(g) for g in steps(hardware, 2000))
    # binomial(2000, 0.7): mean 1400, standard deviation 20.5; 5 standard deviations
    assert abs(given - 1400) < 5 * math.sqrt(2000 * 0.3 * 0.7)


def test_frozen_feedback_repeats_the_last_sample_then_resumes() -> None:
    hardware = FakeHardware(load_plant(), JOINTS, DT, Faults(freeze_at_s=0.02, freeze_for_s=0.02))
    given = steps(hardware, 30)
    last_before = given[8][0]  # measured at 0.018 s, the last sample before the freeze
    frozen = [g[0] for g in given[9:19]]
    assert all(s is last_before for s in frozen)
    assert given[19][0].t > last_before.t


def test_a_torque_spike_deflects_the_joint_by_torque_over_stiffness() -> None:
    # Hooke's law at rest (common practice): q - q_eq = tau / K on the elbow, which carries no
    # gravity load; the ideal mechanism realises the commanded stiffness.
    hardware = FakeHardware(ideal_plant(), JOINTS, DT,
                            Faults(spike_at_s=0.0, spike_for_s=10.0, spike_torque=2.0),
                            q0=np.zeros(2), initial_stiffness=50.0)
    hardware.command(np.zeros(2), np.full(2, 50.0), np.full(2, 2.0))
    steps(hardware, 1500)
    assert math.isclose(hardware.true_q[1], 2.0 / 50.0, rel_tol=0.01)


@pytest.mark.parametrize(
    "changes, message",
    [
        ({"drop_probability": 1.5}, r"drop_probability = 1.5: must lie in \[0, 1\]"),
        ({"delay_s": -0.1}, "delay_s = -0.1: must be >= 0"),
        ({"delay_s": math.inf}, "delay_s = inf: must be finite"),
        ({"spike_torque": math.nan}, "spike_torque = nan: must be finite"),
    ],
)
def test_bad_faults_are_refused_by_name_and_value(changes: dict, message: str) -> None:
    with pytest.raises(InvalidInputError, match=message):
        Faults(**changes)


def test_bad_commands_are_refused_by_name() -> None:
    hardware = FakeHardware(load_plant(), JOINTS, DT, Faults())
    with pytest.raises(InvalidInputError,
                       match=r"stiffness: expected 2 finite values >= 0, got \[1"):
        hardware.command(stiffness=np.array([1.0, 2.0, 3.0]))
    with pytest.raises(InvalidInputError, match="equilibrium: expected 2 finite values"):
        hardware.command(equilibrium=np.array([0.0, math.nan]))
    # taken, it stopped the next step with an error: the fake hardware node's thread ended
    with pytest.raises(InvalidInputError, match=r"stiffness: expected 2 finite values >= 0, got "
                                                r"\[-100\.0, 20\.0\]"):
        hardware.command(stiffness=np.array([-100.0, 20.0]))
    with pytest.raises(InvalidInputError, match=r"damping: expected 2 finite values >= 0"):
        hardware.command(damping=np.array([0.5, -1.0]))
    assert hardware.step()  # still stepping under the commands held before


@pytest.mark.parametrize(
    ("joints", "q0", "message"),
    [
        # a start 8 rad beyond the stop threw the joint off it at 250 rad/s
        (JOINTS, [10.0, 0.0], r"q0: 10\.0 rad for joint 'shoulder' is outside its range "
                              r"\[-1\.2, 1\.6\] rad"),
        (JOINTS, [0.1], r"q0: 1 value\(s\) \[0\.1\] for the 2 joints"),
        (JOINTS, [0.1, math.nan], r"q0: nan for joint 'elbow' is not a finite angle"),
        # each copy simulated on its own, and their joint states refused as repeated names
        (["elbow", "elbow"], None, r"joints = \['elbow', 'elbow'\]: each joint may be named once"),
    ],
)
def test_bad_start_settings_of_the_fake_hardware_are_refused(joints, q0, message) -> None:
    with pytest.raises(InvalidInputError, match=message):
        FakeHardware(load_plant(), joints, DT, Faults(),
                     q0=None if q0 is None else np.array(q0))


# -- the gate ------------------------------------------------------------------------------------


@dataclass
class Verdict:
    verdict: str
    reasons: list = field(default_factory=list)


def test_a_ready_verdict_lets_the_skill_through() -> None:
    decision = gate_decision(Verdict("ready"), skill="cork_seat version 2")
    assert decision.allowed and not decision.overridden
    assert decision.reason == "cork_seat version 2: verdict ready for this plant and these criteria"


def test_no_verdict_is_refused_with_the_reason() -> None:
    decision = gate_decision(None, skill="cork_seat version 2")
    assert not decision.allowed
    assert decision.reason.startswith("refused, cork_seat version 2: no verdict for this plant "
                                      "description and these criteria")


def test_a_not_ready_verdict_is_refused_naming_its_first_reasons() -> None:
    reasons = [{"check": "damping_ratio", "joint": "elbow", "value": 0.011, "threshold": 0.5,
                "unit": ""}] + [{"check": f"c{i}"} for i in range(4)]
    decision = gate_decision(Verdict("not_ready", reasons), skill="s version 1")
    assert not decision.allowed
    assert "verdict not_ready (damping_ratio on elbow: 0.011 against 0.5; c0; c1; 2 more)" in (
        decision.reason)


def test_an_unknown_verdict_word_is_refused() -> None:
    assert "unknown verdict 'maybe'" in gate_decision(Verdict("maybe"), skill="s").reason


def test_the_bench_override_lets_it_through_and_says_so() -> None:
    decision = gate_decision(Verdict("not_ready", [{"check": "x"}]), skill="s",
                             bench_override=True)
    assert decision.allowed and decision.overridden
    assert decision.reason == "bench-test override: s: verdict not_ready (x)"
    assert decision.as_dict() == {"allowed": True, "reason": decision.reason,
                                  "overridden": True}


# -- the deadline thread of the command stream ------------------------------------------------


def test_the_periodic_thread_ends_when_its_work_says_so_and_keeps_an_error() -> None:
    calls: list[float] = []
    thread = PeriodicThread(0.002, lambda now: calls.append(now) or len(calls) < 5, "test")
    assert thread.jitter_ms() == 0.0
    thread.start()
    thread.stop_when_done(timeout_s=10.0)
    assert len(calls) == 5 and not thread.running and thread.error is None
    assert list(thread.tick_times) == calls and calls == sorted(calls)

    def failing(_now: float) -> bool:
        raise RuntimeError("boom")

    broken = PeriodicThread(0.002, failing, "test_error")
    broken.start()
    broken.stop_when_done(timeout_s=10.0)
    assert isinstance(broken.error, RuntimeError) and not broken.running
