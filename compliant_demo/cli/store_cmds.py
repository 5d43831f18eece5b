"""Store subcommands of ``compliant-demo``: list, show, import, export, merge, delete, mark,
skills and verify. Demonstrations are named by their UUID or any unique prefix of it."""

from __future__ import annotations

import argparse
import functools
import os
import sys
import uuid
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from compliant_demo.app.progress import ReadProgress
from compliant_demo.cli._job_options import non_negative_float
from compliant_demo.cli.common import (
    add_json_option,
    add_store_option,
    emit_json,
    emit_table,
    integer_in_range,
    iso_utc,
    store_path_of,
)
from compliant_demo.display import printable
from compliant_demo.exceptions import CompliantDemoError, InvalidInputError
from compliant_demo.store import DemoStore, store_folder_writable
from compliant_demo.store.bags import STORAGES, export_bag, import_bag
from compliant_demo.store.io import export_csv, export_npz, import_csv, import_npz

__all__ = ["register", "resolve_demo_id"]

_LIST_COLUMNS = ("id", "skill", "operator", "status", "start", "duration_s", "n_samples", "tags")
_FORMATS = ("csv", "npz", "bag")
_STATUSES = ("recording", "complete", "incomplete", "rejected")


def _open(args: argparse.Namespace, *, write: bool) -> DemoStore:
    """The store; commands that only read still open a writable file writable (never creating
    it), because only a writable connection removes SQLite's -wal/-shm files when it closes."""
    path = store_path_of(args)
    if write and args.store is None:
        path.parent.mkdir(mode=0o750, parents=True, exist_ok=True)  # first use of the default
    writable = write or (path.is_file() and os.access(path, os.W_OK))
    if writable and not write and not store_folder_writable(path):
        print(
            f"note: the folder of {str(path)!r} is not writable: store opened read-only",
            file=sys.stderr,
        )
        writable = False
    return DemoStore(path, read_only=not writable, create=write)


def resolve_demo_id(store: DemoStore, prefix: str) -> str:
    """The full id of the one demonstration whose id is or starts with ``prefix``."""
    return store.resolve_id("demonstration", prefix)


_TIME_FIELDS = ("start_time", "created_at", "updated_at")


def _unix_and_iso(unix_s: float) -> str:
    return f"{unix_s:.3f} s ({iso_utc(unix_s)})"


def _when(text: str) -> float:
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        raise InvalidInputError(f"time {text!r} is not ISO 8601 (e.g. 2026-05-01T14:00)") from None
    return (moment if moment.tzinfo else moment.replace(tzinfo=UTC)).timestamp()


def _cmd_list(args: argparse.Namespace) -> int:
    with _open(args, write=False) as store:
        infos = list(
            store.find_demonstrations(
                skill=args.skill,
                operator=args.operator,
                tag=args.tag or None,
                status=args.status or None,
                started_after=None if args.since is None else _when(args.since),
                started_before=None if args.until is None else _when(args.until),
                min_duration_s=args.min_duration,
                where=args.where,
                where_args=args.arg if args.where is not None else None,
                order_by=args.order_by,
                limit=args.limit,
            )  # fmt: skip
        )
    if args.json:
        emit_json([info.to_dict() for info in infos])
        return 0
    rows = [{**info.to_dict(), "id": info.id[:8], "start": iso_utc(info.start_time)}
            for info in infos]
    emit_table(rows, _LIST_COLUMNS)
    return 0


def _cmd_show(args: argparse.Namespace) -> int:
    with _open(args, write=False) as store:
        info = store.get_info(resolve_demo_id(store, args.demo))
    if args.json:
        emit_json(info.to_dict())
        return 0
    data = info.to_dict()
    per_joint = ("range_of_motion", "peak_abs_torque", "stiffness_min", "stiffness_max")
    emit_table(
        [
            {"field": key, "value": _unix_and_iso(value) if key in _TIME_FIELDS else value}
            for key, value in data.items()
            if key not in per_joint
        ],
        ("field", "value"),
    )
    print()
    emit_table(
        [{"joint": joint, **{k: data[k].get(joint) for k in per_joint}} for joint in info.joints],
        ("joint", *per_joint),
    )
    return 0


