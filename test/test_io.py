"""CSV and NPZ import/export: exact round trips and refused files, with the store intact."""

from __future__ import annotations

import io
import json
import os
import re
import subprocess
import zipfile

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from store_support import (
    JOINTS,
    PYTHON,
    REPO,
    add_demo,
    assert_same_demonstration,
    samples,
    subprocess_env,
)

from compliant_demo.exceptions import InvalidInputError, NotFoundError, StoreFullError
from compliant_demo.store import DemoStore
from compliant_demo.store.core import CHUNK_SAMPLES
from compliant_demo.store.io import (
    CSV_MAGIC,
    MAX_IMPORT_BYTES,
    MAX_JOINTS,
    MAX_LINE_BYTES,
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
        store, tmp_path / "long.csv", keep_id=False, operator="operator_b"
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
        (_HEADER, ["0,1,2,\u0661"], "line 3, column 'torque.shoulder': '\u0661' is not a plain"),
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


# -- hostile NPZ files: sizes come from the headers, nothing is expanded first -------------------

_MEASURE_IMPORT = """
import json, resource, sys
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.store import DemoStore
from compliant_demo.store import io as store_io
store_io.MAX_IMPORT_BYTES = int(sys.argv[2])
with DemoStore(":memory:") as store:
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    try:
        store_io.import_npz(store, sys.argv[1], skill="cork_seat")
        error = None
    except InvalidInputError as exc:
        error = str(exc)
    after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({"error": error, "peak_growth_kib": after - before}))
"""


def _npy_header(shape, descr="<f8") -> bytes:
    buffer = io.BytesIO()
    header = {"descr": descr, "fortran_order": False, "shape": tuple(shape)}
    np.lib.format.write_array_header_1_0(buffer, header)
    return buffer.getvalue()


def _valid_members(n=5) -> dict[str, bytes]:
    out = {}
    for key, array in {"t": np.arange(n) / 1e3, "velocity": np.zeros((n, 2)),
                       "torque": np.zeros((n, 2)), "joints": np.array(JOINTS)}.items():  # fmt: skip
        buffer = io.BytesIO()
        np.save(buffer, array)
        out[f"{key}.npy"] = buffer.getvalue()
    return out


def _zip(path, members, streamed=None):
    """An NPZ-like zip of ``members`` (name: bytes); ``streamed`` = (name, header, n_zero_bytes)
    adds a member of zeros written in blocks, so the test never holds it in memory."""
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED, compresslevel=1) as archive:
        for name, data in members.items():
            archive.writestr(name, data)
        if streamed is not None:
            name, header, size = streamed
            with archive.open(name, "w", force_zip64=True) as member:
                member.write(header)
                block = bytes(2**22)
                for start in range(0, size, len(block)):
                    member.write(block[: min(len(block), size - start)])
    return path


def _measured_import(path, limit):
    result = subprocess.run(
        [PYTHON, "-c", _MEASURE_IMPORT, str(path), str(limit)], capture_output=True, text=True,
        env=subprocess_env(), timeout=120, check=False,
    )  # fmt: skip
    assert result.returncode == 0, result.stderr[-2000:]
    return json.loads(result.stdout)


def test_npz_header_claiming_745_gib_is_refused_from_the_header(tmp_path):
    # 10**11 float64 = 745 GiB; numpy.load used to try the allocation (MemoryError traceback)
    members = _valid_members()
    members["position.npy"] = _npy_header((10**11,)) + bytes(16)
    path = _zip(tmp_path / "claims.npz", members)
    measured = _measured_import(path, MAX_IMPORT_BYTES)
    assert re.search(r"claims\.npz, member 'position\.npy': header claims shape \(100000000000,\) "
                     r"of float64 \(800000000000 bytes\), beyond the import limit",
                     measured["error"])  # fmt: skip
    assert measured["peak_growth_kib"] < 64 * 1024
    with DemoStore(":memory:") as store, pytest.raises(InvalidInputError, match="800000000000"):
        import_npz(store, path, skill="cork_seat")


