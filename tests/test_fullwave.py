"""Full-wave solver (waneguide.simulation.fullwave) against physics outside the project.

Quick checks (unmarked): guard rails, energy conservation, reciprocity, spectral
multiplication against a direct burst run, float32 against float64, the family-level run's
time axis. Slow checks (@pytest.mark.slow, about a minute on one core): S0/A0 group velocity
against Rayleigh-Lamb, bulk P and S speeds against the 2-D elastodynamic Green's function,
second-order convergence, absorbing ends.
"""
from __future__ import annotations

import math
import tomllib

import numpy as np
import pytest
import scipy.fft as sfft
from scipy.special import hankel2

from waneguide.core.errors import InputError
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.family import family_from_mapping
from waneguide.features.materials import get_material
from waneguide.features.signals import hilbert_envelope
from waneguide.simulation.fullwave import (
    BurstSpec,
    GridSpec,
    PlateRun,
    broadband_pulse,
    build_plate,
    bursts_from_broadband,
    cfl_limit_s,
    check_grid,
    design_grid,
    footprint,
    simulate_fullwave,
)
from waneguide.simulation.fullwave.grid import pml_columns
from waneguide.simulation.fullwave.source import peak_frequency_for, pulse_length_s
from waneguide.simulation.profiles import loss_flat_patch

AL = get_material("al-6061-t6")
T_WALL = 2e-3


def _gabor(fc_hz: float, rel_bandwidth: float, dt_s: float) -> np.ndarray:
    """Gaussian-windowed sine, spectral standard deviation rel_bandwidth * fc, zero mean."""
    s = 1.0 / (2 * np.pi * rel_bandwidth * fc_hz)
    t = np.arange(int(12 * s / dt_s) + 1) * dt_s - 6 * s
    return np.exp(-0.5 * (t / s) ** 2) * np.sin(2 * np.pi * fc_hz * t)


def _plate_with_losses(grid: GridSpec, ends: str = "absorbing", x_end_m: float = 0.05):
    x = np.linspace(-0.02, 0.08, 2001)
    top = loss_flat_patch(x, centre_m=0.012, length_m=0.010, depth_m=0.8e-3)
    bottom = loss_flat_patch(x, centre_m=0.025, length_m=0.006, depth_m=0.4e-3)
    return build_plate(AL, grid, T_WALL, x_start_m=-0.01, x_end_m=x_end_m, x_m=x, top_loss_m=top,
                       bottom_loss_m=bottom, ends=ends)


@pytest.fixture(scope="module")
def grid15() -> GridSpec:
    return design_grid(AL, T_WALL, 300e3, sample_rate_hz=10e6)


# ---------------------------------------------------------------------------------------------
# (7) guard rails
# ---------------------------------------------------------------------------------------------
def test_guard_rails_refuse_bad_grids_and_say_what_works(grid15):
    h = T_WALL / 15
    limit = cfl_limit_s(h, AL.cl_m_s)
    with pytest.raises(InputError, match=r"breaks the CFL limit .*design_grid would give dx_m="):
        check_grid(GridSpec(h, 1.05 * limit), AL, T_WALL, f_max_hz=300e3)
    with pytest.raises(InputError, match=r"10.00 cells through the nominal wall.*at least 15"):
        check_grid(GridSpec(T_WALL / 10, 0.5 * cfl_limit_s(T_WALL / 10, AL.cl_m_s)), AL, T_WALL)
    with pytest.raises(InputError, match=r"whole number"):
        check_grid(GridSpec(T_WALL / 15.5, 0.5 * limit), AL, T_WALL)
    with pytest.raises(InputError, match=r"thinnest remaining ligament of 0.500 mm.*at least 5"):
        check_grid(grid15, AL, T_WALL, min_thickness_m=0.5e-3, f_max_hz=300e3)
    with pytest.raises(InputError, match=r"whole fraction|divide the acquisition sample period"):
        check_grid(GridSpec(h, 0.9 * limit), AL, T_WALL, sample_rate_hz=10e6)
    # the design helper obeys every rule it checks
    g = design_grid(AL, T_WALL, 300e3, min_thickness_m=0.5e-3, sample_rate_hz=10e6)
    assert check_grid(g, AL, T_WALL, min_thickness_m=0.5e-3, sample_rate_hz=10e6) is g
    assert 0.5e-3 / g.dx_m >= 5 - 1e-9 and g.dt_s <= cfl_limit_s(g.dx_m, AL.cl_m_s)
    # a loss deeper than the grid resolves is refused on the voxelised plate too
    x = np.linspace(0, 0.02, 201)
    with pytest.raises(InputError, match=r"remaining ligament .* at least 5"):
        build_plate(AL, grid15, T_WALL, x_start_m=-0.005, x_end_m=0.025, x_m=x,
                    top_loss_m=loss_flat_patch(x, centre_m=0.01, length_m=0.005, depth_m=1.5e-3))


