"""Family schema: strict validation, SI properties, fingerprint, the invented demo families, campaign memory."""
from __future__ import annotations

import copy
import math
import re
import tomllib
import tracemalloc

import pytest

from waneguide.core.errors import InputError, MissingInputError
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.extractor import FeatureExtractor
from waneguide.features._family_memory import model_memory_bytes, synthesis_size
from waneguide.features.family import family_from_mapping, load_family
from waneguide.features.windows import samples_needed
from waneguide.simulation._chunk import simulate_chunk
from waneguide.simulation._plan import plan_campaign
from waneguide.simulation._tables import _build_tables, cached_tables
from waneguide.simulation.forward import ForwardModel
from tests.conftest import FAMILY_FB2, FAMILY_ST3


def _raw(path=FAMILY_FB2) -> dict:
    with open(path, "rb") as fh:
        return tomllib.load(fh)


def test_demo_families_load_and_are_labelled_invented(family_fb2, family_st3):
    for fam, name in ((family_fb2, "demo-fb2"), (family_st3, "demo-st3")):
        assert fam.name == name
        assert fam.family.invented is True
        assert "INVENTED" in fam.family.description
    # two thicknesses, so the mismatch detector has something to tell apart
    assert family_fb2.nominal_thickness_m == pytest.approx(2.0e-3)
    assert family_st3.nominal_thickness_m == pytest.approx(3.2e-3)
    assert family_fb2.fingerprint != family_st3.fingerprint


def test_si_properties_convert_the_edge_units(family_fb2):
    # unit conversions of the file's values: round-off only (pytest's default rel 1e-6 is far above it)
    f = family_fb2
    assert f.acquisition.sample_rate_hz == pytest.approx(10e6)
    assert f.acquisition.pretrigger_s == pytest.approx(20e-6)
    assert f.excitation.centre_frequency_hz == pytest.approx(150e3)
    assert f.path_length_m == pytest.approx(0.300)
    near, far = f.path.end_distances_m()
    assert (near, far) == pytest.approx((0.120, 0.180))  # 600 - 120 - 300 mm
    assert f.edge_distances_m() == pytest.approx((0.012, 0.028))  # 12 mm and 40 - 12 mm
    assert f.full_scale_v == pytest.approx(1.0)


def test_fingerprint_ignores_description_but_not_physics():
    base = family_from_mapping(_raw())
    reworded = _raw()
    reworded["family"]["description"] = "INVENTED demo, reworded"
    assert family_from_mapping(reworded).fingerprint == base.fingerprint
    thicker = _raw()
    thicker["section"]["flange_thickness_mm"] = 2.1
    assert family_from_mapping(thicker).fingerprint != base.fingerprint
    new_q = _raw()
    new_q["transducer"]["quality_factor"] = 3.0
    assert family_from_mapping(new_q).fingerprint != base.fingerprint


def test_operating_limit_is_read_but_keeps_the_fingerprint():
    # the limit is an operating setting, not physics: trained models stay valid when it changes
    # (this project's family schema rule, DEVELOPERS.md "Versioned formats")
    base = family_from_mapping(_raw())
    limited = _raw()
    limited["limits"] = {"wall_loss_limit_pct": 12.5}
    fam = family_from_mapping(limited)
    assert fam.limits.wall_loss_limit_pct == 12.5
    assert fam.fingerprint == base.fingerprint


def test_model_dump_round_trips_with_the_same_fingerprint(family_st3):
    again = family_from_mapping(family_st3.model_dump(mode="json"))
    assert again.fingerprint == family_st3.fingerprint


@pytest.mark.parametrize(
    "edit, needle",
    [
        (lambda d: d["domain"].__setitem__("colour", "red"), "domain.colour: unknown key"),
        (lambda d: d.__setitem__("extras", {}), "extras: unknown key"),
        (lambda d: d["transducer"].__setitem__("bandwidth", 2), "transducer.bandwidth: unknown key"),
        (lambda d: d["section"].__setitem__("flange_thickness_mm", -2.0), "section.flange_thickness_mm"),
        (lambda d: d["domain"].__setitem__("max_loss_pct", [10.0, 95.0]), "max_loss_pct must lie within [0, 90)"),
        (lambda d: d["domain"].__setitem__("snr_db", [40.0, 20.0]), "lower bound 40.0 is above upper bound 20.0"),
        (lambda d: d["domain"].__setitem__("echo_reflection", [0.1, 1.5]), "echo_reflection must lie within [0, 1]"),
        (lambda d: d["domain"].__setitem__("states_per_specimen", 0), "domain.states_per_specimen"),
        (lambda d: d["domain"].__setitem__("temperature_c", [-50.0, 20.0]), "must lie inside the environment range"),
        (lambda d: d["transducer"].update(s0_excitability=0.0, a0_excitability=0.0), "no mode would be excited"),
        (lambda d: d["acquisition"].__setitem__("sample_rate_mhz", 0.5), "too low for a 150 kHz burst"),
        (lambda d: d["path"].__setitem__("lateral_position_mm", 45.0), "must be inside the flange width"),
        (lambda d: d["section"].pop("web_height_mm"), "needs web_height_mm and web_thickness_mm"),
        (lambda d: d["excitation"].__setitem__("window", "kaiser"), "excitation.window"),
        (lambda d: d.__setitem__("limits", {"wall_loss_limit_pct": 120.0}), "limits.wall_loss_limit_pct"),
    ],
)
def test_bad_definitions_name_the_field_and_value(edit, needle):
    data = copy.deepcopy(_raw())
    edit(data)
    with pytest.raises(InputError, match=re.escape(needle)) as info:
        family_from_mapping(data, where="fam.toml")
    assert str(info.value).startswith("fam.toml: ")


