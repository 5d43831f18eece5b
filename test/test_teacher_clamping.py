"""The teacher's stiffness clamped to the target's range: recorded in the skill's provenance at
learning time and turned into reasons of the readiness verdict."""

from __future__ import annotations

import math

import numpy as np
import pytest
from test_learning import cork_seat

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.learning import clamped_stretches, learn_skill
from compliant_demo.models import IdealImpedanceParams, JointParams
from compliant_demo.plant import ReplayPlant
from compliant_demo.primitives import ClampedStretch, Skill
from compliant_demo.readiness import (
    CLAMPED_CHECK,
    assess,
    assess_replays,
    clamped_anchor,
    load_criteria,
    schedule_report,
)
from compliant_demo.replay import ReplaySetup

ELBOW = JointParams(name="elbow", inertia=0.04, viscous_damping=0.0, torque_limit=20.0)
PLANT = ReplayPlant(joints=(ELBOW,), mechanism=IdealImpedanceParams(
    stiffness_min=5.0, stiffness_max=150.0, damping_max=20.0, stiffness_rate_limit=1e9,
    damping_rate_limit=1e9))
RANGE = (10.0, 180.0)
DURATION = 2.0
T = np.linspace(0.0, DURATION, 1001)
DT = T[1] - T[0]
# Invented demo stiffness, N*m/rad: 30 - 25 sin(pi t / T) dips to 5 at mid-skill, below the
# range's 10 where sin(pi t / T) > 0.8, i.e. for t in (T/pi asin 0.8, T - T/pi asin 0.8)
# (closed form).
SOFT = 30.0 - 25.0 * np.sin(np.pi * T / DURATION)
CROSS_IN = DURATION / np.pi * math.asin(0.8)
CROSS_OUT = DURATION - CROSS_IN


def _soft_skill() -> Skill:
    """Two demonstrations on one time base with the same soft-in-the-middle stiffness."""
    demos = [(T, cork_seat(T, DURATION, offset)[:, [1]], SOFT[:, None]) for offset in (0, 0.02)]
    return learn_skill(demos, joints=["elbow"], stiffness_range=RANGE, alignment="none",
                       target_inertia=[ELBOW.inertia])


def test_the_stretch_below_the_range_is_recorded_where_the_stiffness_crosses_the_bound():
    (stretch,) = _soft_skill().provenance.teacher_stiffness_clamped
    assert stretch.joint == "elbow"
    # first and last sample below the bound: within one sample of the closed-form crossings
    assert abs(stretch.from_s - CROSS_IN) <= DT and stretch.from_s > CROSS_IN
    assert abs(stretch.to_s - CROSS_OUT) <= DT and stretch.to_s < CROSS_OUT
    # the sample at T/2 = 1 s is the minimum, 30 - 25 = 5 N*m/rad
    assert stretch.teacher_stiffness == pytest.approx(5.0, rel=1e-12)
    assert stretch.clamped_to == RANGE[0]


def test_a_stiffness_inside_the_range_records_no_stretch_and_above_gives_the_upper_bound():
    inside = np.column_stack([np.full(T.shape, 50.0), SOFT + 200.0])
    (above,) = clamped_stretches(T, inside, RANGE, ["shoulder", "elbow"])
    assert (above.joint, above.from_s, above.to_s) == ("elbow", 0.0, DURATION)
    assert (above.teacher_stiffness, above.clamped_to) == (pytest.approx(230.0), RANGE[1])


def test_stiffness_from_variability_records_both_sides_of_the_range():
    # Invented demonstrations spread by a bump around mid-skill: the law is soft where they
    # differ (below k_min there) and stiff where they agree (above k_max at both ends); the
    # spread is symmetric about T/2, so are the stretches (within one sample).
    bump = np.exp(-0.5 * ((T - DURATION / 2) / 0.2) ** 2)[:, None]
    demos = [(T, cork_seat(T, DURATION) + offset * bump) for offset in (-0.2, -0.1, 0, 0.1, 0.2)]
    skill = learn_skill(demos, joints=["shoulder", "elbow"], stiffness_source="variability",
                        stiffness_range=RANGE, alignment="none")
    found = [s for s in skill.provenance.teacher_stiffness_clamped if s.joint == "shoulder"]
    assert [s.clamped_to for s in found] == [RANGE[1], RANGE[0], RANGE[1]]
    start, soft, end = found
    assert start.from_s == 0.0 and end.to_s == pytest.approx(DURATION)
    assert soft.teacher_stiffness < RANGE[0] and min(start.teacher_stiffness,
                                                     end.teacher_stiffness) > RANGE[1]
    assert abs(soft.from_s - (DURATION - soft.to_s)) <= DT
    assert abs(start.to_s - (DURATION - end.from_s)) <= DT


