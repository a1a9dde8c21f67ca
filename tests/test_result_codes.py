"""The result SR's code list (service/sr/codes.py) against outside sources.

Standard codes: checked against pydicom 3.0.2's bundled PS3.16 dictionary
(``pydicom.sr._concepts_dict.concepts``: scheme -> keyword -> {code: (meaning, [CIDs])}).
Every standard code the module declares is present there (none is marked "from memory");
where the module cites a context group ("PS3.16 CID n"), membership in that CID is checked
too.  Private codes: the rules of PS3.3 section 8 for code values (SH, 16 characters) and
meanings (LO, 64 characters), uniqueness, and use of the declared designator.
"""

from __future__ import annotations

import re

import pytest
from pydicom.sr._concepts_dict import concepts

from service.model import (
    SETTABLE_RHYTHMS,
    FillingPressure,
    Grade,
    Guideline,
    Measure,
    Pathway,
    Rhythm,
)
from service.model import SpecialSituation as SS
from service.sr import codes as C

try:
    from test_write import CASES, build, walk
except ImportError:  # pragma: no cover
    from tests.test_write import CASES, build, walk


def _pydicom_entries(scheme: str, value: str) -> list[tuple[str, list[int]]]:
    return [
        (meaning, list(cids))
        for by_code in concepts.get(scheme, {}).values()
        for code, (meaning, cids) in by_code.items()
        if code == value
    ]


@pytest.mark.parametrize("code", C.STANDARD, ids=lambda c: f"{c.value}-{c.scheme}")
def test_standard_code_in_pydicom_dictionary(code):
    # PS3.16 via pydicom's bundled dictionary; a code recalled from memory would be marked
    assert not code.from_memory
    entries = _pydicom_entries(code.scheme, code.value)
    assert entries, f"{code.value} {code.scheme} not in pydicom's PS3.16 dictionary"
    meanings = {m for m, _ in entries}
    assert code.meaning in meanings, f"{code.value}: {code.meaning!r} not in {meanings}"
    cid = re.match(r"PS3\.16 CID (\d+)$", code.source)
    if cid:
        cids = {c for m, cs in entries if m == code.meaning for c in cs}
        assert int(cid.group(1)) in cids, f"{code.value} not in CID {cid.group(1)} ({cids})"


def test_every_standard_code_cites_a_source():
    for code in C.STANDARD:
        assert code.source.startswith(("PS3.16", "SNOMED CT", "LOINC")), code


@pytest.mark.parametrize("code", C.all_codes(), ids=lambda c: f"{c.value}-{c.scheme}")
def test_code_lengths(code):
    # PS3.3 section 8.1: Code Value SH (16 chars), Code Meaning LO (64 chars), no backslash
    assert 0 < len(code.value) <= 16
    assert 0 < len(code.meaning) <= 64
    assert "\\" not in code.meaning
    assert code.scheme in {"DCM", "SCT", "LN", C.PRIVATE_SCHEME}


def test_private_codes_unique_and_in_declared_scheme():
    values = [c.value for c in C.PRIVATE]
    assert len(values) == len(set(values))
    assert all(c.scheme == "99DSRG" for c in C.PRIVATE)
    # "99" prefix marks a local coding scheme (PS3.3 section 8.2); SH, at most 16 characters
    assert C.PRIVATE_SCHEME.startswith("99") and len(C.PRIVATE_SCHEME) <= 16
    assert len({c.meaning for c in C.PRIVATE}) == len(C.PRIVATE)


def test_private_code_values_frozen():
    # never change a code's meaning: these pairs are part of the published code list
    frozen = {
        "DFGRADE": "LV diastolic function grade",
        "LVFILLPRESSURE": "Estimated LV filling pressure",
        "DFG-NORMAL": "Normal diastolic function",
        "DFG-1": "Grade I diastolic dysfunction",
        "DFG-2": "Grade II diastolic dysfunction",
        "DFG-3": "Grade III diastolic dysfunction",
        "DFG-INDET": "Diastolic function indeterminate",
        "DFG-NOTGRADABLE": "Diastolic function not gradable",
        "CRITMET": "Criterion met",
        "CRITNOTMET": "Criterion not met",
        "EEPRIMEAVERAGE": "Mitral E / average e' ratio",
        "CAUTION": "Decision support caution",
    }
    have = {c.value: c.meaning for c in C.PRIVATE}
    for value, meaning in frozen.items():
        assert have[value] == meaning


def test_value_sets_cover_every_enum_member():
    assert set(C.GRADE_VALUES) == set(Grade)
    assert set(C.FILLING_PRESSURE_VALUES) == set(FillingPressure)
    assert set(C.GUIDELINE_VALUES) == set(Guideline)
    assert set(C.PATHWAY_VALUES) == set(Pathway)
    # a rhythm of another kind is written with the source's own code (tests/test_stated_rhythm.py)
    assert set(C.RHYTHM_VALUES) == set(SETTABLE_RHYTHMS) == set(Rhythm) - {Rhythm.other}
    assert set(C.SPECIAL_SITUATION_VALUES) == set(SS)
    assert set(C.MEASURE_CONCEPTS) == set(Measure)
    # grade values are distinct codes (one closed value set)
    assert len({c.value for c in C.GRADE_VALUES.values()}) == len(Grade)


def test_filling_pressure_values_are_standard():
    # PS3.16 CID 3642: Elevated / Normal Range; CID 222 Normality Undetermined; CID 230
    assert C.FILLING_PRESSURE_VALUES[FillingPressure.elevated].value == "75540009"
    assert C.FILLING_PRESSURE_VALUES[FillingPressure.normal].value == "260395002"
    assert C.FILLING_PRESSURE_VALUES[FillingPressure.indeterminate].value == "371934000"
    assert C.FILLING_PRESSURE_VALUES[FillingPressure.not_estimated].value == "373068000"


def test_units_are_canonical_ucum():
    from service.model import CANONICAL_UNITS

    for unit in CANONICAL_UNITS.values():
        assert unit in C.UNIT_MEANINGS, unit
        assert C.unit_code(unit).scheme_designator == "UCUM"


@pytest.mark.parametrize("case", sorted(CASES))
def test_output_uses_only_listed_codes(case):
    # every coded concept in a result is in the code list (units aside: UCUM codes)
    listed = {(c.value, c.scheme): c.meaning for c in C.all_codes()}
    ds = build(case)
    seen = 0
    for _, item in [(0, ds), *walk(ds)]:
        for kw in ("ConceptNameCodeSequence", "ConceptCodeSequence"):
            for code in item.get(kw, []):
                key = (code.CodeValue, code.CodingSchemeDesignator)
                assert key in listed, key
                assert code.CodeMeaning == listed[key]
                seen += 1
    assert seen > 20
