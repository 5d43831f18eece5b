"""Reading NPZ archives whose sizes are checked before anything is decompressed.

An NPZ file is a zip archive of ``.npy`` members. A hostile one can claim an array of hundreds
of GiB in its ``.npy`` header or decompress a few hundred KiB into gigabytes of zeros;
``numpy.load`` would allocate first and fail later. Here the zip member sizes and the ``.npy``
headers (``numpy.lib.format.read_magic`` and ``read_array_header_*``) are checked against a limit
first, arrays holding Python objects are refused without unpickling, and only the members asked
for are read.
"""

from __future__ import annotations

import zipfile
import zlib
from typing import IO

import numpy as np
from numpy.lib import format as npy_format

from compliant_demo.exceptions import InvalidInputError, one_line

__all__ = ["NPZ_MEMBERS", "MAX_TEXT_BYTES", "read_npz"]

NPZ_MEMBERS = ("t", "position", "velocity", "torque", "stiffness", "joints", "metadata")
MAX_TEXT_BYTES = 4 * 2**20
"""Largest ``joints`` or ``metadata`` member, bytes (numpy stores 4 bytes per character)."""
_TEXT_MEMBERS = ("joints", "metadata")
_NPY_MAGIC = b"\x93NUMPY"
_READERS = {
    (1, 0): npy_format.read_array_header_1_0,
    (2, 0): npy_format.read_array_header_2_0,
}


def read_npz(
    handle: IO[bytes], source: str, *, max_bytes: int, max_joints: int
) -> dict[str, np.ndarray]:
    """The arrays of :data:`NPZ_MEMBERS` found in the archive open as ``handle``.

    Parameters
    ----------
    handle : binary file open for reading, seekable
    source : str
        The file's name in error messages.
    max_bytes : int, bytes
        Most array data read over all members.
    max_joints : int
        Most entries of the ``joints`` array.

    Raises
    ------
    InvalidInputError
        Not an NPZ archive (a lone ``.npy`` file says so), damaged, holding objects, or
        beyond a limit; the message names the file, the member and the size.
    """
    if handle.read(len(_NPY_MAGIC)) == _NPY_MAGIC:
        raise InvalidInputError(
            f"{source} is a single .npy array (numpy.save), not an NPZ archive of named "
            "arrays (numpy.savez)"
        )
    handle.seek(0)
    try:
        archive = zipfile.ZipFile(handle)
    except (zipfile.BadZipFile, OSError, ValueError, EOFError) as exc:
        raise InvalidInputError(
            f"{source}: not a readable NPZ file (zip of .npy arrays): {one_line(exc)}"
        ) from None
    contents: dict[str, np.ndarray] = {}
    budget = max_bytes
    with archive:
        members = {info.filename: info for info in archive.infolist()}
        for key in NPZ_MEMBERS:
            info = members.get(f"{key}.npy")
            if info is None:
                continue
            where = f"{source}, member {info.filename!r}"
            if info.file_size > budget:
                raise InvalidInputError(
                    f"{where}: {info.file_size} bytes uncompressed, beyond the import limit of "
                    f"{max_bytes} bytes"
                )
            try:
                with archive.open(info) as member:
                    array = _read_member(member, info.file_size, where, budget, key, max_joints)
            except (zipfile.BadZipFile, OSError, EOFError, zlib.error, NotImplementedError,
                    RuntimeError) as exc:  # fmt: skip
                raise InvalidInputError(
                    f"{where}: damaged or unreadable ({one_line(exc)})"
                ) from None
            budget -= array.nbytes
            contents[key] = array
    return contents


def _read_member(
    member: IO[bytes], file_size: int, where: str, budget: int, key: str, max_joints: int
) -> np.ndarray:
    try:
        version = npy_format.read_magic(member)
        reader = _READERS.get(version)
        if reader is None:
            raise InvalidInputError(f"{where}: .npy format version {version} is not supported")
        shape, fortran_order, dtype = reader(member)
    except ValueError as exc:
        raise InvalidInputError(f"{where}: not a .npy array ({one_line(exc)})") from None
    if dtype.hasobject:
        raise InvalidInputError(f"{where}: holds Python objects (pickles), refused")
    if any(int(extent) < 0 for extent in shape):
        raise InvalidInputError(f"{where}: header claims a negative extent in shape {shape}")
    count = 1
    for extent in shape:
        count *= int(extent)
    nbytes = count * dtype.itemsize
    if key == "joints" and count > max_joints:
        raise InvalidInputError(f"{where}: {count} joints, at most {max_joints} joints are allowed")
    if key in _TEXT_MEMBERS and nbytes > MAX_TEXT_BYTES:
        raise InvalidInputError(
            f"{where}: {nbytes} bytes of text, beyond the limit of {MAX_TEXT_BYTES} bytes"
        )
    if nbytes > budget:
        raise InvalidInputError(
            f"{where}: header claims shape {tuple(shape)} of {dtype} ({nbytes} bytes), beyond "
            f"the import limit"
        )
    header_size = member.tell()
    if header_size + nbytes != file_size:
        raise InvalidInputError(
            f"{where}: header claims {nbytes} bytes of data, the member holds "
            f"{file_size - header_size}"
        )
    if dtype.itemsize == 0:
        raise InvalidInputError(f"{where}: dtype {dtype} has no size")
    data = member.read(nbytes)
    if len(data) != nbytes:
        raise InvalidInputError(f"{where}: truncated ({len(data)} of {nbytes} bytes)")
    array = np.frombuffer(data, dtype=dtype, count=count)
    return array.reshape(shape, order="F" if fortran_order else "C")
