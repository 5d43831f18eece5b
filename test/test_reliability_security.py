"""Security: safe YAML and NumPy loading, no shell, confined export paths, file modes, SQL.

The static checks walk the syntax tree of every module of the package, so a new call site cannot
slip past them; each checker is first shown to flag a known-bad snippet, so the test can fail.
"""

from __future__ import annotations

import ast
import os
import sqlite3
import stat
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from reliability_support import JOINTS, sample_digest, write_demo

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import JointParams, load_yaml_model
from compliant_demo.store import DemoStore

PACKAGE_DIR = Path(__file__).resolve().parent.parent / "compliant_demo"

# Calls that hand a string to a shell, whatever their arguments.
_SHELL_CALLS = {
    ("os", "system"),
    ("os", "popen"),
    ("subprocess", "getoutput"),
    ("subprocess", "getstatusoutput"),
    ("asyncio", "create_subprocess_shell"),
}
# Loaders that can build arbitrary objects from file content.
_UNSAFE_LOADERS = {
    ("yaml", "unsafe_load"),
    ("yaml", "full_load"),
    ("pickle", "load"),
    ("pickle", "loads"),
    ("marshal", "loads"),
    ("dill", "load"),
}


def _dotted(node: ast.AST) -> tuple[str, ...]:
    parts: list[str] = []
    while isinstance(node, ast.Attribute):
        parts.append(node.attr)
        node = node.value
    if isinstance(node, ast.Name):
        parts.append(node.id)
    return tuple(reversed(parts))


def _keyword_is_true(call: ast.Call, name: str) -> bool:
    for keyword in call.keywords:
        if keyword.arg == name:
            return not (isinstance(keyword.value, ast.Constant) and not keyword.value.value)
        if keyword.arg is None:
            return True  # **kwargs could carry it; treat as unsafe
    return False


def _violations(source: str, filename: str) -> list[str]:
    """Every shell invocation or unsafe deserialisation call in ``source``."""
    found = []
    for node in ast.walk(ast.parse(source, filename)):
        if not isinstance(node, ast.Call):
            continue
        name = _dotted(node.func)
        tail = name[-2:]
        where = f"{filename}:{node.lineno}"
        if tail in _SHELL_CALLS:
            found.append(f"{where}: {'.'.join(name)} runs a shell")
        elif name[:1] == ("subprocess",) and _keyword_is_true(node, "shell"):
            found.append(f"{where}: {'.'.join(name)} with shell=True")
        elif tail in _UNSAFE_LOADERS:
            found.append(f"{where}: {'.'.join(name)} can build arbitrary objects")
        elif tail in {("yaml", "load"), ("yaml", "load_all")}:
            loader = [kw for kw in node.keywords if kw.arg == "Loader"]
            loader_name = _dotted(loader[0].value)[-1:] if loader else ()
            if loader_name not in {("SafeLoader",), ("CSafeLoader",)}:
                found.append(f"{where}: yaml.load without SafeLoader")
        elif tail[-1:] == ("load",) and tail[:1] in {("np",), ("numpy",)}:
            if _keyword_is_true(node, "allow_pickle"):
                found.append(f"{where}: numpy load with allow_pickle")
    return found


@pytest.mark.parametrize(
    "snippet, expected",
    [
        ("import os\nos.system('ls ' + name)", "runs a shell"),
        ("import subprocess\nsubprocess.run(cmd, shell=True)", "shell=True"),
        ("import subprocess\nsubprocess.Popen(cmd, **options)", "shell=True"),
        ("import yaml\nyaml.load(text, Loader=yaml.FullLoader)", "without SafeLoader"),
        ("import yaml\nyaml.unsafe_load(text)", "arbitrary objects"),
        ("import numpy as np\nnp.load(path, allow_pickle=True)", "allow_pickle"),
        ("import pickle\npickle.loads(blob)", "arbitrary objects"),
    ],
)
def test_static_checker_flags_known_bad_snippets(snippet: str, expected: str) -> None:
    found = _violations(snippet, "snippet.py")
    assert len(found) == 1 and expected in found[0], found


