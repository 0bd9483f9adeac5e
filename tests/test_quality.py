"""Quality gate: each defect gives its named flag; fatal ones refuse with CaptureRejected."""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from waneguide.features.extractor import FeatureExtractor
from waneguide.features.quality import FATAL_FLAGS, CaptureRejected, assess_quality

from _feature_synth import synth_capture


@pytest.fixture(scope="module")
def good(family_fb2):
    return synth_capture(family_fb2, noise_v=2e-3, rng=0)


def _with(cap, **changes):
    return dataclasses.replace(cap, **changes)


def test_clean_capture_passes(good, family_fb2):
    rep = assess_quality(good, family_fb2)
    assert rep.flags == [] and not rep.fatal
    # SNR estimate: peak about 0.9 V over 2 mV noise RMS -> 20 log10(450) = 53 dB (+-2 dB for the peak)
    assert rep.snr_db == pytest.approx(20 * np.log10(np.abs(good.amplitude_v).max() / 2e-3), abs=1.0)


def _amp(good, fn):
    a = good.amplitude_v.copy()
    fn(a)
    return _with(good, amplitude_v=a)


def test_named_flags(good, family_fb2):
    fam = family_fb2
    peak = np.abs(good.amplitude_v).max()
    cases = {
        "non_finite": _amp(good, lambda a: a.__setitem__(100, np.nan)),
        "constant": _with(good, amplitude_v=np.zeros_like(good.amplitude_v)),
        "too_short": _with(good, amplitude_v=good.amplitude_v[:1500]),
        "sample_rate_mismatch": _with(good, sample_rate_hz=5e6),
        "temperature_missing": _with(good, temperature_c=None),
        "temperature_invalid": _with(good, temperature_c=400.0),
        "temperature_out_of_range": _with(good, temperature_c=65.0),
        "clipped": _with(good, amplitude_v=np.clip(good.amplitude_v, -0.5 * peak, 0.5 * peak)),
        "saturated": _with(good, amplitude_v=good.amplitude_v * (0.99 / peak)),
        "no_signal": _with(good, amplitude_v=np.random.default_rng(1).normal(scale=0.01, size=good.n_samples)),
        "low_snr": _with(good, amplitude_v=good.amplitude_v + np.random.default_rng(2).normal(
            scale=peak / 10 ** (17 / 20), size=good.n_samples)),
        "record_length_mismatch": _with(good, amplitude_v=np.r_[good.amplitude_v, np.zeros(100)]),
        "excitation_mismatch": _with(good, excitation_khz=200.0),
        "cycles_mismatch": _with(good, cycles=3.0),
        "pretrigger_mismatch": _with(good, pretrigger_s=10e-6),
    }
    for flag, cap in cases.items():
        rep = assess_quality(cap, fam)
        assert flag in rep.flags, (flag, rep.flags)
        msg = rep.messages[rep.flags.index(flag)]
        assert len(msg) > 20
        assert rep.fatal == any(f in FATAL_FLAGS for f in rep.flags)
        assert (flag in FATAL_FLAGS) <= rep.fatal


def test_fatal_capture_is_refused_with_message(good, family_fb2):
    bad = _with(good, temperature_c=None, source="x.csv")
    with pytest.raises(CaptureRejected, match=r"x\.csv: capture rejected: temperature_c is missing") as info:
        FeatureExtractor(family_fb2).extract(bad, good)
    assert isinstance(info.value, ValueError)
    assert info.value.report.fatal_flags == ["temperature_missing"]


def test_warnings_travel_with_the_row(good, family_fb2):
    warm = _with(good, temperature_c=55.0, excitation_khz=200.0)
    row = FeatureExtractor(family_fb2).extract(warm, good)
    assert row["quality_flags"] == "excitation_mismatch"
    assert np.isfinite(row["a0_shift_envelope_s"])