def _format_of(path: Path, given: str | None) -> str:
    if given is not None:
        return given
    if path.is_dir() or path.suffix == ".mcap" or path.suffix == ".db3":
        return "bag"
    if path.suffix in (".csv", ".npz"):
        return path.suffix[1:]
    raise InvalidInputError(f"cannot tell the format of {str(path)!r}: give --format")


def _cmd_import(args: argparse.Namespace) -> int:
    meta: dict[str, Any] = {
        "skill": args.skill, "operator": args.operator, "notes": args.notes,
        "tags": args.tag or None,
    }  # fmt: skip
    # Bars on a terminal for inputs that take a while: CSV over 8 MiB, bags over 20,000 messages.
    on_terminal = sys.stderr is not None and sys.stderr.isatty()
    importers: dict[str, Callable[..., str]] = {
        "csv": lambda store, path, bar: import_csv(store, path, keep_id=not args.new_id,
                                                   progress=bar, **meta),
        "npz": lambda store, path, bar: import_npz(store, path, keep_id=not args.new_id, **meta),
        "bag": lambda store, path, bar: import_bag(
            store, path, joint_topic=args.joint_topic, stiffness_topic=args.stiffness_topic,
            joints=args.joints.split(",") if args.joints else None, skip_bad=args.skip_bad,
            keep_id=not args.new_id, progress=bar, **{k: v for k, v in meta.items() if v},
        ),
    }  # fmt: skip
    added = []
    with _open(args, write=True) as store:
        for path in args.paths:
            kind = _format_of(path, args.format)
            bar = ReadProgress(path.name, "B" if kind == "csv" else "msg", on_terminal,
                               min_total=8 * 2**20 if kind == "csv" else 20_000)
            try:
                importer = functools.partial(importers[kind], bar=bar)
                added.append(store.get_info(_unreadable_named(path, importer, store)))
            finally:
                bar.close()
    if args.json:
        emit_json([info.to_dict() for info in added])
    else:
        emit_table([{**i.to_dict(), "start": iso_utc(i.start_time)} for i in added], _LIST_COLUMNS)
    return 0


def _unreadable_named(path: Path, importer: Callable[..., str], store: DemoStore) -> str:
    """Run ``importer`` on ``path``; input it cannot parse is an error naming the file.

    Metadata nested too deeply for the parser, integers too long to convert or values of a type
    the importer does not expect surface as built-in errors from deep inside the readers.
    """
    try:
        return importer(store, path)
    except (CompliantDemoError, OSError):
        raise
    except RecursionError:
        raise InvalidInputError(f"{str(path)!r}: metadata nested too deeply") from None
    except (ValueError, TypeError) as exc:
        reason = str(exc).split(";")[0].splitlines()[0] if str(exc) else type(exc).__name__
        raise InvalidInputError(f"{str(path)!r}: unreadable metadata ({reason[:120]})") from None


def _export_target(out: Path, demo_id: str, fmt: str) -> Path:
    """Where to export one demonstration: ``out`` itself, or ``out/<uuid>.<fmt>`` for a folder.

    The file name comes from the id only once it is a canonical UUID, so an id planted in a
    foreign store ("../../x", "/etc/x") cannot write outside ``out``.
    """
    if not out.is_dir():
        return out
    try:
        canonical = str(uuid.UUID(demo_id))
    except ValueError:
        canonical = None
    if canonical != demo_id:
        raise InvalidInputError(f"demonstration id {demo_id!r} is not a UUID: not exported")
    target = out / f"{canonical}.{fmt}"
    if not target.resolve().is_relative_to(out.resolve()):
        raise InvalidInputError(f"export of {demo_id!r} would leave {str(out)!r}: refused")
    return target


