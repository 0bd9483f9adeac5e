"""Drift detectors for the audit: sequential change detection and feature drift.

Residual drift (is the model slowly going wrong?)
    :class:`PageHinkley` -- the Page-Hinkley / CUSUM stopping rule (Page 1954) on a
    stream of standardised residuals, two-sided. :func:`cusum_arl_siegmund` gives
    its average run length (Siegmund 1985), used to state the false-alarm settings.
Feature drift (have the inputs left the training domain?)
    :func:`feature_drift` -- per-feature two-sample Kolmogorov-Smirnov test and
    population stability index against a reference sample, with Benjamini-Hochberg
    control of the false discovery rate across features.

Notes
-----
Page-Hinkley test for an increase of the mean of ``x`` from ``mu0`` (Basseville and
Nikiforov 1993, sec. 2.2.2, eqs. 2.2.9-2.2.12)::

    U_n = sum_{k<=n} (x_k - mu0 - delta),   m_n = min_{j<=n} U_j,   alarm when U_n - m_n >= lambda

which is the same stopping time as Page's CUSUM recursion
``g_n = max(0, g_{n-1} + x_n - mu0 - delta)``, alarm when ``g_n >= lambda``. The
decrease side mirrors it. With ``x`` standardised (unit variance), ``delta = k``
is the reference value (half the shift to detect quickly) and ``lambda = h`` the
threshold, both in standard deviations. The defaults ``k = 0.5, h = 5`` give a
two-sided in-control average run length of about 465 observations and a delay of
about 10 observations for a one-sigma step (tabulated CUSUM ARLs, e.g. Montgomery,
*Introduction to Statistical Quality Control*, table of CUSUM ARLs for k = 0.5;
values quoted from memory and checked by simulation in tests/test_drift.py).

References
----------
E. S. Page (1954), Continuous inspection schemes, Biometrika 41(1/2), 100-115,
doi:10.1093/biomet/41.1-2.100.
D. V. Hinkley (1971), Inference about the change-point from cumulative sum tests,
Biometrika 58(3), 509-523, doi:10.1093/biomet/58.3.509.
M. Basseville and I. V. Nikiforov (1993), Detection of Abrupt Changes: Theory and
Application, Prentice Hall, ch. 2 and sec. 5.2.
D. Siegmund (1985), Sequential Analysis, Springer, ch. X (ARL approximation).
Y. Benjamini and Y. Hochberg (1995), Controlling the false discovery rate,
J. R. Stat. Soc. B 57(1), 289-300, doi:10.1111/j.2517-6161.1995.tb02031.x.
B. Yurdakul (2018), Statistical properties of population stability index,
PhD thesis, Western Michigan University (PSI bands 0.1 / 0.25 are common practice).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import pandas as pd
from scipy import stats

from waneguide.core.errors import InputError

__all__ = [
    "PageHinkley",
    "PageHinkleyResult",
    "cusum_arl_siegmund",
    "two_sided_arl",
    "population_stability_index",
    "feature_drift",
    "PSI_MODERATE",
    "PSI_MAJOR",
]

#: PSI bands (common practice in model monitoring, no primary source): below 0.1
#: stable, 0.1-0.25 moderate shift, above 0.25 major shift.
PSI_MODERATE = 0.10
PSI_MAJOR = 0.25


@dataclass(frozen=True)
class PageHinkleyResult:
    """Outcome of running :class:`PageHinkley` over one stream.

    Attributes
    ----------
    statistic_up, statistic_down : ndarray
        ``U_n - m_n`` for the increase side and its mirror for the decrease side
        (same units as the stream).
    alarm_index : int or None
        First index where either side reached ``lambda_`` (None: no alarm).
    direction : str or None
        ``"up"`` (mean increased) or ``"down"``.
    change_index : int or None
        Estimated change point: the index after the last time the alarming side's
        statistic was zero before the alarm (Page 1954; B&N 1993 sec. 2.2).
    """

    statistic_up: np.ndarray
    statistic_down: np.ndarray
    alarm_index: int | None
    direction: str | None
    change_index: int | None
    delta: float
    lambda_: float

    @property
    def alarm(self) -> bool:
        return self.alarm_index is not None


@dataclass
class PageHinkley:
    """Two-sided Page-Hinkley (CUSUM) detector of a shift in the mean of a stream.

    Parameters
    ----------
    delta : float, default 0.5
        Drift allowance ``delta`` (CUSUM reference value ``k``): half the smallest shift
        worth detecting fast, in the stream's units (standard deviations for
        standardised residuals).
    lambda_ : float, default 5.0
        Alarm threshold ``lambda`` (CUSUM ``h``), same units. With ``delta = 0.5`` on a
        unit-variance stream, ``lambda_ = 5`` gives a two-sided in-control average run
        length near 465 observations; ``4`` gives about 168.
    mu0 : float or None, default 0.0
        In-control mean. ``None`` uses the running mean of the stream so far (the
        streaming variant; weaker for slow drifts, since the mean follows them).
    two_sided : bool, default True
        Watch for decreases as well as increases.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> x = np.r_[rng.normal(0, 1, 200), rng.normal(1.5, 1, 50)]   # step of 1.5 sigma at n = 200
    >>> res = PageHinkley(delta=0.5, lambda_=5).run(x)
    >>> res.direction, res.alarm_index, res.change_index
    ('up', 201, 200)
    """

    delta: float = 0.5
    lambda_: float = 5.0
    mu0: float | None = 0.0
    two_sided: bool = True
    _state: dict = field(default_factory=dict, init=False, repr=False)

    def _check(self) -> None:
        if not (math.isfinite(self.delta) and self.delta >= 0):
            raise InputError(f"PageHinkley delta must be a finite number >= 0; got {self.delta!r}.")
        if not (math.isfinite(self.lambda_) and self.lambda_ > 0):
            raise InputError(f"PageHinkley lambda_ must be a positive finite number; got {self.lambda_!r}.")

    def statistics(self, x) -> tuple[np.ndarray, np.ndarray]:
        """Both one-sided statistics for a stream or a batch of streams.

        Parameters
        ----------
        x : array_like, shape (n,) or (r, n)
            One stream, or ``r`` independent streams of length ``n`` (vectorised).

        Returns
        -------
        up, down : ndarray, same shape as ``x``
        """
        self._check()
        x = np.asarray(x, dtype=float)
        if x.ndim not in (1, 2):
            raise InputError(f"stream must be 1-D (one stream) or 2-D (streams x time); got shape {x.shape}.")
        if not np.all(np.isfinite(x)):
            raise InputError("stream contains NaN or inf; drop unmatched readings before running the detector.")
        xs = np.atleast_2d(x)
        n = xs.shape[1]
        if self.mu0 is None:
            # running mean up to and including the current point
            centre = np.cumsum(xs, axis=1) / np.arange(1, n + 1)
        else:
            centre = np.full_like(xs, float(self.mu0))
        inc_up = xs - centre - self.delta
        inc_dn = centre - xs - self.delta
        up = np.empty_like(xs)
        dn = np.empty_like(xs)
        g_up = np.zeros(xs.shape[0])
        g_dn = np.zeros(xs.shape[0])
        # CUSUM recursion g_n = max(0, g_{n-1} + increment) == U_n - min_{j<=n} U_j (B&N 1993 sec. 2.2)
        for i in range(n):
            g_up = np.maximum(0.0, g_up + inc_up[:, i])
            g_dn = np.maximum(0.0, g_dn + inc_dn[:, i])
            up[:, i] = g_up
            dn[:, i] = g_dn
        if x.ndim == 1:
            return up[0], dn[0]
        return up, dn

    def first_alarm(self, x) -> np.ndarray:
        """Index of the first alarm per stream (``-1`` when none), vectorised over rows.

        Keeps only the current statistic per stream (no full history), and stops as soon
        as every stream has alarmed, so long Monte Carlo batches stay cheap.
        """
        self._check()
        xs = np.atleast_2d(np.asarray(x, dtype=float))
        if xs.ndim != 2:
            raise InputError(f"streams must be 2-D (streams x time); got shape {xs.shape}.")
        r, n = xs.shape
        first = np.full(r, -1, dtype=np.int64)
        g_up = np.zeros(r)
        g_dn = np.zeros(r)
        total = np.zeros(r)
        for i in range(n):
            xi = xs[:, i]
            if self.mu0 is None:
                total += xi
                c = total / (i + 1)
            else:
                c = float(self.mu0)
            g_up = np.maximum(0.0, g_up + xi - c - self.delta)
            hit = g_up >= self.lambda_
            if self.two_sided:
                g_dn = np.maximum(0.0, g_dn + c - xi - self.delta)
                hit |= g_dn >= self.lambda_
            new = hit & (first < 0)
            first[new] = i
            if i % 64 == 63 and np.all(first >= 0):
                break
        return first

    def run(self, x) -> PageHinkleyResult:
        """Run over one stream and report the first alarm."""
        x = np.asarray(x, dtype=float)
        if x.ndim != 1:
            raise InputError(f"run() takes one stream (1-D); got shape {x.shape}. Use first_alarm() for a batch.")
        up, dn = self.statistics(x)
        hit_up = np.flatnonzero(up >= self.lambda_)
        hit_dn = np.flatnonzero(dn >= self.lambda_) if self.two_sided else np.array([], dtype=int)
        first_up = int(hit_up[0]) if hit_up.size else None
        first_dn = int(hit_dn[0]) if hit_dn.size else None
        alarm, direction, stat = None, None, None
        if first_up is not None and (first_dn is None or first_up <= first_dn):
            alarm, direction, stat = first_up, "up", up
        elif first_dn is not None:
            alarm, direction, stat = first_dn, "down", dn
        change = None
        if alarm is not None:
            zeros = np.flatnonzero(stat[: alarm + 1] == 0.0)
            change = int(zeros[-1] + 1) if zeros.size else 0
        return PageHinkleyResult(up, dn, alarm, direction, change, float(self.delta), float(self.lambda_))


def cusum_arl_siegmund(delta: float, lambda_: float, shift: float = 0.0) -> float:
    """Average run length of the one-sided CUSUM on a unit-variance Gaussian stream.

    Siegmund's approximation (Siegmund 1985; quoted in Basseville and Nikiforov 1993, ch. 5)::

        ARL = (exp(-2 d b) + 2 d b - 1) / (2 d^2),   d = shift - delta,   b = lambda_ + 1.166
        ARL = b^2                                     when d = 0

    Parameters
    ----------
    delta, lambda_ : float
        Reference value and threshold [standard deviations].
    shift : float
        True mean shift [standard deviations]; 0 gives the in-control ARL.
    """
    d = float(shift) - float(delta)
    b = float(lambda_) + 1.166
    if abs(d) < 1e-12:
        return b * b
    return (math.exp(-2.0 * d * b) + 2.0 * d * b - 1.0) / (2.0 * d * d)


def two_sided_arl(arl_up: float, arl_down: float) -> float:
    """ARL of two one-sided CUSUMs run together: 1/ARL = 1/ARL+ + 1/ARL-.

    Standard result for a two-sided scheme whose sides cannot both be near alarm at once
    (holds for k > 0 with the usual settings; from memory, e.g. Montgomery's CUSUM chapter).
    """
    return 1.0 / (1.0 / arl_up + 1.0 / arl_down)


def population_stability_index(reference, recent, *, bins: int = 10, eps: float = 1e-4) -> float:
    """Population stability index of ``recent`` against ``reference``.

    ``PSI = sum_b (p_b - q_b) ln(p_b / q_b)`` over ``bins`` quantile bins of the reference
    (``q_b`` reference share, ``p_b`` recent share; a symmetrised Kullback-Leibler divergence,
    Yurdakul 2018). Empty bins are floored at ``eps`` so the logarithm stays finite.
    """
    ref = np.asarray(reference, dtype=float)
    new = np.asarray(recent, dtype=float)
    ref = ref[np.isfinite(ref)]
    new = new[np.isfinite(new)]
    if ref.size < 2 or new.size < 1:
        return float("nan")
    edges = np.unique(np.quantile(ref, np.linspace(0.0, 1.0, bins + 1)))
    if edges.size < 2:  # constant reference: one bin, everything else falls outside
        same = np.isclose(new, ref[0]).mean()
        p = np.array([same, 1 - same])
        q = np.array([1.0, 0.0])
    else:
        inner = edges[1:-1]
        q = np.bincount(np.searchsorted(inner, ref, side="right"), minlength=inner.size + 1) / ref.size
        p = np.bincount(np.searchsorted(inner, new, side="right"), minlength=inner.size + 1) / new.size
    p = np.maximum(p, eps)
    q = np.maximum(q, eps)
    return float(np.sum((p - q) * np.log(p / q)))


def feature_drift(reference, recent, columns: Sequence[str] | None = None, *, alpha: float = 0.05,
                  bins: int = 10, min_samples: int = 5):
    """Per-feature drift of ``recent`` against ``reference`` with FDR control.

    For each numeric feature: the two-sample Kolmogorov-Smirnov statistic and p-value
    (:func:`scipy.stats.ks_2samp`), the PSI (:func:`population_stability_index`), and the
    Benjamini-Hochberg adjusted p-value across all tested features
    (:func:`scipy.stats.false_discovery_control`). A feature *drifted* when its adjusted
    p-value is below ``alpha`` (false discovery rate ``alpha`` across features).

    Parameters
    ----------
    reference, recent : DataFrame
        Training-domain sample and recent captures' features.
    columns : sequence of str, optional
        Features to test (default: the numeric columns both frames share).
    alpha : float, default 0.05
        False discovery rate.
    min_samples : int, default 5
        Features with fewer finite values on either side are reported untested.

    Returns
    -------
    DataFrame
        Columns ``feature, n_reference, n_recent, ks_statistic, p_value, q_value, psi,
        psi_band, drifted``, sorted by ``q_value``.
    """

    if not 0 < alpha < 1:
        raise InputError(f"alpha must lie in (0, 1); got {alpha!r}.")
    if columns is None:
        columns = [c for c in reference.columns
                   if c in recent.columns and pd.api.types.is_numeric_dtype(reference[c])]
    rows = []
    for col in columns:
        ref = pd.to_numeric(reference[col], errors="coerce").to_numpy(float)
        new = pd.to_numeric(recent[col], errors="coerce").to_numpy(float)
        ref = ref[np.isfinite(ref)]
        new = new[np.isfinite(new)]
        row = {"feature": col, "n_reference": int(ref.size), "n_recent": int(new.size),
               "ks_statistic": np.nan, "p_value": np.nan, "psi": np.nan}
        if ref.size >= min_samples and new.size >= min_samples:
            if np.ptp(ref) == 0 and np.ptp(new) == 0 and ref[0] == new[0]:
                row.update(ks_statistic=0.0, p_value=1.0, psi=0.0)
            else:
                ks = stats.ks_2samp(ref, new)
                row.update(ks_statistic=float(ks.statistic), p_value=float(ks.pvalue),
                           psi=population_stability_index(ref, new, bins=bins))
        rows.append(row)
    out = pd.DataFrame(rows, columns=["feature", "n_reference", "n_recent", "ks_statistic", "p_value", "psi"])
    tested = out["p_value"].notna().to_numpy()
    q = np.full(len(out), np.nan)
    if tested.any():
        q[tested] = stats.false_discovery_control(out.loc[tested, "p_value"].to_numpy(float), method="bh")
    out["q_value"] = q
    out["psi_band"] = np.select(
        [out["psi"].isna(), out["psi"] >= PSI_MAJOR, out["psi"] >= PSI_MODERATE],
        ["untested", "major", "moderate"], default="stable")
    out["drifted"] = (out["q_value"] < alpha).fillna(False).astype(bool)
    cols = ["feature", "n_reference", "n_recent", "ks_statistic", "p_value", "q_value", "psi", "psi_band", "drifted"]
    return out[cols].sort_values(["q_value", "feature"], na_position="last", kind="stable").reset_index(drop=True)
