"""Fuzz the CSV, NPZ and ROS 2 bag importers with hypothesis.

Every input ends in a new, loadable demonstration or one of our named exceptions; a failed import
leaves no demonstration behind, and the demonstration already in the store keeps exactly the
same samples (hashed before and after). Bags are written by the test itself with ``rosbags``,
including messages whose fields disagree and messages whose serialised bytes are damaged.
"""

from __future__ import annotations

import io
import json
import tempfile
import zipfile
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from reliability_support import (
    FUZZ_SETTINGS,
    JOINTS,
    count_case,
    fuzz_file,
    no_hang,
    sample_digest,
    write_demo,
)
from rosbags.rosbag2 import StoragePlugin, Writer
from rosbags.typesys import Stores, get_typestore

from compliant_demo.exceptions import CompliantDemoError, InvalidInputError
from compliant_demo.store import DemoStore
from compliant_demo.store.bags import BAG_FORMAT, METADATA_TOPIC, STRING, import_bag
from compliant_demo.store.io import METADATA_KEYS, export_csv, export_npz, import_csv, import_npz


class _Target(tuple):
    """(store, reference id, reference digest, exported CSV text, exported NPZ arrays)."""

    def __repr__(self) -> str:
        return "import_target"


@pytest.fixture(scope="module")
def import_target(tmp_path_factory: pytest.TempPathFactory) -> Iterator[_Target]:
    folder = tmp_path_factory.mktemp("imports")
    store = DemoStore(str(folder / "target.sqlite"))
    reference = write_demo(store, 101, 2)
    csv_text = export_csv(store, reference, folder / "ref.csv").read_text()
    with np.load(export_npz(store, reference, folder / "ref.npz"), allow_pickle=False) as archive:
        arrays = {key: archive[key] for key in archive.files}
    yield _Target(
        (store, reference, sample_digest(store.load_demonstration(reference)), csv_text, arrays)
    )
    store.close()


def _check_import(target: _Target, run_import, parser: str) -> None:
    """Run one import; the outcome must be a loadable new demonstration or a named error."""
    store, reference, digest = target[0], target[1], target[2]
    before = {info.id for info in store.find_demonstrations()}
    with no_hang(10.0):
        try:
            new_id = run_import(store)
        except CompliantDemoError:
            new_id = None
    after = {info.id for info in store.find_demonstrations()}
    if new_id is None:
        assert after == before, "a failed import left a demonstration behind"
    else:
        assert after == before | {new_id}
        loaded = store.load_demonstration(new_id)
        for name in ("t", "position", "velocity", "torque"):
            assert np.all(np.isfinite(getattr(loaded, name))), f"{name} holds non-finite values"
        assert np.all(np.diff(loaded.t) > 0), "imported time stamps do not increase"
        store.delete_demonstration(new_id)
    assert sample_digest(store.load_demonstration(reference)) == digest
    count_case(parser)


# -- CSV -----------------------------------------------------------------------------------------

_cells = st.one_of(
    st.sampled_from(["nan", "inf", "-inf", "", " ", "1e999", "0x10", "1,5", "--1", "１", "1e-400",
                     "9" * 400, "\x00", "true", '"3"', "3;", "'"]),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.text(max_size=8),
)  # fmt: skip


@st.composite
def _mutated_csv(draw: st.DrawFn, original: str) -> str:
    lines = original.splitlines()
    for _ in range(draw(st.integers(1, 5))):
        kind = draw(st.sampled_from(["cell", "drop", "dup", "swap", "line", "meta", "trunc"]))
        index = draw(st.integers(0, len(lines) - 1)) if lines else 0
        if not lines:
            lines = [draw(st.text(max_size=40))]
        elif kind == "cell":
            cells = lines[index].split(",")
            cells[draw(st.integers(0, len(cells) - 1))] = draw(_cells)
            lines[index] = ",".join(cells)
        elif kind == "drop":
            del lines[index]
        elif kind == "dup":
            lines.insert(index, lines[index])
        elif kind == "swap":
            other = draw(st.integers(0, len(lines) - 1))
            lines[index], lines[other] = lines[other], lines[index]
        elif kind == "line":
            lines.insert(index, draw(st.text(max_size=60)))
        elif kind == "meta":
            key = draw(st.sampled_from(["id", "skill", "tags", "status", "flags", "start_time",
                                        "nominal_rate_hz", "joints", "x"]))  # fmt: skip
            lines.insert(draw(st.integers(0, 3)), f"# {key}: {draw(_cells)}")
        else:
            lines[index] = lines[index][: draw(st.integers(0, len(lines[index])))]
    return "\n".join(lines) + draw(st.sampled_from(["", "\n", "\r\n"]))


