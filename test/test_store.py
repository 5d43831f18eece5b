"""Demonstration store: exact round trips, recording life cycle, summaries, queries, curation,
skills and replay results, file handling, and every bad-input path with the store left intact."""

from __future__ import annotations

import json
import os
import sqlite3
import stat

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from store_support import JOINTS, add_demo, integrity, samples

from compliant_demo.exceptions import (
    InvalidInputError,
    NotFoundError,
    SchemaVersionError,
    StoreCorruptError,
    StoreError,
    StoreFullError,
    StoreReadOnlyError,
)
from compliant_demo.store import SCHEMA_VERSION, DemoStore, ReplayParameters


@pytest.fixture
def store():
    with DemoStore(":memory:") as opened:
        yield opened


@pytest.fixture
def file_store(tmp_path):
    with DemoStore(tmp_path / "store.sqlite") as opened:
        yield opened


def _bits(array: np.ndarray) -> bytes:
    return np.ascontiguousarray(array, dtype="<f8").tobytes()


# -- exact round trips ------------------------------------------------------------------------


@st.composite
def _recordings(draw):
    n = draw(st.integers(1, 40))
    n_joints = draw(st.integers(1, 4))
    finite = st.floats(allow_nan=False, allow_infinity=False, width=64)
    t = np.sort(
        draw(hnp.arrays(np.float64, n, elements=st.floats(-1e9, 1e9, width=64), unique=True))
    )
    channels = {
        name: draw(hnp.arrays(np.float64, (n, n_joints), elements=finite))
        for name in ("position", "velocity", "torque", "stiffness")
    }
    if draw(st.booleans()):
        channels["stiffness"] = None
    cuts = sorted(draw(st.sets(st.integers(1, max(1, n - 1)), max_size=4))) if n > 1 else []
    return t, channels, n_joints, cuts


@settings(max_examples=60, deadline=None)
@given(_recordings())
def test_chunked_recording_round_trips_bit_for_bit(recording):
    t, channels, n_joints, cuts = recording
    joints = [f"j{i}" for i in range(n_joints)]
    with DemoStore(":memory:") as store:
        demo_id = store.begin_demonstration(
            skill="cork_seat", joints=joints, with_stiffness=channels["stiffness"] is not None
        )
        bounds = [0, *cuts, t.size]
        for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
            part = {k: (None if v is None else v[lo:hi]) for k, v in channels.items()}
            store.append_chunk(demo_id, t[lo:hi], **part)
        store.finish_demonstration(demo_id)
        demo = store.load_demonstration(demo_id)
    assert _bits(demo.t) == _bits(t)
    for name, values in channels.items():
        loaded = getattr(demo, name)
        if values is None:
            assert loaded is None
        else:
            assert loaded.shape == (t.size, n_joints)
            assert _bits(loaded) == _bits(values)
    assert demo.info.n_samples == t.size
    assert demo.joints == tuple(joints)


@settings(max_examples=30, deadline=None)
@given(
    payload=st.dictionaries(
        st.text(min_size=1, max_size=8),
        st.one_of(
            st.integers(-(2**53), 2**53),
            st.floats(allow_nan=False, allow_infinity=False),
            st.text(max_size=10),
            hnp.arrays(np.float64, hnp.array_shapes(max_dims=3, max_side=4)),
            hnp.arrays(np.int64, hnp.array_shapes(max_dims=2, max_side=4)),
        ),
        max_size=5,
    )
)
def test_skill_payload_round_trips_arrays_exactly(payload):
    with DemoStore(":memory:") as store:
        demo_id = add_demo(store)
        record = store.save_skill("cork_seat", payload, demonstration_ids=[demo_id], parameters={})
        loaded = store.load_skill_record("cork_seat").payload
    assert record.payload.keys() == payload.keys() == loaded.keys()
    for key, value in payload.items():
        if isinstance(value, np.ndarray):
            assert loaded[key].dtype == value.dtype and loaded[key].shape == value.shape
            assert loaded[key].tobytes() == value.tobytes()  # NaN payloads too, bit for bit
        else:
            assert loaded[key] == value


# -- recording life cycle and summaries ----------------------------------------------------------


