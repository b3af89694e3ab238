"""The open-format readers, their registry and plugins, and every hostile file we refuse.

Each reader reads a real file written by the library that owns the format (h5py, tifffile,
numpy, our own exchange writer); each refusal is asserted by its message, and the ones that
could exhaust memory are asserted to refuse before allocating (tracemalloc peak).
No database: plain pytest.
"""

from __future__ import annotations

import ast
import io
import json
import os
import struct
import sys
import time
import tomllib
import tracemalloc
import zipfile
import zlib
from datetime import UTC, datetime
from pathlib import Path

import h5py
import numpy as np
import pytest
import tifffile

from labbook.datafiles.readers import (
    PLUGIN_GROUP,
    ParsedFile,
    ReaderError,
    ReaderLimits,
    available_readers,
    detect_format,
    plugin_status,
    read_file,
    reload_plugins,
    run_isolated,
    sidecar_paths,
)
from labbook.datafiles.readers.exchange import write_exchange
from labbook.datafiles.readers.normalise import normalise_metadata, to_si

READERS_DIR = Path(__file__).resolve().parents[2] / "labbook" / "datafiles" / "readers"
PLUGIN_EXAMPLE = Path(__file__).resolve().parent / "plugin_example"
MiB = 1024 * 1024


def assert_json_clean(parsed: ParsedFile) -> None:
    json.dumps(parsed.raw_header, allow_nan=False)
    json.dumps({k: v for k, v in parsed.metadata.items() if k != "acquired_at"}, allow_nan=False)


def peak_bytes(function) -> tuple[int, BaseException | None]:
    """Peak traced allocation while ``function`` runs, and what it raised."""
    tracemalloc.start()
    raised = None
    try:
        function()
    except BaseException as exc:  # noqa: BLE001 - returned to the test to assert on
        raised = exc
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak, raised


# --- HDF5 / NeXus ------------------------------------------------------------------------------


def nexus_image(path_or_buffer, *, z_pm: np.ndarray) -> None:
    with h5py.File(path_or_buffer, "w") as f:
        f.attrs["default"] = "entry"
        entry = f.create_group("entry")
        entry.attrs["NX_class"] = "NXentry"
        entry.attrs["default"] = "topography"
        entry["start_time"] = "2025-03-04T13:22:05+01:00"
        # Acquisition parameters as unit-carrying strings and as values with a units attribute.
        entry.attrs["bias"] = "0.5 V"
        entry.attrs["setpoint"] = "50 pA"
        entry.attrs["scan_size"] = "20 nm"
        entry.attrs["mode"] = "constant current"
        sample = entry.create_group("sample")
        sample.attrs["NX_class"] = "NXsample"
        sample["name"] = "Cu(111) #3"
        sample["temperature"] = 4.3
        sample["temperature"].attrs["units"] = "K"
        instrument = entry.create_group("instrument")
        instrument["name"] = "LTM-1"
        data = entry.create_group("topography")
        data.attrs["NX_class"] = "NXdata"
        data.attrs["signal"] = "z"
        data.attrs["auxiliary_signals"] = ["current"]
        data.attrs["axes"] = ["y", "x"]
        data.attrs["y_indices"] = 0
        data.attrs["x_indices"] = 1
        z = data.create_dataset("z", data=z_pm, compression="gzip", chunks=(16, 32))
        z.attrs["units"] = "pm"
        current = data.create_dataset("current", data=np.full(z_pm.shape, 50.0, np.float32))
        current.attrs["units"] = "pA"
        data["x"] = np.linspace(0, 20, z_pm.shape[1], endpoint=False)
        data["x"].attrs["units"] = "nm"
        data["y"] = np.linspace(0, 10, z_pm.shape[0], endpoint=False)
        data["y"].attrs["units"] = "nm"
        f["entry/notes"] = np.arange(1000.0)  # another dataset: listed, not read as data


def test_hdf5_nexus_image_channels_axes_units_and_metadata():
    rng = np.random.default_rng(7)
    z_pm = (rng.random((32, 64)) * 100).astype(np.float32)
    buffer = io.BytesIO()
    nexus_image(buffer, z_pm=z_pm)

    parsed = read_file("scan_0001.h5", buffer.getvalue())

    assert parsed.reader == "hdf5/1.0"
    assert parsed.kind == "topograph"
    assert list(parsed.channels) == ["z", "current"]
    np.testing.assert_allclose(parsed.channels["z"], z_pm * 1e-12, rtol=1e-6)
    np.testing.assert_allclose(parsed.channels["current"], 5e-11)
    assert parsed.units == {"z": "m", "current": "A", "y_m": "m", "x_m": "m"}
    assert parsed.axes["x_m"].shape == (64,) and parsed.axes["y_m"].shape == (32,)
    assert parsed.axes["x_m"][1] == pytest.approx(20e-9 / 64)
    meta = parsed.metadata
    assert meta["bias_v"] == pytest.approx(0.5)
    assert meta["setpoint_a"] == pytest.approx(5e-11)
    assert meta["scan_size_m"] == pytest.approx([2e-8, 2e-8])  # stated, preferred to the axes
    assert meta["pixels"] == [64, 32]
    assert meta["temperature_k"] == pytest.approx(4.3)
    assert meta["sample"] == "Cu(111) #3"
    assert meta["instrument"] == "LTM-1"
    assert meta["mode"] == "constant-current"
    assert meta["channel_name"] == "z"
    assert meta["acquired_at"] == datetime(2025, 3, 4, 12, 22, 5, tzinfo=UTC)
    assert parsed.raw_header["datasets"]["/entry/notes"]["shape"] == [1000]
    assert parsed.raw_header["data_group"] == "/entry/topography"
    assert_json_clean(parsed)


