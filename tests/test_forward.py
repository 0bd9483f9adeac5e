"""Forward model checks against the dispersion engine, the material model and analytic identities.

Every physical expectation is computed here from the Rayleigh-Lamb engine
(features.dispersion.fundamental_dispersion, evaluated exactly at the thickness in
question, not from the simulator's interpolated table) or from the material
constants, then compared with what the synthesised waveforms show.
"""
from __future__ import annotations

import copy

import numpy as np
import pytest
from scipy.signal import hilbert
from scipy.special import j1

from waneguide.features.capture import Capture
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.family import family_from_mapping
from waneguide.features.excitation import strain_excitability, tone_burst
from waneguide.simulation.forward import ForwardModel, simulate_capture

# everything that is not propagation switched off
OFF = dict(snr_db=None, jitter_s=0.0, attenuation_db_per_m=0.0, echo_reflection=0.0, crosstalk_db=None,
           ringing_db=None, echoes=False)


@pytest.fixture(scope="module", params=["fb2", "st3"])
def model(request, family_fb2, family_st3):
    fam = family_fb2 if request.param == "fb2" else family_st3
    return ForwardModel(fam)


def _flat(fm, thickness_m=None):
    return np.full(fm.x_m.size, fm.nominal_thickness_m if thickness_m is None else thickness_m)


def _peak_time(x, fs):
    """Hilbert-envelope peak [s from record start], parabolic interpolation."""
    e = np.abs(hilbert(x))
    i = int(np.argmax(e))
    y0, y1, y2 = e[i - 1:i + 2]
    return (i + 0.5 * (y0 - y2) / (y0 - 2 * y1 + y2)) / fs


def _spectrum(x, fs, pad=4):
    X = np.fft.rfft(x, pad * x.size)
    return np.fft.rfftfreq(pad * x.size, 1 / fs), X


@pytest.mark.parametrize("mode", ["S0", "A0"])
def test_uniform_plate_envelope_arrives_at_path_over_group_velocity(model, mode):
    # Packet (envelope) travels at the group velocity (Rose 1999, sec. 8.7; Graff 1975 sec. 1.5).
    # Expected delay L / c_g(f_pk), f_pk the peak of the emitted pulse's spectrum, c_g from the
    # engine. Tolerance = the dispersion-induced envelope timing error: the spread of group
    # delays L / c_g(f) over the band where the pulse spectrum is above half its peak (the
    # envelope peak lies among the delays of the components that make it up). For the demo
    # families this is 0.08-0.11 us for S0 and 4-6 us for A0; observed errors are 0.01 / 0.1 us.
    fm = model
    fs, L, mi = fm.sample_rate_hz, fm.path_length_m, ("S0", "A0").index(mode)
    src = fm.source_waveform(mode)
    rx = fm.simulate(_flat(fm), fm.material.reference_temperature_c, modes=(mode,), **OFF)
    f, S = _spectrum(src, fs)
    f_pk = f[np.argmax(np.abs(S))]
    band = f[np.abs(S) >= 0.5 * np.abs(S).max()]
    cg = fundamental_dispersion(fm.material, fm.nominal_thickness_m, np.r_[f_pk, band]).group_velocity_m_s[0, mi]
    expected = L / cg[0]
    tol = np.max(np.abs(L / cg[1:] - expected)) + 1 / fs
    measured = _peak_time(rx, fs) - _peak_time(src, fs)
    assert abs(measured - expected) <= tol, (measured, expected, tol)


@pytest.mark.parametrize("mode", ["S0", "A0"])
def test_energy_centroid_delay_is_the_energy_weighted_group_delay(model, mode):
    # Identity: the time centroid of |x(t)|^2 equals the |X(f)|^2-weighted mean of the group
    # delay -d(phase)/d(omega) (L. Cohen, Time-Frequency Analysis, 1995, sec. 1.4). Through a
    # uniform plate the group delay is L / c_g(f) (engine, implicit-function c_g), so the
    # centroid shift is fixed exactly; 1e-4 relative covers the table's ln-thickness
    # interpolation and the frequency sampling (observed 1e-6 for S0, 1.3e-5 for A0).
    fm = model
    fs, L, mi = fm.sample_rate_hz, fm.path_length_m, ("S0", "A0").index(mode)
    t = fm.time_s
    src = fm.source_waveform(mode)
    rx = fm.simulate(_flat(fm), fm.material.reference_temperature_c, modes=(mode,), **OFF)
    centroid = lambda x: np.sum(t * x**2) / np.sum(x**2)  # noqa: E731
    f, S = _spectrum(src, fs)
    P = np.abs(S) ** 2
    sel = (P > 1e-12 * P.max()) & (f > 0)
    cg = fundamental_dispersion(fm.material, fm.nominal_thickness_m, f[sel]).group_velocity_m_s[0, mi]
    expected = np.sum(P[sel] * L / cg) / np.sum(P[sel])
    assert centroid(rx) - centroid(src) == pytest.approx(expected, rel=1e-4)


