"""The feature table: names, units and meaning of every column, and its on-disk form.

One row per capture. Metadata columns (:data:`METADATA_COLUMNS`) come first, then
the numeric features of :func:`feature_columns` in a fixed order. Any change to a
name, unit or meaning bumps :data:`FEATURE_SCHEMA_VERSION`; the version travels in
``DataFrame.attrs`` and in the Parquet key-value metadata.

Time features are seconds after the trigger (t = 0 at the start of the excitation
burst); shifts are capture minus baseline (positive: the capture is later).

Every column belongs to one feature group (``arrivals``, ``energy``, ``compensation``,
``physics_check``, ``temperature``, ``differential``, ``quality``); :func:`feature_groups`
lists each group's columns. This table is the one declaration: the extractor computes
each group in one step and checks that it produced exactly the group's columns.
"""
from __future__ import annotations

import json
import os
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from waneguide.core.atomic import atomic_path
from waneguide.core.errors import InputError, MissingInputError

__all__ = [
    "FEATURE_SCHEMA_VERSION",
    "MODES",
    "METADATA_COLUMNS",
    "feature_columns",
    "feature_groups",
    "describe_features",
    "write_feature_table",
    "read_feature_table",
]

FEATURE_SCHEMA_VERSION = 2
MODES = ("s0", "a0")
METADATA_COLUMNS = ("file", "path_id", "captured_at", "temperature_c", "quality_flags", "baseline_file")

_PER_MODE: tuple[tuple[str, str, str, str], ...] = (
    # (suffix, unit, group, description)
    ("arrival_envelope_s", "s", "arrivals", "capture arrival: maximum of the Hilbert envelope in the mode window, parabola-refined"),
    ("arrival_threshold_s", "s", "arrivals", "capture arrival: last rise of the envelope through 50 % of the packet maximum before the peak"),
    ("arrival_xcorr_s", "s", "arrivals", "baseline envelope arrival plus the cross-correlation shift (phase-slope refined)"),
    ("arrival_phase_s", "s", "arrivals", "baseline envelope arrival plus the phase delay at the centre frequency"),
    ("baseline_arrival_envelope_s", "s", "arrivals", "baseline arrival: maximum of the Hilbert envelope"),
    ("baseline_arrival_threshold_s", "s", "arrivals", "baseline arrival: 50 % threshold crossing"),
    ("shift_envelope_s", "s", "arrivals", "envelope-peak arrival, capture minus baseline"),
    ("shift_threshold_s", "s", "arrivals", "threshold-crossing arrival, capture minus baseline"),
    ("shift_xcorr_s", "s", "arrivals", "cross-correlation delay against the baseline, parabolic peak refinement"),
    ("shift_xcorr_phase_slope_s", "s", "arrivals", "cross-correlation delay refined by the cross-spectrum phase slope over the excitation band (group delay)"),
    ("shift_phase_s", "s", "arrivals", "phase delay at the centre frequency, on the 2 pi branch nearest the cross-correlation delay"),
    ("xcorr_coefficient", "1", "arrivals", "normalised cross-correlation peak between capture and baseline windows"),
    ("thermal_shift_s", "s", "temperature", "arrival shift predicted for the temperature difference alone (material model, nominal plate)"),
    ("shift_corrected_s", "s", "temperature", "envelope (group) shift minus the predicted thermal (group) shift"),
    ("stretch_residual", "1", "temperature", "1 - rho^2 in the mode window between the capture and the stretched baseline"),
    ("energy_ratio_db", "dB", "energy", "windowed energy of the capture over that of the baseline"),
    ("energy_fraction", "1", "energy", "windowed energy of the capture over the energy of its whole record"),
    ("peak_amplitude_v", "V", "energy", "maximum of the capture envelope in the mode window"),
    ("transmission_low_db", "dB", "energy", "capture/baseline power spectrum ratio, band f0 (1 - 1.5/N) to f0 (1 - 0.5/N)"),
    ("transmission_centre_db", "dB", "energy", "capture/baseline power spectrum ratio, band f0 (1 -+ 0.5/N)"),
    ("transmission_high_db", "dB", "energy", "capture/baseline power spectrum ratio, band f0 (1 + 0.5/N) to f0 (1 + 1.5/N)"),
    ("comp_position_m", "m", "compensation", "propagation distance of the packet after dispersion compensation for the nominal thickness (Wilcox 2003)"),
    ("comp_position_shift_m", "m", "compensation", "compensated position, capture minus baseline"),
    ("comp_width_m", "m", "compensation", "full width at half maximum of the compensated capture packet"),
    ("comp_width_ratio", "1", "compensation", "compensated packet width, capture over baseline"),
    ("comp_peak_ratio_db", "dB", "compensation", "compensated packet peak, capture over baseline"),
    ("sharpest_thickness_m", "m", "compensation", "thickness whose dispersion curve refocuses the capture packet best at the path length (search over candidates, parabola-refined)"),
    ("comp_focus", "1", "compensation", "focus of the capture at the sharpest thickness: compensated amplitude at the path length over its upper bound (1 = perfectly recompressed)"),
    ("sharpest_thickness_ratio", "1", "compensation", "sharpest thickness, capture over baseline"),
)