def test_hdf5_reads_from_a_path_and_derives_the_scan_size_from_axes(tmp_path):
    path = tmp_path / "scan.nxs"
    with h5py.File(path, "w") as f:
        data = f.create_group("data")
        data.attrs["NX_class"] = "NXdata"
        data.attrs["signal"] = "z"
        data.attrs["axes"] = ["y", "x"]
        data.create_dataset("z", data=np.zeros((8, 16))).attrs["units"] = "nm"
        data["x"] = np.arange(16) * 0.5
        data["x"].attrs["units"] = "nm"
        data["y"] = np.arange(8) * 0.5
        data["y"].attrs["units"] = "nm"

    parsed = read_file(path.name, path)

    assert parsed.kind == "topograph"
    assert parsed.metadata["scan_size_m"] == pytest.approx([8e-9, 4e-9])  # n · step


def test_hdf5_grid_keeps_the_sweep_last():
    buffer = io.BytesIO()
    with h5py.File(buffer, "w") as f:
        data = f.create_group("grid")
        data.attrs["NX_class"] = "NXdata"
        data.attrs["signal"] = "didv"
        data.attrs["axes"] = ["bias", "y", "x"]
        data.attrs["bias_indices"] = 0
        data.attrs["lockin_amplitude"] = "2 mV rms"
        values = np.arange(21 * 4 * 5, dtype=np.float32).reshape(21, 4, 5)
        data.create_dataset("didv", data=values).attrs["units"] = "nA/V"
        data["bias"] = np.linspace(-100, 100, 21)
        data["bias"].attrs["units"] = "mV"

    parsed = read_file("grid.h5", buffer.getvalue())

    assert parsed.kind == "grid"
    assert parsed.channels["didv"].shape == (4, 5, 21)
    np.testing.assert_allclose(parsed.channels["didv"][1, 2, :], values[:, 1, 2] * 1e-9)
    assert parsed.units["didv"] == "S"
    np.testing.assert_allclose(parsed.axes["bias_v"], np.linspace(-0.1, 0.1, 21))
    assert parsed.metadata["lockin_amplitude_v"] == pytest.approx(0.002)
    assert parsed.metadata["lockin_amplitude_kind"] == "rms"
    assert parsed.metadata["sweep_points"] == 21
    assert parsed.metadata["sweep_start_v"] == pytest.approx(-0.1)


