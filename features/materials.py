"""Isotropic elastic materials with a linear temperature model.

A material is fixed by density plus any consistent pair of elastic constants
(Young's modulus and Poisson's ratio, or the bulk longitudinal and transverse
velocities). Temperature enters through ``dE/dT`` (Poisson's ratio held
constant) and the linear expansion coefficient, about a reference temperature.

Relations (isotropic elasticity; Graff, *Wave Motion in Elastic Solids*, 1975, ch. 5):

    c_T = sqrt(E / (2 rho (1 + nu)))
    c_L = sqrt(E (1 - nu) / (rho (1 + nu) (1 - 2 nu)))
    nu  = (c_L^2 - 2 c_T^2) / (2 (c_L^2 - c_T^2))
    E   = rho c_T^2 (3 c_L^2 - 4 c_T^2) / (c_L^2 - c_T^2)
"""
from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Mapping

from waneguide.core.errors import InputError, MissingInputError

__all__ = [
    "Material",
    "BUILTIN_MATERIALS",
    "builtin_material_names",
    "get_material",
    "load_material",
    "material_from_mapping",
    "resolve_material",
]


@dataclass(frozen=True)
class Material:
    """An isotropic, linear-elastic solid.

    Parameters
    ----------
    name : str
        Identifier used in configs and reports.
    youngs_modulus_pa : float
        Young's modulus E at the reference temperature [Pa].
    poisson_ratio : float
        Poisson's ratio nu, in the open interval (0, 0.5).
    density_kg_m3 : float
        Density rho at the reference temperature [kg/m^3].
    dE_dT_pa_per_k : float, default 0
        Slope of E with temperature [Pa/K] (negative for metals).
    thermal_expansion_per_k : float, default 0
        Linear expansion coefficient alpha [1/K].
    reference_temperature_c : float, default 20
        Temperature at which E and rho are given [degC].
    min_temperature_c, max_temperature_c : float
        Range in which the linear temperature model is trusted [degC].
    source : str
        Where the values come from.

    Notes
    -----
    Construct with :meth:`from_velocities` when the bulk velocities are known.
    """

    name: str
    youngs_modulus_pa: float
    poisson_ratio: float
    density_kg_m3: float
    dE_dT_pa_per_k: float = 0.0
    thermal_expansion_per_k: float = 0.0
    reference_temperature_c: float = 20.0
    min_temperature_c: float = -55.0
    max_temperature_c: float = 150.0
    source: str = "user supplied"
    temperature_c: float | None = field(default=None, compare=False)

    def __post_init__(self) -> None:
        where = f"material {self.name!r}"
        for attr in ("youngs_modulus_pa", "density_kg_m3"):
            value = getattr(self, attr)
            if not isinstance(value, (int, float)) or not math.isfinite(value) or value <= 0:
                raise InputError(f"{where}: {attr} must be a positive finite number; got {value!r}.")
        nu = self.poisson_ratio
        if not isinstance(nu, (int, float)) or not math.isfinite(nu) or not 0.0 < nu < 0.5:
            raise InputError(
                f"{where}: poisson_ratio must lie in the open interval (0, 0.5); got {nu!r}."
            )
        for attr in ("dE_dT_pa_per_k", "thermal_expansion_per_k", "reference_temperature_c"):
            value = getattr(self, attr)
            if not isinstance(value, (int, float)) or not math.isfinite(value):
                raise InputError(f"{where}: {attr} must be a finite number; got {value!r}.")
        if not self.min_temperature_c < self.max_temperature_c:
            raise InputError(
                f"{where}: min_temperature_c ({self.min_temperature_c}) must be below "
                f"max_temperature_c ({self.max_temperature_c})."
            )
        if abs(self.thermal_expansion_per_k) > 1e-3:
            raise InputError(
                f"{where}: thermal_expansion_per_k must be given per kelvin (about 2.3e-5 for "
                f"aluminium); got {self.thermal_expansion_per_k!r}."
            )

    # -- alternative constructor -------------------------------------------------
    @classmethod
    def from_velocities(cls, name: str, *, cl_m_s: float, ct_m_s: float, density_kg_m3: float,
                        **kwargs: Any) -> "Material":
        """Build a material from bulk longitudinal and transverse velocities [m/s]."""
        for label, value in (("cl_m_s", cl_m_s), ("ct_m_s", ct_m_s), ("density_kg_m3", density_kg_m3)):
            if not isinstance(value, (int, float)) or not math.isfinite(value) or value <= 0:
                raise InputError(f"material {name!r}: {label} must be a positive finite number; got {value!r}.")
        if not cl_m_s > math.sqrt(2.0) * ct_m_s:
            raise InputError(
                f"material {name!r}: cl_m_s must exceed sqrt(2)*ct_m_s = {math.sqrt(2.0) * ct_m_s:.1f} m/s "
                f"for a positive Poisson's ratio; got cl_m_s={cl_m_s!r}, ct_m_s={ct_m_s!r}."
            )
        cl2, ct2 = cl_m_s**2, ct_m_s**2
        nu = (cl2 - 2.0 * ct2) / (2.0 * (cl2 - ct2))
        e = density_kg_m3 * ct2 * (3.0 * cl2 - 4.0 * ct2) / (cl2 - ct2)
        return cls(name=name, youngs_modulus_pa=e, poisson_ratio=nu, density_kg_m3=density_kg_m3, **kwargs)

    # -- derived quantities ------------------------------------------------------
    @property
    def ct_m_s(self) -> float:
        """Bulk transverse (shear) velocity [m/s]."""
        return math.sqrt(self.youngs_modulus_pa / (2.0 * self.density_kg_m3 * (1.0 + self.poisson_ratio)))

    @property
    def cl_m_s(self) -> float:
        """Bulk longitudinal velocity [m/s]."""
        nu = self.poisson_ratio
        return math.sqrt(self.youngs_modulus_pa * (1.0 - nu) / (self.density_kg_m3 * (1.0 + nu) * (1.0 - 2.0 * nu)))

    @property
    def plate_velocity_m_s(self) -> float:
        """Low-frequency S0 limit sqrt(E / (rho (1 - nu^2))) [m/s]."""
        return math.sqrt(self.youngs_modulus_pa / (self.density_kg_m3 * (1.0 - self.poisson_ratio**2)))

    def flexural_rigidity(self, thickness_m: float) -> float:
        """Kirchhoff plate bending stiffness D = E d^3 / (12 (1 - nu^2)) [N m]."""
        return self.youngs_modulus_pa * thickness_m**3 / (12.0 * (1.0 - self.poisson_ratio**2))

    # -- temperature -------------------------------------------------------------
    def check_temperature(self, temperature_c: float) -> float:
        """Return ``temperature_c`` if inside the validity range, else raise :class:`InputError`."""
        t = float(temperature_c)
        if not math.isfinite(t) or not self.min_temperature_c <= t <= self.max_temperature_c:
            raise InputError(
                f"temperature_c={temperature_c!r} is outside the validity range of material "
                f"{self.name!r} ({self.min_temperature_c:g} to {self.max_temperature_c:g} degC); give a temperature "
                "inside it, or a material whose temperature model covers it."
            )
        return t

    def expansion_factor(self, temperature_c: float) -> float:
        """Length ratio L(T)/L(T_ref) = 1 + alpha (T - T_ref) (linear expansion)."""
        t = self.check_temperature(temperature_c)
        return 1.0 + self.thermal_expansion_per_k * (t - self.reference_temperature_c)

    def at_temperature(self, temperature_c: float) -> "Material":
        """The same material at ``temperature_c``.

        E(T) = E_ref + dE/dT (T - T_ref); nu held constant; rho(T) = rho_ref / (1 + alpha dT)^3
        (mass conserved in a volume that grows with the cube of the length ratio).
        """
        t = self.check_temperature(temperature_c)
        dt = t - self.reference_temperature_c
        e = self.youngs_modulus_pa + self.dE_dT_pa_per_k * dt
        if e <= 0:
            raise InputError(f"material {self.name!r}: E becomes non-positive at {t} degC (dE_dT_pa_per_k = "
                             f"{self.dE_dT_pa_per_k:g}); check dE/dT or narrow the temperature range.")
        rho = self.density_kg_m3 / (1.0 + self.thermal_expansion_per_k * dt) ** 3
        return replace(self, youngs_modulus_pa=e, density_kg_m3=rho, temperature_c=t)

    def as_row(self) -> dict[str, Any]:
        """Row for ``waneguide materials --csv``."""
        return {
            "name": self.name,
            "youngs_modulus_pa": self.youngs_modulus_pa,
            "poisson_ratio": self.poisson_ratio,
            "density_kg_m3": self.density_kg_m3,
            "cl_m_s": round(self.cl_m_s, 3),
            "ct_m_s": round(self.ct_m_s, 3),
            "source": self.source,
        }

    def as_dict(self) -> dict[str, Any]:
        """All defining constants (for fingerprints and bundles)."""
        return {
            "name": self.name,
            "youngs_modulus_pa": self.youngs_modulus_pa,
            "poisson_ratio": self.poisson_ratio,
            "density_kg_m3": self.density_kg_m3,
            "dE_dT_pa_per_k": self.dE_dT_pa_per_k,
            "thermal_expansion_per_k": self.thermal_expansion_per_k,
            "reference_temperature_c": self.reference_temperature_c,
            "min_temperature_c": self.min_temperature_c,
            "max_temperature_c": self.max_temperature_c,
            "source": self.source,
        }


