"""Out-of-family detector: statistical novelty score with a conformal p-value, plus physics checks.

Statistical part (:class:`MismatchDetector`). Two novelty scores on the
standardised feature vector,

* robust squared Mahalanobis distance to the Minimum Covariance Determinant
  estimate (Rousseeuw & Van Driessen 1999, doi:10.1080/00401706.1999.10485670;
  sklearn ``MinCovDet``), and
* the IsolationForest anomaly score (Liu, Ting, Zhou 2008, doi:10.1109/ICDM.2008.17),

are each turned into a rank u in [0, 1] against the in-family fitting sample and
combined as s = max(u_MCD, u_IF). A held-out in-family calibration sample gives
the conformal p-value (Vovk et al. 2005; Laxhammar & Falkman 2015 for conformal
anomaly detection)

    p(x) = (1 + #{i : s_i >= s(x)}) / (n_cal + 1),

and a capture is flagged when p <= false_alarm_rate. For in-family
(exchangeable) data P(p <= eps) <= eps, so the stated false-alarm rate holds by
construction.

Standardisation. Each feature is centred on its median and divided by a robust scale: the
largest of IQR / 1.349, the central 99 % range / (2 x 2.576) (both a Gaussian sd; the second
keeps a feature whose bulk is narrow but whose in-family tail is long, such as a packet focus
bounded by 1, from turning ordinary in-family damage into z-scores in the hundreds) and a floor,
the feature's physical resolution (:func:`feature_resolution`), so that a spread that happens to
collapse in a campaign does not either. Features that are degenerate on the training data (too
few distinct values, or most rows on one value: pinned at a search-grid bound)
are left out (:func:`degenerate_features`; the training drops them from the whole model and the
model card lists them).

Physics part (:class:`~waneguide.models._physics_check.PhysicsChecker`, re-exported here): the
plate check (baseline S0 delay and A0 thickness gauge against the family's plate at the
baseline's temperature, pooled over the baselines of a path), negative apparent loss, and the
excitation and sample rate.

A flagged capture still gets its numbers; the bundle marks them out of domain.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator
from sklearn.covariance import MinCovDet
from sklearn.ensemble import IsolationForest
from sklearn.ensemble._iforest import _average_path_length  # private: the exact c(n) IsolationForest adds
from sklearn.utils.validation import check_is_fitted, validate_data

from waneguide.core.errors import InputError
from waneguide.features.schema import describe_features
from waneguide.models._physics_check import NEGATIVE_LOSS_REASON, PHYSICS_FEATURES, PhysicsChecker
from waneguide.models.conformal import grouped_split

__all__ = ["MismatchDetector", "PhysicsChecker", "PHYSICS_FEATURES", "NEGATIVE_LOSS_REASON", "combine_mismatch",
           "degenerate_features", "feature_resolution", "has_negative_loss", "PLATE_FEATURES"]

#: Baseline features of the plate itself (its S0 / A0 timing and thickness gauge). The physics check
#: judges them against the family's stated tolerances; in a simulated campaign the plate is exact,
#: so their spread there is measurement noise only and the statistical detector leaves them out
#: (a real plate within tolerance would otherwise read as tens of campaign standard deviations).
PLATE_FEATURES = ("baseline_s0_arrival_s", "s0_baseline_arrival_envelope_s", "s0_baseline_arrival_threshold_s",
                  "a0_baseline_arrival_envelope_s", "a0_baseline_arrival_threshold_s", "baseline_a0_thickness_ratio")
#: A feature is degenerate on the training data with fewer distinct values than this ...
MIN_DISTINCT = 10
#: ... or with at least this share of its rows on one value.
MAX_MODE_SHARE = 0.5


def degenerate_features(X: pd.DataFrame) -> dict[str, str]:
    """Columns of ``X`` that carry no usable spread, each with the reason in words.

    Degenerate: no finite value; fewer than ``max(MIN_DISTINCT, 1 % of the rows)`` distinct
    values; or ``MAX_MODE_SHARE`` of the rows or more on one value (a search pinned at a bound
    of its grid, e.g. the S0 sharpest thickness: S0 is hardly dispersive at low frequency-thickness,
    so its refocusing does not pick a thickness).
    """
    out = {}
    for c in X.columns:
        v = pd.to_numeric(X[c], errors="coerce").to_numpy(dtype=float)
        v = v[np.isfinite(v)]
        if not v.size:
            out[c] = "no finite value in the training data"
            continue
        u, counts = np.unique(v, return_counts=True)
        need = max(MIN_DISTINCT, int(math.ceil(0.01 * v.size)))
        share = counts.max() / v.size
        if u.size == 1:
            out[c] = f"constant ({u[0]:.6g}) in all {v.size} training rows"
        elif u.size < need:
            out[c] = f"only {u.size} distinct values in {v.size} training rows (fewer than {need})"
        elif share >= MAX_MODE_SHARE:
            out[c] = (f"{share:.0%} of the {v.size} training rows at one value ({u[np.argmax(counts)]:.6g}): "
                      "pinned, e.g. at a bound of its search grid")
    return out


def feature_resolution(columns, family) -> np.ndarray:
    """Physical resolution of each feature column (the floor of its robust scale), by unit.

    Times: a tenth of a sample (what a parabola-refined peak resolves; common practice, no
    source). Distances: the distance S0 covers in that time, thicknesses a tenth of the 2.5 %
    candidate step of the sharpest-thickness search. Levels 0.1 dB, temperatures 0.1 K, voltages
    1e-3 of full scale, frequencies one spectral bin of the record, dimensionless ratios 1e-3.
    Columns the schema does not describe get 0 (no floor).
    """
    units = dict(zip(*describe_features()[["name", "unit"]].to_numpy().T))
    fs = family.acquisition.sample_rate_hz
    dt = 0.1 / fs
    v_plate = family.build_material().plate_velocity_m_s
    table = {"s": dt, "Hz": fs / family.acquisition.record_length, "dB": 0.1, "degC": 0.1, "K": 0.1,
             "V": 1e-3 * family.full_scale_v, "1": 1e-3}
    out = []
    for c in columns:
        u = units.get(c)
        if u == "m":
            out.append(0.0025 * family.nominal_thickness_m if "thickness" in c else dt * v_plate)
        else:
            out.append(float(table.get(u, 0.0)))
    return np.asarray(out, dtype=float)


def _pack_forest(iforest) -> dict:
    """IsolationForest trees as padded arrays for a vectorised traversal (all trees at once).

    ``leaf_depth`` holds, per node, the decision-path length plus the average path length
    c(n_node_samples) minus one, i.e. exactly what sklearn adds per tree
    (sklearn/ensemble/_iforest.py, ``_parallel_compute_tree_depths``).
    """
    trees = [e.tree_ for e in iforest.estimators_]
    T, M = len(trees), max(t.node_count for t in trees)
    left = np.full((T, M), -1, dtype=np.int32)
    right = np.full((T, M), -1, dtype=np.int32)
    feat = np.zeros((T, M), dtype=np.int32)
    thr = np.zeros((T, M), dtype=np.float64)
    leaf_depth = np.zeros((T, M), dtype=np.float64)
    for i, (t, fs) in enumerate(zip(trees, iforest.estimators_features_)):
        n = t.node_count
        left[i, :n], right[i, :n] = t.children_left, t.children_right
        # map the tree's (subsampled) feature index back to the full column index
        feat[i, :n] = np.asarray(fs)[np.maximum(t.feature, 0)]
        thr[i, :n] = t.threshold
        depth = np.zeros(n)
        for node in range(n):  # parents precede children in sklearn's node order
            for child in (t.children_left[node], t.children_right[node]):
                if child != -1:
                    depth[child] = depth[node] + 1
        leaf_depth[i, :n] = depth + 1 + _average_path_length(t.n_node_samples) - 1.0
    return {"left": left, "right": right, "feature": feat, "threshold": thr, "leaf_depth": leaf_depth,
            "max_depth": int(max(t.max_depth for t in trees)),
            "denominator": float(T * _average_path_length([iforest._max_samples])[0])}


def _forest_score(packed: dict, Z: np.ndarray) -> np.ndarray:
    """-score_samples of the packed IsolationForest (larger = more anomalous)."""
    Zf = np.asarray(Z, dtype=np.float32)  # sklearn trees compare float32 inputs
    n, T = len(Zf), packed["left"].shape[0]
    tix = np.arange(T)[None, :]
    node = np.zeros((n, T), dtype=np.int64)
    rows = np.arange(n)[:, None]
    for _ in range(packed["max_depth"] + 1):
        lft = packed["left"][tix, node]
        inner = lft != -1
        if not inner.any():
            break
        go_left = Zf[rows, packed["feature"][tix, node]] <= packed["threshold"][tix, node]
        node = np.where(inner, np.where(go_left, lft, packed["right"][tix, node]), node)
    depths = packed["leaf_depth"][tix, node].sum(axis=1)
    den = packed["denominator"]
    return 2.0 ** (-(depths / den)) if den else np.ones(n)


class MismatchDetector(BaseEstimator):
    """Conformal novelty detector (MinCovDet + IsolationForest), see module docstring.

    Parameters
    ----------
    false_alarm_rate : float, default 0.01
        In-family flag rate the p-value threshold guarantees.
    calibration_fraction : float, default 0.3
    max_fit_points : int, default 3000
        Rows used to fit MinCovDet / IsolationForest (random subset above it).
    n_estimators : int, default 200
        IsolationForest trees.
    support_fraction : float or None, default 0.97
        MinCovDet support fraction. The in-family training data are simulated, hence not
        contaminated: the covariance must span the in-family damage variation, and trimming 3 %
        only guards against failed feature estimates. (sklearn's default, about half the points,
        made severe in-family damage look foreign: AUROC for a +15 % thicker flange fell from
        0.97 to 0.94-0.96 on a 2,000-case demo campaign, measured.)
    ridge : float, default 1e-3
        Added to the MCD covariance diagonal (standardised units) before inversion.
    scale_floor : array-like of shape (n_features,) or None
        Least robust scale of each feature, in its units (the training passes
        :func:`feature_resolution`); None: no floor.
    random_state : int or None

    Attributes
    ----------
    columns_ : ndarray of int, columns used (constant ones dropped)
    median_, scale_ : robust centring (median) and scale per column: max(IQR / 1.349, central 99 %
        range / 5.152, ``scale_floor``), the standard deviation when all three are 0
    mcd_, iforest_ : fitted sklearn models
    precision_ : inverse of the ridge-regularised MCD covariance
    rank_deficient_ : bool, MinCovDet reported a singular covariance (collinear features)
    forest_ : dict of arrays, the IsolationForest packed for vectorised scoring (same scores as
        ``-iforest_.score_samples``, checked in tests/test_mismatch.py)
    ref_md_, ref_if_ : sorted reference scores (fitting sample)
    cal_scores_ : sorted combined scores of the calibration sample
    """

    def __init__(self, *, false_alarm_rate=0.01, calibration_fraction=0.3, max_fit_points=3000, n_estimators=200,
                 support_fraction=0.97, ridge=1e-3, scale_floor=None, random_state=None):
        self.ridge = ridge
        self.scale_floor = scale_floor
        self.false_alarm_rate = false_alarm_rate
        self.calibration_fraction = calibration_fraction
        self.max_fit_points = max_fit_points
        self.n_estimators = n_estimators
        self.support_fraction = support_fraction
        self.random_state = random_state

    def fit(self, X, y=None, groups=None):
        """Fit on in-family rows; ``groups`` (e.g. specimen) keeps calibration groups apart from fitting ones."""
        if not 0.0 < float(self.false_alarm_rate) < 1.0:
            raise ValueError(f"false_alarm_rate must lie in (0, 1); got {self.false_alarm_rate!r}")
        X = validate_data(self, X, ensure_all_finite="allow-nan", dtype=np.float64, ensure_min_samples=10)
        rng = np.random.default_rng(self.random_state)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns: NaN scale, dropped below
            med = np.nanmedian(X, axis=0)
            q995, q75, q25, q005 = np.nanpercentile(X, [99.5, 75, 25, 0.5], axis=0)
            std = np.nanstd(X, axis=0)
        # Gaussian sd from the IQR (1.349 sigma) and from the central 99 % (2 x 2.576 sigma): the larger
        floor = np.zeros(X.shape[1]) if self.scale_floor is None else np.asarray(self.scale_floor, dtype=float)
        if floor.shape != (X.shape[1],):
            raise ValueError(f"scale_floor needs one value per feature ({X.shape[1]}); got shape {floor.shape}")
        scale = np.fmax(np.fmax((q75 - q25) / 1.349, (q995 - q005) / 5.152), floor)
        scale = np.where(scale > 0, scale, std)
        self.columns_ = np.flatnonzero(np.isfinite(scale) & (scale > 0))
        if self.columns_.size == 0:
            raise InputError("every feature is constant in the training data; the mismatch detector has nothing "
                             "to learn. Train on a campaign whose cases vary")
        self.median_ = np.where(np.isfinite(med), med, 0.0)
        self.scale_ = np.where(scale > 0, scale, 1.0)
        Z = self._standardise(X)
        n = len(Z)
        if groups is not None:
            is_cal = grouped_split(np.asarray(groups), self.calibration_fraction, rng)
            cal, fit = np.flatnonzero(is_cal), rng.permutation(np.flatnonzero(~is_cal))
        else:
            perm = rng.permutation(n)
            n_cal = max(5, int(round(self.calibration_fraction * n)))
            cal, fit = perm[:n_cal], perm[n_cal:]
        if len(fit) > self.max_fit_points:
            fit = fit[: int(self.max_fit_points)]
        seed = lambda: int(rng.integers(2**31 - 1))  # noqa: E731
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            self.mcd_ = MinCovDet(support_fraction=self.support_fraction, random_state=seed()).fit(Z[fit])
        self.rank_deficient_ = any("not full rank" in str(w.message) for w in caught)
        # ridge of 1e-3 (robust-standardised units): a direction with no spread in the family
        # (collinear features) gets weight 1e3 instead of being ignored by a pseudo-inverse
        self.precision_ = np.linalg.inv(self.mcd_.covariance_ + self.ridge * np.eye(Z.shape[1]))
        self.iforest_ = IsolationForest(n_estimators=int(self.n_estimators), random_state=seed(), n_jobs=1).fit(Z[fit])
        self.ref_md_ = np.sort(self._md(Z[fit]))
        self.forest_ = _pack_forest(self.iforest_)
        self.ref_if_ = np.sort(_forest_score(self.forest_, Z[fit]))
        self.cal_scores_ = np.sort(self._combined(Z[cal]))
        return self

    def _standardise(self, X):
        Z = (X - self.median_) / self.scale_
        Z = np.where(np.isfinite(Z), Z, 0.0)  # missing -> family median (reported by the physics checks)
        return np.clip(Z[:, self.columns_], -1e6, 1e6)

    def _md(self, Z):
        """Squared robust Mahalanobis distance with the ridge-regularised MCD covariance."""
        D = Z - self.mcd_.location_
        return np.einsum("ij,jk,ik->i", D, self.precision_, D)

    def _combined(self, Z):
        md = self._md(Z)
        u_md = np.searchsorted(self.ref_md_, md, side="right") / len(self.ref_md_)
        u_if = np.searchsorted(self.ref_if_, _forest_score(self.forest_, Z), side="right") / len(self.ref_if_)
        # tie-break above the reference range by the raw distance so far-off points rank highest
        extra = np.where(u_md >= 1.0, np.log1p(md / max(self.ref_md_[-1], 1e-12)), 0.0)
        return np.maximum(u_md, u_if) + extra

    def novelty_score(self, X) -> np.ndarray:
        """Combined novelty score (larger = less like the family)."""
        check_is_fitted(self, "cal_scores_")
        X = validate_data(self, X, reset=False, ensure_all_finite="allow-nan", dtype=np.float64)
        return self._combined(self._standardise(X))

    def p_value(self, X) -> np.ndarray:
        """Conformal p-value of each row (small = unlike the in-family calibration sample)."""
        return self._p_from_scores(self.novelty_score(X))

    def p_value_array(self, X: np.ndarray) -> np.ndarray:
        """Fast path of :meth:`p_value` without input validation (float array, fitted column order)."""
        return self._p_from_scores(self._combined(self._standardise(np.asarray(X, dtype=float))))

    def _p_from_scores(self, s):
        n = len(self.cal_scores_)
        count = n - np.searchsorted(self.cal_scores_, s, side="left")
        return (1.0 + count) / (n + 1.0)

    def predict(self, X) -> np.ndarray:
        """+1 in family, -1 flagged (sklearn outlier-detector convention)."""
        return np.where(self.p_value(X) > self.false_alarm_rate, 1, -1)

    def top_deviations(self, X, k: int = 3) -> list[list[tuple[str, float]]]:
        """Per row, the ``k`` features furthest from the robust centre (name, robust z)."""
        check_is_fitted(self, "cal_scores_")
        X = validate_data(self, X, reset=False, ensure_all_finite="allow-nan", dtype=np.float64)
        Z = self._standardise(X)  # robust z: (x - median) / scale
        names = np.asarray(getattr(self, "feature_names_in_", [f"x{j}" for j in range(self.n_features_in_)]))
        names = names[self.columns_]
        order = np.argsort(-np.abs(Z), axis=1)[:, :k]
        return [[(str(names[j]), float(Z[i, j])) for j in row] for i, row in enumerate(order)]

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
        return tags


def combine_mismatch(detector: MismatchDetector | None, checker: PhysicsChecker | None,
                     feature_df: pd.DataFrame, feature_columns, X: pd.DataFrame | None = None) -> pd.DataFrame:
    """``in_family``, ``mismatch_p_value``, ``mismatch_reasons`` ("; "-joined) per row.

    A capture reading thicker than its baseline gets a reason starting with
    :data:`NEGATIVE_LOSS_REASON` (see :func:`has_negative_loss`); like every reason it puts the
    row out of family.

    ``X``: the numeric feature matrix of ``feature_df`` (columns ``feature_columns``), when
    the caller already has it.
    """
    n = len(feature_df)
    reasons: list[list[str]] = [[] for _ in range(n)]
    cols = list(feature_columns)
    if X is None:
        X = feature_df.reindex(columns=cols).apply(pd.to_numeric, errors="coerce")
    nan_rows = X.isna().to_numpy()
    for i in np.flatnonzero(nan_rows.any(axis=1)):
        names = [cols[j] for j in np.flatnonzero(nan_rows[i])]
        shown = ", ".join(names[:4]) + (f" and {len(names) - 4} more" if len(names) > 4 else "")
        reasons[i].append(f"feature(s) {shown} could not be computed")
    if checker is not None and n:  # the physics first: its reasons say what to check
        for i, r in enumerate(checker.reasons(feature_df)):
            reasons[i].extend(r)
    p = np.full(n, math.nan)
    if detector is not None and n:
        names = getattr(detector, "feature_names_in_", None)
        Xd = X if names is None else X.reindex(columns=list(names))  # the detector may use a subset
        p = detector.p_value_array(Xd.to_numpy(dtype=float))
        flagged = p <= detector.false_alarm_rate
        if flagged.any():
            tops = detector.top_deviations(Xd.iloc[np.flatnonzero(flagged)])
            for i, top in zip(np.flatnonzero(flagged), tops):
                desc = ", ".join(f"{name} (z = {z:+.1f})" for name, z in top)
                reasons[i].append(f"features unlike the family's training data (p = {p[i]:.4f} <= "
                                  f"{detector.false_alarm_rate:g}); furthest: {desc}")
    return pd.DataFrame({"in_family": [not r for r in reasons], "mismatch_p_value": p,
                         "mismatch_reasons": ["; ".join(r) for r in reasons]}, index=feature_df.index)


def has_negative_loss(reasons) -> np.ndarray:
    """True where a ``mismatch_reasons`` text holds the negative-apparent-loss reason."""
    marker = NEGATIVE_LOSS_REASON + ":"
    return np.array([isinstance(r, str) and (r.startswith(marker) or f"; {marker}" in r) for r in reasons],
                    dtype=bool)
