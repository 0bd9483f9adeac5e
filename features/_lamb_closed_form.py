"""Closed-form pieces of free-plate wave theory: Rayleigh velocity, Kirchhoff flexure, Lamb cut-offs.

Used by the Rayleigh-Lamb root finder (:mod:`features._lamb_roots`: bounds and completeness
counts) and re-exported by :mod:`features.dispersion`.

References
----------
K. F. Graff, *Wave Motion in Elastic Solids*, Dover, 1975.
I. A. Viktorov, *Rayleigh and Lamb Waves*, Plenum, 1967.
"""
from __future__ import annotations

import math

import numpy as np
from scipy.optimize import brentq

from waneguide.features.materials import Material

__all__ = [
    "rayleigh_velocity",
    "viktorov_rayleigh_velocity",
    "kirchhoff_a0_phase_velocity",
    "cutoff_frequency_thickness",
]


def rayleigh_velocity(material: Material) -> float:
    """Exact Rayleigh surface-wave velocity [m/s].

    Root xi = c_R / c_T in (0, 1) of the Rayleigh equation
    (2 - xi^2)^2 - 4 sqrt(1 - xi^2) sqrt(1 - kappa^2 xi^2) = 0, kappa = c_T / c_L
    (Viktorov 1967, eq. 1.6; Graff 1975, eq. 6.3.8).
    """
    kappa2 = (material.ct_m_s / material.cl_m_s) ** 2

    def f(xi: float) -> float:
        x2 = xi * xi
        return (2.0 - x2) ** 2 - 4.0 * math.sqrt(1.0 - x2) * math.sqrt(1.0 - kappa2 * x2)

    xi = brentq(f, 0.5, 1.0 - 1e-15, xtol=1e-15, rtol=4 * np.finfo(float).eps)
    return xi * material.ct_m_s


def viktorov_rayleigh_velocity(material: Material) -> float:
    """Viktorov's approximation c_R ~ c_T (0.87 + 1.12 nu) / (1 + nu) [m/s].

    Viktorov 1967, eq. 1.9; stated there as accurate to better than 0.5 % for
    0 < nu < 0.5 (accuracy figure quoted from memory).
    """
    nu = material.poisson_ratio
    return material.ct_m_s * (0.87 + 1.12 * nu) / (1.0 + nu)


def kirchhoff_a0_phase_velocity(material: Material, thickness_m, frequency_hz) -> np.ndarray:
    """Kirchhoff thin-plate flexural phase velocity (w^2 D / (rho d))^(1/4) [m/s].

    Graff 1975, sec. 4.2: c = sqrt(w) (D / (rho d))^(1/4), D = E d^3 / (12 (1 - nu^2)).
    """
    d = np.asarray(thickness_m, dtype=float)
    w = 2.0 * np.pi * np.asarray(frequency_hz, dtype=float)
    stiff = material.youngs_modulus_pa * d**2 / (12.0 * (1.0 - material.poisson_ratio**2) * material.density_kg_m3)
    return np.sqrt(w) * stiff**0.25


def cutoff_frequency_thickness(material: Material, fd_max_hz_m: float) -> dict[str, list[float]]:
    """Cut-off frequency-thickness products [Hz*m] below ``fd_max_hz_m``, per family.

    Symmetric: n c_T and (2n + 1) c_L / 2; antisymmetric: (2n + 1) c_T / 2 and n c_L
    (Graff 1975, sec. 8.1.3). Sorted ascending; entry i is the cut-off of mode i + 1.
    """
    ct, cl = material.ct_m_s, material.cl_m_s
    sym: list[float] = []
    anti: list[float] = []
    n = 1
    while n * ct / 2.0 < fd_max_hz_m or n * cl / 2.0 < fd_max_hz_m:
        for c in (ct, cl):
            fd = n * c / 2.0
            if fd >= fd_max_hz_m:
                continue
            # qh = n pi/2 (shear, c = ct) or ph = n pi/2 (longitudinal, c = cl):
            # even n on the shear root and odd n on the longitudinal root are symmetric.
            is_sym = (n % 2 == 0) if c is ct else (n % 2 == 1)
            (sym if is_sym else anti).append(fd)
        n += 1
    return {"S": sorted(sym), "A": sorted(anti)}
