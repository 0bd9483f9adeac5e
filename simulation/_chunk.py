"""One campaign chunk: waveforms, baselines, profiles and truth of a slice of the plan (pure arithmetic).

Every random draw comes from ``SeedSequence(seed, spawn_key=(tag, index))`` of the case or
specimen, so a chunk's arrays do not depend on the chunking, the worker or the scheduler.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from waneguide.features.family import Family
from waneguide.simulation._plan import TAG_BASE_NOISE, TAG_CASE_NOISE, TAG_SITE
from waneguide.simulation.forward import ForwardModel
from waneguide.simulation.profiles import TRUTH_COLUMNS, sample_site, site_shape, truth_arrays

__all__ = ["simulate_chunk", "truth_of"]

#: Plan columns passed to the synthesis as per-row confounders.
_CONFOUNDERS = ("attenuation_db_per_m", "echo_reflection", "crosstalk_db", "ringing_db")


def _site(family: Family, fm: ForwardModel, row, seed: int):
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(TAG_SITE, int(row.specimen_index))))
    return sample_site(rng, path_length_m=fm.path_length_m, shape=str(row.shape), sides=str(row.sides),
                       n_patches=int(row.n_patches), length_m=float(row.patch_length_mm) * 1e-3,
                       position_fraction=float(row.position_fraction), position_range=family.domain.position_fraction,
                       at=str(row.site_at))


def _col(df: pd.DataFrame, name: str) -> np.ndarray:
    return df[name].to_numpy(dtype=float)


def _db_gain(df: pd.DataFrame, columns) -> np.ndarray:
    return 10.0 ** (sum(_col(df, c) for c in columns) / 20.0)


def _waveforms(fm: ForwardModel, rows: pd.DataFrame, thickness_m, temperature: str, gain, jitter: str,
               snr: str, tag: int, index: str, seed: int) -> np.ndarray:
    """Synthesise, then add each row's own noise (generator keyed by ``tag`` and the row's ``index``)."""
    clean = fm.synthesize(thickness_m, _col(rows, temperature), gain=gain, jitter_s=_col(rows, jitter),
                          **{c: _col(rows, c) for c in _CONFOUNDERS}, dtype=np.float32)
    rngs = [np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(tag, int(i)))) for i in rows[index]]
    return fm.finish(clean, _col(rows, snr), rngs, out=clean)


def simulate_chunk(fm: ForwardModel, plan: pd.DataFrame, seed: int) -> dict[str, np.ndarray]:
    """Waveforms, baselines, profiles and truth of the cases in ``plan`` (a slice of the plan)."""
    family = fm.family
    t_nom = fm.nominal_thickness_m
    spec_rows = plan.drop_duplicates("specimen_index")
    sites = {int(r.specimen_index): _site(family, fm, r, seed) for r in spec_rows.itertuples()}
    # one unit-depth loss shape per specimen; each state scales it to its own depth
    shapes = {j: site_shape(fm.x_m, patches) for j, patches in sites.items()}
    counts = {j: len({p.site for p in patches}) for j, patches in sites.items()}
    spec_idx = plan["specimen_index"].to_numpy(np.int64)
    depth_m = plan["max_loss_target_pct"].to_numpy(float) / 100.0 * t_nom
    loss = np.stack([shapes[int(j)] for j in spec_idx]) * depth_m[:, None]
    thick = t_nom - loss
    truth = truth_arrays(loss, np.full(fm.x_m.size, fm.segment_m), t_nom,
                         np.array([counts[int(j)] for j in spec_idx]),
                         footprint_loss_m=t_nom - fm.footprint_thickness(thick))
    del loss
    gain = _db_gain(plan, ("coupling_tx_db", "coupling_rx_db", "coupling_drift_tx_db", "coupling_drift_rx_db"))
    waves = _waveforms(fm, plan, thick, "temperature_c", gain, "jitter_s", "snr_db", TAG_CASE_NOISE,
                       "case_index", seed)
    base_gain = _db_gain(spec_rows, ("coupling_tx_db", "coupling_rx_db"))
    bases = _waveforms(fm, spec_rows, np.full((len(spec_rows), fm.x_m.size), t_nom), "baseline_temperature_c",
                       base_gain, "baseline_jitter_s", "baseline_snr_db", TAG_BASE_NOISE, "specimen_index", seed)
    spec_pos = {int(j): k for k, j in enumerate(spec_rows["specimen_index"])}
    out = {
        "case_index": plan["case_index"].to_numpy(np.int64),
        "specimen_index": spec_rows["specimen_index"].to_numpy(np.int64),
        "baseline_row": np.array([spec_pos[int(j)] for j in plan["specimen_index"]], dtype=np.int32),
        "waveforms_v": waves,
        "baselines_v": bases,
        "thickness_m": thick.astype(np.float32),
    }
    for k, v in truth.items():
        out[f"truth_{k}"] = v
    return out


def truth_of(arrays) -> dict[str, np.ndarray]:
    """The case index and truth columns of a chunk's arrays."""
    return {"case_index": np.asarray(arrays["case_index"]),
            **{k: np.asarray(arrays[f"truth_{k}"]) for k in TRUTH_COLUMNS}}
