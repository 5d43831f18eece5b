"""Fuzz the skill JSON a store hands to ``learning.load_skill`` (a store file may come from anyone).

The saved payload of a fitted skill is mutated (structure-aware: values replaced, keys dropped or
added; and byte-level damage to the JSON text), written back into the store file with plain
sqlite3, and loaded. Loading must give a Skill or one of our named errors; a Skill that loads must
roll out to finite positions and stiffnesses without numpy's overflow warnings or refuse with a
named error; never anything else, and the demonstrations in the same store keep their exact
samples.
"""

from __future__ import annotations

import json
import sqlite3
import warnings
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from reliability_support import (
    FUZZ_SETTINGS,
    JOINTS,
    JUNK_SCALARS,
    count_case,
    mutated_tree,
    no_hang,
    sample_digest,
    write_demo,
)

from compliant_demo.exceptions import CompliantDemoError, InvalidInputError
from compliant_demo.learning import load_skill, save_skill
from compliant_demo.primitives import Skill, fit_skill
from compliant_demo.store import DemoStore

_INERTIA = [0.05, 0.05]


def _cork_seat_skill() -> Skill:
    """A small skill fitted to a minimum-jerk reach with a rising stiffness (demo data)."""
    t = np.linspace(0.0, 2.0, 401)
    s = t / 2.0
    shape = 10 * s**3 - 15 * s**4 + 6 * s**5
    position = np.stack([0.5 * shape, -0.3 * shape], axis=1)
    stiffness = np.stack([50 + 100 * s, 80 - 30 * s], axis=1)
    return fit_skill(
        t, position, stiffness, joints=JOINTS, n_basis=10, target_inertia=_INERTIA,
        name="cork_seat",
    )  # fmt: skip


class _Target(tuple):
    """(store path, reference demo id, its digest, the skill's JSON payload)."""

    def __repr__(self) -> str:
        return "skill_target"


@pytest.fixture(scope="module")
def skill_target(tmp_path_factory: pytest.TempPathFactory) -> Iterator[_Target]:
    path = tmp_path_factory.mktemp("skills") / "skills.sqlite"
    with DemoStore(str(path)) as store:
        reference = write_demo(store, 111, 2)
        digest = sample_digest(store.load_demonstration(reference))
        save_skill(store, _cork_seat_skill())
    payload = _cork_seat_skill().model_dump(mode="json")
    yield _Target((path, reference, digest, payload))


def _store_payload(path: Path, text: str) -> None:
    connection = sqlite3.connect(str(path))
    try:
        connection.execute("UPDATE skills SET payload = ? WHERE name = 'cork_seat'", (text,))
        connection.commit()
    finally:
        connection.close()


def _check_skill_json(target: _Target, text: str) -> None:
    path, reference, digest = target[0], target[1], target[2]
    _store_payload(path, text)
    with no_hang(10.0), DemoStore(str(path), read_only=True) as store:
        try:
            skill = load_skill(store, "cork_seat").skill
        except CompliantDemoError:
            skill = None
        if skill is not None:
            assert isinstance(skill, Skill)
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("error", RuntimeWarning)  # overflow is refused by name
                    rollout = skill.rollout(dt=0.01, target_inertia=_INERTIA)
            except CompliantDemoError:
                rollout = None
            if rollout is not None:
                for name in ("position", "velocity", "stiffness", "damping"):
                    values = getattr(rollout, name, None)
                    if values is not None:
                        assert np.all(np.isfinite(values)), f"a loaded skill rolled out {name} NaN"
        assert sample_digest(store.load_demonstration(reference)) == digest
    count_case("skill_json")


_leaves = st.one_of(
    JUNK_SCALARS,
    st.sampled_from(["classic", "goal_robust", "lwr", "ridge", "ratio", "learned", [], {},
                     [[1.0, 2.0]], [0.0], -1.0, 0.0, 1e308]),
)  # fmt: skip


@FUZZ_SETTINGS
@given(data=st.data(), damage_text=st.booleans())
def test_fuzz_skill_json(skill_target: _Target, data: st.DataObject, damage_text: bool) -> None:
    tree = data.draw(mutated_tree(skill_target[3], _leaves))
    text = json.dumps(tree)
    if damage_text:
        cut = data.draw(st.integers(0, len(text)))
        text = text[:cut] + data.draw(st.text(max_size=4)) + text[cut + 1 :]
    _check_skill_json(skill_target, text)


def test_skill_fuzzer_starts_from_a_skill_that_loads(skill_target: _Target) -> None:
    _store_payload(skill_target[0], json.dumps(skill_target[3]))
    with DemoStore(str(skill_target[0]), read_only=True) as store:
        rollout = load_skill(store, "cork_seat").skill.rollout(dt=0.01, target_inertia=_INERTIA)
    # The reach ends where it was demonstrated: 0.5 and -0.3 rad (the invented demo data).
    np.testing.assert_allclose(rollout.position[-1], [0.5, -0.3], atol=0.02)


@pytest.mark.parametrize(
    "field, value",
    [("weights", float("nan")), ("stiffness_log_weights", float("inf")),
     ("alpha_z", float("nan")), ("goal", float("-inf")), ("duration_s", float("inf"))],
)  # fmt: skip
def test_skill_with_non_finite_numbers_is_refused_on_load(
    skill_target: _Target, field: str, value: float
) -> None:
    # Found by the fuzzer: such skills loaded and rolled out NaN positions without an error.
    payload = json.loads(json.dumps(skill_target[3]))
    if isinstance(payload[field], list):
        row = payload[field][0]
        if isinstance(row, list):
            row[0] = value
        else:
            payload[field][0] = value
    else:
        payload[field] = value
    _store_payload(skill_target[0], json.dumps(payload))
    with DemoStore(str(skill_target[0]), read_only=True) as store:
        with pytest.raises(InvalidInputError, match=field):
            load_skill(store, "cork_seat")
