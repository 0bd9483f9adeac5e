"""Family schema: strict validation, SI properties, fingerprint, the invented demo families."""
from __future__ import annotations

import copy
import re
import tomllib

import pytest

from waneguide.core.errors import InputError, MissingInputError
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.extractor import FeatureExtractor
from waneguide.features.family import family_from_mapping, load_family
from waneguide.features.windows import samples_needed
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