def test_cfl_limit_is_the_stability_bound():
    # Virieux 1986: stable for dt <= dx / (c_L sqrt 2); the refused side really blows up (here
    # with EFIT void surfaces and a thinning step in the grid)
    h = T_WALL / 15
    peaks = {}
    for courant in (0.999, 1.03):
        g = GridSpec(h, courant * cfl_limit_s(h, AL.cl_m_s), 40)
        p = _plate_with_losses(g, x_end_m=0.03)
        run = PlateRun(p, dtype=np.float64, pml_f0_hz=1e5)
        run.run(1500, footprint(p, "pin_force", 0.0, 2e-3), broadband_pulse(150e3, g.dt_s, 800))
        peaks[courant] = float(np.nanmax(np.abs(run.fields[0])))
    assert peaks[0.999] < 1e-3  # m/s for a 1 N/m drive: bounded (regression scale of this code ~3e-5)
    assert not np.isfinite(peaks[1.03]) or peaks[1.03] > 1e10


# ---------------------------------------------------------------------------------------------
# (5) energy, (6) reciprocity
# ---------------------------------------------------------------------------------------------
def test_energy_conserved_in_a_closed_lossless_plate(grid15):
    # Leapfrog conserves 1/2 v^{n-1/2} M v^{n+1/2} + 1/2 sigma^n S sigma^n exactly (summation by
    # parts); free ends, losses on both sides, float64: only round-off drift remains. Tolerance
    # 1e-12 relative over 10,000 steps (round-off of ~1e-16 per step; measured 3e-16).
    p = _plate_with_losses(grid15, ends="free", x_end_m=0.04)
    run = PlateRun(p, dtype=np.float64, pml_f0_hz=1.0)
    run.run(1000, footprint(p, "pin_force", 0.0, 2e-3), broadband_pulse(150e3, grid15.dt_s, 800))
    energies = []
    for _ in range(20):
        run.run(499)
        v_a = tuple(f.copy() for f in run.fields[:2])
        stress = tuple(f.copy() for f in run.fields[2:])
        run.run(1)
        energies.append(p.energy(v_a, run.fields[:2], stress))
    e = np.array(energies)
    assert e[0] > 0
    assert np.abs(e - e[0]).max() / e[0] < 1e-12


@pytest.mark.parametrize("pair", [(("normal", 0.0), ("shear", 0.035)), (("pin_force", 0.0), ("pin_force", 0.035))])
def test_reciprocity_swapping_source_and_receiver(grid15, pair):
    # Auld, Acoustic Fields and Waves in Solids (1973), vol. 2 ch. 10: the velocity at B along b
    # from a force at A along a equals the velocity at A along a from the same force at B along b.
    # The plate is asymmetric (one-sided patches) and has absorbing ends. The discrete operator is
    # symmetric, so only round-off separates the traces: tolerance 1e-10 of the peak in float64.
    p = _plate_with_losses(grid15)
    q = broadband_pulse(100e3, grid15.dt_s, 1500)
    (ka, xa), (kb, xb) = pair
    traces = []
    for (ks, xs), (kr, xr) in (((ka, xa), (kb, xb)), ((kb, xb), (ka, xa))):
        run = PlateRun(p, dtype=np.float64, pml_f0_hz=100e3)
        traces.append(run.run(5000, footprint(p, ks, xs, 2e-3), q, [footprint(p, kr, xr, 2e-3, receiver=True)])[0])
    assert np.abs(traces[0]).max() > 0
    assert np.abs(traces[0] - traces[1]).max() < 1e-10 * np.abs(traces[0]).max()


