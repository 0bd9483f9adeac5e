"""Materials: elastic relations, temperature model, table, config files, validation."""
from __future__ import annotations

import math

import pytest

from waneguide.core.errors import InputError, MissingInputError
from waneguide.features import BUILTIN_MATERIALS, Material, get_material, load_material, resolve_material


def test_velocity_pair_round_trips_through_moduli():
    # Isotropic identities (Graff 1975 ch. 5): (E, nu) -> (c_L, c_T) -> (E, nu) exactly; rel 1e-12 leaves
    # room for the float64 round-off of a few square roots and quotients (common practice, no source).
    al = get_material("al-2024-t3")
    back = Material.from_velocities("x", cl_m_s=al.cl_m_s, ct_m_s=al.ct_m_s, density_kg_m3=al.density_kg_m3)
    assert back.youngs_modulus_pa == pytest.approx(al.youngs_modulus_pa, rel=1e-12)
    assert back.poisson_ratio == pytest.approx(al.poisson_ratio, rel=1e-12)


def test_handbook_velocities_of_6061():
    # Bulk velocities of 6061-T6 near 6.3 and 3.1 km/s are the figures NDT tables quote
    # (e.g. ASNT NDT Handbook vol. 7 velocity table, from memory: c_L 6.32, c_T 3.13 km/s). The table's
    # (E, nu, rho) give 6.15 and 3.10 km/s (2.7 % and 1.1 % below). Tolerances: c_L 3 %, c_T 2 %. Poisson's
    # ratio is tabulated to two digits, and c_L / c_T = sqrt(2 (1 - nu) / (1 - 2 nu)) moves by 1.1 % per
    # 0.005 of nu (from that relation); handbook E values spread by about 1 % (from memory).
    al = get_material("al-6061-t6")
    assert al.cl_m_s == pytest.approx(6320, rel=0.03)
    assert al.ct_m_s == pytest.approx(3130, rel=0.02)


def test_every_builtin_names_its_source():
    assert sorted(BUILTIN_MATERIALS) == ["al-1100-o", "al-2024-t3", "al-5083-h116", "al-6061-t6", "al-7075-t6"]
    for m in BUILTIN_MATERIALS.values():
        assert "ASM Handbook" in m.source
        # wrought aluminium near room temperature: E 68-74 GPa, rho 2.6-2.9 g/cm^3, alpha 22-25e-6 /K
        # (ASM Handbook vol. 2 ranges, from memory)
        assert 68e9 <= m.youngs_modulus_pa <= 74e9 and 2600 <= m.density_kg_m3 <= 2900
        assert 22e-6 <= m.thermal_expansion_per_k <= 25e-6 and m.dE_dT_pa_per_k < 0


def test_temperature_model():
    # E(T) = E0 + dE/dT dT; rho(T) = rho0/(1 + alpha dT)^3; lengths scale by (1 + alpha dT). The
    # model is stated exactly, so rel 1e-12 only leaves room for float64 round-off (common practice, no source).
    al = get_material("al-6061-t6")
    hot = al.at_temperature(70.0)
    assert hot.youngs_modulus_pa == pytest.approx(al.youngs_modulus_pa + 50 * al.dE_dT_pa_per_k, rel=1e-12)
    assert hot.density_kg_m3 == pytest.approx(al.density_kg_m3 / (1 + 50 * al.thermal_expansion_per_k) ** 3,
                                              rel=1e-12)
    assert al.expansion_factor(70.0) == pytest.approx(1 + 50 * 23.6e-6, rel=1e-12)
    # Warm aluminium is slower. From c_T^2 = E / (2 rho (1 + nu)) with nu fixed (Graff 1975 ch. 5):
    # ln(c_T(T) / c_T0) = (1/2) ln(E(T) / E0) + (3/2) ln(1 + alpha dT), exactly (rel 1e-9: round-off of a
    # difference of two logarithms of numbers near 1, common practice, no source) ...
    dlnct = math.log(hot.ct_m_s / al.ct_m_s)
    expected = 0.5 * math.log(hot.youngs_modulus_pa / al.youngs_modulus_pa) + 1.5 * math.log(al.expansion_factor(70.0))
    assert dlnct == pytest.approx(expected, rel=1e-9)
    # ... whose slope at T0 is (dE/dT)/(2E) + (3/2) alpha < 0 for aluminium
    assert al.dE_dT_pa_per_k / (2 * al.youngs_modulus_pa) + 1.5 * al.thermal_expansion_per_k < 0
    assert dlnct < 0