def _interp_bound(values, h):
    """(du^2 / 8) |d2 v / du2| from values at u - h, u, u + h: the error bound of linear interpolation."""
    return np.abs(values[2] - 2 * values[1] + values[0]) / h**2 / 8


def _phase_tolerance(fm, mode, fq, t1, ell):
    """Bound of the table's phase error over a thinned length ell: linear interpolation in u = ln t
    of k at t0 and at t1, (du^2 / 8) |d2k/du2| ell, d2k/du2 from the engine by central differences."""
    mi = ("S0", "A0").index(mode)
    h = 1e-2
    t0 = fm.nominal_thickness_m
    k = fundamental_dispersion(fm.material, np.outer([t0, t1], np.exp([-h, 0.0, h])).ravel(),
                               fq).wavenumber_rad_m[:, mi]
    du2 = fm._tables.dln ** 2
    return du2 * (_interp_bound(k[0:3], h) + _interp_bound(k[3:6], h)) * ell + 1e-6


@pytest.mark.parametrize("mode", ["S0", "A0"])
@pytest.mark.parametrize("thinned_length_m", [None, 0.1])
def test_thinning_shifts_phase_by_the_integral_of_the_wavenumber_change(model, mode, thinned_length_m):
    # Phase of exp(-i int k dx): thinning a stretch of length l from t0 to t1 changes the
    # phase at every frequency by -l (k(t1) - k(t0)) (WKB phase integral, Rose 1999 sec. 8;
    # it is the model's stated approximation). Here l is the whole path or a 100 mm patch and
    # t1 = 0.83 t0, a thickness between grid nodes (nominal is a node). Tolerance per
    # frequency: the error bound of linear interpolation in u = ln t (_phase_tolerance). The
    # disc footprint factors are real and positive in pairs, so they do not move the phase
    # of the uniformly thinned plate.
    fm = model
    fs, mi = fm.sample_rate_hz, ("S0", "A0").index(mode)
    t0 = fm.nominal_thickness_m
    t1 = 0.83 * t0
    if thinned_length_m is None:
        ell = fm.path_length_m
        prof = _flat(fm, t1)
    else:
        ell = thinned_length_m
        inside = np.abs(fm.x_m - fm.path_length_m / 2) < ell / 2
        ell = inside.sum() * fm.segment_m
        prof = np.where(inside, t1, t0)
    T = fm.material.reference_temperature_c
    x0 = fm.simulate(_flat(fm), T, modes=(mode,), **OFF)
    x1 = fm.simulate(prof, T, modes=(mode,), **OFF)
    fq = fm.frequency_hz[::2]
    E = np.exp(-2j * np.pi * np.outer(np.arange(x0.size) / fs, fq))  # DTFT of the records at fq
    X0, X1 = x0 @ E, x1 @ E
    # the -26 dB band: nearer the -60 dB band edges the record's DTFT also sees the
    # truncation of the band-limited synthesis (a -60 dB effect, not the phase under test)
    keep = np.abs(X0) > 0.05 * np.abs(X0).max()
    k = fundamental_dispersion(fm.material, [t0, t1], fq).wavenumber_rad_m[:, mi]
    expected = -ell * (k[1] - k[0])
    tol = _phase_tolerance(fm, mode, fq, t1, ell)
    err = np.angle(np.exp(1j * (np.angle(X1 / X0) - expected)))
    assert np.all(np.abs(err[keep]) <= tol[keep]), np.max(np.abs(err[keep]) / tol[keep])
    assert keep.sum() > 20