def test_static_checker_accepts_safe_calls() -> None:
    safe = (
        "import subprocess, yaml, numpy as np\n"
        "subprocess.run(['ls', name], shell=False, check=True)\n"
        "yaml.safe_load(text)\nyaml.load(text, Loader=yaml.SafeLoader)\n"
        "np.load(path, allow_pickle=False)\nnp.load(path)\n"
    )
    assert _violations(safe, "safe.py") == []


def test_package_never_invokes_a_shell_or_unsafe_loader() -> None:
    files = sorted(PACKAGE_DIR.rglob("*.py"))
    assert len(files) > 3, f"package sources not found under {PACKAGE_DIR}"
    found = [v for path in files for v in _violations(path.read_text(encoding="utf-8"), str(path))]
    assert found == []


@pytest.mark.parametrize(
    "payload",
    [
        "!!python/object/apply:os.system ['touch {marker}']\n",
        "name: !!python/object/apply:os.system ['touch {marker}']\n",
        "!!python/object:compliant_demo.models.JointParams {{name: x}}\n",
        "name: !!python/name:os.system\n",
    ],
)
def test_parameter_yaml_refuses_python_tags(tmp_path: Path, payload: str) -> None:
    marker = tmp_path / "executed"
    path = tmp_path / "joint.yaml"
    path.write_text(payload.format(marker=marker))
    with pytest.raises(InvalidInputError, match=r"joint\.yaml: .*YAML.*python/"):
        load_yaml_model(JointParams, path)
    assert not marker.exists()


# -- store files, SQL, import and export ---------------------------------------------------------


@pytest.fixture
def two_demo_store(tmp_path: Path) -> Iterator[tuple[DemoStore, list[str], str]]:
    """A store with two finished demonstrations; yields it, their ids and a digest of everything."""
    store = DemoStore(str(tmp_path / "secure.sqlite"))
    ids = [write_demo(store, seed, 3, tags=["seated"]) for seed in (61, 62)]
    yield store, ids, _store_digest(store)
    store.close()


def _store_digest(store: DemoStore) -> str:
    infos = sorted(store.find_demonstrations(), key=lambda info: info.id)
    parts = [repr((info.id, info.skill, info.operator, info.tags, info.status)) for info in infos]
    parts += [sample_digest(store.load_demonstration(info.id)) for info in infos]
    tables = store.db.table_names()
    return repr((parts, tables))


def test_new_store_file_is_owner_and_group_only_whatever_the_umask(tmp_path: Path) -> None:
    previous = os.umask(0)
    try:
        with DemoStore(str(tmp_path / "mode.sqlite")) as store:
            write_demo(store, 71, 1, finish=None)
            files = sorted(tmp_path.glob("mode.sqlite*"))
            assert {f.name for f in files} >= {"mode.sqlite", "mode.sqlite-wal"}
            for file in files:  # the WAL and shared-memory files hold the same samples
                mode = stat.S_IMODE(file.stat().st_mode)
                assert mode & 0o137 == 0, f"{file.name} has mode {oct(mode)}"
    finally:
        os.umask(previous)


_TEXT_INJECTIONS = [
    "x' OR '1'='1",
    "' OR 1=1 --",
    "cork_seat'; DROP TABLE chunks; --",
    "cork_seat\") OR (\"1\"=\"1",
    "%",
    "_",
]


@pytest.mark.parametrize("text", _TEXT_INJECTIONS)
@pytest.mark.parametrize("argument", ["skill", "operator", "tag", "source"])
def test_sql_injection_through_text_filters_matches_nothing(
    two_demo_store: tuple[DemoStore, list[str], str], argument: str, text: str
) -> None:
    store, _, digest = two_demo_store
    try:
        found = list(store.find_demonstrations(**{argument: text}))
    except InvalidInputError as exc:
        assert argument in str(exc)  # e.g. source is a closed set of words
    else:
        assert found == []
    assert list(store.find_demonstrations(where="skill = ?", where_args=[text])) == []
    assert _store_digest(store) == digest
    assert store.integrity_check() == ["ok"]


