"""Import and export of single demonstrations as CSV and NPZ files, and the checks every importer
shares (limits, metadata, joint names, storing all or nothing).

CSV layout (one demonstration per file, UTF-8):

* optional metadata lines first, each ``# key: <JSON value>`` (keys in :data:`METADATA_KEYS`);
  the first line of an exported file is ``# compliant_demo demonstration``;
* one header row ``t,position.<j1>,...,velocity.<j1>,...,torque.<j1>,...[,stiffness.<j1>,...]``
  with the joints in the same order in every channel, quoted as RFC 4180 CSV where a name holds
  a comma, a quote or a line break;
* one row per sample: ``t`` in s relative to ``start_time``, then rad, rad/s, N*m, N*m/rad,
  written with 17 significant digits so every float64 comes back exactly (``nan`` stiffness is
  "no estimate").

NPZ layout (``numpy.savez``, read without pickles): arrays ``t`` (n,), ``position``,
``velocity``, ``torque`` and optionally ``stiffness`` (n, n_joints), ``joints`` (n_joints,)
unicode, and ``metadata``, a 0-d unicode array holding the JSON metadata above.

Every import reads and checks the whole file before it writes anything, then stores the
demonstration in one transaction: a failed import leaves nothing behind. An import holds at most
:data:`MAX_IMPORT_BYTES` of samples and :data:`MAX_JOINTS` joints; NPZ sizes are checked from the
zip and ``.npy`` headers before any array is read.
"""

from __future__ import annotations

import csv
import json
import math
import os
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from itertools import chain, islice
from pathlib import Path
from typing import IO, Any

import numpy as np

from compliant_demo.exceptions import InvalidInputError, NotFoundError, one_line
from compliant_demo.store._codec import CHANNELS, validate_flags
from compliant_demo.store._npz_reader import read_npz
from compliant_demo.store.core import CHUNK_SAMPLES, DemoStore
from compliant_demo.store.records import DEMO_SOURCES, DEMO_STATUSES, Demonstration

__all__ = [
    "CSV_MAGIC",
    "METADATA_KEYS",
    "MAX_JOINTS",
    "MAX_IMPORT_BYTES",
    "MAX_LINE_BYTES",
    "sample_columns",
    "demonstration_metadata",
    "check_metadata",
    "check_joint_names",
    "check_budget",
    "begin_fields",
    "parse_json",
    "store_import",
    "export_csv",
    "import_csv",
    "export_npz",
    "import_npz",
    "naming_file",
    "Progress",
    "writing",
]

CSV_MAGIC = "# compliant_demo demonstration"
METADATA_KEYS = (
    "id", "skill", "operator", "tags", "notes", "source", "nominal_rate_hz", "start_time",
    "status", "status_reason", "flags",
)  # fmt: skip
MAX_JOINTS = 64
"""Most joints one demonstration file may carry (the store's joint limit has the same value)."""
MAX_IMPORT_BYTES = 2**30
"""Most sample data (float64 bytes over all channels, 1 GiB) one import holds in memory."""
MAX_LINE_BYTES = 2**20
"""Longest CSV line (and header), bytes."""
_TEXT_KEYS = ("id", "skill", "operator", "notes")
_NUMBER_KEYS = ("nominal_rate_hz", "start_time")
_EXPECTED = {
    "status_reason": "a string or null",
    "tags": "a list of strings",
    "flags": "an object of counters",
    "nominal_rate_hz": "a finite number",
    "start_time": "a finite number",
    "source": "one of " + ", ".join(DEMO_SOURCES),
    "status": "one of " + ", ".join(DEMO_STATUSES),
}


#: A reader's progress callback: called with (done, total) in the reader's unit (bytes of a
#: file, messages of a bag) as it reads; the command line turns it into a bar.
Progress = Callable[[int, int], None]


@contextmanager
def writing(path: str | os.PathLike[str], mode: str) -> Iterator[IO[Any]]:
    """Open ``path`` for an export; an unwritable path is an InvalidInputError naming it."""
    try:
        handle: IO[Any] = (
            open(path, mode) if "b" in mode else open(path, mode, encoding="utf-8", newline="")
        )
    except OSError as exc:
        raise InvalidInputError(f"cannot write {str(path)!r}: {exc.strerror}") from None
    with handle:
        yield handle


