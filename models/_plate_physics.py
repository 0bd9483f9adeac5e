"""Rayleigh-Lamb arithmetic of the out-of-family plate check: how a changed plate moves S0 and A0.

The mismatch physics check (:mod:`waneguide.models._physics_check`) compares a baseline's S0
group delay and A0 thickness gauge with the family's plate. This module says what each kind of
change does to the fundamental modes' group delays over the path, from the Rayleigh-Lamb
curves (:func:`waneguide.features.dispersion.fundamental_dispersion`) at the excitation centre:

* S0 at low frequency-thickness travels at the plate velocity
  ``c_plate = sqrt(E / (rho (1 - nu^2))) = 2 c_T sqrt(1 - c_T^2 / c_L^2)`` (Graff 1975,
  *Wave Motion in Elastic Solids*, sec. 8.1), independent of thickness: a shear speed lower by
  3 % slows it by about 2 %, a longitudinal one by about 1 %, a thickness change hardly at all
  (its residual dispersion: about +0.1 % of delay for a 15 % thicker plate at 0.3 MHz mm);
* A0 is strongly dispersive (Graff sec. 4.2, c_g ~ sqrt(f d) at low fd): a 15 % thicker plate
  arrives about 3.5 % earlier, a uniformly thinned one later;
* a longer path delays both by its own fraction, as an overall slower plate would.

So no wall loss can slow S0 (thinning lowers f d, and S0's group velocity rises towards the
plate velocity), and no loss can make the pristine A0 gauge read thicker. :func:`shifted_material`
builds the changed alloys the training's shifted-family calibration simulates.
"""
from __future__ import annotations

import math
from dataclasses import replace

from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.materials import Material

__all__ = ["group_delays_s", "shifted_material", "relative_delay_change",
           "s0_delay_sensitivity", "s0_loss_advance"]


def shifted_material(material: Material, *, shear: float = 1.0, longitudinal: float = 1.0,
                     density: float = 1.0) -> Material:
    """``material`` with its bulk shear / longitudinal speed or its density scaled.

    ``shear`` and ``longitudinal`` scale c_T and c_L with the density and the other speed held;
    ``density`` scales rho with E and nu held (every speed then scales by density^-1/2: a denser
    alloy of the same stiffness). dE/dT is scaled with E, so the relative temperature behaviour
    (and the family's thermal compensation) stays that of ``material``.
    """
    for name, v in (("shear", shear), ("longitudinal", longitudinal), ("density", density)):
        if not (math.isfinite(v) and v > 0):
            raise ValueError(f"{name} factor must be positive; got {v!r}")  # programming error
    cl = material.cl_m_s * longitudinal / math.sqrt(density)
    ct = material.ct_m_s * shear / math.sqrt(density)
    rho = material.density_kg_m3 * density
    new = Material.from_velocities(f"{material.name}-shifted", cl_m_s=cl, ct_m_s=ct, density_kg_m3=rho)
    return replace(material, name=new.name, youngs_modulus_pa=new.youngs_modulus_pa,
                   poisson_ratio=new.poisson_ratio, density_kg_m3=rho,
                   dE_dT_pa_per_k=material.dE_dT_pa_per_k * new.youngs_modulus_pa / material.youngs_modulus_pa,
                   source=f"{material.source}; shifted (c_T x {shear:g}, c_L x {longitudinal:g}, rho x {density:g})")


def group_delays_s(material: Material, thickness_m: float, path_length_m: float, frequency_hz: float) -> dict:
    """Rayleigh-Lamb group delays ``{"S0": t, "A0": t}`` [s] over ``path_length_m`` at ``frequency_hz``."""
    curves = fundamental_dispersion(material, [float(thickness_m)], [float(frequency_hz)])
    vg = curves.group_velocity_m_s[0, :, 0]
    return {m: float(path_length_m / vg[curves.mode_index(m)]) for m in ("S0", "A0")}


def relative_delay_change(family, *, thickness: float = 1.0, path: float = 1.0, shear: float = 1.0,
                          longitudinal: float = 1.0, density: float = 1.0) -> dict:
    """Relative change of the S0 and A0 group delays of ``family``'s plate when it is changed.

    Factors multiply the flange thickness, the path length, the shear / longitudinal speed and
    the density (see :func:`shifted_material`), at the reference temperature and the excitation
    centre. Returns ``{"S0": dt/t, "A0": dt/t}``.
    """
    mat = family.build_material()
    f0 = family.excitation.centre_frequency_hz
    d0, L = family.nominal_thickness_m, family.path_length_m
    ref = group_delays_s(mat, d0, L, f0)
    new = group_delays_s(shifted_material(mat, shear=shear, longitudinal=longitudinal, density=density),
                         d0 * thickness, L * path, f0)
    return {m: new[m] / ref[m] - 1.0 for m in ref}


def s0_delay_sensitivity(family, *, step: float = 0.01) -> dict:
    """d ln t_S0 / d ln q of the family's plate for q = shear speed, longitudinal speed, thickness, path.

    Central differences over +-``step`` (Rayleigh-Lamb). In the low-frequency limit the plate
    velocity 2 c_T sqrt(1 - k), k = c_T^2 / c_L^2, gives -(1 - 2k) / (1 - k) for the shear speed,
    -k / (1 - k) for the longitudinal one, 0 for the thickness and 1 for the path; the numbers
    here include the small dispersion of S0 at the family's frequency-thickness.
    """
    out = {}
    for kind in ("shear", "longitudinal", "thickness", "path"):
        up = relative_delay_change(family, **{kind: 1.0 + step})["S0"]
        down = relative_delay_change(family, **{kind: 1.0 - step})["S0"]
        out[kind] = (math.log1p(up) - math.log1p(down)) / (math.log1p(step) - math.log1p(-step))
    return out


def s0_loss_advance(family, loss_fraction: float) -> float:
    """Relative S0 delay change of a plate uniformly thinned by ``loss_fraction`` (negative: faster)."""
    return relative_delay_change(family, thickness=1.0 - float(loss_fraction))["S0"]

