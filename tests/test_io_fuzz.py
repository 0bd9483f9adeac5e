"""Fuzz pass over the capture readers (Hypothesis): no input ends in anything but a Capture or a WaneguideError.

Two kinds of input, for every format (.csv, .npz, .h5, .mat v5, .mat v7.3):

* byte-level mutations of a valid file: byte flips, truncation, inserted and deleted runs;
* files written by the format's own library (numpy, h5py, scipy.io, plain text) from random
  metadata (numbers incl. nan, inf, huge and negative, 64-bit integers, text, bytes, arrays)
  and random amplitudes (every numeric dtype, complex, nan/inf, 0-d to 2-d); for CSV also
  random header and sample lines spliced into a valid file.

A read either returns a Capture that keeps the documented invariants or raises
:class:`waneguide.core.errors.WaneguideError`; any other exception (a traceback) fails the test
and Hypothesis shrinks it to the smallest input. Examples are derandomised (seeded from the
test), so every run tries the same inputs; the slow-marked twins try 10x more.
"""
from __future__ import annotations

import math
import warnings
import zipfile

import h5py
import numpy as np
import pytest
import scipy.io
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from waneguide.core.errors import WaneguideError
from waneguide.features.capture import CAPTURE_METADATA_KEYS, Capture
from waneguide.features.io import MAX_CAPTURE_SAMPLES, read_capture, write_capture

FORMATS = (".csv", ".npz", ".h5", ".mat", "-v73.mat")
#: Examples per format and kind: the quick pass (unmarked, ~4 s in all on this machine) and the
#: slow pass (10x, ~15 s). Counts are a choice of this project (no source): enough that every mutation kind
#: and every format is hit many times.
QUICK, THOROUGH = 40, 400


