"""Smaller store faults: a writable store in a folder nobody may write to still lists and
verifies; damaged JSON met by a merge blames the source store; text that is not UTF-8 is
StoreCorruptError; joint names are checked in one pass and their number is bounded."""

from __future__ import annotations

import contextlib
import sqlite3
import subprocess
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from store_support import add_demo, samples

from compliant_demo.cli import main
from compliant_demo.exceptions import InvalidInputError, StoreCorruptError, StoreReadOnlyError
from compliant_demo.store import DemoStore, ReplayParameters
from compliant_demo.store._codec import MAX_JOINTS


@contextlib.contextmanager
def _file_in_read_only_folder(tmp_path: Path, store: Path,
                              copies: tuple[Path, ...] = ()) -> Iterator[Path]:
    """``store`` (still writable) bound into a read-only tmpfs folder (the tests run as root,
    whom file modes do not stop, so the folder is a read-only mount), with ``copies`` of further
    files beside it."""
    folder = tmp_path / "ro"
    folder.mkdir()
    mounted = []
    try:
        for command in (["mount", "-t", "tmpfs", "-o", "size=4m", "tmpfs", str(folder)],
                        ["touch", str(folder / store.name)],
                        *(["cp", str(copy), str(folder)] for copy in copies),
                        ["mount", "-o", "remount,ro", str(folder)],
                        ["mount", "--bind", str(store), str(folder / store.name)]):  # fmt: skip
            subprocess.run(command, check=True, capture_output=True, timeout=30)
            if command[0] == "mount" and command[1] != "-o":
                mounted.append(command[-1])
        yield folder / store.name
    finally:
        for point in reversed(mounted):
            subprocess.run(["umount", "-l", point], check=False, capture_output=True, timeout=30)


def test_writable_store_in_a_read_only_folder_lists_and_verifies(tmp_path, capsys):
    source = tmp_path / "store.sqlite"
    with DemoStore(source) as store:
        demo_id = add_demo(store)
    with _file_in_read_only_folder(tmp_path, source) as path:
        note = f"note: the folder of '{path}' is not writable: store opened read-only"
        assert main(["list", "--store", str(path), "--json"]) == 0
        out, err = capsys.readouterr()
        assert demo_id in out and err.strip() == note
        assert main(["verify", "--store", str(path)]) == 0
        out, err = capsys.readouterr()
        assert out.strip().endswith(": ok") and err.strip() == note
        with pytest.raises(StoreReadOnlyError, match="its folder is not writable .* read-only"):
            DemoStore(path)
        assert main(["mark", demo_id[:8], "rejected", "--store", str(path)]) == 2
        assert "its folder is not writable" in capsys.readouterr().err
        with DemoStore(path, read_only=True) as store:
            assert store.get_info(demo_id).status == "complete"


def test_a_read_only_folder_without_shm_file_warns_of_an_unread_wal(tmp_path):
    # the store and its -wal copied while a writer had the second demonstration in the log only
    source, copy = tmp_path / "store.sqlite", tmp_path / "copy" / "store.sqlite"
    copy.parent.mkdir()
    with DemoStore(source) as store:
        add_demo(store, seed=1)
        store.db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        add_demo(store, seed=2, n=50)
        # copied by another process: a descriptor this process closed would drop its locks
        subprocess.run(["cp", str(source), f"{source}-wal", str(copy.parent)], check=True,
                       timeout=30)
    size = Path(f"{copy}-wal").stat().st_size
    with _file_in_read_only_folder(tmp_path, copy, copies=(Path(f"{copy}-wal"),)) as path:
        with pytest.warns(UserWarning, match=rf"opened without its write-ahead log: .* the {size} "
                                             r"bytes of store\.sqlite-wal are not read"):
            store = DemoStore(path, read_only=True)
        with store:
            assert [info.n_samples for info in store.find_demonstrations()] == [200]


def test_a_wal_file_deleted_while_the_store_opens_is_no_error(tmp_path, monkeypatch):
    # the last connection of another process deletes the -wal at any moment: here just after
    # the opener saw it exist (a reader polling the recorder's store once died of it)
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        demo_id = add_demo(store)
    real_exists = Path.exists
    monkeypatch.setattr(Path, "exists",
                        lambda self: self.name.endswith("-wal") or real_exists(self))
    with DemoStore(path, read_only=True) as store:
        assert store.get_info(demo_id).status == "complete"


