"""ROS 2 bag import/export through rosbags, on bags this test writes with rosbags' own writer in
both the SQLite and the MCAP storage."""

from __future__ import annotations

import base64
import json

import numpy as np
import pytest
from rosbags.rosbag2 import StoragePlugin, Writer
from rosbags.typesys import Stores, get_typestore
from store_support import JOINTS, assert_same_demonstration

from compliant_demo.exceptions import InvalidInputError, NotFoundError, StoreFullError
from compliant_demo.store import DemoStore
from compliant_demo.store.bags import BAG_FORMAT, METADATA_TOPIC, export_bag, import_bag
from compliant_demo.store.core import CHUNK_SAMPLES

TYPES = get_typestore(Stores.ROS2_HUMBLE)
JointState = TYPES.types["sensor_msgs/msg/JointState"]
Header = TYPES.types["std_msgs/msg/Header"]
Time = TYPES.types["builtin_interfaces/msg/Time"]
Float64MultiArray = TYPES.types["std_msgs/msg/Float64MultiArray"]
MultiArrayLayout = TYPES.types["std_msgs/msg/MultiArrayLayout"]
String = TYPES.types["std_msgs/msg/String"]
START_NS = 1_700_000_000_000_000_000
STORAGES = {"sqlite3": StoragePlugin.SQLITE3, "mcap": StoragePlugin.MCAP}