def test_summary_columns_match_closed_forms(store):
    t = np.arange(1001) / 1000.0
    position = np.column_stack([np.linspace(-0.5, 0.7, t.size), 0.25 * np.sin(2 * np.pi * t)])
    torque = np.column_stack([np.full(t.size, -2.0), 3.0 * np.cos(2 * np.pi * t)])
    stiffness = np.column_stack([np.linspace(20.0, 200.0, t.size), np.full(t.size, 55.0)])
    demo_id = store.add_demonstration(
        t=t, position=position, velocity=np.zeros_like(position), torque=torque,
        stiffness=stiffness, skill="cork_seat", joints=JOINTS,
    )  # fmt: skip
    info = store.get_info(demo_id)
    # closed forms: range of a ramp is its span, of 0.25 sin over a full period 0.5; peak |3 cos|
    # over a period is 3 at t = 0 (sampled exactly); the duration of 1001 samples at 1 kHz is 1 s.
    assert info.range_of_motion == pytest.approx({"shoulder": 1.2, "elbow": 0.5}, abs=1e-12)
    assert info.peak_abs_torque == pytest.approx({"shoulder": 2.0, "elbow": 3.0}, abs=1e-12)
    assert info.stiffness_min == {"shoulder": 20.0, "elbow": 55.0}
    assert info.stiffness_max == {"shoulder": 200.0, "elbow": 55.0}
    assert info.duration_s == pytest.approx(1.0, abs=1e-12)
    assert info.mean_rate_hz == pytest.approx(1000.0, rel=1e-12)
    assert list(info.range_of_motion) == list(JOINTS)  # per-joint dicts follow the joint order
    row = store.db.execute(
        "SELECT range_of_motion, peak_abs_torque, stiffness_min, stiffness_max, "
        "json_extract(range_of_motion_json, '$.elbow') FROM demonstrations WHERE id = ?",
        [demo_id],
    ).fetchone()
    assert row == pytest.approx((1.2, 3.0, 20.0, 200.0, 0.5), abs=1e-12)


def test_recording_is_visible_while_it_grows_and_finishes_with_flags(store):
    data = samples(300)
    demo_id = store.begin_demonstration(
        skill="cork_seat", joints=JOINTS, operator="operator_b", tags=["press", "press", "soft"],
        start_time=1.75e9,
    )  # fmt: skip
    assert store.get_info(demo_id).status == "recording"
    assert store.get_info(demo_id).tags == ("press", "soft")
    for lo in range(0, 300, 100):
        part = {k: v[lo : lo + 100] for k, v in data.items()}
        total = store.append_chunk(demo_id, **part)
        assert total == lo + 100
        assert store.get_info(demo_id).n_samples == lo + 100
    store.update_flags(demo_id, {"drops": 1, "gaps": 2})
    info = store.finish_demonstration(demo_id, flags={"drops": 3, "note": "cork slipped"})
    assert info.status == "complete"
    assert info.flags == {"drops": 3, "gaps": 2, "note": "cork slipped"}
    assert info.start_time == 1.75e9
    assert info.duration_s == pytest.approx(0.299, abs=1e-12)
    with pytest.raises(StoreError, match="is 'complete', not 'recording'"):
        store.append_chunk(demo_id, **samples(10, t0=1.0))
    with pytest.raises(StoreError, match="already finished"):
        store.finish_demonstration(demo_id)


def test_complete_without_samples_is_refused(store):
    demo_id = store.begin_demonstration(skill="cork_seat", joints=JOINTS)
    with pytest.raises(InvalidInputError, match="has no samples: status 'complete' refused"):
        store.finish_demonstration(demo_id)
    assert store.finish_demonstration(demo_id, status="incomplete").n_samples == 0


def test_nan_stiffness_means_no_estimate(store):
    data = samples(50)
    data["stiffness"][:10] = np.nan  # estimator not yet excited
    data["stiffness"][:, 1] = np.nan  # never excited on the elbow
    demo_id = store.add_demonstration(**data, skill="cork_seat", joints=JOINTS)
    demo = store.load_demonstration(demo_id)
    assert np.array_equal(demo.stiffness, data["stiffness"], equal_nan=True)
    expected = data["stiffness"][10:, 0]
    assert demo.info.stiffness_min == {"shoulder": expected.min(), "elbow": None}
    assert demo.info.stiffness_max == {"shoulder": expected.max(), "elbow": None}
    row = store.db.execute(
        "SELECT stiffness_min, stiffness_max FROM demonstrations WHERE id = ?", [demo_id]
    ).fetchone()
    assert row == (expected.min(), expected.max())


def test_damaged_chunk_is_store_corrupt_error(tmp_path):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        demo_id = add_demo(store)
        good = add_demo(store, seed=1)
    conn = sqlite3.connect(path)
    (blob,) = conn.execute("SELECT torque FROM chunks WHERE demo_id = ?", [demo_id]).fetchone()
    damaged = bytearray(blob)
    damaged[43] ^= 0x10  # one flipped bit, as bit rot would leave it
    conn.execute("UPDATE chunks SET torque = ? WHERE demo_id = ?", [bytes(damaged), demo_id])
    conn.commit()
    conn.close()
    with DemoStore(path, read_only=True) as store:
        with pytest.raises(StoreCorruptError, match=f"store.sqlite.*demonstration '{demo_id}': "
                           "chunk 0 fails its SHA-256 digest"):  # fmt: skip
            store.load_demonstration(demo_id)
        assert store.load_demonstration(good).info.n_samples == 200


