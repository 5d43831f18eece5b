"""What the teacher, learner and replay nodes do, tested without ROS (compliant_demo.runtime)."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
from nodes_support import simulate_rollout

from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.learning import learn_skill
from compliant_demo.models import JointParams
from compliant_demo.perturbation import schedule_from_mapping
from compliant_demo.runtime import (
    LearnRequest,
    ReplayPlant,
    ReplayRun,
    TeachingSession,
    learn_from_store,
    load_plant,
)
from compliant_demo.store import DemoStore
from compliant_demo.teaching import cork_seat_scenario, teaching_series

JOINTS = ["shoulder", "elbow"]


@pytest.fixture(scope="module")
def scenario():
    return cork_seat_scenario(duration_s=2.0)


@pytest.fixture(scope="module")
def skill(scenario):
    records = teaching_series(scenario, 2, seed=3)
    demos = [
        {"t": r.t, "position": r.position, "stiffness": r.hand_stiffness_truth} for r in records
    ]
    return learn_skill(
        demos,
        joints=JOINTS,
        n_basis=20,
        alignment="resample",
        stiffness_range=(5.0, 200.0),
        name="cork_seat",
    )


# -- TeachingSession ---------------------------------------------------------------------------


def test_teaching_session_hands_out_each_demonstration_once_in_time_order(
    scenario, tmp_path: Path
) -> None:
    session = TeachingSession(scenario, n_demonstrations=2, seed=3)
    expected = teaching_series(scenario, 2, seed=3)  # demo i is simulate_teaching(seed + i)
    for index, record in enumerate(expected):
        assert session.next_demonstration() == index
        first = list(session.due(0.5))
        assert [row[0] for row in first] == record.t[record.t <= 0.5].tolist()
        assert not list(session.due(0.5))  # nothing new is due
        rest = list(session.due(1e9))
        assert len(first) + len(rest) == record.n_samples == session.current_published
        np.testing.assert_array_equal([row[1] for row in rest], record.position[len(first) :])
        np.testing.assert_array_equal(
            [row[4] for row in rest], record.hand_stiffness_truth[len(first) :]
        )
        assert session.current_finished
    assert session.all_finished
    with pytest.raises(InvalidInputError, match="all 2 demonstrations were handed out"):
        session.next_demonstration()
    session.save_truth(tmp_path / "truth.npz")
    truth = np.load(tmp_path / "truth.npz")
    assert [int(truth[f"count_{i}"]) for i in range(2)] == [r.n_samples for r in expected]
    np.testing.assert_array_equal(truth["stiffness_1"], expected[1].hand_stiffness_truth)
    assert truth["joints"].tolist() == JOINTS


def test_teaching_session_needs_at_least_one_demonstration(scenario) -> None:
    with pytest.raises(InvalidInputError, match="n_demonstrations: must be at least 1, got 0"):
        TeachingSession(scenario, 0, 1)


# -- learn_from_store --------------------------------------------------------------------------


def _store_with_demos(path: Path, scenario, n: int, tags=("bench",)) -> None:
    with DemoStore(path) as store:
        for record in teaching_series(scenario, n, seed=5):
            demo_id = store.begin_demonstration(
                skill="cork_seat",
                joints=JOINTS,
                operator="operator_b",
                tags=list(tags),
                start_time=1.8e9,
            )
            store.append_chunk(
                demo_id,
                record.t,
                record.position,
                record.velocity,
                record.torque,
                record.hand_stiffness_truth,
            )
            store.finish_demonstration(demo_id)


def test_learn_from_store_saves_a_new_version_with_a_report(scenario, tmp_path: Path) -> None:
    path = tmp_path / "store.sqlite"
    _store_with_demos(path, scenario, 2)
    request = LearnRequest(
        skill="cork_seat",
        joints=tuple(JOINTS),
        tags=("bench",),
        operator="operator_b",
        min_demonstrations=2,
        options={"n_basis": 15, "alignment": "resample"},
    )
    with DemoStore(path) as store:
        first = learn_from_store(store, request)
        second = learn_from_store(store, request)
    assert (first.version, second.version) == (1, 2)
    assert len(first.demonstration_ids) == 2
    assert first.report.splitlines()[0].startswith(
        "skill 'cork_seat' version 1 from 2 demonstration(s), 15 basis functions"
    )
    assert "shoulder: position RMSE" in first.report and "elbow: position RMSE" in first.report


@pytest.mark.parametrize(
    "changes, match",
    [
        (
            {"min_demonstrations": 3},
            r"2 complete demonstration\(s\) match skill='cork_seat'; "
            r"need at least 3",
        ),
        (
            {"tags": ("lab",)},
            r"0 complete demonstration\(s\) match skill='cork_seat', "
            r"tags=\['lab'\]",
        ),
        ({"operator": "operator_a"}, r"0 complete .* operator='operator_a'"),
    ],
)
def test_learn_from_store_refuses_when_too_few_match(
    scenario, tmp_path: Path, changes: dict, match: str
) -> None:
    path = tmp_path / "store.sqlite"
    _store_with_demos(path, scenario, 2)
    request = LearnRequest(**{"skill": "cork_seat", "joints": tuple(JOINTS), **changes})
    with DemoStore(path) as store, pytest.raises(NotFoundError, match=match):
        learn_from_store(store, request)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"skill": ""}, "skill"),
        ({"joints": ()}, "joints"),
        ({"min_demonstrations": 0}, "min_demonstrations"),
    ],
)
def test_learn_request_refuses_bad_fields(kwargs: dict, match: str) -> None:
    arguments = {"skill": "cork_seat", "joints": tuple(JOINTS), **kwargs}
    with pytest.raises(InvalidInputError, match=match):
        LearnRequest(**arguments)


# -- ReplayRun ---------------------------------------------------------------------------------


def test_replay_run_steps_the_same_trajectory_as_simulate(skill) -> None:
    schedule = schedule_from_mapping(
        {
            "name": "push",
            "perturbations": [
                {
                    "kind": "torque_window",
                    "joint": 0,
                    "onset_s": 0.5,
                    "duration_s": 0.2,
                    "magnitude": 0.8,
                },
            ],
        }
    )
    plant = load_plant(None)
    run = ReplayRun(skill, plant, schedule, dt=1e-3, settle_s=0.3, seed=9)
    while not run.finished:
        run.step()
    status, reason, metrics, trace = run.outcome()
    assert (status, reason) == ("ok", None)
    assert metrics["steps"] == metrics["steps_planned"] == run.n_steps
    rollout = run.rollout
    n = run.n_steps
    direct = simulate_rollout(run.joints, plant.mechanism, rollout, schedule, seed=9)
    # Same integrator on the same commands: equal to rounding (bound 1e-12 rad).
    np.testing.assert_allclose(trace["q"], direct.q[1:, 0, :], rtol=0, atol=1e-12)
    np.testing.assert_allclose(trace["t"], direct.t[1:], rtol=0, atol=1e-12)
    np.testing.assert_array_equal(trace["stiffness_commanded"], rollout.stiffness[:n])
    assert len(metrics["recovery_time_s"]) == 1
    injected = direct.energy.final()["stiffness_injection"][0].sum()
    assert metrics["energy_injected_J"] == pytest.approx(injected, rel=1e-9, abs=1e-12)
    assert metrics["energy_J"]["perturbation_work"] == pytest.approx(
        direct.energy.final()["perturbation_work"][0].tolist(), rel=1e-9, abs=1e-12
    )
    with pytest.raises(InvalidInputError, match="already finished"):
        run.step()


def _narrow(joint: JointParams, **changes) -> JointParams:
    return joint.model_copy(update=changes)


@pytest.mark.parametrize(
    "plant_changes, run_kwargs, reason",
    [
        ({"torque_limit": 0.05}, {}, r"torque limit: \w+ mechanism torque"),
        ({"upper_limit": 0.6}, {}, r"joint range: elbow at 0.6"),
        ({}, {"max_stiffness_rate": 1.0}, r"stiffness rate: \w+ commanded at"),
    ],
)
def test_replay_run_stops_safely_at_a_limit(
    skill, plant_changes: dict, run_kwargs: dict, reason: str
) -> None:
    base = load_plant(None)
    joints = tuple(
        _narrow(j, **plant_changes) if j.name == "elbow" or "torque_limit" in plant_changes else j
        for j in base.joints
    )
    run = ReplayRun(
        skill, ReplayPlant(joints=joints, mechanism=base.mechanism), None, dt=1e-3, **run_kwargs
    )
    while not run.finished:
        run.step()
    status, message, metrics, trace = run.outcome()
    assert status == "stopped"
    assert pytest.approx(run.steps_done * 1e-3) == trace["t"][-1]
    assert 1 < run.steps_done < run.n_steps and metrics["steps"] == run.steps_done
    assert "goal_error_max_rad" in metrics
    assert re.match(reason, message), message


def test_replay_run_stopped_at_its_first_step_reports_without_outcome_metrics(skill) -> None:
    base = load_plant(None)
    joints = tuple(_narrow(j, lower_limit=0.5) if j.name == "elbow" else j for j in base.joints)
    run = ReplayRun(skill, ReplayPlant(joints=joints, mechanism=base.mechanism), None)
    run.step()
    status, message, metrics, _trace = run.outcome()
    assert status == "stopped" and message.startswith("joint range: elbow at 0.3")
    assert metrics == {"steps": 1, "steps_planned": run.n_steps}


def test_replay_run_cut_short_is_aborted(skill) -> None:
    run = ReplayRun(skill, load_plant(None), None)
    with pytest.raises(InvalidInputError, match="no step yet"):
        run.outcome()
    for _ in range(10):
        run.step()
    status, message, metrics, trace = run.outcome()
    assert status == "aborted" and message == f"ended after 10 of {run.n_steps} steps"
    assert trace["q"].shape == (10, 2)


def test_replay_plant_needs_every_skill_joint(skill) -> None:
    plant = ReplayPlant(joints=(JointParams(name="shoulder"),))
    with pytest.raises(InvalidInputError, match=r"lack \['elbow'\]"):
        ReplayRun(skill, plant, None)


@pytest.mark.parametrize(
    "kwargs, match",
    [({"settle_s": -1.0}, "settle_s"), ({"max_stiffness_rate": 0.0}, "max_stiffness_rate")],
)
def test_replay_run_refuses_bad_settings(skill, kwargs: dict, match: str) -> None:
    with pytest.raises(InvalidInputError, match=match):
        ReplayRun(skill, load_plant(None), None, **kwargs)


def test_plant_file_errors_name_the_file(tmp_path: Path) -> None:
    path = tmp_path / "plant.yaml"
    path.write_text("joints: []\n")
    with pytest.raises(InvalidInputError, match=r"plant\.yaml: field 'joints'"):
        load_plant(path)
