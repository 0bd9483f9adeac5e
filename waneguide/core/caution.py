"""The safety wording that every report and every estimate printed by the CLI carries."""
from __future__ import annotations

__all__ = ["CAUTION"]

CAUTION = (
    "Decision support only: not a replacement for the inspections that the maintenance programme "
    "mandates, done by certified NDT personnel. Defer to the structural repair manual, local "
    "regulations and licensed engineering practice."
)
