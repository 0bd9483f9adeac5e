"""Hostile capture files: each reader refuses what a file declares beyond its ceiling, before allocating it.

Every hostile file is built here, small on disk, declaring far more than the ceilings of
features.io._bounds. Each read runs under a cap on the address space (a reader that tried to
allocate what the file declares fails with MemoryError instead of taking the machine) and
under tracemalloc, and must end in one line naming the file, the size declared and the ceiling.
"""
from __future__ import annotations

import io
import re
import resource
import struct
import sys
import tracemalloc
import zipfile
import zlib
from contextlib import contextmanager
from pathlib import Path

import h5py
import numpy as np
import pytest
import scipy.io
from numpy.lib import format as npformat

from waneguide.features.capture import Capture
from waneguide.features.io import (
    MAX_CAPTURE_SAMPLES,
    CaptureTooLargeError,
    CorruptFileError,
    InvalidFieldError,
    read_capture,
    write_capture,
)
from waneguide.features.io import _bounds

#: Peak of traced allocations while refusing a file by its declaration. The hostile files declare
#: 2.4 GB to 8 TB; a refusal reads headers only (a few kB; the bomb checks inflate 1 MiB at a time),
#: so 16 MiB is far above the working set and far below any of the declared sizes (common practice,
#: no source).
REFUSAL_PEAK_BYTES = 16 * 2**20
#: Address space a read may add (virtual, so generous): 1 GiB is below every declared size here
#: (the smallest is 2.4 GB) and far above a bounded read (common practice, no source).
ADDRESS_SPACE_HEADROOM = 2**30
MiB = 2**20


@contextmanager
def _bounded_read(headroom: int = ADDRESS_SPACE_HEADROOM, trace: bool = True):
    """Cap the address space (Linux) at its size now plus ``headroom`` and trace allocations (if ``trace``);
    yields a dict that receives the traced peak (0 untraced)."""
    out = {"peak": 0}
    old = resource.getrlimit(resource.RLIMIT_AS)
    capped = sys.platform.startswith("linux")
    if capped:
        with open("/proc/self/status") as fh:
            vm_kb = next(int(line.split()[1]) for line in fh if line.startswith("VmSize:"))
        soft = vm_kb * 1024 + headroom
        if old[1] != resource.RLIM_INFINITY:
            soft = min(soft, old[1])
        resource.setrlimit(resource.RLIMIT_AS, (soft, old[1]))
    if trace:
        tracemalloc.start()
    try:
        yield out
    finally:
        if trace:
            out["peak"] = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
        if capped:
            resource.setrlimit(resource.RLIMIT_AS, old)


def _refused(path: Path, error=CaptureTooLargeError, *needles: str, peak: int = REFUSAL_PEAK_BYTES,
             **bounds) -> str:
    with _bounded_read(**bounds) as mem:
        with pytest.raises(error) as info:
            read_capture(path)
    msg = str(info.value)
    assert "\n" not in msg  # one line
    assert msg.startswith(str(path))  # names the file
    for needle in needles:
        assert needle in msg, (needle, msg)
    assert mem["peak"] < peak, f"peak traced allocation {mem['peak'] / MiB:.1f} MiB"
    return msg


def _capture(n=64, **extra) -> Capture:
    rng = np.random.default_rng(3)
    return Capture(rng.normal(scale=0.1, size=n), 10e6, 2e-5, "P01", "2026-03-01T10:15:00Z", 21.5, extra=extra)


CEILING = f"{MAX_CAPTURE_SAMPLES:,}"


# -- HDF5 and MATLAB v7.3 -----------------------------------------------------------------------

def _declare_huge_h5(path: Path, n: int, *, matlab: bool) -> None:
    mode = "r+" if path.exists() else "w"
    with h5py.File(path, mode) as fh:
        if "amplitude" in fh:
            del fh["amplitude"]
        shape = (n, 1) if matlab else (n,)
        ds = fh.create_dataset("amplitude", shape=shape, dtype="f8", chunks=(2**16, 1)[: len(shape)],
                               compression="gzip")  # nothing written: every chunk is the fill value
        if matlab:
            ds.attrs["MATLAB_class"] = np.bytes_(b"double")
        else:
            fh.attrs["path_id"] = "P01"
            fh.attrs["sample_rate_hz"] = 10e6


