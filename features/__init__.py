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
Mode windows
    :func:`mode_windows`, :class:`ModeWindow` (:mod:`features.windows`: where S0 and A0 arrive).
Quality gate
    :func:`assess_quality`, :class:`QualityReport`, :class:`CaptureRejected`; the rule table
    :data:`features.quality.QUALITY_RULES`.
Feature extraction
    :class:`FeatureExtractor`, :func:`extract_feature_table`, :func:`feature_columns`,
    :func:`feature_groups`, :func:`describe_features`, :data:`FEATURE_SCHEMA_VERSION`, :func:`write_feature_table`,
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

from waneguide.core.lazy import lazy_exports
from waneguide.features.capture import Capture

# The feature-extraction names load on first use (waneguide.core.lazy, PEP 562), so that
# importing features.family or features.dispersion does not pull in the extractor's
# libraries (joblib, pyarrow, h5py).
__getattr__, __dir__ = lazy_exports(__name__, {
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
    "feature_groups": "schema",
    "read_feature_table": "schema",
    "write_feature_table": "schema",
    "ModeWindow": "windows",
    "mode_windows": "windows",
}, globals())

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
    "feature_groups",
    "mode_windows",
    "ModeWindow",
    "read_capture",
    "read_captures",
    "read_feature_table",
    "write_capture",
    "write_feature_table",
]