@pytest.mark.parametrize(
    ("table", "column", "action", "message"),
    [
        ("demonstrations", "flags", "find", "demonstration '.*' has damaged stored data"),
        ("demonstrations", "tags", "info", "demonstration '.*' has damaged stored data"),
        ("skills", "payload", "skill", "skill 'cork_seat' version 1 has damaged stored data"),
        ("replay_results", "metrics", "result", "replay result '.*' has damaged stored data"),
    ],
)
def test_damaged_json_is_store_corrupt_error(tmp_path, table, column, action, message):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        demo_id = add_demo(store)
        skill = store.save_skill("cork_seat", {"w": [1.0]}, demonstration_ids=[demo_id],
                                 parameters={})  # fmt: skip
        result_id = store.save_replay_result(
            skill_id=skill.id, metrics={"e": 1}, parameters=PARAMETERS
        )
    conn = sqlite3.connect(path)
    conn.execute(f"UPDATE {table} SET {column} = '{{\"cut'")  # a write cut short
    conn.commit()
    conn.close()
    actions = {
        "find": lambda s: list(s.find_demonstrations()),
        "info": lambda s: s.get_info(demo_id),
        "skill": lambda s: s.load_skill_record("cork_seat"),
        "result": lambda s: s.load_replay_result(result_id),
    }
    with DemoStore(path, read_only=True) as store:
        with pytest.raises(StoreCorruptError, match=f"store.sqlite.*{message}"):
            actions[action](store)


def test_truncated_copy_is_store_corrupt_error(tmp_path):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        add_demo(store, n=5000)
    cut = tmp_path / "cut.sqlite"
    cut.write_bytes(path.read_bytes()[:-1])
    with pytest.raises(StoreCorruptError, match="cut.sqlite' is truncated: .* the header says"):
        DemoStore(cut, read_only=True)


def test_load_subset_of_joints_and_dataframe(store):
    demo_id = add_demo(store, n=50)
    full = store.load_demonstration(demo_id)
    part = store.load_demonstration(demo_id, joints=["elbow"])
    assert part.joints == ("elbow",)
    assert np.array_equal(part.position[:, 0], full.position[:, 1])
    assert np.array_equal(part.stiffness[:, 0], full.stiffness[:, 1])
    frame = store.load_dataframe(demo_id)
    assert list(frame.columns[:2]) == ["position.shoulder", "position.elbow"]
    assert frame.index.name == "t"
    assert np.array_equal(frame["torque.elbow"].to_numpy(), full.torque[:, 1])
    assert frame.attrs["info"]["id"] == demo_id


def test_without_stiffness(store):
    demo_id = add_demo(store, with_stiffness=False)
    demo = store.load_demonstration(demo_id)
    assert demo.stiffness is None and not demo.info.has_stiffness
    assert demo.info.stiffness_min == {} and demo.info.stiffness_max == {}


def test_add_demonstration_splits_long_recordings_into_chunks(store):
    from compliant_demo.store.core import CHUNK_SAMPLES

    data = samples(2 * CHUNK_SAMPLES + 5)
    demo_id = store.add_demonstration(**data, skill="cork_seat", joints=JOINTS)
    (count,) = store.db.execute(
        "SELECT count(*) FROM chunks WHERE demo_id = ?", [demo_id]
    ).fetchone()
    assert count == 3
    assert np.array_equal(store.load_demonstration(demo_id).t, data["t"])


# -- queries -----------------------------------------------------------------------------------


@pytest.fixture
def catalogue(store):
    ids = {}
    layout = [
        ("a1", "cork_seat", "operator_a", ["press"], 1.70e9, 100),
        ("a2", "cork_seat", "operator_a", ["press", "soft"], 1.71e9, 400),
        ("b1", "cork_seat", "operator_b", ["soft"], 1.72e9, 300),
        ("w1", "wipe", "operator_b", [], 1.73e9, 50),
    ]
    for seed, (key, skill, operator, tags, start, n) in enumerate(layout):
        ids[key] = add_demo(
            store, seed=seed, n=n, skill=skill, operator=operator, tags=tags, start_time=start
        )
    store.mark_status(ids["b1"], "rejected", reason="cork fell")
    return store, ids


def _ids(infos):
    return [info.id for info in infos]


def test_find_by_each_filter(catalogue):
    store, ids = catalogue
    assert _ids(store.find_demonstrations(skill="cork_seat")) == [ids["a1"], ids["a2"], ids["b1"]]
    assert _ids(store.find_demonstrations(operator="operator_b")) == [ids["b1"], ids["w1"]]
    assert _ids(store.find_demonstrations(tag="soft")) == [ids["a2"], ids["b1"]]
    assert _ids(store.find_demonstrations(tag=["soft", "press"])) == [ids["a2"]]
    assert _ids(store.find_demonstrations(status="rejected")) == [ids["b1"]]
    assert _ids(store.find_demonstrations(status=["rejected", "complete"], skill="wipe")) == [
        ids["w1"]
    ]
    assert _ids(store.find_demonstrations(started_after=1.71e9, started_before=1.73e9)) == [
        ids["a2"],
        ids["b1"],
    ]
    assert _ids(store.find_demonstrations(min_duration_s=0.2)) == [ids["a2"], ids["b1"]]
    assert _ids(store.find_demonstrations(where="n_samples < ?", where_args=[120])) == [
        ids["a1"],
        ids["w1"],
    ]
    named = store.find_demonstrations(
        skill="cork_seat", where="operator = :who", where_args={"who": "operator_b"}
    )
    assert _ids(named) == [ids["b1"]]
    assert _ids(store.find_demonstrations(order_by="-n_samples", limit=2)) == [ids["a2"], ids["b1"]]
    assert _ids(store.find_demonstrations(order_by="skill desc, start_time asc", limit=1)) == [
        ids["w1"]
    ]
    assert store.count_demonstrations(skill="cork_seat", status="complete") == 2
    assert [d.id for d in store.iter_demonstrations(tag="press", joints=["elbow"])] == [
        ids["a1"],
        ids["a2"],
    ]


