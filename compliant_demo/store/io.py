"""Import and export of single demonstrations as CSV and NPZ files.

CSV layout (one demonstration per file, UTF-8):

* optional metadata lines first, each ``# key: <JSON value>`` (keys ``id``, ``skill``,
  ``operator``, ``tags``, ``notes``, ``source``, ``nominal_rate_hz``, ``start_time``, ``status``,
  ``flags``); the first line of an exported file is ``# compliant_demo demonstration``;
* one header row ``t,position.<j1>,...,velocity.<j1>,...,torque.<j1>,...[,stiffness.<j1>,...]``
  with the joints in the same order in every channel;
* one row per sample: ``t`` in s relative to ``start_time``, then rad, rad/s, N*m, N*m/rad,
  written with 17 significant digits so every float64 comes back exactly.

NPZ layout (``numpy.savez``, read with ``allow_pickle=False``): arrays ``t`` (n,),
``position``, ``velocity``, ``torque`` and optionally ``stiffness`` (n, n_joints), ``joints``
(n_joints,) unicode, and ``metadata``, a 0-d unicode array holding the JSON metadata above.
"""

from __future__ import annotations

import io as _io
import json
import os
import sys
import zipfile
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import IO, Any

import numpy as np
from tqdm import tqdm

from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.store._codec import CHANNELS
from compliant_demo.store.core import CHUNK_SAMPLES, DemoStore
from compliant_demo.store.records import Demonstration

__all__ = [
    "CSV_MAGIC",
    "METADATA_KEYS",
    "sample_columns",
    "export_csv",
    "import_csv",
    "export_npz",
    "import_npz",
    "streaming_import",
    "naming_file",
    "show_progress",
    "writing",
]

CSV_MAGIC = "# compliant_demo demonstration"
METADATA_KEYS = (
    "id", "skill", "operator", "tags", "notes", "source", "nominal_rate_hz", "start_time",
    "status", "flags",
)  # fmt: skip
_PROGRESS_BYTES = 8 * 2**20


def show_progress(progress: bool | None, size: int, threshold: int) -> bool:
    """Whether to draw a progress bar: as asked, else for large inputs on a terminal."""
    if progress is not None:
        return bool(progress)
    return size >= threshold and sys.stderr.isatty()


@contextmanager
def writing(path: str | os.PathLike[str], mode: str) -> Iterator[IO[Any]]:
    """Open ``path`` for an export; an unwritable path is an InvalidInputError naming it."""
    try:
        handle: IO[Any] = (
            open(path, mode) if "b" in mode else open(path, mode, encoding="utf-8", newline="\n")
        )
    except OSError as exc:
        raise InvalidInputError(f"cannot write {str(path)!r}: {exc.strerror}") from None
    with handle:
        yield handle


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


def _metadata(demo: Demonstration) -> dict[str, Any]:
    info = demo.info.to_dict()
    return {key: info[key] for key in METADATA_KEYS}


def export_csv(store: DemoStore, demo_id: str, path: str | os.PathLike[str]) -> Path:
    """Write one demonstration as CSV (layout in the module docstring); returns the path."""
    demo = store.load_demonstration(demo_id)
    names, table = sample_columns(demo)
    target = Path(path)
    with writing(target, "w") as handle:
        handle.write(CSV_MAGIC + "\n")
        for key, value in _metadata(demo).items():
            handle.write(f"# {key}: {json.dumps(value)}\n")
        handle.write(",".join(names) + "\n")
        np.savetxt(handle, table, fmt="%.17g", delimiter=",")
    return target


def _joint_layout(header: Sequence[str], source: str) -> tuple[list[str], bool]:
    """Joint names and whether stiffness is present, from a CSV header; checks the layout."""
    if not header or header[0] != "t":
        raise InvalidInputError(f"{source}: first column must be 't', got {header[:1]!r}")
    by_channel: dict[str, list[str]] = {}
    for column in header[1:]:
        channel, dot, joint = column.partition(".")
        if not dot or not joint:
            raise InvalidInputError(f"{source}: column {column!r} is not '<channel>.<joint>'")
        if channel not in CHANNELS:
            raise InvalidInputError(
                f"{source}: column {column!r} has unknown channel {channel!r} "
                f"(expected one of {', '.join(CHANNELS)})"
            )
        by_channel.setdefault(channel, []).append(joint)
    for channel in CHANNELS[:3]:
        if channel not in by_channel:
            raise InvalidInputError(f"{source}: no {channel}.<joint> columns")
    joints = by_channel["position"]
    for channel, names in by_channel.items():
        if names != joints:
            extra = [n for n in names if n not in joints] or [n for n in joints if n not in names]
            detail = f"joint {extra[0]!r}" if extra else f"order {names}"
            raise InvalidInputError(
                f"{source}: {channel} columns do not match the position columns ({detail}; "
                f"position joints: {', '.join(joints)})"
            )
    expected = [f"{c}.{j}" for c in CHANNELS if c in by_channel for j in joints]
    if list(header[1:]) != expected:
        raise InvalidInputError(
            f"{source}: columns must be grouped by channel in the order "
            f"{', '.join(c for c in CHANNELS if c in by_channel)}"
        )
    return joints, "stiffness" in by_channel