def test_hdf5_declaring_3e8_samples_is_refused_unread(tmp_path):
    # the reported case: a 6 KB file declaring 3e8 samples took 8.2 GB
    path = tmp_path / "huge.h5"
    _declare_huge_h5(path, 300_000_000, matlab=False)
    assert path.stat().st_size < 16_384
    _refused(path, CaptureTooLargeError, "declares 300,000,000 samples", CEILING, "nothing was read")


def test_mat73_declaring_3e8_samples_is_refused_unread(tmp_path):
    path = write_capture(_capture(), tmp_path / "huge.mat", version="7.3")
    _declare_huge_h5(path, 300_000_000, matlab=True)
    assert path.stat().st_size < 16_384
    _refused(path, CaptureTooLargeError, "declares 300,000,000 samples", CEILING)


def test_hdf5_chunk_that_inflates_past_its_size_is_refused(tmp_path):
    # the dataset declares 1,000 samples in one chunk; the stored chunk inflates to 200 MiB of zeros
    path = tmp_path / "bomb.h5"
    bomb = zlib.compress(bytes(200 * MiB), 9)
    with h5py.File(path, "w") as fh:
        ds = fh.create_dataset("amplitude", shape=(1000,), dtype="f8", chunks=(1000,), compression="gzip")
        ds.id.write_direct_chunk((0,), bomb)
        fh.attrs["path_id"] = "P01"
        fh.attrs["sample_rate_hz"] = 10e6
    assert path.stat().st_size < MiB
    _refused(path, CaptureTooLargeError, "inflates past its declared 8,000 bytes")


def test_hdf5_reading_another_file_is_refused(tmp_path):
    other = tmp_path / "other.h5"
    with h5py.File(other, "w") as fh:
        fh["amplitude"] = np.zeros(16)
    path = tmp_path / "link.h5"
    with h5py.File(path, "w") as fh:
        fh["amplitude"] = h5py.ExternalLink(str(other), "/amplitude")
        fh.attrs["path_id"] = "P01"
        fh.attrs["sample_rate_hz"] = 10e6
    _refused(path, CorruptFileError, "link to another file")
    ext = tmp_path / "external.h5"
    raw = tmp_path / "raw.bin"
    raw.write_bytes(bytes(128))
    with h5py.File(ext, "w") as fh:
        fh.create_dataset("amplitude", shape=(16,), dtype="f8", external=[(str(raw), 0, 128)])
        fh.attrs["path_id"] = "P01"
        fh.attrs["sample_rate_hz"] = 10e6
    _refused(ext, CorruptFileError, "keeps its data in other files")


# -- npz -----------------------------------------------------------------------------------------

def _npy(array) -> bytes:
    buf = io.BytesIO()
    np.save(buf, np.asarray(array))
    return buf.getvalue()


def _meta_members(zf: zipfile.ZipFile) -> None:
    zf.writestr("path_id.npy", _npy("P01"))
    zf.writestr("sample_rate_hz.npy", _npy(10e6))


def test_npz_header_declaring_1e12_samples_is_refused_unread(tmp_path):
    # the reported case: a 1.5 KB npz whose .npy header declares 1e12 samples
    head = io.BytesIO()
    npformat.write_array_header_1_0(head, {"descr": "<f8", "fortran_order": False, "shape": (10**12,)})
    path = tmp_path / "huge.npz"
    with zipfile.ZipFile(path, "w") as zf:
        zf.writestr("amplitude.npy", head.getvalue() + bytes(64))
        _meta_members(zf)
    assert path.stat().st_size < 2048
    _refused(path, CaptureTooLargeError, "declares 1,000,000,000,000 samples", CEILING)


def test_npz_deflate_bomb_is_refused_before_inflating(tmp_path):
    # the reported case: a 2 MB deflate bomb; here 200 MiB of zeros behind a .npy header, built in pieces
    path = tmp_path / "bomb.npz"
    n = 200 * MiB // 8
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        with zf.open("amplitude.npy", "w", force_zip64=True) as fh:
            npformat.write_array_header_1_0(fh, {"descr": "<f8", "fortran_order": False, "shape": (n,)})
            zeros = bytes(MiB)
            for _ in range(200):
                fh.write(zeros)
        _meta_members(zf)
    assert path.stat().st_size < 2 * MiB
    _refused(path, CaptureTooLargeError, "declares 209,715,328 bytes uncompressed", "nothing was inflated")


