"""Capture readers and writers: round trips and named errors.

Round trips are checked against the writer of the same format (exact for V, mV
scaling is exact to 1 ulp, counts are integers); errors by class and message.
"""
from __future__ import annotations

import re

import h5py
import numpy as np
import pytest
import scipy.io

from waneguide.core.errors import InputError, MissingInputError
from waneguide.features.capture import Capture
from waneguide.features.io import (
    CaptureFileError,
    CorruptFileError,
    EmptyDataError,
    InvalidFieldError,
    MissingFieldError,
    TimeAxisError,
    UnknownUnitsError,
    UnsupportedFormatError,
    from_volts,
    read_capture,
    read_captures,
    to_volts,
    write_capture,
)


def _capture(units="V", scale=None):
    rng = np.random.default_rng(1)
    amp = rng.normal(scale=0.1, size=257)
    if units == "counts":
        amp = np.rint(amp / scale) * scale  # representable in counts
    return Capture(amp, 10e6, 2e-5, "P01", "2026-03-01T10:15:00Z", 21.5, 150.0, 5.0, units=units,
                   counts_scale_v=scale, extra={"operator_note": "rig A"})


@pytest.mark.parametrize("suffix", [".csv", ".mat", ".h5", ".hdf5", ".npz"])
@pytest.mark.parametrize("units,scale", [("V", None), ("mV", None), ("counts", 3.0e-5)])
def test_round_trip(tmp_path, suffix, units, scale):
    cap = _capture(units, scale)
    path = write_capture(cap, tmp_path / f"c{suffix}")
    back = read_capture(path)
    assert back.metadata() == cap.metadata()
    # V: bit-exact; mV: /1e-3 then x1e-3, two roundings of half an ulp each; counts: an integer times the
    # scale, the same product both ways. rtol 4 eps covers two roundings with margin (IEEE 754 rounding,
    # common practice, no source).
    np.testing.assert_allclose(back.amplitude_v, cap.amplitude_v, rtol=4 * np.finfo(float).eps, atol=0)
    assert back.extra.get("operator_note") == "rig A"
    # time axis i / fs - pre from the stored rate and pre-trigger: |t| <= 2e-5 s, so a few ulp of the
    # largest is ~1e-21 s; atol 1e-15 s (1e-8 of a sample) is common practice, no source
    np.testing.assert_allclose(back.time_s, cap.time_s, rtol=0, atol=1e-15)


def test_mat_v73_round_trip(tmp_path):
    cap = _capture()
    path = write_capture(cap, tmp_path / "c.mat", version="7.3")
    with pytest.raises(NotImplementedError):  # scipy refuses v7.3 (HDF5-based): the h5py path is exercised
        scipy.io.loadmat(path)
    back = read_capture(path)
    assert back.metadata() == cap.metadata()
    np.testing.assert_array_equal(back.amplitude_v, cap.amplitude_v)


def test_unit_coders_round_trip():
    v = np.array([-0.5, 0.0, 0.123456789])
    for units, scale in (("V", None), ("mV", None), ("counts", 1e-4)):
        stored = from_volts(v, units, scale)
        back = to_volts(stored, units, scale)
        # counts quantise to the nearest count, so half a count is the exact bound; V and mV: round-off of
        # one multiplication and one division of numbers below 1 (1e-15 > 4 eps x 0.5, common practice)
        tol = 0.5 * scale if units == "counts" else 1e-15
        np.testing.assert_allclose(back, v, atol=tol, rtol=0)
    assert from_volts([0.25], "mV")[0] == 250.0  # 0.25 / 1e-3 rounds to exactly 250 in float64
    assert to_volts([1000], "counts", 3e-5)[0] == pytest.approx(0.03, rel=1e-15)  # one rounding (< 1.1e-16)


