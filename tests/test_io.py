"""Capture readers and writers: round trips and named errors.

Round trips are checked against the writer of the same format (exact for V, mV
scaling is exact to 1 ulp, counts are integers); errors by class and message.
"""
from __future__ import annotations

import numpy as np
import pytest

from waneguide.features.capture import Capture
from waneguide.features.io import (
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
    # V: bit-exact; mV: x1e3 then x1e-3 is exact to a few ulp; counts: integers times the scale
    np.testing.assert_allclose(back.amplitude_v, cap.amplitude_v, rtol=4 * np.finfo(float).eps, atol=0)
    assert back.extra.get("operator_note") == "rig A"
    np.testing.assert_allclose(back.time_s, cap.time_s, rtol=0, atol=1e-15)


def test_mat_v73_round_trip(tmp_path):
    import scipy.io

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
        tol = 0.5 * scale if units == "counts" else 1e-15  # counts quantise to half a count
        np.testing.assert_allclose(back, v, atol=tol, rtol=0)
    assert from_volts([0.25], "mV")[0] == 250.0
    assert to_volts([1000], "counts", 3e-5)[0] == pytest.approx(0.03, rel=1e-15)


def _csv(tmp_path, text, name="bad.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


GOOD_HEAD = "# path_id = P01\n# sample_rate_hz = 10000000\n# pretrigger_s = 0\n# temperature_c = 20\n"
ROWS = "".join(f"{i * 1e-7!r},{0.01 * i}\n" for i in range(8))


def test_csv_without_rate_takes_it_from_time_column(tmp_path):
    cap = read_capture(_csv(tmp_path, "# path_id = P02\ntime_s,amplitude\n" + ROWS, "ok.csv"))
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
        (GOOD_HEAD + "time_s,amplitude\n0,1\n1e-7,abc\n", CorruptFileError, "two numbers"),
        (GOOD_HEAD + "# temperature_c = warm\ntime_s,amplitude\n" + ROWS, InvalidFieldError, "temperature_c"),
        (GOOD_HEAD + "# captured_at = yesterday\ntime_s,amplitude\n" + ROWS, InvalidFieldError, "ISO 8601"),
        ("# path_id P01\ntime_s,amplitude\n" + ROWS, InvalidFieldError, "key = value"),
    ],
)
def test_csv_malformed(tmp_path, text, error, match):
    with pytest.raises(error, match=match) as info:
        read_capture(_csv(tmp_path, text))
    assert "bad.csv" in str(info.value)  # the message names the file
    assert isinstance(info.value, ValueError)


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
    import h5py

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
    with pytest.raises(ValueError, match="no capture files"):
        read_captures(_empty(tmp_path))


def _empty(tmp_path):
    d = tmp_path / "empty"
    d.mkdir()
    return d