# ---------------------------------------------------------------------------
# Built-in table. Room-temperature typical values.
# E, nu, rho and alpha: ASM Handbook Vol. 2 (1990), "Properties of Wrought
# Aluminum and Aluminum Alloys", typical-property tables (values quoted from
# memory of those tables; check against the handbook before certification work).
# dE/dT: about -36 MPa/K for wrought Al alloys near room temperature, read off
# the E-versus-temperature curves of MMPDS-01 ch. 3 (from memory; the slope of
# roughly -5e-4 E per kelvin is common practice, no single source).
# Validity: -55 to +150 degC, the span in which the linear model holds to about
# 1 % in E for these tempers (common practice, no source).
# ---------------------------------------------------------------------------
_DEDT = -36e6
_ASM = "ASM Handbook Vol. 2 (1990), wrought Al typical properties; dE/dT from MMPDS-01 ch. 3 curves (values from memory)"

BUILTIN_MATERIALS: Mapping[str, Material] = {
    m.name: m
    for m in (
        Material("al-6061-t6", 68.9e9, 0.33, 2700.0, _DEDT, 23.6e-6, source=_ASM),
        Material("al-2024-t3", 73.1e9, 0.33, 2780.0, _DEDT, 23.2e-6, source=_ASM),
        Material("al-7075-t6", 71.7e9, 0.33, 2810.0, _DEDT, 23.6e-6, source=_ASM),
        Material("al-5083-h116", 70.3e9, 0.33, 2660.0, _DEDT, 23.8e-6, source=_ASM),
        Material("al-1100-o", 68.9e9, 0.33, 2710.0, _DEDT, 23.6e-6, source=_ASM),
    )
}


