"""Quality gate: checks run on every capture before any feature is computed.

Each check is one :class:`QualityRule` of :data:`QUALITY_RULES`, declared once with its
flag, whether it is fatal, its threshold and the basis of that threshold, the test and
the message. :func:`assess_quality_arrays` evaluates every rule's test on whole arrays
(one call per rule for all rows of a chunk) and writes messages only for the rows a rule
fires on; :func:`assess_quality` is the same gate for one capture. :func:`describe_rules`
lists the table (flag, fatal, rule, threshold, basis).

Fatal flags make the extractor refuse the capture with :class:`CaptureRejected`; the
others travel with the result (the ``quality_flags`` column of the feature table).

SNR estimate: noise RMS from the pre-trigger samples when there are at least 32 of
them, else the quietest of 16 equal segments of the record; signal: the largest
|amplitude| inside the S0 and A0 windows.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pandas as pd

from waneguide.core.errors import InputError
from waneguide.features.capture import Capture
from waneguide.features.family import Family
from waneguide.features.materials import Material
from waneguide.features.windows import ModeWindow, mode_windows

__all__ = [
    "QualityReport",
    "QualityRule",
    "CaptureRejected",
    "QUALITY_RULES",
    "FATAL_FLAGS",
    "WARNING_FLAGS",
    "assess_quality",
    "assess_quality_arrays",
    "describe_rules",
]

# Thresholds (each rule below quotes its basis)
#: A packet must exceed this multiple of the largest excursion noise alone reaches.
NO_SIGNAL_FACTOR = 1.5
#: dB below the family's simulated SNR range before ``low_snr``.
LOW_SNR_MARGIN_DB = 0.0
#: Fraction of the ADC full scale at which a peak counts as saturated.
SATURATION_FRACTION = 0.98
#: Consecutive samples held at the peak |amplitude| that count as clipping.
CLIP_RUN = 3
#: Relative sample-rate difference to the family's that is refused.
SAMPLE_RATE_REL_TOL = 1e-3
#: Pre-trigger difference to the family's, in samples.
PRETRIGGER_TOL_SAMPLES = 1.0
#: Relative difference of the header excitation frequency to the family's.
EXCITATION_REL_TOL = 0.02
#: Difference of the header cycles to the family's (cycles are a count: rounding only).
CYCLES_TOL = 1e-6
#: Relative closeness to the row's peak of samples counted "at the peak" for clipping.
_AT_PEAK_REL = 1e-6


class CaptureRejected(InputError):
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


# ---------------------------------------------------------------------------
# What the rules look at: computed once per chunk
# ---------------------------------------------------------------------------
@dataclass
class _Evidence:
    """Arrays (one entry per row) and settings the rules test; built by :func:`_evidence`."""

    family: Family
    material: Material
    x: np.ndarray
    n_samples: int
    sample_rate_hz: float
    pretrigger_s: float
    windows: dict[str, ModeWindow]
    needed: dict[str, int]
    finite: np.ndarray
    ptp: np.ndarray
    peak: np.ndarray
    run: np.ndarray
    snr_db: np.ndarray
    no_signal_db: float
    temperature_c: np.ndarray
    excitation_khz: np.ndarray
    cycles: np.ndarray
    rail_v: float

    @property
    def live(self) -> np.ndarray:
        """Rows with finite, non-constant samples (the amplitude rules apply to them only)."""
        return self.finite & (self.ptp > 0)

    @property
    def short_mode(self) -> str:
        """The mode whose window ends last (the one a record must reach)."""
        return max(self.needed, key=self.needed.get)


def _runs_at_peak(x: np.ndarray, peak: np.ndarray) -> np.ndarray:
    """Longest run of consecutive samples with |x| within 1e-6 (relative) of each row's peak."""
    at = np.abs(x) >= peak[:, None] * (1.0 - _AT_PEAK_REL)
    out = np.ones(x.shape[0], dtype=int)
    cand = np.flatnonzero(at.sum(-1) >= CLIP_RUN)  # only rows with enough samples at the peak
    if cand.size:
        a = at[cand]
        n = a.shape[-1]
        idx = np.arange(n)[None, :]
        last_false = np.maximum.accumulate(np.where(~a, idx, -1), axis=-1)
        out[cand] = (idx - last_false).max(axis=-1)
    return out


def _noise_rms(xf: np.ndarray, n_pre: int) -> np.ndarray:
    if n_pre >= 32:
        return np.sqrt((xf[:, :n_pre] ** 2).mean(-1))
    seg = xf.shape[1] // 16
    parts = xf[:, : seg * 16].reshape(xf.shape[0], 16, seg)
    return np.sqrt((parts**2).mean(-1)).min(-1)


