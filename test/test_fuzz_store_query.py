"""Fuzz every filter of ``DemoStore.find_demonstrations`` (and the CLI ``list``) with hypothesis.

Whatever the arguments, a query returns some of the stored demonstrations or raises our named
InvalidInputError; it never raises anything else, never hangs, and never changes stored data
(checked by hashing every demonstration's metadata and samples before and after).
"""

from __future__ import annotations

import contextlib
import io
import os
import subprocess
import sys
import warnings
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st
from reliability_support import (
    FUZZ_SETTINGS,
    JUNK_SCALARS,
    count_case,
    no_hang,
    sample_digest,
    write_demo,
)

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.store import DemoStore
from compliant_demo.store._schema import DEMONSTRATION_COLUMNS


class _Fixture(tuple):
    """(store, digest) with a short repr, so hypothesis reports stay readable."""

    def __repr__(self) -> str:
        return "query_store"


@pytest.fixture(scope="module")
def query_store(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[DemoStore, str]]:
    path = tmp_path_factory.mktemp("query") / "query.sqlite"
    store = DemoStore(str(path))
    specs = [
        (91, "cork_seat", "operator_a", ["seated", "soft"], "complete"),
        (92, "cork_seat", "operator_b", ["seated"], "rejected"),
        (93, "cork_pull", "operator_a", [], "incomplete"),
        (94, "cork_seat", "operator_b", ["soft"], None),
    ]
    for seed, skill, operator, tags, status in specs:
        write_demo(store, seed, 2, finish=status, skill=skill, operator=operator, tags=tags)
    yield _Fixture((store, _digest(store)))
    store.close()


def _digest(store: DemoStore) -> str:
    infos = sorted(store.find_demonstrations(), key=lambda info: info.id)
    meta = [repr(info.to_dict() | {"updated_at": 0.0}) for info in infos]
    return repr(meta + [sample_digest(store.load_demonstration(info.id)) for info in infos])


_junk = st.one_of(
    JUNK_SCALARS,
    st.binary(max_size=10),
    st.lists(st.text(max_size=10), max_size=3),
    st.dictionaries(st.text(max_size=5), st.integers(), max_size=2),
    st.datetimes(timezones=st.just(UTC)),
)
_words = st.sampled_from(
    ["cork_seat", "operator_a", "seated", "complete", "recording", "imported", "'", "--", ";",
     "%", "_", "\x00", "é", "DROP TABLE chunks", "1=1"]
)  # fmt: skip
_texty = st.one_of(_words, st.text(max_size=40), _junk)
_columns = st.sampled_from([*DEMONSTRATION_COLUMNS, "nope", "id;", "1", "rowid", ""])
_order_by = st.one_of(
    st.none(),
    st.lists(
        st.tuples(_columns, st.sampled_from(["", " asc", " DESC", " sideways"]), st.booleans()),
        min_size=1,
        max_size=3,
    ).map(lambda terms: ", ".join(("-" if neg else "") + c + d for c, d, neg in terms)),
    st.text(max_size=30),
    _junk,
)
_where = st.one_of(
    st.none(),
    st.tuples(_columns, st.sampled_from(["=", "<", ">=", "LIKE", "IS", "IN ("]), st.sampled_from(
        ["?", ":name", "'x'", "1", "NULL", "(SELECT 1)", "?)"]
    )).map(" ".join),
    st.text(max_size=40),
)  # fmt: skip
_filters = st.fixed_dictionaries(
    {},
    optional={
        "skill": _texty,
        "operator": _texty,
        "tag": _texty,
        "status": _texty,
        "source": _texty,
        "started_after": _junk,
        "started_before": _junk,
        "min_duration_s": _junk,
        "where": _where,
        "where_args": st.one_of(
            st.none(), st.lists(_junk, max_size=3), st.dictionaries(st.text(max_size=6), _junk)
        ),
        "order_by": _order_by,
        "limit": _junk,
    },
)


@FUZZ_SETTINGS
@given(filters=_filters)
def test_fuzz_find_demonstrations(query_store: tuple[DemoStore, str], filters: dict) -> None:
    store, digest = query_store
    stored = {info.id for info in store.find_demonstrations()}
    with no_hang(5.0):
        try:
            found = [info.id for info in store.find_demonstrations(**filters)]
        except InvalidInputError:
            pass
        else:
            assert set(found) <= stored
            assert len(found) == len(set(found)), "a demonstration came back twice"
    assert _digest(store) == digest
    count_case("store_query")


