"""scikit-learn API conformance of every estimator waneguide wraps.

Reference: scikit-learn's own estimator checks (sklearn.utils.estimator_checks,
the same harness scikit-learn-contrib/project-template runs in
skltemplate/tests/test_common.py). Small settings keep the checks quick; the
checks themselves decide what passes.
"""
from __future__ import annotations

from sklearn.utils.estimator_checks import parametrize_with_checks

from waneguide.models.blend import GroupedCVBlend
from waneguide.models.conformal import CQRRegressor, NormalisedConformalRegressor
from waneguide.models.gbm import MonotoneGBMRegressor, QuantileGBMRegressor
from waneguide.models.gp import StandardisedGPRegressor
from waneguide.models.mismatch import MismatchDetector
from waneguide.models.residual import ResidualCorrector

ESTIMATORS = [
    MonotoneGBMRegressor(n_estimators=20, min_child_samples=2, random_state=0),
    QuantileGBMRegressor(n_estimators=20, min_child_samples=2, random_state=0),
    NormalisedConformalRegressor(
        MonotoneGBMRegressor(n_estimators=20, min_child_samples=2, random_state=0),
        MonotoneGBMRegressor(n_estimators=10, min_child_samples=2, monotone_rules=(), random_state=0),
        random_state=0,
    ),
    CQRRegressor(n_estimators=20, min_child_samples=2, random_state=0),
    StandardisedGPRegressor(max_points=60, random_state=0),
    GroupedCVBlend(n_splits=3, random_state=0),
    ResidualCorrector(n_splits=3, random_state=0),
    MismatchDetector(n_estimators=20, random_state=0),
]


def _expected_failures(estimator):
    if isinstance(estimator, QuantileGBMRegressor):
        # LightGBM's quantile objective renews leaf values with a weighted percentile that
        # interpolates differently from repeating rows, so weights != repetitions by design
        # (LightGBM docs, "quantile" objective; not a waneguide defect).
        return {"check_sample_weight_equivalence_on_dense_data":
                "LightGBM weighted quantile renewal differs from row repetition"}
    return {}


@parametrize_with_checks(ESTIMATORS, expected_failed_checks=_expected_failures)
def test_sklearn_compatible(estimator, check):
    check(estimator)