def test_the_verdict_names_the_clamped_stretch_with_times_scaled_to_the_replay():
    criteria = load_criteria()
    skill = _soft_skill()
    (stretch,) = skill.provenance.teacher_stiffness_clamped
    setup = ReplaySetup(skill, PLANT)
    span = float(setup.rollout.t[-1] - setup.rollout.t[0])
    (reason,) = [r for r in assess_replays(criteria, setup, []).reasons
                 if r.check == CLAMPED_CHECK]
    assert (reason.joint, reason.from_s, reason.to_s) == ("elbow", stretch.from_s, stretch.to_s)
    assert (reason.value, reason.threshold, reason.unit) == (
        stretch.teacher_stiffness, 10.0, "N*m/rad")
    assert reason.link == clamped_anchor(0)
    # severity: (10 - 5) / 10 times the stretch's share of movement plus settling
    assert reason.severity == pytest.approx(0.5 * (stretch.to_s - stretch.from_s) / span)
    slow = ReplaySetup(skill, PLANT, duration_s=2 * DURATION)
    (scaled,) = [r for r in assess_replays(criteria, slow, []).reasons
                 if r.check == CLAMPED_CHECK]
    assert (scaled.from_s, scaled.to_s) == pytest.approx((2 * stretch.from_s, 2 * stretch.to_s))


def test_a_skill_stored_without_the_field_loads_and_assesses_without_the_reason():
    payload = _soft_skill().model_dump(mode="json")
    del payload["provenance"]["teacher_stiffness_clamped"]
    older = Skill.model_validate(payload)
    assert older.provenance.teacher_stiffness_clamped is None
    criteria = load_criteria()
    report = schedule_report(ReplaySetup(older, PLANT).rollout, PLANT, criteria)
    verdict = assess(criteria, PLANT, report, skill=older)
    assert CLAMPED_CHECK not in [r.check for r in verdict.reasons]


def test_a_stretch_shorter_than_the_minimum_is_left_out():
    criteria = load_criteria()
    blip = np.full(T.shape, 20.0)
    blip[300:310] = 8.0  # 0.018 s < min_stretch_duration 0.05 s
    demos = [(T, cork_seat(T, DURATION, offset)[:, [1]], blip[:, None]) for offset in (0, 0.02)]
    skill = learn_skill(demos, joints=["elbow"], stiffness_range=RANGE, alignment="none",
                        target_inertia=[ELBOW.inertia])
    assert len(skill.provenance.teacher_stiffness_clamped) == 1
    verdict = assess_replays(criteria, ReplaySetup(skill, PLANT), [])
    assert CLAMPED_CHECK not in [r.check for r in verdict.reasons]


def test_bad_clamped_stretches_are_refused():
    with pytest.raises(ValueError, match=r"to_s = 0\.5 is before from_s = 1\.0"):
        ClampedStretch(joint="elbow", from_s=1.0, to_s=0.5, teacher_stiffness=5.0,
                       clamped_to=10.0)
    with pytest.raises(InvalidInputError, match=r"teacher_stiffness: expected shape \(1001, 1\), "
                                                r"got \(1001, 2\)"):
        clamped_stretches(T, np.column_stack([SOFT, SOFT]), RANGE, ["elbow"])
    with pytest.raises(InvalidInputError, match=r"teacher_stiffness: non-finite value nan"):
        clamped_stretches(T, np.where(T > 1, np.nan, SOFT)[:, None], RANGE, ["elbow"])
    skill = _soft_skill()
    criteria = load_criteria()
    report = schedule_report(ReplaySetup(skill, PLANT).rollout, PLANT, criteria)
    renamed = skill.model_copy(update={"provenance": skill.provenance.model_copy(update={
        "teacher_stiffness_clamped": [ClampedStretch(joint="wrist", from_s=0.0, to_s=1.0,
                                                     teacher_stiffness=5.0, clamped_to=10.0)]})})
    with pytest.raises(InvalidInputError, match=r"joint 'wrist' is not one of the schedule's "
                                                r"\['elbow'\]"):
        assess(criteria, PLANT, report, skill=renamed)
    data = criteria.model_dump(mode="json")
    del data["schedule_checks"][CLAMPED_CHECK]
    without = type(criteria).model_validate(data)
    with pytest.raises(InvalidInputError, match=r"no entry for check\(s\) "
                                                r"\['teacher_stiffness_clamped'\]"):
        assess(without, PLANT, report, skill=skill)
    data["schedule_checks"][CLAMPED_CHECK] = {"why": "clamped", "threshold": 3.0}
    with pytest.raises(InvalidInputError, match=r"teacher_stiffness_clamped\.threshold: .* got "
                                                r"3\.0"):
        assess(type(criteria).model_validate(data), PLANT, report, skill=skill)
    with pytest.raises(InvalidInputError, match=r"movement_s: must be a positive duration in s, "
                                                r"got -1\.0"):
        assess(criteria, PLANT, report, skill=skill, movement_s=-1.0)
