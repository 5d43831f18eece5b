"""Generalisation: DMP form per joint by criterion, new goals and durations (closed forms), goal
checks, campaign draws of goals and durations."""

from __future__ import annotations

import math

import numpy as np
import pytest
from campaign_support import campaign_job, cork_seat_skill, plant
from pydantic import ValidationError

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.generalisation import (
    CLASSIC_MIN_NET_FRACTION,
    check_goal,
    choose_formulations,
    draw_target,
)
from compliant_demo.learning import learn_skill
from compliant_demo.perturbation import CampaignSpec, Fixed, Normal, Uniform
from compliant_demo.plant import load_plant
from compliant_demo.primitives import Skill, fit_skill
from compliant_demo.replay import ReplaySetup

START, GOAL = np.array([0.1, -0.3]), np.array([1.2, 0.4])


def minimum_jerk(t: np.ndarray, x0: np.ndarray, xf: np.ndarray, duration: float) -> np.ndarray:
    """Flash and Hogan, J. Neurosci. 5(7) 1985, eq. (7): x0 + (xf - x0)(10s^3 - 15s^4 + 6s^5)."""
    s = (t / duration)[:, None]
    return x0 + (xf - x0) * (10 * s**3 - 15 * s**4 + 6 * s**5)


def _elbow_like(t: np.ndarray, start: float = 0.2) -> np.ndarray:
    """Invented out-and-back elbow motion shaped like cork_seat's: 0.136 rad from start to goal,
    about 0.73 rad of excursion (press and retreat)."""
    s = t / t[-1]
    return start + 0.66 * np.sin(np.pi * s) ** 2 + 0.136 * (10 * s**3 - 15 * s**4 + 6 * s**5)


def _minimum_jerk_skill(**kwargs) -> Skill:
    t = np.linspace(0.0, 1.0, 1001)
    return fit_skill(t, minimum_jerk(t, START, GOAL, 1.0), None, joints=["shoulder", "elbow"],
                     n_basis=50, stiffness_range=(5.0, 200.0), target_inertia=[0.05, 0.02],
                     **kwargs)


def test_classic_form_follows_the_minimum_jerk_closed_form_to_new_goals_and_durations():
    skill = _minimum_jerk_skill(formulation="classic")
    start, goal, duration = np.array([-0.2, 0.5]), np.array([0.9, -0.6]), 2.5
    rollout = skill.rollout(start=start, goal=goal, duration_s=duration, dt=duration / 1000)
    # Classic form: the forcing scales with (g - y0) and the phase with tau (Ijspeert et al.
    # 2013, Neural Computation 25(2), eqs. 2.1-2.3 and sec. 3.1, section numbers from memory),
    # so the learned minimum-jerk path (Flash and Hogan 1985, eq. 7) carries over to any start,
    # goal and duration with the reproduction error of the nominal fit (0.6 % of the amplitude
    # with 50 LWR basis functions, test_primitives.MIN_JERK_BOUNDS).
    exact = minimum_jerk(rollout.t, start, goal, duration)
    relative_rmse = np.sqrt(((rollout.position - exact) ** 2).mean(axis=0)) / np.abs(goal - start)
    assert np.all(relative_rmse < 0.006)


def test_classic_form_scales_time_exactly_when_the_step_scales_with_the_duration():
    skill = _minimum_jerk_skill(formulation="classic")
    base = skill.rollout(duration_s=1.0, dt=1e-3)
    slow = skill.rollout(duration_s=3.0, dt=3e-3)
    # tau*z' and tau*y' (Ijspeert et al. 2013, eqs. 2.1-2.2): the Euler recurrence depends on
    # dt/tau only, so the same dt/tau gives the same samples: y_3T(3t) = y_T(t), z scaled 1/3.
    np.testing.assert_allclose(slow.position, base.position, rtol=0, atol=1e-12)
    np.testing.assert_allclose(slow.velocity, base.velocity / 3.0, rtol=0, atol=1e-9)


def test_a_mixed_form_skill_moves_each_joint_as_its_own_form_does():
    mixed = _minimum_jerk_skill(formulation=["classic", "goal_robust"])
    classic = _minimum_jerk_skill(formulation="classic")
    robust = _minimum_jerk_skill(formulation="goal_robust")
    goal = np.array([0.8, 0.1])
    moved = mixed.rollout(goal=goal).position
    # joints share only the phase: each column equals the single-form skill's (same numbers).
    np.testing.assert_allclose(moved[:, 0], classic.rollout(goal=goal).position[:, 0], atol=1e-12)
    np.testing.assert_allclose(moved[:, 1], robust.rollout(goal=goal).position[:, 1], atol=1e-12)
    restored = Skill.model_validate_json(mixed.model_dump_json())
    assert restored.formulation == ["classic", "goal_robust"]
    np.testing.assert_array_equal(restored.rollout(goal=goal).position, moved)


def test_a_skill_stored_before_per_joint_forms_still_loads():
    skill = _minimum_jerk_skill(formulation="goal_robust")
    payload = skill.model_dump(mode="json")
    del payload["provenance"]["formulation_choice"]
    assert payload["formulation"] == "goal_robust"
    np.testing.assert_array_equal(Skill.model_validate(payload).rollout().position,
                                  skill.rollout().position)