def _joint_state(ns, names, position, velocity, effort):
    return JointState(
        header=Header(stamp=Time(sec=ns // 10**9, nanosec=ns % 10**9), frame_id=""),
        name=list(names),
        position=np.asarray(position, dtype=np.float64),
        velocity=np.asarray(velocity, dtype=np.float64),
        effort=np.asarray(effort, dtype=np.float64),
    )


def write_bag(path, storage, messages, *, stiffness=(), stiffness_topic="/stiffness_reference",
              metadata=()):  # fmt: skip
    """Write a bag: ``messages`` are (ns, JointState); ``stiffness`` are (ns, values) on
    ``stiffness_topic``; ``metadata`` are texts on the metadata topic."""
    with Writer(path, version=9, storage_plugin=STORAGES[storage]) as writer:
        joints = writer.add_connection("/joint_states", JointState.__msgtype__, typestore=TYPES)
        k_conn = writer.add_connection(
            stiffness_topic, Float64MultiArray.__msgtype__, typestore=TYPES
        )
        if metadata:
            m_conn = writer.add_connection(METADATA_TOPIC, String.__msgtype__, typestore=TYPES)
        events = [(ns, 1, joints, msg) for ns, msg in messages]
        events += [(START_NS, -1, m_conn, String(data=text)) for text in metadata]
        events += [
            (ns, 0, k_conn,
             Float64MultiArray(layout=MultiArrayLayout(dim=[], data_offset=0),
                               data=np.asarray(values, dtype=np.float64)))
            for ns, values in stiffness
        ]  # fmt: skip
        for ns, _, connection, msg in sorted(events, key=lambda e: (e[0], e[1])):
            writer.write(connection, ns, TYPES.serialize_cdr(msg, connection.msgtype))
    return path


def _ramp(n, names=("elbow", "shoulder", "wrist"), step_ns=1_000_000):
    """JointState messages at 1 kHz whose joint order differs from ours (elbow first)."""
    out = []
    for i in range(n):
        values = np.array([0.01 * i, -0.02 * i, 5.0])
        ns = START_NS + i * step_ns
        out.append((ns, _joint_state(ns, names, values, 2 * values, 3 * values)))
    return out


@pytest.fixture
def store(tmp_path):
    with DemoStore(tmp_path / "store.sqlite") as opened:
        yield opened


@pytest.mark.parametrize("storage", ["sqlite3", "mcap"])
def test_import_joint_states_with_stiffness(store, tmp_path, storage):
    stiffness = [(START_NS + 2_500_000, [40.0, 50.0]), (START_NS + 6_000_000, [150.0, 160.0])]
    bag = write_bag(tmp_path / f"bag_{storage}", storage, _ramp(10), stiffness=stiffness)
    # the stiffness topic is found by its type and name
    demo_id = import_bag(
        store, bag, skill="cork_seat", joints=JOINTS, operator="operator_a", tags=["from_bag"],
    )  # fmt: skip
    demo = store.load_demonstration(demo_id)
    i = np.arange(10)
    assert demo.joints == JOINTS
    assert demo.info.start_time == START_NS / 1e9
    assert np.allclose(demo.t, i * 1e-3, rtol=0, atol=1e-12)
    # shoulder is the bag's second column (-0.02 i), elbow the first (0.01 i)
    assert np.array_equal(demo.position, np.column_stack([-0.02 * i, 0.01 * i]))
    assert np.array_equal(demo.velocity, 2 * demo.position)
    assert np.array_equal(demo.torque, 3 * demo.position)
    # zero-order hold of the latest stiffness message; samples 0-2 precede the first one: NaN,
    # "no estimate", never an invented value
    expected_k = np.array([[np.nan, np.nan]] * 3 + [[40.0, 50.0]] * 3 + [[150.0, 160.0]] * 4)
    assert np.array_equal(demo.stiffness, expected_k, equal_nan=True)
    info = demo.info
    assert (info.source, info.operator, info.tags) == ("imported", "operator_a", ("from_bag",))
    assert info.flags == {"stiffness_missing": 3}


_NAMES = ("shoulder, left", 'wrist "pitch"', "elbow\nlower", " ünïcode ")


@pytest.mark.parametrize("storage", ["sqlite3", "mcap"])
@pytest.mark.parametrize("times", ["nanosecond_grid", "any_float"])
def test_export_then_import_reproduces_everything(tmp_path, storage, times):
    # every sample bit for bit (NaN stiffness too), every metadata field and the id; the
    # skill, the topics and the stiffness come from the bag itself
    rng = np.random.default_rng(7)
    n = 300
    t = (
        np.arange(n) / 1000.0
        if times == "nanosecond_grid"
        else np.cumsum(rng.uniform(1e-4, 2e-3, n))
    )
    values = rng.normal(0.0, 10.0, (n, 16))
    stiffness = 100 + values[:, 12:16]
    stiffness[:40] = np.nan  # the estimator not yet excited
    stiffness[100::7, 2] = np.nan
    with DemoStore(tmp_path / "a.sqlite") as source, DemoStore(tmp_path / "b.sqlite") as target:
        demo_id = source.add_demonstration(
            t=t, position=values[:, :4], velocity=values[:, 4:8], torque=values[:, 8:12],
            stiffness=stiffness, skill="cork_seat", joints=_NAMES, operator="operator_b",
            tags=["press", "tag, with comma"], notes="two\nlines", start_time=1.7e9 + 0.123456,
            nominal_rate_hz=997.5, source="recorded",
            flags={"stiffness_latency_s": 0.34, "drops": 3, "interrupted": True},
        )  # fmt: skip
        source.mark_status(demo_id, "incomplete", "writer stopped")
        bag = export_bag(source, demo_id, tmp_path / "out", storage=storage)
        copy = target.load_demonstration(import_bag(target, bag))
        assert_same_demonstration(source.load_demonstration(demo_id), copy)
        assert copy.id == demo_id and copy.info.flags["stiffness_latency_s"] == 0.34
        again = import_bag(target, bag, keep_id=False, operator="operator_c")
        assert target.get_info(again).operator == "operator_c" and again != demo_id


def test_stiffness_topic_choice(store, tmp_path):
    bag = write_bag(tmp_path / "bag", "mcap", _ramp(4), stiffness=[(START_NS, [1.0, 2.0])])
    plain = import_bag(store, bag, skill="cork_seat", joints=JOINTS, stiffness_topic="")
    assert not store.get_info(plain).has_stiffness
    other = write_bag(tmp_path / "other", "mcap", _ramp(4), stiffness=[(START_NS, [1.0, 2.0])],
                      stiffness_topic="/arm/stiffness_truth")  # fmt: skip
    with Writer(tmp_path / "two", version=9, storage_plugin=StoragePlugin.MCAP) as writer:
        for topic in ("/stiffness_reference", "/stiffness_truth", "/joint_states"):
            msgtype = "sensor_msgs/msg/JointState" if topic == "/joint_states" else FLOAT64
            connection = writer.add_connection(topic, msgtype, typestore=TYPES)
            msg = (
                _ramp(1)[0][1]
                if topic == "/joint_states"
                else Float64MultiArray(
                    layout=MultiArrayLayout(dim=[], data_offset=0), data=np.ones(3)
                )
            )
            writer.write(connection, START_NS, TYPES.serialize_cdr(msg, msgtype))
    with pytest.raises(InvalidInputError, match="has several stiffness topics "
                       "\\(/stiffness_reference, /stiffness_truth\\): choose one"):  # fmt: skip
        import_bag(store, tmp_path / "two", skill="cork_seat")
    found = import_bag(store, other, skill="cork_seat", joints=JOINTS)
    assert store.load_demonstration(found).stiffness[0].tolist() == [1.0, 2.0]


FLOAT64 = "std_msgs/msg/Float64MultiArray"


def test_progress_reports_every_message_read_of_the_bag(store, tmp_path):
    bag = write_bag(tmp_path / "bag", "mcap", _ramp(40))
    calls: list[tuple[int, int]] = []
    import_bag(store, bag, skill="cork_seat", progress=lambda done, total: calls.append(
        (done, total)))
    assert calls == [(i, 40) for i in range(1, 41)]  # messages read / in the bag


def test_progress_bar_draws_the_messages_read(capsys):
    from compliant_demo.app.progress import ReadProgress

    bar = ReadProgress("bag", "msg", enabled=True, min_total=10)
    for done in range(1, 41):
        bar(done, 40)
    bar.close()
    err = capsys.readouterr().err
    assert "bag:" in err and "/40" in err and "msg" in err  # tqdm's bar on stderr
    small = ReadProgress("bag", "msg", enabled=True, min_total=100)
    small(5, 40)
    small.close()
    assert capsys.readouterr().err == ""  # below min_total: no bar


def test_messages_lacking_a_joint_are_skipped_and_counted(store, tmp_path):
    messages = _ramp(6)
    messages.insert(3, (START_NS + 2_500_000, _joint_state(START_NS + 2_500_000, ["gripper"],
                                                           [0.0], [0.0], [0.0])))  # fmt: skip
    bag = write_bag(tmp_path / "bag", "mcap", messages)
    demo_id = import_bag(store, bag, skill="cork_seat", joints=["shoulder"])
    info = store.get_info(demo_id)
    assert info.n_samples == 6 and info.flags == {"skipped_messages": 1}
    assert not info.has_stiffness


def _assert_nothing_stored(store):
    assert list(store.find_demonstrations()) == []
    assert store.integrity_check() == ["ok"]


def test_bag_without_the_named_topic(store, tmp_path):
    bag = write_bag(tmp_path / "bag", "sqlite3", _ramp(3))
    with pytest.raises(NotFoundError, match="has no topic '/arm/joint_states' \\(topics: "
                       "/joint_states, /stiffness_reference\\)"):  # fmt: skip
        import_bag(store, bag, skill="cork_seat", joint_topic="/arm/joint_states")
    with pytest.raises(NotFoundError, match="has no topic '/stiffness'"):
        import_bag(store, bag, skill="cork_seat", stiffness_topic="/stiffness")
    with pytest.raises(
        InvalidInputError, match="topic '/stiffness_reference' in .* has no messages"
    ):
        import_bag(store, bag, skill="cork_seat", stiffness_topic="/stiffness_reference")
    with pytest.raises(InvalidInputError, match="carries sensor_msgs/msg/JointState, not std_msgs"):
        import_bag(store, bag, skill="cork_seat", stiffness_topic="/joint_states")
    _assert_nothing_stored(store)


def test_unknown_joint_names(store, tmp_path):
    bag = write_bag(tmp_path / "bag", "mcap", _ramp(3))
    with pytest.raises(InvalidInputError, match="joint 'hip' is in no JointState message \\(names "
                       "seen: elbow, shoulder, wrist\\)"):  # fmt: skip
        import_bag(store, bag, skill="cork_seat", joints=["shoulder", "hip"])
    _assert_nothing_stored(store)


@pytest.mark.parametrize("storage", ["sqlite3", "mcap"])
def test_bad_samples_refused_or_skipped(store, tmp_path, storage):
    messages = _ramp(8)
    ns = START_NS + 4_000_000
    messages[4] = (ns, _joint_state(ns, ["elbow", "shoulder", "wrist"], [np.nan, 0, 0], [0, 0, 0],
                                    [0, 0, 0]))  # fmt: skip
    late = START_NS + 6_500_000
    messages[6] = (late, _joint_state(START_NS + 5_000_000, ["elbow", "shoulder", "wrist"],
                                      [1, 1, 1], [1, 1, 1], [1, 1, 1]))  # fmt: skip
    bag = write_bag(tmp_path / "bag", storage, messages)
    with pytest.raises(InvalidInputError, match="message 4 on '/joint_states': position/velocity/"
                       "effort not finite \\(import with skip_bad=True"):  # fmt: skip
        import_bag(store, bag, skill="cork_seat")
    _assert_nothing_stored(store)
    demo_id = import_bag(store, bag, skill="cork_seat", skip_bad=True)
    info = store.get_info(demo_id)
    # sample 4 is NaN, sample 6 repeats the stamp of sample 5 (header time 5 ms)
    assert info.flags == {"nan_messages": 1, "non_increasing": 1}
    assert info.n_samples == 6


def test_backwards_stamp_is_named(store, tmp_path):
    messages = _ramp(4)
    ns = START_NS + 3_000_000
    messages[3] = (ns, _joint_state(START_NS + 1_000_000, ["elbow", "shoulder", "wrist"],
                                    [1, 1, 1], [1, 1, 1], [1, 1, 1]))  # fmt: skip
    bag = write_bag(tmp_path / "bag", "sqlite3", messages)
    with pytest.raises(InvalidInputError, match="time stamp 1700000000001000000 ns goes backwards"):
        import_bag(store, bag, skill="cork_seat")
    _assert_nothing_stored(store)


def test_empty_effort_and_wrong_stiffness_width(store, tmp_path):
    ns = START_NS
    bag = write_bag(tmp_path / "no_effort", "mcap",
                    [(ns, _joint_state(ns, JOINTS, [0, 0], [0, 0], []))])  # fmt: skip
    with pytest.raises(InvalidInputError, match="effort has 0 values for 2 names"):
        import_bag(store, bag, skill="cork_seat")
    bag = write_bag(tmp_path / "wide", "mcap", _ramp(3), stiffness=[(START_NS, [1.0, 2.0, 3.0])])
    with pytest.raises(InvalidInputError, match="data has 3 values for 2 joints"):
        import_bag(store, bag, skill="cork_seat", joints=JOINTS,
                   stiffness_topic="/stiffness_reference")  # fmt: skip
    _assert_nothing_stored(store)


def test_not_a_bag(store, tmp_path):
    (tmp_path / "plain").mkdir()
    with pytest.raises(InvalidInputError, match="is not a readable ROS 2 bag"):
        import_bag(store, tmp_path / "plain", skill="cork_seat")
    (tmp_path / "plain" / "metadata.yaml").write_text("{{{ not yaml")
    with pytest.raises(InvalidInputError, match="is not a readable ROS 2 bag: Could not load") as e:
        import_bag(store, tmp_path / "plain", skill="cork_seat")
    assert "\n" not in str(e.value)  # the YAML parser's message spans lines: one line here
    with pytest.raises(NotFoundError, match="bag '.*absent' does not exist"):
        import_bag(store, tmp_path / "absent", skill="cork_seat")
    with pytest.raises(InvalidInputError, match="storage must be one of sqlite3, mcap"):
        export_bag(store, "x", tmp_path / "b", storage="zip")
    _assert_nothing_stored(store)


# -- metadata topic, joint limits, stiffness edge cases, all or nothing ------------------------


def _metadata(**fields):
    return json.dumps({"format": BAG_FORMAT, "skill": "cork_seat", **fields})


@pytest.mark.parametrize(
    ("texts", "message"),
    [
        (["{not json"], "topic '/demonstration_metadata': not valid JSON"),
        (["[" * 100_000 + "]" * 100_000], "'/demonstration_metadata': JSON nested too deeply"),
        (['{"format": "other"}'], "not a JSON object with format 'compliant_demo demonstration'"),
        ([_metadata(tags="press")], "field 'tags': metadata 'tags' must be a list of strings"),
        ([_metadata(start_time="9" * 10)],
         "field 'start_time': metadata 'start_time' must be a finite number"),
        ([_metadata(stiffness_topic=3)], "field 'stiffness_topic': must be a string, got 3"),
        ([_metadata(), _metadata()], "topic '/demonstration_metadata': 2 messages, expected 1"),
        ([_metadata(start_time=START_NS / 1e9, time="@@@")], "field 'time': not base64"),
        ([_metadata(start_time=START_NS / 1e9, time=base64.b64encode(bytes(16)).decode())],
         "field 'time': 2 times that do not match the 5 JointState stamps"),
    ],
    ids=["not_json", "nested", "foreign_format", "tags_text", "start_text", "topic_number",
         "two_messages", "time_not_base64", "time_edited"],
)  # fmt: skip
def test_bad_metadata_message_is_named(store, tmp_path, texts, message):
    bag = write_bag(tmp_path / "bag", "mcap", _ramp(5), metadata=texts)
    with pytest.raises(InvalidInputError, match=message):
        import_bag(store, bag)
    _assert_nothing_stored(store)


def test_metadata_topic_of_another_type_is_refused(store, tmp_path):
    with Writer(tmp_path / "bag", version=9, storage_plugin=StoragePlugin.MCAP) as writer:
        meta = writer.add_connection(METADATA_TOPIC, FLOAT64, typestore=TYPES)
        k = Float64MultiArray(layout=MultiArrayLayout(dim=[], data_offset=0), data=np.ones(2))
        writer.write(meta, START_NS, TYPES.serialize_cdr(k, FLOAT64))
    with pytest.raises(InvalidInputError, match="carries std_msgs/msg/Float64MultiArray, not "
                       "std_msgs/msg/String"):  # fmt: skip
        import_bag(store, tmp_path / "bag", skill="cork_seat")


def test_fifty_thousand_names_in_a_message_are_refused(store, tmp_path):
    names = [f"j{i}" for i in range(50_000)]
    values = np.zeros(50_000)
    bag = write_bag(tmp_path / "bag", "mcap",
                    [(START_NS, _joint_state(START_NS, names, values, values, values))]
                    )  # fmt: skip
    with pytest.raises(InvalidInputError, match="message 0 on '/joint_states': 50000 joint names, "
                       "more than the 1024 a message may carry \\(at most 64 joints"):  # fmt: skip
        import_bag(store, bag, skill="cork_seat")
    few = [f"j{i}" for i in range(65)]
    bag = write_bag(tmp_path / "few", "mcap",
                    [(START_NS, _joint_state(START_NS, few, np.zeros(65), np.zeros(65),
                                             np.zeros(65)))])  # fmt: skip
    with pytest.raises(InvalidInputError, match="joints: 65 joints, at most 64 joints are allowed"):
        import_bag(store, bag, skill="cork_seat")
    assert import_bag(store, bag, skill="cork_seat", joints=few[:64])
    repeated = write_bag(tmp_path / "repeated", "mcap", [(START_NS, _joint_state(
        START_NS, ["a", "b", "a"], np.zeros(3), np.zeros(3), np.zeros(3)))])  # fmt: skip
    with pytest.raises(InvalidInputError, match="joints must be distinct, got 'a' twice"):
        import_bag(store, repeated, skill="cork_seat")
    with pytest.raises(InvalidInputError, match="joint names repeat in the message"):
        import_bag(store, repeated, skill="cork_seat", joints=["b"])


def test_stiffness_nan_kept_infinite_refused_or_skipped(store, tmp_path):
    stiffness = [(START_NS, [np.nan, 50.0]), (START_NS + 2_000_000, [np.inf, 1.0])]
    bag = write_bag(tmp_path / "bag", "sqlite3", _ramp(4), stiffness=stiffness)
    with pytest.raises(InvalidInputError, match="message 3 on '/stiffness_reference': data "
                       "\\[inf  1.\\] holds an infinite value \\(import with skip"):  # fmt: skip
        import_bag(store, bag, skill="cork_seat", joints=JOINTS)
    _assert_nothing_stored(store)
    demo = store.load_demonstration(
        import_bag(store, bag, skill="cork_seat", joints=JOINTS, skip_bad=True)
    )
    assert np.array_equal(demo.stiffness, [[np.nan, 50.0]] * 4, equal_nan=True)
    assert demo.info.flags == {"infinite_stiffness": 1}


def test_stiffness_at_the_same_time_applies_whatever_the_order(store, tmp_path):
    # written after the joint state of the same bag time: it still holds for that sample
    messages = _ramp(3)
    with Writer(tmp_path / "bag", version=9, storage_plugin=StoragePlugin.SQLITE3) as writer:
        joints = writer.add_connection("/joint_states", JointState.__msgtype__, typestore=TYPES)
        k_conn = writer.add_connection("/stiffness", FLOAT64, typestore=TYPES)
        for i, (ns, msg) in enumerate(messages):
            writer.write(joints, ns, TYPES.serialize_cdr(msg, JointState.__msgtype__))
            k = Float64MultiArray(layout=MultiArrayLayout(dim=[], data_offset=0),
                                  data=np.array([10.0 + i, 20.0 + i]))  # fmt: skip
            writer.write(k_conn, ns, TYPES.serialize_cdr(k, FLOAT64))
    demo = store.load_demonstration(
        import_bag(store, tmp_path / "bag", skill="cork_seat", joints=JOINTS)
    )
    assert demo.stiffness.tolist() == [[10.0, 20.0], [11.0, 21.0], [12.0, 22.0]]


def test_export_refuses_times_bag_stamps_cannot_hold(store, tmp_path):
    before_1970 = store.add_demonstration(
        t=np.array([0.0, 1.0]), position=np.zeros((2, 1)), velocity=np.zeros((2, 1)),
        torque=np.zeros((2, 1)), skill="cork_seat", joints=["a"], start_time=-5.0,
    )  # fmt: skip
    with pytest.raises(InvalidInputError, match="do not fit ROS time stamps"):
        export_bag(store, before_1970, tmp_path / "early")
    dense = store.add_demonstration(
        t=np.array([0.0, 1e-10]), position=np.zeros((2, 1)), velocity=np.zeros((2, 1)),
        torque=np.zeros((2, 1)), skill="cork_seat", joints=["a"], start_time=1.7e9,
    )  # fmt: skip
    with pytest.raises(InvalidInputError, match="samples closer than 1 ns"):
        export_bag(store, dense, tmp_path / "dense")


@pytest.mark.parametrize("failure", ["store_full", "damaged_last_message", "interrupt"])
def test_failed_bag_import_leaves_nothing(tmp_path, monkeypatch, failure):
    from compliant_demo.store import bags

    messages = _ramp(3 * CHUNK_SAMPLES // 2)
    with DemoStore(tmp_path / "store.sqlite") as store:
        kept = store.add_demonstration(
            t=np.arange(3) / 1e3, position=np.ones((3, 2)), velocity=np.ones((3, 2)),
            torque=np.ones((3, 2)), skill="cork_seat", joints=JOINTS,
        )  # fmt: skip
        expected: type[BaseException] = InvalidInputError
        if failure == "damaged_last_message":
            ns = messages[-1][0]
            messages[-1] = (ns, _joint_state(ns, ["elbow", "shoulder", "wrist"], [0, np.nan, 0],
                                             [0, 0, 0], [0, 0, 0]))  # fmt: skip
        elif failure == "store_full":
            (pages,) = store.db.execute("PRAGMA page_count").fetchone()
            store.db.execute(f"PRAGMA max_page_count = {pages + 8}")
            expected = StoreFullError
        else:
            real = bags._BagSamples.on_joint_state
            calls = []

            def interrupted(self, *args):
                calls.append(1)
                if len(calls) == CHUNK_SAMPLES + 10:
                    raise KeyboardInterrupt
                return real(self, *args)

            monkeypatch.setattr(bags._BagSamples, "on_joint_state", interrupted)
            expected = KeyboardInterrupt
        bag = write_bag(tmp_path / "bag", "mcap", messages)
        with pytest.raises(expected):
            import_bag(store, bag, skill="cork_seat", joints=JOINTS)
        store.db.execute("PRAGMA max_page_count = 1073741823")
        assert [info.id for info in store.find_demonstrations()] == [kept]
        assert store.load_demonstration(kept).position.tolist() == [[1.0, 1.0]] * 3
        assert store.integrity_check() == ["ok"]


def test_sample_budget_is_refused_with_the_message(store, tmp_path, monkeypatch):
    from compliant_demo.store import io as store_io

    monkeypatch.setattr(store_io, "MAX_IMPORT_BYTES", 10 * 7 * 8)  # ten samples of two joints
    bag = write_bag(tmp_path / "bag", "mcap", _ramp(11))
    with pytest.raises(InvalidInputError, match="message 10 on '/joint_states': 616 bytes of "
                       "samples, beyond the import limit of 560 bytes"):  # fmt: skip
        import_bag(store, bag, skill="cork_seat", joints=JOINTS)
    _assert_nothing_stored(store)
