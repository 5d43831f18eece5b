"""Fuzz the store's write API (``begin_demonstration``, ``append_chunk``) with hypothesis.

Arrays of every dtype, byte order, memory layout, shape and value (complex, boolean, object,
strings, big-endian, float32, NaN, inf, time going backwards) and metadata of any type: each call
either stores exactly what a float64 view of its input holds, or raises InvalidInputError and
leaves the store as it was. Nothing is converted with a loss, silently.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from reliability_support import (
    FUZZ_SETTINGS,
    JOINTS,
    JUNK_SCALARS,
    count_case,
    no_hang,
    sample_digest,
    write_demo,
)

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.store import DemoStore

N = 6

_dtypes = st.sampled_from(
    ["<f8", ">f8", "<f4", ">f4", "<i4", ">i8", "u1", "?", "<c16", "O", "<U3", "<f2", "<M8[s]"]
)


@st.composite
def _channel(draw: st.DrawFn, shape: tuple[int, ...]) -> np.ndarray:
    dtype = np.dtype(draw(_dtypes))
    if dtype.kind in "fc":
        width = 16 if dtype.itemsize == 2 else 32
        elements = st.floats(-6e4, 6e4, width=width)
        if draw(st.integers(0, 9)) == 0:
            elements = st.floats(allow_nan=True, allow_infinity=True, width=width)
        array = draw(hnp.arrays(dtype.newbyteorder("="), shape, elements=elements))
        array = array.astype(dtype)
    elif dtype.kind == "O":
        array = np.empty(shape, dtype=object)
        array.flat[:] = draw(st.lists(st.one_of(st.floats(-5, 5), st.none(), st.text(max_size=2)),
                                      min_size=array.size, max_size=array.size))  # fmt: skip
    else:
        array = draw(hnp.arrays(dtype, shape))
    if draw(st.booleans()) and array.ndim == 2:
        array = np.asfortranarray(array)
    return array


@st.composite
def _chunk(draw: st.DrawFn) -> dict[str, np.ndarray]:
    rows = draw(st.sampled_from([N, N, N, N - 1, 0]))
    columns = draw(st.sampled_from([len(JOINTS), len(JOINTS), 1, 3]))
    t = 10.0 + np.arange(N) / 1000.0
    if draw(st.integers(0, 4)) == 0:
        t = draw(_channel((N,)))
    return {
        "t": t,
        **{name: draw(_channel((rows, columns))) for name in ("position", "velocity", "torque",
                                                              "stiffness")},
    }  # fmt: skip


class _Target(tuple):
    def __repr__(self) -> str:
        return "write_target"


@pytest.fixture(scope="module")
def write_target(tmp_path_factory: pytest.TempPathFactory) -> Iterator[_Target]:
    store = DemoStore(str(tmp_path_factory.mktemp("writes") / "writes.sqlite"))
    reference = write_demo(store, 121, 2)
    yield _Target((store, reference, sample_digest(store.load_demonstration(reference))))
    store.close()


def _float64_view(array: np.ndarray) -> np.ndarray | None:
    """What a lossless float64 reading of ``array`` holds, or None when there is none."""
    if array.dtype.kind not in "fiub":
        return None
    return np.asarray(array, dtype=np.float64)


@FUZZ_SETTINGS
@given(chunk=_chunk())
def test_fuzz_append_chunk(write_target: _Target, chunk: dict[str, np.ndarray]) -> None:
    store, reference, digest = write_target
    demo_id = store.begin_demonstration(skill="cork_seat", joints=JOINTS)
    with no_hang(10.0), warnings.catch_warnings():
        warnings.simplefilter("error")  # a ComplexWarning or a cast warning is a silent loss
        try:
            store.append_chunk(demo_id, **chunk)
        except InvalidInputError:
            assert store.load_demonstration(demo_id).t.size == 0
        else:
            loaded = store.load_demonstration(demo_id)
            for name, given_array in chunk.items():
                expected = _float64_view(given_array)
                assert expected is not None, f"{name} of dtype {given_array.dtype} was accepted"
                np.testing.assert_array_equal(getattr(loaded, name), expected, err_msg=name)
    store.finish_demonstration(demo_id, "rejected")
    assert sample_digest(store.load_demonstration(reference)) == digest
    count_case("store_write")


_metadata = st.fixed_dictionaries(
    {},
    optional={
        "skill": st.one_of(st.just("cork_seat"), JUNK_SCALARS),
        "operator": JUNK_SCALARS,
        "tags": st.one_of(st.lists(JUNK_SCALARS, max_size=3), JUNK_SCALARS),
        "notes": JUNK_SCALARS,
        "source": st.one_of(st.sampled_from(["recorded", "imported", "simulated"]), JUNK_SCALARS),
        "nominal_rate_hz": JUNK_SCALARS,
        "start_time": JUNK_SCALARS,
        "with_stiffness": JUNK_SCALARS,
        "demo_id": st.one_of(st.uuids().map(str), JUNK_SCALARS),
    },
)


@FUZZ_SETTINGS
@given(metadata=_metadata, joints=st.one_of(st.just(JOINTS), st.lists(JUNK_SCALARS, max_size=3)))
def test_fuzz_begin_demonstration(write_target: _Target, metadata: dict, joints: object) -> None:
    store, reference, digest = write_target
    before = {info.id for info in store.find_demonstrations()}
    metadata.setdefault("skill", "cork_seat")
    with no_hang(10.0):
        try:
            demo_id = store.begin_demonstration(joints=joints, **metadata)
        except InvalidInputError:
            assert {info.id for info in store.find_demonstrations()} == before
        else:
            info = store.get_info(demo_id)
            assert info.status == "recording" and list(info.joints) == list(joints)
            store.finish_demonstration(demo_id, "rejected")
    assert sample_digest(store.load_demonstration(reference)) == digest
    count_case("store_begin")


@pytest.mark.parametrize(
    "values",
    [np.full((N, 2), 1 + 2j), np.zeros((N, 2), dtype="datetime64[s]"),
     np.zeros((N, 2), dtype="timedelta64[ms]")],
    ids=["complex", "datetime64", "timedelta64"],
)  # fmt: skip
def test_non_real_sample_arrays_are_invalid_input(
    write_target: _Target, values: np.ndarray
) -> None:
    # Found by the fuzzer: complex positions lost their imaginary part with only a ComplexWarning,
    # and datetime64 velocities were stored as numbers.
    store = write_target[0]
    demo_id = store.begin_demonstration(skill="cork_seat", joints=JOINTS)
    good = np.zeros((N, 2))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(InvalidInputError, match=r"position"):
            store.append_chunk(demo_id, np.arange(N) / 1000.0, values, good, good, good + 1.0)
    store.finish_demonstration(demo_id, "rejected")