def _cmd_export(args: argparse.Namespace) -> int:
    written = []
    with _open(args, write=False) as store:
        ids = [resolve_demo_id(store, prefix) for prefix in args.demos]
        if len(ids) > 1 and not args.out.is_dir():
            raise InvalidInputError(f"--out {str(args.out)!r} must be a directory for many ids")
        for demo_id in ids:
            target = _export_target(args.out, demo_id, args.format)
            if args.format == "bag":
                target = target.with_suffix("") if target.suffix == ".bag" else target
                export_bag(store, demo_id, target, storage=args.storage)
            else:
                {"csv": export_csv, "npz": export_npz}[args.format](store, demo_id, target)
            written.append({"id": demo_id, "path": str(target)})
    if args.json:
        emit_json(written)
    else:
        emit_table(written, ("id", "path"))
    return 0


def _cmd_merge(args: argparse.Namespace) -> int:
    with _open(args, write=True) as store:
        report = store.merge_from(args.other)
    if args.json:
        emit_json(report.to_dict())
        return 0
    print(
        f"added {len(report.added)}, skipped {len(report.skipped_duplicates)} duplicate(s), "
        f"{len(report.conflicts)} conflict(s); skill versions {len(report.skills_added)}, "
        f"campaigns {len(report.campaigns_added)}, results {len(report.results_added)} added, "
        f"{report.records_skipped} already here"
    )
    if report.conflicts:
        emit_table([{"id": c.id, "reason": c.reason} for c in report.conflicts], ("id", "reason"))
    return 1 if report.conflicts else 0


def _cmd_delete(args: argparse.Namespace) -> int:
    with _open(args, write=True) as store:
        ids = [resolve_demo_id(store, prefix) for prefix in args.demos]
        for demo_id in ids:
            store.delete_demonstration(demo_id, force=args.force)
    if args.json:
        emit_json({"deleted": ids})
    else:
        print("\n".join(f"deleted {printable(demo_id)}" for demo_id in ids))
    return 0


def _cmd_mark(args: argparse.Namespace) -> int:
    with _open(args, write=True) as store:
        info = store.mark_status(resolve_demo_id(store, args.demo), args.status, args.reason)
    if args.json:
        emit_json(info.to_dict())
    else:
        print(f"{printable(info.id)} is now {printable(info.status)}")
    return 0


def _cmd_skills(args: argparse.Namespace) -> int:
    with _open(args, write=False) as store:
        records = store.list_skills()
    rows: list[dict[str, Any]] = [
        {"id": r.id, "name": r.name, "version": r.version, "created": iso_utc(r.created),
         "demonstrations": len(r.demonstration_ids), "parameters": r.parameters}
        for r in records
    ]  # fmt: skip
    if args.json:
        emit_json(rows)
    else:
        emit_table(
            [{**row, "id": row["id"][:8]} for row in rows],
            ("id", "name", "version", "created", "demonstrations"),
        )
    return 0


def _cmd_verify(args: argparse.Namespace) -> int:
    with _open(args, write=False) as store:
        problems = store.verify()
        version = store.schema_version
    if args.json:
        emit_json({"ok": not problems, "schema_version": version, "problems": problems})
    elif not problems:
        print(f"schema version {version}: ok")
    else:
        print(f"schema version {version}: {len(problems)} finding(s)")
        for problem in problems:
            print(printable(problem))
    return 1 if problems else 0


def _sub(
    subparsers: Any, name: str, handler: Callable[[argparse.Namespace], int], help_text: str
) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(name, help=help_text, description=help_text)
    add_store_option(parser)
    add_json_option(parser)
    parser.set_defaults(handler=handler)
    return parser


