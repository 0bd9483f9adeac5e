"""waneguide.features: plate-wave physics and the feature extractor.

Materials
    :class:`Material`, :func:`get_material`, :func:`load_material`,
    :func:`resolve_material`, :data:`BUILTIN_MATERIALS`.
Dispersion (Rayleigh-Lamb, free isotropic plate)
    :func:`lamb_dispersion` (all modes), :func:`fundamental_dispersion` (S0/A0 fast path),
    :class:`DispersionCurves`, :func:`rayleigh_velocity`, :func:`viktorov_rayleigh_velocity`,
    :func:`cutoff_frequency_thickness`, :func:`kirchhoff_a0_phase_velocity`.
"""
from __future__ import annotations

from .dispersion import (
    DISPERSION_COLUMNS,
    DispersionCurves,
    cutoff_frequency_thickness,
    fundamental_dispersion,
    kirchhoff_a0_phase_velocity,
    lamb_dispersion,
    rayleigh_velocity,
    viktorov_rayleigh_velocity,
)
from .materials import (
    BUILTIN_MATERIALS,
    Material,
    builtin_material_names,
    get_material,
    load_material,
    material_from_mapping,
    resolve_material,
)

__all__ = [
    "BUILTIN_MATERIALS",
    "DISPERSION_COLUMNS",
    "DispersionCurves",
    "Material",
    "builtin_material_names",
    "cutoff_frequency_thickness",
    "fundamental_dispersion",
    "get_material",
    "kirchhoff_a0_phase_velocity",
    "lamb_dispersion",
    "load_material",
    "material_from_mapping",
    "rayleigh_velocity",
    "resolve_material",
    "viktorov_rayleigh_velocity",
]
