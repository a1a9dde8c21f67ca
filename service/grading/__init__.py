"""Grading of LV diastolic function: Measurements + Context -> Assessment (pure, no I/O).

Each guideline is one module with an ``assess(measurements, context)`` function; adding a
guideline is one line in ``_ENGINES``.
"""

from __future__ import annotations

from collections.abc import Callable

from service.errors import UserError
from service.grading import ase2016
from service.model import Assessment, Context, Guideline, Measurements

_ENGINES: dict[Guideline, Callable[[Measurements, Context], Assessment]] = {
    Guideline.ase_eacvi_2016: ase2016.assess,
}

#: guidelines whose rule set is implemented in full
IMPLEMENTED_GUIDELINES: tuple[Guideline, ...] = tuple(_ENGINES)


def assess(
    measurements: Measurements,
    context: Context,
    guideline: Guideline = Guideline.ase_eacvi_2016,
) -> Assessment:
    """Grade diastolic function by one guideline.  Raises UserError for a guideline that is
    unknown or not implemented."""
    try:
        engine = _ENGINES[Guideline(guideline)]
    except (KeyError, ValueError):
        implemented = ", ".join(g.value for g in IMPLEMENTED_GUIDELINES)
        raise UserError(
            f"guideline {getattr(guideline, 'value', guideline)} is not implemented "
            f"(implemented: {implemented})"
        ) from None
    return engine(measurements, context)


__all__ = ["IMPLEMENTED_GUIDELINES", "assess"]
