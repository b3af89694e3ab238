"""A corpus of hostile files: each is refused with a clear error, in bounded memory and time,
and an upload of it is kept as ``unreadable`` with that error (nothing lost, nothing run).

Truncated HDF5 and TIFF, an .npz zip bomb, headers that claim 10^6 × 10^6 pixels, complex
data, a pickled object in an .npy (which must never be unpickled), file names that try to
leave the storage, and an upload over the size limit.

The readers run in a fresh interpreter for the memory figures: its peak resident set (VmHWM)
is the high-water mark of everything (numpy, h5py's C library), and tracemalloc gives each
file's own peak of Python-visible allocations (numpy's buffers are traced).
"""

from __future__ import annotations

import io
import json
import os
import struct
import subprocess
import sys
import textwrap
import zipfile
import zlib
from pathlib import Path

import numpy as np
import pytest
from django.test import Client

from labbook.accounts.actions import mint_token
from labbook.datafiles.models import AcquiredFile

#: Peak resident memory of the reading process, all cases together (the interpreter with
#: numpy, h5py and tifffile loaded is ~120 MB of it; measured).
MAX_RSS_MB = 400
#: Python-visible allocations of one hostile file (its bytes are ≤ 1 MiB).
MAX_TRACED_MB = 64
#: Wall time to refuse one file.
MAX_SECONDS = 10.0


# --- the corpus ------------------------------------------------------------------------------


def hdf5_bytes() -> bytes:
    import h5py

    buffer = io.BytesIO()
    with h5py.File(buffer, "w") as f:
        f.create_dataset("topography", data=np.random.default_rng(1).random((64, 64)))
        f.attrs["bias_v"] = 0.1
    return buffer.getvalue()


def tiff_bytes() -> bytes:
    import tifffile

    buffer = io.BytesIO()
    tifffile.imwrite(buffer, np.random.default_rng(2).random((128, 128)).astype(np.float32))
    return buffer.getvalue()


def npy_header(shape: tuple[int, ...], descr: str = "<f4") -> bytes:
    """An .npy version 1.0 header (NEP 1, "A simple file format for NumPy arrays")."""
    body = f"{{'descr': '{descr}', 'fortran_order': False, 'shape': {shape!r}, }}".encode()
    # Padded with spaces and ended by a newline so that the data starts 64-byte aligned.
    body += b" " * ((-(10 + len(body) + 1)) % 64) + b"\n"
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(body)) + body