def test_npz_with_thousands_of_members_is_refused_before_listing(tmp_path):
    path = tmp_path / "many.npz"
    member = _npy(0.0)
    with zipfile.ZipFile(path, "w") as zf:
        zf.writestr("amplitude.npy", _npy(np.zeros(16)))
        _meta_members(zf)
        for i in range(3000):
            zf.writestr(f"k{i}.npy", member)
    _refused(path, CaptureTooLargeError, "lists 3,003 members")


# -- MATLAB v5 -----------------------------------------------------------------------------------

def test_mat5_variable_header_declaring_3e8_samples_is_refused_unread(tmp_path):
    path = tmp_path / "huge.mat"
    scipy.io.savemat(path, {"amplitude": np.zeros((1, 16)), "path_id": "P01", "sample_rate_hz": 10e6},
                     do_compression=False)
    raw = bytearray(path.read_bytes())
    dims = struct.pack("<ii", 1, 16)
    at = raw.index(dims)  # the first variable written is amplitude: its dimensions sub-element
    raw[at:at + 8] = struct.pack("<ii", 1, 300_000_000)
    path.write_bytes(bytes(raw))
    assert scipy.io.whosmat(path)[0] == ("amplitude", (1, 300_000_000), "double")
    _refused(path, CaptureTooLargeError, "declares 300,000,000 samples", CEILING)


def _mat5_element(mdtype: int, payload: bytes) -> bytes:
    pad = (-len(payload)) % 8
    return struct.pack("<II", mdtype, len(payload)) + payload + bytes(pad)


def test_mat5_compressed_variable_that_inflates_without_end_is_refused(tmp_path):
    # header: 16 samples; inside the compressed element the data tag claims 200 MiB and the stream holds them
    path = tmp_path / "bomb.mat"
    big = 200 * MiB
    flags = _mat5_element(6, struct.pack("<II", 6, 0))  # miUINT32: class double
    dims = _mat5_element(5, struct.pack("<ii", 1, 16))  # miINT32
    name = _mat5_element(1, b"amplitude")  # miINT8
    head = flags + dims + name + struct.pack("<II", 9, big)  # miDOUBLE data tag
    comp = zlib.compressobj(9)
    parts = [comp.compress(struct.pack("<II", 14, len(head) - 8 + big + 8) + head)]
    zeros = bytes(MiB)
    parts += [comp.compress(zeros) for _ in range(200)]
    parts.append(comp.flush())
    stream = b"".join(parts)
    header = b"MATLAB 5.0 MAT-file, written by the waneguide tests".ljust(116, b" ") + bytes(8) + b"\x00\x01IM"
    path.write_bytes(header + struct.pack("<II", 15, len(stream)) + stream)
    assert path.stat().st_size < 2 * MiB
    assert scipy.io.whosmat(path) == [("amplitude", (1, 16), "double")]  # the header alone passes
    _refused(path, CaptureTooLargeError, "inflate past 128 MiB")


# -- CSV -----------------------------------------------------------------------------------------

HEAD = "# path_id = P01\n# sample_rate_hz = 10000000\n"


def _csv_rows(n: int) -> str:
    return "".join(f"{i * 1e-7!r},0.0\n" for i in range(n))


@pytest.fixture
def small_ceiling(monkeypatch):
    """The sample ceiling lowered to 1,000 (the readers read it at call time), to stay fast."""
    monkeypatch.setattr(_bounds, "MAX_CAPTURE_SAMPLES", 1000)
    return 1000


def test_csv_one_line_over_the_sample_ceiling_is_refused(tmp_path, small_ceiling):
    ok = tmp_path / "ok.csv"
    ok.write_text(HEAD + "time_s,amplitude\n" + _csv_rows(small_ceiling))
    assert read_capture(ok).n_samples == small_ceiling  # the ceiling itself is accepted
    path = tmp_path / "over.csv"
    path.write_text(HEAD + "time_s,amplitude\n" + _csv_rows(small_ceiling + 1))
    # 2 header lines, the column line, then the 1,001st sample is line 1,004
    _refused(path, CaptureTooLargeError, "line 1004: more than 1,000 sample lines")


