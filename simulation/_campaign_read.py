"""Reading a finished campaign folder: :func:`load_campaign` and :class:`Campaign`.

Every chunk read is checked against the SHA-256 recorded in manifest.json; a changed or
damaged chunk raises :class:`~waneguide.core.errors.InputError` naming the file, the expected
and the found digest, and the fix.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import numpy as np
import pandas as pd

from waneguide.core.atomic import file_sha256
from waneguide.core.errors import InputError, MissingInputError
from waneguide.features.capture import Capture
from waneguide.features.family import Family, family_from_mapping
from waneguide.simulation._campaign_io import (
    CAMPAIGN_FORMAT_VERSION,
    check_present,
    digest_error,
    read_chunk,
    read_manifest,
)
from waneguide.simulation.profiles import ThinningProfile

__all__ = ["Campaign", "load_campaign"]

_SIMULATED_WITH = {
    "fast": "free-plate S0/A0 model (approximations listed in waneguide.simulation.forward)",
    "full": "full-wave solver (waneguide.simulation.fullwave) and the fast model's confounders and noise",
}


def _from_manifest(key: str, cast, doc: str) -> property:
    return property(lambda self: cast(self.manifest[key]), doc=doc)


@dataclass
class Campaign:
    """A finished campaign folder (see :mod:`waneguide.simulation.campaign`); use :func:`load_campaign`.

    Attributes
    ----------
    path : Path
    manifest : dict
    family : Family
    family_fingerprint, fingerprint : str
    cases : DataFrame
        One row per case: ``case_id``, ``specimen_id``, truth columns, confounders, plan.
    sample_rate_hz, pretrigger_s : float
    n_samples : int
    """

    path: Path
    manifest: dict
    family: Family
    cases: pd.DataFrame

    def __post_init__(self) -> None:
        self._cache: tuple[int, dict] | None = None
        self.run_info: dict | None = None  # set by run_campaign: computed/reused chunks, seconds

    def summary(self) -> str:
        """A few lines describing the campaign (what `waneguide simulate` prints)."""
        c = self.cases
        size = sum(p.stat().st_size for p in self.path.rglob("*") if p.is_file())
        lines = [
            f"campaign {self.fingerprint} of family {self.family.name} (fingerprint {self.family_fingerprint}), "
            f"seed {self.seed}",
            f"  {len(c)} cases on {c['specimen_id'].nunique()} specimens, {len(self.manifest['chunks'])} chunk(s), "
            f"{self.n_samples} samples at {self.sample_rate_hz / 1e6:g} MHz, {size / 1e6:.1f} MB on disk",
            f"  max loss {c['max_loss_pct'].min():.1f} to {c['max_loss_pct'].max():.1f} % "
            f"(mean {c['max_loss_pct'].mean():.1f} %), {int((c['max_loss_pct'] == 0).sum())} pristine state(s)",
            f"  temperature {c['temperature_c'].min():.1f} to {c['temperature_c'].max():.1f} degC, "
            f"SNR {c['snr_db'].min():.1f} to {c['snr_db'].max():.1f} dB",
            f"  simulated with the {_SIMULATED_WITH[self.fidelity]}",
        ]
        cal = (self.manifest.get("fullwave") or {}).get("calibration")
        if cal:
            lines.append(f"  full-wave amplitude scale {cal['amplitude_scale_v_per_unit']:.4g} V per (m/s per N/m) "
                         f"from a pristine run; S0 / A0 window peaks {cal['s0_peak_full_over_fast']:.2f} / "
                         f"{cal['a0_peak_full_over_fast']:.2f} x the fast model's")
        if self.run_info is not None:
            ri = self.run_info
            lines.insert(1, f"  {ri['computed_chunks']} chunk(s) computed, {ri['reused_chunks']} kept from an "
                            f"earlier run, {ri['seconds']:.1f} s")
            if ri.get("runs"):
                lines.insert(2, f"  {ri['runs']} full-wave run(s), {ri['run_seconds'] / ri['runs']:.2f} s each "
                                "(cases and baselines)")
        return "\n".join(lines)

    @property
    def fidelity(self) -> str:
        """``fast`` (modal synthesis) or ``full`` (full-wave records); campaigns written before it was recorded are fast."""
        return str(self.manifest.get("fidelity", "fast"))

    fingerprint = _from_manifest("campaign_fingerprint", str, "Campaign fingerprint (16 hex digits).")
    family_fingerprint = _from_manifest("family_fingerprint", str, "Fingerprint of the family simulated.")
    sample_rate_hz = _from_manifest("sample_rate_hz", float, "Sampling rate [Hz].")
    pretrigger_s = _from_manifest("pretrigger_s", float, "Pre-trigger of every record [s].")
    n_samples = _from_manifest("record_length", int, "Samples per record.")
    seed = _from_manifest("seed", int, "The campaign's seed.")

    def __len__(self) -> int:
        return len(self.cases)

    def _read(self, k: int) -> dict[str, np.ndarray]:
        entry = self.manifest["chunks"][k]
        return read_chunk(self.path / entry["file"], entry["sha256"])

    def _chunk(self, k: int) -> dict[str, np.ndarray]:
        if self._cache is None or self._cache[0] != k:
            self._cache = (k, self._read(k))
        return self._cache[1]

    def iter_chunks(self, *, with_profiles: bool = False) -> Iterator[tuple]:
        """Yield ``(cases_slice, waveforms_v, baselines_v)`` per chunk (float32, shape (n, N) each).

        ``baselines_v[i]`` is the pristine baseline of case ``i``'s specimen.
        With ``with_profiles=True`` a fourth item, ``thickness_m`` (n, n_segments), follows.
        Each chunk is checked against its SHA-256 as it is read.
        """
        for k, entry in enumerate(self.manifest["chunks"]):
            z = self._read(k)
            waves, bases = z["waveforms_v"], z["baselines_v"][z["baseline_row"]]
            sl = self.cases.iloc[entry["first_case"]: entry["first_case"] + entry["n_cases"]]
            yield (sl, waves, bases, z["thickness_m"]) if with_profiles else (sl, waves, bases)

    def _locate(self, i: int) -> tuple[dict, int, pd.Series]:
        if not 0 <= int(i) < len(self.cases):
            raise InputError(f"case index {i} is outside this campaign (0 to {len(self.cases) - 1}); "
                             "give a row position of Campaign.cases.")
        cs = int(self.manifest["chunk_size"])
        arrays = self._chunk(int(i) // cs)
        return arrays, int(i) % cs, self.cases.iloc[int(i)]

    def _capture(self, wave, row, role: str, temperature_c: float) -> Capture:
        exc = self.family.excitation
        return Capture(
            amplitude_v=np.asarray(wave, dtype=np.float64),
            sample_rate_hz=self.sample_rate_hz,
            pretrigger_s=self.pretrigger_s,
            path_id=str(row["specimen_id"]),
            captured_at=None,
            temperature_c=float(temperature_c),
            excitation_khz=exc.centre_frequency_khz,
            cycles=float(exc.cycles),
            units="V",
            extra={"simulated": True, "fidelity": self.fidelity, "role": role, "case_id": str(row["case_id"]),
                   "specimen_id": str(row["specimen_id"]), "campaign_fingerprint": self.fingerprint,
                   "family": self.family.name, "family_fingerprint": self.family_fingerprint},
        )

    def capture(self, i: int) -> Capture:
        """The simulated capture of case ``i`` (row position in :attr:`cases`)."""
        arrays, j, row = self._locate(i)
        return self._capture(arrays["waveforms_v"][j], row, "capture", row["temperature_c"])

    def baseline(self, i: int) -> Capture:
        """The pristine baseline of case ``i``'s specimen."""
        arrays, j, row = self._locate(i)
        return self._capture(arrays["baselines_v"][arrays["baseline_row"][j]], row, "baseline",
                             row["baseline_temperature_c"])

    def profile(self, i: int) -> ThinningProfile:
        """The thickness profile of case ``i`` as a :class:`~waneguide.simulation.profiles.ThinningProfile`."""
        arrays, j, row = self._locate(i)
        fam = self.family
        seg = float(self.manifest["segment_m"])
        x = (np.arange(int(self.manifest["n_segments"])) + 0.5) * seg
        return ThinningProfile(x, arrays["thickness_m"][j].astype(float), fam.nominal_thickness_m,
                               fam.path_length_m, patch_count=int(row["patch_count"]),
                               shape="pristine" if row["max_loss_pct"] == 0 else str(row["shape"]),
                               sides=str(row["sides"]), transducer_radius_m=fam.path.transducer_diameter_mm * 0.5e-3)

    def verify(self) -> None:
        """Check every chunk against its SHA-256 in the manifest (InputError on the first mismatch)."""
        for entry in self.manifest["chunks"]:
            path = self.path / entry["file"]
            check_present(path)
            found = file_sha256(path)
            if found != entry["sha256"]:
                raise digest_error(path, entry["sha256"], found)


