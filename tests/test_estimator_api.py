"""scikit-learn API conformance of every estimator waneguide wraps.

Reference: scikit-learn's own estimator checks (sklearn.utils.estimator_checks,
the same harness scikit-learn-contrib/project-template runs in
skltemplate/tests/test_common.py). Small settings keep the checks quick; the
checks themselves decide what passes.
"""
from __future__ import annotations

from sklearn.utils.estimator_checks import parametrize_with_checks

from waneguide.models.gbm import MonotoneGBMRegressor
from waneguide.models.gp import StandardisedGPRegressor
from waneguide.models.mismatch import MismatchDetector
from waneguide.models.residual import ResidualCorrector

ESTIMATORS = [
    MonotoneGBMRegressor(n_estimators=20, min_child_samples=2, random_state=0),
    StandardisedGPRegressor(max_points=60, random_state=0),
    ResidualCorrector(n_splits=3, random_state=0),
    MismatchDetector(n_estimators=20, random_state=0),
]


@parametrize_with_checks(ESTIMATORS)
def test_sklearn_compatible(estimator, check):
    check(estimator)