def test_hdf5_truncated_file_is_refused_as_truncated():
    buffer = io.BytesIO()
    nexus_image(buffer, z_pm=np.zeros((32, 64), np.float32))
    whole = buffer.getvalue()

    with pytest.raises(ReaderError, match=r"^truncated: the HDF5 file is"):
        read_file("scan.h5", whole[: len(whole) // 2])


def test_hdf5_external_storage_is_refused_and_external_links_are_not_followed(tmp_path):
    leaking = io.BytesIO()
    with h5py.File(leaking, "w") as f:
        f.create_dataset("x", shape=(8,), dtype="u1", external=[(str(tmp_path / "secret"), 0, 8)])
    with pytest.raises(ReaderError, match="external file"):
        read_file("leak.h5", leaking.getvalue())

    linked = io.BytesIO()
    with h5py.File(linked, "w") as f:
        data = f.create_group("data")
        data.attrs["NX_class"] = "NXdata"
        data.attrs["signal"] = "z"
        data["z"] = np.ones((4, 4))
        f["elsewhere"] = h5py.ExternalLink(str(tmp_path / "other.h5"), "/z")
    parsed = read_file("linked.h5", linked.getvalue())
    assert parsed.raw_header["external_links"][0]["path"] == "/elsewhere"
    assert any("not followed" in w for w in parsed.warnings)

    through_link = io.BytesIO()
    with h5py.File(through_link, "w") as f:
        data = f.create_group("data")
        data.attrs["NX_class"] = "NXdata"
        data.attrs["signal"] = "z"
        data["z"] = h5py.ExternalLink(str(tmp_path / "other.h5"), "/z")
    with pytest.raises(ReaderError, match="external link"):
        read_file("through.h5", through_link.getvalue())


def test_hdf5_absurd_dimensions_refused_before_allocating():
    buffer = io.BytesIO()
    with h5py.File(buffer, "w") as f:
        data = f.create_group("data")
        data.attrs["NX_class"] = "NXdata"
        data.attrs["signal"] = "z"
        # Chunked with no chunk written: a tiny file that claims 10^14 float64 values.
        data.create_dataset("z", shape=(10**7, 10**7), dtype="f8", chunks=(1024, 1024))
    content = buffer.getvalue()
    assert len(content) < 100_000

    peak, raised = peak_bytes(lambda: read_file("huge.h5", content))

    assert isinstance(raised, ReaderError)
    assert "too large" in str(raised) and "refused before reading" in str(raised)
    assert peak < 20 * MiB


def test_hdf5_deflate_bomb_chunk_refused():
    buffer = io.BytesIO()
    with h5py.File(buffer, "w") as f:
        data = f.create_group("data")
        data.attrs["NX_class"] = "NXdata"
        data.attrs["signal"] = "z"
        z = data.create_dataset(
            "z", shape=(32, 32), dtype="f4", chunks=(32, 32), compression="gzip"
        )
        # One 4 KiB chunk whose deflate stream inflates to 16 MiB.
        z.id.write_direct_chunk((0, 0), zlib.compress(bytes(16 * MiB), 9))
    with pytest.raises(ReaderError, match="compression bomb"):
        read_file("bomb.h5", buffer.getvalue())


def test_hdf5_complex_signal_refused():
    buffer = io.BytesIO()
    with h5py.File(buffer, "w") as f:
        data = f.create_group("data")
        data.attrs["NX_class"] = "NXdata"
        data.attrs["signal"] = "z"
        data["z"] = np.ones((4, 4), dtype=np.complex64)
    with pytest.raises(ReaderError, match="complex"):
        read_file("complex.h5", buffer.getvalue())


# --- TIFF --------------------------------------------------------------------------------------


def two_page_tiff() -> tuple[bytes, np.ndarray]:
    rng = np.random.default_rng(3)
    pages = rng.random((2, 48, 64)).astype(np.float32)
    description = {
        "channels": [{"name": "z_forward", "unit": "nm"}, {"name": "z_backward", "unit": "nm"}],
        "kind": "topograph",
        "bias": "0.5 V",
        "setpoint": "50 pA",
        "scan_size": "20 nm x 15 nm",
        "acquired_at": "2025-03-04T09:00:00Z",
        "tip": "W-07",
    }
    buffer = io.BytesIO()
    tifffile.imwrite(buffer, pages, description=json.dumps(description), metadata=None)
    return buffer.getvalue(), pages


def test_tiff_two_pages_with_json_description():
    content, pages = two_page_tiff()

    parsed = read_file("frame.tif", content)

    assert parsed.reader == "tiff/1.0"
    assert parsed.kind == "topograph"
    assert list(parsed.channels) == ["z_forward", "z_backward"]
    np.testing.assert_allclose(parsed.channels["z_backward"], pages[1] * 1e-9, rtol=1e-6)
    assert parsed.channels["z_forward"].dtype == np.float32
    assert parsed.units == {"z_forward": "m", "z_backward": "m"}
    assert parsed.metadata["bias_v"] == pytest.approx(0.5)
    assert parsed.metadata["setpoint_a"] == pytest.approx(5e-11)
    assert parsed.metadata["scan_size_m"] == pytest.approx([2e-8, 1.5e-8])
    assert parsed.metadata["pixels"] == [64, 48]
    assert parsed.metadata["tip"] == "W-07"
    assert parsed.metadata["acquired_at"] == datetime(2025, 3, 4, 9, 0, tzinfo=UTC)
    assert parsed.raw_header["pages"][0]["ImageWidth"] == 64
    assert_json_clean(parsed)


def test_tiff_truncated_in_the_data_and_in_the_directories():
    content, _ = two_page_tiff()
    # tifffile writes page data first, the second page's directory at the end.
    with pytest.raises(ReaderError, match="^truncated:"):
        read_file("frame.tif", content[: len(content) - 200])
    with pytest.raises(ReaderError, match="^truncated"):
        read_file("frame.tif", content[:5000])
    single = io.BytesIO()
    tifffile.imwrite(single, np.ones((64, 64), np.float32))
    with pytest.raises(ReaderError, match=r"^truncated: TIFF page 0 has image data at bytes"):
        read_file("single.tif", single.getvalue()[:8000])
    with pytest.raises(ReaderError, match=r"^truncated: the TIFF's first image directory"):
        read_file("single.tif", single.getvalue()[:40])


def test_tiff_absurd_dimensions_refused_before_allocating():
    # A hand-written little-endian TIFF: one IFD claiming 200000 × 200000 float64 pixels.
    entries = [
        (256, 4, 1, 200_000),  # ImageWidth
        (257, 4, 1, 200_000),  # ImageLength
        (258, 3, 1, 64),  # BitsPerSample
        (259, 3, 1, 1),  # Compression: none
        (262, 3, 1, 1),  # Photometric
        (273, 4, 1, 8),  # StripOffsets
        (277, 3, 1, 1),  # SamplesPerPixel
        (278, 4, 1, 200_000),  # RowsPerStrip
        (279, 4, 1, 16),  # StripByteCounts
        (339, 3, 1, 3),  # SampleFormat: IEEE float
    ]
    ifd = struct.pack("<H", len(entries))
    for tag, kind, count, value in entries:
        ifd += struct.pack("<HHII", tag, kind, count, value)
    ifd += struct.pack("<I", 0)
    content = b"II*\x00" + struct.pack("<I", 24) + bytes(16) + ifd

    peak, raised = peak_bytes(lambda: read_file("huge.tif", content))

    assert isinstance(raised, ReaderError), raised
    assert "too large: TIFF page 0 claims shape (200000, 200000)" in str(raised)
    assert peak < 20 * MiB


def test_tiff_colour_and_complex_pages_refused():
    rgb = io.BytesIO()
    tifffile.imwrite(rgb, np.zeros((8, 8, 3), np.uint8), photometric="rgb")
    with pytest.raises(ReaderError, match="colour picture"):
        read_file("photo.tif", rgb.getvalue())

    complex_page = io.BytesIO()
    tifffile.imwrite(complex_page, np.zeros((8, 8), np.complex64))
    with pytest.raises(ReaderError, match="complex|unsupported dtype"):
        read_file("complex.tif", complex_page.getvalue())


# --- NumPy -------------------------------------------------------------------------------------


def npy_bytes(array: np.ndarray, **kwargs) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, array, **kwargs)
    return buffer.getvalue()


def test_npy_with_a_sidecar_beside_it(tmp_path):
    image = np.arange(12.0).reshape(3, 4)
    path = tmp_path / "frame_007.npy"
    path.write_bytes(npy_bytes(image))
    sidecar = {
        "channel_name": "z",
        "unit": "nm",
        "kind": "topograph",
        "bias": "0.5 V",
        "setpoint": "50 pA",
        "scan size": "20 nm",
        "acquired_at": "2025-03-04 10:15:00",
        "time_zone": "Europe/Berlin",
    }
    (tmp_path / "frame_007.npy.json").write_text(json.dumps(sidecar))

    parsed = read_file(path.name, path)

    assert parsed.reader == "npy/1.0"
    assert parsed.kind == "topograph"
    np.testing.assert_allclose(parsed.channels["z"], image * 1e-9)
    assert parsed.units == {"z": "m"}
    assert parsed.metadata["scan_size_m"] == pytest.approx([2e-8, 2e-8])
    assert parsed.metadata["setpoint_a"] == pytest.approx(5e-11)
    assert parsed.metadata["acquired_at"] == datetime(2025, 3, 4, 9, 15, tzinfo=UTC)
    assert parsed.raw_header["sidecar"]["bias"] == "0.5 V"
    assert sidecar_paths(path)[0].name == "frame_007.npy.json"


def test_npz_spectrum_with_upload_metadata():
    bias = np.linspace(-1, 1, 201)
    buffer = io.BytesIO()
    np.savez_compressed(buffer, bias=bias, current=bias * 100.0, x=bias * 2, y=bias * 0)
    metadata = {
        "units": {"bias": "V", "current": "pA", "x": "V", "y": "V"},
        "setpoint": "50 pA",
        "stabilisation_bias": "0.5 V",
        "lockin_amplitude": "5 mV rms",
        "lockin_frequency": "973 Hz",
        "lockin_time_constant": "10 ms",
        "bias_sign_convention": "sample",
        "sample": 3,
    }

    parsed = read_file("sts.npz", buffer.getvalue(), metadata=metadata)

    assert parsed.kind == "spectrum"
    assert list(parsed.channels) == ["current", "x", "y"]
    np.testing.assert_allclose(parsed.axes["bias_v"], bias)
    np.testing.assert_allclose(parsed.channels["current"], bias * 1e-10)
    assert parsed.units["current"] == "A" and parsed.units["bias_v"] == "V"
    meta = parsed.metadata
    assert meta["lockin_amplitude_v"] == pytest.approx(0.005)
    assert meta["lockin_amplitude_kind"] == "rms"
    assert meta["lockin_frequency_hz"] == pytest.approx(973.0)
    assert meta["lockin_time_constant_s"] == pytest.approx(0.01)
    assert meta["stabilisation_bias_v"] == pytest.approx(0.5)
    assert meta["setpoint_a"] == pytest.approx(5e-11)
    assert meta["bias_sign_convention"] == "sample"
    assert meta["sample"] == 3
    assert (meta["sweep_start_v"], meta["sweep_end_v"], meta["sweep_points"]) == (-1.0, 1.0, 201)


def test_npy_absurd_header_refused_before_allocating():
    header = "{'descr': '<f8', 'fortran_order': False, 'shape': (10000000, 10000000), }"
    header = header.ljust(117) + "\n"
    content = b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header.encode() + bytes(64)

    peak, raised = peak_bytes(lambda: read_file("huge.npy", content))

    assert isinstance(raised, ReaderError)
    assert "too large" in str(raised) and "(10000000, 10000000)" in str(raised)
    assert peak < 5 * MiB


@pytest.mark.parametrize(
    ("array", "kwargs", "message"),
    [
        (np.ones(4, np.complex128), {}, "complex"),
        (np.array([{"a": 1}, None], dtype=object), {"allow_pickle": True}, "Python objects"),
        (np.array(["a", "b"]), {}, "not a real number type"),
    ],
    ids=["complex", "pickled-objects", "strings"],
)
def test_npy_wrong_dtypes_refused(array, kwargs, message):
    with pytest.raises(ReaderError, match=message):
        read_file("bad.npy", npy_bytes(array, **kwargs))


def test_npy_truncated():
    content = npy_bytes(np.zeros((64, 64)))
    with pytest.raises(ReaderError, match=r"^truncated: .* holds .* bytes of data"):
        read_file("cut.npy", content[:-100])
    with pytest.raises(ReaderError, match="^truncated"):
        read_file("cut.npy", content[:20])


def test_npz_directory_claiming_a_huge_size_refused_before_decompressing():
    buffer = io.BytesIO()
    np.savez_compressed(buffer, z=np.zeros((16, 16)))
    content = bytearray(buffer.getvalue())
    # Patch the central directory entry: uncompressed size 0xFFFFFFF0 (~4 GiB).
    central = content.rindex(b"PK\x01\x02")
    content[central + 24 : central + 28] = struct.pack("<I", 0xFFFFFFF0)

    peak, raised = peak_bytes(lambda: read_file("claims.npz", bytes(content)))

    assert isinstance(raised, ReaderError)
    assert "too large" in str(raised) and "refused before decompressing" in str(raised)
    assert peak < 5 * MiB


def test_npz_high_ratio_member_refused_fast_with_bounded_memory():
    # 200 MiB of zeros (after a real .npy header) deflate to well under 1 MiB.
    header = io.BytesIO()
    np.lib.format.write_array_header_1_0(
        header, {"descr": "<f8", "fortran_order": False, "shape": (200 * MiB // 8,)}
    )
    buffer = io.BytesIO()
    with (
        zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED, compresslevel=1) as archive,
        archive.open("z.npy", "w", force_zip64=True) as member,
    ):
        member.write(header.getvalue())
        chunk = bytes(MiB)
        for _ in range(200):
            member.write(chunk)
    bomb = buffer.getvalue()
    assert len(bomb) < 2 * MiB

    started = time.perf_counter()
    peak, raised = peak_bytes(lambda: read_file("bomb.npz", bomb))
    elapsed = time.perf_counter() - started

    assert isinstance(raised, ReaderError)
    assert "zip bomb" in str(raised) and "refused before decompressing" in str(raised)
    assert peak < 10 * MiB  # the archive itself, never the 200 MiB
    assert elapsed < 2.0


def zip_with(members: dict[str, bytes]) -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for name, payload in members.items():
            archive.writestr(name, payload)
    return buffer.getvalue()


@pytest.mark.parametrize(
    ("name", "message"),
    [
        ("../escape.npy", "path traversal"),
        ("/etc/cron.d/x.npy", "absolute path"),
        ("a\\..\\b.npy", "backslash"),
        ("inner.zip", "nested archive"),
    ],
)
def test_archive_member_names_refused(name, message):
    content = zip_with({"ok.npy": npy_bytes(np.zeros(3)), name: npy_bytes(np.zeros(3))})
    with pytest.raises(ReaderError, match=message):
        read_file("bad.npz", content)
    exchange = write_exchange("other", {"z": np.zeros(3)})
    with zipfile.ZipFile(io.BytesIO(exchange)) as source:
        members = {info.filename: source.read(info) for info in source.infolist()}
    members[name] = b"x"
    with pytest.raises(ReaderError, match=message):
        read_file("bad.lbx", zip_with(members))


def test_npz_member_that_is_itself_a_zip_is_refused():
    inner = zip_with({"a.npy": npy_bytes(np.zeros(3))})
    with pytest.raises(ReaderError, match="nested archive"):
        read_file("nested.npz", zip_with({"a.npy": inner}))


def test_npz_overlapping_members_refused():
    # Two directory entries pointing at the same compressed data (a non-recursive zip bomb).
    single = zip_with({"a.npy": npy_bytes(np.zeros(3))})
    local_end = single.index(b"PK\x01\x02")
    central = single[local_end : single.index(b"PK\x05\x06")]
    second = central.replace(b"a.npy", b"b.npy")
    end = bytearray(single[single.index(b"PK\x05\x06") :])
    struct.pack_into("<HHII", end, 8, 2, 2, len(central) * 2, local_end)
    crafted = single[:local_end] + central + second + bytes(end)
    with pytest.raises(ReaderError, match="overlap"):
        read_file("overlap.npz", crafted)


# --- text spectra ------------------------------------------------------------------------------

CSV_SPECTRUM = """\
# dI/dV point spectrum, LTM-1
# acquired_at = 2025-03-04T14:00:00+00:00
bias: 0.5 V
setpoint = 50 pA
lock-in amplitude: 5 mV rms
lock-in frequency: 973 Hz
lock-in time constant: 10 ms
sweep points: 5
bias sign convention: sample
Bias (V), Current (pA), LockIn X (V), LockIn Y (V)
-1.0, -12.5, 0.0010, 0.0000
-0.5, -6.0, 0.0011, 0.0001
0.0, 0.0, 0.0012, 0.0000
# a comment between data lines
0.5, 6.0, 0.0011, -0.0001
1.0, 12.5, 0.0010, 0.0000
"""


def test_csv_spectrum_with_header_block():
    parsed = read_file("point_0003.csv", CSV_SPECTRUM.encode())

    assert parsed.reader == "text/1.0"
    assert parsed.kind == "spectrum"
    assert list(parsed.channels) == ["current", "lockin_x", "lockin_y"]
    np.testing.assert_allclose(parsed.axes["bias_v"], [-1, -0.5, 0, 0.5, 1])
    np.testing.assert_allclose(parsed.channels["current"], [-12.5e-12, -6e-12, 0, 6e-12, 12.5e-12])
    assert parsed.units == {"bias_v": "V", "current": "A", "lockin_x": "V", "lockin_y": "V"}
    meta = parsed.metadata
    assert meta["bias_v"] == pytest.approx(0.5)
    assert meta["setpoint_a"] == pytest.approx(5e-11)
    assert meta["lockin_amplitude_v"] == pytest.approx(0.005)
    assert meta["lockin_amplitude_kind"] == "rms"
    assert meta["lockin_frequency_hz"] == pytest.approx(973)
    assert meta["lockin_time_constant_s"] == pytest.approx(0.01)
    assert meta["bias_sign_convention"] == "sample"
    assert meta["acquired_at"] == datetime(2025, 3, 4, 14, 0, tzinfo=UTC)
    assert (meta["sweep_start_v"], meta["sweep_end_v"], meta["sweep_points"]) == (-1.0, 1.0, 5)
    assert parsed.raw_header["comments"][0].startswith("dI/dV point spectrum")
    assert parsed.warnings == []
    assert_json_clean(parsed)


def test_text_decimal_comma_and_comment_column_names():
    text = "# tip bias [mV]\tI [nA]\n-100,0\t-0,25\n0,0\t0,0\n100,0\t0,25\n"

    parsed = read_file("sweep.txt", text.encode("cp1252"))

    np.testing.assert_allclose(parsed.axes["bias_v"], [-0.1, 0.0, 0.1])
    np.testing.assert_allclose(parsed.channels["i"], [-0.25e-9, 0, 0.25e-9])
    assert parsed.metadata["bias_sign_convention"] == "tip"
    assert parsed.raw_header["decimal"] == ","


def test_text_truncated_and_corrupt_lines_named():
    with pytest.raises(ReaderError, match=r"^truncated: line 17 has 2 values"):
        read_file("cut.csv", (CSV_SPECTRUM + "1.5, 13.0\n").encode())
    with pytest.raises(ReaderError, match=r"corrupt: line 12 is not numbers"):
        read_file("bad.csv", CSV_SPECTRUM.replace("-6.0", "-6.0x").encode())


def test_every_format_cut_short_is_an_error_never_a_shorter_result():
    image = io.BytesIO()
    nexus_image(image, z_pm=np.ones((32, 64), np.float32))
    npz = io.BytesIO()
    np.savez_compressed(npz, bias=np.linspace(-1, 1, 50), current=np.ones(50))
    files = {
        "a.h5": image.getvalue(),
        "a.tif": two_page_tiff()[0],
        "a.npy": npy_bytes(np.ones((16, 16))),
        "a.npz": npz.getvalue(),
        "a.csv": CSV_SPECTRUM.encode(),
        "a.lbx": write_exchange("other", {"z": np.ones((8, 8))}),
    }
    for name, content in files.items():
        read_file(name, content)  # whole: reads
        # Text has no length field: cut mid-number at 99 % it may still read (with a warning).
        for fraction in (0.05, 0.3, 0.5, 0.7, 0.9, 0.99)[: 5 if name == "a.csv" else 6]:
            cut = content[: int(len(content) * fraction)]
            with pytest.raises(ReaderError) as caught:
                read_file(name, cut)
            assert str(caught.value).split(":")[0] in (
                "truncated",
                "truncated or corrupt",
                "corrupt",
                "unsupported",
            ), (name, fraction, str(caught.value))
    cut_number = read_file("a.csv", CSV_SPECTRUM.encode()[:-3])
    assert any("may be cut short" in warning for warning in cut_number.warnings)
    lines = CSV_SPECTRUM.splitlines(keepends=True)
    with pytest.raises(ReaderError, match="truncated: the header says 5 sweep points"):
        read_file("a.csv", "".join(lines[:-2]).encode())  # cut at a line boundary


# --- the exchange layout -----------------------------------------------------------------------


def test_exchange_round_trip_of_an_image():
    rng = np.random.default_rng(11)
    z = rng.random((16, 24))
    content = write_exchange(
        "topograph",
        {"z": z, "current": np.full((16, 24), 50.0)},
        units={"z": "nm", "current": "pA"},
        metadata={
            "acquired_at": datetime(2025, 3, 4, 8, 30, tzinfo=UTC),
            "bias_v": "0.5 V",
            "setpoint_a": "50 pA",
            "scan_size_m": "20 nm",
            "temperature_k": 4.4,
            "mode": "constant-current",
            "sample": "Ag(100) #1",
        },
        header={"controller": {"gain_p": 0.2}},
    )
    assert detect_format("anything.bin", content[:64]) == "exchange"
    assert content == write_exchange(
        "topograph",
        {"z": z, "current": np.full((16, 24), 50.0)},
        units={"z": "nm", "current": "pA"},
        metadata={
            "acquired_at": datetime(2025, 3, 4, 8, 30, tzinfo=UTC),
            "bias_v": "0.5 V",
            "setpoint_a": "50 pA",
            "scan_size_m": "20 nm",
            "temperature_k": 4.4,
            "mode": "constant-current",
            "sample": "Ag(100) #1",
        },
        header={"controller": {"gain_p": 0.2}},
    ), "the same dataset gives the same bytes (content-addressed storage)"

    parsed = read_file("frame.lbx", content)

    assert parsed.reader == "exchange/1.0"
    assert parsed.kind == "topograph"
    np.testing.assert_allclose(parsed.channels["z"], z * 1e-9, rtol=1e-6)
    assert parsed.channels["z"].dtype == np.float32
    assert parsed.units == {"z": "m", "current": "A"}
    meta = parsed.metadata
    assert meta["acquired_at"] == datetime(2025, 3, 4, 8, 30, tzinfo=UTC)
    assert meta["bias_v"] == pytest.approx(0.5)
    assert meta["setpoint_a"] == pytest.approx(5e-11)
    assert meta["scan_size_m"] == pytest.approx([2e-8, 2e-8])
    assert meta["pixels"] == [24, 16]
    assert meta["sample"] == "Ag(100) #1"
    assert parsed.raw_header["header"] == {"controller": {"gain_p": 0.2}}
    with zipfile.ZipFile(io.BytesIO(content)) as archive:
        assert archive.namelist()[0] == "labbook-exchange.json"
        manifest = json.loads(archive.read("labbook-exchange.json"))
    assert manifest["format"] == "labbook-exchange" and manifest["version"] == "1.0"


def test_exchange_grid_and_afm_fields():
    content = write_exchange(
        "grid",
        {"didv": np.ones((3, 4, 11))},
        axes={"bias_v": np.linspace(-0.5, 0.5, 11), "x_m": np.arange(4) * 1e-9},
        units={"didv": "nS", "bias_v": "V", "x_m": "m"},
        metadata={
            "frequency_shift_hz": "-3.2 Hz",
            "oscillation_amplitude_m": "50 pm",
            "oscillation_amplitude_kind": "peak",
            "sensor_resonance_hz": "29.5 kHz",
            "sensor_stiffness_n_per_m": "1800 N/m",
        },
    )
    parsed = read_file("grid.lbx", content)
    assert parsed.kind == "grid"
    assert parsed.units["didv"] == "S"
    assert parsed.metadata["frequency_shift_hz"] == pytest.approx(-3.2)
    assert parsed.metadata["oscillation_amplitude_m"] == pytest.approx(5e-11)
    assert parsed.metadata["sensor_resonance_hz"] == pytest.approx(29500)
    assert parsed.metadata["sensor_stiffness_n_per_m"] == pytest.approx(1800)
    assert parsed.metadata["pixels"] == [4, 3]


def rewrite(content: bytes, change) -> bytes:
    with zipfile.ZipFile(io.BytesIO(content)) as source:
        members = {info.filename: source.read(info) for info in source.infolist()}
    change(members)
    return zip_with(members)


def test_exchange_checksum_version_and_writer_refusals():
    content = write_exchange("other", {"z": np.arange(5.0)})

    def tamper(members):
        payload = bytearray(members["channels/z.npy"])
        payload[-1] ^= 0xFF
        members["channels/z.npy"] = bytes(payload)

    with pytest.raises(ReaderError, match="SHA-256"):
        read_file("tampered.lbx", rewrite(content, tamper))

    def future(members):
        manifest = json.loads(members["labbook-exchange.json"])
        manifest["version"] = "2.0"
        members["labbook-exchange.json"] = json.dumps(manifest).encode()

    with pytest.raises(ReaderError, match="unsupported: labbook exchange version 2.0"):
        read_file("future.lbx", rewrite(content, future))

    def manifest_last(members):
        members["labbook-exchange.json"] = members.pop("labbook-exchange.json")

    moved = rewrite(content, manifest_last)
    assert detect_format("moved.zip", moved[:64]) == "npz"
    assert read_file("moved.zip", moved).reader == "exchange/1.0"  # still found and read

    with pytest.raises(ValueError, match="not labbook fields"):
        write_exchange("other", {"z": np.arange(5.0)}, metadata={"gain": 3})
    with pytest.raises(ValueError, match="needs an axis"):
        write_exchange("spectrum", {"current": np.arange(5.0)})


# --- registry, detection, limits ---------------------------------------------------------------


def test_unknown_format_and_empty_file():
    with pytest.raises(ReaderError, match=r"^empty file: 'x.h5' has 0 bytes"):
        read_file("x.h5", b"")
    with pytest.raises(ReaderError, match=r"^unknown format: 'notes.docx'"):
        read_file("notes.docx", b"\x01\x02 not a data file")


def test_magic_bytes_win_over_the_extension():
    content, _ = two_page_tiff()
    parsed = read_file("mislabelled.h5", content)
    assert parsed.reader == "tiff/1.0"
    assert any("extension" in warning for warning in parsed.warnings)


def test_size_limit_is_checked_first():
    with pytest.raises(ReaderError, match="^too large: 'big.npy' is"):
        read_file("big.npy", npy_bytes(np.zeros(1000)), limits=ReaderLimits(max_file_bytes=1000))


def test_upload_metadata_overrides_the_file_and_says_so():
    content, _ = two_page_tiff()
    parsed = read_file("frame.tif", content, metadata={"bias_v": 0.7, "sample": 12})
    assert parsed.metadata["bias_v"] == pytest.approx(0.7)
    assert parsed.metadata["sample"] == 12
    assert any("overrides the file's 0.5" in warning for warning in parsed.warnings)


def test_every_error_is_a_value_error_with_the_reader_named():
    with pytest.raises(ValueError) as caught:
        read_file("cut.npy", npy_bytes(np.zeros(10))[:-8])
    assert isinstance(caught.value, ReaderError)
    assert caught.value.reader == "npy/1.0"


def test_isolated_read_returns_the_same_result_and_contains_hangs_and_crashes():
    content, pages = two_page_tiff()
    parsed = read_file("frame.tif", content, timeout_s=30)
    np.testing.assert_allclose(parsed.channels["z_forward"], pages[0] * 1e-9, rtol=1e-6)
    assert parsed.metadata["acquired_at"] == datetime(2025, 3, 4, 9, 0, tzinfo=UTC)

    with pytest.raises(ReaderError, match=r"^truncated") as caught:
        read_file("cut.npy", npy_bytes(np.zeros(10))[:-8], timeout_s=30)
    assert caught.value.reader == "npy/1.0"

    # A format library that loops or crashes on a hostile file: the child is stopped, the
    # caller gets an error to record.
    with pytest.raises(ReaderError, match=r"^timeout: .* longer than 0.5 s"):
        run_isolated(time.sleep, (30,), timeout_s=0.5, what="sleeping")
    with pytest.raises(ReaderError, match=r"^crashed: .*exit code 3"):
        run_isolated(os._exit, (3,), timeout_s=30, what="exiting")


def _read_in_a_daemon(queue) -> None:
    parsed = read_file("a.npy", npy_bytes(np.ones((4, 4))), metadata={"unit": "nm"}, timeout_s=30)
    queue.put(parsed.kind)


def test_isolation_works_inside_a_daemonic_worker_process():
    # A Celery prefork worker is a daemonic process: the standard library refuses children
    # there, so the isolation must still work (through billiard).
    import multiprocessing

    context = multiprocessing.get_context("fork")
    queue = context.Queue()
    worker = context.Process(target=_read_in_a_daemon, args=(queue,), daemon=True)
    worker.start()
    try:
        assert queue.get(timeout=60) == "topograph"
    finally:
        worker.join(10)


def test_readers_import_no_django():
    for path in READERS_DIR.glob("*.py"):
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            names = []
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom):
                names = [node.module or ""]
            assert not any(name.split(".")[0] == "django" for name in names), path.name


# --- normalisation -----------------------------------------------------------------------------


def test_normalise_amplitudes_conventions_and_implausible_bare_numbers():
    metadata, warnings = normalise_metadata(
        {
            "Lock-in amplitude": "10 mVpp",
            "tip_bias": "-0.3 V",
            "setpoint": 50,
            "oscillation amplitude": "100 pm",
            "oscillation_amplitude_kind": "peak-to-peak",
            "df": "-4 Hz",
            "Scan size (nm)": "20 x 10",
            "pixels": "256x128",
            "acquired_at": "2025-03-04 13:00:00",
        }
    )
    assert metadata["lockin_amplitude_v"] == pytest.approx(0.005)  # pp → peak
    assert metadata["lockin_amplitude_kind"] == "peak"
    assert metadata["bias_v"] == pytest.approx(-0.3)
    assert metadata["bias_sign_convention"] == "tip"
    assert "setpoint_a" not in metadata  # 50 A is no tunnelling current
    assert any("setpoint_a: 50.0 is not plausible" in w for w in warnings)
    assert metadata["oscillation_amplitude_m"] == pytest.approx(1e-10)
    assert metadata["oscillation_amplitude_kind"] == "peak-to-peak"
    assert metadata["frequency_shift_hz"] == pytest.approx(-4)
    assert metadata["scan_size_m"] == pytest.approx([2e-8, 1e-8])
    assert metadata["pixels"] == [256, 128]
    assert metadata["acquired_at"] == datetime(2025, 3, 4, 13, 0, tzinfo=UTC)
    assert any("has no time zone; read as UTC" in w for w in warnings)


def test_arbitrary_units_are_not_taken_for_pint_units():
    values = np.ones(3)
    for label in ("a.u.", "au", "arb. units"):
        converted, unit = to_si(values, label)
        assert unit == label and converted is values


# --- plugins -----------------------------------------------------------------------------------


@pytest.fixture
def plugin_site(tmp_path, monkeypatch):
    """A directory on sys.path with a dist-info that declares entry points, as pip would
    install them; importlib.metadata finds it like any installed distribution."""

    def install(entry_points: str, modules: dict[str, str] | None = None) -> None:
        site = tmp_path / "site"
        site.mkdir(exist_ok=True)
        info = site / "lab_readers-0.1.dist-info"
        info.mkdir()
        (info / "METADATA").write_text("Metadata-Version: 2.1\nName: lab-readers\nVersion: 0.1\n")
        (info / "entry_points.txt").write_text(f"[{PLUGIN_GROUP}]\n{entry_points}")
        for name, source in (modules or {}).items():
            (site / f"{name}.py").write_text(source)
        monkeypatch.syspath_prepend(str(site))
        monkeypatch.syspath_prepend(str(PLUGIN_EXAMPLE))
        reload_plugins()

    yield install
    monkeypatch.undo()
    for name in list(sys.modules):
        if name.startswith(("labbook_toy_reader", "lab_plugin_")):
            del sys.modules[name]
    reload_plugins()


def test_plugin_from_an_entry_point_reads_its_format_and_built_ins_still_read(plugin_site):
    plugin_site(
        "toy = labbook_toy_reader:read\n"
        "broken = lab_plugin_missing_module:read\n"
        "crashy = lab_plugin_crashy:read\n",
        {"lab_plugin_crashy": "def read(name, data, metadata):\n    raise RuntimeError('bug')\n"},
    )
    import labbook_toy_reader

    assert "plugin:toy" in available_readers()
    status = {entry["name"]: entry["status"] for entry in plugin_status()}
    assert status["toy"] == "loaded" and status["crashy"] == "loaded"
    assert status["broken"].startswith("failed: ModuleNotFoundError")

    content = labbook_toy_reader.write(
        np.linspace(-1, 1, 9), np.linspace(-1e-10, 1e-10, 9), {"setpoint": "50 pA"}
    )
    parsed = read_file("sweep.toy", content)
    assert parsed.reader == "toy/0.1.0"
    assert parsed.kind == "spectrum"
    assert parsed.metadata["setpoint_a"] == pytest.approx(5e-11)
    np.testing.assert_allclose(parsed.axes["bias_v"], np.linspace(-1, 1, 9), rtol=1e-6)
    assert any("plugin crashy failed (RuntimeError: bug)" in w for w in parsed.warnings)

    with pytest.raises(ReaderError, match="truncated: toy spectrum") as caught:
        read_file("sweep.toy", content[:-3])
    assert caught.value.reader.startswith("plugin:toy")

    # A file the plugin does not claim goes on to the built-in readers.
    assert read_file("s.csv", CSV_SPECTRUM.encode()).reader == "text/1.0"


def test_plugin_returning_garbage_is_an_error_not_partial_data(plugin_site):
    plugin_site(
        "sloppy = lab_plugin_sloppy:read\n",
        {
            "lab_plugin_sloppy": (
                "import numpy as np\n"
                "from labbook.datafiles.readers import ParsedFile\n"
                "def read(name, data, metadata):\n"
                "    if data.startswith(b'SLOPPY'):\n"
                "        return ParsedFile(kind='spectrum', channels={'i': np.ones(4)})\n"
                "    if data.startswith(b'NOISY'):\n"
                "        return ParsedFile(\n"
                "            kind='topograph', channels={'z': np.ones((4, 4), np.int16)},\n"
                "            units={'z': 'm'},\n"
                "            metadata={'bias_v': float('nan'), 'setpoint_a': 50, 'gain': 3},\n"
                "        )\n"
                "    return None\n"
            )
        },
    )
    with pytest.raises(ReaderError, match="a spectrum needs an axis") as caught:
        read_file("x.sloppy", b"SLOPPY data")
    assert caught.value.reader.startswith("plugin:sloppy")

    parsed = read_file("x.noisy", b"NOISY data")
    assert parsed.channels["z"].dtype == np.float64  # integers become floats
    assert "bias_v" not in parsed.metadata and "setpoint_a" not in parsed.metadata
    assert parsed.raw_header["metadata_extra"] == {"gain": 3}
    assert any("setpoint_a: 50.0 is not plausible" in w for w in parsed.warnings)
    assert any("bias_v" in w and "finite" in w for w in parsed.warnings)


def test_the_example_plugin_declares_the_entry_point_group():
    project = tomllib.loads((PLUGIN_EXAMPLE / "pyproject.toml").read_text())
    assert project["project"]["entry-points"][PLUGIN_GROUP] == {"toy": "labbook_toy_reader:read"}