def test_load_family_reports_missing_and_broken_files(tmp_path):
    with pytest.raises(MissingInputError, match=r"nope\.toml.*does not exist"):
        load_family(tmp_path / "nope.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[family\nname = 'x'\n")
    with pytest.raises(InputError, match=r"bad\.toml.*not valid TOML"):
        load_family(bad)


def _family_file(tmp_path, record_length: int):
    text = FAMILY_FB2.read_text()
    assert "record_length = 8192" in text
    path = tmp_path / f"short_{record_length}.toml"
    path.write_text(text.replace("record_length = 8192", f"record_length = {record_length}"))
    return path


def test_record_length_that_cannot_hold_the_mode_windows_is_refused(tmp_path, family_fb2):
    # demo-fb2's A0 window (300 mm path, slowest A0 group velocity over the band and the thinning domain,
    # 5-cycle burst, 20 us pre-trigger at 10 MHz) ends at sample 2153 (regression value of this code):
    # record_length = 1500 used to be accepted, and every capture of that length passed the gate
    need = samples_needed(family_fb2)
    assert need == {"S0": 1154, "A0": 2153}  # regression values of this code
    path = _family_file(tmp_path, 1500)
    with pytest.raises(InputError) as info:
        load_family(path)
    msg = str(info.value)
    assert msg.startswith(f"{path}: acquisition.record_length = 1500 samples cannot hold the A0 window")
    assert "needs at least 2153 samples: set record_length = 4096" in msg
    # the boundary is the extractor's own: one sample short is refused, the window's end sample is accepted
    with pytest.raises(InputError, match="record_length = 2152 samples cannot hold"):
        load_family(_family_file(tmp_path, 2152))
    fam = load_family(_family_file(tmp_path, 2153))
    plan = FeatureExtractor(fam)._plan(fam.acquisition.sample_rate_hz, fam.acquisition.pretrigger_s, 2153)
    assert plan.modes["A0"].stop == 2153  # the extractor's A0 gate ends on the record's last sample
    # physical floor: the needed record reaches past the end of the nominal-thickness A0 packet, whose
    # burst end leaves at cycles / f0 and travels at the Rayleigh-Lamb group velocity at f0 (the window
    # adds the slower, thinned plates of the domain on top)
    acq, exc = family_fb2.acquisition, family_fb2.excitation
    c = fundamental_dispersion(family_fb2.build_material(), [family_fb2.nominal_thickness_m],
                               [exc.centre_frequency_hz])
    t_end = family_fb2.path_length_m / c.group_velocity_m_s[0, c.mode_index("A0"), 0] + exc.cycles / exc.centre_frequency_hz
    assert need["A0"] / acq.sample_rate_hz - acq.pretrigger_s > t_end


def test_transducer_section_is_optional():
    data = _raw(FAMILY_ST3)
    data.pop("transducer")
    fam = family_from_mapping(data)
    assert fam.transducer.quality_factor == pytest.approx(1.5)
    assert fam.transducer.aperture == "disc"


@pytest.mark.parametrize(
    "section, key, value, needle",
    [
        ("domain", "jitter_ns", math.inf, "domain.jitter_ns: Input should be a finite number; got inf"),
        ("acquisition", "full_scale", math.inf, "acquisition.full_scale: Input should be a finite number; got inf"),
        ("domain", "snr_db", [20.0, math.inf], "domain.snr_db.1: Input should be a finite number; got inf"),
        ("domain", "snr_db", [math.nan, 45.0], "domain.snr_db.0: Input should be a finite number; got nan"),
        ("acquisition", "pretrigger_us", math.inf, "acquisition.pretrigger_us: Input should be a finite number"),
        ("acquisition", "pretrigger_us", 1e300, "pretrigger_us (1e+300 us = 1e+301 samples at 10 MHz) must be "
                                                "shorter than the record (record_length = 8192 samples"),
        ("environment", "reference_temperature_c", math.inf, "environment.reference_temperature_c: Input should be a "
                                                             "finite number"),
        ("transducer", "quality_factor", math.nan, "transducer.quality_factor: Input should be a finite number"),
        ("domain", "coupling_db", [-1e300, 1e300], "coupling_db must lie within [-300, 300] dB"),
        ("domain", "patch_length_mm", [5.0, 1e300], "patch_length_mm must lie within (0, 20000] mm"),
        ("domain", "jitter_ns", 1e300, "domain.jitter_ns: Input should be less than or equal to 10000"),
        ("domain", "snr_db", ["a", 1.0], "domain.snr_db.0: Input should be a valid number"),
    ],
)
def test_non_finite_and_overflowing_values_are_refused_naming_the_field(section, key, value, needle):
    # each used to be accepted (a "complete" campaign of NaN samples for full_scale = inf) or to end in a
    # traceback (OverflowError for pretrigger_us = inf, TypeError for a text element of a pair)
    data = copy.deepcopy(_raw())
    data[section][key] = value
    with pytest.raises(InputError) as info:
        family_from_mapping(data, where="fam.toml")
    assert needle in str(info.value)
    assert str(info.value).startswith("fam.toml: ")


