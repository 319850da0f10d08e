"""Snapshot bytes: an npz archive of plain arrays plus one JSON metadata entry.

Loading uses `numpy.load(..., allow_pickle=False)`, so a snapshot can hold only
numbers and never runs code. Anything unreadable, truncated, of another format
version or with the wrong contents raises SnapshotError.
"""

from __future__ import annotations

import io
import json
from collections.abc import Mapping
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine.errors import SnapshotError

FORMAT = "keelson-snapshot"
FORMAT_VERSION = 1
_META = "__meta__"


def dump(arrays: Mapping[str, NDArray[Any]], meta: Mapping[str, Any]) -> bytes:
    """npz bytes holding `arrays` and `meta` (JSON; NaN and infinity refused)."""
    if _META in arrays:
        raise ValueError(f"{_META} is reserved")
    header = {"format": FORMAT, "format_version": FORMAT_VERSION, **meta}
    text = json.dumps(header, sort_keys=True, allow_nan=False)
    buffer = io.BytesIO()
    payload = {name: np.ascontiguousarray(value) for name, value in arrays.items()}
    payload[_META] = np.frombuffer(text.encode("utf-8"), dtype=np.uint8)
    np.savez_compressed(buffer, **payload)  # type: ignore[arg-type]
    return buffer.getvalue()


def load(data: bytes) -> tuple[dict[str, NDArray[Any]], dict[str, Any]]:
    """(arrays, meta) from `dump`'s bytes; SnapshotError for anything else."""
    if not isinstance(data, bytes | bytearray | memoryview):
        raise SnapshotError("a snapshot is bytes")
    try:
        with np.load(io.BytesIO(bytes(data)), allow_pickle=False) as archive:
            arrays = {name: archive[name] for name in archive.files}
    except Exception as exc:  # noqa: BLE001 - untrusted bytes: any failure means corrupt
        # (zip, zlib and npy-header parsing raise a dozen types, SyntaxError included)
        raise SnapshotError(f"the snapshot is unreadable: {exc!r}") from exc
    raw = arrays.pop(_META, None)
    if raw is None or raw.dtype != np.uint8 or raw.ndim != 1:
        raise SnapshotError("the snapshot has no metadata")
    try:
        meta = json.loads(raw.tobytes().decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise SnapshotError(f"the snapshot metadata is not JSON: {exc}") from exc
    if not isinstance(meta, dict) or meta.get("format") != FORMAT:
        raise SnapshotError("these bytes are not a Keelson snapshot")
    if meta.get("format_version") != FORMAT_VERSION:
        raise SnapshotError(f"snapshot format version {meta.get('format_version')!r} is not "
                            f"supported (this engine reads version {FORMAT_VERSION})")
    if any(value.dtype.hasobject for value in arrays.values()):
        raise SnapshotError("the snapshot holds object arrays")
    return arrays, meta