@pytest.mark.parametrize(
    "argument, value",
    [
        ("status", "complete' OR 1=1 --"),
        ("status", ["complete", "x') OR 1=1 --"]),
        ("started_after", "0 OR 1=1"),
        ("started_before", "9e99); DROP TABLE chunks; --"),
        ("min_duration_s", "0; DROP TABLE chunks"),
        ("order_by", "start_time; DROP TABLE chunks"),
        ("order_by", "(SELECT 1)"),
        ("order_by", "start_time desc, id; --"),
        ("order_by", "CASE WHEN 1 THEN id END"),
        ("limit", "1; DROP TABLE chunks"),
        ("where", "1=1; DROP TABLE chunks"),
        ("where", "1=1) ; DELETE FROM chunks WHERE (1=1"),
        ("where", "(SELECT count(*) FROM pragma_table_info('chunks')) > 0"),
        ("where", "load_extension('/tmp/nothing') IS NULL"),
        ("where", "0) UNION SELECT * FROM demonstrations WHERE (1"),
    ],
)
def test_sql_injection_through_checked_arguments_is_invalid_input(
    two_demo_store: tuple[DemoStore, list[str], str], argument: str, value: object
) -> None:
    store, _, digest = two_demo_store
    with pytest.raises(InvalidInputError, match=argument):
        list(store.find_demonstrations(**{argument: value}))
    assert _store_digest(store) == digest
    assert store.integrity_check() == ["ok"]


def _hostile_store(path: Path, demo_id: str) -> None:
    """A store file whose one demonstration carries ``demo_id`` (written by hand, not our API)."""
    with DemoStore(str(path)) as store:
        real_id = write_demo(store, 81, 2)
    connection = sqlite3.connect(str(path))
    connection.execute("PRAGMA foreign_keys = OFF")
    connection.execute("UPDATE chunks SET demo_id = ? WHERE demo_id = ?", (demo_id, real_id))
    connection.execute("UPDATE demonstrations SET id = ? WHERE id = ?", (demo_id, real_id))
    connection.commit()
    connection.close()


def _files_under(folder: Path) -> set[str]:
    return {str(path.relative_to(folder)) for path in folder.rglob("*")}


@pytest.mark.parametrize("file_format", ["csv", "npz", "bag"])
@pytest.mark.parametrize("absolute", [False, True], ids=["dot_dot", "absolute"])
def test_cli_export_never_writes_outside_the_chosen_folder(
    tmp_path: Path, file_format: str, absolute: bool
) -> None:
    from compliant_demo.cli import main

    # An id from a hostile store file becomes the file name under --out.
    hostile_id = str(tmp_path / "absolute_escape") if absolute else "../../escaped"
    store_path = tmp_path / "hostile.sqlite"
    _hostile_store(store_path, hostile_id)
    out = tmp_path / "exports" / "here"
    out.mkdir(parents=True)
    before = _files_under(tmp_path)
    status = main(["export", hostile_id, "--format", file_format, "--out", str(out),
                   "--store", str(store_path)])  # fmt: skip
    created = _files_under(tmp_path) - before
    assert all(name.startswith("exports/here/") for name in created), created
    assert status in (0, 2)


def test_merge_refuses_ids_that_are_not_uuids(tmp_path: Path) -> None:
    hostile = tmp_path / "hostile.sqlite"
    _hostile_store(hostile, "../../escaped")
    with DemoStore(str(tmp_path / "clean.sqlite")) as store:
        try:
            report = store.merge_from(str(hostile))
        except InvalidInputError as exc:
            assert "../../escaped" in str(exc)
        else:
            assert report.added == []
            assert [conflict.id for conflict in report.conflicts] == ["../../escaped"]
        assert list(store.find_demonstrations()) == []


