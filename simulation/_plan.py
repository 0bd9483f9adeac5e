"""Campaign planning: the Sobol sampling plan of specimens and states (see :mod:`waneguide.simulation.campaign`).

Loss under a transducer: :data:`TRANSDUCER_SITE_SHARE` of the specimens (cut from their own
Sobol coordinate, so the share holds to within the Sobol balance) have their damage site's
first patch centred under a disc, ``site_at = "transmitter"`` or ``"receiver"``: the centre
lies within half a patch length of the disc centre, on the path side (``position_fraction``
is then ``u * length / (2 L)`` from that end, ``u`` the site's position coordinate), so the
disc centre always lies inside the patch's footprint. The other specimens
(``site_at = "path"``) place the patch inside the path as before, where a long patch near
an end can still reach a disc. Pristine states have no loss anywhere.
"""
from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy.stats import qmc

from waneguide.core.errors import InputError
from waneguide.features.family import Family, load_family

__all__ = ["plan_campaign", "as_family", "check_n_cases", "check_seed", "SPECIMEN_DIMS", "STATE_DIMS",
           "TRANSDUCER_SITE_SHARE"]

TAG_SPECIMEN_QMC, TAG_STATE_QMC, TAG_PLAN, TAG_SITE, TAG_CASE_NOISE, TAG_BASE_NOISE = range(1, 7)

#: Specimen-level plan columns drawn uniformly across a domain range: column -> (Sobol dimension, domain field).
_SPECIMEN_SPANS = {
    "patch_length_mm": ("patch_length", "patch_length_mm"),
    "position_fraction": ("position", "position_fraction"),
    "baseline_temperature_c": ("baseline_temperature", "temperature_c"),
    "coupling_tx_db": ("coupling_tx", "coupling_db"),
    "coupling_rx_db": ("coupling_rx", "coupling_db"),
    "attenuation_db_per_m": ("attenuation", "attenuation_db_per_m"),
    "echo_reflection": ("echo_reflection", "echo_reflection"),
    "crosstalk_db": ("crosstalk", "crosstalk_db"),
    "ringing_db": ("ringing", "ringing_db"),
    "baseline_snr_db": ("baseline_snr", "snr_db"),
}
#: State-level plan columns drawn uniformly across a domain range (max loss is handled apart: pristine states).
_STATE_SPANS = {
    "temperature_c": ("temperature", "temperature_c"),
    "snr_db": ("snr", "snr_db"),
    "coupling_drift_tx_db": ("coupling_drift_tx", "coupling_drift_db"),
    "coupling_drift_rx_db": ("coupling_drift_rx", "coupling_drift_db"),
}
SPECIMEN_DIMS = ("shape", "sides", "n_patches", *(dim for dim, _ in _SPECIMEN_SPANS.values()), "site_at")
#: Share of specimens whose damage site is centred under the transmitter and under the receiver
#: (a choice of this campaign design, no source: enough cases to learn and flag loss under a disc).
TRANSDUCER_SITE_SHARE = {"transmitter": 0.15, "receiver": 0.15}
STATE_DIMS = ("pristine", "max_loss", *(dim for dim, _ in _STATE_SPANS.values()))


def as_family(family: Family | str | Path) -> Family:
    return family if isinstance(family, Family) else load_family(family)


def check_n_cases(n_cases: Any) -> int:
    if isinstance(n_cases, bool) or not isinstance(n_cases, (int, np.integer)) or n_cases < 1:
        raise InputError(f"n_cases must be a positive whole number; got {n_cases!r}. Ask for at least one case "
                         "(--cases N, N >= 1).")
    return int(n_cases)


def check_seed(seed: Any) -> int:
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InputError(f"seed must be a non-negative whole number; got {seed!r}. Give e.g. --seed 0.")
    return int(seed)


def sobol(d: int, n: int, seq: np.random.SeedSequence) -> np.ndarray:
    """First ``n`` points of a scrambled Sobol block of ``2^m >= n`` points in ``d`` dimensions."""
    m = max(0, math.ceil(math.log2(max(n, 1))))
    return qmc.Sobol(d, scramble=True, rng=np.random.default_rng(seq)).random_base2(m)[:n]


