"""Quality gate: checks run on every capture before any feature is computed.

Each check gives a named flag and a message; fatal flags make the extractor refuse
the capture with :class:`CaptureRejected`, the others travel with the result (the
``quality_flags`` column of the feature table).

=========================== ===== ==============================================================
flag                        fatal rule
=========================== ===== ==============================================================
``non_finite``              yes   any NaN or inf sample
``constant``                yes   peak-to-peak amplitude is zero
``too_short``               yes   the record ends before the A0 window does
``sample_rate_mismatch``    yes   sample rate differs from the family's by more than 0.1 %
``temperature_missing``     yes   no ``temperature_c`` (temperature compensation impossible)
``temperature_invalid``     yes   outside the material model's validity range
``clipped``                 yes   flat tops: 3 or more consecutive samples held at the peak |amplitude|
``no_signal``               yes   window peak below 1.5 x the largest excursion noise alone would reach
``saturated``               no    peak |amplitude| at or above 98 % of the family's ADC full scale
``low_snr``                 no    SNR estimate below the family's simulated range (``domain.snr_db``)
``record_length_mismatch``  no    record length differs from the family's (but holds the windows)
``pretrigger_mismatch``     no    pre-trigger differs from the family's by more than one sample
``temperature_out_of_range`` no   outside the family's environment range (model extrapolates)
``excitation_mismatch``     no    header excitation_khz differs from the family's by more than 2 %
``cycles_mismatch``         no    header cycles differs from the family's
=========================== ===== ==============================================================

SNR estimate: noise RMS from the pre-trigger samples when there are at least 32 of
them, else the quietest of 16 equal segments of the record; signal: the largest
|amplitude| inside the S0 and A0 windows. Noise alone reaches about sigma sqrt(2 ln M) over M
samples (expected maximum of M Gaussian samples, leading term; e.g. David & Nagaraja,
*Order Statistics*, 2003, sec. 10.5, quoted from memory), so a packet must exceed 1.5 times
that to count. The other thresholds are common practice, no source.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from waneguide.features.capture import Capture
from waneguide.features.family import Family
from waneguide.features.signals import mode_windows

__all__ = ["QualityReport", "CaptureRejected", "assess_quality", "assess_quality_arrays", "FATAL_FLAGS", "WARNING_FLAGS"]

FATAL_FLAGS = (
    "non_finite", "constant", "too_short", "sample_rate_mismatch", "temperature_missing",
    "temperature_invalid", "clipped", "no_signal",
)
WARNING_FLAGS = (
    "saturated", "low_snr", "record_length_mismatch", "pretrigger_mismatch", "temperature_out_of_range",
    "excitation_mismatch", "cycles_mismatch",
)
NO_SIGNAL_FACTOR = 1.5
LOW_SNR_MARGIN_DB = 0.0
SATURATION_FRACTION = 0.98
CLIP_RUN = 3


class CaptureRejected(ValueError):
    """A capture failed a fatal quality check; ``.report`` holds the full :class:`QualityReport`."""

    def __init__(self, message: str, report: "QualityReport | None" = None):
        super().__init__(message)
        self.report = report


@dataclass
class QualityReport:
    """Result of the quality gate for one capture."""

    flags: list[str] = field(default_factory=list)
    messages: list[str] = field(default_factory=list)
    snr_db: float = float("nan")
    source: str = ""

    @property
    def fatal(self) -> bool:
        return any(f in FATAL_FLAGS for f in self.flags)

    @property
    def fatal_flags(self) -> list[str]:
        return [f for f in self.flags if f in FATAL_FLAGS]

    def add(self, flag: str, message: str) -> None:
        self.flags.append(flag)
        self.messages.append(message)

    def raise_if_fatal(self) -> None:
        if self.fatal:
            fatal = [m for f, m in zip(self.flags, self.messages) if f in FATAL_FLAGS]
            where = f"{self.source}: " if self.source else ""
            raise CaptureRejected(f"{where}capture rejected: " + " ".join(fatal), self)

    def flags_text(self) -> str:
        return ";".join(self.flags)


def _unit_factor_v(family: Family) -> float | None:
    acq = family.acquisition
    if acq.amplitude_units == "V":
        return 1.0
    if acq.amplitude_units == "mV":
        return 1e-3
    return acq.counts_scale_v


def _runs_at_peak(x: np.ndarray, peak: np.ndarray) -> np.ndarray:
    """Longest run of consecutive samples with |x| within 1e-6 (relative) of each row's peak."""
    at = np.abs(x) >= peak[:, None] * (1.0 - 1e-6)
    out = np.ones(x.shape[0], dtype=int)
    cand = np.flatnonzero(at.sum(-1) >= CLIP_RUN)  # only rows with enough samples at the peak
    if cand.size:
        a = at[cand]
        n = a.shape[-1]
        idx = np.arange(n)[None, :]
        last_false = np.maximum.accumulate(np.where(~a, idx, -1), axis=-1)
        out[cand] = (idx - last_false).max(axis=-1)
    return out