def _per_row(value, n_rows: int) -> np.ndarray:
    return np.broadcast_to(np.asarray(np.nan if value is None else value, dtype=float), (n_rows,))


def _evidence(x: np.ndarray, family: Family, fs: float, pre: float, temperature_c, excitation_khz,
              cycles) -> _Evidence:
    n_rows, n = x.shape
    windows = mode_windows(family)
    hi_v, lo_v = x.max(-1), x.min(-1)  # NaN propagates: a cheap finiteness screen
    finite = np.isfinite(hi_v) & np.isfinite(lo_v)
    xf = x
    if not finite.all():
        finite = np.isfinite(x).all(-1)
        xf = np.where(np.isfinite(x), x, 0.0)
        hi_v, lo_v = xf.max(-1), xf.min(-1)
    peak = np.maximum(hi_v, -lo_v)
    i_s0 = windows["S0"].indices(fs, pre, n)
    i_a0 = windows["A0"].indices(fs, pre, n)
    lo, hi = i_s0[0], max(i_s0[1], i_a0[1])
    noise = _noise_rms(xf, int(round(pre * fs)))
    sig = np.abs(xf[:, lo:hi]).max(-1) if hi > lo else np.zeros(n_rows)
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = 20.0 * np.log10(sig / noise)
    snr = np.where(noise > 0, snr, np.where(sig > 0, np.inf, -np.inf))
    # noise alone reaches about sigma sqrt(2 ln M) over M samples (expected maximum of M Gaussian
    # samples, leading term; David & Nagaraja, Order Statistics, 2003, sec. 10.5, from memory)
    m_win = max(hi - lo, 2)
    return _Evidence(
        family=family, material=family.build_material(), x=x, n_samples=n, sample_rate_hz=fs, pretrigger_s=pre,
        windows=windows, needed={m: w.end_sample(fs, pre) for m, w in windows.items()}, finite=finite,
        ptp=hi_v - lo_v, peak=peak, run=_runs_at_peak(xf, peak), snr_db=snr,
        no_signal_db=float(20.0 * np.log10(NO_SIGNAL_FACTOR * np.sqrt(2.0 * np.log(m_win)))),
        temperature_c=_per_row(temperature_c, n_rows), excitation_khz=_per_row(excitation_khz, n_rows),
        cycles=_per_row(cycles, n_rows), rail_v=family.full_scale_v,
    )


# ---------------------------------------------------------------------------
# The rule table
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class QualityRule:
    """One check of the quality gate.

    ``fires(evidence)`` is True for the rows the rule flags (a scalar for rules on the
    shared settings); ``message(evidence, row)`` says what was found and what to do.
    """

    flag: str
    fatal: bool
    rule: str
    threshold: str
    basis: str
    fires: Callable[[_Evidence], np.ndarray]
    message: Callable[[_Evidence, int], str]


def _too_short(ev: _Evidence):
    return ev.n_samples < max(ev.needed.values())


def _too_short_message(ev: _Evidence, i: int) -> str:
    mode = ev.short_mode
    need = ev.needed[mode]
    acq = ev.family.acquisition
    return (f"the record has {ev.n_samples} samples but the {mode} window ends at sample {need} "
            f"({ev.windows[mode].stop_s * 1e6:.1f} us after the trigger, {ev.pretrigger_s * 1e6:g} us pre-trigger, "
            f"{ev.sample_rate_hz:g} Hz); record at least {max(need, acq.record_length)} samples "
            f"(the family's record_length is {acq.record_length}).")


def _temperature_invalid(ev: _Evidence):
    t, m = ev.temperature_c, ev.material
    return np.isfinite(t) & ~((t >= m.min_temperature_c) & (t <= m.max_temperature_c))


def _temperature_out_of_range(ev: _Evidence):
    t, env = ev.temperature_c, ev.family.environment
    return np.isfinite(t) & ~_temperature_invalid(ev) & ~((t >= env.min_temperature_c) & (t <= env.max_temperature_c))


def _no_signal(ev: _Evidence):
    return ev.live & (ev.snr_db < ev.no_signal_db)


def _excitation_off(ev: _Evidence):
    f0 = ev.family.excitation.centre_frequency_khz
    e = ev.excitation_khz
    return np.isfinite(e) & (np.abs(e - f0) > EXCITATION_REL_TOL * f0)


def _cycles_off(ev: _Evidence):
    c = ev.cycles
    return np.isfinite(c) & (np.abs(c - ev.family.excitation.cycles) > CYCLES_TOL)


_COMMON = "common practice, no source"

