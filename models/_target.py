"""Per-target prediction and the training domain of a bundle (arithmetic only, no files).

:class:`TargetModel` turns a feature matrix into an estimate and a conformal band for one
target; :class:`TrainingDomain` holds the per-feature quantiles and the reference sample
of the training data. Both are re-exported by :mod:`waneguide.models.bundle`.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

__all__ = ["TARGETS", "TargetModel", "TrainingDomain", "as_array", "frame_X"]

#: Targets every bundle predicts: deepest loss [% of nominal], deepest loss [mm], path-averaged loss [%].
TARGETS = ("max_loss_pct", "max_loss_mm", "mean_loss_pct")


def as_array(X) -> np.ndarray:
    return X.to_numpy(dtype=float) if isinstance(X, pd.DataFrame) else np.asarray(X, dtype=float)


def frame_X(df: pd.DataFrame, columns: Sequence[str]) -> pd.DataFrame:
    """The ``columns`` of ``df`` as floats (missing columns NaN, non-numeric values coerced to NaN)."""
    X = df.reindex(columns=list(columns))
    bad = [c for c in X.columns if not pd.api.types.is_numeric_dtype(X[c])]
    if bad:
        X[bad] = X[bad].apply(pd.to_numeric, errors="coerce")
    return X.astype(float)


@dataclass
class TrainingDomain:
    """Where the model was trained: per-feature quantiles and a reference sample.

    Attributes
    ----------
    quantiles : DataFrame indexed by feature, columns min, q01, q50, q99, max
    reference : DataFrame, up to 1,000 training feature rows (for drift tests)
    """

    quantiles: pd.DataFrame
    reference: pd.DataFrame

    @classmethod
    def from_features(cls, X: pd.DataFrame, *, n_reference: int = 1000, rng=None) -> "TrainingDomain":
        rng = np.random.default_rng(rng)
        q = X.quantile([0.0, 0.01, 0.5, 0.99, 1.0]).T
        q.columns = ["min", "q01", "q50", "q99", "max"]
        idx = rng.choice(len(X), size=min(n_reference, len(X)), replace=False)
        return cls(q, X.iloc[np.sort(idx)].reset_index(drop=True))

    @property
    def ranges(self) -> dict[str, tuple[float, float]]:
        """feature -> (min, max) seen in training."""
        return {k: (float(r["min"]), float(r["max"])) for k, r in self.quantiles.iterrows()}

    def to_json(self) -> dict:
        return {k: {c: (None if not np.isfinite(v) else float(v)) for c, v in r.items()}
                for k, r in self.quantiles.iterrows()}

    @classmethod
    def from_json(cls, data: Mapping, reference: pd.DataFrame) -> "TrainingDomain":
        q = pd.DataFrame.from_dict(data, orient="index").astype(float)
        return cls(q[["min", "q01", "q50", "q99", "max"]], reference)


@dataclass
class TargetModel:
    """Everything that predicts one target: centre, scale, optional GP blend and correction, calibration.

    Prediction: mu_sim(x) = w * LightGBM(x) + (1 - w) * GP(x_gp); sigma(x) = max(scale(x), floor);
    with a measured-data correction g the estimate is mu_sim + g(x) and the band is CV+ over the
    correction's fold models (see :class:`waneguide.models.conformal.ConformalCalibrator`).
    """

    name: str
    central: Any
    scale: Any
    sigma_floor: float
    calibrator: Any
    gp: Any = None
    gp_columns: list[str] = field(default_factory=list)
    gp_weight: float = 0.0  # weight of the GP in the blend (0: LightGBM only)
    gp_fill: list[float] = field(default_factory=list)  # training medians for NaN GP inputs
    correction: Any = None
    lower_bound: float = 0.0
    upper_bound: float | None = None

    def centre_sim(self, X) -> np.ndarray:
        Xn = as_array(X)
        mu = self.central.predict_array(Xn)
        if self.gp is not None and self.gp_weight > 0:
            mu = (1.0 - self.gp_weight) * mu + self.gp_weight * self.gp.predict_array(self._gp_X(X))
        return mu

    def _gp_X(self, X) -> np.ndarray:
        if not isinstance(X, pd.DataFrame):
            raise ValueError("TargetModel needs a DataFrame with named feature columns")
        G = X[self.gp_columns].to_numpy(dtype=float)
        fill = np.asarray(self.gp_fill, dtype=float)
        return np.where(np.isfinite(G), G, fill[None, :]) if G.size else G

    def sigma(self, X) -> np.ndarray:
        return np.maximum(self.scale.predict_array(as_array(X)), self.sigma_floor)

    def _corr_X(self, X) -> np.ndarray:
        return self._gp_X(X) if self.gp_columns else as_array(X)

    def predict(self, X: pd.DataFrame, coverage: float, limit=None) -> dict[str, np.ndarray]:
        mu_sim = self.centre_sim(X)
        s = self.sigma(X)
        if self.correction is not None:
            Xc = self._corr_X(X)
            est = mu_sim + self.correction.predict(Xc)
            centres = mu_sim[:, None] + self.correction.predict_folds(Xc)
        else:
            est, centres = mu_sim, mu_sim
        lo, hi = self.calibrator.interval(centres, s, coverage)
        hi_b = math.inf if self.upper_bound is None else self.upper_bound
        out = {
            "estimate": np.clip(est, self.lower_bound, hi_b),
            # known support: clip finite bounds to it; an infinite band stays infinite (honest)
            "lower": np.where(np.isfinite(lo), np.clip(lo, self.lower_bound, hi_b), lo),
            "upper": np.where(np.isfinite(hi), np.clip(hi, self.lower_bound, hi_b), hi),
        }
        if limit is not None:
            out["exceed"] = self.calibrator.exceedance(centres, s, limit)
        return out