_GLOBAL: tuple[tuple[str, str, str, str], ...] = (
    ("capture_temperature_c", "degC", "temperature", "structure temperature at capture"),
    ("baseline_temperature_c", "degC", "temperature", "structure temperature of the baseline used"),
    ("delta_temperature_k", "K", "temperature", "capture minus baseline temperature"),
    ("stretch_factor", "1", "temperature", "baseline signal stretch factor a (capture ~ baseline stretched by a about the burst centre) over the S0-to-A0 window"),
    ("stretch_excess", "1", "temperature", "stretch factor - 1 minus the S0 relative thermal coefficient times the temperature difference"),
    ("stretch_residual", "1", "temperature", "1 - rho^2 over the S0-to-A0 window after the stretch"),
    ("unstretched_residual", "1", "temperature", "1 - rho^2 over the S0-to-A0 window without stretch"),
    ("s0_stretch_factor", "1", "temperature", "1 + S0 envelope shift / S0 baseline travel time (from the burst centre): S0 as a thickness-blind temperature probe"),
    ("a0_s0_differential_shift_s", "s", "differential", "A0 envelope shift minus r x S0 envelope shift, r = (dt_A0/dT)/(dt_S0/dT) of the group delays: temperature cancels to first order"),
    ("a0_s0_differential_energy_db", "dB", "differential", "A0 energy ratio minus S0 energy ratio: transducer coupling and gain cancel"),
    ("a0_s0_differential_thickness_ratio", "1", "differential", "A0 sharpest-thickness ratio over S0 sharpest-thickness ratio"),
    ("record_energy_ratio_db", "dB", "energy", "whole-record energy, capture over baseline"),
    ("snr_db", "dB", "quality", "20 log10(peak |amplitude| in the mode windows / noise RMS)"),
    ("n_baselines", "1", "temperature", "number of baselines the optimal baseline selection chose from"),
    ("baseline_s0_arrival_s", "s", "physics_check", "baseline S0 envelope arrival (checks path length and material)"),
    ("capture_peak_frequency_hz", "Hz", "physics_check", "frequency of the spectral peak of the capture's S0-to-A0 window (checks the excitation)"),
    ("sample_rate_hz", "Hz", "physics_check", "sampling rate of the capture"),
    ("baseline_a0_thickness_ratio", "1", "physics_check", "baseline flange thickness over nominal from the A0 window: "
     "candidate whose Rayleigh-Lamb A0 delay over the path (with free S0 end-echo terms, temperature-scaled) best "
     "fits the baseline spectrum by least squares (features.thickness_gauge; checks the flange thickness)"),
)


def feature_columns() -> list[str]:
    """Names of the numeric feature columns, in table order."""
    per_mode = [f"{m}_{s}" for m in MODES for s, *_ in _PER_MODE]
    return per_mode + [name for name, *_ in _GLOBAL]


def feature_groups() -> dict[str, tuple[str, ...]]:
    """Columns of each feature group, in table order (groups in order of first appearance)."""
    groups: dict[str, list[str]] = {}
    for m in MODES:
        for suffix, _, group, _ in _PER_MODE:
            groups.setdefault(group, []).append(f"{m}_{suffix}")
    for name, _, group, _ in _GLOBAL:
        groups.setdefault(group, []).append(name)
    return {g: tuple(cols) for g, cols in groups.items()}


def describe_features() -> pd.DataFrame:
    """One row per feature column: ``name, unit, group, description``."""
    rows = [
        (f"{m}_{s}", unit, group, f"{m.upper()}: {desc}") for m in MODES for s, unit, group, desc in _PER_MODE
    ] + list(_GLOBAL)
    return pd.DataFrame(rows, columns=["name", "unit", "group", "description"])


def _check_table(df: pd.DataFrame) -> None:
    missing = [c for c in (*METADATA_COLUMNS, *feature_columns()) if c not in df.columns]
    if missing:
        raise InputError(
            f"feature table lacks column(s) {missing[:5]}{' ...' if len(missing) > 5 else ''}: a feature table "
            f"holds the metadata columns and every column of feature schema v{FEATURE_SCHEMA_VERSION}. "
            "Build it with features.extractor (waneguide features)."
        )


def write_feature_table(df: pd.DataFrame, path: str | os.PathLike, *, extra_metadata: dict | None = None) -> Path:
    """Write the table to Parquet atomically, with the schema version in the file metadata."""
    _check_table(df)
    table = pa.Table.from_pandas(df, preserve_index=False)
    meta = dict(table.schema.metadata or {})
    info = {"feature_schema_version": FEATURE_SCHEMA_VERSION}
    info.update({k: v for k, v in df.attrs.items() if isinstance(v, (str, int, float, bool))})
    info.update(extra_metadata or {})
    meta[b"waneguide"] = json.dumps(info, sort_keys=True).encode()
    table = table.replace_schema_metadata(meta)
    with atomic_path(path, suffix=".parquet.part") as tmp:
        pq.write_table(table, tmp)
    return Path(path)


def read_feature_table(path: str | os.PathLike) -> pd.DataFrame:
    """Read a feature table; refuses files written under another schema version."""
    p = Path(path)
    if not p.is_file():
        raise MissingInputError(f"feature table {str(p)!r} does not exist; give a Parquet file written by "
                                "`waneguide features`.")
    try:
        table = pq.read_table(p)
    except (pa.ArrowException, OSError) as exc:
        raise InputError(f"{p}: not a readable Parquet file ({exc}); give a feature table written by "
                         "`waneguide features`.") from None
    raw = (table.schema.metadata or {}).get(b"waneguide")
    if raw is None:
        raise InputError(f"{p}: not a waneguide feature table (no 'waneguide' Parquet metadata); give a table "
                         "written by `waneguide features`.")
    info = json.loads(raw)
    version = info.get("feature_schema_version")
    if version != FEATURE_SCHEMA_VERSION:
        raise InputError(
            f"{p}: feature schema version {version} is not the version this tool writes "
            f"({FEATURE_SCHEMA_VERSION}); re-run `waneguide features` on the captures."
        )
    df = table.to_pandas()
    df.attrs.update(info)
    return df