@FUZZ_SETTINGS
@given(data=st.data(), raw=st.one_of(st.none(), st.binary(max_size=200)))
def test_fuzz_csv_import(import_target: _Target, data: st.DataObject, raw: bytes | None) -> None:
    content = raw if raw is not None else data.draw(_mutated_csv(import_target[3])).encode()
    with fuzz_file("fuzz.csv", content) as path:
        _check_import(
            import_target,
            lambda store: import_csv(store, path, keep_id=False, skill="cork_seat"),
            "csv_import",
        )


@pytest.fixture(scope="module")
def quoted_csv(tmp_path_factory: pytest.TempPathFactory) -> str:
    """An exported CSV whose joint names hold a comma, a quote and a line break."""
    folder = tmp_path_factory.mktemp("quoted")
    with DemoStore(":memory:") as store:
        demo_id = store.add_demonstration(
            t=np.arange(6) / 1e3, position=np.zeros((6, 2)), velocity=np.ones((6, 2)),
            torque=np.ones((6, 2)), stiffness=np.full((6, 2), np.nan), skill="cork_seat",
            joints=["shoulder, left", 'elbow "lower"\nside'],
        )  # fmt: skip
        return export_csv(store, demo_id, folder / "quoted.csv").read_text()


@FUZZ_SETTINGS
@given(data=st.data())
def test_fuzz_csv_with_quoted_joint_names(
    import_target: _Target, quoted_csv: str, data: st.DataObject
) -> None:
    content = data.draw(_mutated_csv(quoted_csv)).encode()
    with fuzz_file("quoted.csv", content) as path:
        _check_import(
            import_target,
            lambda store: import_csv(store, path, keep_id=False, skill="cork_seat"),
            "csv_quoted",
        )


# -- NPZ -----------------------------------------------------------------------------------------

_array_junk = st.one_of(
    st.sampled_from(
        [
            np.array([]),
            np.array(np.nan),
            np.zeros((3, 2)),
            np.full((100, 2), np.inf),
            np.array(["a", "b"]),
            np.array([1 + 2j]),
            np.zeros((2, 2, 2)),
            np.array([True, False]),
            np.arange(200, dtype=np.int8),
            np.array("{not json"),
            np.array('{"skill": 3}'),
            np.array(b"bytes"),
            np.zeros((100, 0)),
            np.zeros(100, dtype=[("a", "<f8")]),
        ]
    ),  # fmt: skip
    st.lists(st.floats(allow_nan=True, allow_infinity=True), max_size=5).map(np.array),
)


@st.composite
def _mutated_npz(draw: st.DrawFn, original: dict[str, np.ndarray]) -> bytes:
    arrays = dict(original)
    for _ in range(draw(st.integers(1, 3))):
        key = draw(st.sampled_from([*sorted(arrays), "stiffness", "extra"]))
        action = draw(st.sampled_from(["replace", "drop", "slice", "transpose"]))
        if action == "drop":
            arrays.pop(key, None)
        elif action == "replace" or key not in arrays:
            arrays[key] = draw(_array_junk)
        elif action == "slice" and arrays[key].ndim:
            arrays[key] = arrays[key][: draw(st.integers(0, arrays[key].shape[0]))]
        else:
            arrays[key] = arrays[key].T
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    data = bytearray(buffer.getvalue())
    for _ in range(draw(st.integers(0, 2))):  # damage the zip container itself now and then
        data[draw(st.integers(0, len(data) - 1))] ^= draw(st.integers(1, 255))
    return bytes(data)


@FUZZ_SETTINGS
@given(data=st.data())
def test_fuzz_npz_import(import_target: _Target, data: st.DataObject) -> None:
    content = data.draw(_mutated_npz(import_target[4]))
    with fuzz_file("fuzz.npz", content) as path:
        _check_import(import_target, lambda store: import_npz(store, path, keep_id=False), "npz")