def _regular_file(path: str | os.PathLike[str], kind: str) -> Path:
    """``path`` when it is a regular file (a directory or a named pipe is refused)."""
    file = Path(path)
    if not file.exists():
        raise NotFoundError(f"{kind} {str(path)!r} does not exist")
    if not file.is_file():
        raise InvalidInputError(f"{kind} {str(path)!r} is not a regular file")
    return file


@contextmanager
def _reading(file: Path, source: str) -> Iterator[IO[bytes]]:
    """``file`` opened for reading; an unreadable file is an InvalidInputError naming it."""
    try:
        handle = file.open("rb")
    except OSError as exc:
        raise InvalidInputError(f"cannot read {source!r}: {exc.strerror}") from None
    with handle:
        yield handle


@contextmanager
def naming_file(source: str) -> Iterator[None]:
    """Prefix the file's name to InvalidInputErrors raised inside (unless they name it already)."""
    try:
        yield
    except InvalidInputError as exc:
        if source in str(exc):
            raise
        raise InvalidInputError(f"{source}: {one_line(exc)}") from None


def sample_columns(demo: Demonstration) -> tuple[list[str], np.ndarray]:
    """Column names and the (n, 1 + channels * n_joints) table of the CSV layout."""
    names = ["t"]
    blocks = [demo.t[:, None]]
    for channel in CHANNELS:
        values = getattr(demo, channel)
        if values is not None:
            names += [f"{channel}.{joint}" for joint in demo.joints]
            blocks.append(values)
    return names, np.hstack(blocks)


def demonstration_metadata(demo: Demonstration) -> dict[str, Any]:
    """The metadata every export carries (:data:`METADATA_KEYS` of the demonstration's info)."""
    info = demo.info.to_dict()
    return {key: info[key] for key in METADATA_KEYS}


# -- checks shared by the importers --------------------------------------------------------------


def parse_json(text: str, where: str) -> Any:
    """JSON text as Python values; malformed, too deeply nested or oversized numbers are an
    InvalidInputError naming ``where``."""
    try:
        return json.loads(text)
    except RecursionError:
        raise InvalidInputError(f"{where}: JSON nested too deeply") from None
    except ValueError as exc:  # JSONDecodeError, and integers beyond Python's digit limit
        detail = str(exc).split(";")[0]
        raise InvalidInputError(f"{where}: not valid JSON ({detail})") from None


def _is_number(value: object) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def check_metadata(metadata: Mapping[str, Any], where: Callable[[str], str]) -> dict[str, Any]:
    """Check the types of the known metadata keys (unknown keys are dropped).

    ``where(key)`` names the place of a key in the file (file, line, field) for the error.
    """
    checked: dict[str, Any] = {}
    for key in METADATA_KEYS:
        if key not in metadata:
            continue
        value = metadata[key]
        if key == "status_reason":
            ok = value is None or isinstance(value, str)
        elif key in ("source", "status"):
            ok = value in (DEMO_SOURCES if key == "source" else DEMO_STATUSES)
        elif key in _TEXT_KEYS:
            ok = isinstance(value, str)
        elif key in _NUMBER_KEYS:
            ok = _is_number(value) and math.isfinite(value)
        elif key == "tags":
            ok = isinstance(value, list) and all(isinstance(tag, str) for tag in value)
        else:  # flags
            ok = isinstance(value, dict)
        if not ok:
            expected = _EXPECTED.get(key, "a string")
            shown = repr(value)
            shown = shown if len(shown) <= 60 else shown[:57] + "..."
            raise InvalidInputError(
                f"{where(key)}: metadata {key!r} must be {expected}, got {shown}"
            )
        if key == "flags":
            try:
                value = validate_flags(value)
            except InvalidInputError as exc:
                raise InvalidInputError(f"{where(key)}: metadata 'flags': {exc}") from None
        checked[key] = value
    return checked