def test_filter_values_are_bound_not_spliced(catalogue):
    store, ids = catalogue
    for hostile in ("x' OR '1'='1", "cork_seat' --", "'; DROP TABLE chunks; --"):
        assert list(store.find_demonstrations(skill=hostile)) == []
        assert list(store.find_demonstrations(tag=hostile)) == []
        assert list(store.find_demonstrations(operator=hostile)) == []
    assert len(list(store.find_demonstrations())) == 4
    assert store.integrity_check() == ["ok"]


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"order_by": "start_time; DROP TABLE chunks"}, "order_by term 'start_time; DROP TABLE"),
        ({"order_by": "start_time;"}, "order_by column 'start_time;' is unknown"),
        ({"order_by": "(SELECT"}, "order_by column '\\(SELECT' is unknown"),
        ({"order_by": "skill sideways"}, "order_by term 'skill sideways' is not"),
        ({"where": "1); DROP TABLE chunks; --"}, "where = .* closes a parenthesis it never"),
        ({"where": "id IN (SELECT name FROM pragma_table_info('chunks'))"},
         r"where = .* holds a subquery \(SELECT\)"),
        ({"where": "no_such_column = 1"}, "was refused: no such column"),
        ({"where_args": [1]}, "where_args given without where"),
        ({"where": "skill = :_cd_0", "where_args": {"_cd_0": "x"}}, "reserved prefix _cd_"),
        ({"status": "finished"}, "status must be one of .* got 'finished'"),
        ({"limit": -1}, "limit must be a non-negative integer, got -1"),
        ({"min_duration_s": float("nan")}, "min_duration_s must be a finite number, got nan"),
        ({"skill": 3}, "skill must be a string, got 3"),
    ],
)
def test_bad_filters_are_refused(catalogue, kwargs, message):
    store, _ = catalogue
    with pytest.raises(InvalidInputError, match=message):
        store.find_demonstrations(**kwargs)
    assert store.integrity_check() == ["ok"]
    assert len(list(store.find_demonstrations())) == 4


# One CASE with 20,000 branches: tens of thousands of SQLite steps per row, all of them plain
# comparisons on a demonstration column, so only the deadline can stop it early.
_LONG_WHERE = (
    "CASE n_samples " + " ".join(f"WHEN {-i} THEN 0" for i in range(1, 20_001)) + " ELSE 1 END"
)


def test_a_where_running_past_the_query_timeout_is_refused(tmp_path):
    with DemoStore(tmp_path / "store.sqlite", query_timeout_s=1e-9) as store:
        kept = add_demo(store)
        with pytest.raises(
            InvalidInputError, match=r"^where = .* was refused: ran longer than query_timeout_s"
        ):
            store.find_demonstrations(where=_LONG_WHERE)
        with pytest.raises(InvalidInputError, match=r"^where = .* ran longer than"):
            store.count_demonstrations(where=_LONG_WHERE)
        # the deadline is per query and removed afterwards: ordinary work goes on
        assert _ids(store.find_demonstrations(where="n_samples = ?", where_args=[200])) == [kept]
        assert store.load_demonstration(kept).t.size == 200
    for bad in (0, -1.0, float("inf"), "10"):
        with pytest.raises(InvalidInputError, match=f"query_timeout_s must be .* got {bad!r}"):
            DemoStore(":memory:", query_timeout_s=bad)


def test_find_uses_indexes(catalogue):
    store, _ = catalogue
    for column in ("skill", "operator", "status", "start_time"):
        plan = " ".join(
            str(row[-1])
            for row in store.db.execute(
                f"EXPLAIN QUERY PLAN SELECT id FROM demonstrations WHERE {column} = ?", ["x"]
            ).fetchall()
        )
        assert "USING INDEX" in plan, (column, plan)
    plan = store.db.execute(
        "EXPLAIN QUERY PLAN SELECT id FROM demonstrations WHERE skill = ? AND operator = ? "
        "ORDER BY start_time",
        ["cork_seat", "operator_a"],
    ).fetchall()
    assert "idx_demonstrations_skill_operator (skill=? AND operator=?)" in str(plan)


# -- curation ----------------------------------------------------------------------------------


