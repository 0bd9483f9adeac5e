"""Stiffener-family definitions: one validated TOML file per family.

A *family* is a set of nominally identical stiffener flanges with the same
transducer layout (for example every floor-beam flange of one frame type). The
file fixes the material, the cross-section, the pitch-catch path, the
excitation, the acquisition, the environment and the simulation domain.

Units at this edge follow the trade (mm, kHz, MHz, us, degC); every ``*_m``,
``*_hz`` and ``*_s`` property converts to SI for the code behind.

Until cross-section dispersion exists the flange is treated as a free plate of
the flange thickness: the web and the flange width only set edge/end echo
delays. The model card and the README repeat this.

Sections of a family file (all units at the edge):

``[family]``      name, description, ``invented`` flag
``[material]``    ``builtin = NAME`` or inline constants
``[section]``     shape (flat, T, L, Z), flange thickness and width, web height and thickness
``[path]``        transducer spacing, transmitter position from the near end, lateral
                  position from one edge, flange length, transducer diameter
``[excitation]``  tone-burst centre frequency, cycles, window
``[transducer]``  (optional) resonance, quality factor, relative S0/A0 excitability,
                  aperture model of the bonded discs
``[acquisition]`` sample rate, record length, pretrigger, amplitude units, ADC full scale
``[environment]`` reference temperature and the operating range
``[domain]``      what a simulated campaign spans: loss depth, patch length, shapes,
                  sides, number of patches, position along the path, SNR, coupling,
                  temperature, jitter, attenuation, echo strength, coherent noise,
                  thinning states per specimen, forward-model segment length
"""
from __future__ import annotations

import hashlib
import json
import tomllib
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from waneguide.core.errors import InputError, MissingInputError
from waneguide.features._family_memory import campaign_memory_bytes, chunk_memory_bytes
from waneguide.features.materials import Material, get_material, material_from_mapping
from waneguide.features.windows import mode_windows, samples_needed

__all__ = [
    "Family",
    "TransducerSpec",
    "LimitsSpec",
    "load_family",
    "family_from_mapping",
    "FAMILY_SCHEMA_VERSION",
]

FAMILY_SCHEMA_VERSION = 1


class _Strict(BaseModel):
    # allow_inf_nan=False: every float field (pairs too) refuses inf and nan ("Input should be a finite number")
    model_config = ConfigDict(extra="forbid", frozen=True, validate_default=True, allow_inf_nan=False)


#: Largest magnitude of a level or gain in dB: 10**(300/20) = 1e15 is beyond any amplitude ratio a
#: rig measures (a 16-bit digitiser spans 96 dB) and far inside float64 (10**(x/20) overflows past
#: ~6,165 dB). A choice of this project, common practice, no source.
MAX_ABS_DB = 300.0


def _range(lo_name: str = "lower", hi_name: str = "upper"):
    """Validator body for [lower, upper] pairs (before type validation: non-numbers are left to it)."""

    def check(v):
        if not isinstance(v, (list, tuple)) or len(v) != 2:
            raise ValueError(f"must be a pair [{lo_name}, {hi_name}]")
        try:
            lo, hi = float(v[0]), float(v[1])
        except (TypeError, ValueError):
            return tuple(v)  # the float type check names the element at fault
        if lo > hi:
            raise ValueError(f"lower bound {v[0]} is above upper bound {v[1]}")
        return tuple(v)

    return check


class FamilyInfo(_Strict):
    name: str = Field(min_length=1, max_length=80, pattern=r"^[A-Za-z0-9_.\-]+$")
    description: str = ""
    invented: bool = Field(default=False, description="True for the invented demo families.")


class MaterialSpec(_Strict):
    """Either ``builtin = NAME`` or inline constants (see :func:`material_from_mapping`)."""

    model_config = ConfigDict(extra="allow", frozen=True)
    builtin: str | None = None

    @model_validator(mode="after")
    def _one_way(self):
        extra = dict(self.model_extra or {})
        if self.builtin is None and not extra:
            raise ValueError("give `builtin = NAME` or inline constants (youngs_modulus_gpa, poisson_ratio, density_kg_m3, ...)")
        if self.builtin is not None and extra:
            raise ValueError(f"give `builtin` or inline constants, not both; got extra keys {sorted(extra)}")
        self.build()  # raises ValueError with the material's own message
        return self

    def build(self) -> Material:
        if self.builtin is not None:
            return get_material(self.builtin)
        return material_from_mapping(dict(self.model_extra or {}), where="[material]")