def load_campaign(out_dir: str | Path) -> Campaign:
    """Open a finished campaign folder.

    Checks the manifest (format, completeness, family fingerprint) and that every chunk file
    is present; each chunk's SHA-256 is checked when it is read.
    """
    out = Path(out_dir)
    if not out.is_dir():
        raise MissingInputError(f"campaign folder {out} does not exist; give the --out folder of "
                                "`waneguide simulate`.")
    man = read_manifest(out)
    if man is None or man.get("format") != "waneguide-campaign":
        raise InputError(f"{out} is not a waneguide campaign folder (no campaign manifest.json); give the --out "
                         "folder of `waneguide simulate`.")
    if man.get("format_version") != CAMPAIGN_FORMAT_VERSION:
        raise InputError(f"{out}: campaign format {man.get('format_version')} is not supported "
                         f"(this version reads format {CAMPAIGN_FORMAT_VERSION}); re-simulate it into a new folder.")
    if man.get("status") != "complete" or not (out / "cases.parquet").exists():
        done = len(list((out / "chunks").glob("chunk_*.npz"))) if (out / "chunks").exists() else 0
        raise InputError(f"campaign {out} is incomplete ({done} of {man.get('n_chunks')} chunks); rerun "
                         "`waneguide simulate` with the same arguments to resume it.")
    family = family_from_mapping(man["family"], where=f"{out / 'manifest.json'}: family")
    if family.fingerprint != man["family_fingerprint"]:
        raise InputError(f"{out}: the family stored in manifest.json does not match its fingerprint "
                         f"{man['family_fingerprint']}; the manifest was edited. Re-simulate into a new folder.")
    for entry in man["chunks"]:
        check_present(out / entry["file"])
    expected = man.get("cases_sha256")
    if expected is not None:  # campaigns written before this check carry no hash of their case table
        found = file_sha256(out / "cases.parquet")
        if found != expected:
            raise InputError(
                f"campaign case table {out / 'cases.parquet'} does not match its SHA-256 in manifest.json (expected "
                f"{expected}, found {found}): the ground truth was changed or damaged. Delete cases.parquet and re-run "
                "`waneguide simulate` with the same arguments: it rebuilds the table from the plan and the chunks.")
    cases = pd.read_parquet(out / "cases.parquet")
    return Campaign(path=out, manifest=man, family=family, cases=cases)
