"""The in-memory capture: one received waveform of one pitch-catch path, plus metadata.

Everything downstream (quality gate, features, models) sees only this object:
readers in :mod:`features.io` turn files into it, writers turn it back into files.

Time axis: sample ``i`` is at ``t_i = i / sample_rate_hz - pretrigger_s`` seconds
after the excitation trigger (so the trigger is at t = 0).
Amplitudes are held in volts; readers convert mV and ADC counts at the edge.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np

__all__ = ["Capture", "CAPTURE_METADATA_KEYS"]

#: Documented metadata keys shared by every capture file format.
CAPTURE_METADATA_KEYS = (
    "path_id",
    "captured_at",
    "temperature_c",
    "sample_rate_hz",
    "pretrigger_s",
    "excitation_khz",
    "cycles",
    "units",
    "counts_scale_v",
)


@dataclass(frozen=True, eq=False)
class Capture:
    """One received waveform.

    Parameters
    ----------
    amplitude_v : ndarray, shape (n,)
        Received signal [V].
    sample_rate_hz : float
        Sampling rate [Hz].
    pretrigger_s : float, default 0
        Time recorded before the trigger [s].
    path_id : str
        Identifier of the transducer pair (path).
    captured_at : str or None
        ISO 8601 timestamp.
    temperature_c : float or None
        Structure temperature at capture [degC].
    excitation_khz, cycles : float or None
        Tone-burst centre frequency [kHz] and number of cycles, when recorded.
    units : str, default "V"
        Units the file stored amplitudes in (``V``, ``mV`` or ``counts``); the array is always volts.
    counts_scale_v : float or None
        Volts per count, for ``units = "counts"``.
    source : str or None
        File the capture came from.
    extra : mapping
        Any further header keys, kept verbatim.
    """

    amplitude_v: np.ndarray
    sample_rate_hz: float
    pretrigger_s: float = 0.0
    path_id: str = ""
    captured_at: str | None = None
    temperature_c: float | None = None
    excitation_khz: float | None = None
    cycles: float | None = None
    units: str = "V"
    counts_scale_v: float | None = None
    source: str | None = None
    extra: Mapping[str, Any] = field(default_factory=dict)

    @property
    def n_samples(self) -> int:
        return int(np.asarray(self.amplitude_v).shape[-1])

    @property
    def time_s(self) -> np.ndarray:
        """Time of each sample relative to the trigger [s]."""
        return np.arange(self.n_samples) / self.sample_rate_hz - self.pretrigger_s

    def metadata(self) -> dict[str, Any]:
        """The documented metadata as a plain dict (None for missing keys)."""
        return {k: getattr(self, k) for k in CAPTURE_METADATA_KEYS}
