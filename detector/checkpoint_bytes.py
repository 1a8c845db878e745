"""The byte container of a feed checkpoint: magic, version, JSON header, raw arrays.

:func:`pack` and :func:`unpack` know nothing of feeds: :mod:`.feed_state`
decides what goes into the header and the arrays. The uncompressed layout
itself (:func:`layout`, :func:`read_arrays`: a JSON header listing the
arrays, then their raw bytes) is shared with the stream state
(:meth:`Stream.to_bytes <leadline.detector.stream.Stream.to_bytes>`). Layout of format 2: the
8-byte magic ``LLFEED01``, a uint16 format version, a uint32 length of the
JSON header, then one zlib stream (level 1) holding the UTF-8 JSON header,
whose ``"$arrays"`` lists each array's name, number type and shape, and
the arrays' raw little-endian bytes in that order. Format 1 had a plain
JSON header and an ``.npz`` archive, loaded with ``allow_pickle=False``.
Only plain number types are accepted: nothing is unpickled, so loading a
checkpoint cannot run code.
"""

from __future__ import annotations

import io
import json
import struct
import zipfile
import zlib
from typing import Any

import numpy as np

from .errors import DataError, StateFormatError

__all__ = ["FEED_STATE_FORMAT_VERSION", "READABLE_FORMAT_VERSIONS", "layout", "pack", "read_arrays", "read_preamble",
           "unpack"]

_MAGIC = b"LLFEED01"
#: Version of the byte format written by :func:`pack`. Version 2 keeps the refit window as float32
#: departures from ``history_reference`` (:mod:`.ring`); version 1 kept float64 values.
FEED_STATE_FORMAT_VERSION = 2
#: The versions :func:`unpack` reads.
READABLE_FORMAT_VERSIONS = (1, 2)


# --------------------------------------------------------------- byte format
#: The array types a checkpoint may hold (plain numbers only: nothing to unpickle).
_ARRAY_DTYPES = frozenset({"<f8", "<f4", "|u1", "<i8", "|b1"})


def layout(header: dict[str, Any], arrays: dict[str, np.ndarray]) -> tuple[bytes, bytes]:
    """The JSON header, with the ``"$arrays"`` layout added, and the arrays' raw bytes, in order.

    Shared by the feed checkpoint (:func:`pack`) and the stream state
    (:meth:`~.stream.Stream.to_bytes`); :func:`read_arrays` reads it back.
    """
    spec, chunks = [], []
    for name in sorted(arrays):
        array = np.ascontiguousarray(arrays[name])
        if array.dtype.str not in _ARRAY_DTYPES:
            array = array.astype(array.dtype.newbyteorder("<"))
        if array.dtype.str not in _ARRAY_DTYPES:
            raise DataError(f"saved array {name!r} has type {array.dtype}, not a plain number type")
        spec.append([name, array.dtype.str, list(array.shape)])
        chunks.append(array.tobytes())
    return json.dumps({**header, "$arrays": spec}, sort_keys=True).encode("utf-8"), b"".join(chunks)


def pack(header: dict[str, Any], arrays: dict[str, np.ndarray]) -> bytes:
    """Header (JSON-serialisable) and arrays to checkpoint bytes (format 2).

    After the magic, the version and the JSON length comes one zlib stream
    (level 1): the JSON header, whose ``"$arrays"`` lists each array's
    name, dtype and shape, then the arrays' raw little-endian bytes in that
    order.
    """
    header_bytes, raw = layout(header, arrays)
    body = zlib.compress(header_bytes + raw, 1)
    return _MAGIC + struct.pack("<HI", FEED_STATE_FORMAT_VERSION, len(header_bytes)) + body


def read_preamble(data: Any, magic: bytes, what: str, readable: tuple[int, ...]) -> tuple[bytes, int, int, int]:
    """Check the magic bytes and format version of saved state; ``(data, version, header length,
    start of the header)``. Shared by the feed checkpoint and the stream state (``what`` names it).

    Raises
    ------
    StateFormatError
        Not bytes, not this kind of state, or a version not in ``readable``.
    """
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise StateFormatError(f"{what} must be bytes, got {type(data).__name__}")
    data = bytes(data)
    if len(data) < len(magic) + 6 or not data.startswith(magic):
        raise StateFormatError(f"not a leadline {what} (bad magic bytes)")
    version, header_len = struct.unpack_from("<HI", data, len(magic))
    if version not in readable:
        raise StateFormatError(f"{what} format version {version} is not supported "
                               f"(this build reads {', '.join(map(str, readable))})")
    return data, version, header_len, len(magic) + 6


def unpack(data: bytes) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """Checkpoint bytes to (header, arrays).

    Raises
    ------
    StateFormatError
        Not a leadline feed checkpoint, a format version this build does not
        read, or corrupt bytes.
    """
    data, version, header_len, start = read_preamble(data, _MAGIC, "feed checkpoint", READABLE_FORMAT_VERSIONS)
    try:
        if version == 1:  # a JSON header, then an .npz archive
            header = json.loads(data[start:start + header_len].decode("utf-8"))
            with np.load(io.BytesIO(data[start + header_len:]), allow_pickle=False) as archive:
                arrays = {name: archive[name] for name in archive.files}
        else:
            header, arrays = _read_body(zlib.decompress(data[start:]), header_len)
    except (ValueError, KeyError, TypeError, UnicodeDecodeError, OSError, zipfile.BadZipFile, EOFError,
            zlib.error) as exc:
        raise StateFormatError(f"feed checkpoint is corrupt: {exc}") from exc
    if not isinstance(header, dict):
        raise StateFormatError("feed checkpoint is corrupt: the header is not a JSON object")
    return header, arrays


def _read_body(body: bytes, header_len: int) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    return read_arrays(body, 0, header_len)


def read_arrays(data: bytes, start: int, header_len: int) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """Read back what :func:`layout` wrote, found at ``data[start:]``: (header, arrays).

    Raises
    ------
    ValueError
        The header is not a JSON object with its layout, an array type is
        not a plain number type, or the bytes do not match the layout
        (the callers name the state in their :class:`StateFormatError`).
    """
    header = json.loads(data[start:start + header_len].decode("utf-8"))
    if not isinstance(header, dict) or not isinstance(header.get("$arrays"), list):
        raise ValueError("the header is not a JSON object with its array layout")
    arrays, offset = {}, start + header_len
    for name, dtype, shape in header.pop("$arrays"):
        if dtype not in _ARRAY_DTYPES:
            raise ValueError(f"array {name!r} has type {dtype!r}, not a plain number type")
        dt = np.dtype(dtype)
        count = int(np.prod(shape, dtype=np.int64))
        end = offset + count * dt.itemsize
        if end > len(data):
            raise ValueError(f"array {name!r} runs past the end of the saved state")
        arrays[name] = np.frombuffer(data, dtype=dt, count=count, offset=offset).reshape(shape).copy()
        offset = end
    if offset != len(data):
        raise ValueError(f"{len(data) - offset} bytes after the last array")
    return header, arrays
