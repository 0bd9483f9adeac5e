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

Physics part (:class:`PhysicsChecker`): readable reasons when the baseline S0
arrival does not fit the family's path length / alloy, when the baseline A0
arrival does not fit its flange thickness, when the baseline A0 thickness gauge
(features.thickness_gauge: Rayleigh-Lamb least-squares fit of the A0 window with
free S0 end-echo terms) departs from the in-family value, when the received frequency content
is off the excitation, or when the sample rate differs. Expected arrivals are
Rayleigh-Lamb group delays spacing / c_g(f_c, d_nominal) at the baseline's
temperature (features.temperature.ThermalModel); an offset common to the
in-family data (how the feature extractor times an arrival, e.g. the burst
centre) is learned from the training campaign together with its spread.

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
from waneguide.features.temperature import ThermalModel
from waneguide.models.conformal import grouped_split

__all__ = ["MismatchDetector", "PhysicsChecker", "PHYSICS_FEATURES", "combine_mismatch"]

#: Features the physics checks read (produced by features.extractor).
PHYSICS_FEATURES = ("baseline_s0_arrival_s", "capture_peak_frequency_hz", "sample_rate_hz",
                    "baseline_a0_thickness_ratio")


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
    random_state : int or None

    Attributes
    ----------
    columns_ : ndarray of int, columns used (constant ones dropped)
    median_, scale_ : robust centring (median) and scale (IQR / 1.349) per column
    mcd_, iforest_ : fitted sklearn models
    precision_ : inverse of the ridge-regularised MCD covariance
    rank_deficient_ : bool, MinCovDet reported a singular covariance (collinear features)
    forest_ : dict of arrays, the IsolationForest packed for vectorised scoring (same scores as
        ``-iforest_.score_samples``, checked in tests/test_mismatch.py)
    ref_md_, ref_if_ : sorted reference scores (fitting sample)
    cal_scores_ : sorted combined scores of the calibration sample
    """

    def __init__(self, *, false_alarm_rate=0.01, calibration_fraction=0.3, max_fit_points=3000, n_estimators=200,
                 support_fraction=0.97, ridge=1e-3, random_state=None):
        self.ridge = ridge
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
        med = np.nanmedian(X, axis=0)
        q75, q25 = np.nanpercentile(X, [75, 25], axis=0)
        scale = (q75 - q25) / 1.349  # IQR of a normal = 1.349 sigma
        std = np.nanstd(X, axis=0)
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
        self.mcd_scale_ = np.sqrt(np.clip(np.diag(self.mcd_.covariance_), 1e-12, None))
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
        """Per row, the ``k`` features furthest from the robust centre (name, z)."""
        check_is_fitted(self, "cal_scores_")
        X = validate_data(self, X, reset=False, ensure_all_finite="allow-nan", dtype=np.float64)
        Z = (self._standardise(X) - self.mcd_.location_) / self.mcd_scale_
        names = np.asarray(getattr(self, "feature_names_in_", [f"x{j}" for j in range(self.n_features_in_)]))
        names = names[self.columns_]
        order = np.argsort(-np.abs(Z), axis=1)[:, :k]
        return [[(str(names[j]), float(Z[i, j])) for j in row] for i, row in enumerate(order)]

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
        return tags


class PhysicsChecker:
    """Family-bound physics plausibility checks with readable reasons.

    Baseline arrivals (the baseline is the pristine record of the path, so its arrival
    times measure the path, not the damage):

    * S0, nearly dispersion-free at low frequency-thickness, times the path length and
      the alloy (plate velocity);
    * A0, strongly dispersive (c_g ~ sqrt(f d) at low fd; Graff 1975 sec. 4.2), times the
      flange thickness.

    Each expected arrival is the Rayleigh-Lamb group delay at the baseline's own
    temperature (features.temperature.ThermalModel: expansion and dE/dT), plus the
    extractor's timing offset and the spread learned from the in-family campaign.

    Parameters
    ----------
    family : features.family.Family
    arrival_rel_tol : float, default 0.0075
        Least tolerance on the baseline S0 arrival, as a fraction of the expected time
        (the 2024-T3 / 7075-T6 plate velocities differ by 1.5 %).
    a0_arrival_rel_tol : float, default 0.02
        Least tolerance on the baseline A0 arrival (a 15 % thicker demo-fb2 flange moves it by ~3.5 %).
    frequency_rel_tol : float, default 0.25
        Least tolerance on the peak frequency, as a fraction of the centre frequency.
    sample_rate_rel_tol : float, default 1e-3
    spread_factor : float, default 6
        Tolerances widen to ``spread_factor`` robust standard deviations of the in-family values.
    thickness_rel_tol : float, default 0.03
        Least tolerance on the baseline A0 thickness gauge (features.thickness_gauge), as a
        fraction of the nominal thickness; it also widens to ``spread_factor`` robust standard
        deviations and 1.25 x the ``tail_quantile`` of the in-family deviations.
    tail_quantile : float, default 0.999
        Arrival tolerances also widen to 1.25 x this quantile of the in-family absolute
        deviations, so that the physics checks alone flag at most about 0.1 % of in-family
        baselines (echo overlap spreads the A0 envelope arrival with heavy tails).
    """

    _ARRIVALS = (
        # mode, feature column(s) tried in order, tolerance attribute, what to check
        ("S0", ("baseline_s0_arrival_s", "s0_baseline_arrival_envelope_s"), "arrival_rel_tol",
         "check the transducer spacing and the alloy"),
        ("A0", ("a0_baseline_arrival_envelope_s",), "a0_arrival_rel_tol",
         "check the flange thickness"),
    )

    def __init__(self, family, *, arrival_rel_tol=0.0075, a0_arrival_rel_tol=0.02, frequency_rel_tol=0.25,
                 sample_rate_rel_tol=1e-3, spread_factor=6.0, tail_quantile=0.999, thickness_rel_tol=0.03):
        self.family = family
        self.thickness_rel_tol = thickness_rel_tol
        self.tail_quantile = tail_quantile
        self._thermal_model = None  # features.temperature.ThermalModel, built on first use
        self.arrival_rel_tol = arrival_rel_tol
        self.a0_arrival_rel_tol = a0_arrival_rel_tol
        self.frequency_rel_tol = frequency_rel_tol
        self.sample_rate_rel_tol = sample_rate_rel_tol
        self.spread_factor = spread_factor
        self.state: dict = {}

    def _thermal(self):
        if self._thermal_model is None:
            self._thermal_model = ThermalModel(self.family)
        return self._thermal_model

    def expected_s0_arrival_s(self) -> float:
        """spacing / c_g of S0 at the centre frequency, nominal thickness, reference temperature."""
        return self.expected_arrival_s("S0")

    def expected_arrival_s(self, mode: str, temperature_c=None):
        """Rayleigh-Lamb group delay of ``mode`` over the path at ``temperature_c`` [s]."""
        t = self.family.build_material().reference_temperature_c if temperature_c is None else temperature_c
        out = self._thermal().arrival_time_s(mode, t)
        return float(out) if np.ndim(out) == 0 else out

    def _base_state(self) -> dict:
        return {"expected_s0_arrival_s": self.expected_s0_arrival_s(),
                "expected_a0_arrival_s": self.expected_arrival_s("A0"),
                "centre_frequency_hz": self.family.excitation.centre_frequency_hz,
                "sample_rate_hz": self.family.acquisition.sample_rate_hz}

    def _robust(self, values):
        """(median, 1.4826 MAD, 1.25 x the tail quantile of |x - median|) of the finite values, or ().

        1.4826 MAD estimates a Gaussian standard deviation (Rousseeuw & Croux 1993,
        doi:10.1080/01621459.1993.10476408).
        """
        v = np.asarray(values, dtype=float)
        v = v[np.isfinite(v)]
        if not v.size:
            return ()
        med = float(np.median(v))
        dev = np.abs(v - med)
        return med, float(1.4826 * np.median(dev)), float(1.25 * np.quantile(dev, self.tail_quantile))

    @staticmethod
    def _column(feature_df, names, n):
        for c in names:
            if c in feature_df:
                return pd.to_numeric(feature_df[c], errors="coerce").to_numpy(dtype=float)
        return np.full(n, np.nan)

    def _baseline_temperature(self, feature_df, n):
        t = self._column(feature_df, ("baseline_temperature_c",), n)
        ref = self.family.build_material().reference_temperature_c
        return np.where(np.isfinite(t), t, ref)

    def _arrival_residual(self, mode, names, feature_df):
        """Measured baseline arrival minus its temperature-compensated Rayleigh-Lamb value."""
        n = len(feature_df)
        measured = self._column(feature_df, names, n)
        expected = np.asarray(self.expected_arrival_s(mode, self._baseline_temperature(feature_df, n)), dtype=float)
        return measured - expected, measured, expected

    def fit(self, feature_df: pd.DataFrame) -> "PhysicsChecker":
        """Learn the extractor's arrival offsets and the in-family spreads."""
        st = self._base_state()
        for mode, names, _, _ in self._ARRIVALS:
            r, _, _ = self._arrival_residual(mode, names, feature_df)
            key = mode.lower()
            stats = self._robust(r)
            if stats:
                st[f"{key}_offset_s"], st[f"{key}_spread_s"], st[f"{key}_tail_s"] = stats
        stats = self._robust(self._column(feature_df, ("baseline_a0_thickness_ratio",), len(feature_df)))
        if stats:
            st["thickness_median"], st["thickness_spread"], st["thickness_tail"] = stats
        stats = self._robust(self._column(feature_df, ("capture_peak_frequency_hz",), len(feature_df)))
        if stats:
            st["frequency_median"], st["frequency_spread"] = stats[:2]
        self.state = st
        return self

    @classmethod
    def from_state(cls, family, state: dict, **kw) -> "PhysicsChecker":
        obj = cls(family, **kw)
        obj.state = dict(state)
        return obj

    def params(self) -> dict:
        return {"arrival_rel_tol": self.arrival_rel_tol, "a0_arrival_rel_tol": self.a0_arrival_rel_tol,
                "frequency_rel_tol": self.frequency_rel_tol, "sample_rate_rel_tol": self.sample_rate_rel_tol,
                "spread_factor": self.spread_factor, "tail_quantile": self.tail_quantile,
                "thickness_rel_tol": self.thickness_rel_tol}

    def reasons(self, feature_df: pd.DataFrame) -> list[list[str]]:
        """One list of readable reasons per row (empty list: passes)."""
        if not self.state:
            self.state = self._base_state()
        st, fam = self.state, self.family
        n = len(feature_df)
        out: list[list[str]] = [[] for _ in range(n)]
        mat = fam.build_material().name
        # 1. baseline S0 / A0 arrivals vs path length, alloy and flange thickness
        for mode, names, tol_attr, advice in self._ARRIVALS:
            key = mode.lower()
            r, measured, expected = self._arrival_residual(mode, names, feature_df)
            offset = st.get(f"{key}_offset_s", 0.0)
            dev = r - offset
            t_ref = st.get(f"expected_{key}_arrival_s", float(np.nanmedian(expected)) if n else 0.0)
            tol = max(getattr(self, tol_attr) * t_ref, self.spread_factor * st.get(f"{key}_spread_s", 0.0),
                      st.get(f"{key}_tail_s", 0.0))
            for i in np.flatnonzero(np.isfinite(dev) & (np.abs(dev) > tol)):
                centre = expected[i] + offset
                out[i].append(
                    f"baseline {mode} arrival {measured[i] * 1e6:.2f} us does not fit the family "
                    f"({centre * 1e6:.2f} +- {tol * 1e6:.2f} us expected at the baseline temperature for the "
                    f"{fam.path.transducer_spacing_mm:g} mm path in {fam.section.flange_thickness_mm:g} mm {mat}; "
                    f"Rayleigh-Lamb {mode} group delay {expected[i] * 1e6:.2f} us): {advice}")
        # 1b. baseline A0 thickness gauge vs the flange thickness
        g = self._column(feature_df, ("baseline_a0_thickness_ratio",), n)
        if "thickness_median" in st:
            gcen = st["thickness_median"]
            gtol = max(self.thickness_rel_tol, self.spread_factor * st.get("thickness_spread", 0.0),
                       st.get("thickness_tail", 0.0))
            t_nom_mm = fam.section.flange_thickness_mm
            for i in np.flatnonzero(np.isfinite(g) & (np.abs(g - gcen) > gtol)):
                out[i].append(
                    f"baseline A0 thickness gauge reads {g[i] / gcen * t_nom_mm:.2f} mm against the family's "
                    f"{t_nom_mm:g} mm flange (accepted {(gcen - gtol) / gcen * t_nom_mm:.2f}-"
                    f"{(gcen + gtol) / gcen * t_nom_mm:.2f} mm, Rayleigh-Lamb A0 fit of the baseline at its "
                    f"temperature): check the flange thickness")
        # 2. frequency content vs the excitation
        f = self._column(feature_df, ("capture_peak_frequency_hz",), n)
        fc = st["centre_frequency_hz"]
        fcen = st.get("frequency_median", fc)
        ftol = max(self.frequency_rel_tol * fc, self.spread_factor * st.get("frequency_spread", 0.0))
        for i in np.flatnonzero(np.isfinite(f) & (np.abs(f - fcen) > ftol)):
            out[i].append(f"peak frequency {f[i] / 1e3:.1f} kHz is off the family's {fc / 1e3:g} kHz excitation "
                          f"(accepted {(fcen - ftol) / 1e3:.1f}-{(fcen + ftol) / 1e3:.1f} kHz): check the "
                          f"pulser settings and the transducers")
        # 3. sample rate
        fs = self._column(feature_df, ("sample_rate_hz",), n)
        fs_fam = st["sample_rate_hz"]
        for i in np.flatnonzero(np.isfinite(fs) & (np.abs(fs - fs_fam) > self.sample_rate_rel_tol * fs_fam)):
            out[i].append(f"sample rate {fs[i] / 1e6:g} MHz differs from the family's {fs_fam / 1e6:g} MHz: "
                          f"re-acquire at the family's rate or use a family defined for this rate")
        return out


def combine_mismatch(detector: MismatchDetector | None, checker: PhysicsChecker | None,
                     feature_df: pd.DataFrame, feature_columns, X: pd.DataFrame | None = None) -> pd.DataFrame:
    """``in_family``, ``mismatch_p_value``, ``mismatch_reasons`` ("; "-joined) per row.

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
    p = np.full(n, math.nan)
    if detector is not None and n:
        p = detector.p_value_array(X.to_numpy(dtype=float))
        flagged = p <= detector.false_alarm_rate
        if flagged.any():
            tops = detector.top_deviations(X.iloc[np.flatnonzero(flagged)])
            for i, top in zip(np.flatnonzero(flagged), tops):
                desc = ", ".join(f"{name} (z = {z:+.1f})" for name, z in top)
                reasons[i].append(f"features unlike the family's training data (p = {p[i]:.4f} <= "
                                  f"{detector.false_alarm_rate:g}); furthest: {desc}")
    if checker is not None and n:
        for i, r in enumerate(checker.reasons(feature_df)):
            reasons[i].extend(r)
    return pd.DataFrame({"in_family": [not r for r in reasons], "mismatch_p_value": p,
                         "mismatch_reasons": ["; ".join(r) for r in reasons]}, index=feature_df.index)