# ---------------------------------------------------------------------------------------------
# (8) spectral multiplication, float32
# ---------------------------------------------------------------------------------------------
def test_bursts_by_spectral_multiplication_equal_direct_burst_runs(grid15):
    # The grid is linear and time-invariant: one broadband run times B(f)/Q(f) must reproduce a run
    # driven by the burst itself. Threshold: correlation > 0.9999 (issue 10 asks > 0.99) and peak
    # error below 0.5 % (the bins left out below the -80 dB drive floor; measured 1e-4 to 2e-3).
    p = build_plate(AL, grid15, T_WALL, x_start_m=-0.01, x_end_m=0.05)
    bursts = [BurstSpec(150e3, 5, "hann"), BurstSpec(250e3, 3.5, "gaussian")]
    fp = peak_frequency_for(bursts)
    dt = grid15.dt_s
    q = broadband_pulse(fp, dt, int(pulse_length_s(fp) / dt) + 1)
    src, rec = footprint(p, "pin_force", 0.0, 2e-3), footprint(p, "pin_force", 0.04, 2e-3, receiver=True)
    n = 9000
    broadband = PlateRun(p, pml_f0_hz=fp).run(n + q.size, src, q, [rec])[0]
    # sample rate 1/dt and pretrigger -dt/2: the output samples sit on the record times (n + 1/2) dt
    spectral = bursts_from_broadband(broadband, q, dt, bursts, sample_rate_hz=1 / dt, n_samples=n, pretrigger_s=-dt / 2)
    for k, b in enumerate(bursts):
        direct = PlateRun(p, pml_f0_hz=fp).run(n, src, b.samples(1 / dt), [rec])[0]
        assert np.corrcoef(direct, spectral[k])[0, 1] > 0.9999
        assert np.abs(direct - spectral[k]).max() < 5e-3 * np.abs(direct).max()


def test_float32_matches_float64(grid15):
    # float32 round-off (eps 6e-8) accumulated over 5,000 steps stays far below the -60 dB scale
    # that matters here; tolerance 1e-4 of the peak (measured 6e-7 to 9e-7 relative, regression
    # value of this code).
    p = _plate_with_losses(grid15)
    q = broadband_pulse(100e3, grid15.dt_s, 1500)
    src, rec = footprint(p, "pin_force", 0.0, 2e-3), footprint(p, "pin_force", 0.035, 2e-3, receiver=True)
    t32, t64 = (PlateRun(p, dtype=d, pml_f0_hz=100e3).run(5000, src, q, [rec])[0] for d in (np.float32, np.float64))
    assert np.abs(t32 - t64).max() < 1e-4 * np.abs(t64).max()


# ---------------------------------------------------------------------------------------------
# family-level run: record layout and time axis
# ---------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def small_family(repo_root):
    data = tomllib.loads((repo_root / "configs" / "families" / "demo_fb2.toml").read_text())
    data["material"] = {"builtin": "al-6061-t6"}
    data["path"].update(transducer_spacing_mm=100.0, transmitter_position_mm=50.0, flange_length_mm=200.0)
    data["acquisition"]["record_length"] = 2048
    return family_from_mapping(data, where="small test family")


@pytest.fixture(scope="module")
def family_runs(small_family):
    return {t: simulate_fullwave(small_family, disc_resonance=False, temperature_c=t) for t in (20.0, 60.0)}


def _rl_delays(family, temperature_c: float) -> np.ndarray:
    """Path / group velocity [s] of S0 and A0 at the burst centre (Rayleigh-Lamb, features.dispersion),
    for the material at temperature and wall and path grown by its expansion factor."""
    e = AL.expansion_factor(temperature_c)
    fc = family.excitation.centre_frequency_hz
    cg = fundamental_dispersion(AL.at_temperature(temperature_c), family.nominal_thickness_m * e, fc)
    return family.path_length_m * e / cg.group_velocity_m_s[0, :, 0]


