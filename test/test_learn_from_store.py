"""Learning from the store (what the learner node and ``compliant-demo learn`` do), without ROS."""

from __future__ import annotations

import warnings
from pathlib import Path

import pytest

from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.learning import LearnRequest, learn_from_store, load_skill
from compliant_demo.store import DemoStore
from compliant_demo.teaching import cork_seat_scenario, teaching_series

JOINTS = ["shoulder", "elbow"]


@pytest.fixture(scope="module")
def scenario():
    return cork_seat_scenario(duration_s=2.0)


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




def test_learning_from_copies_warns_and_the_report_names_what_it_used(scenario, tmp_path):
    # The same seed recorded twice gives identical samples (a repeated run); a third
    # demonstration comes from another operator. The learner warns about the copies, returns
    # the skill it fitted (no reload needed) and its report names every operator and id.
    path = tmp_path / "store.sqlite"
    _store_with_demos(path, scenario, 1)
    _store_with_demos(path, scenario, 1)
    with DemoStore(path) as store:
        (record,) = teaching_series(scenario, 1, seed=9)
        other = store.add_demonstration(skill="cork_seat", joints=JOINTS, operator="operator_c",
                                        t=record.t, position=record.position,
                                        velocity=record.velocity, torque=record.torque,
                                        stiffness=record.hand_stiffness_truth)
        request = LearnRequest(skill="cork_seat", joints=tuple(JOINTS), min_demonstrations=3,
                               options={"n_basis": 15, "alignment": "resample"})
        with pytest.warns(UserWarning, match=r"demonstrations .+, .+ hold identical samples"):
            outcome = learn_from_store(store, request)
        stored = load_skill(store, "cork_seat")
    (copies,) = outcome.duplicates
    assert len(copies) == 2 and other not in copies
    assert set(outcome.demonstration_ids) == set(copies) | {other}
    assert "operators: 'operator_b', 'operator_c'" in outcome.report
    assert all(demo_id in outcome.report for demo_id in outcome.demonstration_ids)
    assert outcome.stored.skill.model_dump() == stored.skill.model_dump()
    assert outcome.stored.record.id == stored.record.id


def test_distinct_demonstrations_learn_without_a_warning(scenario, tmp_path):
    path = tmp_path / "store.sqlite"
    _store_with_demos(path, scenario, 2)
    request = LearnRequest(skill="cork_seat", joints=tuple(JOINTS),
                           options={"n_basis": 15, "alignment": "resample"})
    with DemoStore(path) as store, warnings.catch_warnings():
        warnings.simplefilter("error")
        outcome = learn_from_store(store, request)
    assert outcome.duplicates == ()
