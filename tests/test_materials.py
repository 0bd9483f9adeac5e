"""Materials: elastic relations, temperature model, table, config files, validation."""
from __future__ import annotations


import pytest

from waneguide.features import BUILTIN_MATERIALS, Material, get_material, load_material, resolve_material


def test_velocity_pair_round_trips_through_moduli():
    # Isotropic identities (Graff 1975 ch. 5): (E, nu) -> (c_L, c_T) -> (E, nu) exactly.
    al = get_material("al-2024-t3")
    back = Material.from_velocities("x", cl_m_s=al.cl_m_s, ct_m_s=al.ct_m_s, density_kg_m3=al.density_kg_m3)
    assert back.youngs_modulus_pa == pytest.approx(al.youngs_modulus_pa, rel=1e-12)
    assert back.poisson_ratio == pytest.approx(al.poisson_ratio, rel=1e-12)


def test_handbook_velocities_of_6061():
    # Bulk velocities of 6061-T6 near 6.3 and 3.1 km/s are the figures NDT tables quote
    # (e.g. ASNT NDT Handbook vol. 7 velocity table, from memory: c_L 6.32, c_T 3.13 km/s);
    # 2 % tolerance covers the spread between handbook E values and measured velocities.
    al = get_material("al-6061-t6")
    assert al.cl_m_s == pytest.approx(6320, rel=0.03)
    assert al.ct_m_s == pytest.approx(3130, rel=0.02)


def test_every_builtin_names_its_source():
    for m in BUILTIN_MATERIALS.values():
        assert "ASM Handbook" in m.source


def test_temperature_model():
    # E(T) = E0 + dE/dT dT; rho(T) = rho0/(1 + alpha dT)^3; lengths scale by (1 + alpha dT).
    al = get_material("al-6061-t6")
    hot = al.at_temperature(70.0)
    assert hot.youngs_modulus_pa == pytest.approx(al.youngs_modulus_pa + 50 * al.dE_dT_pa_per_k)
    assert hot.density_kg_m3 == pytest.approx(al.density_kg_m3 / (1 + 50 * al.thermal_expansion_per_k) ** 3)
    assert al.expansion_factor(70.0) == pytest.approx(1 + 50 * 23.6e-6)
    # Warm aluminium is slower: d ln c_T / dT = (dE/dT)/(2E) + (3/2) alpha (from c_T^2 = E/(2 rho (1+nu)))
    dlnct = (hot.ct_m_s - al.ct_m_s) / al.ct_m_s / 50
    expected = al.dE_dT_pa_per_k / (2 * al.youngs_modulus_pa) + 1.5 * al.thermal_expansion_per_k
    assert dlnct == pytest.approx(expected, rel=0.02)
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
    with pytest.raises(ValueError, match=needle):
        Material("bad", **kwargs)


def test_velocities_below_sqrt2_ratio_are_refused():
    with pytest.raises(ValueError, match=r"cl_m_s must exceed sqrt\(2\)\*ct_m_s"):
        Material.from_velocities("bad", cl_m_s=4000.0, ct_m_s=3000.0, density_kg_m3=2700.0)


def test_temperature_outside_validity_is_refused():
    al = get_material("al-6061-t6")
    with pytest.raises(ValueError, match=r"outside the validity range.*-55 to 150 degC"):
        al.at_temperature(200.0)


def test_unknown_material_lists_known_ones():
    with pytest.raises(ValueError, match="known materials: al-1100-o, al-2024-t3"):
        get_material("steel-316")


def test_user_material_file(repo_root, tmp_path):
    m = load_material(repo_root / "configs" / "materials" / "example_user_alloy.toml")
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
    with pytest.raises(ValueError, match=r"unknown key\(s\) \['colour'\]"):
        load_material(bad)
    both = tmp_path / "both.toml"
    both.write_text("[material]\nyoungs_modulus_gpa=70\npoisson_ratio=0.3\ncl_m_s=6000\nct_m_s=3000\ndensity_kg_m3=2700\n")
    with pytest.raises(ValueError, match="not both"):
        load_material(both)
    gpa = tmp_path / "gpa.toml"
    gpa.write_text("[material]\nname='g'\nyoungs_modulus_gpa=70\npoisson_ratio=0.3\ndensity_kg_m3=2700\n")
    assert load_material(gpa).youngs_modulus_pa == pytest.approx(70e9)
    # S0 low-frequency (plate) velocity from E, nu, rho: sqrt(E / (rho (1 - nu^2))) = 5337.6 m/s for
    # 70 GPa, 0.3, 2700 kg/m^3 (Graff 1975, sec. 8.1; Rose 1999, ch. 8); tolerance: the 5 digits quoted
    assert load_material(gpa).plate_velocity_m_s == pytest.approx(5337.6, rel=2e-5)
