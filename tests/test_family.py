"""Family schema: strict validation, SI properties, fingerprint, the invented demo families."""
from __future__ import annotations

import copy
import tomllib

import pytest

from waneguide.features.family import Family, family_from_mapping, load_family
from tests.conftest import FAMILY_FB2, FAMILY_ST3


def _raw(path=FAMILY_FB2) -> dict:
    with open(path, "rb") as fh:
        return tomllib.load(fh)


def test_demo_families_load_and_are_labelled_invented(family_fb2, family_st3):
    for fam in (family_fb2, family_st3):
        assert isinstance(fam, Family)
        assert fam.family.invented is True
        assert "INVENTED" in fam.family.description
    # two thicknesses, so the mismatch detector has something to tell apart
    assert family_fb2.nominal_thickness_m == pytest.approx(2.0e-3)
    assert family_st3.nominal_thickness_m == pytest.approx(3.2e-3)
    assert family_fb2.fingerprint != family_st3.fingerprint


def test_si_properties_convert_the_edge_units(family_fb2):
    f = family_fb2
    assert f.acquisition.sample_rate_hz == pytest.approx(10e6)
    assert f.acquisition.pretrigger_s == pytest.approx(20e-6)
    assert f.excitation.centre_frequency_hz == pytest.approx(150e3)
    assert f.path.spacing_m == pytest.approx(0.300)
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
    ],
)
def test_bad_definitions_name_the_field_and_value(edit, needle):
    data = copy.deepcopy(_raw())
    edit(data)
    with pytest.raises(ValueError, match=None) as info:
        family_from_mapping(data, where="fam.toml")
    assert needle in str(info.value)
    assert "fam.toml" in str(info.value)


def test_load_family_reports_missing_and_broken_files(tmp_path):
    with pytest.raises(ValueError, match="does not exist"):
        load_family(tmp_path / "nope.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[family\nname = 'x'\n")
    with pytest.raises(ValueError, match="not valid TOML"):
        load_family(bad)


def test_transducer_section_is_optional():
    data = _raw(FAMILY_ST3)
    data.pop("transducer")
    fam = family_from_mapping(data)
    assert fam.transducer.quality_factor == pytest.approx(1.5)
    assert fam.transducer.aperture == "disc"