def _csv(tmp_path, text, name="bad.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


GOOD_HEAD = "# path_id = P01\n# sample_rate_hz = 10000000\n# pretrigger_s = 0\n# temperature_c = 20\n"
ROWS = "".join(f"{i * 1e-7!r},{0.01 * i}\n" for i in range(8))


def test_csv_without_rate_takes_it_from_time_column(tmp_path):
    cap = read_capture(_csv(tmp_path, "# path_id = P02\ntime_s,amplitude\n" + ROWS, "ok.csv"))
    # the rate is (n - 1) / (t_last - t_first) of times written with 17 significant digits: round-off of
    # ~1e-16 relative; rel 1e-9 is common practice, no source
    assert cap.sample_rate_hz == pytest.approx(10e6, rel=1e-9)
    assert cap.pretrigger_s == 0.0


@pytest.mark.parametrize(
    "text,error,match",
    [
        ("# sample_rate_hz = 10000000\ntime_s,amplitude\n" + ROWS, MissingFieldError, "path_id"),
        (GOOD_HEAD + "time,amp\n" + ROWS, MissingFieldError, "time_s,amplitude"),
        (GOOD_HEAD + "time_s,amplitude\n", EmptyDataError, "no samples"),
        (GOOD_HEAD + "# units = volts\ntime_s,amplitude\n" + ROWS, UnknownUnitsError, "V, mV, counts"),
        (GOOD_HEAD + "# units = counts\ntime_s,amplitude\n" + ROWS, UnknownUnitsError, "counts_scale_v"),
        (GOOD_HEAD.replace("10000000", "5000000") + "time_s,amplitude\n" + ROWS, TimeAxisError, "disagrees"),
        (GOOD_HEAD + "time_s,amplitude\n0,1\n1e-7,1\n3e-7,1\n", TimeAxisError, "equal steps"),
        (GOOD_HEAD + "time_s,amplitude\n0,1\n1e-7,abc\n", CorruptFileError, r"line 7: the amplitude field 'abc'"),
        (GOOD_HEAD + "time_s,amplitude\n0,1\n1e-7,1,2\n", CorruptFileError, r"line 7: .* 2 comma-separated fields"),
        (GOOD_HEAD + "# temperature_c = warm\ntime_s,amplitude\n" + ROWS, InvalidFieldError, "temperature_c"),
        (GOOD_HEAD + "# captured_at = yesterday\ntime_s,amplitude\n" + ROWS, InvalidFieldError, "ISO 8601"),
        ("# path_id P01\ntime_s,amplitude\n" + ROWS, InvalidFieldError, "key = value"),
    ],
)
def test_csv_malformed(tmp_path, text, error, match):
    with pytest.raises(error, match=match) as info:
        read_capture(_csv(tmp_path, text))
    assert "bad.csv" in str(info.value)  # the message names the file
    assert isinstance(info.value, InputError) and isinstance(info.value, ValueError)


def _csv_with_bad_row(tmp_path, bad_row, data_index, n_rows=900):
    """A valid CSV capture whose data row ``data_index`` (0-based) is replaced by ``bad_row``.

    Returns (path, 1-based file line of that row)."""
    head = GOOD_HEAD + "# units = V\n# captured_at = 2026-03-01T10:15:00Z\n# excitation_khz = 150\n"
    rows = [f"{i * 1e-7!r},{float(0.01 * np.sin(i / 7.0))!r}" for i in range(n_rows)]
    rows[data_index] = bad_row
    text = head + "time_s,amplitude\n" + "\n".join(rows) + "\n"
    n_before = head.count("\n") + 1  # header lines plus the column header
    return _csv(tmp_path, text), n_before + data_index + 1


def test_csv_trailing_comment_in_a_data_row_is_refused(tmp_path):
    # `1.047747e-01#7.5` used to be read as 0.1047747 (a comment cut the field): every field must be
    # one complete number; the message names the file, the file line, the text verbatim and what is accepted
    row = "1.5000000e-04,1.047747e-01#7.5"
    path, line = _csv_with_bad_row(tmp_path, row, 15)
    expected = rf"bad\.csv: line {line}: the amplitude field '1\.047747e-01#7\.5' is not a complete number"
    with pytest.raises(CorruptFileError, match=expected) as info:
        read_capture(path)
    assert f"'{row}'" in str(info.value)
    assert "accepted: two complete numbers per line" in str(info.value)


def test_csv_digitiser_code_names_the_file_line_not_the_data_row(tmp_path):
    # data row 777 (0-based) with 8 lines above it is line 786 of the file, the number an editor shows
    path, line = _csv_with_bad_row(tmp_path, "1.5000000e-04,ERR#OVF", 777)
    assert line == 786
    with pytest.raises(CorruptFileError, match=r"bad\.csv: line 786: the amplitude field 'ERR#OVF'") as info:
        read_capture(path)
    assert "row 777" not in str(info.value)
    # the reported line really holds the offending text
    assert path.read_text().split("\n")[785] == "1.5000000e-04,ERR#OVF"
    # same rule for the time column, and a whole-line comment among the samples
    path, line = _csv_with_bad_row(tmp_path, "1.5e-04 s,0.1", 10)
    with pytest.raises(CorruptFileError, match=rf"line {line}: the time_s field '1\.5e-04 s'"):
        read_capture(path)
    path, line = _csv_with_bad_row(tmp_path, "# gain changed", 10)
    with pytest.raises(CorruptFileError, match=rf"line {line}: .*'# gain changed'"):
        read_capture(path)


def test_csv_uneven_time_step_names_the_line(tmp_path):
    path, line = _csv_with_bad_row(tmp_path, f"{300.5e-7!r},0.0", 300)
    with pytest.raises(TimeAxisError, match=rf"bad\.csv: line {line}: time_s must increase in equal steps"):
        read_capture(path)


def _write_bad_temperature(path):
    """A capture file in the format of ``path``'s suffix whose temperature_c is the text 'warm'."""
    fields = {"amplitude": np.zeros(16), "path_id": "P01", "sample_rate_hz": 1e6, "temperature_c": "warm"}
    if path.suffix == ".npz":
        np.savez(path, **fields)
    elif path.suffix == ".mat":
        scipy.io.savemat(path, fields)
    else:
        with h5py.File(path, "w") as fh:
            fh["amplitude"] = fields.pop("amplitude")
            fh.attrs.update(fields)


@pytest.mark.parametrize("suffix", [".mat", ".h5", ".npz"])
def test_binary_readers_name_the_file_the_field_and_the_value(tmp_path, suffix):
    path = tmp_path / f"warm{suffix}"
    _write_bad_temperature(path)
    with pytest.raises(InvalidFieldError, match=re.escape(f"{path}: temperature_c must be a number; got 'warm'")) \
            as info:
        read_capture(path)
    assert "Accepted: a plain number" in str(info.value)


def test_error_classes_and_missing_files(tmp_path):
    # every reader error is an InputError (the CLI prints it as one line); a missing file is MissingInputError
    assert issubclass(CaptureFileError, InputError)
    with pytest.raises(MissingInputError, match=r"nope\.csv.*does not exist"):
        read_capture(tmp_path / "nope.csv")
    with pytest.raises(MissingInputError, match=r"no_dir.*does not exist"):
        read_captures(tmp_path / "no_dir")


def test_binary_malformed(tmp_path):
    for suffix, error in ((".mat", CorruptFileError), (".h5", CorruptFileError), (".npz", CorruptFileError)):
        p = tmp_path / f"junk{suffix}"
        p.write_bytes(b"this is not a container")
        with pytest.raises(error, match="junk"):
            read_capture(p)
    p = tmp_path / "x.wav"
    p.write_bytes(b"")
    with pytest.raises(UnsupportedFormatError, match=r"\.csv"):
        read_capture(p)


def test_missing_amplitude_and_metadata(tmp_path):
    np.savez(tmp_path / "a.npz", signal=np.zeros(4), path_id="P", sample_rate_hz=1e6)
    with pytest.raises(MissingFieldError, match="amplitude"):
        read_capture(tmp_path / "a.npz")
    np.savez(tmp_path / "b.npz", amplitude=np.zeros(4), path_id="P")
    with pytest.raises(MissingFieldError, match="sample_rate_hz"):
        read_capture(tmp_path / "b.npz")
    with h5py.File(tmp_path / "c.h5", "w") as fh:
        fh["amplitude"] = np.zeros((2, 3))
        fh.attrs["path_id"] = "P"
        fh.attrs["sample_rate_hz"] = 1e6
    with pytest.raises(EmptyDataError, match="1-D"):
        read_capture(tmp_path / "c.h5")
    np.savez(tmp_path / "d.npz", amplitude=np.zeros(4), path_id="P", sample_rate_hz=-1.0)
    with pytest.raises(InvalidFieldError, match="sample_rate_hz"):
        read_capture(tmp_path / "d.npz")


def test_read_captures_directory(tmp_path):
    cap = _capture()
    write_capture(cap, tmp_path / "b.npz")
    write_capture(cap, tmp_path / "a.csv")
    (tmp_path / "notes.txt").write_text("not a capture")
    caps = read_captures(tmp_path)
    assert [c.source.split("/")[-1] for c in caps] == ["a.csv", "b.npz"]
    with pytest.raises(InputError, match="holds no capture files"):
        read_captures(_empty(tmp_path))


def _empty(tmp_path):
    d = tmp_path / "empty"
    d.mkdir()
    return d
