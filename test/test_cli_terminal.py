"""Stored text reaches the terminal escaped: escape sequences, carriage returns and newlines in
metadata (an imported file, the recorder's ``operator`` parameter) can neither drive the
terminal nor forge a table row."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from cli_support import run_cli
from store_support import add_demo

from compliant_demo.display import format_value, printable
from compliant_demo.store import DemoStore

HOSTILE = "op\x1b[31mred\r\nabcd1234  cork_seat  forged\u202e\x07"
SHOWN = "op\\x1b[31mred\\r\\nabcd1234  cork_seat  forged\\u202e\\x07"


@pytest.fixture
def hostile_store(tmp_path):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        demo = add_demo(store, seed=1, operator=HOSTILE, notes="line one\nline two",
                        tags=["t\x1b]0;title\x07"])  # fmt: skip
        add_demo(store, seed=2, operator="operator_b")
    return path, demo


def _no_raw_controls(text: str) -> None:
    assert not any(ch in text for ch in "\x1b\r\x07\u202e"), repr(text)


def test_printable_escapes_control_and_format_characters():
    assert printable(HOSTILE) == SHOWN
    assert printable("shoulder \u00e9l\u00e8ve 0.5 rad") == "shoulder \u00e9l\u00e8ve 0.5 rad"
    assert printable("\x00\x7f\x85\u2028\udcff") == "\\x00\\x7f\\x85\\u2028\\udcff"


def test_list_shows_hostile_metadata_escaped_on_its_own_row(hostile_store, capsys):
    path, demo = hostile_store
    status, out, _ = run_cli(capsys, "list", "--store", path)
    assert status == 0
    _no_raw_controls(out)
    lines = out.splitlines()
    assert len(lines) == 3  # header and two demonstrations: no forged row
    row = next(line for line in lines if line.startswith(demo[:8]))
    assert SHOWN in row and "t\\x1b]0;title\\x07" in row


def test_show_escapes_every_stored_text(hostile_store, capsys):
    path, demo = hostile_store
    status, out, _ = run_cli(capsys, "show", demo[:8], "--store", path)
    assert status == 0
    _no_raw_controls(out)
    assert f"operator         {SHOWN}" in out.splitlines()
    assert "notes            line one\\nline two" in out.splitlines()


def test_json_keeps_the_exact_text(hostile_store, capsys):
    path, demo = hostile_store
    status, out, _ = run_cli(capsys, "show", demo[:8], "--store", path, "--json")
    _no_raw_controls(out)
    assert json.loads(out)["operator"] == HOSTILE


def test_metadata_from_an_imported_file_is_escaped_too(hostile_store, tmp_path, capsys):
    path, demo = hostile_store
    exported = tmp_path / "demo.csv"
    assert run_cli(capsys, "export", demo, "--format", "csv", "--out", exported,
                   "--store", path)[0] == 0  # fmt: skip
    target = tmp_path / "target.sqlite"
    status, out, _ = run_cli(capsys, "import", exported, "--store", target)
    assert status == 0
    _no_raw_controls(out)
    assert len(out.splitlines()) == 2 and SHOWN in out


def test_format_value_rounds_and_labels_joints():
    assert format_value(0.2966991225842374) == "0.2967"
    assert format_value([0.2966991225842374, 0.3468823384357105], ("shoulder", "elbow")) == (
        "shoulder 0.2967, elbow 0.3469"
    )
    assert format_value([1.0, None], ("shoulder", "elbow")) == "shoulder 1, elbow -"
    assert format_value([1.0, 2.0, 3.0], ("shoulder", "elbow")) == "1,2,3"
    assert format_value(float("nan")) == "nan" and format_value(None) == "-"
    assert format_value(Path("a\nb")) == "a\\nb"