@pytest.mark.parametrize("mode", ["S0", "A0"])
def test_arrival_change_per_degree_follows_dE_dT_and_expansion(model, mode):
    # With nu fixed every velocity scales as s(T) = sqrt(E(T) / rho(T)), so c_g(f, d, T) =
    # s c_g,ref(f, d / s) (Rayleigh-Lamb depends on f d / c_T only; Graff 1975 sec. 8.1), while
    # path and thickness grow as (1 + alpha dT). Hence, from the material model
    #   dln s/dT = (dE/dT) / (2 E) + 3 alpha / 2      (rho ~ (1 + alpha dT)^-3)
    #   dln t/dT = alpha - dln s/dT - (dln c_g/dln d) (alpha - dln s/dT)
    # with the dispersion slope dln c_g/dln d from the engine. Measured: shift of the envelope
    # peak between 5 and 35 degC. Tolerance 1 %: the envelope carries the slope at f_pk while
    # the packet spans a band (observed agreement 0.04-0.1 %).
    fm = model
    mat = fm.material
    fs, L, mi = fm.sample_rate_hz, fm.path_length_m, ("S0", "A0").index(mode)
    t0 = fm.nominal_thickness_m
    src = fm.source_waveform(mode)
    f, S = _spectrum(src, fs)
    f_pk = f[np.argmax(np.abs(S))]
    T1, T2 = 5.0, 35.0
    x1 = fm.simulate(_flat(fm), T1, modes=(mode,), **OFF)
    x2 = fm.simulate(_flat(fm), T2, modes=(mode,), **OFF)
    measured = _peak_time(x2, fs) - _peak_time(x1, fs)
    alpha = mat.thermal_expansion_per_k
    dlns = 0.5 * mat.dE_dT_pa_per_k / mat.youngs_modulus_pa + 1.5 * alpha
    eps = 1e-3
    c = fundamental_dispersion(mat, [t0, t0 * (1 - eps), t0 * (1 + eps)], f_pk).group_velocity_m_s[:, mi, 0]
    slope = (np.log(c[2]) - np.log(c[1])) / (np.log1p(eps) - np.log1p(-eps))
    dlnt = alpha - dlns - slope * (alpha - dlns)
    expected = L / c[0] * dlnt * (T2 - T1)
    assert measured == pytest.approx(expected, rel=0.01)
    assert measured > 0  # warmer aluminium is slower (dE/dT < 0)


@pytest.mark.parametrize("mode", ["S0", "A0"])
def test_energy_per_mode_is_conserved_without_losses(model, mode):
    # The propagator exp(-i Phi) has unit modulus, so by Parseval the received energy of a
    # mode equals the energy of the pulse it leaves the transmitter with, whatever the
    # (thinned) profile. 1e-6: the part of the slowest A0 tail the record cuts (observed < 1e-7).
    fm = model
    rng = np.random.default_rng(3)
    prof = fm.nominal_thickness_m * (1 - 0.4 * rng.random() * np.exp(-((fm.x_m - 0.12) / 0.02) ** 2))
    src = fm.source_waveform(mode)
    rx = fm.simulate(prof, 20.0, modes=(mode,), **OFF)
    assert np.sum(rx**2) == pytest.approx(np.sum(src**2), rel=1e-6)


def test_attenuation_removes_the_spectrally_weighted_energy(family_fb2):
    # Amplitude exp(-a(f) L), a(f) = a_c f / f_c (Np/m from dB/m: / 20 log10(e)). By Parseval
    # the energy ratio is sum |S|^2 exp(-2 a(f) L) / sum |S|^2 over the pulse spectrum.
    # 1e-3: the pulse spectrum is sampled on a 4x zero-padded record grid rather than the
    # synthesis grid.
    fm = ForwardModel(family_fb2)
    fs, L = fm.sample_rate_hz, fm.path_length_m
    att_db = 20.0
    for mode in ("S0", "A0"):
        src = fm.source_waveform(mode)
        rx = fm.simulate(_flat(fm), 20.0, modes=(mode,), **{**OFF, "attenuation_db_per_m": att_db})
        f, S = _spectrum(src, fs)
        a = att_db / (20 * np.log10(np.e)) * f / family_fb2.excitation.centre_frequency_hz
        expected = np.sum(np.abs(S) ** 2 * np.exp(-2 * a * L)) / np.sum(np.abs(S) ** 2)
        assert np.sum(rx**2) / np.sum(src**2) == pytest.approx(expected, rel=1e-3)