class SectionSpec(_Strict):
    shape: Literal["flat", "T", "L", "Z"] = "T"
    flange_thickness_mm: float = Field(gt=0.2, le=20.0)
    flange_width_mm: float = Field(gt=5.0, le=500.0)
    web_height_mm: float | None = Field(default=None, gt=0.0, le=500.0)
    web_thickness_mm: float | None = Field(default=None, gt=0.0, le=20.0)

    @model_validator(mode="after")
    def _web(self):
        needs_web = self.shape in ("T", "L", "Z")
        has = self.web_height_mm is not None and self.web_thickness_mm is not None
        if needs_web and not has:
            raise ValueError(f"shape {self.shape!r} needs web_height_mm and web_thickness_mm")
        if not needs_web and (self.web_height_mm is not None or self.web_thickness_mm is not None):
            raise ValueError("shape 'flat' takes no web_height_mm / web_thickness_mm")
        return self

    @property
    def nominal_thickness_m(self) -> float:
        """Nominal flange (wall) thickness [m]; the code's one name for it."""
        return self.flange_thickness_mm * 1e-3

    @property
    def flange_width_m(self) -> float:
        return self.flange_width_mm * 1e-3


class PathSpec(_Strict):
    """Pitch-catch path along the flange: both transducers on one line parallel to its length."""

    transducer_spacing_mm: float = Field(gt=10.0, le=5000.0)
    transmitter_position_mm: float = Field(ge=0.0, description="distance from the near flange end to the transmitter")
    lateral_position_mm: float = Field(gt=0.0, description="distance from one flange edge to the transducer line")
    flange_length_mm: float = Field(gt=0.0, le=20000.0)
    transducer_diameter_mm: float = Field(default=7.0, gt=0.0, le=50.0)

    @property
    def path_length_m(self) -> float:
        """Transmitter-to-receiver distance [m]; the code's one name for the path length."""
        return self.transducer_spacing_mm * 1e-3

    def end_distances_m(self) -> tuple[float, float]:
        """(transmitter to near end, receiver to far end) [m]."""
        far = self.flange_length_mm - self.transmitter_position_mm - self.transducer_spacing_mm
        return self.transmitter_position_mm * 1e-3, far * 1e-3


class ExcitationSpec(_Strict):
    centre_frequency_khz: float = Field(gt=1.0, le=2000.0)
    cycles: float = Field(ge=1.0, le=40.0)
    window: Literal["hann", "gaussian", "tukey", "rect"] = "hann"

    @property
    def centre_frequency_hz(self) -> float:
        return self.centre_frequency_khz * 1e3


class TransducerSpec(_Strict):
    """Bonded piezo discs at both ends of the path (used by the forward model).

    Each disc is a second-order resonator ``H(f) = 1 / (1 + i Q (f/f_r - f_r/f))``
    (transmit and receive, so ``H^2``); ``aperture = "disc"`` adds the in-plane
    aperture factor ``2 J1(k a) / (k a)`` of a uniform circular disc of radius ``a``
    (path.transducer_diameter_mm / 2), once per disc. The excitabilities are
    relative amplitudes of S0 and A0 (an empirical pair until a bonded-transducer
    model exists).
    """

    resonance_khz: float | None = Field(default=None, gt=1.0, le=5000.0,
                                        description="disc resonance; default the excitation centre frequency")
    quality_factor: float = Field(default=1.5, gt=0.2, le=50.0)
    s0_excitability: float = Field(default=1.0, ge=0.0, le=100.0)
    a0_excitability: float = Field(default=1.0, ge=0.0, le=100.0)
    aperture: Literal["disc", "none"] = "disc"

    @model_validator(mode="after")
    def _some_mode(self):
        if self.s0_excitability == 0 and self.a0_excitability == 0:
            raise ValueError("s0_excitability and a0_excitability are both 0: no mode would be excited")
        return self


class AcquisitionSpec(_Strict):
    sample_rate_mhz: float = Field(gt=0.01, le=1000.0)
    record_length: int = Field(ge=256, le=1_048_576, description="samples per capture")
    pretrigger_us: float = Field(default=0.0, ge=0.0)
    amplitude_units: Literal["V", "mV", "counts"] = "V"
    counts_scale_v: float | None = Field(default=None, gt=0.0, description="volts per count, when units are counts")
    full_scale: float = Field(default=1.0, gt=0.0, description="ADC rail in amplitude_units")

    @model_validator(mode="after")
    def _trigger_inside_record(self):
        # the pre-trigger is part of the record: at or beyond its end no sample follows the trigger
        pre_samples = self.pretrigger_us * self.sample_rate_mhz
        if not pre_samples < self.record_length:
            raise ValueError(
                f"pretrigger_us ({self.pretrigger_us:g} us = {pre_samples:.6g} samples at {self.sample_rate_mhz:g} MHz) "
                f"must be shorter than the record (record_length = {self.record_length} samples = "
                f"{self.record_length / self.sample_rate_mhz:g} us): the trigger must fall inside the record"
            )
        return self

    @property
    def sample_rate_hz(self) -> float:
        return self.sample_rate_mhz * 1e6

    @property
    def pretrigger_s(self) -> float:
        return self.pretrigger_us * 1e-6

    @property
    def duration_s(self) -> float:
        return self.record_length / self.sample_rate_hz


