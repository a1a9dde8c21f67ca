"""Published figures the audit shows beside the lab's own, each with its citation.

A registry's case mix differs from any one lab's (referral pattern, age, share of reduced LVEF,
how completely each measure is acquired): these figures are a reference, not a target.
"""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict

from service.model import Guideline, Pathway


class RegistryFigure(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")

    #: the node's pathway whose indeterminate share this figure is compared with
    pathway: Pathway
    guideline: Guideline
    #: share of the registry's cases (to which the algorithm could be applied) that were
    #: indeterminate, 0-1
    indeterminate_share: float
    #: the registry's group, in its own words
    group: str
    registry: str
    citation: str
    #: where the figure was checked, and how
    verified: str


_NEDA = (
    "Playford D, Strange G, Celermajer DS, Evans G, Scalia GM, Stewart S, Prior D; the NEDA "
    "Investigators. Diastolic dysfunction and mortality in 436 360 men and women: the National "
    "Echo Database Australia (NEDA). Eur Heart J Cardiovasc Imaging 2021;22(5):505-515. "
    "doi:10.1093/ehjci/jeaa253"
)
_NEDA_CHECKED = (
    "abstract (PMC8081414): the ASE/EACVI 2016 algorithms could be applied in 392 009 of "
    "436 360 cases (88.6 % preserved, 11.4 % reduced LVEF); diastolic function was "
    "indeterminate in 21.5 % of preserved- and 62.2 % of reduced-LVEF cases"
)

REGISTRY_FIGURES: tuple[RegistryFigure, ...] = (
    RegistryFigure(
        pathway=Pathway.normal_lvef,
        guideline=Guideline.ase_eacvi_2016,
        indeterminate_share=0.215,
        group="'preserved' LVEF (≥ 50 %)",
        registry="National Echo Database Australia (NEDA)",
        citation=_NEDA,
        verified=_NEDA_CHECKED,
    ),
    RegistryFigure(
        pathway=Pathway.reduced_lvef_or_myocardial_disease,
        guideline=Guideline.ase_eacvi_2016,
        indeterminate_share=0.622,
        group="'reduced' LVEF (< 50 %)",
        registry="National Echo Database Australia (NEDA)",
        citation=_NEDA,
        verified=_NEDA_CHECKED,
    ),
)

CASE_MIX_CAVEAT = (
    "A registry's case mix differs from this lab's: referral pattern, age, the share of "
    "reduced LVEF and how completely each measure is acquired all move the indeterminate "
    "share. The registry figure is a reference, not a target. The registry's 'reduced' group "
    "is LVEF below 50 % only; this node's reduced pathway also holds studies flagged for "
    "myocardial disease with a normal LVEF."
)
