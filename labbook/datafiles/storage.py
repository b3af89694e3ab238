"""Content-addressed storage of acquired files through Django's storage API.

A file is stored under a name made from its SHA-256 alone (``acquired/ab/cd/abcd…``), never
from anything a user typed, so an upload cannot choose where it lands or overwrite another
file; the same bytes are stored once. Thumbnails are derived and stored beside them
(``thumbnails/ab/abcd….png``).
"""

from __future__ import annotations

import hashlib
import os
import tempfile
from dataclasses import dataclass
from pathlib import PurePosixPath
from typing import BinaryIO

from django.conf import settings
from django.core.files import File
from django.core.files.storage import default_storage

CHUNK = 1 << 20  # 1 MiB: large enough that hashing runs at hashlib's in-memory speed


class UploadTooLarge(ValueError):
    pass


@dataclass(frozen=True)
class StoredBytes:
    sha256: str
    size_bytes: int
    storage_name: str
    already_stored: bool
    #: Over the limit the bytes were kept anyway (``keep_oversized``); no reader may read them.
    oversized: bool = False


class _Spool(File):
    """The spooled copy, offered to the storage as a temporary file: the file-system
    storage then moves it into place (one rename) instead of copying the bytes a second
    time; any other backend reads it as an ordinary file."""

    def temporary_file_path(self) -> str:
        return self.file.name


def content_name(sha256: str) -> str:
    return f"acquired/{sha256[:2]}/{sha256[2:4]}/{sha256}"


def thumbnail_name(sha256: str) -> str:
    return f"thumbnails/{sha256[:2]}/{sha256}.png"


def safe_display_name(name: str) -> str:
    """The last path component of an uploaded name, for display only (never a path)."""
    cleaned = PurePosixPath(str(name).replace("\\", "/")).name.strip()
    cleaned = "".join(ch for ch in cleaned if ch.isprintable())
    return (cleaned or "unnamed")[:255]


def hash_stream(stream: BinaryIO) -> tuple[str, int]:
    """(SHA-256 hex, size) of a stream, read in 1 MiB chunks into one reused buffer."""
    digest = hashlib.sha256()
    size = 0
    readinto = getattr(stream, "readinto", None)
    if readinto is None:
        while chunk := stream.read(CHUNK):
            digest.update(chunk)
            size += len(chunk)
        return digest.hexdigest(), size
    buffer = memoryview(bytearray(CHUNK))
    while read := readinto(buffer):
        digest.update(buffer[:read])
        size += read
    return digest.hexdigest(), size


def store_stream(
    stream: BinaryIO, *, max_bytes: int | None = None, keep_oversized: bool = False
) -> StoredBytes:
    """Copy ``stream`` to a temporary file while hashing it, then keep it under its hash.

    One pass over the bytes: the copy and the hash share each chunk (1 MiB at a time, so
    the memory does not grow with the file). A stream over ``max_bytes`` is refused with
    ``UploadTooLarge`` and nothing is kept, unless ``keep_oversized``: then it is stored all
    the same and the result says ``oversized`` (``ingest``/``watch`` keep every file).
    """
    limit = settings.LABBOOK_MAX_UPLOAD_BYTES if max_bytes is None else max_bytes
    digest = hashlib.sha256()
    size = 0
    spool_dir = os.path.join(settings.MEDIA_ROOT, "incoming")
    os.makedirs(spool_dir, exist_ok=True)
    with tempfile.NamedTemporaryFile(dir=spool_dir, delete=False) as spool:
        try:
            while chunk := stream.read(CHUNK):
                size += len(chunk)
                if size > limit and not keep_oversized:
                    raise UploadTooLarge(f"the file is larger than the limit of {limit:,} bytes")
                digest.update(chunk)
                spool.write(chunk)
        except BaseException:
            spool.close()
            os.unlink(spool.name)
            raise
    sha256 = digest.hexdigest()
    name = content_name(sha256)
    oversized = size > limit
    try:
        if default_storage.exists(name):
            return StoredBytes(sha256, size, name, already_stored=True, oversized=oversized)
        with open(spool.name, "rb") as handle:
            saved = default_storage.save(name, _Spool(handle, name=name))
        if saved != name:  # a concurrent upload of the same bytes won the race
            default_storage.delete(saved)
        return StoredBytes(sha256, size, name, already_stored=False, oversized=oversized)
    finally:
        if os.path.exists(spool.name):  # moved into place by a file-system storage
            os.unlink(spool.name)


def store_bytes(data: bytes, **kwargs) -> StoredBytes:
    import io

    return store_stream(io.BytesIO(data), **kwargs)


def open_stored(storage_name: str) -> BinaryIO:
    return default_storage.open(storage_name, "rb")


def read_stored(storage_name: str) -> bytes:
    with open_stored(storage_name) as handle:
        return handle.read()


def verify_stored(storage_name: str, sha256: str) -> str:
    """'ok', 'changed' or 'missing' for a stored file against its recorded hash."""
    if not default_storage.exists(storage_name):
        return "missing"
    with open_stored(storage_name) as handle:
        found, _ = hash_stream(handle)
    return "ok" if found == sha256 else "changed"