QUALITY_RULES: tuple[QualityRule, ...] = (
    QualityRule(
        "non_finite", True, "any NaN or inf sample", "1 sample", "a non-finite sample has no physical meaning",
        lambda ev: ~ev.finite,
        lambda ev, i: (f"{int((~np.isfinite(ev.x[i])).sum())} sample(s) are NaN or inf; the digitiser record is "
                       "corrupt. Record the capture again."),
    ),
    QualityRule(
        "constant", True, "peak-to-peak amplitude is zero", "0 V", "no signal at all",
        lambda ev: ev.ptp == 0,
        lambda ev, i: "the amplitude is constant (no signal at all); check the receiver cable and gain.",
    ),
    QualityRule(
        "sample_rate_mismatch", True, "sample rate differs from the family's",
        f"{100 * SAMPLE_RATE_REL_TOL:g} % relative", _COMMON,
        lambda ev: abs(ev.sample_rate_hz - ev.family.acquisition.sample_rate_hz)
        > SAMPLE_RATE_REL_TOL * ev.family.acquisition.sample_rate_hz,
        lambda ev, i: (f"sample_rate_hz = {ev.sample_rate_hz:g} differs from the family's "
                       f"{ev.family.acquisition.sample_rate_hz:g} Hz by more than {100 * SAMPLE_RATE_REL_TOL:g} %; "
                       "record with the family's rate or use the family the captures were taken for."),
    ),
    QualityRule(
        "too_short", True, "the record ends before a mode window does (features.windows)",
        "end sample of the S0 and A0 windows", "the windows from the Rayleigh-Lamb group velocities, path and burst",
        _too_short, _too_short_message,
    ),
    QualityRule(
        "record_length_mismatch", False, "record length differs from the family's (but holds the windows)",
        "1 sample", "the family fixes the record length",
        lambda ev: (ev.n_samples != ev.family.acquisition.record_length) & ~np.asarray(_too_short(ev)),
        lambda ev, i: (f"record length {ev.n_samples} differs from the family's "
                       f"{ev.family.acquisition.record_length} samples."),
    ),
    QualityRule(
        "pretrigger_mismatch", False, "pre-trigger differs from the family's",
        f"{PRETRIGGER_TOL_SAMPLES:g} sample", _COMMON,
        lambda ev: abs(ev.pretrigger_s - ev.family.acquisition.pretrigger_s) * ev.sample_rate_hz
        > PRETRIGGER_TOL_SAMPLES,
        lambda ev, i: (f"pretrigger_s = {ev.pretrigger_s:g} differs from the family's "
                       f"{ev.family.acquisition.pretrigger_s:g} s."),
    ),
    QualityRule(
        "temperature_missing", True, "no temperature_c (temperature compensation impossible)", "-",
        "the features need the temperature",
        lambda ev: ~np.isfinite(ev.temperature_c),
        lambda ev, i: ("temperature_c is missing; it is needed for temperature compensation. "
                       "Add `# temperature_c = 21.5`."),
    ),
    QualityRule(
        "temperature_invalid", True, "temperature outside the material model's validity range",
        "material min/max_temperature_c", "the material table (features.materials)",
        _temperature_invalid,
        lambda ev, i: (f"temperature_c = {ev.temperature_c[i]:g} is outside the material model's range "
                       f"{ev.material.min_temperature_c:g} to {ev.material.max_temperature_c:g} degC."),
    ),
    QualityRule(
        "temperature_out_of_range", False, "temperature outside the family's environment range (model extrapolates)",
        "family environment min/max_temperature_c", "the family file",
        _temperature_out_of_range,
        lambda ev, i: (f"temperature_c = {ev.temperature_c[i]:g} is outside the family's range "
                       f"{ev.family.environment.min_temperature_c:g} to "
                       f"{ev.family.environment.max_temperature_c:g} degC."),
    ),
    QualityRule(
        "clipped", True, "flat tops: consecutive samples held at the peak |amplitude|",
        f"{CLIP_RUN} samples within {_AT_PEAK_REL:g} of the peak", _COMMON,
        lambda ev: ev.live & (ev.run >= CLIP_RUN),
        lambda ev, i: (f"flat tops: {int(ev.run[i])} consecutive samples held at |amplitude| = {ev.peak[i]:.4g} V "
                       "(the receiver or digitiser clipped); lower the gain and record again."),
    ),
    QualityRule(
        "saturated", False, "peak |amplitude| at or above a fraction of the family's ADC full scale",
        f"{100 * SATURATION_FRACTION:g} % of full scale", _COMMON,
        lambda ev: ev.live & (ev.peak >= SATURATION_FRACTION * ev.rail_v),
        lambda ev, i: (f"peak |amplitude| {ev.peak[i]:.4g} V reaches {100 * ev.peak[i] / ev.rail_v:.0f} % of the "
                       f"full scale ({ev.rail_v:g} V); amplitude features may be compressed."),
    ),
    QualityRule(
        "no_signal", True, "window peak below a multiple of the largest excursion noise alone would reach",
        f"{NO_SIGNAL_FACTOR:g} x sigma sqrt(2 ln M), M window samples",
        "expected maximum of M Gaussian samples (David & Nagaraja, Order Statistics, 2003, sec. 10.5, "
        "from memory); the factor 1.5: common practice, no source",
        _no_signal,
        lambda ev, i: (f"no packet above the noise in the S0/A0 windows (SNR estimate {ev.snr_db[i]:.1f} dB < "
                       f"{ev.no_signal_db:.1f} dB, what noise alone reaches); check the transmitter and the coupling."),
    ),
    QualityRule(
        "low_snr", False, "SNR estimate below the family's simulated range (domain.snr_db)",
        f"domain.snr_db lower bound - {LOW_SNR_MARGIN_DB:g} dB", "the family's training domain",
        lambda ev: ev.live & ~_no_signal(ev) & (ev.snr_db < ev.family.domain.snr_db[0] - LOW_SNR_MARGIN_DB),
        lambda ev, i: (f"SNR estimate {ev.snr_db[i]:.1f} dB is below the family's range "
                       f"({ev.family.domain.snr_db[0]:g} to {ev.family.domain.snr_db[1]:g} dB)."),
    ),
    QualityRule(
        "excitation_mismatch", False, "header excitation_khz differs from the family's",
        f"{100 * EXCITATION_REL_TOL:g} % relative", _COMMON,
        _excitation_off,
        lambda ev, i: (f"excitation_khz = {ev.excitation_khz[i]:g} differs from the family's "
                       f"{ev.family.excitation.centre_frequency_khz:g} kHz."),
    ),
    QualityRule(
        "cycles_mismatch", False, "header cycles differs from the family's", f"{CYCLES_TOL:g} cycles",
        "cycles are a count; the tolerance only absorbs float rounding",
        _cycles_off,
        lambda ev, i: f"cycles = {ev.cycles[i]:g} differs from the family's {ev.family.excitation.cycles:g}.",
    ),
)