class EnvironmentSpec(_Strict):
    reference_temperature_c: float = 20.0
    min_temperature_c: float = -20.0
    max_temperature_c: float = 60.0

    @model_validator(mode="after")
    def _order(self):
        if not self.min_temperature_c < self.max_temperature_c:
            raise ValueError(
                f"min_temperature_c ({self.min_temperature_c}) must be below max_temperature_c ({self.max_temperature_c})"
            )
        return self


class DomainSpec(_Strict):
    """What the simulated campaign spans."""

    max_loss_pct: tuple[float, float] = (0.0, 50.0)
    patch_length_mm: tuple[float, float] = (5.0, 150.0)  # at most 20 m, the longest flange of the schema
    shapes: tuple[Literal["flat", "pit", "rough"], ...] = ("flat", "pit", "rough")
    sides: tuple[Literal["one", "two"], ...] = ("one", "two")
    max_patches: int = Field(default=2, ge=1, le=8)
    position_fraction: tuple[float, float] = (0.1, 0.9)
    pristine_fraction: float = Field(default=0.1, ge=0.0, lt=1.0)
    snr_db: tuple[float, float] = (20.0, 45.0)
    coupling_db: tuple[float, float] = (-3.0, 3.0)
    temperature_c: tuple[float, float] = (-10.0, 50.0)
    jitter_ns: float = Field(default=5.0, ge=0.0, le=10_000.0,
                             description="trigger jitter; 10 us at most, three orders above a digitiser's ns")
    attenuation_db_per_m: tuple[float, float] = (0.5, 3.0)
    echo_reflection: tuple[float, float] = (0.05, 0.4)
    coupling_drift_db: tuple[float, float] = Field(
        default=(-1.0, 1.0), description="per-transducer gain change between baseline and capture")
    crosstalk_db: tuple[float, float] = Field(
        default=(-50.0, -30.0), description="electrical crosstalk at t = 0, re the pristine direct-arrival peak")
    ringing_db: tuple[float, float] = Field(
        default=(-55.0, -35.0), description="low-level ringing after the trigger, re the pristine direct-arrival peak")
    states_per_specimen: int = Field(
        default=4, ge=1, le=64, description="thinning states simulated on one specimen (same path, coupling, baseline)")
    segment_mm: float = Field(default=1.0, gt=0.05, le=10.0, description="forward-model segment length along the path")

    _pair = field_validator(
        "max_loss_pct", "patch_length_mm", "position_fraction", "snr_db", "coupling_db",
        "temperature_c", "attenuation_db_per_m", "echo_reflection", "coupling_drift_db",
        "crosstalk_db", "ringing_db", mode="before",
    )(lambda v: _range()(v))

    @model_validator(mode="after")
    def _bounds(self):
        lo, hi = self.max_loss_pct
        if lo < 0 or hi >= 90:
            raise ValueError(f"max_loss_pct must lie within [0, 90); got [{lo}, {hi}]")
        lo, hi = self.position_fraction
        if lo < 0 or hi > 1:
            raise ValueError(f"position_fraction must lie within [0, 1]; got [{lo}, {hi}]")
        if self.patch_length_mm[0] <= 0 or self.patch_length_mm[1] > 20_000.0:
            raise ValueError(f"patch_length_mm must lie within (0, 20000] mm; got {list(self.patch_length_mm)}")
        if not self.shapes or not self.sides:
            raise ValueError("shapes and sides must each list at least one entry")
        if self.attenuation_db_per_m[0] < 0:
            raise ValueError(f"attenuation_db_per_m must not be negative; got {list(self.attenuation_db_per_m)}")
        lo, hi = self.echo_reflection
        if lo < 0 or hi > 1:
            raise ValueError(f"echo_reflection must lie within [0, 1]; got [{lo}, {hi}]")
        for name in ("snr_db", "coupling_db", "coupling_drift_db", "crosstalk_db", "ringing_db", "attenuation_db_per_m"):
            lo, hi = getattr(self, name)
            if max(abs(lo), abs(hi)) > MAX_ABS_DB:
                raise ValueError(f"{name} must lie within [-{MAX_ABS_DB:g}, {MAX_ABS_DB:g}] dB; got [{lo:g}, {hi:g}]")
        return self