def test_mark_and_delete(catalogue):
    store, ids = catalogue
    info = store.mark_status(ids["a1"], "incomplete", reason="stopped early")
    assert (info.status, info.status_reason) == ("incomplete", "stopped early")
    store.delete_demonstration(ids["a1"])
    with pytest.raises(NotFoundError, match=f"demonstration '{ids['a1']}' not found"):
        store.get_info(ids["a1"])
    (chunks,) = store.db.execute(
        "SELECT count(*) FROM chunks WHERE demo_id = ?", [ids["a1"]]
    ).fetchone()
    (tags,) = store.db.execute(
        "SELECT count(*) FROM demonstration_tags WHERE demo_id = ?", [ids["a1"]]
    ).fetchone()
    assert chunks == tags == 0
    assert store.integrity_check() == ["ok"]


def test_delete_and_mark_refuse_a_recording_demonstration(store):
    kept = add_demo(store)
    demo_id = store.begin_demonstration(skill="cork_seat", joints=JOINTS)
    store.append_chunk(demo_id, **samples(20))
    with pytest.raises(StoreError, match=f"'{demo_id}' is still 'recording': refusing to delete"):
        store.delete_demonstration(demo_id)
    with pytest.raises(StoreError, match="is still 'recording': finish it before marking"):
        store.mark_status(demo_id, "rejected")
    assert store.get_info(demo_id).n_samples == 20
    assert store.get_info(kept).status == "complete"
    assert store.integrity_check() == ["ok"]


def test_delete_refuses_provenance_of_a_skill_unless_forced(store):
    demo_id = add_demo(store)
    store.save_skill("cork_seat", {"w": [1.0]}, demonstration_ids=[demo_id], parameters={})
    with pytest.raises(StoreError, match="provenance of skill\\(s\\) cork_seat v1"):
        store.delete_demonstration(demo_id)
    store.delete_demonstration(demo_id, force=True)
    assert store.load_skill_record("cork_seat").demonstration_ids == (demo_id,)


# -- skills, campaigns, replay results ---------------------------------------------------------


def test_skill_versions_and_provenance(store):
    first, second = add_demo(store, seed=1), add_demo(store, seed=2)
    v1 = store.save_skill("cork_seat", {"k": 1}, demonstration_ids=[first], parameters={"n": 5})
    v2 = store.save_skill(
        "cork_seat", {"k": 2}, demonstration_ids=[second, first], parameters={"n": 7}
    )
    other = store.save_skill("wipe", {}, demonstration_ids=[], parameters={})
    assert (v1.version, v2.version, other.version) == (1, 2, 1)
    assert store.load_skill_record("cork_seat").id == v2.id
    assert store.load_skill_record("cork_seat", 1).payload == {"k": 1}
    assert store.get_skill_record(v2.id).demonstration_ids == (second, first)
    assert store.get_skill_record(v2.id).parameters == {"n": 7}
    assert [(r.name, r.version) for r in store.list_skills()] == [
        ("cork_seat", 1),
        ("cork_seat", 2),
        ("wipe", 1),
    ]
    with pytest.raises(NotFoundError, match="skill 'cork_seat' has no version 3 \\(versions: 1, 2"):
        store.load_skill_record("cork_seat", 3)
    with pytest.raises(NotFoundError, match="skill 'pour' not found"):
        store.load_skill_record("pour")
    with pytest.raises(NotFoundError, match="demonstration 'nope' not found"):
        store.save_skill("cork_seat", {}, demonstration_ids=["nope"], parameters={})
    with pytest.raises(InvalidInputError, match="payload must be a mapping, got list"):
        store.save_skill("cork_seat", [], demonstration_ids=[], parameters={})
    with pytest.raises(InvalidInputError, match="is not storable"):
        store.save_skill("cork_seat", {"f": object()}, demonstration_ids=[], parameters={})
    assert len(store.list_skills()) == 3


PARAMETERS = ReplayParameters(source="command", dt=0.001, seed=1)


def test_replay_parameters_refuse_unknown_fields_and_infinities():
    with pytest.raises(ValueError, match="control_rate_hz"):
        ReplayParameters(source="node", control_rate_hz=1000.0)
    with pytest.raises(ValueError, match="source"):
        ReplayParameters(source="script")
    with pytest.raises(ValueError, match="max_stiffness_rate"):
        ReplayParameters(source="command", max_stiffness_rate=float("inf"))