def test_family_run_lands_s0_and_a0_at_their_group_delays(small_family, family_runs):
    # Envelope peak of a narrowband burst = burst centre + path / group velocity (Rose 1999, ch. 4;
    # holds to first order in the dispersion). Tolerance 1 us for S0 (0.5 % of the path delay plus
    # the envelope distortion of a 5-cycle burst through the disc footprint; measured 0.3 us), 3 %
    # of the delay for A0 (dispersion skews its envelope; measured 0.8 %).
    res = family_runs[20.0]
    fs = small_family.acquisition.sample_rate_hz
    assert res.waveforms.shape == (1, 2048) and res.sample_rate_hz == fs
    assert res.pretrigger_s == pytest.approx(small_family.acquisition.pretrigger_s)
    assert res.metadata()["dx_m"] == pytest.approx(small_family.nominal_thickness_m / 15)
    t = res.time_s
    env = hilbert_envelope(res.waveforms[0])
    fc = small_family.excitation.centre_frequency_hz
    t_s0, t_a0 = 0.5 * small_family.excitation.cycles / fc + _rl_delays(small_family, 20.0)
    split = 0.5 * (t_s0 + t_a0)
    peak_s0 = t[np.argmax(np.where(t < split, env, 0))]
    peak_a0 = t[np.argmax(np.where(t >= split, env, 0))]
    assert abs(peak_s0 - t_s0) < 1e-6
    assert abs(peak_a0 - t_a0) < 0.03 * (t_a0 - 0.5 * small_family.excitation.cycles / fc)
    assert np.abs(res.waveforms[0][t < 0]).max() < 1e-4 * env.max()  # nothing before the trigger
    cap = res.to_capture(0, volts_per_unit=1e3)
    assert cap.n_samples == 2048 and cap.excitation_khz == pytest.approx(fc / 1e3)


def test_family_run_at_temperature_shifts_s0_as_the_material_model_says(small_family, family_runs):
    # features.materials: E(T), rho(T) and the expansion factor; the S0 delay grows by the
    # Rayleigh-Lamb difference between 20 and 60 degC (0.19 us, two samples). Measured by
    # cross-correlating the S0 parts of the two records (parabolic peak interpolation); tolerance
    # 10 % of the shift (interpolation error about 0.05 sample plus the weak S0 dispersion; measured 1.4 %).
    hot = family_runs[60.0]
    assert hot.metadata()["cl_m_s"] == pytest.approx(AL.at_temperature(60.0).cl_m_s)
    assert hot.metadata()["dx_m"] == pytest.approx(small_family.nominal_thickness_m * AL.expansion_factor(60.0) / 15)
    d20, d60 = _rl_delays(small_family, 20.0), _rl_delays(small_family, 60.0)
    t = family_runs[20.0].time_s
    s0 = t < 0.5 * small_family.excitation.cycles / small_family.excitation.centre_frequency_hz + 0.5 * d20.sum()
    a, b = (np.where(s0, family_runs[k].waveforms[0], 0.0) for k in (20.0, 60.0))
    n = a.size
    xc = sfft.irfft(sfft.rfft(b, 2 * n) * np.conj(sfft.rfft(a, 2 * n)), 2 * n)[:n]
    k = int(np.argmax(xc))
    frac = 0.5 * (xc[k - 1] - xc[k + 1]) / (xc[k - 1] - 2 * xc[k] + xc[k + 1])
    shift = (k + frac) / small_family.acquisition.sample_rate_hz
    assert shift == pytest.approx(d60[0] - d20[0], rel=0.10)


# ---------------------------------------------------------------------------------------------
# (1) group velocity, (3) convergence: uniform 2 mm plate, two receivers 40 mm apart
# ---------------------------------------------------------------------------------------------
_FREQS = np.array([100e3, 150e3, 200e3, 250e3])


def _two_sided(p, kind, x_m, receiver):
    """Same-direction line forces (or receivers) on both surfaces: symmetric modes for `shear`
    (in-plane, u_x even in z), antisymmetric for `normal` (u_z even in z); Graff 1975 sec. 8.1."""
    a = footprint(p, kind, x_m, 0.0, receiver=receiver, surface="top")
    b = footprint(p, kind, x_m, 0.0, receiver=receiver, surface="bottom")
    return np.concatenate([a[0], b[0]]), np.concatenate([a[1], b[1]])