def _variant(family, **edits):
    data = copy.deepcopy(family.model_dump(mode="json"))
    for dotted, value in edits.items():
        sec, key = dotted.split("__")
        data[sec][key] = value
    return family_from_mapping(data)


@pytest.mark.parametrize("which", ["near_end", "far_end", "edge"])
def test_echo_delays_and_levels_follow_the_image_sources(family_fb2, which):
    # Image-source geometry (common practice, no source): an end at distance d adds 2 d to the
    # path, an edge at lateral distance e puts an image receiver at 2 e, r = sqrt(L^2 + 4 e^2).
    # Level re the direct arrival: R sqrt(L / r) (cylindrical spreading). S0 only, on a
    # stretched flange (500 mm wide, transducers on its centre line, ends 400 and 800 mm away)
    # so that each echo stands alone: direct 55 us, edges 108 us, ends 203 and 351 us. Both
    # edges are 250 mm away, so their echoes coincide and add (2 R). Delay tolerance: the S0
    # group-delay spread over the half-amplitude band scaled by r / L, plus a sample; level
    # 3 % (S0 envelope broadening over the longer path; observed below 0.1 %).
    fam = _variant(family_fb2, section__flange_width_mm=500.0, path__lateral_position_mm=250.0,
                   path__flange_length_mm=1500.0, path__transmitter_position_mm=400.0)
    n_echo = 1
    if which == "edge":
        r = np.hypot(0.3, 2 * 0.25)
        n_echo = 2
    else:
        r = 0.3 + (2 * 0.4 if which == "near_end" else 2 * 0.8)
    fm = ForwardModel(fam)
    fs, L = fm.sample_rate_hz, fm.path_length_m
    R = 0.3
    x = fm.simulate(_flat(fm), 20.0, modes=("S0",), **{**OFF, "echoes": True, "echo_reflection": R})
    src = fm.source_waveform("S0")
    f, S = _spectrum(src, fs)
    f_pk = f[np.argmax(np.abs(S))]
    band = f[np.abs(S) >= 0.5 * np.abs(S).max()]
    cg = fundamental_dispersion(fm.material, fm.nominal_thickness_m, np.r_[f_pk, band]).group_velocity_m_s[0, 0]
    t_src = _peak_time(src, fs)
    env = np.abs(hilbert(x))
    t = np.arange(x.size) / fs
    expected = r / cg[0]
    win = np.abs(t - t_src - expected) < 15e-6
    seg = np.where(win, x, 0.0)
    measured = _peak_time(seg, fs) - t_src
    tol = np.max(np.abs(r / cg[1:] - expected)) + 1 / fs
    assert abs(measured - expected) <= tol
    direct = np.abs(t - t_src - L / cg[0]) < 15e-6
    ratio = env[win].max() / env[direct].max()
    assert ratio == pytest.approx(n_echo * R * np.sqrt(L / r), rel=0.03)


def test_noise_level_and_coupling_gain(family_fb2):
    # snr_db is defined re the pristine direct-arrival peak: sigma = A_ref 10^(-snr/20). The
    # pre-trigger samples carry noise only (crosstalk off); sample std of n = 200 Gaussian
    # samples has relative standard error 1 / sqrt(2 n) = 5 %, tolerance 4 standard errors.
    fm = ForwardModel(family_fb2)
    assert fm.reference_peak_v == pytest.approx(0.25 * family_fb2.full_scale_v)
    x = fm.simulate(_flat(fm), 20.0, rng=5, **{**OFF, "snr_db": 30.0})
    pre = x[fm.time_s < 0]
    assert pre.size == 200
    assert pre.std() == pytest.approx(fm.reference_peak_v * 10 ** (-30 / 20), rel=4 / np.sqrt(2 * pre.size))
    # coupling gains multiply the waveform by 10^((c_tx + c_rx) / 20) (definition of dB amplitude)
    a = fm.simulate(_flat(fm), 20.0, **OFF)
    b = fm.simulate(_flat(fm), 20.0, coupling_db=(2.0, -0.5), **OFF)
    np.testing.assert_allclose(b, a * 10 ** (1.5 / 20), rtol=1e-12, atol=1e-15)
    # the pristine capture without echoes peaks at the reference level, by construction of the
    # scale (computed with the exact nominal wavenumber; 1e-5 covers the table interpolation)
    assert np.abs(a).max() == pytest.approx(fm.reference_peak_v, rel=1e-5)