def _settings(n: int):
    return settings(max_examples=n, deadline=None, derandomize=True, database=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


@pytest.fixture(scope="module")
def workdir(tmp_path_factory):
    return tmp_path_factory.mktemp("fuzz")


@pytest.fixture(scope="module")
def seeds(workdir) -> dict[str, bytes]:
    """A valid file of every format, as bytes."""
    rng = np.random.default_rng(5)
    cap = Capture(rng.normal(scale=0.1, size=64), 10e6, 2e-6, "P01", "2026-03-01T10:15:00Z", 21.5, 150.0, 5.0,
                  extra={"operator_note": "rig A"})
    out = {}
    for fmt in FORMATS:
        options = {"version": "7.3"} if fmt == "-v73.mat" else {}
        out[fmt] = write_capture(cap, workdir / f"seed{fmt}", **options).read_bytes()
    return out


def _check(path) -> None:
    """The property: a Capture with the documented invariants, or a WaneguideError (one line)."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # numpy overflow warnings of hostile numbers are not the property
            cap = read_capture(path)
    except WaneguideError as exc:
        assert "\n" not in str(exc)
        return
    amp = np.asarray(cap.amplitude_v)
    assert amp.ndim == 1 and 1 <= amp.size <= MAX_CAPTURE_SAMPLES and amp.dtype == np.float64
    assert math.isfinite(cap.sample_rate_hz) and cap.sample_rate_hz > 0
    assert math.isfinite(cap.pretrigger_s) and cap.pretrigger_s >= 0
    assert isinstance(cap.path_id, str) and cap.path_id.strip() == cap.path_id and cap.path_id
    assert cap.units in ("V", "mV", "counts")


# -- byte-level mutations ------------------------------------------------------------------------

_OPS = st.lists(
    st.one_of(
        st.tuples(st.just("flip"), st.integers(0, 2**31), st.integers(0, 255)),
        st.tuples(st.just("truncate"), st.integers(0, 2**31), st.just(0)),
        st.tuples(st.just("insert"), st.integers(0, 2**31), st.binary(min_size=1, max_size=16)),
        st.tuples(st.just("delete"), st.integers(0, 2**31), st.integers(1, 64)),
    ),
    min_size=1, max_size=6,
)


def _mutate(data: bytes, ops) -> bytes:
    buf = bytearray(data)
    for op, pos, arg in ops:
        at = pos % (len(buf) + 1)
        if op == "flip" and buf:
            buf[at % len(buf)] ^= arg or 0xFF
        elif op == "truncate":
            del buf[at:]
        elif op == "insert":
            buf[at:at] = arg
        elif op == "delete":
            del buf[at:at + arg]
    return bytes(buf)


def _byte_level(seeds, workdir, fmt, ops):
    path = workdir / f"mutated{fmt}"
    path.write_bytes(_mutate(seeds[fmt], ops))
    _check(path)


@pytest.mark.parametrize("fmt", FORMATS)
@_settings(QUICK)
@given(ops=_OPS)
def test_byte_mutations_never_escape(seeds, workdir, fmt, ops):
    _byte_level(seeds, workdir, fmt, ops)


@pytest.mark.slow
@pytest.mark.parametrize("fmt", FORMATS)
@_settings(THOROUGH)
@given(ops=_OPS)
def test_byte_mutations_never_escape_thorough(seeds, workdir, fmt, ops):
    _byte_level(seeds, workdir, fmt, ops)


# -- random content written by each format's own library --------------------------------------------

_TEXT = st.text(st.characters(blacklist_categories=("Cs",)), max_size=24)
_NUMBERS = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([0.0, -1.0, 1e308, -1e308, 5e-324, 1e6, 10e6]),
    st.integers(-(2**63), 2**63 - 1),
)
_WORDS = st.sampled_from(["nan", "inf", "-inf", "1e999", "-0", "", " ", "V", "mV", "counts", "volts", "P01",
                          "2026-03-01T10:15:00Z", "2999-12-31T00:00:00Z", "yesterday", "0x10", "1,5", "None"])
_VALUES = st.one_of(_NUMBERS, _WORDS, _TEXT, st.binary(max_size=12),
                    hnp.arrays(st.sampled_from([np.float64, np.int32, np.uint8]), st.integers(0, 4)))
_META = st.dictionaries(st.sampled_from(CAPTURE_METADATA_KEYS + ("operator_note", "time_s")), _VALUES, max_size=10)
_DTYPES = st.sampled_from([np.float64, np.float32, np.float16, np.int8, np.int16, np.int64, np.uint16, np.uint64,
                           np.bool_, np.complex128])
_AMPLITUDE = hnp.arrays(_DTYPES, hnp.array_shapes(min_dims=0, max_dims=2, min_side=0, max_side=40))


def _base_meta() -> dict:
    return {"path_id": "P01", "sample_rate_hz": 10e6}


def _write_library(path, fmt: str, amplitude: np.ndarray, meta: dict) -> None:
    """Write with the format's own library; a combination the library refuses is no example."""
    fields = {"amplitude": amplitude, **meta}
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if fmt == ".npz":
                np.savez(path, **{k: np.asarray(v) for k, v in fields.items()})
            elif fmt == ".h5":
                with h5py.File(path, "w") as fh:
                    fh["amplitude"] = amplitude
                    for k, v in meta.items():
                        fh.attrs[k] = v
            elif fmt == ".mat":
                scipy.io.savemat(path, fields)
            elif fmt == "-v73.mat":
                with h5py.File(path, "w", userblock_size=512) as fh:
                    for k, v in fields.items():
                        fh[k] = np.array([ord(c) for c in v], np.uint16) if isinstance(v, str) else np.asarray(v)
                        fh[k].attrs["MATLAB_class"] = np.bytes_(b"char" if isinstance(v, str) else b"double")
                with open(path, "r+b") as raw:
                    raw.write(b"MATLAB 7.3 MAT-file".ljust(124, b" ") + b"\x00\x02IM")
            else:
                raise AssertionError(fmt)
    except (TypeError, ValueError, OverflowError, OSError, zipfile.BadZipFile):
        assume(False)


def _library(workdir, fmt, amplitude, meta, use_base):
    path = workdir / f"written{fmt}"
    _write_library(path, fmt, amplitude, {**(_base_meta() if use_base else {}), **meta})
    _check(path)


_BINARY = [f for f in FORMATS if f != ".csv"]


@pytest.mark.parametrize("fmt", _BINARY)
@_settings(QUICK)
@given(amplitude=_AMPLITUDE, meta=_META, use_base=st.booleans())
def test_library_written_content_never_escapes(workdir, fmt, amplitude, meta, use_base):
    _library(workdir, fmt, amplitude, meta, use_base)


@pytest.mark.slow
@pytest.mark.parametrize("fmt", _BINARY)
@_settings(THOROUGH)
@given(amplitude=_AMPLITUDE, meta=_META, use_base=st.booleans())
def test_library_written_content_never_escapes_thorough(workdir, fmt, amplitude, meta, use_base):
    _library(workdir, fmt, amplitude, meta, use_base)


# -- CSV: random header and sample lines spliced into a valid file -------------------------------------

_NUMBER_TEXT = st.one_of(_NUMBERS.map(repr), _WORDS, st.sampled_from(["1e-320", "1e400", "-1e400", "9" * 400]))
_LINES = st.one_of(
    st.builds(lambda k, v: f"# {k} = {v}", st.sampled_from(CAPTURE_METADATA_KEYS + ("note",)),
              st.one_of(_NUMBER_TEXT, _TEXT)),
    st.builds(lambda a, b: f"{a},{b}", _NUMBER_TEXT, _NUMBER_TEXT),
    st.builds(lambda t: f"# {t}", _TEXT),
    _TEXT,
    st.just("time_s,amplitude"),
)


def _csv_spliced(seeds, workdir, edits):
    lines = seeds[".csv"].decode().split("\n")
    for pos, replace, line in edits:
        at = pos % (len(lines) + 1)
        if replace and at < len(lines):
            lines[at] = line
        else:
            lines.insert(at, line)
    path = workdir / "spliced.csv"
    path.write_text("\n".join(lines), encoding="utf-8")
    _check(path)


_EDITS = st.lists(st.tuples(st.integers(0, 200), st.booleans(), _LINES), min_size=1, max_size=5)


@_settings(QUICK * 2)
@given(edits=_EDITS)
def test_csv_spliced_lines_never_escape(seeds, workdir, edits):
    _csv_spliced(seeds, workdir, edits)


@pytest.mark.slow
@_settings(THOROUGH * 2)
@given(edits=_EDITS)
def test_csv_spliced_lines_never_escape_thorough(seeds, workdir, edits):
    _csv_spliced(seeds, workdir, edits)