def _begin_kwargs(
    metadata: Mapping[str, Any], overrides: Mapping[str, Any], keep_id: bool
) -> dict[str, Any]:
    kwargs: dict[str, Any] = {
        key: metadata[key]
        for key in ("skill", "operator", "tags", "notes", "nominal_rate_hz", "start_time")
        if key in metadata
    }
    kwargs["source"] = "imported"
    if keep_id and metadata.get("id") is not None:
        kwargs["demo_id"] = metadata["id"]
    kwargs.update({k: v for k, v in overrides.items() if v is not None})
    if "skill" not in kwargs:
        raise InvalidInputError("skill is not in the file's metadata: give skill=...")
    return kwargs


@contextmanager
def naming_file(source: str) -> Iterator[None]:
    """Prefix the file's name to InvalidInputErrors raised inside (unless they name it already)."""
    try:
        yield
    except InvalidInputError as exc:
        if source in str(exc):
            raise
        raise InvalidInputError(f"{source}: {exc}") from None


def streaming_import(
    store: DemoStore,
    begin: dict[str, Any],
    chunks: Iterator[tuple[np.ndarray, dict[str, np.ndarray]]],
    *,
    source: str,
    status: str = "complete",
    flags: Callable[[], Mapping[str, int]] = dict,
) -> str:
    """Begin a demonstration, append every chunk, finish it; on any error discard it.

    ``chunks`` yields ``(t, {channel: array})``; ``flags`` is called once all chunks are in.
    Refused input raises InvalidInputError naming ``source``.
    """
    with naming_file(source):
        demo_id = store.begin_demonstration(**begin)
        try:
            for t, arrays in chunks:
                store.append_chunk(demo_id, t, **arrays)
            store.finish_demonstration(demo_id, status=status, flags=dict(flags()))
        except BaseException:
            store.discard_recording(demo_id)
            raise
    return demo_id


def _read_csv_head(handle: _io.TextIOBase, source: str) -> tuple[dict[str, Any], list[str], int]:
    metadata: dict[str, Any] = {}
    line_number = 0
    for line in handle:
        line_number += 1
        if not line.startswith("#"):
            return metadata, line.strip().split(","), line_number
        key, colon, value = line[1:].partition(":")
        key = key.strip()
        if colon and key in METADATA_KEYS:
            try:
                metadata[key] = json.loads(value)
            except json.JSONDecodeError:
                raise InvalidInputError(
                    f"{source}, line {line_number}: metadata {key!r} is not JSON: {value.strip()!r}"
                ) from None
    raise InvalidInputError(f"{source}: no header row (t,position.<joint>,...) found")


def import_csv(
    store: DemoStore,
    path: str | os.PathLike[str],
    *,
    keep_id: bool = True,
    progress: bool | None = None,
    **overrides: Any,
) -> str:
    """Import one demonstration from CSV; returns its id.

    Parameters
    ----------
    store : DemoStore
    path : path of the CSV file (layout in the module docstring)
    keep_id : bool
        Reuse the file's ``id`` when it has one (refused if the store holds it already).
    progress : bool, optional
        Draw a progress bar; by default only for files over 8 MiB on a terminal.
    **overrides
        ``skill``, ``operator``, ``tags``, ``notes``, ``source``, ``nominal_rate_hz``,
        ``start_time`` replacing the file's metadata (``skill`` is needed if the file has none).
    """
    source = str(path)
    file = Path(path)
    if not file.is_file():
        raise NotFoundError(f"CSV file {source!r} does not exist")
    size = file.stat().st_size
    with file.open("r", encoding="utf-8") as handle:
        try:
            metadata, header, header_line = _read_csv_head(handle, source)
            joints, with_stiffness = _joint_layout(header, source)
            begin = _begin_kwargs(metadata, overrides, keep_id)
            begin.update(joints=joints, with_stiffness=with_stiffness)
            status = metadata.get("status", "complete")
            if status == "recording":
                status = "incomplete"
            bar = tqdm(total=size, unit="B", unit_scale=True, desc=file.name,
                       disable=not show_progress(progress, size, _PROGRESS_BYTES))  # fmt: skip
            with bar:
                chunks = _csv_chunks(handle, source, header_line, len(joints), with_stiffness, bar)
                return streaming_import(
                    store,
                    begin,
                    chunks,
                    source=source,
                    status=status,
                    flags=lambda: metadata.get("flags", {}),
                )
        except UnicodeDecodeError as exc:
            raise InvalidInputError(
                f"{source}: not UTF-8 text ({exc.reason} at byte {exc.start} of a line)"
            ) from None


