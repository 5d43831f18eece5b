"""CSV and NPZ import/export: exact round trips and refused files, with the store intact."""

from __future__ import annotations

import json
import zipfile

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from store_support import JOINTS, add_demo, samples

from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.store import DemoStore
from compliant_demo.store.io import CSV_MAGIC, export_csv, export_npz, import_csv, import_npz

_CHANNELS = ("t", "position", "velocity", "torque", "stiffness")


def _same_samples(a, b) -> None:
    for name in _CHANNELS:
        left, right = getattr(a, name), getattr(b, name)
        assert (left is None) == (right is None), name
        if left is not None:
            assert left.tobytes() == right.tobytes(), name


@pytest.fixture
def store():
    with DemoStore(":memory:") as opened:
        yield opened


@settings(
    max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    values=hnp.arrays(
        np.float64, (7, 8), elements=st.floats(allow_nan=False, allow_infinity=False, width=64)
    ),
    with_stiffness=st.booleans(),
)
def test_csv_and_npz_round_trip_exactly(tmp_path, values, with_stiffness):
    t = np.array([-1.5, 0.0, 1e-9, 0.25, 1.0, 7.125, 1e6])
    with DemoStore(":memory:") as source, DemoStore(":memory:") as target:
        demo_id = source.add_demonstration(
            t=t, position=values[:, 0:2], velocity=values[:, 2:4], torque=values[:, 4:6],
            stiffness=values[:, 6:8] if with_stiffness else None, skill="cork_seat",
            joints=JOINTS, operator="operator_b", tags=["press"], notes="line one, \"two\"",
            start_time=1.7e9 + 0.123456, flags={"drops": 2},
        )  # fmt: skip
        original = source.load_demonstration(demo_id)
        export_csv(source, demo_id, tmp_path / "demo.csv")
        export_npz(source, demo_id, tmp_path / "demo.npz")
        from_csv = target.load_demonstration(import_csv(target, tmp_path / "demo.csv"))
        from_npz = target.load_demonstration(
            import_npz(target, tmp_path / "demo.npz", keep_id=False)
        )
    _same_samples(original, from_csv)
    _same_samples(original, from_npz)
    for loaded in (from_csv.info, from_npz.info):
        assert (loaded.skill, loaded.operator, loaded.tags) == (
            "cork_seat",
            "operator_b",
            ("press",),
        )
        assert loaded.notes == 'line one, "two"' and loaded.flags == {"drops": 2}
        assert loaded.start_time == 1.7e9 + 0.123456
        assert loaded.source == "imported"
    assert from_csv.id == demo_id and from_npz.id != demo_id


def test_csv_layout_is_as_documented(store, tmp_path):
    demo_id = add_demo(store, n=3)
    path = export_csv(store, demo_id, tmp_path / "demo.csv")
    lines = path.read_text().splitlines()
    assert lines[0] == CSV_MAGIC
    metadata = {
        line[2:].split(":", 1)[0]: json.loads(line.split(":", 1)[1]) for line in lines[1:11]
    }
    assert metadata["id"] == demo_id and metadata["skill"] == "cork_seat"
    assert lines[11] == (
        "t,position.shoulder,position.elbow,velocity.shoulder,velocity.elbow,torque.shoulder,"
        "torque.elbow,stiffness.shoulder,stiffness.elbow"
    )
    assert len(lines) == 15
    assert float(lines[13].split(",")[0]) == 0.001


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
        (_HEADER, ["0,1,2,3", "0.001,nan,2,3"], "position\\[1, 0\\] = nan is not finite"),
        (_HEADER, ["0,1,2,3", "0,1,2,3"], "t repeats at index 1: t\\[0\\] = 0.0"),
        (_HEADER, ["0.5,1,2,3", "0.25,1,2,3"], "t goes backwards at index 1"),
        (_HEADER, ["0,1,2,3", "0.001,1,2"], "lines 3-4: "),
        (_HEADER, ["0,1,2,three"], "lines 3-3: "),
        (_HEADER, [], "has no samples: status 'complete' refused"),
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
    with pytest.raises(InvalidInputError, match="line 1: metadata 'skill' is not JSON"):
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
    with pytest.raises(InvalidInputError, match="not a readable NPZ file without pickles"):
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