def zip_bomb(member_bytes: int = 256 * 1024**2, *, lie: bool = False) -> bytes:
    """An .npz of one float32 member of ``member_bytes`` zeros: ~1000× smaller deflated.
    With ``lie`` its directory claims the member inflates to only twice its deflated size
    (so a ratio check on the directory passes, and the reader must not trust it)."""
    n = int((member_bytes // 4) ** 0.5)
    header = npy_header((n, n))
    compressor = zlib.compressobj(9, zlib.DEFLATED, -15)
    chunk = bytes(1 << 20)
    deflated = [compressor.compress(header)]
    crc = zlib.crc32(header)
    left = n * n * 4
    while left:
        piece = chunk[: min(left, len(chunk))]
        deflated.append(compressor.compress(piece))
        crc = zlib.crc32(piece, crc)
        left -= len(piece)
    deflated.append(compressor.flush())
    payload = b"".join(deflated)
    info = zipfile.ZipInfo("topography.npy", date_time=(2026, 3, 2, 9, 0, 0))
    info.compress_type = zipfile.ZIP_DEFLATED
    info.CRC = crc
    info.compress_size = len(payload)
    info.file_size = len(header) + n * n * 4 if not lie else 2 * len(payload)
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        # Write the pre-deflated member as zipfile would: local header, data, directory.
        archive.fp.write(info.FileHeader())
        info.header_offset = 0
        archive.fp.write(payload)
        archive.filelist.append(info)
        archive.NameToInfo[info.filename] = info
        archive.start_dir = archive.fp.tell()
    return buffer.getvalue()


def tiff_claiming(width: int, height: int) -> bytes:
    """A little-endian baseline TIFF (TIFF 6.0, Adobe 1992) whose one IFD claims
    ``width`` × ``height`` float32 pixels in one strip of 16 bytes."""
    entries = [
        (256, 4, 1, width),  # ImageWidth, LONG
        (257, 4, 1, height),  # ImageLength
        (258, 3, 1, 32),  # BitsPerSample
        (259, 3, 1, 1),  # Compression: none
        (262, 3, 1, 1),  # PhotometricInterpretation: BlackIsZero
        (273, 4, 1, 8),  # StripOffsets: right after the header
        (277, 3, 1, 1),  # SamplesPerPixel
        (278, 4, 1, height),  # RowsPerStrip
        (279, 4, 1, 16),  # StripByteCounts
        (339, 3, 1, 3),  # SampleFormat: IEEE float
    ]
    ifd_offset = 8 + 16
    head = b"II*\x00" + struct.pack("<I", ifd_offset) + bytes(16)
    ifd = struct.pack("<H", len(entries))
    for tag, kind, count, value in entries:
        packed = struct.pack("<H", value) + b"\x00\x00" if kind == 3 else struct.pack("<I", value)
        ifd += struct.pack("<HHI", tag, kind, count) + packed
    return head + ifd + struct.pack("<I", 0)


def hdf5_claiming(shape: tuple[int, int]) -> bytes:
    import h5py

    buffer = io.BytesIO()
    with h5py.File(buffer, "w") as f:
        # Chunked and never written: the file is tiny, reading it would allocate 4 TB.
        f.create_dataset("topography", shape=shape, dtype="f4", chunks=(64, 64))
    return buffer.getvalue()


def pickled_npy(marker: Path) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, np.array([_Tripwire(str(marker))], dtype=object), allow_pickle=True)
    return buffer.getvalue()


class _Tripwire:
    """Unpickling this writes ``marker``: the proof that a reader unpickled user data."""

    def __init__(self, marker: str) -> None:
        self.marker = marker

    def __reduce__(self):
        return (Path.write_text, (Path(self.marker), "unpickled"))


def complex_npy() -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, np.ones((16, 16), dtype=np.complex64), allow_pickle=False)
    return buffer.getvalue()