def test_campaign_results_and_resume(store):
    skill = store.save_skill("cork_seat", {}, demonstration_ids=[add_demo(store)], parameters={})
    campaign = store.create_campaign(skill.id, {"scenarios": 3, "seed": 5})
    assert store.create_campaign(skill.id, {"scenarios": 3, "seed": 5}, campaign) == campaign
    with pytest.raises(InvalidInputError, match="exists with another skill or config"):
        store.create_campaign(skill.id, {"scenarios": 4}, campaign)
    trace = {"t": np.linspace(0, 1, 5), "q": np.arange(10.0).reshape(5, 2)}
    first = store.save_replay_result(
        skill_id=skill.id, metrics={"final_error_rad": 0.01, "seated": True},
        parameters=ReplayParameters(source="campaign", seed=3, kind="wall"), trace=trace,
        campaign_id=campaign, scenario_index=0,
    )  # fmt: skip
    store.save_replay_result(
        skill_id=skill.id, metrics={"final_error_rad": float("nan")}, parameters=PARAMETERS,
        status="unstable", reason="diverged", campaign_id=campaign, scenario_index=2,
    )  # fmt: skip
    assert store.completed_scenarios(campaign) == {0, 2}
    with pytest.raises(InvalidInputError, match="scenario_index 0 of campaign .* already has"):
        store.save_replay_result(
            skill_id=skill.id, metrics={}, parameters=PARAMETERS, campaign_id=campaign,
            scenario_index=0,
        )
    loaded = store.load_replay_result(first)
    assert loaded.info.metrics == {"final_error_rad": 0.01, "seated": True}
    assert loaded.parameters == loaded.info.parameters == ReplayParameters(
        source="campaign", seed=3, kind="wall"
    )
    assert loaded.info.trace_channels == ("q", "t")
    assert np.array_equal(loaded.trace["q"], trace["q"]) and loaded.trace["q"].shape == (5, 2)
    results = list(store.find_replay_results(campaign_id=campaign))
    assert [r.scenario_index for r in results] == [0, 2]
    assert np.isnan(results[1].metrics["final_error_rad"]) and results[1].status == "unstable"
    assert [r.id for r in store.find_replay_results(status="ok")] == [first]
    assert store.get_campaign(campaign).config == {"scenarios": 3, "seed": 5}
    with pytest.raises(NotFoundError, match="skill id 'missing' not found"):
        store.save_replay_result(skill_id="missing", metrics={}, parameters=PARAMETERS)
    with pytest.raises(InvalidInputError, match="scenario_index given without campaign_id"):
        store.save_replay_result(
            skill_id=skill.id, metrics={}, parameters=PARAMETERS, scenario_index=1
        )
    with pytest.raises(InvalidInputError, match="parameters must be a ReplayParameters, got dict"):
        store.save_replay_result(skill_id=skill.id, metrics={}, parameters={"source": "node"})
    assert len(list(store.find_replay_results())) == 2


# -- bad input on append: a clear error, nothing lost ------------------------------------------


def _bad(data, **changes):
    bad = {k: (None if v is None else np.array(v, copy=True)) for k, v in data.items()}
    for key, value in changes.items():
        if callable(value):
            value(bad)
        else:
            bad[key] = value
    return bad


def _set(channel, index, value):
    def apply(bad):
        bad[channel][index] = value

    return apply


@pytest.mark.parametrize(
    ("changes", "message"),
    [
        ({"pos": _set("position", (3, 1), np.nan)}, "position\\[3, 1\\] = nan is not finite"),
        ({"vel": _set("velocity", (0, 0), np.inf)}, "velocity\\[0, 0\\] = inf is not finite"),
        ({"tau": _set("torque", (9, 0), -np.inf)}, "torque\\[9, 0\\] = -inf is not finite"),
        ({"k": _set("stiffness", (5, 1), np.inf)}, "stiffness\\[5, 1\\] = inf is not finite"),
        ({"t_nan": _set("t", 4, np.nan)}, "t\\[4\\] = nan is not finite"),
        ({"t_back": _set("t", 6, 0.0)}, "t goes backwards at index 6: t\\[5\\] = 1.105"),
        (
            {"t_rep": _set("t", 7, 1.106)},
            "t repeats at index 7: t\\[6\\] = 1.106, t\\[7\\] = 1.106",
        ),
        (
            {"t": 0.05 + np.arange(10) / 1000.0},
            "t\\[0\\] = 0.05 is not after the last stored time stamp 0.099",
        ),
        (
            {"t": 0.099 + np.arange(10) / 1e3},
            "t\\[0\\] = 0.099 is not after the last stored time stamp",
        ),
        ({"position": np.zeros((9, 2))}, "position has shape \\(9, 2\\), expected \\(10, 2\\)"),
        ({"torque": np.zeros((10, 3))}, "torque has shape \\(10, 3\\), expected \\(10, 2\\)"),
        ({"stiffness": None}, "stiffness is missing \\(None\\) but the demonstration stores it"),
        ({"velocity": [["a", "b"]] * 10}, "velocity must hold real numbers .* got dtype <U1"),
        ({"velocity": [[1.0], [2.0, 3.0]] * 5}, "velocity is not numeric"),
        # complex would lose its imaginary part, datetime/timedelta and objects are no samples
        ({"position": np.full((10, 2), 1 + 2j)}, "position .* got dtype complex128"),
        ({"torque": np.zeros((10, 2), "datetime64[s]")}, "torque .* got dtype datetime64\\[s\\]"),
        ({"stiffness": np.zeros((10, 2), "timedelta64[ms]")}, "stiffness .* dtype timedelta64"),
        ({"velocity": np.full((10, 2), 1.0, dtype=object)}, "velocity .* got dtype object"),
        ({"t": 1.1 + np.arange(10) * 1e-3 + 0j}, "t must hold real numbers .* complex128"),
        ({"t": np.empty(0)}, "t is empty: a chunk needs at least one sample"),
        ({"t": np.zeros((10, 1))}, "t must be one-dimensional, got shape \\(10, 1\\)"),
    ],
)
def test_bad_chunk_is_refused_and_nothing_is_lost(tmp_path, changes, message):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        kept = add_demo(store, seed=3)
        kept_before = store.load_demonstration(kept)
        demo_id = store.begin_demonstration(skill="cork_seat", joints=JOINTS)
        store.append_chunk(demo_id, **samples(100))
        good = samples(10, t0=1.1)
        with pytest.raises(InvalidInputError, match=message):
            store.append_chunk(demo_id, **_bad(good, **changes))
        store.append_chunk(demo_id, **good)  # the recording goes on after a refused chunk
        store.finish_demonstration(demo_id)
        assert store.integrity_check() == ["ok"]
        assert store.get_info(demo_id).n_samples == 110
        kept_after = store.load_demonstration(kept)
    assert integrity(path) == "ok"
    assert _bits(kept_after.position) == _bits(kept_before.position)