@pytest.mark.slow
def test_csv_one_line_over_the_real_sample_ceiling_is_refused(tmp_path):
    # the real ceiling (4,194,304 lines, ~8 s; untraced: tracemalloc makes it 15x slower). The samples held
    # are 3 x 8 bytes per line (time, amplitude, line number): 3 x 32 MiB; the address space may grow by
    # that plus 64 MiB (the old reader held the whole text and a list of lines: over 1 GB)
    path = tmp_path / "over.csv"
    with open(path, "w") as fh:
        fh.write(HEAD + "time_s,amplitude\n")
        step = 2**16
        for start in range(0, MAX_CAPTURE_SAMPLES + 1, step):
            fh.write("".join(f"{i}e-7,0\n" for i in range(start, min(start + step, MAX_CAPTURE_SAMPLES + 1))))
    _refused(path, CaptureTooLargeError, f"line {MAX_CAPTURE_SAMPLES + 4}: more than {CEILING} sample lines",
             headroom=3 * 8 * MAX_CAPTURE_SAMPLES + 64 * MiB, trace=False)


def test_csv_larger_than_the_byte_ceiling_is_refused_from_its_size(tmp_path):
    # the reported case: a 1.1 GB CSV ended in MemoryError at 5.9 GB; here a sparse file of that size
    path = tmp_path / "big.csv"
    with open(path, "wb") as fh:
        fh.write(HEAD.encode())
        fh.truncate(1_100_000_000)
    _refused(path, CaptureTooLargeError, "the file is 1,049.0 MiB", "257.0 MiB")


def test_csv_line_without_end_is_read_only_to_the_line_ceiling(tmp_path):
    path = tmp_path / "oneline.csv"
    path.write_text(HEAD + "time_s,amplitude\n" + "1" * (20 * MiB))
    _refused(path, CaptureTooLargeError, "line 4 is longer than 8,192 bytes")


def test_csv_header_value_over_1000_characters_is_refused(tmp_path):
    rows = "time_s,amplitude\n" + _csv_rows(8)
    ok = tmp_path / "ok.csv"
    ok.write_text(HEAD + "# operator_note = " + "x" * 1000 + "\n" + rows)
    assert len(read_capture(ok).extra["operator_note"]) == 1000  # the ceiling itself is accepted
    path = tmp_path / "note.csv"
    path.write_text(HEAD + "# operator_note = " + "x" * 1001 + "\n" + rows)
    msg = _refused(path, InvalidFieldError, "line 3: metadata 'operator_note' holds 1,001 characters", "1,000")
    assert "xxxxxxxxxx" not in msg  # the value is not echoed


def test_csv_with_thousands_of_header_keys_is_refused(tmp_path):
    path = tmp_path / "keys.csv"
    path.write_text(HEAD + "".join(f"# k{i} = 1\n" for i in range(300)) + "time_s,amplitude\n" + _csv_rows(8))
    _refused(path, InvalidFieldError, "257 metadata fields", "ceiling of 256")


# -- every format: the ceiling itself is accepted, one sample more is refused ---------------------------

@pytest.mark.parametrize("suffix,options", [(".csv", {}), (".npz", {}), (".h5", {}), (".mat", {}),
                                            (".mat", {"version": "7.3"})])
def test_every_format_accepts_the_ceiling_and_refuses_one_more(tmp_path, monkeypatch, suffix, options):
    monkeypatch.setattr(_bounds, "MAX_CAPTURE_SAMPLES", 256)
    ok = write_capture(_capture(256), tmp_path / f"ok{suffix}", **options)
    assert read_capture(ok).n_samples == 256
    over = write_capture(_capture(257), tmp_path / f"over{suffix}", **options)
    needle = "more than 256 sample lines" if suffix == ".csv" else "declares 257 samples"
    _refused(over, CaptureTooLargeError, needle, "256")


@pytest.mark.parametrize("suffix", [".npz", ".h5", ".mat"])
def test_binary_metadata_value_over_the_ceiling_is_refused_unread(tmp_path, suffix):
    path = tmp_path / f"note{suffix}"
    fields = {"amplitude": np.zeros(16), "path_id": "P01", "sample_rate_hz": 10e6, "operator_note": "x" * 5000}
    if suffix == ".npz":
        np.savez(path, **fields)
    elif suffix == ".mat":
        scipy.io.savemat(path, fields)
    else:
        with h5py.File(path, "w") as fh:
            fh["amplitude"] = fields.pop("amplitude")
            fh.attrs.update(fields)
    msg = _refused(path, InvalidFieldError, "'operator_note'", "5,000", "ceiling of 1,000")
    assert re.search(r"x{20}", msg) is None