def test_crosstalk_sits_at_the_trigger_and_jitter_moves_everything(family_fb2):
    # The crosstalk is the drive burst itself at t = 0 (electrical feed-through): the record
    # from the trigger on matches tone_burst() scaled to the level; a trigger jitter tau
    # delays the whole record by tau (shift theorem) - checked on the crosstalk, whose
    # position is known in closed form.
    fm = ForwardModel(family_fb2)
    exc = family_fb2.excitation
    level_db = -20.0
    x = fm.simulate(_flat(fm), 20.0, modes=(), **{**OFF, "crosstalk_db": level_db})
    burst = tone_burst(exc.centre_frequency_hz, exc.cycles, fm.sample_rate_hz, window=exc.window)
    i0 = int(round(fm.pretrigger_s * fm.sample_rate_hz))
    seg = x[i0:i0 + burst.size]
    expected = burst / np.abs(burst).max() * fm.reference_peak_v * 10 ** (level_db / 20)
    # band-limited to the synthesised band (-60 dB): agreement to 1 % of the peak
    np.testing.assert_allclose(seg, expected, atol=0.01 * np.abs(expected).max())
    jitter = 300e-9  # three samples at 10 MHz
    y = fm.simulate(_flat(fm), 20.0, modes=(), **{**OFF, "crosstalk_db": level_db, "jitter_s": jitter})
    np.testing.assert_allclose(y[i0 + 3:i0 + 3 + burst.size], seg, atol=1e-9 * np.abs(seg).max() + 1e-12)


def test_simulate_capture_contract_and_determinism(family_fb2):
    x = np.linspace(0, 0.3, 31)
    t = np.full_like(x, family_fb2.nominal_thickness_m)
    t[12:18] *= 0.7
    a = simulate_capture(family_fb2, x_m=x, thickness_m=t, temperature_c=25.0, rng=9, path_id="P7",
                         captured_at="2026-01-01T00:00:00Z")
    b = simulate_capture(family_fb2, x_m=x, thickness_m=t, temperature_c=25.0, rng=9, path_id="P7",
                         captured_at="2026-01-01T00:00:00Z")
    c = simulate_capture(family_fb2, x_m=x, thickness_m=t, temperature_c=25.0, rng=10)
    assert isinstance(a, Capture)
    assert a.n_samples == family_fb2.acquisition.record_length
    assert a.sample_rate_hz == pytest.approx(10e6) and a.pretrigger_s == pytest.approx(20e-6)
    assert a.path_id == "P7" and a.temperature_c == 25.0 and a.excitation_khz == 150.0
    assert a.extra["simulated"] is True and a.extra["family_fingerprint"] == family_fb2.fingerprint
    np.testing.assert_array_equal(a.amplitude_v, b.amplitude_v)
    assert not np.array_equal(a.amplitude_v, c.amplitude_v)
    assert np.abs(a.amplitude_v).max() <= family_fb2.full_scale_v


def test_bad_inputs_are_explained(family_fb2):
    x = np.array([0.0, 0.3])
    t0 = family_fb2.nominal_thickness_m
    with pytest.raises(ValueError, match="unknown confounder"):
        simulate_capture(family_fb2, x_m=x, thickness_m=[t0, t0], temperature_c=20, rng=0, humidity=0.5)
    with pytest.raises(ValueError, match="outside the precomputed grid"):
        simulate_capture(family_fb2, x_m=x, thickness_m=[t0, 0.05 * t0], temperature_c=20, rng=0)
    with pytest.raises(ValueError, match="outside the validity range"):
        simulate_capture(family_fb2, x_m=x, thickness_m=[t0, t0], temperature_c=400, rng=0)
    with pytest.raises(ValueError, match="coupling_db must be a pair"):
        simulate_capture(family_fb2, x_m=x, thickness_m=[t0, t0], temperature_c=20, rng=0, coupling_db=1.0)
    with pytest.raises(ValueError, match="mode 'S1' is not simulated"):
        simulate_capture(family_fb2, x_m=x, thickness_m=[t0, t0], temperature_c=20, rng=0, modes=("S1",))