def test_stiffness_for_a_demonstration_without_it_is_refused(store):
    demo_id = store.begin_demonstration(skill="cork_seat", joints=JOINTS, with_stiffness=False)
    with pytest.raises(InvalidInputError, match="stiffness given for a demonstration begun with"):
        store.append_chunk(demo_id, **samples(10))
    assert store.get_info(demo_id).n_samples == 0


@pytest.mark.parametrize(
    ("kwargs", "error", "message"),
    [
        ({"skill": ""}, InvalidInputError, "skill must not be empty, got ''"),
        ({"joints": []}, InvalidInputError, "joints must name at least one joint"),
        ({"joints": "shoulder"}, InvalidInputError, "joints must be a sequence of names"),
        ({"joints": ["elbow", "elbow"]}, InvalidInputError, "joints must be distinct, got 'elbow'"),
        ({"joints": ["elbow", ""]}, InvalidInputError, "joint name must not be empty"),
        ({"source": "dreamt"}, InvalidInputError, "source must be one of .* got 'dreamt'"),
        ({"nominal_rate_hz": 0}, InvalidInputError, "nominal_rate_hz must be a finite positive"),
        ({"start_time": float("inf")}, InvalidInputError, "start_time must be a finite number"),
        ({"tags": "press"}, InvalidInputError, "tags must be a sequence of strings"),
        ({"demo_id": "not-a-uuid"}, InvalidInputError, "demo_id must be a UUID string"),
        ({"with_stiffness": "yes"}, InvalidInputError, "with_stiffness must be True or False"),
    ],
)
def test_bad_metadata_is_refused(store, kwargs, error, message):
    base = {"skill": "cork_seat", "joints": JOINTS}
    with pytest.raises(error, match=message):
        store.begin_demonstration(**{**base, **kwargs})
    assert list(store.find_demonstrations()) == []


def test_unknown_joint_and_missing_ids(store):
    demo_id = add_demo(store)
    with pytest.raises(InvalidInputError, match="joint 'wrist' is not in demonstration .*"
                       "\\(joints: shoulder, elbow\\)"):  # fmt: skip
        store.load_demonstration(demo_id, joints=["elbow", "wrist"])
    with pytest.raises(NotFoundError, match="demonstration 'nope' not found"):
        store.append_chunk("nope", **samples(3))
    with pytest.raises(NotFoundError, match="demonstration 'nope' not found"):
        store.load_demonstration("nope")
    with pytest.raises(InvalidInputError, match=f"demo_id '{demo_id}' already exists"):
        store.begin_demonstration(skill="cork_seat", joints=JOINTS, demo_id=demo_id)
    with pytest.raises(InvalidInputError, match="flag 'drops' must be a non-negative count"):
        store.update_flags(demo_id, {"drops": -1})
    with pytest.raises(TypeError, match="unexpected keyword"):
        store.add_demonstration(**samples(5), skill="cork_seat", joints=JOINTS, colour="red")
    assert store.integrity_check() == ["ok"]
    assert [info.id for info in store.find_demonstrations()] == [demo_id]


# -- files ---------------------------------------------------------------------------------------


def test_new_store_file_mode_wal_and_version(tmp_path):
    path = tmp_path / "store.sqlite"
    old_umask = os.umask(0)
    try:
        with DemoStore(path) as store:
            add_demo(store)
            assert store.db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
            assert store.schema_version == SCHEMA_VERSION
            assert stat.S_IMODE(os.stat(f"{path}-wal").st_mode) == 0o640
    finally:
        os.umask(old_umask)
    assert stat.S_IMODE(path.stat().st_mode) == 0o640


def test_missing_file(tmp_path):
    missing = tmp_path / "nothing.sqlite"
    with pytest.raises(NotFoundError, match="store file '.*nothing.sqlite' does not exist"):
        DemoStore(missing, read_only=True)
    with pytest.raises(NotFoundError, match="does not exist"):
        DemoStore(missing, create=False)
    with pytest.raises(NotFoundError, match="directory '.*no_dir' for the new store does not"):
        DemoStore(tmp_path / "no_dir" / "store.sqlite")
    assert not missing.exists()


