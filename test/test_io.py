"""CSV and NPZ import/export: exact round trips and refused files, with the store intact."""

from __future__ import annotations

import json
import zipfile

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from store_support import JOINTS, add_demo, assert_same_demonstration, samples

from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.store import DemoStore
from compliant_demo.store.io import (
    CSV_MAGIC,
    METADATA_KEYS,
    export_csv,
    export_npz,
    import_csv,
    import_npz,
)


@pytest.fixture
def store():
    with DemoStore(":memory:") as opened:
        yield opened


_JOINT_NAMES = ("shoulder, left", 'wrist "pitch"', "elbow\nlower", " ünïcode ")


def _hostile_metadata_demo(store, t, values, with_stiffness, joints):
    """A demonstration whose metadata uses every field, with awkward text and NaN stiffness."""
    n_joints = len(joints)
    stiffness = values[:, 3 * n_joints : 4 * n_joints].copy() if with_stiffness else None
    if stiffness is not None:
        stiffness[::3, 0] = np.nan  # "no estimate" samples
    demo_id = store.add_demonstration(
        t=t, position=values[:, :n_joints], velocity=values[:, n_joints : 2 * n_joints],
        torque=values[:, 2 * n_joints : 3 * n_joints], stiffness=stiffness, skill="cork_seat",
        joints=joints, operator="operator_b", tags=["press", "tag, with comma"],
        notes='line one, "two"\nline two', start_time=1.7e9 + 0.123456, nominal_rate_hz=997.5,
        source="simulated", status="rejected",
        flags={"drops": 2, "stiffness_latency_s": 0.34, "interrupted": True, "note": "a: b"},
    )  # fmt: skip
    store.mark_status(demo_id, "rejected", "operator slipped, 'twice'")
    return demo_id


@settings(
    max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    values=hnp.arrays(
        np.float64, (7, 16), elements=st.floats(allow_nan=False, allow_infinity=False, width=64)
    ),
    times=st.lists(st.floats(-1e6, 1e6, allow_nan=False), min_size=7, max_size=7, unique=True).map(
        sorted
    ),
    with_stiffness=st.booleans(),
)
def test_csv_and_npz_round_trip_exactly(tmp_path, values, times, with_stiffness):
    # every sample bit for bit (NaN stiffness included) and every metadata field, also for joint
    # names holding a comma, a quote, a line break and non-ASCII letters
    t = np.array(times, dtype=np.float64)
    with DemoStore(":memory:") as source, DemoStore(":memory:") as target:
        demo_id = _hostile_metadata_demo(source, t, values, with_stiffness, _JOINT_NAMES)
        original = source.load_demonstration(demo_id)
        export_csv(source, demo_id, tmp_path / "demo.csv")
        export_npz(source, demo_id, tmp_path / "demo.npz")
        from_csv = target.load_demonstration(import_csv(target, tmp_path / "demo.csv"))
        target.delete_demonstration(from_csv.id)
        from_npz = target.load_demonstration(import_npz(target, tmp_path / "demo.npz"))
    assert_same_demonstration(original, from_csv)
    assert_same_demonstration(original, from_npz)
    assert from_csv.info.status_reason == "operator slipped, 'twice'"


def test_files_without_source_metadata_import_as_imported(store, tmp_path):
    path = _csv(tmp_path, _HEADER, ["0,1,2,3"])
    assert store.get_info(import_csv(store, path)).source == "imported"


def test_csv_layout_is_as_documented(store, tmp_path):
    demo_id = add_demo(store, n=3)
    path = export_csv(store, demo_id, tmp_path / "demo.csv")
    lines = path.read_text().splitlines()
    assert lines[0] == CSV_MAGIC
    metadata = {
        line[2:].split(":", 1)[0]: json.loads(line.split(":", 1)[1]) for line in lines[1:12]
    }
    assert metadata["id"] == demo_id and metadata["skill"] == "cork_seat"
    assert list(metadata) == list(METADATA_KEYS)
    assert lines[12] == (
        "t,position.shoulder,position.elbow,velocity.shoulder,velocity.elbow,torque.shoulder,"
        "torque.elbow,stiffness.shoulder,stiffness.elbow"
    )
    assert len(lines) == 16
    assert float(lines[14].split(",")[0]) == 0.001


