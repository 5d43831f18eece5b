"""The store subcommands of ``compliant-demo``: tables by default, JSON for scripts, one-line
errors with exit status 2 for bad input."""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
from store_support import add_demo, integrity

from compliant_demo.cli import main
from compliant_demo.store import SCHEMA_VERSION, DemoStore


@pytest.fixture
def populated(tmp_path):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        ids = [
            add_demo(store, seed=1, operator="operator_a", tags=["press"], start_time=1.70e9),
            add_demo(store, seed=2, operator="operator_b", tags=["soft"], start_time=1.71e9),
        ]
    return path, ids


def _run(capsys, *argv):
    status = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return status, out, err


def test_list_table_and_json(populated, capsys):
    path, ids = populated
    status, out, _ = _run(capsys, "list", "--store", path)
    assert status == 0
    lines = out.splitlines()
    assert lines[0].split() == ["id", "skill", "operator", "status", "start", "duration_s",
                                "n_samples", "tags"]  # fmt: skip
    assert lines[1].startswith(ids[0][:8]) and "operator_a" in lines[1]
    assert len(lines) == 3
    status, out, _ = _run(capsys, "list", "--store", path, "--json", "--operator", "operator_b")
    assert [d["id"] for d in json.loads(out)] == [ids[1]]
    status, out, _ = _run(
        capsys, "list", "--store", path, "--json", "--tag", "press", "--since",
        "2023-01-01T00:00", "--where", "n_samples >= ?", "--arg", 200,
    )  # fmt: skip
    assert [d["id"] for d in json.loads(out)] == [ids[0]]


def test_show_mark_delete(populated, capsys):
    path, ids = populated
    status, out, _ = _run(capsys, "show", ids[0][:6], "--store", path)
    assert status == 0 and ids[0] in out and "range_of_motion" in out and "shoulder" in out
    status, out, _ = _run(capsys, "mark", ids[0][:8], "rejected", "--reason", "cork fell",
                          "--store", path, "--json")  # fmt: skip
    assert (
        json.loads(out)["status"] == "rejected" and json.loads(out)["status_reason"] == "cork fell"
    )
    status, out, _ = _run(capsys, "delete", ids[0], "--store", path)
    assert status == 0 and out.strip() == f"deleted {ids[0]}"
    with DemoStore(path, read_only=True) as store:
        assert [i.id for i in store.find_demonstrations()] == [ids[1]]


def test_export_import_round_trip_all_formats(populated, tmp_path, capsys):
    path, ids = populated
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    for fmt in ("csv", "npz", "bag"):
        status, out, _ = _run(capsys, "export", *ids, "--format", fmt, "--out", out_dir,
                              "--store", path, "--json")  # fmt: skip
        assert status == 0 and len(json.loads(out)) == 2
    target = tmp_path / "target.sqlite"
    files = [out_dir / f"{ids[0]}.csv", out_dir / f"{ids[1]}.npz"]
    status, out, _ = _run(capsys, "import", *files, "--store", target, "--json")
    assert status == 0 and [d["id"] for d in json.loads(out)] == ids
    # bag directories get no ".bag" suffix: readers take "*.bag" for the ROS 1 format
    # the skill and the stiffness topic come from the bag's metadata
    status, out, _ = _run(capsys, "import", out_dir / ids[0], "--new-id", "--store", target)
    assert status == 0 and "cork_seat" in out
    with DemoStore(path) as source, DemoStore(target) as copy:
        original = source.load_demonstration(ids[0])
        assert np.array_equal(copy.load_demonstration(ids[0]).position, original.position)
        from_bag = [i for i in copy.find_demonstrations() if i.id not in ids]
        assert len(from_bag) == 1 and from_bag[0].n_samples == original.info.n_samples
        assert from_bag[0].has_stiffness and from_bag[0].operator == original.info.operator


