"""Fast forward model: pitch-catch captures of a thinned flange by frequency-domain modal synthesis.

For each case the received spectrum, at every frequency bin inside the
excitation band, is

    Y(w) = g * e^{-i w tau_j} * sum_modes sum_paths
           X(w) H(w)^2 F_m(w, t_tx) F_m(w, t_rx) E_m R_p sqrt(L / r_p) e^{-a(w) r_p} e^{-i Phi_mp(w)}
         + crosstalk(w) + ringing(w)

X        DFT of the tone burst (``excitation`` section), starting at the trigger
H        disc resonance ``1 / (1 + i Q (f/f_r - f_r/f))``, transmit and receive
F_m      one disc's footprint factor on the wall under it,
         ``A(k_m(w, t) a) sqrt(e_m(w, t) / e_m(w, t_nom))``: the aperture factor
         ``2 J1(k a) / (k a)`` of a uniform circular disc of radius a (half
         ``path.transducer_diameter_mm``) at the wavenumber of the footprint's
         thickness, times the relative strain excitability of the mode there
         (Rayleigh-Lamb residue, Giurgiutiu 2005); ``t_tx``, ``t_rx``: the
         area-weighted mean thickness under the transmitter (centred at x = 0) and
         the receiver (x = L), reference temperature. At nominal thickness
         ``F_m = A(k_m)``. (X, H, F_m: the one excitation model,
         :mod:`waneguide.features.excitation`, which states the sources.)
E_m      relative mode excitability at nominal thickness (``transducer`` section; empirical)
g        coupling gain of both discs, 10^((c_tx + c_rx)/20)
tau_j    trigger jitter (moves everything, crosstalk included)
R_p      1 for the direct path, the sampled reflection coefficient for echoes
r_p      length of path p; ``sqrt(L / r_p)``: cylindrical spreading re the direct path
a(w)     attenuation [Np/m], proportional to frequency, ``attenuation_db_per_m`` at f_c
Phi_mp   phase integral ``sum_segments k_m(w, t_j) dx_j`` along path p

Paths: the direct path; the echo from the near flange end (``+2 d_near`` of
nominal plate), from the far end (``+2 d_far``), and from each lateral edge
(image source at ``2 e``: length ``sqrt(L^2 + 4 e^2)``, crossing the same
profile at ``sec(theta) = r / L`` times each segment length).

The phase integral is linear in the profile: distributing each segment length
over the two neighbouring nodes of a log-spaced thickness grid (linear
interpolation in ln t) gives a (cases x grid) weight matrix W, and
``Phi = W @ K`` with K the (grid x frequency) wavenumber table, so a whole chunk
of cases is one BLAS product per mode.

Temperature (linear material model of :mod:`waneguide.features.materials`): with
Poisson's ratio fixed all velocities scale by ``s(T) = sqrt(E(T) rho_ref /
(E_ref rho(T)))``, so ``k(w, t; T) = k_ref(w, t / s) / s`` (Rayleigh-Lamb
dispersion depends on w t / c_T and k t only; Graff 1975 sec. 8.1); lengths and
thicknesses grow by ``expansion_factor(T)``. The table is therefore computed
once at reference temperature and looked up at ``t * e(T) / s(T)``, which is
exact for that material model.

Noise: white Gaussian noise of standard deviation ``A_ref 10^(-snr_db / 20)``
where ``A_ref`` is the peak of a pristine capture at reference temperature
without echoes (so ``snr_db`` is the SNR of the pristine direct arrival; a
coupling loss lowers the effective SNR, as on a real instrument). Coherent
noise: electrical crosstalk (a copy of the drive burst at the trigger, no
transducer filtering) and a low-level ringing (a damped sinusoid at the disc
resonance, decay time 10 Q / (pi f_r)), each at a level re ``A_ref``. The
amplitude scale puts ``A_ref`` at a quarter of the ADC full scale; samples are
clipped at full scale and, for ``amplitude_units = "counts"``, rounded to counts.

Approximations (a later issue measures this model against a full-wave
simulation; each item is a candidate correction):

- the flange is a free, isotropic plate of the local flange thickness
  (Rayleigh-Lamb); no web coupling, no cross-section (Lamb-like flange) modes,
  no fillet, no sealant or paint loading;
- only S0 and A0 are synthesised (the band of the demo families lies below the
  A1 cut-off; higher modes are ignored even when a thinned region would carry
  them);
- local (WKB / adiabatic) propagation through thickness changes: no reflection
  and no mode conversion at thickness steps, transmission amplitude 1, phase
  from the local wavenumber only;
- one-sided loss is treated as the symmetric plate of the remaining thickness:
  the mid-plane offset that couples S0 and A0 is ignored;
- profiles are uniform across the width (see :mod:`waneguide.simulation.profiles`), so the
  edge echoes cross the same profile obliquely;
- each disc sees its footprint through the mean thickness under it (area-weighted over
  the disc, :data:`waneguide.features.excitation.FOOTPRINT_NODES` Gauss-Chebyshev nodes);
  the profile is read from the segments, linear between segment centres, and beyond the
  path ends (the half of each disc outside [0, L]) the wall keeps the thickness of the end
  segment; a partly thinned footprint is not resolved further (no phase spread across the
  disc beyond the aperture factor at the mean thickness), the footprint factor ignores
  temperature (reference-temperature table), the strain excitability is that of a
  symmetric free plate of the local thickness; the mode excitabilities at nominal
  thickness are the family's constants; the disc resonance is a single second-order
  system, the same for both discs and independent of the wall under them;
- echoes: one reflection each from the two ends and the two edges with one
  frequency-independent coefficient, no mode conversion at the reflection, no
  multiple reverberation, no web-junction reflection; cylindrical spreading;
- attenuation proportional to frequency, same for both modes;
- frequency bins outside the band where the source spectrum exceeds 1e-3 of
  its peak (-60 dB) are not synthesised (the sharp band edge leaves -60 dB
  ringing); the FFT is made long enough that no synthesised arrival of a path
  thinned all along to the domain's deepest loss wraps round, then cut to the
  record length (arrivals after the record end are lost, as on an instrument);
- linear interpolation of the wavenumber in ln(thickness) on the grid (error
  below about 1e-5 relative for 128 nodes; see tests/test_forward.py).

References: K. F. Graff, *Wave Motion in Elastic Solids*, 1975, ch. 8;
J. L. Rose, *Ultrasonic Waves in Solid Media*, 1999, ch. 8 and 10.
"""
from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np
import scipy.fft as sfft