def assess_quality_arrays(
    waveforms_v: np.ndarray,
    family: Family,
    *,
    sample_rate_hz: float,
    pretrigger_s: float,
    temperature_c,
    excitation_khz=None,
    cycles=None,
    sources=None,
) -> list[QualityReport]:
    """The quality gate for each row of ``waveforms_v`` (same sample rate and pre-trigger)."""
    x = np.atleast_2d(np.asarray(waveforms_v, dtype=float))
    n_rows, n = x.shape
    temps = np.broadcast_to(np.asarray(temperature_c if temperature_c is not None else np.nan, dtype=float), (n_rows,))
    reports = [QualityReport(source="" if sources is None else str(sources[i])) for i in range(n_rows)]
    acq, env = family.acquisition, family.environment
    fs, pre = float(sample_rate_hz), float(pretrigger_s)
    windows = mode_windows(family)
    i_s0 = windows["S0"].indices(fs, pre, n)
    i_a0 = windows["A0"].indices(fs, pre, n)
    need = int(np.ceil((windows["A0"].stop_s + pre) * fs))
    hi_v, lo_v = x.max(-1), x.min(-1)  # NaN propagates: a cheap finiteness screen
    finite = np.isfinite(hi_v) & np.isfinite(lo_v)
    if finite.all():
        xf = x
    else:
        finite = np.isfinite(x).all(-1)
        xf = np.where(np.isfinite(x), x, 0.0)
        hi_v, lo_v = xf.max(-1), xf.min(-1)
    peak = np.maximum(hi_v, -lo_v)
    ptp = hi_v - lo_v
    run = _runs_at_peak(xf, peak)
    # SNR estimate
    n_pre = int(round(pre * fs))
    if n_pre >= 32:
        noise = np.sqrt((xf[:, :n_pre] ** 2).mean(-1))
    else:
        seg = n // 16
        parts = xf[:, : seg * 16].reshape(n_rows, 16, seg)
        noise = np.sqrt((parts**2).mean(-1)).min(-1)
    lo, hi = i_s0[0], max(i_s0[1], i_a0[1])
    sig = np.abs(xf[:, lo:hi]).max(-1) if hi > lo else np.zeros(n_rows)
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = 20.0 * np.log10(sig / noise)
    snr = np.where(noise > 0, snr, np.where(sig > 0, np.inf, -np.inf))
    m_win = max(hi - lo, 2)
    no_signal_db = 20.0 * np.log10(NO_SIGNAL_FACTOR * np.sqrt(2.0 * np.log(m_win)))
    unit_v = _unit_factor_v(family)
    rail_v = acq.full_scale * unit_v if unit_v is not None else None
    mat = family.build_material()
    fam_fs = acq.sample_rate_hz
    fam_khz = family.excitation.centre_frequency_khz
    exc = None if excitation_khz is None else np.broadcast_to(np.asarray(excitation_khz, dtype=float), (n_rows,))
    cyc = None if cycles is None else np.broadcast_to(np.asarray(cycles, dtype=float), (n_rows,))
    row_ok = finite & (ptp > 0) & (run < CLIP_RUN) & (snr >= family.domain.snr_db[0] - LOW_SNR_MARGIN_DB)
    row_ok &= np.isfinite(temps) & (temps >= env.min_temperature_c) & (temps <= env.max_temperature_c)
    if rail_v is not None:
        row_ok &= peak < SATURATION_FRACTION * rail_v
    if exc is not None:
        row_ok &= ~(np.isfinite(exc) & (np.abs(exc - fam_khz) > 0.02 * fam_khz))
    if cyc is not None:
        row_ok &= ~(np.isfinite(cyc) & (np.abs(cyc - family.excitation.cycles) > 1e-6))
    global_ok = abs(fs - fam_fs) <= 1e-3 * fam_fs and n == acq.record_length and abs(pre - acq.pretrigger_s) * fs <= 1.0
    for i, rep in enumerate(reports):
        rep.snr_db = float(snr[i]) if finite[i] else float("nan")
        if global_ok and row_ok[i]:
            continue
        if not finite[i]:
            bad = int((~np.isfinite(x[i])).sum())
            rep.add("non_finite", f"{bad} sample(s) are NaN or inf; the digitiser record is corrupt.")
        if ptp[i] == 0:
            rep.add("constant", "the amplitude is constant (no signal at all); check the receiver cable and gain.")
        if abs(fs - fam_fs) > 1e-3 * fam_fs:
            rep.add("sample_rate_mismatch",
                    f"sample_rate_hz = {fs:g} differs from the family's {fam_fs:g} Hz by more than 0.1 %.")
        if n < need:
            rep.add("too_short",
                    f"the record has {n} samples but must reach sample {need} (end of the A0 window at "
                    f"{windows['A0'].stop_s * 1e6:.1f} us); record at least {acq.record_length} samples.")
        elif n != acq.record_length:
            rep.add("record_length_mismatch", f"record length {n} differs from the family's {acq.record_length} samples.")
        if abs(pre - acq.pretrigger_s) * fs > 1.0:
            rep.add("pretrigger_mismatch",
                    f"pretrigger_s = {pre:g} differs from the family's {acq.pretrigger_s:g} s.")
        t = temps[i]
        if not np.isfinite(t):
            rep.add("temperature_missing",
                    "temperature_c is missing; it is needed for temperature compensation. Add `# temperature_c = 21.5`.")
        else:
            if not mat.min_temperature_c <= t <= mat.max_temperature_c:
                rep.add("temperature_invalid",
                        f"temperature_c = {t:g} is outside the material model's range "
                        f"{mat.min_temperature_c:g} to {mat.max_temperature_c:g} degC.")
            elif not env.min_temperature_c <= t <= env.max_temperature_c:
                rep.add("temperature_out_of_range",
                        f"temperature_c = {t:g} is outside the family's range "
                        f"{env.min_temperature_c:g} to {env.max_temperature_c:g} degC.")
        if finite[i] and ptp[i] > 0:
            if run[i] >= CLIP_RUN:
                rep.add("clipped",
                        f"flat tops: {int(run[i])} consecutive samples held at |amplitude| = {peak[i]:.4g} V "
                        "(the receiver or digitiser clipped); lower the gain and record again.")
            if rail_v is not None and peak[i] >= SATURATION_FRACTION * rail_v:
                rep.add("saturated",
                        f"peak |amplitude| {peak[i]:.4g} V reaches {100 * peak[i] / rail_v:.0f} % of the "
                        f"full scale ({rail_v:g} V); amplitude features may be compressed.")
            if snr[i] < no_signal_db:
                rep.add("no_signal",
                        f"no packet above the noise in the S0/A0 windows (SNR estimate {snr[i]:.1f} dB < "
                        f"{no_signal_db:.1f} dB, what noise alone reaches); check the transmitter and the coupling.")
            elif snr[i] < family.domain.snr_db[0] - LOW_SNR_MARGIN_DB:
                rep.add("low_snr",
                        f"SNR estimate {snr[i]:.1f} dB is below the family's range "
                        f"({family.domain.snr_db[0]:g} to {family.domain.snr_db[1]:g} dB).")
        if exc is not None:
            e = exc[i]
            if np.isfinite(e) and abs(e - fam_khz) > 0.02 * fam_khz:
                rep.add("excitation_mismatch", f"excitation_khz = {e:g} differs from the family's {fam_khz:g} kHz.")
        if cyc is not None:
            c = cyc[i]
            if np.isfinite(c) and abs(c - family.excitation.cycles) > 1e-6:
                rep.add("cycles_mismatch", f"cycles = {c:g} differs from the family's {family.excitation.cycles:g}.")
    return reports


def assess_quality(capture: Capture, family: Family) -> QualityReport:
    """The quality gate for one capture (see the module docstring for the flags)."""
    return assess_quality_arrays(
        np.asarray(capture.amplitude_v)[None, :],
        family,
        sample_rate_hz=capture.sample_rate_hz,
        pretrigger_s=capture.pretrigger_s,
        temperature_c=np.nan if capture.temperature_c is None else capture.temperature_c,
        excitation_khz=np.nan if capture.excitation_khz is None else capture.excitation_khz,
        cycles=np.nan if capture.cycles is None else capture.cycles,
        sources=[capture.source or capture.path_id],
    )[0]