@pytest.mark.parametrize(
    "kwargs, needle",
    [
        (dict(youngs_modulus_pa=-1.0, poisson_ratio=0.3, density_kg_m3=2700), "youngs_modulus_pa must be a positive"),
        (dict(youngs_modulus_pa=70e9, poisson_ratio=0.3, density_kg_m3=0.0), "density_kg_m3 must be a positive"),
        (dict(youngs_modulus_pa=70e9, poisson_ratio=0.5, density_kg_m3=2700), r"open interval \(0, 0.5\)"),
        (dict(youngs_modulus_pa=70e9, poisson_ratio=0.0, density_kg_m3=2700), r"open interval \(0, 0.5\)"),
        (dict(youngs_modulus_pa=70e9, poisson_ratio=0.3, density_kg_m3=2700, thermal_expansion_per_k=23.6), "per kelvin"),
    ],
)
def test_invalid_constants_are_refused(kwargs, needle):
    with pytest.raises(InputError, match=needle):
        Material("bad", **kwargs)


def test_velocities_below_sqrt2_ratio_are_refused():
    with pytest.raises(InputError, match=r"cl_m_s must exceed sqrt\(2\)\*ct_m_s"):
        Material.from_velocities("bad", cl_m_s=4000.0, ct_m_s=3000.0, density_kg_m3=2700.0)


def test_temperature_outside_validity_is_refused():
    al = get_material("al-6061-t6")
    with pytest.raises(InputError, match=r"outside the validity range.*-55 to 150 degC"):
        al.at_temperature(200.0)


def test_unknown_material_lists_known_ones():
    with pytest.raises(InputError, match="known materials: al-1100-o, al-2024-t3"):
        get_material("steel-316")


def test_user_material_file(repo_root, tmp_path):
    m = load_material(repo_root / "configs" / "materials" / "example_user_alloy.toml")
    # the file gives c_L = 6320, c_T = 3130 m/s; back through (E, nu): float64 round-off only (rel 1e-12)
    assert m.cl_m_s == pytest.approx(6320.0, rel=1e-12)
    assert m.ct_m_s == pytest.approx(3130.0, rel=1e-12)
    # the file's bulk velocities become (E, nu) by the isotropic relations (Graff 1975, ch. 5;
    # Rose 1999, ch. 4): nu = (cL^2 - 2 cT^2) / (2 (cL^2 - cT^2)), E = rho cT^2 (3 cL^2 - 4 cT^2) / (cL^2 - cT^2);
    # the two lines above only prove the round trip. Tolerance: float round-off of the algebra.
    cl2, ct2 = 6320.0**2, 3130.0**2
    assert m.poisson_ratio == pytest.approx((cl2 - 2 * ct2) / (2 * (cl2 - ct2)), rel=1e-12)
    assert m.youngs_modulus_pa == pytest.approx(2700.0 * ct2 * (3 * cl2 - 4 * ct2) / (cl2 - ct2), rel=1e-12)
    assert resolve_material(str(repo_root / "configs" / "materials" / "example_user_alloy.toml")) == m
    bad = tmp_path / "bad.toml"
    bad.write_text("[material]\nname='x'\nyoungs_modulus_gpa=70\npoisson_ratio=0.3\ndensity_kg_m3=2700\ncolour='red'\n")
    with pytest.raises(InputError, match=r"bad\.toml: \[material\]: unknown key\(s\) \['colour'\]"):
        load_material(bad)
    both = tmp_path / "both.toml"
    both.write_text("[material]\nyoungs_modulus_gpa=70\npoisson_ratio=0.3\ncl_m_s=6000\nct_m_s=3000\ndensity_kg_m3=2700\n")
    with pytest.raises(InputError, match="not both"):
        load_material(both)
    gpa = tmp_path / "gpa.toml"
    gpa.write_text("[material]\nname='g'\nyoungs_modulus_gpa=70\npoisson_ratio=0.3\ndensity_kg_m3=2700\n")
    assert load_material(gpa).youngs_modulus_pa == pytest.approx(70e9, rel=1e-15)  # 70 x 1e9: one rounding
    # S0 low-frequency (plate) velocity from E, nu, rho: sqrt(E / (rho (1 - nu^2))) = 5337.6 m/s for
    # 70 GPa, 0.3, 2700 kg/m^3 (Graff 1975, sec. 8.1; Rose 1999, ch. 8); tolerance: half a unit of the last
    # quoted digit is 0.05 / 5337.6 = 1e-5 relative, rel 2e-5 allows for it
    assert load_material(gpa).plate_velocity_m_s == pytest.approx(5337.6, rel=2e-5)
    with pytest.raises(MissingInputError, match=r"nope\.toml.*does not exist"):
        load_material(tmp_path / "nope.toml")