def check_joint_names(names: Sequence[object], where: str) -> list[str]:
    """Joint names as a list: at most :data:`MAX_JOINTS` distinct non-empty strings (linear)."""
    if len(names) > MAX_JOINTS:
        raise InvalidInputError(
            f"{where}: {len(names)} joints, at most {MAX_JOINTS} joints are allowed"
        )
    if not names:
        raise InvalidInputError(f"{where}: joints must name at least one joint")
    seen: set[str] = set()
    for name in names:
        if not isinstance(name, str) or not name.strip():
            raise InvalidInputError(f"{where}: joint name {name!r} is not a non-empty string")
        if name in seen:
            raise InvalidInputError(f"{where}: joints must be distinct, got {name!r} twice")
        seen.add(name)
    return [str(name) for name in names]


def begin_fields(
    metadata: Mapping[str, Any], overrides: Mapping[str, Any], keep_id: bool
) -> dict[str, Any]:
    """Keywords of ``begin_demonstration`` from checked metadata and the caller's overrides."""
    kwargs: dict[str, Any] = {
        key: metadata[key]
        for key in ("skill", "operator", "tags", "notes", "nominal_rate_hz", "start_time")
        if key in metadata
    }
    kwargs["source"] = metadata.get("source", "imported")
    if keep_id and metadata.get("id") is not None:
        kwargs["demo_id"] = metadata["id"]
    kwargs.update({k: v for k, v in overrides.items() if v is not None})
    if "skill" not in kwargs:
        raise InvalidInputError("skill is not in the file's metadata: give skill=...")
    return kwargs


def store_import(
    store: DemoStore,
    samples: Mapping[str, np.ndarray],
    begin: Mapping[str, Any],
    *,
    source: str,
    status: str = "complete",
    status_reason: str | None = None,
    flags: Mapping[str, Any] | None = None,
) -> str:
    """Store a whole demonstration read from ``source`` in one transaction; returns its id.

    ``samples`` holds ``t`` and the channels. A status "recording" becomes "incomplete" (the
    import is not a live recording). When ``status_reason`` is set it is written right after;
    should that fail, the new demonstration is deleted again, so nothing partial stays.
    """
    final = "incomplete" if status == "recording" else status
    with naming_file(source):
        demo_id = store.add_demonstration(
            t=samples["t"],
            position=samples["position"],
            velocity=samples["velocity"],
            torque=samples["torque"],
            stiffness=samples.get("stiffness"),
            status=final,
            flags=dict(flags) if flags else None,
            **begin,
        )
        if status_reason is not None:
            try:
                store.mark_status(demo_id, final, status_reason)
            except BaseException:
                store.delete_demonstration(demo_id, force=True)
                raise
    return demo_id


def check_budget(n_values: int, where: str) -> None:
    """Refuse an import once it holds more than :data:`MAX_IMPORT_BYTES` of float64 samples."""
    if n_values * 8 > MAX_IMPORT_BYTES:
        raise InvalidInputError(
            f"{where}: {n_values * 8} bytes of samples, beyond the import limit of "
            f"{MAX_IMPORT_BYTES} bytes (split the demonstration)"
        )


# -- CSV -----------------------------------------------------------------------------------------


def export_csv(store: DemoStore, demo_id: str, path: str | os.PathLike[str]) -> Path:
    """Write one demonstration as CSV (layout in the module docstring); returns the path."""
    demo = store.load_demonstration(demo_id)
    names, table = sample_columns(demo)
    target = Path(path)
    with writing(target, "w") as handle:
        handle.write(CSV_MAGIC + "\n")
        for key, value in demonstration_metadata(demo).items():
            handle.write(f"# {key}: {json.dumps(value)}\n")
        csv.writer(handle, lineterminator="\n").writerow(names)
        np.savetxt(handle, table, fmt="%.17g", delimiter=",")
    return target


class _CsvLines:
    """Numbered, decoded lines of a CSV file, each at most :data:`MAX_LINE_CHARS` long."""

    def __init__(
        self, handle: IO[bytes], source: str, size: int, progress: Progress | None
    ) -> None:
        self.handle, self.source, self.size, self.progress = handle, source, size, progress
        self.number = 0
        self.done = 0

    def __iter__(self) -> Iterator[tuple[int, str]]:
        return self

    def __next__(self) -> tuple[int, str]:
        raw = self.handle.readline(MAX_LINE_BYTES + 1)
        if not raw:
            raise StopIteration
        self.number += 1
        self.done += len(raw)
        if self.progress is not None:
            self.progress(self.done, self.size)
        if len(raw) > MAX_LINE_BYTES:
            raise InvalidInputError(
                f"{self.source}, line {self.number}: longer than {MAX_LINE_BYTES} bytes"
            )
        if self.number == 1 and raw.startswith(b"\xef\xbb\xbf"):
            raw = raw[3:]
        try:
            line = raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            column = raw[: exc.start].count(b",")
            raise InvalidInputError(
                f"{self.source}, line {self.number}, field {column + 1}: not UTF-8 text "
                f"({exc.reason} at byte {exc.start} of the line)"
            ) from None
        return self.number, line