def test_a_skill_with_forms_for_other_joints_is_refused():
    payload = _minimum_jerk_skill().model_dump(mode="json")
    payload["formulation"] = ["classic"]
    with pytest.raises(ValidationError, match=r"formulation has 1 rows for 2 joints"):
        Skill.model_validate(payload)
    with pytest.raises(InvalidInputError, match=r"formulation: 3 forms .* for 2 joints"):
        _minimum_jerk_skill(formulation=["classic", "classic", "goal_robust"])
    with pytest.raises(InvalidInputError, match=r"formulation: expected 'classic' or "
                                                r"'goal_robust' \(or one of them per joint\), "
                                                r"got \['classic', 'mirror'\]"):
        _minimum_jerk_skill(formulation=["classic", "mirror"])


def test_the_criterion_picks_goal_robust_for_an_out_and_back_joint_and_classic_for_a_reach():
    t = np.linspace(0.0, 1.0, 801)
    positions = np.column_stack([minimum_jerk(t, START[:1], GOAL[:1], 1.0)[:, 0],
                                 _elbow_like(t)])
    forms, record = choose_formulations(positions, ["shoulder", "elbow"])
    assert forms == ["classic", "goal_robust"]
    # a minimum-jerk reach goes straight to its goal: net = excursion
    assert record[0]["net_fraction"] == pytest.approx(1.0, abs=1e-12)
    assert record[1]["net_rad"] == pytest.approx(0.136, abs=1e-9)
    assert 0.7 < record[1]["excursion_rad"] < 0.76
    assert record[1]["net_fraction"] < CLASSIC_MIN_NET_FRACTION
    assert {r["chosen_by"] for r in record} == {"criterion"}
    forms, record = choose_formulations(positions, ["shoulder", "elbow"], {"elbow": "classic"})
    assert forms == ["classic", "classic"]
    assert [r["chosen_by"] for r in record] == ["criterion", "request"]
    still = np.zeros((10, 1))
    assert choose_formulations(still, ["wrist"])[0] == ["goal_robust"]


@pytest.mark.parametrize(
    ("requested", "match"),
    [
        ({"knee": "classic"}, r"formulation: names joint 'knee', not one of \['shoulder', "),
        ("mirror", r"formulation: 'mirror' for joint 'shoulder'; expected one of auto, classic"),
        (["auto"], r"formulation: 1 forms \['auto'\] for 2 joints"),
    ],
)
def test_bad_form_requests_are_refused(requested, match):
    positions = np.zeros((5, 2))
    with pytest.raises(InvalidInputError, match=match):
        choose_formulations(positions, ["shoulder", "elbow"], requested)
    with pytest.raises(InvalidInputError, match=r"positions: shape \(5, 3\) does not hold"):
        choose_formulations(np.zeros((5, 3)), ["shoulder", "elbow"])


def test_the_chosen_form_keeps_a_new_elbow_goal_inside_the_joint_range():
    # the default target's elbow: range [-0.4, 1.6] rad
    (elbow,) = load_plant().for_joints(["elbow"])
    rng = np.random.default_rng(3)
    t = np.linspace(0.0, 2.0, 1001)
    demos = [(t, _elbow_like(t, 0.2 + rng.normal(0.0, 0.01))[:, None]) for _ in range(3)]
    kwargs = {"joints": ["elbow"], "stiffness_source": "variability", "n_basis": 30,
              "stiffness_range": (5.0, 200.0), "target_inertia": [elbow.inertia],
              "alignment": "resample"}
    chosen = learn_skill(demos, **kwargs)
    assert chosen.formulation == "goal_robust"
    assert chosen.provenance.formulation_choice[0]["chosen_by"] == "criterion"
    classic = learn_skill(demos, formulation="classic", **kwargs)
    new_goal = [0.6]
    kept = chosen.rollout(goal=new_goal, horizon_s=3.0).position[:, 0]
    thrown = classic.rollout(goal=new_goal, horizon_s=3.0).position[:, 0]
    # Classic: the excursion scales by (0.6 - 0.2)/0.136 ~ 2.9 and leaves the joint's range
    # (Hoffmann et al., ICRA 2009, sec. II); goal-robust: the shape is kept, the goal moves.
    assert thrown.max() > elbow.upper_limit
    assert elbow.lower_limit < kept.min() and kept.max() < elbow.upper_limit
    assert kept.max() - max(kept[0], new_goal[0]) > 0.5  # the press is still there
    assert kept[-1] == pytest.approx(0.6, abs=1e-4)


def test_goals_are_checked_against_the_plant_joint_ranges():
    joints = plant().for_joints(["shoulder", "elbow"])
    assert check_goal([0.1, 0.5], joints) == (0.1, 0.5)
    with pytest.raises(InvalidInputError, match=r"--goal: 3 value\(s\) \[0\.1, 0\.2, 0\.3\] for "
                                                r"the 2 joints \['shoulder', 'elbow'\]"):
        check_goal([0.1, 0.2, 0.3], joints, "--goal")
    with pytest.raises(InvalidInputError, match=r"goal: nan for joint 'elbow' is not a finite"):
        check_goal([0.1, math.nan], joints)
    high = joints[1].upper_limit + 0.5
    with pytest.raises(InvalidInputError, match=rf"goal: {high!r} rad for joint 'elbow' is "
                                                r"outside its range \["):
        ReplaySetup(cork_seat_skill(), plant(), goal=(0.1, high))