def _mode_errors(n_wall: int) -> dict:
    """Relative error [%] of the phase and group velocity of S0 and A0 at _FREQS between two receivers."""
    h = T_WALL / n_wall
    dt = 0.9 * cfl_limit_s(h, AL.cl_m_s)
    grid = GridSpec(h, dt, pml_columns(h, AL.plate_velocity_m_s, 100e3))
    x1, x2 = 0.02, 0.06
    p = build_plate(AL, grid, T_WALL, x_start_m=-0.01, x_end_m=x2 + 0.01)
    q = _gabor(150e3, 0.3, dt)
    n = int(200e-6 / dt)
    out = {}
    for mode, kind, m in (("S0", "shear", 0), ("A0", "normal", 1)):
        tr = PlateRun(p, dtype=np.float64, pml_f0_hz=150e3).run(
            n, _two_sided(p, kind, 0.0, False), q, [_two_sided(p, kind, x, True) for x in (x1, x2)])
        nf = sfft.next_fast_len(8 * n)
        f = sfft.rfftfreq(nf, dt)
        band = (f > 60e3) & (f < 300e3)
        ratio = (sfft.rfft(tr[1], nf) / sfft.rfft(tr[0], nf))[band]
        curves = fundamental_dispersion(AL, T_WALL, f[band])
        k_ref = curves.wavenumber_rad_m[0, m]
        # residual phase after removing the Rayleigh-Lamb propagation: small, so no unwrapping
        resid = np.angle(ratio * np.exp(1j * k_ref * (x2 - x1)))
        dk = -resid / (x2 - x1)
        phase_err, group_err = [], []
        for fc in _FREQS:
            i = np.argmin(np.abs(f[band] - fc))
            phase_err.append(-dk[i] / k_ref[i] * 100)
            sel = np.abs(f[band] - fc) < 20e3
            slope = np.polyfit(2 * np.pi * (f[band][sel] - fc), dk[sel], 2)[1]  # d(dk)/d(omega)
            cg = curves.group_velocity_m_s[0, m, i]
            group_err.append((1 / (1 / cg + slope) / cg - 1) * 100)
        out[mode] = {"phase": np.array(phase_err), "group": np.array(group_err)}
    return out


@pytest.fixture(scope="module")
def mode_errors():
    return {n: _mode_errors(n) for n in (10, 20)}


@pytest.mark.slow
def test_s0_a0_group_velocity_matches_rayleigh_lamb(mode_errors):
    # Issue 10: within 0.3 % of Rayleigh-Lamb (features.dispersion). Reached at 20 cells through
    # the 2 mm wall (measured: S0 <= 0.013 %, A0 -0.11 to -0.22 % at 100-250 kHz); at the default
    # 15 cells A0 errs by about -0.3 % at 150 kHz and -0.4 % at 250 kHz (see simulation/fullwave/grid.py).
    err = mode_errors[20]
    assert np.abs(err["S0"]["group"]).max() < 0.3
    assert np.abs(err["A0"]["group"]).max() < 0.3


@pytest.mark.slow
def test_arrival_times_converge_at_second_order(mode_errors):
    # Virieux 1986: the scheme is second order, so halving dx must cut the delay error by 4
    # (observed order 1.8-2.2 accepted: common practice, no source). Phase and group delays.
    for mode in ("S0", "A0"):
        for kind in ("phase", "group"):
            e10 = abs(mode_errors[10][mode][kind][1])
            e20 = abs(mode_errors[20][mode][kind][1])
            order = math.log(e10 / e20, 2)
            assert 1.8 < order < 2.2, (mode, kind, e10, e20, order)


# ---------------------------------------------------------------------------------------------
# (2) bulk P and S speeds in a block
# ---------------------------------------------------------------------------------------------
def _green_line_force(r, w, case):
    """2-D full-space Green's function (line force, plane strain), numpy's e^{-i w t} transform sign.

    G_ij = (1 / (rho w^2)) (k_S^2 delta_ij g_S + d_i d_j (g_S - g_P)), g = (i/4) H0(k r)
    (e.g. Eringen and Suhubi, Elastodynamics vol. 2, 1975, sec. 7); on the x-axis
    d_x d_x g = g''(r) (force and receiver along x: P) and d_z d_z g = g'(r) / r (along z: S).
    """
    kp, ks = w / AL.cl_m_s, w / AL.ct_m_s
    g = lambda k: 0.25j * hankel2(0, k * r)  # noqa: E731
    g1 = lambda k: -0.25j * k * hankel2(1, k * r)  # noqa: E731
    g2 = lambda k: -0.25j * k**2 * (hankel2(0, k * r) - hankel2(1, k * r) / (k * r))  # noqa: E731
    cross = g2(ks) - g2(kp) if case == "P" else (g1(ks) - g1(kp)) / r
    return (ks**2 * g(ks) + cross) / (AL.density_kg_m3 * w**2)