@pytest.fixture(scope="module")
def marker(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("tripwire") / "UNPICKLED"


@pytest.fixture(scope="module")
def corpus(marker) -> dict[str, tuple[str, bytes]]:
    """class → (file name, bytes)."""
    h5 = hdf5_bytes()
    tif = tiff_bytes()
    found = {
        "hdf5 truncated to half": ("scan.h5", h5[: len(h5) // 2]),
        "hdf5 truncated to its superblock": ("scan.h5", h5[:96]),
        "hdf5 with a zeroed middle": (
            "scan.h5",
            h5[:800] + bytes(len(h5) - 1600) + h5[-800:],
        ),
        "tiff truncated to half": ("scan.tif", tif[: len(tif) // 2]),
        "tiff truncated to its header": ("scan.tif", tif[:8]),
        "tiff claiming 10^6 x 10^6 pixels": ("scan.tif", tiff_claiming(10**6, 10**6)),
        "hdf5 claiming 10^6 x 10^6 pixels": ("scan.h5", hdf5_claiming((10**6, 10**6))),
        "npy claiming 10^6 x 10^6 pixels": ("scan.npy", npy_header((10**6, 10**6)) + bytes(64)),
        "npy truncated data": ("scan.npy", npy_header((64, 64)) + bytes(100)),
        "npz zip bomb (256 MiB of zeros in ~256 KiB)": ("scan.npz", zip_bomb()),
        "npz bomb whose directory lies about its size": ("scan.npz", zip_bomb(lie=True)),
        "npy of complex numbers": ("scan.npy", complex_npy()),
        "npy of pickled objects": ("scan.npy", pickled_npy(marker)),
        "random bytes named .h5": ("scan.h5", os.urandom(4096)),
    }
    pickled = found["npy of pickled objects"][1]
    found["npz wrapping the pickled npy"] = ("scan.npz", _npz({"a.npy": pickled}))
    return found


def _npz(members: dict[str, bytes]) -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as archive:
        for name, data in members.items():
            archive.writestr(name, data)
    return buffer.getvalue()


# --- reading in a fresh process ----------------------------------------------------------------

_HARNESS = textwrap.dedent(
    """
    import json, os, resource, sys, time, tracemalloc
    os.environ.setdefault("DJANGO_SETTINGS_MODULE", "labbook.settings")
    from labbook.datafiles.readers import ReaderError, read_file
    import labbook.datafiles.readers.hdf5, labbook.datafiles.readers.tiff  # loaded up front
    folder = sys.argv[1]
    cases = json.load(open(os.path.join(folder, "cases.json")))
    out = {}
    for label, name in cases.items():
        data = open(os.path.join(folder, label + ".bin"), "rb").read()
        tracemalloc.start()
        started = time.perf_counter()
        try:
            read_file(name, data)
            outcome, message = "read", ""
        except ReaderError as exc:
            outcome, message = "refused", str(exc)
        except BaseException as exc:
            outcome, message = "crashed", f"{type(exc).__name__}: {exc}"
        seconds = time.perf_counter() - started
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        out[label] = {"outcome": outcome, "message": message, "seconds": seconds,
                      "traced_mb": peak / 2**20}
    # VmHWM belongs to this interpreter's own memory map; ru_maxrss would also carry the high
    # water of the forking parent (the test run) across exec on Linux.
    try:
        with open("/proc/self/status") as status:
            hwm = next(line for line in status if line.startswith("VmHWM:"))
        out["_rss_mb"] = int(hwm.split()[1]) / 1024
    except (OSError, StopIteration):
        out["_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps(out))
    """
)


@pytest.fixture(scope="module")
def outcomes(corpus, tmp_path_factory) -> dict:
    folder = tmp_path_factory.mktemp("reading")
    names = {}
    for index, (label, (name, data)) in enumerate(corpus.items()):
        key = f"case{index:02d}"
        (folder / f"{key}.bin").write_bytes(data)
        names[key] = (label, name)
    (folder / "cases.json").write_text(json.dumps({k: n for k, (_, n) in names.items()}))
    done = subprocess.run(
        [sys.executable, "-c", _HARNESS, str(folder)],
        capture_output=True,
        text=True,
        timeout=300,
        cwd=Path(__file__).resolve().parents[2],
        env={**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[2])},
    )
    assert done.returncode == 0, done.stderr[-3000:]
    raw = json.loads(done.stdout.strip().splitlines()[-1])
    return {"_rss_mb": raw.pop("_rss_mb")} | {names[k][0]: v for k, v in raw.items()}


CLASSES = [
    "hdf5 truncated to half",
    "hdf5 truncated to its superblock",
    "hdf5 with a zeroed middle",
    "tiff truncated to half",
    "tiff truncated to its header",
    "tiff claiming 10^6 x 10^6 pixels",
    "hdf5 claiming 10^6 x 10^6 pixels",
    "npy claiming 10^6 x 10^6 pixels",
    "npy truncated data",
    "npz zip bomb (256 MiB of zeros in ~256 KiB)",
    "npz bomb whose directory lies about its size",
    "npy of complex numbers",
    "npy of pickled objects",
    "npz wrapping the pickled npy",
    "random bytes named .h5",
]

#: What the refusal must say, beyond saying something.
SAYS = {
    "tiff claiming 10^6 x 10^6 pixels": "limit",
    "hdf5 claiming 10^6 x 10^6 pixels": "limit",
    "npy claiming 10^6 x 10^6 pixels": "limit",
    "npz zip bomb (256 MiB of zeros in ~256 KiB)": "zip bomb",
    "npy of pickled objects": "object",
    "npz wrapping the pickled npy": "object",
    "npy of complex numbers": "complex",
}


@pytest.mark.parametrize("label", CLASSES)
def test_each_hostile_file_is_refused_clearly_fast_and_small(label, outcomes):
    found = outcomes[label]
    assert found["outcome"] == "refused", found
    assert len(found["message"]) > 10, found
    if label in SAYS:
        assert SAYS[label] in found["message"].lower(), found["message"]
    assert found["seconds"] < MAX_SECONDS, found
    assert found["traced_mb"] < MAX_TRACED_MB, found


def test_the_whole_corpus_is_read_in_bounded_memory(outcomes):
    assert outcomes["_rss_mb"] < MAX_RSS_MB, outcomes["_rss_mb"]


def test_no_pickle_was_ever_loaded(outcomes, corpus, marker):
    assert b"UNPICKLED" in corpus["npy of pickled objects"][1]  # the tripwire is armed
    assert not marker.exists(), "a reader unpickled an uploaded object array"


# --- through the API: kept as unreadable, names that try to escape, oversized uploads -------------


@pytest.fixture
def api(member, settings, tmp_path):
    settings.MEDIA_ROOT = str(tmp_path / "files")
    _, raw = mint_token(member)
    return Client(), {"Authorization": f"Bearer {raw}"}


def upload(api, name: str, data: bytes, django_capture_on_commit_callbacks):
    client, headers = api
    body = io.BytesIO(data)
    body.name = name
    with django_capture_on_commit_callbacks(execute=True):
        return client.post(
            "/api/v1/files",
            {"file": body, "metadata": json.dumps({"kind": "topograph"})},
            headers=headers,
        )


@pytest.mark.django_db
@pytest.mark.parametrize(
    "label",
    [
        "hdf5 truncated to half",
        "tiff truncated to half",
        "npz zip bomb (256 MiB of zeros in ~256 KiB)",
        "npy of pickled objects",
        "tiff claiming 10^6 x 10^6 pixels",
    ],
)
def test_a_hostile_upload_is_kept_as_unreadable_with_its_error(
    label, corpus, api, django_capture_on_commit_callbacks
):
    name, data = corpus[label]
    response = upload(api, name, data, django_capture_on_commit_callbacks)
    assert response.status_code == 201, response.content
    record = AcquiredFile.objects.get(pk=response.json()["id"])
    assert record.status == AcquiredFile.Status.UNREADABLE
    assert len(record.error) > 10
    assert record.size_bytes == len(data)  # the bytes are kept, as uploaded


def _tree(root: Path) -> set[str]:
    return {str(p.relative_to(root)) for p in root.rglob("*") if p.is_file()}


@pytest.mark.django_db
@pytest.mark.parametrize(
    "name",
    [
        "../../etc/passwd",
        "/etc/passwd",
        "..\\..\\windows\\win.ini",
        "scan\x00.npy",
        "../../../../tmp/evil.npy",
        "C:\\evil.npy",
        "....//....//x.npy",
        "\u202escan.npy",
    ],
    ids=["dotdot", "absolute", "backslash", "nul", "deep", "drive", "dots", "bidi"],
)
def test_a_file_name_cannot_choose_where_the_bytes_land(
    name, api, settings, tmp_path, django_capture_on_commit_callbacks
):
    data = b"\x00\x01hostile name " + name.encode("utf-8", "replace")
    outside_before = _tree(tmp_path)
    response = upload(api, name, data, django_capture_on_commit_callbacks)
    assert response.status_code in (201, 400, 422), response.content
    media = Path(settings.MEDIA_ROOT)
    new = _tree(tmp_path) - outside_before
    # Everything new is under the storage root, named by content hash (or a thumbnail).
    assert all(p.startswith("files/acquired/") or p.startswith("files/thumbnails/") for p in new)
    assert not (media.parent / "etc").exists() and not Path("/tmp/evil.npy").exists()
    if response.status_code == 201:
        record = AcquiredFile.objects.get(pk=response.json()["id"])
        assert "/" not in record.original_name and "\\" not in record.original_name
        assert "\x00" not in record.original_name and record.original_name != ".."
        assert record.storage_name.startswith("acquired/") and record.sha256 in record.storage_name
    else:
        assert response.json()["detail"]


@pytest.mark.django_db
def test_an_oversized_upload_is_refused_with_413_and_nothing_kept(
    api, settings, django_capture_on_commit_callbacks
):
    settings.LABBOOK_MAX_UPLOAD_BYTES = 64 * 1024
    response = upload(api, "big.npy", bytes(64 * 1024 + 1), django_capture_on_commit_callbacks)
    assert response.status_code == 413
    assert "larger than the limit of 65,536 bytes" in response.json()["detail"]
    assert not AcquiredFile.objects.exists()
    acquired = Path(settings.MEDIA_ROOT) / "acquired"
    assert not acquired.exists() or not any(acquired.rglob("*"))
    incoming = Path(settings.MEDIA_ROOT) / "incoming"
    assert not incoming.exists() or not any(incoming.iterdir())  # the spool was removed
