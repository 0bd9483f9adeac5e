"""Temperature: predicted thermal delays, baseline signal stretch, optimal baseline selection.

A uniform temperature change T - T_ref changes the plate in three ways: the path and
the thickness grow by e = 1 + alpha dT, and E(T) = E_ref + dE/dT dT while rho falls as
rho_ref / e^3 (features.materials.Material.at_temperature). With Poisson's ratio held
fixed, every Lamb-wave velocity scales with the shear velocity c_T = sqrt(E / (2 rho (1 + nu)))
and depends on frequency-thickness only through f d / c_T, so

    v_g(f0, d e; T) = s v_g(f0 e / s, d; T_ref),    s = c_T(T) / c_T(T_ref)        (1)

(dimensional analysis of the Rayleigh-Lamb equations, Graff 1975, eq. 8.1.29), and the
arrival of a mode over the path L is t(T) = L e / v_g(f0, d e; T). One dispersion
computation at the reference temperature serves every temperature.

Low-frequency S0 (plate velocity sqrt(E / (rho (1 - nu^2)))): the relative delay per
kelvin is (1/t) dt/dT = alpha - (1/2)(E'/E + 3 alpha) = -(alpha + E'/E) / 2, about
+2.3e-4 /K for aluminium: a warmer plate is slower, the record stretches.

Baseline signal stretch (BSS): the baseline b(t) is stretched to b(t / a) about the
trigger and the factor a that maximises the correlation with the capture is kept;
what remains after the stretch is the residual 1 - rho^2 (Lu & Michaels 2005,
Ultrasonics 43, 717, doi:10.1016/j.ultras.2005.05.001; Croxford et al. 2010,
Ultrasonics 50, 517, doi:10.1016/j.ultras.2009.11.002). Optimal baseline selection
(OBS, Croxford et al. 2010) keeps, among several baselines of a path, the one
with the smallest residual after stretch.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.family import Family
from waneguide.features.signals import parabolic_peak

__all__ = [
    "ThermalModel",
    "StretchResult",
    "baseline_stretch",
    "select_baseline",
    "s0_low_frequency_coefficient_per_k",
]

MODES = ("S0", "A0")


def s0_low_frequency_coefficient_per_k(material) -> float:
    """(1/t) dt/dT of low-frequency S0 [1/K]: -(alpha + E'/E) / 2 (see module docstring)."""
    return -0.5 * (material.thermal_expansion_per_k + material.dE_dT_pa_per_k / material.youngs_modulus_pa)


class ThermalModel:
    """Predicted arrival time of S0 and A0 over a family's path at any temperature, eq. (1).

    Parameters
    ----------
    family : Family
    frequency_hz : float, optional
        Frequency at which group velocities are taken (default: the excitation centre).
    """

    def __init__(self, family: Family, *, frequency_hz: float | None = None):
        self.family = family
        self.material = family.build_material()
        self.frequency_hz = float(frequency_hz or family.excitation.centre_frequency_hz)
        self.thickness_m = family.nominal_thickness_m
        self.path_length_m = family.path_length_m
        f = self.frequency_hz * np.linspace(0.6, 1.6, 201)
        curves = fundamental_dispersion(self.material, [self.thickness_m], f)
        self._f = f
        self._vg = {m: curves.group_velocity_m_s[0, curves.mode_index(m)] for m in MODES}

    def _scales(self, temperature_c):
        m = self.material
        t = np.asarray(temperature_c, dtype=float)
        dt = t - m.reference_temperature_c
        e = 1.0 + m.thermal_expansion_per_k * dt
        youngs = m.youngs_modulus_pa + m.dE_dT_pa_per_k * dt
        rho = m.density_kg_m3 / e**3
        s = np.sqrt((youngs / m.youngs_modulus_pa) / (rho / m.density_kg_m3))
        return e, s

    def group_velocity_m_s(self, mode: str, temperature_c) -> np.ndarray:
        """Group velocity of ``mode`` at the centre frequency and nominal thickness at ``temperature_c``."""
        e, s = self._scales(temperature_c)
        return s * np.interp(self.frequency_hz * e / s, self._f, self._vg[mode])

    def arrival_time_s(self, mode: str, temperature_c) -> np.ndarray:
        """Group arrival time L e / v_g of ``mode`` over the path [s]."""
        e, _ = self._scales(temperature_c)
        return self.path_length_m * e / self.group_velocity_m_s(mode, temperature_c)

    def thermal_shift_s(self, mode: str, temperature_c, baseline_temperature_c) -> np.ndarray:
        """Predicted arrival shift of ``mode`` from the baseline temperature to the capture's [s]."""
        return self.arrival_time_s(mode, temperature_c) - self.arrival_time_s(mode, baseline_temperature_c)

    def shift_per_k(self, mode: str) -> float:
        """d t / d T at the reference temperature [s/K] (central difference over +-1 K)."""
        t0 = self.material.reference_temperature_c
        return float((self.arrival_time_s(mode, t0 + 1.0) - self.arrival_time_s(mode, t0 - 1.0)) / 2.0)

    def relative_coefficient_per_k(self, mode: str) -> float:
        """(1/t) dt/dT at the reference temperature [1/K]."""
        return self.shift_per_k(mode) / float(self.arrival_time_s(mode, self.material.reference_temperature_c))

    @property
    def a0_over_s0_ratio(self) -> float:
        """(dt_A0/dT) / (dt_S0/dT): the weight that cancels temperature in A0 - r S0."""
        return self.shift_per_k("A0") / self.shift_per_k("S0")


@dataclass(frozen=True)
class StretchResult:
    """Baseline signal stretch of each row.

    Attributes
    ----------
    factor : ndarray
        Stretch factor a (capture ~ baseline(t / a)); a > 1: the capture is slower.
    correlation : ndarray
        Correlation coefficient after the stretch.
    residual : ndarray
        1 - correlation^2 after the stretch (normalised residual energy after the best scaling).
    unstretched_residual : ndarray
        The same without stretch (a = 1).
    stretched_baseline : ndarray
        The baseline stretched by ``factor`` on the window samples.

    The factor multiplies propagation times measured from the stretch origin.
    """

    factor: np.ndarray
    correlation: np.ndarray
    residual: np.ndarray
    unstretched_residual: np.ndarray
    stretched_baseline: np.ndarray


def _stretched(baseline, q):
    """Linear interpolation of rows of ``baseline`` at fractional indices ``q`` (1-D shared or 2-D per row)."""
    n = baseline.shape[-1]
    q = np.clip(q, 0.0, n - 1.000001)
    i = np.floor(q).astype(np.intp)
    w = q - i
    if q.ndim == 1:
        return baseline[:, i] * (1.0 - w) + baseline[:, i + 1] * w
    b0 = np.take_along_axis(baseline, i, axis=-1)
    b1 = np.take_along_axis(baseline, i + 1, axis=-1)
    return b0 * (1.0 - w) + b1 * w


def _corr(x, xn, b):
    bn = np.sqrt((b * b).sum(-1))
    with np.errstate(divide="ignore", invalid="ignore"):
        return (x * b).sum(-1) / (xn * bn)


def baseline_stretch(
    captures: np.ndarray,
    baselines: np.ndarray,
    *,
    sample_rate_hz: float,
    pretrigger_s: float,
    start: int,
    stop: int,
    max_stretch: float = 0.025,
    coarse_step: float = 0.002,
    fine_steps: int = 9,
    origin_s: float = 0.0,
    stride: int = 1,
) -> StretchResult:
    """Best stretch factor a in [1 - max_stretch, 1 + max_stretch] per row (BSS), on samples [start, stop).

    The baseline is stretched about ``origin_s`` (trigger time axis):
    b_a(t) = b(origin + (t - origin) / a). Propagation delays scale with temperature,
    so the natural origin is the moment the burst centre leaves the transmitter
    (cycles / (2 f0) after the trigger); about the trigger itself the factor would
    come out smaller by (t - t_c) / t.

    Coarse grid search with step ``coarse_step``, then a fine grid of ``fine_steps``
    points across one coarse step around the best point, then a parabola through the
    best fine point and its neighbours.
    """
    x = np.atleast_2d(np.asarray(captures, dtype=float))
    b = np.atleast_2d(np.asarray(baselines, dtype=float))
    n_rows = x.shape[0]
    idx_full = np.arange(start, stop)
    t_full = idx_full / sample_rate_hz - pretrigger_s - origin_s
    # the searches correlate every ``stride``-th sample: a sum over samples of the product
    # of two band-limited records equals its integral while the product's band (twice the
    # signal's) stays below the reduced Nyquist frequency; the final figures use every sample
    t = t_full[::stride]
    pretrigger_s = pretrigger_s + origin_s  # index of time t (relative to origin): (t + pre + origin) fs
    xw_full = x[:, start:stop]
    xw = xw_full[:, ::stride]
    xn = np.sqrt((xw * xw).sum(-1))
    n_c = int(np.ceil(max_stretch / coarse_step))
    coarse = 1.0 + coarse_step * np.arange(-n_c, n_c + 1)
    rho_c = np.empty((n_rows, coarse.size))
    for j, a in enumerate(coarse):
        rho_c[:, j] = _corr(xw, xn, _stretched(b, (t / a + pretrigger_s) * sample_rate_hz))
    j_best = np.argmax(rho_c, axis=-1)
    centre = coarse[j_best]
    offs = coarse_step * np.linspace(-1.0, 1.0, fine_steps)
    fine = centre[:, None] + offs[None, :]
    rho_f = np.empty_like(fine)
    for j in range(fine_steps):
        q = (t[None, :] / fine[:, j:j + 1] + pretrigger_s) * sample_rate_hz
        rho_f[:, j] = _corr(xw, xn, _stretched(b, q))
    jf = np.argmax(rho_f, axis=-1)
    frac, _ = parabolic_peak(rho_f, jf)
    step_f = offs[1] - offs[0]
    a_best = centre + offs[0] + frac * step_f
    q = (t_full[None, :] / a_best[:, None] + pretrigger_s) * sample_rate_hz
    bs = _stretched(b, q)
    xn_full = np.sqrt((xw_full * xw_full).sum(-1))
    rho = _corr(xw_full, xn_full, bs)
    rho0 = _corr(xw_full, xn_full, b[:, start:stop])
    return StretchResult(a_best, rho, 1.0 - rho**2, 1.0 - rho0**2, bs)


def select_baseline(capture: np.ndarray, baselines: np.ndarray, baseline_temperature_c, temperature_c,
                    **stretch_kwargs) -> tuple[int, np.ndarray]:
    """Optimal baseline selection: index of the baseline with the smallest residual after stretch.

    Ties (residuals within 1e-12) go to the baseline nearest in temperature. Returns
    (index, residuals of every baseline).
    """
    b = np.atleast_2d(np.asarray(baselines, dtype=float))
    x = np.broadcast_to(np.atleast_2d(np.asarray(capture, dtype=float)), b.shape)
    res = baseline_stretch(x, b, **stretch_kwargs).residual
    temps = np.asarray(baseline_temperature_c, dtype=float)
    dist = np.abs(temps - (np.nan if temperature_c is None else float(temperature_c)))
    dist = np.where(np.isfinite(dist), dist, np.inf)
    order = np.lexsort((dist, np.round(res, 12)))
    return int(order[0]), res