def _csv_chunks(
    handle: _io.TextIOBase,
    source: str,
    header_line: int,
    n_joints: int,
    with_stiffness: bool,
    bar: tqdm,
) -> Iterator[tuple[np.ndarray, dict[str, np.ndarray]]]:
    n_columns = 1 + n_joints * (4 if with_stiffness else 3)
    first_line = header_line + 1
    while True:
        lines = [line for _, line in zip(range(CHUNK_SAMPLES), handle, strict=False)]
        if not lines:
            return
        bar.update(sum(len(line) for line in lines))
        try:
            table = np.loadtxt(lines, delimiter=",", dtype=np.float64, ndmin=2)
        except ValueError as exc:
            raise InvalidInputError(
                f"{source}, lines {first_line}-{first_line + len(lines) - 1}: {exc}"
            ) from None
        if table.shape[1] != n_columns:
            raise InvalidInputError(
                f"{source}: rows from line {first_line} have {table.shape[1]} values, the header "
                f"has {n_columns} columns"
            )
        first_line += len(lines)
        blocks = np.split(table[:, 1:], 4 if with_stiffness else 3, axis=1)
        yield table[:, 0], dict(zip(CHANNELS, blocks, strict=False))


def export_npz(store: DemoStore, demo_id: str, path: str | os.PathLike[str]) -> Path:
    """Write one demonstration as NPZ (layout in the module docstring); returns the path."""
    demo = store.load_demonstration(demo_id)
    arrays = {
        "t": demo.t,
        "position": demo.position,
        "velocity": demo.velocity,
        "torque": demo.torque,
        "joints": np.array(demo.joints, dtype=str),
        "metadata": np.array(json.dumps(_metadata(demo))),
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

    ``keep_id`` and ``overrides`` as for :func:`import_csv`.
    """
    source = str(path)
    if not Path(path).is_file():
        raise NotFoundError(f"NPZ file {source!r} does not exist")
    try:
        with np.load(path, allow_pickle=False) as archive:
            contents = {key: archive[key] for key in archive.files}
    except (ValueError, OSError, zipfile.BadZipFile, EOFError) as exc:
        raise InvalidInputError(
            f"{source}: not a readable NPZ file without pickles: {exc}"
        ) from None
    for key in ("t", "position", "velocity", "torque", "joints"):
        if key not in contents:
            raise InvalidInputError(f"{source}: array {key!r} is missing")
    if contents["joints"].ndim != 1:
        raise InvalidInputError(
            f"{source}: 'joints' must be a one-dimensional array of names, got shape "
            f"{contents['joints'].shape}"
        )
    if contents["joints"].dtype.kind != "U":
        raise InvalidInputError(
            f"{source}: 'joints' must be a unicode array, got dtype {contents['joints'].dtype}"
        )
    metadata: dict[str, Any] = {}
    if "metadata" in contents:
        try:
            metadata = json.loads(str(contents["metadata"]))
        except json.JSONDecodeError as exc:
            raise InvalidInputError(f"{source}: 'metadata' is not JSON: {exc}") from None
        if not isinstance(metadata, dict):
            raise InvalidInputError(f"{source}: 'metadata' must be a JSON object, got {metadata!r}")
    status = metadata.get("status", "complete")
    with naming_file(source):
        begin = _begin_kwargs(metadata, overrides, keep_id)
        return store.add_demonstration(
            t=contents["t"],
            position=contents["position"],
            velocity=contents["velocity"],
            torque=contents["torque"],
            stiffness=contents.get("stiffness"),
            joints=[str(j) for j in contents["joints"]],
            status="incomplete" if status == "recording" else status,
            flags=metadata.get("flags") or None,
            **begin,
        )