class LimitsSpec(_Strict):
    """Operating limits of the family (not physics: left out of the fingerprint)."""

    wall_loss_limit_pct: float | None = Field(
        default=None, gt=0.0, lt=100.0,
        description="limit on the maximum wall loss [% of nominal thickness] for the exceedance probability; "
                    "the default of `score --limit-pct` and `audit --limit-pct`")


class Family(_Strict):
    """A validated stiffener-family definition (see module docstring)."""

    schema_version: int = FAMILY_SCHEMA_VERSION
    family: FamilyInfo
    material: MaterialSpec
    section: SectionSpec
    path: PathSpec
    excitation: ExcitationSpec
    transducer: TransducerSpec = TransducerSpec()
    acquisition: AcquisitionSpec
    environment: EnvironmentSpec = EnvironmentSpec()
    domain: DomainSpec = DomainSpec()
    limits: LimitsSpec = LimitsSpec()

    @model_validator(mode="after")
    def _consistency(self):
        if self.schema_version != FAMILY_SCHEMA_VERSION:
            raise ValueError(f"schema_version {self.schema_version} is not supported; this tool reads {FAMILY_SCHEMA_VERSION}")
        p = self.path
        if p.transmitter_position_mm + p.transducer_spacing_mm > p.flange_length_mm:
            raise ValueError(
                "path: transmitter_position_mm + transducer_spacing_mm "
                f"({p.transmitter_position_mm + p.transducer_spacing_mm:g}) exceeds flange_length_mm ({p.flange_length_mm:g})"
            )
        if p.lateral_position_mm >= self.section.flange_width_mm:
            raise ValueError(
                f"path.lateral_position_mm ({p.lateral_position_mm:g}) must be inside the flange width "
                f"({self.section.flange_width_mm:g} mm)"
            )
        nyquist_khz = self.acquisition.sample_rate_mhz * 1e3 / 2
        if self.excitation.centre_frequency_khz * 3 > nyquist_khz:
            raise ValueError(
                f"acquisition.sample_rate_mhz ({self.acquisition.sample_rate_mhz:g}) is too low for a "
                f"{self.excitation.centre_frequency_khz:g} kHz burst: need at least 6x the centre frequency"
            )
        lo, hi = self.domain.temperature_c
        env = self.environment
        if lo < env.min_temperature_c or hi > env.max_temperature_c:
            raise ValueError(
                f"domain.temperature_c [{lo:g}, {hi:g}] must lie inside the environment range "
                f"[{env.min_temperature_c:g}, {env.max_temperature_c:g}] degC"
            )
        mat = self.material.build()
        for t in (env.min_temperature_c, env.max_temperature_c, env.reference_temperature_c):
            mat.check_temperature(t)
        if self.domain.segment_mm > p.transducer_spacing_mm / 4:
            raise ValueError(
                f"domain.segment_mm ({self.domain.segment_mm:g}) must be at most a quarter of "
                f"path.transducer_spacing_mm ({p.transducer_spacing_mm:g})"
            )
        acq = self.acquisition
        if acq.amplitude_units == "counts" and acq.counts_scale_v is None:
            raise ValueError("acquisition.counts_scale_v is required when amplitude_units = 'counts'")
        self._check_record_holds_windows()
        return self

    def _check_record_holds_windows(self) -> None:
        """acquisition.record_length must reach the end of every mode window (features.windows)."""
        acq = self.acquisition
        needed = samples_needed(self)
        mode = max(needed, key=needed.get)
        need = needed[mode]
        if acq.record_length >= need:
            return
        w = mode_windows(self)[mode]
        suggest = 1 << (need - 1).bit_length()
        raise ValueError(
            f"acquisition.record_length = {acq.record_length} samples cannot hold the {mode} window: it ends "
            f"{w.stop_s * 1e6:.1f} us after the trigger (path {self.path.transducer_spacing_mm:g} mm at the "
            f"slowest {mode} group velocity {w.slowest_m_s:.0f} m/s over the excitation band and the thinning "
            f"domain, plus the {self.excitation.cycles:g}-cycle burst), which with the "
            f"{acq.pretrigger_us:g} us pre-trigger at {acq.sample_rate_mhz:g} MHz is sample {need}. "
            f"The record needs at least {need} samples: set record_length = {suggest} (or any value >= {need}), "
            "or shorten the path."
        )

    # -- memory of a simulated campaign, estimated before any work (features._family_memory) --
    def campaign_chunk_memory_bytes(self, chunk_size: int, *, n_receivers: int = 1) -> int:
        """Peak bytes of simulating one chunk of ``chunk_size`` cases (``n_receivers`` records per case)."""
        return chunk_memory_bytes(self, chunk_size, n_receivers=n_receivers)

    def campaign_memory_bytes(self, n_cases: int, *, chunk_size: int, n_workers: int = 1, n_receivers: int = 1) -> int:
        """Peak bytes of a campaign: case tables plus the larger of the model build and ``n_workers`` chunks."""
        return campaign_memory_bytes(self, n_cases, chunk_size=chunk_size, n_workers=n_workers, n_receivers=n_receivers)

    # -- conveniences ------------------------------------------------------------
    @property
    def name(self) -> str:
        return self.family.name

    def build_material(self) -> Material:
        """The material at its reference temperature."""
        return self.material.build()

    @property
    def nominal_thickness_m(self) -> float:
        """Nominal flange (wall) thickness [m]."""
        return self.section.nominal_thickness_m

    @property
    def path_length_m(self) -> float:
        """Transmitter-to-receiver distance [m]."""
        return self.path.path_length_m

    @property
    def full_scale_v(self) -> float:
        """ADC rail in volts."""
        acq = self.acquisition
        if acq.amplitude_units == "V":
            return acq.full_scale
        if acq.amplitude_units == "mV":
            return acq.full_scale * 1e-3
        return acq.full_scale * float(acq.counts_scale_v)

    def edge_distances_m(self) -> tuple[float, float]:
        """Lateral distances from the transducer line to the two flange edges [m]."""
        lat = self.path.lateral_position_mm
        return lat * 1e-3, (self.section.flange_width_mm - lat) * 1e-3

    def normalised(self) -> dict[str, Any]:
        """Plain, fully-defaulted dict (resolved material included) used for the fingerprint."""
        data = self.model_dump(mode="json")
        data["material"] = {"resolved": self.build_material().as_dict()}
        data["family"].pop("description", None)
        data.pop("limits", None)  # an operating setting: changing it keeps trained models valid
        return data

    @property
    def fingerprint(self) -> str:
        """SHA-256 (first 16 hex digits) of the normalised definition.

        The description text is left out, so rewording it keeps the fingerprint.
        """
        blob = json.dumps(self.normalised(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(blob.encode()).hexdigest()[:16]


def _format_errors(exc: ValidationError, where: str) -> str:
    lines = []
    for err in exc.errors():
        loc = ".".join(str(x) for x in err["loc"])
        msg = err["msg"]
        if err["type"] == "extra_forbidden":
            msg = "unknown key (not part of the family schema)"
        if err["type"] == "value_error":
            msg = msg.removeprefix("Value error, ")
        got = err.get("input")
        got_txt = "" if isinstance(got, dict) else f"; got {got!r}"
        if not loc and err["type"] == "value_error":
            lines.append(msg)  # a check across sections: the message names its fields itself
        else:
            lines.append(f"{loc or '(top level)'}: {msg}{got_txt}")
    # one line (the CLI prints one line per error); several problems are listed with "; "
    if len(lines) == 1:
        return f"{where}: {lines[0]}"
    return f"{where}: {len(lines)} problems: " + "; ".join(lines)


def family_from_mapping(data: dict[str, Any], *, where: str = "family") -> Family:
    """Validate a parsed family definition; errors name the field, the value and the rule.

    Raises
    ------
    InputError
        Naming ``where`` (the file), every field at fault, the value received and the rule.
    """
    try:
        return Family.model_validate(data)
    except ValidationError as exc:
        raise InputError(_format_errors(exc, where)) from None


def load_family(path: str | Path) -> Family:
    """Read and validate a family TOML file.

    Raises
    ------
    MissingInputError
        The file does not exist.
    InputError
        It is not UTF-8 TOML, or breaks the family schema.
    """
    p = Path(path)
    try:
        with p.open("rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise MissingInputError(f"family file {str(p)!r} does not exist; give the path of the family's .toml file "
                                "(the demo families are in configs/families/).") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"family file {str(p)!r} is not valid TOML: {exc}. Fix the line named, or start from "
                         "a demo family in configs/families/.") from None
    except (IsADirectoryError, NotADirectoryError):
        raise InputError(f"family file {str(p)!r} is a folder or lies under a file; give the family's .toml file.") from None
    except UnicodeDecodeError as exc:
        raise InputError(f"family file {str(p)!r} is not UTF-8 text ({exc.reason} at byte {exc.start}); "
                         "give the family's .toml file.") from None
    return family_from_mapping(data, where=str(p))