def builtin_material_names() -> list[str]:
    """Names of the built-in materials, sorted."""
    return sorted(BUILTIN_MATERIALS)


def get_material(name: str) -> Material:
    """Look up a built-in material by name (case-insensitive)."""
    key = str(name).strip().lower()
    try:
        return BUILTIN_MATERIALS[key]
    except KeyError:
        raise InputError(
            f"unknown material {name!r}; known materials: {', '.join(builtin_material_names())}, "
            "or give the path of a material TOML file."
        ) from None


_ALLOWED_KEYS = {
    "name", "youngs_modulus_pa", "youngs_modulus_gpa", "poisson_ratio", "cl_m_s", "ct_m_s",
    "density_kg_m3", "dE_dT_pa_per_k", "dE_dT_mpa_per_k", "thermal_expansion_per_k",
    "reference_temperature_c", "min_temperature_c", "max_temperature_c", "source",
}


def material_from_mapping(data: Mapping[str, Any], *, where: str = "material") -> Material:
    """Build a :class:`Material` from a mapping (a config table).

    Accepts ``youngs_modulus_pa`` (or ``youngs_modulus_gpa``) with ``poisson_ratio``, or
    ``cl_m_s`` with ``ct_m_s``; plus ``density_kg_m3`` and optional temperature keys.
    Unknown keys are errors.
    """
    unknown = sorted(set(data) - _ALLOWED_KEYS)
    if unknown:
        raise InputError(f"{where}: unknown key(s) {unknown}; accepted keys: {sorted(_ALLOWED_KEYS)}. "
                         "Remove or rename them.")
    d = dict(data)
    name = str(d.pop("name", "user-material"))
    if "density_kg_m3" not in d:
        raise InputError(f"{where}: density_kg_m3 is required (with an elastic pair); add e.g. density_kg_m3 = 2700.")
    if "youngs_modulus_gpa" in d:
        if "youngs_modulus_pa" in d:
            raise InputError(f"{where}: give youngs_modulus_pa or youngs_modulus_gpa, not both.")
        d["youngs_modulus_pa"] = float(d.pop("youngs_modulus_gpa")) * 1e9
    if "dE_dT_mpa_per_k" in d:
        if "dE_dT_pa_per_k" in d:
            raise InputError(f"{where}: give dE_dT_pa_per_k or dE_dT_mpa_per_k, not both.")
        d["dE_dT_pa_per_k"] = float(d.pop("dE_dT_mpa_per_k")) * 1e6
    has_e = "youngs_modulus_pa" in d or "poisson_ratio" in d
    has_c = "cl_m_s" in d or "ct_m_s" in d
    if has_e and has_c:
        raise InputError(f"{where}: give either (youngs_modulus, poisson_ratio) or (cl_m_s, ct_m_s), not both.")
    for key, value in d.items():
        if key != "source" and not isinstance(value, (int, float)):
            raise InputError(f"{where}: {key} must be a number; got {value!r}. Write it without quotes or units.")
    if has_c:
        if not ("cl_m_s" in d and "ct_m_s" in d):
            raise InputError(f"{where}: cl_m_s and ct_m_s must be given together; got only "
                             f"{'cl_m_s' if 'cl_m_s' in d else 'ct_m_s'}. Add the other one.")
        return Material.from_velocities(name, **d)
    if not ("youngs_modulus_pa" in d and "poisson_ratio" in d):
        raise InputError(
            f"{where}: needs youngs_modulus_pa (or youngs_modulus_gpa) with poisson_ratio, "
            "or cl_m_s with ct_m_s."
        )
    return Material(name=name, **d)


