"""LightGBM wrappers: quantiles of a known distribution, physics monotonicity, native persistence."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from waneguide.models.gbm import (
    MonotoneGBMRegressor,
    QuantileGBMRegressor,
    monotonicity_audit,
    resolve_monotone_constraints,
)


def test_rules_resolve_by_name():
    names = ["a0_shift_xcorr_s", "s0_shift_xcorr_s", "a0_s0_differential_shift_s", "a0_thermal_shift_s"]
    assert resolve_monotone_constraints(names, (("a0_shift_*", 1), ("a0_s0_differential_shift_s", 1)), 4) == [1, 0, 1, 0]
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
    # LightGBM enforces the constraint on every split: exactly zero violation (float round-off only)
    assert monotonicity_audit(con.predict, X, "a0_delay_s", +1, n_grid=60, rng=1) <= 1e-12
    # the audit can fail: the unconstrained model follows the wiggle downwards
    assert monotonicity_audit(free.predict, X, "a0_delay_s", +1, n_grid=60, rng=1) > 0.05


def test_quantiles_of_known_heteroscedastic_distribution():
    """y = x + (0.2 + 0.5 x) Z, Z ~ N(0,1): true q_tau(x) = x + (0.2 + 0.5 x) Phi^-1(tau)."""
    rng = np.random.default_rng(1)
    n = 20_000
    x = rng.uniform(0, 2, n)
    y = x + (0.2 + 0.5 * x) * rng.normal(size=n)
    qs = (0.1, 0.5, 0.9)
    m = QuantileGBMRegressor(quantiles=qs, n_estimators=200, num_leaves=15, min_child_samples=50,
                             random_state=0).fit(x[:, None], y)
    grid = np.linspace(0.1, 1.9, 19)
    pred = m.predict_quantiles(grid[:, None])
    true = grid[:, None] + (0.2 + 0.5 * grid[:, None]) * stats.norm.ppf(qs)[None, :]
    # error in units of the local noise sd s(x) = 0.2 + 0.5 x. Typical error < 0.1 s: the sampling
    # sd of a quantile from the ~1,000 points a leaf sees is ~0.05 s; single grid points (near the
    # edges, where trees are step functions) may reach 0.5 s.
    rel = np.abs(pred - true) / (0.2 + 0.5 * grid[:, None])
    assert np.median(rel) < 0.1
    assert np.max(rel) < 0.5
    assert np.all(np.diff(m.predict_quantiles(rng.uniform(-1, 3, (500, 1))), axis=1) >= 0)  # never cross


def test_native_text_round_trip():
    rng = np.random.default_rng(2)
    X = pd.DataFrame(rng.normal(size=(500, 3)), columns=["a0_delay_s", "b", "c"])
    y = X.sum(axis=1) + 0.1 * rng.normal(size=500)
    m = MonotoneGBMRegressor(n_estimators=50, random_state=0).fit(X, y)
    text = m.to_text()
    assert text.startswith("tree")  # LightGBM's own text format, not a pickle
    m2 = MonotoneGBMRegressor.from_text(text, params=m.get_params(), feature_names=list(X.columns))
    np.testing.assert_array_equal(m.predict(X), m2.predict(X))
    assert m2.monotone_constraints_ == [1, 0, 0]


def test_quantile_objective_with_constraints_refused():
    X = pd.DataFrame({"a0_delay_s": np.arange(50.0)})
    with pytest.raises(ValueError, match="does not support monotone constraints with the quantile objective"):
        MonotoneGBMRegressor(objective="quantile").fit(X, np.arange(50.0))
