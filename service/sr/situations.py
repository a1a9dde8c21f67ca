"""Special situations a source SR states itself, by a coded finding.

A CODE content item whose concept name says it is a finding, an impression or a conclusion,
and whose value is one of the codes below, states the special situation for the study: the
grading then uses the guideline's alternative criteria, exactly as if the situation had been
configured.  Only statements of what was found count (an indication such as "to exclude mitral
stenosis" has another concept name and is never read as a finding).

Codes (every one checked against pydicom's bundled PS3.16 dictionary,
``pydicom.sr._concepts_dict``; tests/test_situations_from_sr.py checks them there):

* concept names: (121071, DCM, "Finding"), (121073, DCM, "Impression"), (121077, DCM,
  "Conclusion"), members of CID 7002 "Diagnostic Imaging Report Element";
* values: (79619009, SCT, "Mitral stenosis") (CID 3700, 3728, 12248), (45227007, SCT,
  "Hypertrophic cardiomyopathy with obstruction") and (195020003, SCT, "Hypertrophic
  cardiomyopathy without obstruction") (CID 3728), (90828009, SCT, "Restrictive
  cardiomyopathy") (CID 3700, 3728).

The adult echo templates (TID 5200, TID 5300) have no coded finding item of their own (from
memory of PS3.16, as for the cardiac rhythm); a finding is read wherever it stands in the
content tree.  No code in pydicom's dictionary names a prosthetic mitral valve (only the
generic (25510005, SCT, "Heart valve prosthesis")), mitral regurgitation codes carry no
severity (the situation is moderate or worse regurgitation), and the other situations are
configured or given on the command line.
"""

from __future__ import annotations

from collections.abc import Sequence

from service.model import SourceDocument, SpecialSituation
from service.wording import STATED_BY_FINDING

#: concept names under which a coded value is a statement of what was found
FINDING_CONCEPTS: frozenset[tuple[str, str]] = frozenset(
    {("DCM", "121071"), ("DCM", "121073"), ("DCM", "121077")}
)

#: coded values that state a special situation
SITUATION_CODES: dict[tuple[str, str], SpecialSituation] = {
    ("SCT", "79619009"): SpecialSituation.mitral_stenosis,
    ("SCT", "45227007"): SpecialSituation.hypertrophic_cardiomyopathy,
    ("SCT", "195020003"): SpecialSituation.hypertrophic_cardiomyopathy,
    ("SCT", "90828009"): SpecialSituation.restrictive_cardiomyopathy,
}

#: where a situation came from, in words (the source's UID is in the result's evidence list)
SOURCE_FINDING = STATED_BY_FINDING


def situations_from_documents(
    documents: Sequence[SourceDocument],
) -> frozenset[SpecialSituation]:
    """The special situations the sources state by a coded finding (any of them)."""
    found: set[SpecialSituation] = set()
    for doc in documents:
        for item in doc.coded_items:
            if item.concept.key in FINDING_CONCEPTS:
                situation = SITUATION_CODES.get(item.value.key)
                if situation is not None:
                    found.add(situation)
    return frozenset(found)