FATAL_FLAGS = tuple(r.flag for r in QUALITY_RULES if r.fatal)
WARNING_FLAGS = tuple(r.flag for r in QUALITY_RULES if not r.fatal)


def describe_rules() -> pd.DataFrame:
    """One row per rule of :data:`QUALITY_RULES`: ``flag, fatal, rule, threshold, basis``."""
    return pd.DataFrame([(r.flag, r.fatal, r.rule, r.threshold, r.basis) for r in QUALITY_RULES],
                        columns=["flag", "fatal", "rule", "threshold", "basis"])


# ---------------------------------------------------------------------------
# The gate
# ---------------------------------------------------------------------------
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
    """The quality gate for each row of ``waveforms_v`` (same sample rate and pre-trigger).

    Every rule of :data:`QUALITY_RULES` is tested on all rows at once; messages are written
    only where a rule fires.
    """
    x = np.atleast_2d(np.asarray(waveforms_v, dtype=float))
    n_rows = x.shape[0]
    ev = _evidence(x, family, float(sample_rate_hz), float(pretrigger_s), temperature_c, excitation_khz, cycles)
    fired = np.stack([np.broadcast_to(np.asarray(r.fires(ev), dtype=bool), (n_rows,)) for r in QUALITY_RULES])
    reports = []
    for i in range(n_rows):
        rep = QualityReport(source="" if sources is None else str(sources[i]),
                            snr_db=float(ev.snr_db[i]) if ev.finite[i] else float("nan"))
        for j in np.flatnonzero(fired[:, i]):
            rule = QUALITY_RULES[j]
            rep.add(rule.flag, rule.message(ev, i))
        reports.append(rep)
    return reports


def assess_quality(capture: Capture, family: Family) -> QualityReport:
    """The quality gate for one capture (see :data:`QUALITY_RULES`)."""
    return assess_quality_arrays(
        np.asarray(capture.amplitude_v)[None, :],
        family,
        sample_rate_hz=capture.sample_rate_hz,
        pretrigger_s=capture.pretrigger_s,
        temperature_c=capture.temperature_c,
        excitation_khz=capture.excitation_khz,
        cycles=capture.cycles,
        sources=[capture.source or capture.path_id],
    )[0]
