"""Grading of LV diastolic function: Measurements + Context -> Assessment (pure, no I/O).

Each guideline is one module with an ``assess(measurements, context, ...)`` function; adding a
guideline is one entry in ``_ENGINES``.  Readings of ambiguous points that the project's reference
leaves open are switches in :class:`RuleSwitches` (defaults = the reference's readings).
"""

from __future__ import annotations

from collections.abc import Callable

from pydantic import BaseModel, ConfigDict, Field

from service.errors import UserError
from service.grading import ase2016, ase2025
from service.grading.ase2025 import Ase2025Options
from service.grading.atrial_fibrillation import Ase2016AfOptions, Ase2025AfOptions
from service.model import Assessment, Context, Guideline, Measurements


class RuleSwitches(BaseModel):
    """Every configurable reading of an ambiguous published rule, per guideline."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    ase2016_af: Ase2016AfOptions = Field(default_factory=Ase2016AfOptions)
    ase2025: Ase2025Options = Field(default_factory=Ase2025Options)


DEFAULT_SWITCHES = RuleSwitches()

_Engine = Callable[[Measurements, Context, RuleSwitches], Assessment]

_ENGINES: dict[Guideline, _Engine] = {
    Guideline.ase_eacvi_2016: lambda m, c, s: ase2016.assess(m, c, s.ase2016_af),
    Guideline.ase_2025: lambda m, c, s: ase2025.assess(m, c, s.ase2025),
}

#: guidelines whose rule set is implemented in full
IMPLEMENTED_GUIDELINES: tuple[Guideline, ...] = tuple(_ENGINES)

#: why a known guideline is not selectable (docs/guideline-verification.md)
NOT_AVAILABLE: dict[Guideline, str] = {
    Guideline.bse_2024: (
        "guideline bse-2024 is not implemented: the BSE 2024 decision trees (Robinson et al., "
        "Echo Res Pract 2024;11:16) could not be checked against the published figures - the "
        "normal-LV-function, impaired-LV-function and atrial-fibrillation algorithms, the "
        "special-group list and the LVEF cut-off for 'impaired' were not verified - so this rule "
        "set is not available"
    ),
}


def assess(
    measurements: Measurements,
    context: Context,
    guideline: Guideline = Guideline.ase_eacvi_2016,
    switches: RuleSwitches | None = None,
) -> Assessment:
    """Grade diastolic function by one guideline.  Raises UserError for a guideline that is
    unknown or not implemented."""
    try:
        g = Guideline(guideline)
        engine = _ENGINES[g]
    except (KeyError, ValueError):
        implemented = ", ".join(x.value for x in IMPLEMENTED_GUIDELINES)
        name = getattr(guideline, "value", guideline)
        reason = NOT_AVAILABLE.get(name) if isinstance(name, str) else None
        raise UserError(
            f"{reason or f'guideline {name} is not implemented'} (implemented: {implemented})"
        ) from None
    return engine(measurements, context, switches or DEFAULT_SWITCHES)


__all__ = [
    "DEFAULT_SWITCHES",
    "IMPLEMENTED_GUIDELINES",
    "NOT_AVAILABLE",
    "Ase2016AfOptions",
    "Ase2025AfOptions",
    "Ase2025Options",
    "RuleSwitches",
    "assess",
]