def test_non_sqlite_file_is_refused_and_left_alone(tmp_path):
    path = tmp_path / "notes.sqlite"
    path.write_text("shoulder,elbow\n0.1,0.2\n")
    with pytest.raises(StoreCorruptError, match="is not an SQLite file \\(starts with b'shoulder"):
        DemoStore(path)
    assert path.read_text() == "shoulder,elbow\n0.1,0.2\n"
    foreign = tmp_path / "foreign.sqlite"
    conn = sqlite3.connect(foreign)
    conn.execute("CREATE TABLE recipes (name TEXT)")
    conn.commit()
    conn.close()
    with pytest.raises(StoreCorruptError, match="no store_schema_history table \\(tables: recipes"):
        DemoStore(foreign)
    assert integrity(foreign) == "ok"


def test_newer_schema_is_refused(tmp_path):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        kept = add_demo(store)
    conn = sqlite3.connect(path)
    conn.execute("INSERT INTO store_schema_history VALUES (?, 0, 'from the future')", [99])
    conn.commit()
    conn.close()
    for read_only in (False, True):
        with pytest.raises(SchemaVersionError, match="schema version 99 is newer than this"):
            DemoStore(path, read_only=read_only)
    assert integrity(path) == "ok"
    conn = sqlite3.connect(path)
    assert conn.execute("SELECT id FROM demonstrations").fetchall() == [(kept,)]
    conn.close()


def test_read_only_store_refuses_writes(tmp_path):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        demo_id = add_demo(store)
    with DemoStore(path, read_only=True) as store:
        assert store.get_info(demo_id).status == "complete"
        with pytest.raises(StoreReadOnlyError, match="is open read-only"):
            store.mark_status(demo_id, "rejected")
        with pytest.raises(StoreReadOnlyError, match="is open read-only"):
            store.begin_demonstration(skill="cork_seat", joints=JOINTS)
    assert integrity(path) == "ok"


def test_closed_store(tmp_path):
    store = DemoStore(tmp_path / "store.sqlite")
    store.close()
    store.close()
    with pytest.raises(StoreError, match="is closed"):
        store.get_info("x")


def test_tags_are_stored_in_json_and_index_table(file_store):
    demo_id = add_demo(file_store, tags=["press", "soft"])
    row = file_store.db.execute(
        "SELECT tags FROM demonstrations WHERE id = ?", [demo_id]
    ).fetchone()
    assert json.loads(row[0]) == ["press", "soft"]
    rows = file_store.db.execute(
        "SELECT tag FROM demonstration_tags WHERE demo_id = ? ORDER BY tag", [demo_id]
    ).fetchall()
    assert rows == [("press",), ("soft",)]


def test_full_store_mid_insert_is_store_full_error_and_recording_goes_on(tmp_path):
    # max_page_count makes SQLite fail with SQLITE_FULL inside the INSERT and roll back by
    # itself; our own ROLLBACK must not replace that error with "no transaction is active".
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        kept = add_demo(store, seed=4)
        demo_id = store.begin_demonstration(skill="cork_seat", joints=JOINTS)
        store.append_chunk(demo_id, **samples(10))
        (pages,) = store.db.execute("PRAGMA page_count").fetchone()
        store.db.execute(f"PRAGMA max_page_count = {pages}")
        big = samples(20000, seed=5, t0=1.0)
        with pytest.raises(StoreFullError, match="store full, nothing of this write kept"):
            store.append_chunk(demo_id, **big)
        assert store.get_info(demo_id).n_samples == 10
        store.db.execute(f"PRAGMA max_page_count = {2**30}")
        store.append_chunk(demo_id, **big)  # room again: the same recording goes on
        assert store.finish_demonstration(demo_id).n_samples == 20010
        assert store.load_demonstration(kept).t.size == 200
    assert integrity(path) == "ok"


def test_close_that_cannot_end_its_recordings_warns_and_a_later_open_recovers_them(tmp_path):
    # Another connection holds the write lock, as a full disk or a read-only remount would keep
    # close() from ending its recordings: close() still closes, with a warning, not an error.
    path = tmp_path / "store.sqlite"
    store = DemoStore(path, busy_timeout_s=0.0)
    demo_id = store.begin_demonstration(skill="cork_seat", joints=JOINTS)
    store.append_chunk(demo_id, **samples(10))
    blocker = sqlite3.connect(path, isolation_level=None)
    blocker.execute("BEGIN IMMEDIATE")
    try:
        with pytest.warns(UserWarning, match="closed without ending this writer's recordings"):
            store.close()
    finally:
        blocker.execute("ROLLBACK")
        blocker.close()
    with pytest.raises(StoreError, match="is closed"):
        store.get_info(demo_id)
    # the writer's process is alive (it is this one), yet its given-up lease counts as gone
    with pytest.warns(UserWarning, match="marked incomplete"), DemoStore(path) as reopened:
        info = reopened.get_info(demo_id)
        assert (info.status, info.n_samples) == ("incomplete", 10)
        assert reopened.db.execute("SELECT count(*) FROM writers").fetchone() == (0,)
    assert integrity(path) == "ok"