def test_toml_inf_and_nan_literals_are_refused(tmp_path):
    text = FAMILY_FB2.read_text()
    for line, value in (("jitter_ns = 5.0", "inf"), ("full_scale = 1.0", "nan"), ("snr_db = [20.0, 45.0]", "[20.0, inf]")):
        assert line in text
        path = tmp_path / "fam.toml"
        path.write_text(text.replace(line, line.split(" = ")[0] + " = " + value))
        with pytest.raises(InputError, match=re.escape(line.split(" = ")[0]) + r".*finite number"):
            load_family(path)


def _with_acquisition(family, **update):
    data = family.model_dump(mode="json")
    data["acquisition"].update(update)
    return family_from_mapping(data)


def test_synthesis_size_estimate_matches_the_forward_model(family_fb2):
    # the estimate runs before any simulation; it must find the band and FFT length the synthesis uses.
    # record_length 2200 (above the 2153 needed) makes the FFT longer than the record (end echoes)
    for fam in (family_fb2, _with_acquisition(family_fb2, record_length=2200)):
        n_fft, bins = synthesis_size(fam)
        tables = cached_tables(fam, 128)
        assert bins == tables.freq_hz.size
        # the synthesis rounds its FFT up to a fast length: within 1 % (regression value of this code: 0.2 %)
        assert tables.n_fft == pytest.approx(n_fft, rel=0.01)
        assert n_fft >= fam.acquisition.record_length


def test_memory_estimates_bound_the_measured_peaks(family_fb2):
    # tracemalloc peaks (numpy reports its buffers to it) of the two big steps of a campaign, against the
    # estimate: the estimate must not be below the peak, nor more than 1.6x above it (a guard that refuses
    # feasible campaigns is no better than none; 1.6 is the baseline share (1 + 1/states) with margin:
    # common practice, no source)
    fam = _with_acquisition(family_fb2, record_length=2200)  # not in the table cache of this process
    tracemalloc.start()
    try:
        _build_tables(fam, 128)
        model_peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    model_est = model_memory_bytes(fam)
    assert model_peak <= model_est <= 1.6 * model_peak, (model_peak, model_est)
    fm = ForwardModel(family_fb2)
    plan = plan_campaign(family_fb2, 64, seed=0)
    simulate_chunk(fm, plan.iloc[:2], 0)  # first-use allocations outside the measurement
    tracemalloc.start()
    try:
        simulate_chunk(fm, plan, 0)
        chunk_peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    chunk_est = family_fb2.campaign_chunk_memory_bytes(64)
    assert chunk_peak <= chunk_est <= 1.6 * chunk_peak, (chunk_peak, chunk_est)


def test_campaign_memory_estimate_flags_the_largest_record_and_a_billion_cases(family_fb2):
    # demo-fb2 at the largest record_length the schema allows (2**20): 20,748 band bins, so building the
    # forward model's tables alone needs ~22.6 GB (8,500 bytes per bin and thickness node, 128 nodes):
    # more than this 23 GB machine has free beside anything else; the estimate says so before any work
    big = _with_acquisition(family_fb2, record_length=2**20)
    assert synthesis_size(big) == (2**20, 20_748)  # regression values of this code
    assert model_memory_bytes(big) == 8_500 * 20_748 * 128
    assert big.campaign_memory_bytes(1000, chunk_size=512) > 20e9
    # the demo's default campaign: model build ~170 MB dominates (regression value of this code)
    default = family_fb2.campaign_memory_bytes(2000, chunk_size=512)
    assert 150e6 < default < 250e6
    # --cases 1000000000: the case tables alone are 2 KiB x 1e9 = 2 TB
    assert family_fb2.campaign_memory_bytes(10**9, chunk_size=512) > 2e12
    # chunk memory is linear in cases and receivers (the per-record cost times the records)
    one = family_fb2.campaign_chunk_memory_bytes(100)
    assert family_fb2.campaign_chunk_memory_bytes(100, n_receivers=3) == pytest.approx(3 * one, rel=1e-6)
    assert family_fb2.campaign_chunk_memory_bytes(200) == pytest.approx(2 * one, rel=1e-6)
    with pytest.raises(ValueError, match="chunk_size must be a positive whole number"):
        family_fb2.campaign_chunk_memory_bytes(0)
