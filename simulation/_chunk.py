"""One campaign chunk: waveforms, baselines, profiles and truth of a slice of the plan (pure arithmetic).

Every random draw comes from ``SeedSequence(seed, spawn_key=(tag, index))`` of the case or
specimen, so a chunk's arrays do not depend on the chunking, the worker or the scheduler.

Fidelity: by default the fast model synthesises the noise-free waveforms; given ``records``
(noise-free full-wave records of the direct path, made from :func:`surface_losses`) the same
confounders are applied to those instead (:meth:`ForwardModel.confound`), then the same noise.
Everything else (profiles, truth, array names, random streams) is shared.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from waneguide.features.family import Family
from waneguide.simulation._plan import TAG_BASE_NOISE, TAG_CASE_NOISE, TAG_SITE
from waneguide.simulation.forward import ForwardModel
from waneguide.simulation.profiles import TRUTH_COLUMNS, sample_site, site_shape, truth_arrays

__all__ = ["simulate_chunk", "surface_losses", "truth_of", "NOT_APPLIED_TO_RECORDS"]

#: Plan columns passed to the synthesis as per-row confounders.
_CONFOUNDERS = ("attenuation_db_per_m", "echo_reflection", "crosstalk_db", "ringing_db")
#: Plan columns the fast model applies but a record of the direct path does not carry (and why).
NOT_APPLIED_TO_RECORDS = {"echo_reflection": "no end or edge echoes: absorbing ends of the 2-D section, no lateral edges"}


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
               snr: str, tag: int, index: str, seed: int, records=None) -> np.ndarray:
    """Synthesise (or confound ``records``), then add each row's own noise (generator keyed by ``tag``
    and the row's ``index``)."""
    conf = {c: _col(rows, c) for c in _CONFOUNDERS if records is None or c not in NOT_APPLIED_TO_RECORDS}
    if records is None:
        clean = fm.synthesize(thickness_m, _col(rows, temperature), gain=gain, jitter_s=_col(rows, jitter), **conf,
                              dtype=np.float32)
    else:
        clean = fm.confound(records, _col(rows, temperature), gain=gain, jitter_s=_col(rows, jitter), **conf,
                            dtype=np.float32)
    rngs = [np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(tag, int(i)))) for i in rows[index]]
    return fm.finish(clean, _col(rows, snr), rngs, out=clean)


def _sites(fm: ForwardModel, plan: pd.DataFrame, seed: int) -> tuple[pd.DataFrame, dict]:
    """The chunk's specimen rows (first appearance) and each specimen's damage site."""
    spec_rows = plan.drop_duplicates("specimen_index")
    return spec_rows, {int(r.specimen_index): _site(fm.family, fm, r, seed) for r in spec_rows.itertuples()}


def surface_losses(fm: ForwardModel, plan: pd.DataFrame, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Loss [m] from the top (transducer) and the bottom surface, (n, n_segments) each, reference temperature.

    On the segment centres ``fm.x_m``, the same profiles :func:`simulate_chunk` stores: each
    side is its patches' pointwise maximum scaled by the site's unit-depth normalisation, so
    ``top + bottom`` is the case's loss (one-sided sites have no bottom loss).
    """
    _, sites = _sites(fm, plan, seed)
    unit = {}
    for j, patches in sites.items():
        side = {"top": np.zeros(fm.x_m.size), "bottom": np.zeros(fm.x_m.size)}
        for p in patches:
            np.maximum(side[p.side], p.loss(fm.x_m, 1.0), out=side[p.side])
        peak = (side["top"] + side["bottom"]).max()
        unit[j] = (side["top"] / peak, side["bottom"] / peak)
    depth_m = plan["max_loss_target_pct"].to_numpy(float) / 100.0 * fm.nominal_thickness_m
    spec_idx = plan["specimen_index"].to_numpy(np.int64)
    top = np.stack([unit[int(j)][0] for j in spec_idx]) * depth_m[:, None]
    bottom = np.stack([unit[int(j)][1] for j in spec_idx]) * depth_m[:, None]
    return top, bottom


def simulate_chunk(fm: ForwardModel, plan: pd.DataFrame, seed: int, *, records=None) -> dict[str, np.ndarray]:
    """Waveforms, baselines, profiles and truth of the cases in ``plan`` (a slice of the plan).

    ``records``: None (the fast model synthesises), or ``(cases, baselines)``: noise-free
    records [V] of the direct path, (n, N) for the rows of ``plan`` and (m, N) for its
    specimens in order of first appearance (the baselines are pristine), which get the
    same confounders and noise (module docstring).
    """
    t_nom = fm.nominal_thickness_m
    spec_rows, sites = _sites(fm, plan, seed)
    case_records, base_records = (None, None) if records is None else records
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
                       "case_index", seed, case_records)
    base_gain = _db_gain(spec_rows, ("coupling_tx_db", "coupling_rx_db"))
    bases = _waveforms(fm, spec_rows, np.full((len(spec_rows), fm.x_m.size), t_nom), "baseline_temperature_c",
                       base_gain, "baseline_jitter_s", "baseline_snr_db", TAG_BASE_NOISE, "specimen_index", seed,
                       base_records)
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
