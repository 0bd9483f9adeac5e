"""Flange-thickness gauge from the pristine baseline's A0 window (mismatch physics check).

The baseline is the sound flange of the path, so its A0 packet times the flange
thickness: A0 is strongly dispersive at low frequency-thickness (Graff 1975 sec. 8.1),
while the path length is fixed by the family. On the demo families the A0 window also
holds the S0 echoes from both flange ends (S0 is about twice as fast, so its end
echoes arrive with the direct A0 packet), which pulls an envelope-peak arrival by
microseconds. The gauge therefore fits, for each candidate thickness d, the baseline
spectrum U(w) over the excitation band by least squares with three templates

    A0 direct:       G(w) exp(-i k_A0(w; d) L)
    S0 near-end echo G(w) exp(-i k_S0(w; d) (L + 2 d_near))
    S0 far-end echo  G(w) exp(-i k_S0(w; d) (L + 2 d_far))

each with a free complex amplitude (coupling, excitability, reflection coefficient),
G = tone-burst spectrum x disc resonance^2 x disc aperture^2 of the mode (the one
excitation and transducer model, :class:`waneguide.features.excitation.ExcitationModel`,
as the simulator uses it: aperture at nominal thickness and reference temperature),
k from Rayleigh-Lamb.
The gauge is the candidate whose templates capture the largest fraction of the band
energy (parabola-refined), as a fraction of the nominal thickness.

Temperature: with Poisson's ratio fixed, the phase of a mode over the path at
temperature T is k_ref(w e / s; d) L (features.temperature eq. (1): lengths scale by
e = 1 + alpha dT, velocities by s), so the candidates' wavenumbers are taken at the
scaled frequency on a temperature grid and the energy fractions interpolated linearly
to the baseline temperature. The gauge reads the reference-temperature thickness.
"""
from __future__ import annotations

import numpy as np

from waneguide.core.errors import InputError
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.excitation import ExcitationModel
from waneguide.features.signals import parabolic_peak

__all__ = ["BaselineThicknessGauge"]


class BaselineThicknessGauge:
    """Least-squares A0 thickness gauge on the rfft bins of a gated A0 window.

    Parameters
    ----------
    family : Family
    thermal : features.temperature.ThermalModel (for the temperature scale factors)
    band_frequency_hz : ndarray (B,)
        rfft bin frequencies of the excitation band [Hz].
    segment_start_s : float
        Trigger time of the gated segment's first sample [s].
    fractions : ndarray, default 0.7 to 1.4 of nominal in steps of 0.01
    temperature_step_k : float, default 10
    """

    def __init__(self, family, thermal, band_frequency_hz, segment_start_s, *,
                 fractions=None, temperature_step_k: float = 10.0):
        fb = np.asarray(band_frequency_hz, dtype=float)
        self.fractions = np.arange(0.70, 1.4001, 0.01) if fractions is None else np.asarray(fractions, dtype=float)
        env = family.environment
        self.temperatures_c = np.arange(env.min_temperature_c - temperature_step_k,
                                        env.max_temperature_c + 1.5 * temperature_step_k, temperature_step_k)
        em = ExcitationModel.from_family(family)
        w = 2 * np.pi * fb
        mat = family.build_material()
        k_nom = fundamental_dispersion(mat, family.nominal_thickness_m, fb)
        G = {m: em.burst_spectrum(fb) * em.pair_response(fb) * np.exp(1j * w * segment_start_s)
             * em.pair_aperture(k_nom.wavenumber_rad_m[0, k_nom.mode_index(m)]) for m in ("S0", "A0")}
        L = family.path_length_m
        d_near, d_far = family.path.end_distances_m()
        paths = (("A0", L), ("S0", L + 2 * d_near), ("S0", L + 2 * d_far))
        d = family.nominal_thickness_m * self.fractions
        e_all, s_all = thermal._scales(self.temperatures_c)
        ratio = np.asarray(e_all / s_all, dtype=float)
        fg = np.linspace(fb[0] * min(ratio.min(), 1.0) * 0.98, fb[-1] * max(ratio.max(), 1.0) * 1.02, 240)
        curves = fundamental_dispersion(mat, d, fg)
        k = {m: curves.wavenumber_rad_m[:, curves.mode_index(m), :] for m in ("S0", "A0")}
        if not all(np.all(np.isfinite(v)) for v in k.values()):
            raise InputError(f"family {family.name}: thickness gauge: S0/A0 wavenumbers not found on the whole band "
                             "for every candidate thickness; check the material and the excitation band.")
        nT, J, P = self.temperatures_c.size, d.size, len(paths)
        Q = np.empty((nT, J, fb.size, P), complex)
        for it, r in enumerate(ratio):
            fq = fb * r
            for j in range(J):
                A = np.empty((fb.size, P), complex)
                for p, (mode, dist) in enumerate(paths):
                    A[:, p] = G[mode] * np.exp(-1j * np.interp(fq, fg, k[mode][j]) * dist)
                Q[it, j] = np.linalg.qr(A)[0]
        self._Qh = np.ascontiguousarray(Q.conj())

    def energy_fraction(self, band_spectrum, temperature_c) -> np.ndarray:
        """Fraction of the band energy the templates of each candidate explain, shape (n, J)."""
        U = np.atleast_2d(np.asarray(band_spectrum))
        T = np.broadcast_to(np.asarray(temperature_c, dtype=float), (U.shape[0],))
        ref = self.temperatures_c
        T = np.where(np.isfinite(T), T, 0.5 * (ref[0] + ref[-1]))
        pos = np.clip(np.interp(T, ref, np.arange(ref.size)), 0, ref.size - 1)
        i0 = np.clip(np.floor(pos).astype(int), 0, ref.size - 2)
        w1 = (pos - i0)[:, None]
        un = (np.abs(U) ** 2).sum(-1, keepdims=True)
        out = np.empty((U.shape[0], self.fractions.size))
        for t in np.unique(i0):
            r = np.flatnonzero(i0 == t)
            e0 = (np.abs(np.einsum("jbp,nb->njp", self._Qh[t], U[r])) ** 2).sum(-1)
            e1 = (np.abs(np.einsum("jbp,nb->njp", self._Qh[t + 1], U[r])) ** 2).sum(-1)
            out[r] = e0 * (1.0 - w1[r]) + e1 * w1[r]
        with np.errstate(divide="ignore", invalid="ignore"):
            return out / un

    def thickness_ratio(self, band_spectrum, temperature_c) -> np.ndarray:
        """Best candidate thickness over nominal per row (parabola-refined; NaN for an empty band)."""
        frac = self.energy_fraction(band_spectrum, temperature_c)
        bad = ~np.all(np.isfinite(frac), axis=-1)
        frac = np.where(np.isfinite(frac), frac, 0.0)
        j, _ = parabolic_peak(frac, np.argmax(frac, axis=-1))
        step = self.fractions[1] - self.fractions[0]
        return np.where(bad, np.nan, self.fractions[0] + j * step)
