"""Fuzz the recorder's ROS-free ingest path (``compliant_demo.ingest``) against a small oracle.

Hypothesis feeds sequences of malformed and well-formed joint-state messages (names permuted,
missing, unknown or repeated; fields of the wrong length; NaN, inf and huge values; stamps that
repeat, go backwards or jump) into a RecordingSession writing to a real store. ``ingest`` must
never raise; every counter must add up; and the stored demonstration must hold exactly the
messages a plain re-statement of the documented rules accepts, in joint order.
"""

from __future__ import annotations

import math
import tempfile
from pathlib import Path

import numpy as np
from hypothesis import given
from hypothesis import strategies as st
from reliability_support import FUZZ_SETTINGS, JOINTS, count_case, no_hang

from compliant_demo.ingest import ChunkWriter, DemonstrationRequest, RecordingSession, SampleChecker
from compliant_demo.store import DemoStore

RATE_HZ = 1000.0
EPOCH_S = 1.7e9

_value = st.one_of(
    st.floats(-10.0, 10.0),
    st.sampled_from([math.nan, math.inf, -math.inf, 1e308, -1e308, 0.0, -0.0, 5e-324]),
)
_message = st.fixed_dictionaries(
    {
        "ticks": st.one_of(st.just(1), st.integers(-3, 4), st.integers(5, 10**6)),
        "stamp_special": st.one_of(
            st.none(), st.none(), st.sampled_from([math.nan, math.inf, -math.inf, 1e300, 0.0])
        ),
        "names": st.one_of(
            st.permutations(JOINTS),
            st.lists(st.sampled_from([*JOINTS, "wrist", ""]), min_size=0, max_size=4),
        ),
        "values": st.lists(st.lists(_value, min_size=0, max_size=4), min_size=3, max_size=3),
        "right_lengths": st.booleans(),
    }
)


def _fields(message: dict) -> tuple[list[str], list[list[float]]]:
    names = list(message["names"])
    channels = []
    for values in message["values"]:
        if message["right_lengths"]:
            values = (values + [0.25] * len(names))[: len(names)]
        channels.append(values)
    return names, channels


def _oracle(stamps: list[float], messages: list[dict]) -> list[tuple[float, list[list[float]]]]:
    """The samples the documented checks keep, each as (stamp, [q, qd, tau] in JOINTS order)."""
    kept, last = [], None
    for stamp, message in zip(stamps, messages, strict=True):
        names, channels = _fields(message)
        if any(len(c) != len(names) for c in channels) or set(JOINTS) - set(names):
            continue
        column = {name: i for i, name in enumerate(names)}  # a repeated name: its last column
        ordered = [[c[column[joint]] for joint in JOINTS] for c in channels]
        if not math.isfinite(stamp) or not all(math.isfinite(v) for c in ordered for v in c):
            continue
        if last is not None and stamp <= last:
            continue
        last = stamp
        kept.append((stamp, ordered))
    return kept


@FUZZ_SETTINGS
@given(messages=st.lists(_message, min_size=1, max_size=40))
def test_fuzz_ingest_keeps_exactly_what_the_rules_accept(messages: list[dict]) -> None:
    stamps, tick = [], 0
    for message in messages:
        tick += message["ticks"]
        special = message["stamp_special"]
        stamps.append(EPOCH_S + tick / RATE_HZ if special is None else special)
    with tempfile.TemporaryDirectory() as folder, no_hang(20.0):
        path = Path(folder) / "ingest.sqlite"
        writer = ChunkWriter(lambda: DemoStore(str(path)), None, flush_interval_s=0.01)
        writer.start()
        request = DemonstrationRequest(skill="cork_seat", joints=tuple(JOINTS),
                                       operator="operator_a", nominal_rate_hz=RATE_HZ,
                                       stiffness_channel="none")  # fmt: skip
        session = RecordingSession(writer, SampleChecker(JOINTS, RATE_HZ), request, 10_000)
        assert session.start()[0]
        for stamp, message in zip(stamps, messages, strict=True):
            names, (position, velocity, effort) = _fields(message)
            session.ingest(stamp, names, position, velocity, effort)
        counters = session.counters
        kept = _oracle(stamps, messages)
        assert counters.received == len(messages)
        assert counters.accepted == len(kept)
        assert counters.received == counters.accepted + counters.rejected
        success, answer = session.stop("complete", wait_s=10.0)
        assert session.shutdown()
        if not kept:
            assert not success and "nothing stored" in answer, answer
            count_case("ingest")
            return
        assert success, answer
        with DemoStore(str(path), read_only=True) as store:
            (info,) = list(store.find_demonstrations())
            demo = store.load_demonstration(info.id)
    assert info.status == "complete" and info.start_time == kept[0][0]
    np.testing.assert_array_equal(demo.t, np.array([s for s, _ in kept]) - kept[0][0])
    for index, channel in enumerate((demo.position, demo.velocity, demo.torque)):
        np.testing.assert_array_equal(channel, np.array([values[index] for _, values in kept]))
    assert info.flags["received"] == len(messages) and info.flags["accepted"] == len(kept)
    count_case("ingest")