def test_npz_zip_bomb_is_refused_before_it_is_expanded(tmp_path):
    # 256 MiB of zeros deflate to about 1 MiB; with the limit lowered to 32 MiB the member's size
    # in the zip directory refuses it, and the import's peak memory barely moves (the kernel's
    # peak RSS of a child process, ru_maxrss)
    n = 2**24
    path = _zip(tmp_path / "bomb.npz", _valid_members(),
                streamed=("position.npy", _npy_header((n, 2)), 16 * n))  # fmt: skip
    assert path.stat().st_size < 4 * 2**20
    measured = _measured_import(path, 32 * 2**20)
    assert re.search(r"bomb\.npz, member 'position\.npy': 268435584 bytes uncompressed, beyond "
                     r"the import limit of 33554432 bytes", measured["error"])  # fmt: skip
    assert measured["peak_growth_kib"] < 16 * 1024


@pytest.mark.parametrize(
    ("members", "message"),
    [
        ({"position.npy": _npy_header((5, 2)) + bytes(24)},
         "member 'position.npy': header claims 80 bytes of data, the member holds 24"),
        ({"position.npy": _npy_header((5, 2), "|O") + bytes(80)},
         "member 'position.npy': holds Python objects"),
        ({"position.npy": b"not an array"}, "member 'position.npy': not a .npy array"),
        ({"position.npy": _npy_header((5, 2)) + bytes(80),
          "metadata.npy": _npy_header((), "<U2000000") + bytes(8_000_000)},
         "member 'metadata.npy': 8000000 bytes of text, beyond the limit of 4194304 bytes"),
        ({"position.npy": _npy_header((0, -1))},
         "member 'position.npy': header claims a negative extent in shape (0, -1)"),
        ({"position.npy": _npy_header((5, 2), ">f8") + bytes(80), "metadata.npy":
          _npy_header((), "|S4") + b"{}  "}, "'metadata' must be a 0-d unicode array of JSON"),
        ({"position.npy": _npy_header((5, 2)) + bytes(80),
          "joints.npy": _npy_header((50_000,), "<U8") + bytes(50_000 * 32)},
         "member 'joints.npy': 50000 joints, at most 64 joints are allowed"),
        ({"position.npy": _npy_header((5, 2)) + bytes(80),
          "t.npy": _npy_header((5, 2)) + bytes(80)}, "t must be one-dimensional"),
    ],
)  # fmt: skip
def test_npz_members_checked_from_their_headers(tmp_path, members, message):
    path = _zip(tmp_path / "bad.npz", {**_valid_members(), **members})
    with DemoStore(":memory:") as store:
        with pytest.raises(InvalidInputError, match=f"bad.npz.*{re.escape(message)}"):
            import_npz(store, path, skill="cork_seat")
        assert list(store.find_demonstrations()) == []


def test_npy_file_named_npz_says_what_it_is(store, tmp_path):
    np.save(tmp_path / "array.npy", np.zeros(3))
    (tmp_path / "array.npy").rename(tmp_path / "demo.npz")
    expected = r"^\S*demo\.npz is a single \.npy array \(numpy\.save\), not an NPZ archive of named"
    with pytest.raises(InvalidInputError, match=expected + r" arrays \(numpy\.savez\)$"):
        import_npz(store, tmp_path / "demo.npz", skill="cork_seat")