def test_merge_verify_skills(populated, tmp_path, capsys):
    path, ids = populated
    other = tmp_path / "other.sqlite"
    with DemoStore(other) as store:
        added = add_demo(store, seed=5)
        store.save_skill("cork_seat", {"w": [1.0]}, demonstration_ids=[added], parameters={})
    status, out, _ = _run(capsys, "merge", other, "--store", path, "--json")
    assert status == 0 and json.loads(out)["added"] == [added]
    status, out, _ = _run(capsys, "merge", other, "--store", path)
    assert status == 0 and out.startswith(
        "added 0, skipped 1 duplicate(s), 0 conflict(s); skill versions 0, campaigns 0, "
        "results 0 added, 1 already here"
    )
    status, out, _ = _run(capsys, "verify", "--store", path)
    assert status == 0 and out.strip() == f"schema version {SCHEMA_VERSION}: ok"
    status, out, _ = _run(capsys, "skills", "--store", other, "--json")
    assert [(s["name"], s["version"]) for s in json.loads(out)] == [("cork_seat", 1)]


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["show", "zzzzzzzz"], "no demonstration id starts with 'zzzzzzzz'"),
        (["show", " "], "demonstration id must not be empty"),
        (["list", "--order-by", "start_time; DROP TABLE chunks"], "--order-by term"),
        (["list", "--since", "yesterday"], "time 'yesterday' is not ISO 8601"),
        (["list", "--where", "1; DELETE FROM demonstrations"], "where = .* holds ';'"),
        (["import", "notes.txt"], "cannot tell the format of 'notes.txt': give --format"),
        (["import", "missing.csv"], "CSV file 'missing.csv' does not exist"),
        (["import", "some_bag", "--format", "bag"], "bag 'some_bag' does not exist"),
        (
            ["export", "FIRST", "--format", "csv", "--out", "nowhere/x.csv"],
            "cannot write 'nowhere/x.csv'",
        ),
    ],
)
def test_bad_input_gives_one_line_error(populated, capsys, monkeypatch, tmp_path, argv, message):
    path, ids = populated
    monkeypatch.chdir(tmp_path)
    argv = [ids[0] if a == "FIRST" else a for a in argv]
    status = main([*argv, "--store", str(path)])
    out, err = capsys.readouterr()
    assert status == 2, err
    assert len(err.strip().splitlines()) == 1
    assert err.startswith(f"compliant-demo {argv[0]}: error: ")
    assert re.search(message, err)
    assert integrity(path) == "ok"


def test_default_store_folder_is_created_on_first_import(tmp_path, capsys, monkeypatch):
    source = tmp_path / "source.sqlite"
    with DemoStore(source) as store:
        demo_id = add_demo(store)
    assert main(["export", demo_id, "--format", "npz", "--out", str(tmp_path / "d.npz"),
                 "--store", str(source)]) == 0  # fmt: skip
    monkeypatch.delenv("COMPLIANT_DEMO_STORE", raising=False)
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path / "data"))
    assert main(["import", str(tmp_path / "d.npz")]) == 0
    default = tmp_path / "data" / "compliant_demo" / "store.sqlite"
    assert oct(default.stat().st_mode & 0o777) == "0o640"
    with DemoStore(default, read_only=True) as store:
        assert [info.id for info in store.find_demonstrations()] == [demo_id]
    capsys.readouterr()


def test_missing_and_foreign_store_files(tmp_path, capsys):
    status = main(["list", "--store", str(tmp_path / "absent.sqlite")])
    assert status == 2
    assert "does not exist" in capsys.readouterr().err
    assert not (tmp_path / "absent.sqlite").exists()
    junk = tmp_path / "junk.sqlite"
    junk.write_bytes(b"\x00\x01not sqlite at all")
    assert main(["list", "--store", str(junk)]) == 2
    assert "is not an SQLite file" in capsys.readouterr().err
    assert junk.read_bytes() == b"\x00\x01not sqlite at all"
