"""LightGBM wrapper: physics monotonicity on a probe grid, native persistence, refused settings.

Outside references: LightGBM's own guarantee that monotone constraints hold on every split
(LightGBM docs, "monotone_constraints"), and LightGBM's text model format.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from waneguide.models.gbm import (
    MonotoneGBMRegressor,
    monotonicity_audit,
    resolve_monotone_constraints,
)


def test_rules_resolve_by_name():
    names = ["a0_shift_xcorr_s", "s0_shift_xcorr_s", "a0_s0_differential_shift_s", "a0_thermal_shift_s"]
    rules = (("a0_shift_*", 1), ("a0_s0_differential_shift_s", 1))
    assert resolve_monotone_constraints(names, rules, 4) == [1, 0, 1, 0]
    assert resolve_monotone_constraints(None, (("a0_*", 1),), 2) == [0, 0]
    with pytest.raises(ValueError, match="sign must be"):
        resolve_monotone_constraints(names, (("a0_*", 2),), 4)


def test_monotonicity_audit_on_probe_grid():
    """Non-monotone truth: the constrained model must still never decrease along A0 delay."""
    rng = np.random.default_rng(0)
    n = 4000
    X = pd.DataFrame({"a0_delay_s": rng.uniform(0, 1, n), "other": rng.normal(size=n)})
    # wiggle of amplitude 0.3 against a slope 1 makes the truth locally decreasing
    y = X["a0_delay_s"] + 0.3 * np.sin(12 * X["a0_delay_s"]) + 0.2 * X["other"] + 0.05 * rng.normal(size=n)
    con = MonotoneGBMRegressor(n_estimators=200, random_state=0).fit(X, y)
    free = MonotoneGBMRegressor(n_estimators=200, monotone_rules=(), random_state=0).fit(X, y)
    assert con.monotone_constraints_ == [1, 0]
    # LightGBM enforces the constraint on every split (LightGBM docs, "monotone_constraints"): zero
    # violation up to float round-off of sums of leaf values ~1; 1e-12 is common practice, no source
    assert monotonicity_audit(con.predict, X, "a0_delay_s", +1, n_grid=60, rng=1) <= 1e-12
    # the audit can fail: the unconstrained model follows the wiggle downwards. The truth's slope
    # 1 + 3.6 cos(12 x) reaches -2.6, a drop of 2.6 / 59 = 0.044 per grid step; the fitted trees drop
    # in larger steps. The bound 0.05 is a regression value of this code
    assert monotonicity_audit(free.predict, X, "a0_delay_s", +1, n_grid=60, rng=1) > 0.05


def test_native_text_round_trip():
    rng = np.random.default_rng(2)
    X = pd.DataFrame(rng.normal(size=(500, 3)), columns=["a0_delay_s", "b", "c"])
    y = X.sum(axis=1) + 0.1 * rng.normal(size=500)
    m = MonotoneGBMRegressor(n_estimators=50, random_state=0).fit(X, y)
    text = m.to_text()
    assert text.startswith("tree")  # LightGBM's own text format, not a pickle
    m2 = MonotoneGBMRegressor.from_text(text, params=m.get_params(), feature_names=list(X.columns))
    # LightGBM writes leaf values with round-trip precision: identical predictions (exact equality)
    np.testing.assert_array_equal(m.predict(X), m2.predict(X))
    assert m2.monotone_constraints_ == [1, 0, 0]
    # and the rebuilt model is the booster LightGBM itself reads from that text
    import lightgbm as lgb

    np.testing.assert_array_equal(m2.predict(X), lgb.Booster(model_str=text).predict(X.to_numpy()))


def test_quantile_objective_with_constraints_refused():
    X = pd.DataFrame({"a0_delay_s": np.arange(50.0)})
    with pytest.raises(ValueError, match="does not support monotone constraints with the quantile objective"):
        MonotoneGBMRegressor(objective="quantile").fit(X, np.arange(50.0))
    # without constraints the quantile objective is LightGBM's: the fit works
    m = MonotoneGBMRegressor(objective="quantile", monotone_rules=(), n_estimators=5, min_child_samples=5).fit(
        X, np.arange(50.0))
    assert m.monotone_constraints_ == [0]