def _read_csv_head(lines: _CsvLines, source: str) -> tuple[dict[str, Any], list[str], int]:
    """Metadata (checked), header cells and the number of the header's last line."""
    metadata: dict[str, Any] = {}
    where: dict[str, int] = {}
    for number, line in lines:
        if not line.startswith("#"):
            return _checked_head(metadata, where, source), _header_cells(line, lines), lines.number
        key, colon, value = line[1:].partition(":")
        key = key.strip()
        if not colon or key not in METADATA_KEYS:
            continue
        if key in where:
            raise InvalidInputError(
                f"{source}, line {number}: metadata {key!r} repeats line {where[key]}"
            )
        where[key] = number
        metadata[key] = parse_json(value, f"{source}, line {number}, metadata {key!r}")
    raise InvalidInputError(f"{source}: no header row (t,position.<joint>,...) found")


def _checked_head(metadata: dict[str, Any], where: dict[str, int], source: str) -> dict[str, Any]:
    return check_metadata(metadata, lambda key: f"{source}, line {where[key]}")


def _header_cells(first: str, lines: _CsvLines) -> list[str]:
    """The header row as cells; a quoted joint name may continue on the next lines."""
    size = [0]

    def physical() -> Iterator[str]:
        for text in chain([first], (line for _, line in lines)):
            size[0] += len(text)
            if size[0] > MAX_LINE_BYTES:
                raise InvalidInputError(
                    f"{lines.source}, line {lines.number}: header longer than {MAX_LINE_BYTES} "
                    "characters"
                )
            yield text

    try:
        return next(csv.reader(physical(), strict=True))
    except (csv.Error, StopIteration) as exc:
        raise InvalidInputError(
            f"{lines.source}, line {lines.number}: header is not valid CSV ({one_line(exc)})"
        ) from None


def _joint_layout(header: Sequence[str], where: str) -> tuple[list[str], bool]:
    """Joint names and whether stiffness is present, from a CSV header; checks the layout."""
    if not header or header[0] != "t":
        raise InvalidInputError(f"{where}: first column must be 't', got {list(header[:1])!r}")
    if len(header) - 1 > len(CHANNELS) * MAX_JOINTS:
        raise InvalidInputError(
            f"{where}: {len(header) - 1} sample columns, at most {MAX_JOINTS} joints are allowed"
        )
    by_channel: dict[str, list[str]] = {}
    for column in header[1:]:
        channel, dot, joint = column.partition(".")
        if not dot or not joint:
            raise InvalidInputError(f"{where}: column {column!r} is not '<channel>.<joint>'")
        if channel not in CHANNELS:
            raise InvalidInputError(
                f"{where}: column {column!r} has unknown channel {channel!r} "
                f"(expected one of {', '.join(CHANNELS)})"
            )
        by_channel.setdefault(channel, []).append(joint)
    for channel in CHANNELS[:3]:
        if channel not in by_channel:
            raise InvalidInputError(f"{where}: no {channel}.<joint> columns")
    joints = check_joint_names(by_channel["position"], where)
    known = set(joints)
    for channel, names in by_channel.items():
        if names != joints:
            extra = [n for n in names if n not in known]
            present = set(names)
            missing = [n for n in joints if n not in present]
            detail = (
                f"joint {extra[0]!r}"
                if extra
                else f"no column for joint {missing[0]!r}"
                if missing
                else f"order {names}"
            )
            raise InvalidInputError(
                f"{where}: {channel} columns do not match the position columns ({detail}; "
                f"position joints: {', '.join(joints)})"
            )
    expected = [f"{c}.{j}" for c in CHANNELS if c in by_channel for j in joints]
    if list(header[1:]) != expected:
        raise InvalidInputError(
            f"{where}: columns must be grouped by channel in the order "
            f"{', '.join(c for c in CHANNELS if c in by_channel)}"
        )
    return joints, "stiffness" in by_channel


