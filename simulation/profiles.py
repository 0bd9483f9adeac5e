"""Wall-loss profiles along a pitch-catch path, with their ground truth.

A profile is the flange thickness at points ``x_m`` along the path, measured from
the transmitter (x = 0) to the receiver (x = L). Profiles are one-dimensional:
the thickness varies along the path and is taken as uniform across the flange
width (a corrosion band or a milled slot that spans the flange). The forward
model relies on this when it routes edge echoes through the same profile.

Loss shapes (each a function of x returning the local loss depth [m]):

``flat``      flat-bottom milled patch with raised-cosine tapered edges
``gaussian``  Gaussian pit, footprint +-2 sigma
``elliptical`` elliptical pit (a semi-ellipse in the x-depth plane)
``rough``     rough corrosion: a smoothed Gaussian random field mapped through
              its normal CDF to [0, 1], raised to a power (a skewed depth
              distribution: mostly shallow, a few deep spots), inside a tapered
              patch envelope

Several patches on one side combine by the pointwise maximum (material is
removed once); the two sides add (two-sided loss). A profile generated for a
target maximum loss is rescaled so that its largest total loss equals the
target exactly, so the truth columns are exact by construction on the profile's
own grid.

Ground truth recorded for every profile (on its own grid, segment lengths from
the midpoints between samples, clipped to [0, L]):

``max_loss_mm``, ``max_loss_pct``  largest local loss, absolute and re nominal
``mean_loss_pct``                  path-averaged loss re nominal
``lost_area_mm2``                  integral of the loss along the path
``patch_count``                    number of generated patches (0 if pristine)
``extent_mm``                      path length where the loss exceeds
                                   :data:`EXTENT_THRESHOLD` of nominal
``loss_under_tx_mm``,              largest loss under the transmitter's (x = 0) and the
``loss_under_rx_mm``               receiver's (x = L) footprint, at the footprint nodes
                                   of :func:`footprint_thickness` (the wall as the
                                   forward model reads it; 0 if pristine there)

The footprint of a disc of radius ``a`` centred at ``x_c`` is read from the profile by
linear interpolation at ``x_c + a u_j`` (the Gauss-Chebyshev nodes of
:func:`waneguide.features.excitation.disc_footprint`); beyond the profile's ends
(the half of each disc outside the path) the end thickness is kept. So the loss under
a disc never exceeds ``max_loss_mm``. A profile without a transducer radius
(``transducer_radius_m = 0``) reports the loss at the path ends.

Only the local thickness matters to the free-plate forward model; the side of
the loss is recorded but its effect (a mid-plane offset that couples S0 and A0)
is not modelled.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Iterable, Literal, Sequence

import numpy as np
from scipy.ndimage import gaussian_filter1d
from scipy.special import ndtr

from waneguide.core.errors import InputError
from waneguide.features.excitation import FOOTPRINT_NODES, disc_footprint

__all__ = [
    "ThinningProfile",
    "PatchSpec",
    "EXTENT_THRESHOLD",
    "TRUTH_COLUMNS",
    "segment_centres_m",
    "loss_flat_patch",
    "loss_gaussian_pit",
    "loss_elliptical_pit",
    "loss_rough",
    "pristine_profile",
    "flat_patch_profile",
    "pit_profile",
    "rough_profile",
    "multi_patch_profile",
    "build_profile",
    "site_shape",
    "truth_arrays",
    "footprint_thickness",
    "sample_site",
    "SITE_LOCATIONS",
]

#: Loss above this fraction of nominal counts towards ``extent_mm`` (convention, no source).
EXTENT_THRESHOLD = 0.01

#: Truth columns every profile reports, in campaign-table order.
TRUTH_COLUMNS = ("max_loss_pct", "max_loss_mm", "mean_loss_pct", "lost_area_mm2", "patch_count", "extent_mm",
                 "loss_under_tx_mm", "loss_under_rx_mm")

#: Where the first patch of a damage site is placed (:func:`sample_site`).
SITE_LOCATIONS = ("path", "transmitter", "receiver")

ShapeName = Literal["flat", "gaussian", "elliptical", "rough"]


def segment_centres_m(path_length_m: float, segment_m: float) -> np.ndarray:
    """Centres of equal segments (as close to ``segment_m`` as divides the path) [m]."""
    if not path_length_m > 0 or not segment_m > 0:
        raise InputError(f"path_length_m and segment_m must be positive; got {path_length_m!r}, {segment_m!r}.")
    n = max(1, int(round(path_length_m / segment_m)))
    dx = path_length_m / n
    return (np.arange(n) + 0.5) * dx


def footprint_thickness(x_m, thickness_m, path_length_m: float, radius_m: float,
                        n_nodes: int = FOOTPRINT_NODES) -> np.ndarray:
    """Thickness at the footprint nodes of the transmitter (x = 0) and the receiver (x = L).

    ``thickness_m`` (..., n) on the increasing positions ``x_m`` (n,); returns (..., 2, n_nodes):
    linear interpolation, the end values kept beyond the first and last position.
    """
    x = np.asarray(x_m, dtype=float)
    t = np.asarray(thickness_m, dtype=float)
    u, _ = disc_footprint(n_nodes)
    xq = np.clip(np.stack([radius_m * u, path_length_m + radius_m * u]), x[0], x[-1])
    if x.size == 1:
        return np.broadcast_to(t[..., :1, None], t.shape[:-1] + xq.shape).copy()
    j = np.clip(np.searchsorted(x, xq, side="right") - 1, 0, x.size - 2)
    frac = (xq - x[j]) / (x[j + 1] - x[j])
    lo = t[..., j]
    return lo + frac * (t[..., j + 1] - lo)  # exact where both neighbours are equal


def _segment_lengths(x_m: np.ndarray, path_length_m: float) -> np.ndarray:
    edges = np.concatenate(([0.0], 0.5 * (x_m[:-1] + x_m[1:]), [path_length_m]))
    edges = np.clip(edges, 0.0, path_length_m)
    return np.diff(edges)


@dataclass(frozen=True, eq=False)
class ThinningProfile:
    """Thickness along the path and the ground truth of the loss.

    Attributes
    ----------
    x_m : ndarray, shape (n,)
        Positions from the transmitter [m], increasing, inside [0, path_length_m].
    thickness_m : ndarray, shape (n,)
        Local thickness at reference temperature [m].
    nominal_thickness_m : float
        Pristine thickness [m].
    path_length_m : float
        Transmitter-receiver distance [m].
    patch_count : int
        Number of generated patches (0 for a pristine profile).
    shape : str
        ``pristine``, ``flat``, ``gaussian``, ``elliptical``, ``rough`` or ``mixed``.
    sides : str
        ``one`` or ``two``.
    transducer_radius_m : float
        Disc radius [m] for the loss-under-transducer truth (0: the path ends).
    """

    x_m: np.ndarray
    thickness_m: np.ndarray
    nominal_thickness_m: float
    path_length_m: float
    patch_count: int = 0
    shape: str = "pristine"
    sides: str = "one"
    patches: tuple = field(default=(), repr=False)
    transducer_radius_m: float = 0.0

    def __post_init__(self) -> None:
        x = np.asarray(self.x_m, dtype=float)
        t = np.asarray(self.thickness_m, dtype=float)
        if x.ndim != 1 or x.shape != t.shape or x.size == 0:
            raise InputError(f"x_m and thickness_m must be 1-D arrays of one length; got {x.shape} and {t.shape}.")
        if np.any(np.diff(x) <= 0):
            raise InputError("x_m must be strictly increasing.")
        if not np.all(np.isfinite(t)) or np.any(t <= 0):
            raise InputError("thickness_m must be positive and finite everywhere (loss below 100 %).")
        object.__setattr__(self, "x_m", x)
        object.__setattr__(self, "thickness_m", t)

    # -- truth -------------------------------------------------------------------
    @property
    def loss_m(self) -> np.ndarray:
        """Local loss depth [m] (negative where thicker than nominal)."""
        return self.nominal_thickness_m - self.thickness_m

    @property
    def segment_lengths_m(self) -> np.ndarray:
        return _segment_lengths(self.x_m, self.path_length_m)

    def truth(self) -> dict[str, float]:
        """The ground-truth columns (:data:`TRUTH_COLUMNS`)."""
        fp = footprint_thickness(self.x_m, self.thickness_m, self.path_length_m, self.transducer_radius_m)
        t = truth_arrays(self.loss_m[None, :], self.segment_lengths_m, self.nominal_thickness_m,
                         np.array([self.patch_count]), footprint_loss_m=(self.nominal_thickness_m - fp)[None])
        return {k: (int(v[0]) if k == "patch_count" else float(v[0])) for k, v in t.items()}

    max_loss_mm = property(lambda self: self.truth()["max_loss_mm"], doc="Largest local loss [mm].")
    max_loss_pct = property(lambda self: self.truth()["max_loss_pct"], doc="Largest local loss [% of nominal].")
    mean_loss_pct = property(lambda self: self.truth()["mean_loss_pct"], doc="Path-averaged loss [% of nominal].")
    lost_area_mm2 = property(lambda self: self.truth()["lost_area_mm2"], doc="Loss integrated along the path [mm^2].")
    extent_mm = property(lambda self: self.truth()["extent_mm"], doc="Length with loss above EXTENT_THRESHOLD [mm].")
    loss_under_tx_mm = property(lambda self: self.truth()["loss_under_tx_mm"],
                                doc="Largest loss under the transmitter's footprint [mm].")
    loss_under_rx_mm = property(lambda self: self.truth()["loss_under_rx_mm"],
                                doc="Largest loss under the receiver's footprint [mm].")

    def resample(self, x_m: np.ndarray) -> np.ndarray:
        """Thickness at other positions (linear interpolation, nominal outside) [m]."""
        return np.interp(x_m, self.x_m, self.thickness_m, left=self.nominal_thickness_m,
                         right=self.nominal_thickness_m)


def truth_arrays(loss_m: np.ndarray, segment_lengths_m: np.ndarray, nominal_thickness_m: float,
                 patch_count: np.ndarray, *, footprint_loss_m: np.ndarray) -> dict[str, np.ndarray]:
    """Ground truth of many profiles at once: ``loss_m`` (n, S) on segments of the given lengths.

    ``footprint_loss_m`` (n, 2, nodes): the loss at the transmitter's and the receiver's
    footprint nodes (:func:`footprint_thickness`).
    """
    loss = np.atleast_2d(loss_m)
    under = np.maximum(np.asarray(footprint_loss_m, dtype=float).max(axis=-1), 0.0) * 1e3  # (n, 2) mm
    w = np.asarray(segment_lengths_m, dtype=float)
    peak = np.maximum(loss.max(axis=1), 0.0)
    area = loss @ w
    above = loss > EXTENT_THRESHOLD * nominal_thickness_m
    return {
        "max_loss_pct": 100.0 * peak / nominal_thickness_m,
        "max_loss_mm": peak * 1e3,
        "mean_loss_pct": 100.0 * area / w.sum() / nominal_thickness_m,
        "lost_area_mm2": area * 1e6,
        "patch_count": np.where(peak > 0, np.asarray(patch_count), 0).astype(np.int64),
        "extent_mm": (above * w).sum(axis=1) * 1e3,
        "loss_under_tx_mm": under[:, 0],
        "loss_under_rx_mm": under[:, 1],
    }


# ---------------------------------------------------------------------------
# Loss shapes: each returns the loss depth [m] at x (>= 0)
# ---------------------------------------------------------------------------
def _taper(u: np.ndarray) -> np.ndarray:
    """Raised cosine from 0 (u <= 0) to 1 (u >= 1)."""
    u = np.clip(u, 0.0, 1.0)
    return 0.5 - 0.5 * np.cos(np.pi * u)


def loss_flat_patch(x_m, *, centre_m: float, length_m: float, depth_m: float, taper_m: float | None = None) -> np.ndarray:
    """Flat-bottom milled patch: footprint ``length_m`` at the surface, raised-cosine tapers.

    The flat bottom is ``length_m - 2 taper_m`` long; ``taper_m`` defaults to
    a quarter of the footprint.
    """
    x = np.asarray(x_m, dtype=float)
    taper = 0.25 * length_m if taper_m is None else float(taper_m)
    taper = min(max(taper, 1e-9), 0.5 * length_m)
    dist = np.abs(x - centre_m)
    edge = 0.5 * length_m
    return depth_m * _taper((edge - dist) / taper)


def loss_gaussian_pit(x_m, *, centre_m: float, length_m: float, depth_m: float) -> np.ndarray:
    """Gaussian pit, sigma = length_m / 4 (so +-2 sigma spans the footprint)."""
    x = np.asarray(x_m, dtype=float)
    sigma = length_m / 4.0
    return depth_m * np.exp(-0.5 * ((x - centre_m) / sigma) ** 2)


def loss_elliptical_pit(x_m, *, centre_m: float, length_m: float, depth_m: float) -> np.ndarray:
    """Semi-elliptical pit of surface length ``length_m``."""
    x = np.asarray(x_m, dtype=float)
    u = (x - centre_m) / (0.5 * length_m)
    return depth_m * np.sqrt(np.clip(1.0 - u * u, 0.0, None))


def loss_rough(x_m, *, centre_m: float, length_m: float, depth_m: float, rng: np.random.Generator,
               correlation_m: float | None = None, exponent: float = 2.0) -> np.ndarray:
    """Rough corrosion patch: smoothed random field with a skewed depth distribution.

    White noise on a 0.25 mm grid is smoothed with a Gaussian kernel of
    ``correlation_m`` (default: an eighth of the patch, at least 2 mm),
    standardised, mapped to [0, 1] by the normal CDF and raised to ``exponent``
    (2: most of the patch shallow, a few deep spots), then multiplied by a
    tapered patch envelope and scaled to ``depth_m`` at its maximum.
    """
    x = np.asarray(x_m, dtype=float)
    corr = max(length_m / 8.0, 2e-3) if correlation_m is None else float(correlation_m)
    step = 0.25e-3
    lo, hi = centre_m - 0.5 * length_m, centre_m + 0.5 * length_m
    n = max(8, int(np.ceil((hi - lo) / step)) + 1)
    grid = np.linspace(lo, hi, n)
    field_ = gaussian_filter1d(rng.standard_normal(n), sigma=corr / step, mode="reflect")
    sd = field_.std()
    field_ = (field_ - field_.mean()) / (sd if sd > 0 else 1.0)
    depth01 = ndtr(field_) ** exponent
    envelope = _taper((0.5 * length_m - np.abs(grid - centre_m)) / max(0.15 * length_m, 1e-9))
    raw = depth01 * envelope
    peak = raw.max()
    raw = raw / peak if peak > 0 else raw
    return depth_m * np.interp(x, grid, raw, left=0.0, right=0.0)


# ---------------------------------------------------------------------------
# Patches and profiles
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class PatchSpec:
    """One loss patch: shape, centre and footprint along the path [m], relative depth, side."""

    shape: ShapeName
    centre_m: float
    length_m: float
    relative_depth: float = 1.0
    side: Literal["top", "bottom"] = "top"
    seed: int | None = None  # rough patches: field seed
    site: int = 0  # patches of one site (two faces) share it; patch_count counts sites

    def loss(self, x_m: np.ndarray, depth_m: float) -> np.ndarray:
        d = depth_m * self.relative_depth
        if self.shape == "flat":
            return loss_flat_patch(x_m, centre_m=self.centre_m, length_m=self.length_m, depth_m=d)
        if self.shape == "gaussian":
            return loss_gaussian_pit(x_m, centre_m=self.centre_m, length_m=self.length_m, depth_m=d)
        if self.shape == "elliptical":
            return loss_elliptical_pit(x_m, centre_m=self.centre_m, length_m=self.length_m, depth_m=d)
        if self.shape == "rough":
            rng = np.random.default_rng(self.seed)
            return loss_rough(x_m, centre_m=self.centre_m, length_m=self.length_m, depth_m=d, rng=rng)
        raise InputError(f"unknown patch shape {self.shape!r}; accepted: flat, gaussian, elliptical, rough.")


def _check_common(x_m, nominal_thickness_m, path_length_m, max_loss_pct):
    x = np.asarray(x_m, dtype=float)
    if not nominal_thickness_m > 0:
        raise InputError(f"nominal_thickness_m must be positive; got {nominal_thickness_m!r}.")
    if path_length_m is None:
        path_length_m = float(x[-1] + (x[-1] - x[-2]) / 2) if x.size > 1 else float(2 * x[0])
    if not 0.0 <= max_loss_pct < 90.0:
        raise InputError(f"max_loss_pct must lie in [0, 90); got {max_loss_pct!r}.")
    return x, float(path_length_m)


def site_shape(x_m, patches: Sequence[PatchSpec]) -> np.ndarray:
    """Total loss of the patches (max on a side, sum over sides) scaled to a unit maximum."""
    x = np.asarray(x_m, dtype=float)
    top = np.zeros_like(x)
    bottom = np.zeros_like(x)
    for p in patches:
        loss = p.loss(x, 1.0)
        np.maximum(top if p.side == "top" else bottom, loss, out=top if p.side == "top" else bottom)
    total = top + bottom
    peak = total.max() if total.size else 0.0
    if peak <= 0:
        raise InputError("the patches do not overlap the path positions x_m; move them inside [0, L].")
    return total / peak


def build_profile(x_m, nominal_thickness_m: float, patches: Sequence[PatchSpec], *, max_loss_pct: float,
                  path_length_m: float | None = None, shape: np.ndarray | None = None,
                  transducer_radius_m: float = 0.0) -> ThinningProfile:
    """Combine patches (max on a side, sum over sides) and scale to ``max_loss_pct`` exactly.

    ``shape``: the precomputed :func:`site_shape` of the patches (the campaign reuses it
    for every state of a specimen). ``transducer_radius_m``: for the loss-under-transducer truth.
    """
    x, L = _check_common(x_m, nominal_thickness_m, path_length_m, max_loss_pct)
    patches = tuple(patches)
    target = nominal_thickness_m * max_loss_pct / 100.0
    if not patches or target == 0.0:
        return ThinningProfile(x, np.full_like(x, nominal_thickness_m), nominal_thickness_m, L,
                               patch_count=0, shape="pristine", sides="one", transducer_radius_m=transducer_radius_m)
    unit = site_shape(x, patches) if shape is None else shape
    thickness = nominal_thickness_m - unit * target
    shapes = {p.shape for p in patches}
    sides = "two" if {p.side for p in patches} == {"top", "bottom"} else "one"
    return ThinningProfile(x, thickness, nominal_thickness_m, L, patch_count=len({p.site for p in patches}),
                           shape=shapes.pop() if len(shapes) == 1 else "mixed", sides=sides, patches=patches,
                           transducer_radius_m=transducer_radius_m)


def pristine_profile(x_m, nominal_thickness_m: float, *, path_length_m: float | None = None) -> ThinningProfile:
    """Uniform nominal thickness (a baseline specimen)."""
    return build_profile(x_m, nominal_thickness_m, (), max_loss_pct=0.0, path_length_m=path_length_m)


def _two_sided(patch: PatchSpec, split: float, rng: np.random.Generator) -> list[PatchSpec]:
    """The same site thinned from both faces: the bottom patch is shorter and slightly offset."""
    scale = rng.uniform(0.6, 1.0)
    offset = rng.uniform(-0.15, 0.15) * patch.length_m
    bottom = PatchSpec(patch.shape, patch.centre_m + offset, patch.length_m * scale, patch.relative_depth * (1.0 - split),
                       "bottom", None if patch.seed is None else patch.seed + 1, patch.site)
    top = PatchSpec(patch.shape, patch.centre_m, patch.length_m, patch.relative_depth * split, "top", patch.seed, patch.site)
    return [top, bottom]


def flat_patch_profile(x_m, nominal_thickness_m: float, *, centre_m: float, length_m: float, max_loss_pct: float,
                       sides: str = "one", split: float = 0.5, rng=None, path_length_m=None) -> ThinningProfile:
    """One flat-bottom tapered patch (one- or two-sided)."""
    return _single("flat", x_m, nominal_thickness_m, centre_m, length_m, max_loss_pct, sides, split, rng, path_length_m)


def pit_profile(x_m, nominal_thickness_m: float, *, centre_m: float, length_m: float, max_loss_pct: float,
                kind: Literal["gaussian", "elliptical"] = "gaussian", sides: str = "one", split: float = 0.5,
                rng=None, path_length_m=None) -> ThinningProfile:
    """One Gaussian or elliptical pit."""
    if kind not in ("gaussian", "elliptical"):
        raise InputError(f"pit kind must be 'gaussian' or 'elliptical'; got {kind!r}.")
    return _single(kind, x_m, nominal_thickness_m, centre_m, length_m, max_loss_pct, sides, split, rng, path_length_m)


def rough_profile(x_m, nominal_thickness_m: float, *, centre_m: float, length_m: float, max_loss_pct: float,
                  rng, sides: str = "one", split: float = 0.5, path_length_m=None) -> ThinningProfile:
    """One rough-corrosion patch; ``rng`` fixes the random field."""
    return _single("rough", x_m, nominal_thickness_m, centre_m, length_m, max_loss_pct, sides, split, rng, path_length_m)


def _single(shape, x_m, nominal, centre_m, length_m, max_loss_pct, sides, split, rng, path_length_m):
    if sides not in ("one", "two"):
        raise InputError(f"sides must be 'one' or 'two'; got {sides!r}.")
    if not length_m > 0:
        raise InputError(f"length_m must be positive; got {length_m!r}.")
    rng = np.random.default_rng(rng)
    seed = int(rng.integers(2**62)) if shape == "rough" else None
    patch = PatchSpec(shape, float(centre_m), float(length_m), 1.0, "top", seed)
    patches = _two_sided(patch, split, rng) if sides == "two" else [patch]
    return build_profile(x_m, nominal, patches, max_loss_pct=max_loss_pct, path_length_m=path_length_m)


def multi_patch_profile(x_m, nominal_thickness_m: float, *, shapes: Iterable[ShapeName], centres_m: Iterable[float],
                        lengths_m: Iterable[float], relative_depths: Iterable[float], max_loss_pct: float,
                        sides: str = "one", rng=None, path_length_m=None) -> ThinningProfile:
    """Several patches; the deepest point of the combination equals ``max_loss_pct``."""
    rng = np.random.default_rng(rng)
    patches: list[PatchSpec] = []
    for j, (shape, c, length, rel) in enumerate(zip(shapes, centres_m, lengths_m, relative_depths, strict=True)):
        seed = int(rng.integers(2**62)) if shape == "rough" else None
        p = PatchSpec(shape, float(c), float(length), float(rel), "top", seed, j)
        patches.extend(_two_sided(p, rng.uniform(0.3, 0.7), rng) if sides == "two" else [p])
    return build_profile(x_m, nominal_thickness_m, patches, max_loss_pct=max_loss_pct, path_length_m=path_length_m)


def sample_site(rng: np.random.Generator, *, path_length_m: float, shape: str, sides: str, n_patches: int,
                length_m: float, position_fraction: float, position_range: tuple[float, float],
                at: str = "path") -> tuple[PatchSpec, ...]:
    """Geometry of one damage site (the patches, unscaled), as the campaign samples it.

    The first patch takes the sampled length and position; further patches get
    a length of 0.3-1x that, a uniform position in ``position_range`` and a
    relative depth of 0.3-1. ``shape = "pit"`` picks Gaussian or elliptical
    with equal odds. Patches are kept inside the path, except a first patch
    placed ``at`` a transducer (:data:`SITE_LOCATIONS`): its centre
    (``position_fraction`` of the path) is only kept inside [0, L], so it may
    reach past the disc.
    """
    if at not in SITE_LOCATIONS:
        raise InputError(f"at must be one of {', '.join(SITE_LOCATIONS)}; got {at!r}.")
    lo, hi = position_range
    patches: list[PatchSpec] = []
    for j in range(n_patches):
        if shape == "pit":
            kind = "gaussian" if rng.random() < 0.5 else "elliptical"
        else:
            kind = shape
        if j == 0:
            length, frac, rel = length_m, position_fraction, 1.0
        else:
            length = length_m * rng.uniform(0.3, 1.0)
            frac, rel = rng.uniform(lo, hi), rng.uniform(0.3, 1.0)
        length = min(length, 0.9 * path_length_m)
        margin = 0.0 if (j == 0 and at != "path") else 0.5 * length
        centre = np.clip(frac * path_length_m, margin, path_length_m - margin)
        seed = int(rng.integers(2**62)) if kind == "rough" else None
        p = PatchSpec(kind, float(centre), float(length), float(rel), "top", seed, j)
        patches.extend(_two_sided(p, rng.uniform(0.3, 0.7), rng) if sides == "two" else [p])
    return tuple(patches)
