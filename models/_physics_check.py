"""Physics checks of the out-of-family verdict: the plate (S0 delay and A0 gauge), negative apparent loss, excitation.

:class:`PhysicsChecker` asks the physics rather than the feature cloud (Rayleigh-Lamb
arithmetic in :mod:`waneguide.models._plate_physics`).

Plate. A baseline is the sound flange of its path, so its S0 group delay (temperature-compensated
with :class:`~waneguide.features.temperature.ThermalModel`) measures the plate velocity
sqrt(E / (rho (1 - nu^2))) and the path length, and its A0 thickness gauge
(:mod:`waneguide.features.thickness_gauge`) the flange thickness. Each baseline gives a point
(x, g): x the relative deviation of its S0 delay from the family's plate at the baseline's
temperature (a weighted mean of three estimators: envelope peak, threshold crossing and
dispersion-compensated packet position, weights from their in-family robust covariance), g the
gauge reading. In-family states fill a small box around the family's point: the path within
``path_tolerance_mm``, the plate velocity within ``velocity_tolerance``, the temperature within
``temperature_uncertainty_k`` of the recorded one (the whole environment range when it is
missing), the thickness within ``thickness_rel_tol``. Wall loss is not part of it: a baseline is
recorded on sound metal, and no loss could explain a slower S0 (thinning speeds S0 up) or a
thicker gauge. The distance from the box, in units of the in-family scatter (robust covariance,
Rousseeuw & Van Driessen 1999), is pooled over the distinct baselines of a path (mean point,
covariance / n), and a path beyond the threshold flags every row of it with the reason in
words. The threshold is the larger of the chi-square quantile at ``false_alarm_rate`` and the
in-family split-conformal quantile of the training baselines (1.25 x their largest distance
when there are too few for the quantile).

Negative apparent loss. A capture that reads thicker than its baseline is never clipped
silently to 0 %: when the A0 packet of the capture refocuses at a larger thickness than its
baseline's (sharpest-thickness ratio) and sits ahead of it after dispersion compensation, both by
more than ``negative_loss_z`` robust standard deviations of the in-family pristine captures and
beyond the in-family split-conformal quantile, and its A0 band transmission against the baseline
has not dropped by more than ``negative_loss_z`` of them (heavy in-family loss, under a disc or in
a long deep patch, can pull the compensated packet forward too, but always costs transmission),
the row gets a reason starting with :data:`NEGATIVE_LOSS_REASON`. (The envelope and
cross-correlation delays are not used: wall loss in the simulated campaigns sends them to either
side, by cycle skips and packet interference.)

Excitation and digitiser: the spectral peak against the centre frequency, the sample rate.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy.stats import chi2
from sklearn.covariance import MinCovDet

from waneguide.features.temperature import ThermalModel
from waneguide.models._physics_reasons import (
    NEGATIVE_LOSS_REASON,
    excitation_reasons,
    negative_loss_reason,
    plate_reasons,
)
from waneguide.models._plate_physics import s0_delay_sensitivity, s0_loss_advance

__all__ = ["PhysicsChecker", "PHYSICS_FEATURES", "NEGATIVE_LOSS_REASON", "PHYSICS_STATE_VERSION"]

#: Features the physics checks read (produced by features.extractor).
PHYSICS_FEATURES = ("baseline_s0_arrival_s", "s0_baseline_arrival_threshold_s", "s0_comp_position_m",
                    "s0_comp_position_shift_m", "baseline_a0_thickness_ratio", "baseline_temperature_c",
                    "a0_comp_position_shift_m", "a0_sharpest_thickness_ratio", "a0_transmission_centre_db",
                    "capture_peak_frequency_hz", "sample_rate_hz")
#: Version of :attr:`PhysicsChecker.state` (a state without the plate keys checks only excitation and rate).
PHYSICS_STATE_VERSION = 2

#: Baseline S0 delay estimators: (name, kind, columns); "position" = capture position minus its shift.
_S0_ESTIMATORS = (
    ("envelope", "time", ("baseline_s0_arrival_s", "s0_baseline_arrival_envelope_s")),
    ("threshold", "time", ("s0_baseline_arrival_threshold_s",)),
    ("compensated", "position", ("s0_comp_position_m", "s0_comp_position_shift_m")),
)
#: Capture-against-baseline thickness evidence: (column, sign of the loss direction).
_NEG_ESTIMATORS = (("a0_comp_position_shift_m", 1.0), ("a0_sharpest_thickness_ratio", -1.0))
#: ... and the band transmission it must not have lost (capture over baseline, centre band).
_NEG_TRANSMISSION = "a0_transmission_centre_db"
_MIN_ROWS = 10


def _col(df: pd.DataFrame, name: str, n: int) -> np.ndarray:
    if name in df:
        return pd.to_numeric(df[name], errors="coerce").to_numpy(dtype=float)
    return np.full(n, np.nan)


def _first(df: pd.DataFrame, names, n: int) -> np.ndarray:
    for c in names:
        if c in df:
            return _col(df, c, n)
    return np.full(n, np.nan)


def _mad_sd(v) -> tuple[float, float]:
    """(median, 1.4826 MAD) of the finite values (Rousseeuw & Croux 1993: a Gaussian sd)."""
    v = np.asarray(v, dtype=float)
    v = v[np.isfinite(v)]
    if not v.size:
        return math.nan, math.nan
    med = float(np.median(v))
    return med, float(1.4826 * np.median(np.abs(v - med)))


def _robust_cov(Z: np.ndarray, seed: int = 0) -> np.ndarray:
    """Robust covariance of the complete rows of ``Z`` (MinCovDet; diagonal MAD for few rows)."""
    Z = Z[np.all(np.isfinite(Z), axis=1)]
    sd = np.array([max(_mad_sd(Z[:, j])[1], 1e-12) if len(Z) else 1.0 for j in range(Z.shape[1])])
    if len(Z) < max(20, 5 * Z.shape[1]):
        return np.diag(sd ** 2)
    cov = MinCovDet(support_fraction=0.9, random_state=seed).fit(Z).covariance_
    return cov + np.diag(1e-6 * sd ** 2)


def _missing_patterns(E: np.ndarray, cov: np.ndarray):
    """Per pattern of available columns of ``E``: (row mask, column indices, inverse sub-covariance)."""
    ok = np.isfinite(E)
    for mask in {tuple(r) for r in ok}:
        idx = np.flatnonzero(np.asarray(mask))
        if idx.size:
            yield np.all(ok == np.asarray(mask), axis=1), idx, np.linalg.inv(cov[np.ix_(idx, idx)])


def _conformal_threshold(scores, alpha: float, floor: float) -> float:
    """max(floor, split-conformal (1 - alpha) quantile of in-family scores; 1.25 x max when too few)."""
    s = np.sort(np.asarray(scores, dtype=float)[np.isfinite(scores)])
    if not s.size:
        return float(floor)
    k = math.ceil((s.size + 1) * (1.0 - alpha))
    q = s[k - 1] if k <= s.size else 1.25 * s[-1]
    return float(max(floor, q))


class PhysicsChecker:
    """Family-bound physics plausibility checks with readable reasons (see module docstring).

    Parameters
    ----------
    family : features.family.Family
    false_alarm_rate : float, default 0.005
        Share of in-family paths the plate check, and of in-family captures the negative-loss
        check, may flag (each).
    thickness_rel_tol : float, default 0.03
        Flange thickness tolerance of the family's plate (a fraction of nominal; sheet of 2 mm is
        held to about +-3 %, from memory of sheet tolerance tables).
    path_tolerance_mm : float, default 0.5
        Tolerance of the transducer spacing (bonded discs placed to +-0.5 mm: common practice,
        no source).
    velocity_tolerance : float, default 0.001
        Tolerance of the plate velocity between lots of the family's alloy (0.1 %: regression
        value of this code, chosen so that a 1.5 % shear-speed change stays detectable).
    temperature_uncertainty_k : float, default 2
        Error of a recorded temperature [K] (common practice for bonded thermocouples, no source).
    negative_loss_z : float, default 3
        Least number of robust standard deviations each thickness-evidence feature must lie on
        the "thicker" side before a capture is said to read thicker than its baseline.
    frequency_rel_tol : float, default 0.25
        Least tolerance on the peak frequency, as a fraction of the centre frequency.
    sample_rate_rel_tol : float, default 1e-3
    spread_factor : float, default 6
        The frequency tolerance widens to this many robust standard deviations of the in-family values.

    Attributes
    ----------
    state : dict (JSON-ready; what :meth:`fit` learned, stored in the bundle)
    """

    def __init__(self, family, *, false_alarm_rate=0.005, thickness_rel_tol=0.03, path_tolerance_mm=0.5,
                 velocity_tolerance=0.001, temperature_uncertainty_k=2.0, negative_loss_z=3.0,
                 frequency_rel_tol=0.25, sample_rate_rel_tol=1e-3, spread_factor=6.0):
        self.family = family
        self.false_alarm_rate = false_alarm_rate
        self.thickness_rel_tol = thickness_rel_tol
        self.path_tolerance_mm = path_tolerance_mm
        self.velocity_tolerance = velocity_tolerance
        self.temperature_uncertainty_k = temperature_uncertainty_k
        self.negative_loss_z = negative_loss_z
        self.frequency_rel_tol = frequency_rel_tol
        self.sample_rate_rel_tol = sample_rate_rel_tol
        self.spread_factor = spread_factor
        self.state: dict = {}
        self._thermal_model = None

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_state(cls, family, state: dict, **params) -> "PhysicsChecker":
        """Rebuild from a stored state; parameters this version does not know are ignored."""
        known = cls(family).params()
        obj = cls(family, **{k: v for k, v in params.items() if k in known})
        obj.state = dict(state)
        return obj

    def params(self) -> dict:
        return {k: getattr(self, k) for k in (
            "false_alarm_rate", "thickness_rel_tol", "path_tolerance_mm", "velocity_tolerance",
            "temperature_uncertainty_k", "negative_loss_z", "frequency_rel_tol", "sample_rate_rel_tol",
            "spread_factor")}

    def _thermal(self) -> ThermalModel:
        if self._thermal_model is None:
            self._thermal_model = ThermalModel(self.family)
        return self._thermal_model

    def expected_arrival_s(self, mode: str, temperature_c=None):
        """Rayleigh-Lamb group delay of ``mode`` over the path at ``temperature_c`` [s]."""
        t = self._t_ref() if temperature_c is None else temperature_c
        out = self._thermal().arrival_time_s(mode, t)
        return float(out) if np.ndim(out) == 0 else out

    def expected_s0_arrival_s(self) -> float:
        """spacing / c_g of S0 at the centre frequency, nominal thickness, reference temperature."""
        return self.expected_arrival_s("S0")

    def _t_ref(self) -> float:
        return self.family.build_material().reference_temperature_c

    def _base_state(self) -> dict:
        fam = self.family
        dom_loss = float(fam.domain.max_loss_pct[1]) / 100.0
        return {"version": PHYSICS_STATE_VERSION,
                "expected_s0_arrival_s": self.expected_s0_arrival_s(),
                "expected_a0_arrival_s": self.expected_arrival_s("A0"),
                "s0_coefficient_per_k": float(self._thermal().relative_coefficient_per_k("S0")),
                "s0_sensitivity": s0_delay_sensitivity(fam),
                "s0_advance_at_max_loss": float(s0_loss_advance(fam, dom_loss)) if dom_loss > 0 else 0.0,
                "centre_frequency_hz": fam.excitation.centre_frequency_hz,
                "sample_rate_hz": fam.acquisition.sample_rate_hz}

    # ------------------------------------------------------------------ measurements
    def _temperatures(self, df, n):
        """(baseline temperature or NaN, the temperature the delays are compensated to)."""
        t = _col(df, "baseline_temperature_c", n)
        return t, np.where(np.isfinite(t), t, self._t_ref())

    def _s0_estimates(self, df, n, t_eff, offsets: dict | None = None) -> dict[str, np.ndarray]:
        """Per estimator, the relative S0 delay (or its learned offset when ``offsets`` is None)."""
        t_exp = np.asarray(self.expected_arrival_s("S0", t_eff), dtype=float)
        t_ref = self.expected_s0_arrival_s()
        out = {}
        for name, kind, cols in _S0_ESTIMATORS:
            if kind == "time":
                v = _first(df, cols, n)
                raw = v - t_exp  # extractor's timing offset (burst centre, pre-trigger) is additive
            else:
                v = _col(df, cols[0], n) - _col(df, cols[1], n)
                raw = v * t_ref / t_exp  # compensated position scales with the delay
            if offsets is None:
                out[name] = raw
            elif name in offsets:
                o = offsets[name]
                out[name] = (raw - o) / t_exp if kind == "time" else raw / o - 1.0
        return out

    def _combine_s0(self, est: dict[str, np.ndarray], n: int) -> np.ndarray:
        """Weighted mean of the available estimators per row (weights: inverse robust covariance)."""
        s0 = self.state["s0"]
        names = s0["names"]
        if not names:
            return np.full(n, np.nan)
        E = np.column_stack([est[k] for k in names])
        cov = np.asarray(s0["cov"], dtype=float)
        x = np.full(n, np.nan)
        for rows, idx, P in _missing_patterns(E, cov):
            w = P.sum(axis=1) / P.sum()
            x[rows] = E[np.ix_(rows, idx)] @ w
        return x - s0["centre"]

    def _plate_points(self, df, n):
        """Per row: S0 deviation x, gauge reading g, the x box (lo, hi) and the baseline temperature."""
        st = self.state
        t_b, t_eff = self._temperatures(df, n)
        x = np.full(n, np.nan)
        if st.get("s0"):
            x = self._combine_s0(self._s0_estimates(df, n, t_eff, st["s0"]["offsets"]), n)
        g = _col(df, "baseline_a0_thickness_ratio", n) if st.get("gauge") else np.full(n, np.nan)
        tol = self._x_tolerance()
        env = self.family.environment
        k = st["s0_coefficient_per_k"]
        lo = np.where(np.isfinite(t_b), -tol, k * (env.min_temperature_c - self._t_ref()) - tol)
        hi = np.where(np.isfinite(t_b), tol, k * (env.max_temperature_c - self._t_ref()) + tol)
        return x, g, lo, hi, t_b

    def _x_tolerance(self) -> float:
        k = abs(self.state["s0_coefficient_per_k"])
        return (self.path_tolerance_mm * 1e-3 / self.family.path_length_m + self.velocity_tolerance
                + k * self.temperature_uncertainty_k)

    def _g_tolerance(self) -> float:
        return self.thickness_rel_tol * self.state["gauge"]["centre"]

    def _distance(self, x, g, lo, hi, n_b):
        """Distance from the in-family box in units of the (pooled) in-family scatter, and the excesses."""
        st = self.state
        ex = x - np.clip(x, lo, hi)
        if st.get("gauge"):
            dg = g - st["gauge"]["centre"]
            tg = self._g_tolerance()
            eg = dg - np.clip(dg, -tg, tg)
        else:
            eg = np.full(len(x), np.nan)
        cov = np.asarray(st["plate"]["cov"], dtype=float)
        axes = st["plate"]["axes"]
        E = np.column_stack([{"s0": ex, "gauge": eg}[a] for a in axes])
        d = np.full(len(x), np.nan)
        for rows, idx, P in _missing_patterns(E, cov):
            Er = E[np.ix_(rows, idx)]
            d[rows] = np.sqrt(np.einsum("ij,jk,ik->i", Er, P, Er) * n_b[rows])
        return d, ex, eg

    @staticmethod
    def _pool(df, n, x, g, lo, hi, t_b):
        """Mean point over the distinct baselines of each path; returns pooled arrays, counts and path labels."""
        paths = (df["path_id"].astype(str).to_numpy() if "path_id" in df else np.array([""] * n, dtype=object))
        label = np.where(paths == "", np.array([f"\0row{i}" for i in range(n)], dtype=object), paths)
        key = pd.DataFrame({"p": label, "x": np.round(x, 12), "g": np.round(g, 12), "t": np.round(t_b, 9)})
        distinct = ~key.duplicated().to_numpy()
        frame = pd.DataFrame({"p": label[distinct], "x": x[distinct], "g": g[distinct], "lo": lo[distinct],
                              "hi": hi[distinct]})
        agg = frame.groupby("p", sort=False).agg(x=("x", "mean"), g=("g", "mean"), lo=("lo", "mean"),
                                                 hi=("hi", "mean"), n=("lo", "size"))
        agg = agg.reindex(label)
        return (agg["x"].to_numpy(float), agg["g"].to_numpy(float), agg["lo"].to_numpy(float),
                agg["hi"].to_numpy(float), agg["n"].to_numpy(float), paths)

    def _negative_scores(self, df, n) -> np.ndarray:
        """Thicker-than-baseline evidence per row: the least of the estimators' robust z on the thicker side."""
        neg = self.state["negative_loss"]
        zs = []
        for (name, sign), c, s in zip(_NEG_ESTIMATORS, neg["centre"], neg["scale"]):
            zs.append(-sign * (_col(df, name, n) - c) / s)
        Z = np.column_stack(zs)
        score = np.where(np.all(np.isfinite(Z), axis=1), np.min(np.where(np.isfinite(Z), Z, -np.inf), axis=1), np.nan)
        if neg.get("transmission_floor_db") is not None:
            # a capture thicker than its baseline has lost no A0 transmission against it; heavy loss
            # (which can also pull the compensated packet forward: under a disc, in long deep patches) has
            t = _col(df, _NEG_TRANSMISSION, n)
            score = np.where(np.isfinite(t) & (t < neg["transmission_floor_db"]), -np.inf, score)
        return score

    # ------------------------------------------------------------------ fit
    def fit(self, feature_df: pd.DataFrame, targets: pd.DataFrame | None = None) -> "PhysicsChecker":
        """Learn offsets, in-family scatter and thresholds from in-family rows.

        ``targets`` (the rows' true losses) tells the pristine captures apart: without it the
        negative-loss check is not calibrated and stays off.
        """
        df = feature_df.reset_index(drop=True)
        n = len(df)
        st = self._base_state()
        self.state = st
        alpha = float(self.false_alarm_rate)
        # one row per distinct baseline (a baseline serves several captures of its specimen)
        keys = [c for c in ("path_id", "baseline_temperature_c", "baseline_s0_arrival_s",
                            "baseline_a0_thickness_ratio") if c in df]
        base = df.drop_duplicates(subset=keys).reset_index(drop=True) if keys else df
        nb = len(base)
        t_b, t_eff = self._temperatures(base, nb)
        raw = self._s0_estimates(base, nb, t_eff)
        offsets = {}
        for name, kind, _ in _S0_ESTIMATORS:
            if np.isfinite(raw[name]).sum() >= _MIN_ROWS:
                offsets[name] = _mad_sd(raw[name])[0]
        if offsets:
            names = [k for k, *_ in _S0_ESTIMATORS if k in offsets]
            est = self._s0_estimates(base, nb, t_eff, offsets)
            st["s0"] = {"names": names, "offsets": offsets, "centre": 0.0,
                        "cov": _robust_cov(np.column_stack([est[k] for k in names])).tolist()}
            x = self._combine_s0(est, nb)
            st["s0"]["centre"], st["s0"]["sd"] = _mad_sd(x)
        g = _col(base, "baseline_a0_thickness_ratio", nb)
        if np.isfinite(g).sum() >= _MIN_ROWS:
            st["gauge"] = dict(zip(("centre", "sd"), _mad_sd(g)))
        axes = [a for a in ("s0", "gauge") if a in st]
        if axes:
            x, g, lo, hi, t_b = self._plate_points(base, nb)
            cols = {"s0": x, "gauge": g - st["gauge"]["centre"] if "gauge" in st else g}
            st["plate"] = {"axes": axes, "cov": _robust_cov(np.column_stack([cols[a] for a in axes])).tolist()}
            d, _, _ = self._distance(x, g, lo, hi, np.ones(nb))
            st["plate"]["threshold"] = _conformal_threshold(d, alpha, math.sqrt(chi2.ppf(1.0 - alpha, len(axes))))
            st["plate"]["n_baselines"] = int(np.isfinite(d).sum())
        self._fit_negative(df, targets, alpha)
        f_med, f_sd = _mad_sd(_col(df, "capture_peak_frequency_hz", n))
        if math.isfinite(f_med):
            st["frequency_median"], st["frequency_spread"] = f_med, f_sd
        return self

    def _fit_negative(self, df, targets, alpha):
        if targets is None or not all(c in df for c, _ in _NEG_ESTIMATORS):
            return
        t = targets.reset_index(drop=True)
        col = "max_loss_pct" if "max_loss_pct" in t else ("mean_loss_pct" if "mean_loss_pct" in t else None)
        if col is None:
            return
        pristine = pd.to_numeric(t[col], errors="coerce").to_numpy(float) == 0.0
        if pristine.sum() < _MIN_ROWS:
            return
        centre, scale = [], []
        for name, _ in _NEG_ESTIMATORS:
            c, s = _mad_sd(_col(df, name, len(df))[pristine])
            if not (math.isfinite(s) and s > 0):
                return
            centre.append(c)
            scale.append(s)
        t_med, t_sd = _mad_sd(_col(df, _NEG_TRANSMISSION, len(df))[pristine])
        floor = t_med - float(self.negative_loss_z) * t_sd if math.isfinite(t_sd) else None
        self.state["negative_loss"] = {"centre": centre, "scale": scale, "threshold": math.inf,
                                       "transmission_floor_db": floor, "n_pristine": int(pristine.sum())}
        score = self._negative_scores(df, len(df))
        self.state["negative_loss"]["threshold"] = _conformal_threshold(score, alpha, float(self.negative_loss_z))

    # ------------------------------------------------------------------ verdicts
    def assess(self, feature_df: pd.DataFrame) -> pd.DataFrame:
        """Per row: ``s0_deviation`` (relative S0 delay, pooled per path), ``thickness_ratio`` (gauge over
        its in-family centre), ``plate_distance``, ``plate_out``, ``negative_loss_score``,
        ``negative_loss`` and ``reasons`` (list of str)."""
        if not self.state:
            self.state = self._base_state()
        df = feature_df
        n = len(df)
        st = self.state
        out = pd.DataFrame(index=df.index)
        reasons: list[list[str]] = [[] for _ in range(n)]
        d = np.full(n, np.nan)
        xp = gp = np.full(n, np.nan)
        if st.get("plate") and n:
            x, g, lo, hi, t_b = self._plate_points(df, n)
            xp, gp, lop, hip, nb, paths = self._pool(df, n, x, g, lo, hi, t_b)
            d, ex, eg = self._distance(xp, gp, lop, hip, nb)
            for i in np.flatnonzero(np.isfinite(d) & (d > st["plate"]["threshold"])):
                reasons[i].extend(plate_reasons(self, xp[i], gp[i], ex[i], eg[i], t_b[i], nb[i], paths[i]))
        out["s0_deviation"] = xp
        out["thickness_ratio"] = gp / st["gauge"]["centre"] if st.get("gauge") else np.nan
        out["plate_distance"] = d
        out["plate_out"] = np.isfinite(d) & (d > st["plate"]["threshold"]) if st.get("plate") else False
        score = np.full(n, np.nan)
        if st.get("negative_loss") and n:
            score = self._negative_scores(df, n)
            ratio = _col(df, "a0_sharpest_thickness_ratio", n)
            shift = _col(df, "a0_comp_position_shift_m", n)
            for i in np.flatnonzero(np.isfinite(score) & (score > st["negative_loss"]["threshold"])):
                reasons[i].append(negative_loss_reason(self, ratio[i], shift[i]))
        out["negative_loss_score"] = score
        out["negative_loss"] = np.isfinite(score) & (score > st["negative_loss"]["threshold"]) \
            if st.get("negative_loss") else False
        for i, r in enumerate(excitation_reasons(self, _col(df, "capture_peak_frequency_hz", n),
                                                  _col(df, "sample_rate_hz", n))):
            reasons[i].extend(r)
        out["reasons"] = reasons
        return out

    def reasons(self, feature_df: pd.DataFrame) -> list[list[str]]:
        """One list of readable reasons per row (empty list: passes)."""
        return list(self.assess(feature_df)["reasons"])