def import_csv(
    store: DemoStore,
    path: str | os.PathLike[str],
    *,
    keep_id: bool = True,
    progress: Progress | None = None,
    **overrides: Any,
) -> str:
    """Import one demonstration from CSV; returns its id.

    Parameters
    ----------
    store : DemoStore
    path : path of the CSV file (layout in the module docstring)
    keep_id : bool
        Reuse the file's ``id`` when it has one (refused if the store holds it already).
    progress : callable(done, total), optional
        Called with the bytes read so far and the file's size, line by line.
    **overrides
        ``skill``, ``operator``, ``tags``, ``notes``, ``source``, ``nominal_rate_hz``,
        ``start_time`` replacing the file's metadata (``skill`` is needed if the file has none).

    Raises
    ------
    InvalidInputError
        Naming the file, the line (counting every line of the file) and the field.
    """
    source = str(path)
    file = _regular_file(path, "CSV file")
    size = file.stat().st_size
    with _reading(file, source) as handle:
        lines = _CsvLines(handle, source, size, progress)
        metadata, header, header_line = _read_csv_head(lines, source)
        joints, with_stiffness = _joint_layout(header, f"{source}, line {header_line}")
        with naming_file(source):
            begin = begin_fields(metadata, overrides, keep_id)
        begin.update(joints=joints, with_stiffness=with_stiffness)
        table = _csv_table(lines, source, header)
    columns = np.split(table[:, 1:], 4 if with_stiffness else 3, axis=1)
    samples = {"t": table[:, 0], **dict(zip(CHANNELS, columns, strict=False))}
    return store_import(
        store, samples, begin, source=source, status=metadata.get("status", "complete"),
        status_reason=metadata.get("status_reason"), flags=metadata.get("flags"),
    )  # fmt: skip


def _csv_table(lines: _CsvLines, source: str, names: Sequence[str]) -> np.ndarray:
    """Every data row of the file as one (n, columns) float64 table, checked row by row."""
    tables: list[np.ndarray] = []
    n_values = 0
    last_t: float | None = None
    while True:
        batch = list(islice(lines, CHUNK_SAMPLES))
        if not batch:
            break
        table = _parse_rows(batch, source, names)
        _check_rows(table, batch, source, names, last_t)
        last_t = float(table[-1, 0])
        n_values += table.size
        check_budget(n_values, f"{source}, line {batch[-1][0]}")
        tables.append(table)
    if not tables:
        raise InvalidInputError(f"{source}: no samples after the header (nothing to import)")
    return np.concatenate(tables) if len(tables) > 1 else tables[0]


def _parse_rows(batch: list[tuple[int, str]], source: str, names: Sequence[str]) -> np.ndarray:
    texts = [line.rstrip("\r\n") for _, line in batch]
    for (number, _), text in zip(batch, texts, strict=True):
        if not text.strip():
            raise InvalidInputError(f"{source}, line {number}: empty row")
    try:
        table = np.loadtxt(texts, delimiter=",", dtype=np.float64, ndmin=2, comments=None)
    except ValueError:
        table = None
    if table is not None and table.shape[1] == len(names):
        return table
    for (number, _), text in zip(batch, texts, strict=True):
        cells = text.split(",")
        if len(cells) != len(names):
            raise InvalidInputError(
                f"{source}, line {number}: {len(cells)} values, the header has {len(names)} columns"
            )
        for name, cell in zip(names, cells, strict=True):
            try:
                float(cell)
            except ValueError:
                shown = cell if len(cell) <= 30 else cell[:27] + "..."
                raise InvalidInputError(
                    f"{source}, line {number}, column {name!r}: {shown!r} is not a number"
                ) from None
            if "_" in cell or not cell.isascii():
                raise InvalidInputError(
                    f"{source}, line {number}, column {name!r}: {cell!r} is not a plain number"
                )
    raise InvalidInputError(
        f"{source}, lines {batch[0][0]}-{batch[-1][0]}: a value is not a plain decimal number"
    )