def test_adc_full_scale_clips_and_counts_are_quantised(family_fb2):
    # A digitiser clips at its rail and, storing counts, records whole multiples of the count
    # step (common practice, no source). Here a +20 dB coupling pushes the pristine peak
    # (0.25 of full scale) to 2.5x the rail; the counts variant uses 1 mV per count.
    fm = ForwardModel(family_fb2)
    x = fm.simulate(_flat(fm), 20.0, coupling_db=(10.0, 10.0), **OFF)
    assert np.abs(x).max() == pytest.approx(family_fb2.full_scale_v)
    assert np.mean(np.abs(x) == family_fb2.full_scale_v) > 0.001
    fam_c = _variant(family_fb2, acquisition__amplitude_units="counts", acquisition__counts_scale_v=1e-3,
                     acquisition__full_scale=1000.0)
    fmc = ForwardModel(fam_c)
    assert fam_c.full_scale_v == pytest.approx(1.0)
    y = fmc.simulate(_flat(fmc), 20.0, rng=1)
    steps = y / 1e-3
    np.testing.assert_allclose(steps, np.round(steps), atol=1e-9)
    assert np.unique(np.round(steps)).size > 50


# -- the disc footprint -------------------------------------------------------------------
def _band_ratio(fm, x0, x1, step=2):
    """DTFT ratio X1 / X0 of two records at the synthesised bins, and the -26 dB band mask."""
    fq = fm.frequency_hz[::step]
    E = np.exp(-2j * np.pi * np.outer(np.arange(x0.size) / fm.sample_rate_hz, fq))
    X0, X1 = x0 @ E, x1 @ E
    return fq, X1 / X0, np.abs(X0) > 0.05 * np.abs(X0).max()


def _engine_disc_factor(fm, mode, fq, t):
    """One disc's factor at a footprint of thickness t, from the engine: 2 J1(k a) / (k a) sqrt(e(t) / e(t0))."""
    mi = ("S0", "A0").index(mode)
    t0 = fm.nominal_thickness_m
    k = fundamental_dispersion(fm.material, [t0, t], fq).wavenumber_rad_m[:, mi]
    a = fm.family.path.transducer_diameter_mm * 0.5e-3
    z = k * a
    aperture = 2 * j1(z) / z
    e = strain_excitability(mode, fq[None, :], k, np.array([t0, t])[:, None], fm.material.cl_m_s, fm.material.ct_m_s)
    return aperture[1] * np.sqrt(e[1] / e[0]) / aperture[0], k


def _disc_tolerance(fm, mode, fq, t1):
    """Relative bound of one disc factor's table error at t1: linear interpolation in ln t (+ 1e-6 round-off)."""
    h = 1e-2
    F = np.stack([_engine_disc_factor(fm, mode, fq, t1 * np.exp(d))[0] for d in (-h, 0.0, h)])
    return fm._tables.dln ** 2 * _interp_bound(F, h) / np.abs(F[1]) + 1e-6


@pytest.mark.parametrize("mode", ["S0", "A0"])
def test_uniform_thinning_equals_the_point_model_at_that_thickness(model, mode):
    # Consistency limit: a plate thinned everywhere (under both discs too) is a uniform plate
    # of that thickness, so X1 / X0 = (F(t1) / F(t0))^2 exp(-i (k1 - k0) L), with F the point
    # model's disc factor at that thickness (aperture 2 J1(ka)/(ka) from scipy, wavenumbers
    # from the engine, strain excitability as checked in test_excitation). t1 = 0.8 t0 lies
    # between grid nodes. Tolerances per frequency: the bounds of linear interpolation in ln t
    # of the disc table (twice: two discs) and of the wavenumber table over L.
    fm = model
    t0 = fm.nominal_thickness_m
    t1 = 0.8 * t0
    T = fm.material.reference_temperature_c
    x0 = fm.simulate(_flat(fm), T, modes=(mode,), **OFF)
    x1 = fm.simulate(_flat(fm, t1), T, modes=(mode,), **OFF)
    fq, ratio, keep = _band_ratio(fm, x0, x1)
    F, k = _engine_disc_factor(fm, mode, fq, t1)
    expected = F**2 * np.exp(-1j * (k[1] - k[0]) * fm.path_length_m)
    amp_err = np.abs(np.abs(ratio) / np.abs(expected) - 1)
    assert np.all(amp_err[keep] <= 2 * _disc_tolerance(fm, mode, fq, t1)[keep])
    phase_err = np.abs(np.angle(ratio / expected))
    assert np.all(phase_err[keep] <= _phase_tolerance(fm, mode, fq, t1, fm.path_length_m)[keep])
    assert np.max(np.abs(np.abs(F[keep]) - 1)) > 0.02  # the footprint does change the pair factor


