"""A raw ``where`` stays one boolean expression over the demonstration columns: it can never end
early, comment out or replace the other filters, the sort or the limit, read another table, or
run a second statement."""

from __future__ import annotations

import pytest
from store_support import add_demo

from compliant_demo.cli import main
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.store import DemoStore


@pytest.fixture
def store(tmp_path):
    path = tmp_path / "where.sqlite"
    with DemoStore(path) as opened:
        for seed in range(3):
            add_demo(opened, seed=seed, operator=f"operator_{seed}")
        yield opened


ESCAPES = [
    ("1) OR (1=1", "closes a parenthesis it never opened"),
    ("1=1 --", r"holds a comment \('--' at 4\)"),
    ("1=1 /* the rest", r"holds a comment \('/\*' at 4\)"),
    ("1=1; DELETE FROM chunks", "holds ';' at 3: one condition only"),
    ("(1=1", "leaves 1 parenthesis\\(es\\) open"),
    ("skill = 'cork_seat", "has an unterminated ' quote"),
    ("1 UNION SELECT id FROM demonstrations", r"holds a subquery \(SELECT\)"),
    ("1 UNION ALL", 'was refused: near "UNION"'),
    ("id IN (SELECT id FROM demonstrations UNION SELECT 'x')", r"holds a subquery \(SELECT\)"),
    ("(select count(*) FROM chunks) > 0", r"holds a subquery \(select\)"),
    ("id IN (VALUES ('x'))", r"holds a subquery \(VALUES\)"),
    ("n_samples > (WITH n AS (SELECT 1) SELECT 2)", r"holds a subquery \(WITH\)"),
    ("id IN pragma_table_info('chunks')", "SQLITE_\\w+ is not allowed|reading .* is not allowed"),
    ("length(zeroblob(1000000000)) > 0", r"the function zeroblob\(\) is not allowed"),
    ("   ", "is empty"),
]


@pytest.mark.parametrize(("where", "message"), ESCAPES)
def test_an_escape_from_the_condition_is_refused(store, where, message):
    with pytest.raises(InvalidInputError, match=f"^where = .*{message}"):
        store.find_demonstrations(skill="no_such", where=where, limit=1)
    with pytest.raises(InvalidInputError, match=f"^where = .*{message}"):
        store.count_demonstrations(skill="no_such", where=where)
    assert store.count_demonstrations() == 3 and store.integrity_check() == ["ok"]


def test_the_other_filters_and_the_limit_always_apply(store):
    assert list(store.find_demonstrations(skill="no_such", where="1=1 OR 1=1")) == []
    assert len(list(store.find_demonstrations(where="1=1 OR 1=1", limit=1))) == 1
    assert store.count_demonstrations(operator="operator_1", where="1 OR 1") == 1


def test_quoted_text_may_hold_any_character(store):
    tricky = "notes = '1) OR (1=1 -- ; /* it''s SELECT' OR \"operator\" = ?"
    found = list(store.find_demonstrations(where=tricky, where_args=["operator_2"]))
    assert [info.operator for info in found] == ["operator_2"]
    named = store.find_demonstrations(where="[operator] = :who", where_args={"who": "operator_0"})
    assert [info.operator for info in named] == ["operator_0"]


def test_cli_refuses_an_escape_naming_where(store, capsys):
    status = main(["list", "--store", str(store.path), "--skill", "no_such",
                   "--where", "1) OR (1=1"])  # fmt: skip
    err = capsys.readouterr().err
    assert status == 2 and "where = '1) OR (1=1' closes a parenthesis" in err
