"""waneguide.features: plate-wave physics and the feature extractor.

Materials
    :class:`Material`, :func:`get_material`, :func:`load_material`,
    :func:`resolve_material`, :data:`BUILTIN_MATERIALS`.
Dispersion (Rayleigh-Lamb, free isotropic plate)
    :func:`lamb_dispersion` (all modes), :func:`fundamental_dispersion` (S0/A0 fast path),
    :class:`DispersionCurves`, :func:`rayleigh_velocity`, :func:`viktorov_rayleigh_velocity`,
    :func:`cutoff_frequency_thickness`, :func:`kirchhoff_a0_phase_velocity`.
Captures and files
    :class:`Capture`; readers/writers in :mod:`features.io` (:func:`read_capture`,
    :func:`write_capture`, :func:`read_captures`; formats in docs/capture-format.md).
Quality gate
    :func:`assess_quality`, :class:`QualityReport`, :class:`CaptureRejected`.
Feature extraction
    :class:`FeatureExtractor`, :func:`extract_feature_table`, :func:`feature_columns`,
    :func:`describe_features`, :data:`FEATURE_SCHEMA_VERSION`, :func:`write_feature_table`,
    :func:`read_feature_table`; building blocks in :mod:`features.signals`,
    :mod:`features.arrivals`, :mod:`features.compensation`, :mod:`features.temperature`.
Conventional estimate
    :func:`conventional_estimate`, :func:`conventional_estimate_frame`.
"""
from __future__ import annotations

from waneguide.features.dispersion import (
    DISPERSION_COLUMNS,
    DispersionCurves,
    cutoff_frequency_thickness,
    fundamental_dispersion,
    kirchhoff_a0_phase_velocity,
    lamb_dispersion,
    rayleigh_velocity,
    viktorov_rayleigh_velocity,
)
from waneguide.features.materials import (
    BUILTIN_MATERIALS,
    Material,
    builtin_material_names,
    get_material,
    load_material,
    material_from_mapping,
    resolve_material,
)

from waneguide.features.capture import Capture

# The feature-extraction names load on first use (PEP 562), so that importing
# features.family or features.dispersion stays light (no pandas / joblib).
_LAZY = {
    "conventional_estimate": "conventional",
    "conventional_estimate_frame": "conventional",
    "FeatureExtractor": "extractor",
    "extract_feature_table": "extractor",
    "read_capture": "io",
    "read_captures": "io",
    "write_capture": "io",
    "CaptureRejected": "quality",
    "QualityReport": "quality",
    "assess_quality": "quality",
    "FEATURE_SCHEMA_VERSION": "schema",
    "describe_features": "schema",
    "feature_columns": "schema",
    "read_feature_table": "schema",
    "write_feature_table": "schema",
}


def __getattr__(name):
    if name in _LAZY:
        import importlib

        value = getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'features' has no attribute {name!r}")


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
    "Capture",
    "CaptureRejected",
    "FEATURE_SCHEMA_VERSION",
    "FeatureExtractor",
    "QualityReport",
    "assess_quality",
    "conventional_estimate",
    "conventional_estimate_frame",
    "describe_features",
    "extract_feature_table",
    "feature_columns",
    "read_capture",
    "read_captures",
    "read_feature_table",
    "write_capture",
    "write_feature_table",
]