DAMAGED_JSON = [
    ("demonstrations", "tags"),
    ("demonstrations", "flags"),
    ("demonstrations", "joints"),
    ("skills", "payload"),
    ("campaigns", "config"),
    ("replay_results", "metrics"),
    ("replay_results", "parameters"),
]


@pytest.mark.parametrize(("table", "column"), DAMAGED_JSON)
def test_merge_blames_the_source_for_its_damaged_json(tmp_path, table, column):
    source = tmp_path / "source.sqlite"
    with DemoStore(source) as store:
        skill = store.save_skill("cork_seat", {"w": [1.0]}, demonstration_ids=[add_demo(store)],
                                 parameters={})  # fmt: skip
        campaign = store.create_campaign(skill.id, {"n_scenarios": 1})
        store.save_replay_result(skill_id=skill.id, metrics={"e": 1.0}, campaign_id=campaign,
                                 scenario_index=0,
                                 parameters=ReplayParameters(source="campaign"))  # fmt: skip
    conn = sqlite3.connect(source)
    conn.execute(f"UPDATE {table} SET {column} = '{{\"cut'")  # a write cut short
    conn.commit()
    conn.close()
    with DemoStore(tmp_path / "target.sqlite") as target:
        with pytest.raises(StoreCorruptError, match=r"^store '.*source\.sqlite': .* damaged"):
            target.merge_from(source)
        assert target.verify() == []
        list(target.find_demonstrations())  # whatever was copied reads back sound
        target.list_skills()
        for result in target.find_replay_results():
            assert result.parameters.source == "campaign"


@pytest.mark.parametrize(
    ("table", "column", "read"),
    [
        ("demonstrations", "operator", lambda s: list(s.find_demonstrations())),
        ("demonstrations", "operator", lambda s: list(s.find_demonstrations(where="n_joints > 0"))),
        ("demonstrations", "skill", lambda s: s.get_info(s.resolve_id("demonstration", "0"))),
        ("skills", "name", lambda s: s.list_skills()),
    ],
)
def test_text_that_is_not_utf8_is_store_corrupt(tmp_path, table, column, read):
    path = tmp_path / "store.sqlite"
    demo_id = "01234567-89ab-4cde-8f01-23456789abcd"
    with DemoStore(path) as store:
        store.save_skill("cork_seat", {}, demonstration_ids=[add_demo(store, demo_id=demo_id)],
                         parameters={})  # fmt: skip
    conn = sqlite3.connect(path)
    conn.execute(f"UPDATE {table} SET {column} = CAST(x'c328ff' AS TEXT)")  # invalid UTF-8
    conn.commit()
    conn.close()
    with DemoStore(path, read_only=True) as store:
        with pytest.raises(StoreCorruptError, match="damaged text in the store"):
            read(store)


def test_joint_names_are_bounded_and_checked_in_one_pass():
    names = [f"joint_{i}" for i in range(MAX_JOINTS)]
    data = samples(5, n_joints=MAX_JOINTS)
    with DemoStore(":memory:") as store:
        demo_id = store.add_demonstration(**data, skill="hand", joints=names)
        assert store.load_demonstration(demo_id, joints=names[::-1]).joints == tuple(names[::-1])
        many = [f"joint_{i}" for i in range(20_000)]
        for call in (
            lambda: store.begin_demonstration(skill="hand", joints=many),
            lambda: store.add_demonstration(**data, skill="hand", joints=[*names, "extra"]),
            lambda: store.load_demonstration(demo_id, joints=many),
        ):
            with pytest.raises(InvalidInputError, match=f"joints must name at most {MAX_JOINTS}"):
                call()
        with pytest.raises(InvalidInputError, match="joints must be distinct, got 'joint_0' twice"):
            store.begin_demonstration(skill="hand", joints=[*names[:-1], "joint_0"])
        assert np.array_equal(store.load_demonstration(demo_id).position, data["position"])
        assert store.count_demonstrations() == 1