def test_npz_fuzzer_reaches_a_successful_import(import_target: _Target, tmp_path: Path) -> None:
    # Guards the fuzz test above against passing only because every archive is refused.
    buffer = io.BytesIO()
    np.savez(buffer, **import_target[4])
    path = tmp_path / "intact.npz"
    path.write_bytes(buffer.getvalue())
    assert zipfile.is_zipfile(path)
    store = import_target[0]
    new_id = import_npz(store, path, keep_id=False)
    np.testing.assert_array_equal(store.load_demonstration(new_id).t, import_target[4]["t"])
    store.delete_demonstration(new_id)


# -- ROS 2 bags ----------------------------------------------------------------------------------

_TYPES = get_typestore(Stores.ROS2_HUMBLE)
_JOINT_STATE = "sensor_msgs/msg/JointState"
_NS = 1_000_000_000

_floats = st.floats(allow_nan=True, allow_infinity=True, width=64)
_message = st.fixed_dictionaries(
    {
        "stamp_ns": st.one_of(st.integers(0, 2 * _NS), st.just(0)),
        "names": st.one_of(
            st.just(JOINTS), st.lists(st.sampled_from([*JOINTS, "wrist", "", "elbow"]), max_size=4)
        ),
        "position": st.lists(_floats, max_size=4),
        "velocity": st.lists(_floats, max_size=4),
        "effort": st.lists(_floats, max_size=4),
        "damage": st.one_of(st.none(), st.tuples(st.integers(0, 200), st.integers(1, 255))),
        "cut": st.one_of(st.none(), st.integers(0, 120)),
    }
)


def _serialised(message: dict) -> bytes:
    sec, nanosec = divmod(message["stamp_ns"], _NS)
    msg = _TYPES.types[_JOINT_STATE](
        header=_TYPES.types["std_msgs/msg/Header"](
            stamp=_TYPES.types["builtin_interfaces/msg/Time"](sec=sec, nanosec=nanosec),
            frame_id="",
        ),
        name=list(message["names"]),
        position=np.array(message["position"], dtype=np.float64),
        velocity=np.array(message["velocity"], dtype=np.float64),
        effort=np.array(message["effort"], dtype=np.float64),
    )
    data = bytearray(_TYPES.serialize_cdr(msg, _JOINT_STATE))
    if message["damage"] is not None:
        offset, flip = message["damage"]
        data[offset % len(data)] ^= flip
    if message["cut"] is not None:
        data = data[: message["cut"]]
    return bytes(data)


def _good_message(index: int) -> dict:
    value = [0.1 * index, -0.1 * index]
    return {"stamp_ns": (index + 1) * 1_000_000, "names": JOINTS, "position": value,
            "velocity": value, "effort": value, "damage": None, "cut": None}  # fmt: skip


def _write_bag(
    path: Path, messages: list[dict], storage: StoragePlugin, metadata: str | None = None
) -> None:
    with Writer(path, version=9, storage_plugin=storage) as writer:
        connection = writer.add_connection("/joint_states", _JOINT_STATE, typestore=_TYPES)
        if metadata is not None:
            meta = writer.add_connection(METADATA_TOPIC, STRING, typestore=_TYPES)
            text = _TYPES.types[STRING](data=metadata)
            writer.write(meta, 1_000_000, _TYPES.serialize_cdr(text, STRING))
        for index, message in enumerate(messages):
            writer.write(connection, (index + 1) * 1_000_000, _serialised(message))


@FUZZ_SETTINGS
@given(
    messages=st.lists(
        st.one_of(st.integers(0, 50).map(_good_message), _message), min_size=1, max_size=12
    ),
    storage=st.sampled_from([StoragePlugin.SQLITE3, StoragePlugin.MCAP]),
    skip_bad=st.booleans(),
)
def test_fuzz_bag_import(
    import_target: _Target, messages: list[dict], storage: StoragePlugin, skip_bad: bool
) -> None:
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "fuzz_bag"
        _write_bag(path, messages, storage)
        _check_import(
            import_target,
            lambda store: import_bag(store, path, skill="cork_seat", skip_bad=skip_bad),
            "bag_import",
        )