@pytest.mark.parametrize(
    ("duration_s", "settle_s", "match"),
    [
        # shorter than a control period: the rollout's linear solve was singular (a traceback)
        (1e-12, 1.0, r"duration_s: must be at least one control period \(0\.001 s\), got 1e-12"),
        (math.inf, 1.0, r"duration_s: must be at least one control period .* got inf"),
        # a horizon of years: the arrays failed to allocate (a traceback after minutes)
        (1e12, 1.0, r"duration_s \+ settle_s = 1e\+12 s: more than 10,000,000 control periods "
                    r"of 0\.001 s \(at most 10000 s\)"),
        (None, 1e12, r"duration_s \+ settle_s = 1e\+12 s: more than 10,000,000"),
    ],
)
def test_replay_durations_outside_what_can_be_simulated_are_refused(duration_s, settle_s, match):
    with pytest.raises(InvalidInputError, match=match):
        ReplaySetup(cork_seat_skill(), plant(), duration_s=duration_s, settle_s=settle_s)


def test_a_nominal_spec_serialises_without_the_generalisation_fields():
    spec = campaign_job().spec
    assert "goal_offset_rad" not in spec.model_dump(mode="json")
    assert "duration_scale" not in spec.model_dump(mode="json")
    drawn = spec.model_copy(update={"duration_scale": Uniform(low=0.8, high=1.2)})
    assert drawn.model_dump(mode="json")["duration_scale"]["low"] == 0.8
    assert CampaignSpec.model_validate(drawn.model_dump(mode="json")) == drawn


@pytest.mark.parametrize(
    ("scale", "match"),
    [
        (Uniform(low=0.0, high=1.0), r"duration_scale: can draw 0\.0; a duration scale must"),
        (Normal(mean=1.0, std=0.1), r"duration_scale: can draw -inf"),
        (Fixed(value=-2.0), r"duration_scale: can draw -2\.0"),
    ],
)
def test_a_duration_scale_that_can_reach_zero_is_refused(scale, match):
    with pytest.raises(ValidationError, match=match):
        CampaignSpec(kinds={"impulse": 1.0}, duration_scale=scale)


def test_drawn_goals_stay_inside_the_limits_and_repeat_with_the_seed():
    spec = CampaignSpec(kinds={"impulse": 1.0},
                        goal_offset_rad={1: Uniform(low=0.5, high=0.6)},
                        duration_scale=Fixed(value=1.5))
    limits = [(-1.0, 1.0), (-0.4, 0.7)]
    first = draw_target(spec, [0.1, 0.3], 2.0, limits, seed=8)
    assert first == draw_target(spec, [0.1, 0.3], 2.0, limits, seed=8)
    assert first.goal == (0.1, 0.7)  # 0.3 + 0.5.. is held at the joint's upper limit
    assert 0.5 <= first.goal_offset_rad[1] <= 0.6 and first.goal_offset_rad[0] == 0.0
    assert (first.duration_s, first.duration_scale) == (3.0, 1.5)
    with pytest.raises(InvalidInputError, match=r"goal_offset_rad: joint index 1 beyond the 1"):
        draw_target(spec, [0.1], 2.0, [(-1.0, 1.0)], seed=8)


def test_a_campaign_drawing_goals_and_durations_stores_them_per_scenario():
    nominal = campaign_job(n_scenarios=4)
    spec = nominal.spec.model_copy(update={
        "goal_offset_rad": {0: Uniform(low=-0.05, high=0.05), 1: Uniform(low=-0.1, high=0.1)},
        "duration_scale": Uniform(low=0.8, high=1.25)})
    job = type(nominal)(nominal.setup, spec, 4, seed=nominal.seed)
    outcomes = job.run_batch(0, [0, 1, 2, 3])
    skill = cork_seat_skill()
    for outcome, index in zip(outcomes, range(4), strict=True):
        target = outcome.target
        assert target is not None and target == job.target(index)
        assert 0.8 * 1.5 <= target.duration_s <= 1.25 * 1.5
        np.testing.assert_allclose(np.subtract(target.goal, skill.goal), target.goal_offset_rad)
        # the scenario replays to its own goal: the unperturbed reference is its own (a hold
        # still pushing over the final settling window is left out: it keeps the link away)
        if all(outcome.metrics["recovered"]):
            assert outcome.metrics["goal_error_max_rad"] < 0.1
        # its perturbation is the nominal campaign's scenario's
        assert outcome.parameters == nominal.schedule(index).model_dump(mode="json")
        assert outcome.trace["t"][-1] == pytest.approx(target.duration_s + 0.3, abs=0.011)
    assert len({o.target.duration_s for o in outcomes}) == 4
    assert all(o.target is None for o in nominal.run_batch(0, [0, 1]))
