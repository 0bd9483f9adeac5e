"""waneguide.simulation: thinning profiles, the fast forward model and simulated campaigns.

Thinning profiles (:mod:`waneguide.simulation.profiles`)
    :class:`ThinningProfile` (thickness along the path plus ground truth),
    generators :func:`flat_patch_profile`, :func:`pit_profile`,
    :func:`rough_profile`, :func:`multi_patch_profile`, :func:`pristine_profile`.
Forward model (:mod:`waneguide.simulation.forward`)
    :class:`ForwardModel` (S0/A0 modal synthesis on a precomputed thickness
    grid, every approximation listed in its module docstring),
    :func:`simulate_capture` (one capture of an explicit profile). The drive burst and
    the transducers come from :mod:`waneguide.features.excitation`.
Campaigns (:mod:`waneguide.simulation.campaign`)
    :func:`plan_campaign`, :func:`run_campaign` (in-process, joblib or Dask through
    :func:`waneguide.core.runner.run_tasks`; chunked, atomic, resumable),
    :func:`load_campaign` -> :class:`Campaign` (chunk SHA-256 checked on every read).
Export (:mod:`waneguide.simulation.export`)
    :func:`export_campaign_captures` (cases and baselines as capture files).

Names are imported on first use by the project's one lazy-import mechanism
(:func:`waneguide.core.lazy.lazy_exports`, PEP 562), so importing the package stays cheap.
"""
from __future__ import annotations

from waneguide.core.lazy import lazy_exports

_EXPORTS = {
    "ThinningProfile": "profiles",
    "flat_patch_profile": "profiles",
    "pit_profile": "profiles",
    "rough_profile": "profiles",
    "multi_patch_profile": "profiles",
    "pristine_profile": "profiles",
    "ForwardModel": "forward",
    "simulate_capture": "forward",
    "Campaign": "campaign",
    "plan_campaign": "campaign",
    "run_campaign": "campaign",
    "load_campaign": "campaign",
    "export_campaign_captures": "export",
}

__all__ = sorted(_EXPORTS)


__getattr__, __dir__ = lazy_exports(__name__, _EXPORTS, globals())