_json_junk = st.recursive(
    st.one_of(st.none(), st.booleans(), st.integers(), st.floats(), st.text(max_size=8)),
    lambda inner: st.one_of(st.lists(inner, max_size=3),
                            st.dictionaries(st.text(max_size=6), inner, max_size=3)),
    max_leaves=8,
)  # fmt: skip
_bag_metadata = st.one_of(
    st.text(max_size=60),
    st.dictionaries(
        st.sampled_from([*METADATA_KEYS, "format", "joint_topic", "stiffness_topic", "time"]),
        _json_junk,
        max_size=6,
    ).map(lambda fields: json.dumps({"format": BAG_FORMAT, "skill": "cork_seat", **fields})),
)


@FUZZ_SETTINGS
@given(
    metadata=_bag_metadata,
    count=st.integers(1, 6),
    storage=st.sampled_from([StoragePlugin.SQLITE3, StoragePlugin.MCAP]),
)
def test_fuzz_bag_metadata(
    import_target: _Target, metadata: str, count: int, storage: StoragePlugin
) -> None:
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "fuzz_bag"
        _write_bag(path, [_good_message(i) for i in range(count)], storage, metadata)
        _check_import(
            import_target,
            lambda store: import_bag(store, path, keep_id=False),
            "bag_metadata",
        )


@pytest.mark.parametrize("storage", [StoragePlugin.SQLITE3, StoragePlugin.MCAP])
def test_bag_fuzzer_reaches_a_successful_import(
    import_target: _Target, tmp_path: Path, storage: StoragePlugin
) -> None:
    # Guards the fuzz test above against passing only because every bag is refused.
    path = tmp_path / "good_bag"
    _write_bag(path, [_good_message(i) for i in range(5)], storage)
    store = import_target[0]
    new_id = import_bag(store, path, skill="cork_seat")
    np.testing.assert_allclose(store.load_demonstration(new_id).t, np.arange(5) * 1e-3, atol=1e-12)
    store.delete_demonstration(new_id)


def test_csv_that_is_not_utf8_is_invalid_input(import_target: _Target, tmp_path: Path) -> None:
    # Found by the fuzzer: UnicodeDecodeError escaped from import_csv.
    path = tmp_path / "latin1.csv"
    path.write_bytes(import_target[3].replace("cork_seat", "cork_sé").encode("latin-1"))
    store = import_target[0]
    before = {info.id for info in store.find_demonstrations()}
    with pytest.raises(InvalidInputError, match=r"latin1\.csv"):
        import_csv(store, path, keep_id=False)
    assert {info.id for info in store.find_demonstrations()} == before


@pytest.mark.parametrize(
    "damage",
    [{"cut": 2}, {"cut": 0}, {"damage": (0, 0xFF)}, {"damage": (15, 0x01)}],
    ids=["cut_to_2_bytes", "empty", "bad_encapsulation", "huge_string_length"],
)
def test_bag_with_a_damaged_message_is_invalid_input(
    import_target: _Target, tmp_path: Path, damage: dict
) -> None:
    # Found by the fuzzer: rosbags' AnyReaderError from deserialising escaped from import_bag.
    path = tmp_path / "damaged_bag"
    _write_bag(path, [_good_message(0), _good_message(1) | damage, _good_message(2)],
               StoragePlugin.SQLITE3)  # fmt: skip
    store = import_target[0]
    before = {info.id for info in store.find_demonstrations()}
    with pytest.raises(InvalidInputError, match=r"damaged_bag"):
        import_bag(store, path, skill="cork_seat")
    assert {info.id for info in store.find_demonstrations()} == before


@pytest.mark.parametrize(
    "joints",
    [np.array("shoulder"), np.array([JOINTS])],
    ids=["zero_dimensional", "two_dimensional"],
)
def test_npz_joints_that_are_not_a_list_of_names_is_invalid_input(
    import_target: _Target, tmp_path: Path, joints: np.ndarray
) -> None:
    # Found by the fuzzer: a 0-d 'joints' array raised TypeError ("iteration over a 0-d array");
    # a 2-d one became a single joint named "['shoulder' 'elbow']".
    arrays = dict(import_target[4], joints=joints)
    path = tmp_path / "joints.npz"
    np.savez(path, **arrays)
    store = import_target[0]
    before = {info.id for info in store.find_demonstrations()}
    with pytest.raises(InvalidInputError, match=r"joints\.npz.*joints"):
        import_npz(store, path, keep_id=False)
    assert {info.id for info in store.find_demonstrations()} == before