@pytest.mark.parametrize("file_format", ["csv", "npz"])
def test_import_refuses_an_id_that_is_not_a_uuid(tmp_path: Path, file_format: str) -> None:
    from compliant_demo.store import io as store_io

    with DemoStore(str(tmp_path / "source.sqlite")) as source:
        demo_id = write_demo(source, 82, 2)
        exported = getattr(store_io, f"export_{file_format}")(
            source, demo_id, tmp_path / f"demo.{file_format}"
        )
    if file_format == "csv":
        text = exported.read_text().replace(demo_id, "../../escaped")
        exported.write_text(text)
    else:
        with np.load(exported, allow_pickle=False) as archive:
            arrays = {key: archive[key] for key in archive.files}
        arrays["metadata"] = np.array(str(arrays["metadata"]).replace(demo_id, "../../escaped"))
        np.savez(exported, **arrays)
    with DemoStore(str(tmp_path / "target.sqlite")) as target:
        importer = getattr(store_io, f"import_{file_format}")
        with pytest.raises(InvalidInputError, match=r"demo_id.*\.\./\.\./escaped"):
            importer(target, exported)
        assert list(target.find_demonstrations()) == []


class _Payload:
    """Unpickling this creates a directory: proof that a pickle was executed."""

    def __init__(self, marker: Path) -> None:
        self.marker = marker

    def __reduce__(self) -> tuple[object, tuple[str]]:
        return (os.mkdir, (str(self.marker),))


@pytest.mark.parametrize("array_name", ["t", "position", "joints", "metadata"])
def test_npz_with_pickled_object_arrays_is_refused(tmp_path: Path, array_name: str) -> None:
    from compliant_demo.store.io import import_npz

    marker = tmp_path / "unpickled"
    arrays: dict[str, np.ndarray] = {
        "t": np.arange(3) / 1000.0,
        "position": np.zeros((3, 2)),
        "velocity": np.zeros((3, 2)),
        "torque": np.zeros((3, 2)),
        "joints": np.array(JOINTS),
        "metadata": np.array('{"skill": "cork_seat"}'),
    }
    arrays[array_name] = np.array([_Payload(marker)], dtype=object)
    path = tmp_path / "pickled.npz"
    np.savez(path, **arrays)
    with DemoStore(str(tmp_path / "target.sqlite")) as store:
        with pytest.raises(InvalidInputError, match=r"pickled\.npz"):
            import_npz(store, path)
        assert list(store.find_demonstrations()) == []
    assert not marker.exists(), "the importer executed a pickle"


_ENTITY_BOMB = (
    '<?xml version="1.0"?><!DOCTYPE launch [<!ENTITY a "aaaaaaaaaa">'
    + "".join(f'<!ENTITY {chr(98 + i)} "{("&" + chr(97 + i) + ";") * 10}">' for i in range(8))
    + ']><launch><arg name="x" default="&i;"/></launch>'
)
_EXTERNAL_ENTITY = (
    '<?xml version="1.0"?><!DOCTYPE launch [<!ENTITY x SYSTEM "file:///etc/hostname">]>'
    '<launch><arg name="x" default="&x;"/></launch>'
)


@pytest.mark.parametrize(
    "document", [_ENTITY_BOMB, _EXTERNAL_ENTITY], ids=["entity_expansion", "external_entity"]
)
def test_launch_reader_refuses_entity_tricks(tmp_path: Path, document: str) -> None:
    # 10^9 characters from nested entities, or a local file pulled into an argument default.
    from compliant_demo.app.launch_file import read_launch_file
    from compliant_demo.exceptions import LaunchFileError

    path = tmp_path / "hostile.launch.xml"
    path.write_text(document)
    with pytest.raises(LaunchFileError, match=r"hostile\.launch\.xml: not well-formed XML"):
        read_launch_file(path)