@FUZZ_SETTINGS
@given(
    options=st.lists(
        st.tuples(
            st.sampled_from(["--skill", "--operator", "--tag", "--since", "--until", "--where",
                             "--arg", "--order-by", "--limit", "--min-duration"]),
            # "--" is left out: argparse itself turns "--opt=--" into a non-string (CPython's).
            st.one_of(_words, st.text(alphabet=st.characters(blacklist_categories=["Cs"]),
                                      max_size=25)).filter(lambda value: "--" not in value),
        ),  # fmt: skip
        max_size=4,
    )
)
def test_fuzz_cli_list(query_store: tuple[DemoStore, str], options: list) -> None:
    from compliant_demo.cli import main

    store, digest = query_store
    argv = ["list", "--json", "--store", str(store.path)]
    for option, value in options:
        argv += [f"{option}={value}"]
    stdout, stderr = io.StringIO(), io.StringIO()
    with no_hang(5.0), contextlib.redirect_stdout(stdout), contextlib.redirect_stderr(stderr):
        try:
            status = main(argv)
        except SystemExit as exc:  # argparse refusing a value (e.g. --limit=abc) exits with 2
            status = exc.code
    assert status in (0, 2), stderr.getvalue()
    if status == 2:
        assert stderr.getvalue().strip(), "refused without saying why"
    assert _digest(store) == digest
    count_case("cli_list")


@pytest.mark.parametrize(
    "filters",
    [
        {"started_after": datetime(2020, 1, 1, tzinfo=UTC), "status": ["complete", "rejected"]},
        {"tag": ["seated", "soft"], "order_by": "-duration_s, id"},
        {
            "where": "operator = :who AND n_samples > :n",
            "where_args": {"who": "operator_b", "n": 1},
        },
    ],
)
def test_valid_filter_combinations_still_find_demonstrations(
    query_store: tuple[DemoStore, str], filters: dict
) -> None:
    # The fuzz test above must not pass merely because every query is refused.
    store, _ = query_store
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        found = list(store.find_demonstrations(**filters))
    assert found, f"{filters} found nothing"



@pytest.mark.parametrize("value", [False, 5, 3.0, b"ab"], ids=["bool", "int", "float", "bytes"])
@pytest.mark.parametrize("argument", ["tag", "status"])
def test_non_text_tag_or_status_is_invalid_input(
    query_store: tuple[DemoStore, str], argument: str, value: object
) -> None:
    # Found by the fuzzer: these raised TypeError ("'bool' object is not iterable"), and bytes
    # were iterated into integers ("got 97").
    store, _ = query_store
    with pytest.raises(InvalidInputError, match=rf"{argument}.*{value!r}"):
        list(store.find_demonstrations(**{argument: value}))


# About 2.6e10 rows for the 120 chunks of the test store: a slip of the pen, not a trick.
_ENDLESS_WHERE = "(SELECT count(*) FROM chunks a, chunks b, chunks c, chunks d, chunks e) >= 0"


@pytest.mark.slow
def test_a_where_that_never_ends_is_refused_not_a_hang(tmp_path: Path) -> None:
    # Found while fuzzing: SQLite runs such a condition for hours inside C code, where neither a
    # signal nor the caller can stop it (a recursive CTE without an end runs for ever). It runs
    # in a child process here, so a hang fails this test instead of stopping the suite.
    here = Path(__file__).resolve().parent
    script = (
        "import sys\n"
        "from reliability_support import write_demo\n"
        "from compliant_demo.exceptions import InvalidInputError\n"
        "from compliant_demo.store import DemoStore\n"
        f"store = DemoStore({str(tmp_path / 'endless.sqlite')!r})\n"
        "for seed in range(3):\n"
        "    write_demo(store, seed, 40)\n"
        "try:\n"
        f"    list(store.find_demonstrations(where={_ENDLESS_WHERE!r}))\n"
        "except InvalidInputError as exc:\n"
        "    print('refused:', exc)\n"
    )
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(here.parent), str(here)])}
    try:
        done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                              timeout=45, env=env)  # fmt: skip
    except subprocess.TimeoutExpired:
        pytest.fail("find_demonstrations(where=<a 2.6e10-row join>) still running after 45 s")
    assert done.returncode == 0, done.stderr[-2000:]
    assert done.stdout.startswith("refused: where"), done.stdout