def _pick(u: np.ndarray, options) -> np.ndarray:
    options = list(options)
    idx = np.minimum((u * len(options)).astype(int), len(options) - 1)
    return np.asarray(options, dtype=object)[idx]


def _site_at(u: np.ndarray) -> np.ndarray:
    """``site_at`` from a uniform coordinate: transmitter, receiver, then path (:data:`TRANSDUCER_SITE_SHARE`)."""
    tx, rx = TRANSDUCER_SITE_SHARE["transmitter"], TRANSDUCER_SITE_SHARE["receiver"]
    return np.where(u < tx, "transmitter", np.where(u < tx + rx, "receiver", "path")).astype(str)


def _spans(coords: dict[str, np.ndarray], dom, table: dict[str, tuple[str, str]]) -> dict[str, np.ndarray]:
    out = {}
    for column, (dim, field) in table.items():
        lo, hi = getattr(dom, field)
        out[column] = lo + (hi - lo) * coords[dim]
    return out


def plan_campaign(family: Family | str | Path, n_cases: int, *, seed: int = 0) -> pd.DataFrame:
    """The sampling plan: one row per case with every sampled parameter (no truth yet)."""
    family = as_family(family)
    n = check_n_cases(n_cases)
    seed = check_seed(seed)
    dom = family.domain
    spp = dom.states_per_specimen
    n_spec = math.ceil(n / spp)
    us = sobol(len(SPECIMEN_DIMS), n_spec, np.random.SeedSequence(seed, spawn_key=(TAG_SPECIMEN_QMC,)))
    uc = sobol(len(STATE_DIMS), n, np.random.SeedSequence(seed, spawn_key=(TAG_STATE_QMC,)))
    S = dict(zip(SPECIMEN_DIMS, us.T))
    C = dict(zip(STATE_DIMS, uc.T))
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(TAG_PLAN,)))
    jitter_sd = dom.jitter_ns * 1e-9
    n_patch = 1 + np.minimum((S["n_patches"] * dom.max_patches).astype(int), dom.max_patches - 1)
    spec = pd.DataFrame({
        "specimen_index": np.arange(n_spec, dtype=np.int64),
        "shape": _pick(S["shape"], dom.shapes).astype(str),
        "sides": _pick(S["sides"], dom.sides).astype(str),
        "n_patches": n_patch.astype(np.int64),
        **_spans(S, dom, _SPECIMEN_SPANS),
        "baseline_jitter_s": rng.normal(0.0, jitter_sd, n_spec) if jitter_sd > 0 else np.zeros(n_spec),
    })
    spec["site_at"] = _site_at(S["site_at"])
    half = 0.5 * np.minimum(spec["patch_length_mm"].to_numpy() * 1e-3, 0.9 * family.path_length_m)
    from_end = S["position"] * half / family.path_length_m  # centre within half a patch of the disc
    spec["position_fraction"] = np.select([spec["site_at"] == "transmitter", spec["site_at"] == "receiver"],
                                          [from_end, 1.0 - from_end], spec["position_fraction"].to_numpy())
    spec["specimen_id"] = [f"S{j:06d}" for j in range(n_spec)]
    pristine = C["pristine"] < dom.pristine_fraction
    lo, hi = dom.max_loss_pct
    cases = pd.DataFrame({
        "case_index": np.arange(n, dtype=np.int64),
        "specimen_index": np.arange(n, dtype=np.int64) // spp,
        "state_index": np.arange(n, dtype=np.int64) % spp,
        "pristine": pristine,
        "max_loss_target_pct": np.where(pristine, 0.0, lo + (hi - lo) * C["max_loss"]),
        **_spans(C, dom, _STATE_SPANS),
        "jitter_s": rng.normal(0.0, jitter_sd, n) if jitter_sd > 0 else np.zeros(n),
    })
    cases["case_id"] = [f"C{i:07d}" for i in range(n)]
    out = cases.merge(spec, on="specimen_index", how="left", validate="many_to_one")
    front = ["case_id", "specimen_id", "case_index", "specimen_index", "state_index"]
    return out[front + [c for c in out.columns if c not in front]]
