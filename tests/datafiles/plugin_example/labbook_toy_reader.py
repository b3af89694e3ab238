"""An example labbook reader plugin for an invented format, the "toy spectrum".

The format (made up for this example, like a lab's own controller format would be)::

    TOYSPEC1\\n                      8 magic bytes and a newline
    {"bias_v": 0.5, ...}\\n          one line of JSON: the header, any labbook field names
    <float32 little-endian pairs>   (bias in V, current in A) × n

The contract (docs/readers.md): ``read(name, data, metadata)`` returns None when the bytes
are not this format, a ``ParsedFile`` when they are, and raises ``ReaderError`` when they are
this format but broken. Accepting a ``limits`` keyword lets the registry pass its limits.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np

from labbook.datafiles.readers import (
    DEFAULT_LIMITS,
    ElementBudget,
    ParsedFile,
    ReaderError,
    ReaderLimits,
)
from labbook.datafiles.readers.normalise import normalise_metadata

MAGIC = b"TOYSPEC1\n"
VERSION = "0.1.0"


def write(bias_v: np.ndarray, current_a: np.ndarray, header: dict[str, Any]) -> bytes:
    """The bytes of a toy spectrum (for tests and demos)."""
    pairs = np.column_stack([bias_v, current_a]).astype("<f4")
    return MAGIC + json.dumps(header).encode() + b"\n" + pairs.tobytes()


def read(
    name: str,
    data: bytes,
    metadata: dict[str, Any] | None,
    *,
    limits: ReaderLimits = DEFAULT_LIMITS,
) -> ParsedFile | None:
    if not data.startswith(MAGIC):
        return None  # not ours: the registry tries the next reader
    end = data.find(b"\n", len(MAGIC))
    if end < 0:
        raise ReaderError("truncated: toy spectrum ends inside its header line")
    try:
        header = json.loads(data[len(MAGIC) : end])
    except ValueError as exc:
        raise ReaderError(f"corrupt: toy spectrum header is not JSON ({exc})") from exc
    payload = data[end + 1 :]
    if len(payload) % 8:
        raise ReaderError(
            f"truncated: toy spectrum data of {len(payload)} bytes is not whole pairs"
        )
    count = len(payload) // 8
    ElementBudget(limits).claim((count, 2), what="toy spectrum data")  # before allocating
    pairs = np.frombuffer(payload, dtype="<f4").reshape(count, 2).astype(np.float64)
    found, warnings = normalise_metadata(header, source="toy header")
    return ParsedFile(
        kind="spectrum",
        channels={"current": pairs[:, 1]},
        axes={"bias_v": pairs[:, 0]},
        units={"current": "A", "bias_v": "V"},
        metadata=found,
        raw_header={"header": header},
        reader=f"toy/{VERSION}",
        warnings=warnings,
    )