def test_long_csv_is_streamed_in_chunks_and_overrides_apply(store, tmp_path):
    from compliant_demo.store.core import CHUNK_SAMPLES

    demo_id = add_demo(store, n=CHUNK_SAMPLES + 10)
    export_csv(store, demo_id, tmp_path / "long.csv")
    new_id = import_csv(
        store, tmp_path / "long.csv", keep_id=False, operator="operator_b", progress=False
    )
    info = store.get_info(new_id)
    assert info.n_samples == CHUNK_SAMPLES + 10 and info.operator == "operator_b"
    (count,) = store.db.execute(
        "SELECT count(*) FROM chunks WHERE demo_id = ?", [new_id]
    ).fetchone()
    assert count == 2


def _csv(tmp_path, header, rows, meta=('# skill: "cork_seat"',)):
    path = tmp_path / "bad.csv"
    path.write_text("\n".join([*meta, header, *rows]) + "\n")
    return path


_HEADER = "t,position.shoulder,velocity.shoulder,torque.shoulder"


@pytest.mark.parametrize(
    ("header", "rows", "message"),
    [
        ("time,position.a", ["0,1"], "first column must be 't', got \\['time'\\]"),
        ("t,position.shoulder,velocity.shoulder", ["0,1,2"], "no torque.<joint> columns"),
        ("t,angle.shoulder,velocity.shoulder,torque.shoulder", ["0,1,2,3"],
         "column 'angle.shoulder' has unknown channel 'angle'"),
        ("t,position.shoulder,velocity.wrist,torque.shoulder", ["0,1,2,3"],
         "velocity columns do not match the position columns \\(joint 'wrist'"),
        ("t,position,velocity.a,torque.a", ["0,1,2,3"], "column 'position' is not"),
        (_HEADER, ["0,1,2,3", "0.001,nan,2,3"],
         "bad.csv, line 4, column 'position.shoulder': 'nan' is not finite"),
        (_HEADER, ["0,1,2,3", "0.001,1,2,-inf"],
         "bad.csv, line 4, column 'torque.shoulder': '-inf' is not finite"),
        (_HEADER, ["0,1,2,3", "0.001,1," + "9" * 5000 + ",3"],
         "line 4, column 'velocity.shoulder': '9{27}...' is not finite"),
        (_HEADER + ",stiffness.shoulder", ["0,1,2,3,nan", "0.001,1,2,3,inf"],
         "line 4, column 'stiffness.shoulder': 'inf' is not finite"),
        (_HEADER, ["0,1,2,3", "0,1,2,3"], "line 4, column 't': time repeats \\(0.0 after 0.0\\)"),
        (_HEADER, ["0.5,1,2,3", "0.25,1,2,3"], "line 4, column 't': time goes backwards"),
        (_HEADER, ["0,1,2,3", "0.001,1,2"], "bad.csv, line 4: 3 values, the header has 4 columns"),
        (_HEADER, ["0,1,2,3", "0.001,1,2,3,4"], "line 4: 5 values, the header has 4 columns"),
        (_HEADER, ["0,1,2,three"], "line 3, column 'torque.shoulder': 'three' is not a number"),
        (_HEADER, ["0,1,2,1_0"], "line 3, column 'torque.shoulder': '1_0' is not a plain number"),
        (_HEADER, ["0,1,2,3", "", "0.002,1,2,3"], "bad.csv, line 4: empty row"),
        (_HEADER, ["0,1,2,3", "# comment,1,2,3"], "line 4, column 't': '# comment' is not a num"),
        (_HEADER, [], "bad.csv: no samples after the header"),
        ("t,position.a,velocity.a,torque.a,position.b", ["0,1,2,3,4"],
         "line 2: velocity columns do not match the position columns \\(no column for joint 'b'"),
        ("t,position.a,position.a,velocity.a,velocity.a,torque.a,torque.a", ["0,1,1,2,2,3,3"],
         "bad.csv, line 2: joints must be distinct, got 'a' twice"),
        ('t,"position.a', ["0,1"], "bad.csv, line 3: header is not valid CSV"),
    ],
)  # fmt: skip
def test_bad_csv_is_refused_and_nothing_is_stored(tmp_path, header, rows, message):
    path = _csv(tmp_path, header, rows)
    store_path = tmp_path / "store.sqlite"
    with DemoStore(store_path) as store:
        kept = add_demo(store)
        with pytest.raises(InvalidInputError, match=message):
            import_csv(store, path)
        assert [info.id for info in store.find_demonstrations()] == [kept]
        assert store.integrity_check() == ["ok"]


