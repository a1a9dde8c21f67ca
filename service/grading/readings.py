"""The project's readings of ambiguous published rules, each with a stable identifier.

Where a guideline is silent or ambiguous the rules make a choice.  The identifier (I-16-x for
ASE/EACVI 2016, I-25-x for ASE 2025) is kept for software and audit: it is recorded in the
assessment (``Assessment.readings``) and written as an identifier item in the result SR, never
inside a sentence a person reads.  The words below are what a person reads, introduced as
"this service's reading of an ambiguity in the guideline" (:data:`service.wording.READING_PREFIX`).
A reading that depends on a rule switch has its words for each setting.

Pure data: no I/O.
"""

from __future__ import annotations

#: identifier -> plain words, for the default setting of each switch
READINGS: dict[str, str] = {
    "I-16-1": (
        "Algorithm A (ASE/EACVI 2016 Figure 8A) decides on the criteria that are available; the "
        "guideline sets no minimum number of available criteria."
    ),
    "I-16-2": (
        "septal and lateral e′ count as one criterion, met when either available site is below "
        "its cut-off (Figure 8A joins them with “or”)."
    ),
    "I-16-3": (
        "when average E/e′ is not available, the single-site cut-offs septal E/e′ > 15 or "
        "lateral E/e′ > 13 are used."
    ),
    "I-16-4": (
        "E/A of exactly 0.8 with mitral E ≤ 50 cm/s is grade I, as Figure 8B states (the "
        "paper's descriptive table overlaps at 0.8)."
    ),
    "I-16-5": "E/A of exactly 2 is grade III, as in Figure 8B (the descriptive table says > 2).",
    "I-16-6": (
        "with reduced LVEF and one of two available step-2 criteria met, pulmonary-vein S/D "
        "< 1 counts as the third criterion met and S/D ≥ 1 as not met."
    ),
    "I-16-7": (
        "with only one of the three step-2 criteria of Figure 8B available the result is "
        "indeterminate, even when pulmonary-vein S/D is available."
    ),
    "I-16-8": "with normal LVEF and Algorithm A indeterminate, no grade is given.",
    "I-16-9": (
        "when E/A is not available in sinus rhythm (A wave absent, or E-A fusion), Algorithm B "
        "cannot start and the result is indeterminate."
    ),
    "I-16-10": (
        "the guideline gives no number for reduced LVEF; LVEF below 50 % is taken as reduced "
        "(a site may configure another value)."
    ),
    "I-16-11": (
        "the guideline lists the atrial-fibrillation criteria without a rule combining them; "
        "each is reported and the filling pressure is left indeterminate."
    ),
    "I-16-12": (
        "the guideline lists the hypertrophic-cardiomyopathy criteria without a counting rule; "
        "the majority of the available criteria decides (more than half met: elevated, less "
        "than half: normal, exactly half: indeterminate)."
    ),
    "I-16-13": (
        "in pulmonary hypertension of non-cardiac cause, lateral E/e′ between 8 and 13 is "
        "reported as indeterminate."
    ),
    "I-16-14": (
        "no validated numeric rule of the guideline is applied for mitral annular calcification "
        "or heart transplant; the standard algorithm is not used."
    ),
    "I-16-15": (
        "the guideline lists the criteria of a special situation such as mitral stenosis without "
        "a rule combining them; when none decides alone, each is reported and the filling "
        "pressure is left indeterminate."
    ),
    "I-25-1": (
        "with both e′ sites, average e′ ≤ 6.5 cm/s decides; the septal (≤ 6) and lateral (≤ 7) "
        "cut-offs are used only when the average is not available (either site then counts)."
    ),
    "I-25-2": (
        "with both sites, average E/e′ ≥ 14 decides; the septal (≥ 15) and lateral (≥ 13) "
        "cut-offs are used only when the average is not available (either site then counts)."
    ),
    "I-25-3": "TR velocity and PASP are one criterion, met when either is abnormal.",
    "I-25-4": (
        "reduced e′ with normal E/e′ and TR velocity is normal LAP (grade I); other discordant "
        "step-1 patterns go to step 2."
    ),
    "I-25-5": (
        "in step 2 any one abnormal supplementary marker (LA reservoir strain, pulmonary-vein "
        "S/D, LAVI, IVRT) means raised LAP."
    ),
    "I-25-6": "an incomplete step 1 (an index not available) goes to step 2.",
    "I-25-7": (
        "normal LAP without e′ gives no grade (indeterminate); raised LAP with normal e′ is "
        "graded by E/A with a warning."
    ),
    "I-25-8": "raised LAP with E/A not available is reported as grade II or III.",
    "I-25-9": (
        "in the atrial-fibrillation algorithm, two of the three step-2 criteria decide, and "
        "normal filling pressure needs at least three of the four step-1 criteria available."
    ),
}

#: words for readings whose rule switch is not at its default: (identifier, setting) -> words
SWITCHED: dict[tuple[str, str], str] = {
    ("I-16-11", "majority"): (
        "the guideline lists the atrial-fibrillation criteria without a rule combining them; "
        "this site has chosen that the majority of the available criteria decides."
    ),
    ("I-25-1", "any-site"): (
        "e′ is reduced when any of average (≤ 6.5), septal (≤ 6) or lateral (≤ 7 cm/s) e′ is; "
        "this site's setting."
    ),
    ("I-25-2", "any-site"): (
        "E/e′ is raised when any of average (≥ 14), septal (≥ 15) or lateral (≥ 13) E/e′ is; "
        "this site's setting."
    ),
    ("I-25-3", "tr-preferred"): (
        "TR velocity decides when present; PASP is used only without it (this site's setting)."
    ),
    ("I-25-5", "majority"): (
        "in step 2 the majority of the available supplementary markers decides (this site's "
        "setting)."
    ),
    ("I-25-5", "hierarchy"): (
        "in step 2 the first available of LA reservoir strain, pulmonary-vein S/D, LAVI and "
        "IVRT decides (this site's setting)."
    ),
    ("I-25-6", "accept-concordant-available"): (
        "an incomplete step 1 is decided when the available indices agree (this site's "
        "setting); otherwise step 2 decides."
    ),
}


def words(identifier: str, setting: str = "") -> str:
    """The plain words of a reading (for the given switch setting, when it has its own)."""
    return SWITCHED.get((identifier, setting)) or READINGS[identifier]