from waneguide.core.errors import InputError
from waneguide.features.capture import Capture
from waneguide.features.family import Family
from waneguide.features.excitation import disc_footprint
from waneguide.simulation._confound import attenuation_np_per_m, confound_records, render
from waneguide.simulation._tables import MODES, cached_tables, mode_index, pair_factors
from waneguide.simulation.profiles import footprint_thickness

__all__ = [
    "FORWARD_MODEL_VERSION",
    "ForwardModel",
    "simulate_capture",
    "MODES",
]

#: Bumped whenever the synthesis changes what it writes (part of the campaign fingerprint).
#: 2: the drive burst of features.excitation (every sample in [0, T], gaussian sigma T / 6).
#: 3: the disc footprint: aperture and strain excitability at the mean thickness under each disc.
FORWARD_MODEL_VERSION = "3"

_PATHS = ("direct", "near_end", "far_end", "edge_1", "edge_2")


class ForwardModel:
    """Modal-synthesis simulator of one family (see module docstring).

    Parameters
    ----------
    family : Family
    random_state : int, Generator or None
        Default generator for :meth:`simulate` calls that pass none.
    n_thickness : int, default 128
        Nodes of the log-spaced thickness grid, spanning 7-110 % of nominal.

    Attributes
    ----------
    n_samples, sample_rate_hz, pretrigger_s, path_length_m, segment_m, x_m
        Record and path geometry; ``x_m`` are the segment centres.
    footprint_radius_m, footprint_weights
        Disc radius [m] and the footprint quadrature weights (sum 1; nodes in
        :func:`waneguide.simulation.profiles.footprint_thickness`).
    """

    def __init__(self, family: Family, *, random_state=None, n_thickness: int = 128):
        if not isinstance(family, Family):
            raise TypeError(f"family must be a Family (features.family.load_family); got {type(family).__name__}.")
        self.family = family
        self.random_state = random_state
        self.n_thickness = int(n_thickness)
        acq = family.acquisition
        self.sample_rate_hz = acq.sample_rate_hz
        self.n_samples = int(acq.record_length)
        self.pretrigger_s = acq.pretrigger_s
        self.material = family.build_material()
        self.nominal_thickness_m = family.nominal_thickness_m
        self.path_length_m = family.path_length_m
        n_seg = max(1, int(round(self.path_length_m / (family.domain.segment_mm * 1e-3))))
        self.segment_m = self.path_length_m / n_seg
        self.x_m = (np.arange(n_seg) + 0.5) * self.segment_m
        d_near, d_far = family.path.end_distances_m()
        e1, e2 = family.edge_distances_m()
        L = self.path_length_m
        self.path_lengths_m = np.array([L, L + 2 * d_near, L + 2 * d_far,
                                        math.hypot(L, 2 * e1), math.hypot(L, 2 * e2)])
        self.end_extra_m = np.array([0.0, 2 * d_near, 2 * d_far, 0.0, 0.0])
        self.sec_theta = self.path_lengths_m / L
        self.sec_theta[1:3] = 1.0
        self.full_scale_v = family.full_scale_v
        self.footprint_radius_m = family.path.transducer_diameter_mm * 0.5e-3
        self.footprint_weights = disc_footprint()[1]
        self._tables = cached_tables(family, self.n_thickness)

    # -- small public helpers --------------------------------------------------------
    @property
    def frequency_hz(self) -> np.ndarray:
        """Frequencies of the synthesised band [Hz]."""
        return self._tables.freq_hz

    @property
    def n_fft(self) -> int:
        return self._tables.n_fft

    @property
    def reference_peak_v(self) -> float:
        """Peak of a pristine capture at reference temperature, no echoes [V] (the SNR reference)."""
        return self._tables.ref_peak_v

    @property
    def time_s(self) -> np.ndarray:
        return np.arange(self.n_samples) / self.sample_rate_hz - self.pretrigger_s

    def source_waveform(self, mode: str) -> np.ndarray:
        """The pulse one mode carries as it leaves the transmitter (no propagation) [V], on the record."""
        m = mode_index(mode)
        spec = np.zeros(self.n_fft // 2 + 1, complex)
        spec[self._tables.bins] = self._tables.source[m]
        return sfft.irfft(spec, self.n_fft)[: self.n_samples]

    def thickness_on_segments(self, x_m, thickness_m) -> np.ndarray:
        """Resample an explicit profile onto the model's segment centres (nominal outside it)."""
        x = np.asarray(x_m, dtype=float)
        t = np.asarray(thickness_m, dtype=float)
        if x.ndim != 1 or x.shape != t.shape or x.size == 0:
            raise InputError(f"x_m and thickness_m must be 1-D arrays of one length; got {x.shape} and {t.shape}.")
        order = np.argsort(x, kind="stable")
        return np.interp(self.x_m, x[order], t[order], left=self.nominal_thickness_m, right=self.nominal_thickness_m)

    def footprint_thickness(self, thickness_m) -> np.ndarray:
        """Thickness at the footprint nodes of (transmitter, receiver), shape (n, 2, nodes), from segment thickness (n, S)."""
        return footprint_thickness(self.x_m, np.atleast_2d(thickness_m), self.path_length_m, self.footprint_radius_m)

    def disc_factors(self, thickness_m) -> tuple[np.ndarray, list[np.ndarray]]:
        """Rows whose footprints are not all nominal, and per mode the pair factor ``F_tx F_rx`` of those rows (r, F)."""
        return pair_factors(self._tables, self.footprint_thickness(thickness_m), self.footprint_weights,
                            self.nominal_thickness_m)

    def temperature_factors(self, temperature_c) -> tuple[np.ndarray, np.ndarray]:
        """(expansion factor e(T), velocity scale s(T)) per temperature, from the material model."""
        temps = np.atleast_1d(np.asarray(temperature_c, dtype=float))
        uniq, inv = np.unique(temps, return_inverse=True)
        e = np.empty(uniq.size)
        s = np.empty(uniq.size)
        ref = self.material
        for i, t in enumerate(uniq):
            hot = ref.at_temperature(float(t))
            e[i] = ref.expansion_factor(float(t))
            s[i] = math.sqrt(hot.youngs_modulus_pa * ref.density_kg_m3 / (ref.youngs_modulus_pa * hot.density_kg_m3))
        return e[inv].reshape(temps.shape), s[inv].reshape(temps.shape)

    # -- the batch synthesis ---------------------------------------------------------
    def synthesize(
        self,
        thickness_m: np.ndarray,
        temperature_c,
        *,
        gain=1.0,
        jitter_s=0.0,
        attenuation_db_per_m=0.0,
        echo_reflection=0.0,
        crosstalk_db=None,
        ringing_db=None,
        modes: Sequence[str] = MODES,
        echoes: bool = True,
        dtype=np.float64,
    ) -> np.ndarray:
        """Noise-free waveforms of a batch of cases [V], shape (n, n_samples), ``dtype``.

        Parameters
        ----------
        thickness_m : array (n, n_segments)
            Thickness at the segment centres :attr:`x_m`, reference temperature [m]; the wall
            under each disc is read from it (:meth:`footprint_thickness`).
        temperature_c : float or array (n,)
        gain : float or array (n,)
            Linear coupling gain of both discs together.
        jitter_s, attenuation_db_per_m, echo_reflection : float or array (n,)
        crosstalk_db, ringing_db : None or float or array (n,)
            Coherent-noise levels re :attr:`reference_peak_v`; None (or -inf) is off.
        modes : subset of ("S0", "A0")
        echoes : bool
            Include the end and edge echoes.
        dtype : float64 or float32
            float32 runs the inverse FFT in single precision (campaigns store float32).
        """
        tb = self._tables
        thick = np.atleast_2d(np.asarray(thickness_m, dtype=float))
        n, n_seg = thick.shape
        if n_seg != self.x_m.size:
            raise InputError(f"thickness_m must have {self.x_m.size} columns (one per segment); got {n_seg}.")
        if not np.all(np.isfinite(thick)) or np.any(thick <= 0):
            raise InputError("thickness_m must be positive and finite (loss below 100 %).")
        b = lambda v: np.broadcast_to(np.asarray(v, dtype=float), (n,))  # noqa: E731
        temp = b(temperature_c)
        gain, jitter, att_db, refl = b(gain), b(jitter_s), b(attenuation_db_per_m), b(echo_reflection)
        e, s = self.temperature_factors(temp)
        scale = e / s  # thickness and length scale on the reference table; k picks up 1/s too
        G = tb.thickness_grid_m.size
        # linear-in-ln(t) weights onto the grid (lookup at t e / s), segment length dx * e folded in;
        # Phi = sum k_ref(w, t e / s) / s * dx e
        u = (np.log(thick * scale[:, None]) - tb.ln_t0) / tb.dln
        if u.min() < 0 or u.max() > G - 1:
            lo, hi = tb.thickness_grid_m[0], tb.thickness_grid_m[-1]
            raise InputError(
                f"thickness (temperature-corrected) outside the precomputed grid [{lo * 1e3:.3f}, {hi * 1e3:.3f}] mm; "
                "loss must stay below 90 % and thickness at most 108 % of nominal."
            )
        i0 = np.minimum(np.floor(u).astype(np.int64), G - 2)
        w = u - i0
        dx = self.segment_m * e[:, None]  # segment length at temperature
        rows = np.repeat(np.arange(n, dtype=np.int64) * G, n_seg).reshape(n, n_seg)
        W = np.bincount((rows + i0).ravel(), weights=(dx * (1 - w)).ravel(), minlength=n * G)
        W += np.bincount((rows + i0 + 1).ravel(), weights=(dx * w).ravel(), minlength=n * G)
        W = W.reshape(n, G)
        # nominal-thickness weights for one reference metre (the extra end-echo legs)
        un = (np.log(self.nominal_thickness_m * scale) - tb.ln_t0) / tb.dln
        jn = np.minimum(np.floor(un).astype(np.int64), G - 2)
        wn = un - jn
        Wn = np.zeros((n, G))
        Wn[np.arange(n), jn] = (1 - wn) * e
        Wn[np.arange(n), jn + 1] += wn * e

        f = tb.freq_hz
        a_np = attenuation_np_per_m(att_db, f, self.family.excitation.centre_frequency_hz)  # Np/m, (n, F)
        n_paths = len(_PATHS) if echoes else 1
        mode_ids = [mode_index(m) for m in modes]
        # active paths: (index, log of amp * exp(-a r), mask of rows with amp > 0 or None)
        active = []
        for p in range(n_paths):
            r = self.path_lengths_m[p]
            amp = np.ones(n) if p == 0 else refl * math.sqrt(self.path_lengths_m[0] / r)
            if np.any(amp):
                log_att = -a_np * (r * e)[:, None] + np.log(np.where(amp > 0, amp, 1.0))[:, None]
                active.append((p, log_att, None if p == 0 else (amp > 0)[:, None]))
        fp_rows, fp_pair = self.disc_factors(thick) if mode_ids else (np.empty(0, np.int64), [])
        Y = np.zeros((n, f.size), complex)
        z = np.empty((n, f.size), complex)
        acc = np.empty((n, f.size), complex)
        for m in mode_ids:
            phi_direct, k_nom = (W @ tb.K[m]) / s[:, None], (Wn @ tb.K[m]) / s[:, None]
            acc[...] = 0.0
            for p, log_att, mask in active:
                phi = phi_direct if p == 0 else phi_direct * self.sec_theta[p] + k_nom * self.end_extra_m[p]
                # amp * exp(-a r) * exp(-i Phi) as one complex exponential
                z.real = log_att
                z.imag = -phi
                np.exp(z, out=z)
                if mask is not None:
                    z *= mask
                acc += z
            # the discs are the same for every path: nominal footprints take the pristine source,
            # the others the bare source times their pair factor F_tx F_rx
            contrib = acc * tb.source[m][None, :]
            if fp_rows.size:
                contrib[fp_rows] = acc[fp_rows] * (tb.source_bare[m][None, :] * fp_pair[m])
            Y += contrib
        return render(tb, Y, self.n_samples, gain=gain, jitter_s=jitter, crosstalk_db=crosstalk_db,
                      ringing_db=ringing_db, dtype=dtype)

    def confound(self, clean_v: np.ndarray, temperature_c, *, gain=1.0, jitter_s=0.0, attenuation_db_per_m=0.0,
                 crosstalk_db=None, ringing_db=None, dtype=np.float64) -> np.ndarray:
        """Noise-free records of the direct path made elsewhere (full-wave) given this model's confounders.

        Band, attenuation over the path, gain, coherent noise and jitter exactly as
        :meth:`synthesize` applies them (:func:`waneguide.simulation._confound.confound_records`);
        no echoes. Follow with :meth:`finish` for noise, clipping and counts.
        """
        return confound_records(self, clean_v, temperature_c, gain=gain, jitter_s=jitter_s,
                                attenuation_db_per_m=attenuation_db_per_m, crosstalk_db=crosstalk_db,
                                ringing_db=ringing_db, dtype=dtype)

    def finish(self, clean_v: np.ndarray, snr_db, rngs: Sequence[np.random.Generator] | np.random.Generator | None,
               *, clip: bool = True, out: np.ndarray | None = None) -> np.ndarray:
        """Add white noise at ``snr_db`` (None: none), clip at full scale, round to counts if the family uses them.

        ``rngs``: one Generator per row (so every case is reproducible on its
        own) or a single Generator for all rows.
        """
        x = np.array(clean_v, dtype=float, copy=True) if out is None else out
        if out is not None:
            out[...] = clean_v
        n = x.shape[0]
        if snr_db is not None:
            snr = np.broadcast_to(np.asarray(snr_db, dtype=float), (n,))
            sigma = self.reference_peak_v * 10.0 ** (-snr / 20.0)
            buf = np.empty(x.shape[1], dtype=x.dtype if x.dtype in (np.float32, np.float64) else np.float64)
            for i in range(n):
                if not np.isfinite(snr[i]):
                    continue
                g = rngs[i] if isinstance(rngs, (list, tuple)) else rngs
                g.standard_normal(dtype=buf.dtype, out=buf)
                buf *= sigma[i]
                x[i] += buf
        if clip:
            np.clip(x, -self.full_scale_v, self.full_scale_v, out=x)
        acq = self.family.acquisition
        if acq.amplitude_units == "counts":
            q = float(acq.counts_scale_v)
            np.round(x / q, out=x)
            x *= q
        return x

    # -- one case ----------------------------------------------------------------------
    def simulate(self, thickness_m, temperature_c: float, *, rng=None, snr_db=40.0, coupling_db=(0.0, 0.0),
                 jitter_s=None, attenuation_db_per_m=None, echo_reflection=None, crosstalk_db="default",
                 ringing_db="default", modes: Sequence[str] = MODES, echoes: bool = True, clip: bool = True) -> np.ndarray:
        """One waveform [V] for a thickness on the segment centres (see :func:`simulate_capture`)."""
        rng = np.random.default_rng(self.random_state if rng is None else rng)
        dom = self.family.domain
        mid = lambda pair: 0.5 * (pair[0] + pair[1])  # noqa: E731
        if jitter_s is None:
            jitter_s = float(rng.normal(0.0, dom.jitter_ns * 1e-9))
        if attenuation_db_per_m is None:
            attenuation_db_per_m = mid(dom.attenuation_db_per_m)
        if echo_reflection is None:
            echo_reflection = mid(dom.echo_reflection)
        if isinstance(crosstalk_db, str):
            crosstalk_db = mid(dom.crosstalk_db)
        if isinstance(ringing_db, str):
            ringing_db = mid(dom.ringing_db)
        c = np.asarray(coupling_db, dtype=float)
        if c.shape != (2,):
            raise InputError(f"coupling_db must be a pair (transmitter_db, receiver_db); got {coupling_db!r}.")
        clean = self.synthesize(
            np.asarray(thickness_m, dtype=float)[None, :], temperature_c,
            gain=10.0 ** (c.sum() / 20.0), jitter_s=jitter_s, attenuation_db_per_m=attenuation_db_per_m,
            echo_reflection=echo_reflection, crosstalk_db=crosstalk_db, ringing_db=ringing_db, modes=modes,
            echoes=echoes,
        )
        return self.finish(clean, snr_db, rng, clip=clip)[0]


_MODELS: dict[str, ForwardModel] = {}


def _model_for(family: Family) -> ForwardModel:
    fm = _MODELS.get(family.fingerprint)
    if fm is None:
        fm = _MODELS[family.fingerprint] = ForwardModel(family)
    return fm


def simulate_capture(
    family: Family,
    *,
    x_m,
    thickness_m,
    temperature_c: float,
    rng,
    snr_db: float | None = 40.0,
    coupling_db: tuple[float, float] = (0.0, 0.0),
    path_id: str = "P",
    captured_at: str | None = None,
    **confounders: Any,
) -> Capture:
    """One simulated capture of an explicit thickness profile.

    Parameters
    ----------
    family : Family
    x_m, thickness_m : array
        Thickness [m] at positions [m] from the transmitter; resampled onto the
        model's segments, nominal outside the given range. The wall under each disc
        is read from those segments (beyond the path ends it keeps the end segment's
        thickness). A pristine profile (thickness = nominal) gives a baseline.
    temperature_c : float
        Structure temperature [degC].
    rng : int or Generator
        Source of the noise and of the default jitter.
    snr_db : float or None
        SNR of the pristine direct arrival [dB]; None: no noise.
    coupling_db : (transmitter_db, receiver_db)
        Coupling gains [dB].
    path_id, captured_at : str
        Capture metadata.
    **confounders
        ``jitter_s`` (default: drawn from N(0, domain.jitter_ns)),
        ``attenuation_db_per_m``, ``echo_reflection``, ``crosstalk_db``,
        ``ringing_db`` (defaults: the middle of the family's domain range; None
        switches coherent noise off), ``modes`` (default S0 and A0), ``echoes``
        (default True), ``clip`` (default True).

    Returns
    -------
    Capture
        Amplitudes in volts; ``extra`` carries ``simulated = True`` and the
        family fingerprint.
    """
    unknown = set(confounders) - {"jitter_s", "attenuation_db_per_m", "echo_reflection", "crosstalk_db",
                                  "ringing_db", "modes", "echoes", "clip"}
    if unknown:
        raise InputError(f"unknown confounder(s) {sorted(unknown)}; accepted: jitter_s, attenuation_db_per_m, "
                         "echo_reflection, crosstalk_db, ringing_db, modes, echoes, clip.")
    fm = _model_for(family)
    seg = fm.thickness_on_segments(x_m, thickness_m)
    wave = fm.simulate(seg, temperature_c, rng=np.random.default_rng(rng), snr_db=snr_db, coupling_db=coupling_db,
                       **confounders)
    exc = family.excitation
    return Capture(
        amplitude_v=wave,
        sample_rate_hz=fm.sample_rate_hz,
        pretrigger_s=fm.pretrigger_s,
        path_id=str(path_id),
        captured_at=captured_at,
        temperature_c=float(temperature_c),
        excitation_khz=exc.centre_frequency_khz,
        cycles=float(exc.cycles),
        units="V",
        extra={"simulated": True, "family": family.name, "family_fingerprint": family.fingerprint,
               "forward_model_version": FORWARD_MODEL_VERSION},
    )