@pytest.mark.slow
def test_bulk_p_and_s_speeds_in_a_block():
    # Line force inside an 80 mm block, receivers 10 and 25 mm away along the x-axis: vx for a force
    # along x (P), vz for a force along z (S). The measured transfer between the receivers is compared
    # with the exact Green's function ratio at 1 MHz (near field included); the residual phase over
    # the 15 mm gives the velocity error. Issue 10: within 0.5 %. At 31 cells per S wavelength the
    # 1-D dispersion relation of the scheme predicts -0.15 % for S (measured: P -0.04 %, S -0.16 %).
    h, fc, height = 1e-4, 1e6, 0.08
    grid = GridSpec(h, 0.9 * cfl_limit_s(h, AL.cl_m_s), 40)
    p = build_plate(AL, grid, height, x_start_m=-0.006, x_end_m=0.032)
    jc = p.shape[0] // 2
    i0 = int(round(-p.x0_m / h - 1))
    n1, n2 = 100, 250
    q = _gabor(fc, 0.5, grid.dt_s)
    n = int(0.98 * math.hypot(n2 * h, height) / AL.cl_m_s / grid.dt_s)  # ends before the first surface echo
    taper = np.ones(n)
    taper[-n // 10:] = 0.5 + 0.5 * np.cos(np.pi * np.arange(n // 10) / (n // 10))
    for case, comp, c in (("P", 0, AL.cl_m_s), ("S", 1, AL.ct_m_s)):
        src = (np.array([[comp, jc, i0]]), np.array([1.0 / h]))
        recs = [(np.array([[comp, jc, i0 + k]]), np.array([1.0])) for k in (n1, n2)]
        tr = PlateRun(p, dtype=np.float32, pml_f0_hz=fc).run(n, src, q, recs) * taper
        nf = sfft.next_fast_len(8 * n)
        f = sfft.rfftfreq(nf, grid.dt_s)
        i = int(np.argmin(np.abs(f - fc)))
        w = 2 * np.pi * f[i]
        measured = sfft.rfft(tr[1], nf)[i] / sfft.rfft(tr[0], nf)[i]
        exact = _green_line_force(n2 * h, w, case) / _green_line_force(n1 * h, w, case)
        dk = -np.angle(measured / exact) / ((n2 - n1) * h)
        err = -dk / (w / c) * 100
        assert abs(err) < 0.5, (case, err)


# ---------------------------------------------------------------------------------------------
# (4) absorbing ends
# ---------------------------------------------------------------------------------------------
@pytest.mark.slow
def test_absorbing_ends_reflect_below_minus_60_db():
    # Issue 10: reflection below -60 dB of the direct arrival. Pin-force pair 30 mm apart on a
    # 2 mm plate (15 cells), absorbing layers 10 mm beyond the transmitter and the receiver, against
    # the same pair in a plate whose ends are 0.34 m away (no end echo enters the 120 us window).
    # Whole waveform (S0 and A0) after spectral multiplication to 5-cycle bursts. Measured:
    # -81 dB at 100 kHz, -93 dB at 150 kHz, -100 dB at 250 kHz (simulation/fullwave/grid.py).
    bursts = [BurstSpec(100e3, 5), BurstSpec(150e3, 5), BurstSpec(250e3, 5)]
    grid = design_grid(AL, T_WALL, 420e3, sample_rate_hz=10e6, f_low_hz=100e3)
    fp = peak_frequency_for(bursts)
    q = broadband_pulse(fp, grid.dt_s, int(pulse_length_s(fp) / grid.dt_s) + 1)
    n_samples = 1200
    n = n_samples * 8 + q.size
    waves = []
    for x_start, x_end in ((-0.34, 0.37), (-0.01 - 0.0035, 0.03 + 0.0035 + 0.01)):
        p = build_plate(AL, grid, T_WALL, x_start_m=x_start, x_end_m=x_end)
        tr = PlateRun(p, dtype=np.float64, pml_f0_hz=fp).run(
            n, footprint(p, "pin_force", 0.0, 3.5e-3), q, [footprint(p, "pin_force", 0.03, 3.5e-3, receiver=True)])[0]
        waves.append(bursts_from_broadband(tr, q, grid.dt_s, bursts, sample_rate_hz=10e6, n_samples=n_samples))
    ref, short = waves
    for k in range(len(bursts)):
        level_db = 20 * np.log10(np.abs(short[k] - ref[k]).max() / np.abs(ref[k]).max())
        assert level_db < -60, (bursts[k], level_db)