def register(subparsers: Any) -> None:
    """Add the store subcommands to the ``compliant-demo`` parser."""
    p = _sub(subparsers, "list", _cmd_list, "list demonstrations matching filters")
    p.add_argument("--skill", help="only demonstrations of this skill")
    p.add_argument("--operator", help="only this operator's demonstrations")
    p.add_argument("--tag", action="append", help="required tag (repeat for several)")
    p.add_argument("--status", action="append", choices=_STATUSES,
                   help="only this status (repeat for several; default: any)")
    p.add_argument("--since", help="started at or after this ISO 8601 time (UTC if no zone)")
    p.add_argument("--until", help="started before this ISO 8601 time")
    p.add_argument("--min-duration", type=non_negative_float, metavar="SECONDS",
                   help="only demonstrations at least this long, s")
    p.add_argument("--where", help="extra read-only SQL condition on demonstration columns")
    p.add_argument("--arg", action="append", default=[], help="a parameter of --where (repeat)")
    p.add_argument("--order-by", metavar="COLUMN",
                   help="column [asc|desc], or -column for descending, e.g. --order-by "
                        "-duration_s (default: start_time)")
    p.add_argument("--limit", type=integer_in_range(0), metavar="N",
                   help="show at most N demonstrations (default: all)")

    p = _sub(subparsers, "show", _cmd_show, "show one demonstration's metadata and summary")
    p.add_argument("demo", metavar="ID", help="demonstration id or unique prefix")

    p = _sub(subparsers, "import", _cmd_import, "import demonstrations from CSV, NPZ or ROS 2 bags")
    p.add_argument("paths", nargs="+", type=Path, metavar="PATH",
                   help="CSV or NPZ file, or ROS 2 bag (folder, .db3 or .mcap)")
    p.add_argument("--format", choices=_FORMATS, help="default: from the file name")
    p.add_argument("--skill", help="skill name (overrides file metadata; needed for files without)")
    p.add_argument("--operator", help="operator name (overrides file metadata)")
    p.add_argument("--notes", help="free-text notes (override file metadata)")
    p.add_argument("--tag", action="append", help="tag to give (repeat for several; replaces "
                                                  "the file's tags)")
    p.add_argument("--new-id", action="store_true", help="give imports fresh ids")
    p.add_argument(
        "--joint-topic",
        help="JointState topic in the bag (default: the bag's metadata, else /joint_states)",
    )
    p.add_argument(
        "--stiffness-topic",
        help="Float64MultiArray stiffness topic in the bag, '' for none (default: the bag's "
        "metadata, else its one topic named *stiffness*)",
    )
    p.add_argument("--joints", help="comma-separated joints to import from a bag")
    p.add_argument(
        "--skip-bad",
        action="store_true",
        help="drop non-finite or non-increasing bag samples (counted in flags)",
    )

    p = _sub(subparsers, "export", _cmd_export, "export demonstrations as CSV, NPZ or ROS 2 bags")
    p.add_argument("demos", nargs="+", metavar="ID", help="demonstration ids or unique prefixes")
    p.add_argument("--format", choices=_FORMATS, required=True, help="file format to write")
    p.add_argument("--out", type=Path, required=True, help="file (one id) or existing directory")
    p.add_argument("--storage", choices=tuple(STORAGES), default="sqlite3", help="bag storage")

    p = _sub(
        subparsers,
        "merge",
        _cmd_merge,
        "copy demonstrations, skills and results from another store file",
    )
    p.add_argument("other", type=Path, metavar="OTHER",
                   help="store file to copy from (read only; ids kept, duplicates skipped)")

    p = _sub(subparsers, "delete", _cmd_delete, "delete finished demonstrations")
    p.add_argument("demos", nargs="+", metavar="ID",
                   help="demonstration ids or unique prefixes (4+ characters)")
    p.add_argument("--force", action="store_true", help="also when a saved skill names it")

    p = _sub(subparsers, "mark", _cmd_mark, "set a finished demonstration's status")
    p.add_argument("demo", metavar="ID", help="demonstration id or unique prefix")
    p.add_argument("status", choices=("complete", "incomplete", "rejected"),
                   help="the new status")
    p.add_argument("--reason", help="why, kept with the status (e.g. 'cork fell')")

    _sub(subparsers, "skills", _cmd_skills, "list saved skill versions")
    _sub(subparsers, "verify", _cmd_verify,
         "read every stored chunk and check the file; exit 1 with one line per finding")