def load_material(path: str | Path) -> Material:
    """Read a material from a TOML file with a ``[material]`` table."""
    p = Path(path)
    try:
        with p.open("rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise MissingInputError(f"material file {str(p)!r} does not exist; give the path of a material .toml file "
                                "or a built-in name (see `waneguide materials`).") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"material file {str(p)!r} is not valid TOML: {exc}. Fix the line named "
                         "(configs/materials/example_user_alloy.toml shows the layout).") from None
    except (IsADirectoryError, NotADirectoryError):
        raise InputError(f"material file {str(p)!r} is a folder or lies under a file; give a material .toml file "
                         "or a built-in name (see `waneguide materials`).") from None
    except UnicodeDecodeError as exc:
        raise InputError(f"material file {str(p)!r} is not UTF-8 text ({exc.reason} at byte {exc.start}); "
                         "give a material .toml file.") from None
    if set(data) != {"material"}:
        raise InputError(f"material file {str(p)!r} must hold exactly one [material] table; got {sorted(data)}. "
                         "Put every key under [material].")
    return material_from_mapping(data["material"], where=f"{p}: [material]")


def resolve_material(name_or_path: str | Path | Material) -> Material:
    """A :class:`Material` from a built-in name, a TOML path, or a Material."""
    if isinstance(name_or_path, Material):
        return name_or_path
    text = str(name_or_path)
    if text.lower().endswith(".toml") or Path(text).is_file():
        return load_material(text)
    return get_material(text)