@pytest.mark.parametrize("mode", ["S0", "A0"])
@pytest.mark.parametrize("diameter_mm", [None, 0.01])
def test_flat_patch_under_the_receiver_changes_the_amplitude_as_local_excitability_predicts(
        family_fb2, family_st3, mode, diameter_mm):
    # A flat 25 % patch over the last 12 mm of the path covers the whole receiver footprint:
    # X1 / X0 = F(t1) / F(t0) exp(-i (k1 - k0) l), l the thinned length, F the disc factor at
    # the local thickness from the engine (Rayleigh-Lamb wavenumber and strain excitability).
    # The received amplitude must move the way F predicts at every frequency where F differs
    # from 1 by more than 1 % (for the 7 mm discs A0 gains excitability but loses aperture as
    # k a grows, so the sign changes across the band), and agree within the interpolation
    # bounds of the disc and wavenumber tables. With a 0.01 mm disc (a -> 0, aperture -> 1) the
    # factor is the excitability alone: a thinner wall under the receiver raises the received
    # amplitude of both modes (thin-plate limits in test_excitation). The transmitter
    # side is pristine; the point model of version 2 fails this test (|X1 / X0| = 1).
    for fam in (family_fb2, family_st3):
        if diameter_mm is not None:
            fam = _variant(fam, path__transducer_diameter_mm=diameter_mm)
        fm = ForwardModel(fam)
        t0 = fm.nominal_thickness_m
        t1 = 0.75 * t0
        inside = fm.x_m > fm.path_length_m - 0.012
        prof = np.where(inside, t1, t0)
        T = fm.material.reference_temperature_c
        x0 = fm.simulate(_flat(fm), T, modes=(mode,), **OFF)
        x1 = fm.simulate(prof, T, modes=(mode,), **OFF)
        fq, ratio, keep = _band_ratio(fm, x0, x1)
        F, k = _engine_disc_factor(fm, mode, fq, t1)
        ell = inside.sum() * fm.segment_m
        expected = F * np.exp(-1j * (k[1] - k[0]) * ell)
        moved = keep & (np.abs(np.abs(F) - 1) > 0.01)
        assert moved.sum() > 10
        np.testing.assert_array_equal(np.sign(np.abs(ratio[moved]) - 1), np.sign(np.abs(F[moved]) - 1))
        amp_err = np.abs(np.abs(ratio) / np.abs(expected) - 1)
        assert np.all(amp_err[keep] <= _disc_tolerance(fm, mode, fq, t1)[keep])
        phase_err = np.abs(np.angle(ratio / expected))
        assert np.all(phase_err[keep] <= _phase_tolerance(fm, mode, fq, t1, ell)[keep])
        if diameter_mm is not None:
            assert np.all(np.abs(ratio[keep]) > 1.0)


@pytest.mark.parametrize("mode", ["S0", "A0"])
def test_patch_away_from_the_discs_changes_only_the_path_phase(model, mode):
    # A 100 mm patch in the middle of the path leaves both footprints nominal: the discs' factors
    # are the nominal ones exactly, so the received spectrum differs from the pristine one by
    # the unit-modulus path phase only (|X1 / X0| = 1 to round-off of the DTFT sums, 1e-9; the
    # phase itself is checked against Rayleigh-Lamb in
    # test_thinning_shifts_phase_by_the_integral_of_the_wavenumber_change).
    fm = model
    t0 = fm.nominal_thickness_m
    inside = np.abs(fm.x_m - fm.path_length_m / 2) < 0.05
    prof = np.where(inside, 0.7 * t0, t0)
    assert fm.disc_factors(prof[None, :])[0].size == 0
    np.testing.assert_array_equal(fm.footprint_thickness(prof), t0)
    T = fm.material.reference_temperature_c
    x0 = fm.simulate(_flat(fm), T, modes=(mode,), **OFF)
    x1 = fm.simulate(prof, T, modes=(mode,), **OFF)
    _, ratio, keep = _band_ratio(fm, x0, x1)
    np.testing.assert_allclose(np.abs(ratio[keep]), 1.0, rtol=0, atol=1e-9)
