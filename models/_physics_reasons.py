"""The reasons of the physics checks, in words (:class:`~waneguide.models._physics_check.PhysicsChecker`).

Each function renders one kind of reason from a fitted checker's state and parameters; the
numbers they quote (speed deviation, equivalent shear-speed or path change, gauge reading in
mm, accepted ranges) are the checker's own.
"""
from __future__ import annotations

import math

import numpy as np

__all__ = ["NEGATIVE_LOSS_REASON", "excitation_reasons", "negative_loss_reason", "plate_reasons"]

#: First words of the reason a capture reading thicker than its baseline gets.
NEGATIVE_LOSS_REASON = "negative apparent loss"


def plate_reasons(chk, x, g, ex, eg, t_b, n_b, path) -> list[str]:
    """Reasons of a path off the family's plate: S0 delay ``x`` (excess ``ex``), gauge ``g`` (excess ``eg``)."""
    st, fam = chk.state, chk.family
    t_nom = fam.section.flange_thickness_mm
    where = (f" (mean over the {int(n_b)} baselines of path {path})" if n_b > 1 else "")
    out = []
    if np.isfinite(ex) and ex != 0.0:
        out.append(_s0_reason(chk, x, t_b, where))
    if np.isfinite(eg) and eg != 0.0:
        g0 = st["gauge"]["centre"]
        thr = st["plate"]["threshold"]
        half = chk._g_tolerance() + thr * st["gauge"]["sd"] / math.sqrt(max(n_b, 1.0))
        lo_mm, hi_mm = (g0 - half) / g0 * t_nom, (g0 + half) / g0 * t_nom
        text = (f"baseline A0 thickness gauge reads {g / g0 * t_nom:.2f} mm against the family's {t_nom:g} mm "
                f"flange{where} (accepted {lo_mm:.2f}-{hi_mm:.2f} mm, Rayleigh-Lamb A0 fit of the baseline at "
                "its temperature): ")
        if eg > 0:
            text += "no wall loss makes a plate read thicker: check the flange thickness"
        else:
            text += "check the flange thickness, and that the baseline was recorded on sound metal"
        if np.isfinite(ex) and ex > 0 and eg < 0:
            text += "; S0 and A0 both slow: a lower shear speed moves both (check the alloy)"
        out.append(text)
    return out


def _s0_reason(chk, x, t_b, where) -> str:
    """S0 faster or slower than the plate: at the recorded temperature, or at any of the environment's."""
    st, fam = chk.state, chk.family
    env = fam.environment
    k = st["s0_coefficient_per_k"]
    tol = chk._x_tolerance()
    t_ref = chk._t_ref()
    speed = 100.0 * (1.0 / (1.0 + x) - 1.0)
    word = "slower" if speed < 0 else "faster"
    mat = fam.build_material()
    plate = (f"this family's plate ({fam.section.flange_thickness_mm:g} mm {mat.name}, "
             f"{fam.path.transducer_spacing_mm:g} mm path)")
    # the same delay read as a plate at some other temperature of the environment range
    x_ref = x + (k * (t_b - t_ref) if np.isfinite(t_b) else 0.0)
    lo_env, hi_env = k * (env.min_temperature_c - t_ref), k * (env.max_temperature_c - t_ref)
    x_any = x_ref - min(max(x_ref, lo_env - tol), hi_env + tol)
    span = f"{env.min_temperature_c:g} to {env.max_temperature_c:g} degC"
    if not np.isfinite(t_b):
        when = f"at any temperature of the environment range {span} (no baseline temperature recorded)"
    elif x_any != 0.0:
        when = f"at the recorded {t_b:.1f} degC and at any temperature of {span}"
    else:
        t_fit = t_ref + x_ref / k
        when = (f"at the recorded {t_b:.1f} degC (a plate at {t_fit:.0f} degC would fit: check the temperature "
                "reading)")
    sens = st["s0_sensitivity"]
    shear = 100.0 * (math.expm1(math.log1p(x) / sens["shear"]))
    path_mm = x * fam.path.transducer_spacing_mm
    text = (f"baseline S0 is {abs(speed):.1f} % {word} than {plate} {when}{where}: ")
    if speed < 0:
        text += (f"no wall loss slows S0 (thinning speeds it up, by {abs(100 * st['s0_advance_at_max_loss']):.2f} % "
                 f"at the domain's deepest uniform loss); a plate velocity sqrt(E / (rho (1 - nu^2))) that low "
                 f"means a shear speed about {abs(shear):.1f} % lower or the path {path_mm:.1f} mm longer: "
                 "check the alloy and the transducer spacing")
    else:
        text += (f"a shear speed about {abs(shear):.1f} % higher or the path {abs(path_mm):.1f} mm shorter: check "
                 "the alloy and the transducer spacing (a baseline is recorded on sound metal)")
    return text


def negative_loss_reason(chk, ratio, shift_m) -> str:
    """A capture reading thicker than its baseline (sharpest-thickness ratio, compensated packet shift)."""
    neg = chk.state["negative_loss"]
    c_ratio = neg["centre"][1]
    apparent = 100.0 * (1.0 - ratio / c_ratio)
    return (f"{NEGATIVE_LOSS_REASON}: the capture reads {abs(apparent):.1f} % thicker than its baseline (A0 "
            f"sharpest-thickness ratio {ratio:.3f}, compensated A0 packet {abs(shift_m - neg['centre'][0]) * 1e3:.1f} "
            "mm ahead of the baseline's), beyond the scatter of in-family captures; its loss estimate is clipped "
            "to 0 % and must not be read as sound metal. A wall does not grow: check that the baseline of this "
            "path was recorded on sound metal and that both temperatures are right")


def excitation_reasons(chk, f, fs) -> list[list[str]]:
    """Per row: the spectral peak ``f`` [Hz] off the excitation, the sample rate ``fs`` [Hz] off the family's."""
    st = chk.state
    out: list[list[str]] = [[] for _ in range(len(f))]
    fc = st["centre_frequency_hz"]
    fcen = st.get("frequency_median", fc)
    ftol = max(chk.frequency_rel_tol * fc, chk.spread_factor * st.get("frequency_spread", 0.0))
    for i in np.flatnonzero(np.isfinite(f) & (np.abs(f - fcen) > ftol)):
        out[i].append(f"peak frequency {f[i] / 1e3:.1f} kHz is off the family's {fc / 1e3:g} kHz excitation "
                      f"(accepted {(fcen - ftol) / 1e3:.1f}-{(fcen + ftol) / 1e3:.1f} kHz): check the "
                      f"pulser settings and the transducers")
    fs_fam = st["sample_rate_hz"]
    for i in np.flatnonzero(np.isfinite(fs) & (np.abs(fs - fs_fam) > chk.sample_rate_rel_tol * fs_fam)):
        out[i].append(f"sample rate {fs[i] / 1e6:g} MHz differs from the family's {fs_fam / 1e6:g} MHz: "
                      f"re-acquire at the family's rate or use a family defined for this rate")
    return out