def test_csv_without_skill_or_file(store, tmp_path):
    path = _csv(tmp_path, _HEADER, ["0,1,2,3"], meta=())
    with pytest.raises(InvalidInputError, match="skill is not in the file's metadata"):
        import_csv(store, path)
    assert import_csv(store, path, skill="cork_seat")
    with pytest.raises(NotFoundError, match="CSV file '.*absent.csv' does not exist"):
        import_csv(store, tmp_path / "absent.csv")
    broken = _csv(tmp_path, _HEADER, ["0,1,2,3"], meta=("# skill: cork_seat",))
    with pytest.raises(InvalidInputError, match="bad.csv, line 1, metadata 'skill': not valid"):
        import_csv(store, broken)


def test_csv_id_clash_is_refused(store, tmp_path):
    demo_id = add_demo(store)
    export_csv(store, demo_id, tmp_path / "demo.csv")
    with pytest.raises(InvalidInputError, match=f"demo_id '{demo_id}' already exists"):
        import_csv(store, tmp_path / "demo.csv")
    assert len(list(store.find_demonstrations())) == 1


def test_bad_npz_is_refused(store, tmp_path):
    data = {k: v for k, v in samples(5).items() if v is not None}
    np.savez(tmp_path / "no_joints.npz", **data)
    with pytest.raises(InvalidInputError, match="array 'joints' is missing"):
        import_npz(store, tmp_path / "no_joints.npz", skill="cork_seat")
    np.savez(tmp_path / "pickled.npz", joints=np.array([{"a": 1}], dtype=object), **data)
    with pytest.raises(InvalidInputError, match="member 'joints.npy': holds Python objects"):
        import_npz(store, tmp_path / "pickled.npz", skill="cork_seat")
    np.savez(tmp_path / "numbers.npz", joints=np.array([1, 2]), **data)
    with pytest.raises(InvalidInputError, match="'joints' must be a unicode array, got dtype int"):
        import_npz(store, tmp_path / "numbers.npz", skill="cork_seat")
    (tmp_path / "text.npz").write_text("not a zip")
    with pytest.raises(InvalidInputError, match="not a readable NPZ file"):
        import_npz(store, tmp_path / "text.npz", skill="cork_seat")
    bad = dict(data, position=np.full((5, 2), np.inf))
    np.savez(tmp_path / "inf.npz", joints=np.array(JOINTS), **bad)
    with pytest.raises(InvalidInputError, match="position\\[0, 0\\] = inf is not finite"):
        import_npz(store, tmp_path / "inf.npz", skill="cork_seat")
    np.savez(tmp_path / "ok.npz", joints=np.array(JOINTS), **data)
    assert store.get_info(import_npz(store, tmp_path / "ok.npz", skill="cork_seat")).n_samples == 5
    assert len(list(store.find_demonstrations())) == 1
    assert zipfile.is_zipfile(tmp_path / "ok.npz")