def _check_rows(
    table: np.ndarray,
    batch: list[tuple[int, str]],
    source: str,
    names: Sequence[str],
    last_t: float | None,
) -> None:
    """Finite values (stiffness may be NaN, "no estimate") and strictly increasing time."""
    bad = ~np.isfinite(table)
    stiffness = [i for i, name in enumerate(names) if name.startswith("stiffness.")]
    if stiffness:
        bad[:, stiffness] = np.isinf(table[:, stiffness])
    if bad.any():
        row, column = (int(i) for i in np.argwhere(bad)[0])
        cell = batch[row][1].rstrip("\r\n").split(",")[column]
        shown = cell if len(cell) <= 30 else cell[:27] + "..."
        raise InvalidInputError(
            f"{source}, line {batch[row][0]}, column {names[column]!r}: {shown!r} is not finite"
        )
    t = table[:, 0]
    steps = np.diff(t, prepend=-np.inf if last_t is None else last_t)
    if not (steps > 0).all():
        row = int(np.argmax(~(steps > 0)))
        previous = float(t[row - 1]) if row else last_t
        word = "repeats" if steps[row] == 0 else "goes backwards"
        raise InvalidInputError(
            f"{source}, line {batch[row][0]}, column 't': time {word} "
            f"({float(t[row])!r} after {previous!r})"
        )


# -- NPZ -----------------------------------------------------------------------------------------


def export_npz(store: DemoStore, demo_id: str, path: str | os.PathLike[str]) -> Path:
    """Write one demonstration as NPZ (layout in the module docstring); returns the path."""
    demo = store.load_demonstration(demo_id)
    arrays = {
        "t": demo.t,
        "position": demo.position,
        "velocity": demo.velocity,
        "torque": demo.torque,
        "joints": np.array(demo.joints, dtype=str),
        "metadata": np.array(json.dumps(demonstration_metadata(demo))),
    }
    if demo.stiffness is not None:
        arrays["stiffness"] = demo.stiffness
    target = Path(path)
    with writing(target, "wb") as handle:
        np.savez(handle, **arrays)  # type: ignore[arg-type]  # numpy's stub: allow_pickle
    return target


def import_npz(
    store: DemoStore, path: str | os.PathLike[str], *, keep_id: bool = True, **overrides: Any
) -> str:
    """Import one demonstration from NPZ (never unpickles); returns its id.

    ``keep_id`` and ``overrides`` as for :func:`import_csv`. Member sizes and array shapes are
    checked from the zip and ``.npy`` headers before anything is decompressed: more than
    :data:`MAX_IMPORT_BYTES` of arrays, or more than :data:`MAX_JOINTS` joints, is refused.
    """
    source = str(path)

    file = _regular_file(path, "NPZ file")
    with _reading(file, source) as handle:
        contents = read_npz(handle, source, max_bytes=MAX_IMPORT_BYTES, max_joints=MAX_JOINTS)
    for key in ("t", "position", "velocity", "torque", "joints"):
        if key not in contents:
            raise InvalidInputError(f"{source}: array {key!r} is missing")
    names = contents["joints"]
    if names.ndim != 1:
        raise InvalidInputError(
            f"{source}: 'joints' must be a one-dimensional array of names, got shape {names.shape}"
        )
    if names.dtype.kind != "U":
        raise InvalidInputError(
            f"{source}: 'joints' must be a unicode array, got dtype {names.dtype}"
        )
    joints = check_joint_names([str(j) for j in names], f"{source}, array 'joints'")
    metadata: dict[str, Any] = {}
    if "metadata" in contents:
        text = contents["metadata"]
        if text.dtype.kind != "U" or text.ndim != 0:
            raise InvalidInputError(
                f"{source}: 'metadata' must be a 0-d unicode array of JSON, got dtype "
                f"{text.dtype} and shape {text.shape}"
            )
        raw = parse_json(str(text), f"{source}, array 'metadata'")
        if not isinstance(raw, dict):
            raise InvalidInputError(f"{source}: 'metadata' must be a JSON object, got {raw!r}")
        metadata = check_metadata(raw, lambda key: f"{source}, array 'metadata'")
    with naming_file(source):
        begin = begin_fields(metadata, overrides, keep_id)
    begin["joints"] = joints
    return store_import(
        store, contents, begin, source=source, status=metadata.get("status", "complete"),
        status_reason=metadata.get("status_reason"), flags=metadata.get("flags"),
    )  # fmt: skip