def test_npz_truncated_fortran_ordered_and_extra_members(store, tmp_path):
    demo_id = add_demo(store, n=50)
    whole = export_npz(store, demo_id, tmp_path / "whole.npz").read_bytes()
    (tmp_path / "cut.npz").write_bytes(whole[: len(whole) // 2])
    with pytest.raises(InvalidInputError, match="cut.npz: not a readable NPZ file"):
        import_npz(store, tmp_path / "cut.npz")
    with np.load(tmp_path / "whole.npz", allow_pickle=False) as archive:
        arrays = {key: archive[key] for key in archive.files}
    fortran = {k: np.asfortranarray(v) if v.ndim == 2 else v for k, v in arrays.items()}
    np.savez(tmp_path / "fortran.npz", notes_for_humans=np.array("ignored"), **fortran)
    copy = store.load_demonstration(import_npz(store, tmp_path / "fortran.npz", keep_id=False))
    assert copy.position.tobytes() == store.load_demonstration(demo_id).position.tobytes()


# -- all or nothing: no partial demonstration after any failure --------------------------------


def _exported(tmp_path, file_format, n):
    """A rejected demonstration with a status reason and ``n`` samples, exported."""
    with DemoStore(tmp_path / "source.sqlite") as source:
        demo_id = add_demo(source, n=n, seed=3)
        source.mark_status(demo_id, "rejected", "a reason to carry")
        export = {"csv": export_csv, "npz": export_npz}[file_format]
        return export(source, demo_id, tmp_path / f"big.{file_format}")


_LIMITED_IMPORT = """
import resource, signal, sys
from compliant_demo.exceptions import CompliantDemoError
from compliant_demo.store import DemoStore
from compliant_demo.store.io import import_csv, import_npz
signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # a write beyond the limit fails with EFBIG
limit = int(sys.argv[3])
resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))
store = DemoStore(sys.argv[1])
importer = import_csv if sys.argv[2].endswith(".csv") else import_npz
try:
    importer(store, sys.argv[2], keep_id=False)
except CompliantDemoError as exc:
    print(type(exc).__name__, exc)
else:
    print("imported")
"""


@pytest.mark.parametrize("file_format", ["csv", "npz"])
def test_import_stopped_by_a_file_size_limit_leaves_nothing(tmp_path, file_format):
    # the importing process may not grow any file beyond a limit (RLIMIT_FSIZE, as a quota or a
    # full disk would stop it): the import fails, and neither a partial demonstration nor a
    # 'recording' one that recovery would turn 'incomplete' stays behind
    store_path = tmp_path / "store.sqlite"
    exported = _exported(tmp_path, file_format, n=40_000)
    with DemoStore(store_path) as store:
        kept = add_demo(store)
        digest = store.load_demonstration(kept).position.tobytes()
    limit = store_path.stat().st_size + 512 * 1024
    result = subprocess.run(
        [PYTHON, "-c", _LIMITED_IMPORT, str(store_path), str(exported), str(limit)],
        capture_output=True, text=True, env=subprocess_env(), timeout=120, check=False,
    )  # fmt: skip
    assert result.stdout.startswith("Store"), result.stdout + result.stderr[-2000:]
    with DemoStore(store_path) as store:
        assert [info.id for info in store.find_demonstrations()] == [kept]
        assert store.load_demonstration(kept).position.tobytes() == digest
        assert store.integrity_check() == ["ok"]


def _page_limited(store):
    """Let the store grow by a few pages only (SQLite's max_page_count: SQLITE_FULL)."""
    (pages,) = store.db.execute("PRAGMA page_count").fetchone()
    store.db.execute(f"PRAGMA max_page_count = {pages + 8}")


@pytest.mark.parametrize("file_format", ["csv", "npz"])
@pytest.mark.parametrize("failure", ["store_full", "interrupt_while_reading", "reason_refused"])
def test_failed_import_at_any_point_leaves_nothing(tmp_path, monkeypatch, file_format, failure):
    from compliant_demo.store import io as store_io

    exported = _exported(tmp_path, file_format, n=CHUNK_SAMPLES * 2 + 5)
    with DemoStore(tmp_path / "store.sqlite") as store:
        kept = add_demo(store)
        digest = store.load_demonstration(kept).torque.tobytes()
        if failure == "store_full":
            _page_limited(store)
            expected = StoreFullError
        elif failure == "interrupt_while_reading":
            calls = []
            module = store_io  # io calls read_npz by its own name
            name = "read_npz" if file_format == "npz" else "_parse_rows"
            real = getattr(module, name)

            def interrupted(*args, **kwargs):
                calls.append(1)
                if len(calls) == 2 or file_format == "npz":
                    raise KeyboardInterrupt
                return real(*args, **kwargs)

            monkeypatch.setattr(module, name, interrupted)
            expected = KeyboardInterrupt
        else:

            def refused(*args, **kwargs):
                raise StoreFullError("disk full while setting the reason")

            monkeypatch.setattr(store, "mark_status", refused)
            expected = StoreFullError
        with pytest.raises(expected):
            {"csv": import_csv, "npz": import_npz}[file_format](store, exported)
        store.db.execute("PRAGMA max_page_count = 1073741823")
        assert [info.id for info in store.find_demonstrations()] == [kept]
        assert store.load_demonstration(kept).torque.tobytes() == digest
        assert store.integrity_check() == ["ok"]


# -- joint count and header size ---------------------------------------------------------------


def test_fifty_thousand_joints_are_refused_early(store, tmp_path):
    # a 0.7 MB header naming 50,000 joints used to take minutes in pairwise name checks
    header = ",".join(["t", *(f"position.j{i}" for i in range(50_000))])
    path = _csv(tmp_path, header, ["0," + ",".join(["1"] * 50_000)])
    assert len(header) > 700_000
    with pytest.raises(InvalidInputError, match=r"bad\.csv, line 2: 50000 sample columns, at "
                       r"most 64 joints are allowed"):  # fmt: skip
        import_csv(store, path)
    assert list(store.find_demonstrations()) == []


def test_sixty_four_joints_import_and_sixty_five_do_not(store, tmp_path):
    for n_joints, ok in ((64, True), (65, False)):
        names = [f"j{i}" for i in range(n_joints)]
        header = ",".join(["t", *(f"{c}.{n}" for c in ("position", "velocity", "torque")
                                  for n in names)])  # fmt: skip
        path = _csv(tmp_path, header, ["0," + ",".join(["1"] * 3 * n_joints)])
        if ok:
            assert len(store.get_info(import_csv(store, path)).joints) == 64
        else:
            with pytest.raises(InvalidInputError, match="at most 64 joints"):
                import_csv(store, path)


def test_overlong_line_is_refused_without_reading_it_whole(store, tmp_path):
    path = tmp_path / "long.csv"
    path.write_bytes(b'# notes: "' + b"x" * (MAX_LINE_BYTES + 10) + b'"\n' + _HEADER.encode())
    with pytest.raises(InvalidInputError, match=r"long\.csv, line 1: longer than 1048576 bytes"):
        import_csv(store, path, skill="cork_seat")


# -- metadata and text that the readers refuse with file, line and field -----------------------


@pytest.mark.parametrize(
    ("meta", "message"),
    [
        ("# tags: 3", "line 2: metadata 'tags' must be a list of strings, got 3"),
        ('# tags: "abc"', "line 2: metadata 'tags' must be a list of strings, got 'abc'"),
        ("# flags: [1]", "line 2: metadata 'flags' must be an object of counters"),
        ('# flags: {"drops": -1}', "line 2: metadata 'flags': flag 'drops' must be"),
        ('# start_time: "noon"', "line 2: metadata 'start_time' must be a finite number"),
        ("# nominal_rate_hz: true", "line 2: metadata 'nominal_rate_hz' must be a finite"),
        ("# start_time: 1e999", "line 2: metadata 'start_time' must be a finite number, got inf"),
        ('# status: "done"', "line 2: metadata 'status' must be one of recording, complete"),
        ('# source: "scanned"', "line 2: metadata 'source' must be one of recorded, imported"),
        ("# operator: null", "line 2: metadata 'operator' must be a string, got None"),
        ("# notes: " + "[" * 100_000 + "]" * 100_000, "line 2, metadata 'notes': JSON nested "
         "too deeply"),
        ("# start_time: " + "9" * 5000, "line 2, metadata 'start_time': not valid JSON "
         "\\(Exceeds the limit \\(4300 digits\\)"),
        ('# skill: "cork_seat"', "line 2: metadata 'skill' repeats line 1"),
    ],
    ids=["tags_number", "tags_text", "flags_list", "flags_negative", "start_text", "rate_bool",
         "start_inf", "status_unknown", "source_unknown", "operator_null", "nested_100000",
         "integer_5000_digits", "repeated_key"],
)  # fmt: skip
def test_metadata_of_the_wrong_type_names_file_line_and_field(store, tmp_path, meta, message):
    path = _csv(tmp_path, _HEADER, ["0,1,2,3"], meta=('# skill: "cork_seat"', meta))
    with pytest.raises(InvalidInputError, match=f"bad\\.csv, {message}"):
        import_csv(store, path)
    assert list(store.find_demonstrations()) == []


@pytest.mark.parametrize(
    ("line", "where"),
    [(b"0.001,1,2,\xff3", "line 5, field 4"), (b'# notes: "caf\xe9"', "line 2, field 1"),
     (b"t,position.\xff,velocity.a,torque.a", "line 3, field 2")],
)  # fmt: skip
def test_bytes_that_are_not_utf8_name_line_and_field(store, tmp_path, line, where):
    header = b"t,position.shoulder,velocity.shoulder,torque.shoulder"
    lines = [b'# skill: "cork_seat"', b'# notes: "x"', header, b"0,1,2,3", b"0.001,1,2,3"]
    index = 4 if line.startswith(b"0") else 1 if line.startswith(b"#") else 2
    lines[index] = line
    (tmp_path / "latin.csv").write_bytes(b"\n".join(lines) + b"\n")
    with pytest.raises(InvalidInputError, match=f"latin\\.csv, {where}: not UTF-8 text"):
        import_csv(store, tmp_path / "latin.csv")


def test_byte_order_mark_crlf_and_readme_limits(store, tmp_path):
    demo_id = add_demo(store, n=20)
    text = export_csv(store, demo_id, tmp_path / "demo.csv").read_text()
    (tmp_path / "windows.csv").write_bytes(b"\xef\xbb\xbf" + text.replace("\n", "\r\n").encode())
    copy = store.load_demonstration(import_csv(store, tmp_path / "windows.csv", keep_id=False))
    assert copy.t.tobytes() == store.load_demonstration(demo_id).t.tobytes()
    readme = (REPO / "README.md").read_text()
    assert f"{MAX_JOINTS} joints" in readme and "1 GiB" in readme
    assert MAX_IMPORT_BYTES == 2**30 and MAX_LINE_BYTES == 2**20


def test_sample_budget_is_refused_with_the_line(store, tmp_path, monkeypatch):
    from compliant_demo.store import io as store_io

    demo_id = add_demo(store, n=CHUNK_SAMPLES + 100)
    path = export_csv(store, demo_id, tmp_path / "demo.csv")
    monkeypatch.setattr(store_io, "MAX_IMPORT_BYTES", CHUNK_SAMPLES * 9 * 8)
    with pytest.raises(InvalidInputError, match=r"demo\.csv, line 8305: 597024 bytes of samples, "
                       r"beyond the import limit of 589824 bytes"):  # fmt: skip
        import_csv(store, path, keep_id=False)
    assert [info.id for info in store.find_demonstrations()] == [demo_id]


@pytest.mark.parametrize("kind", ["directory", "named_pipe"])
def test_what_is_not_a_regular_file_is_refused_without_reading(store, tmp_path, kind):
    # a named pipe would block the reader for ever
    for name, importer in (("x.csv", import_csv), ("x.npz", import_npz)):
        path = tmp_path / name
        path.mkdir() if kind == "directory" else os.mkfifo(path)
        with pytest.raises(InvalidInputError, match=f"file '.*{name}' is not a regular file"):
            importer(store, path, skill="cork_seat")
