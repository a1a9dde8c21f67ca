"""Malformed input, offline: valid echo SRs (invented, Harbour Vale Cardiac Centre) mutated by
hypothesis (seeded: derandomize=True; bounded example counts).

Every case must come out of the grading as ``rejected`` or ``not-gradable`` with a reason (or
still ``graded`` when the mutation left a gradable object): never an exception from
``grade_study``, never a traceback or an "internal error" from ``diastolic-sr grade``.

The mutations (also used by ``test_fuzz_network.py``): truncated files, flipped bytes, wrong
VRs, absent and empty sequences, absurd and non-numeric values, unknown units, by-reference
items pointing anywhere (cycles among them), huge and deeply nested sequences, and SOP classes
that do not fit the content.
"""

from __future__ import annotations

import contextlib
import copy
import io
import json
from collections.abc import Callable
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pydicom import Dataset
from pydicom.dataelem import RawDataElement
from pydicom.sequence import Sequence as DicomSequence
from pydicom.tag import Tag

from service.cli import main
from service.model import Code, Measure
from service.pipeline import GradeOptions, GradeStatus, grade_study
from service.sr.echo_builder import (
    PRE,
    EchoItem,
    Encoding,
    Patient,
    Study,
    Template,
    build_echo_sr,
    code_item,
    container,
    num_item,
)
from service.vocabulary.standard import code

LVEF = code(PRE[Measure.lvef])
MITRAL_E = code(PRE[Measure.mitral_e])
#: SNOMED CT rhythm findings (the values the reader maps, service.pipeline.AF_VALUES/SINUS_VALUES)
RHYTHMS = [
    Code(value="64730000", scheme="SCT", meaning="Normal sinus rhythm"),
    Code(value="49436004", scheme="SCT", meaning="Atrial fibrillation"),
]

FUZZ = settings(
    max_examples=30,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)

# Complete, gradable base objects: one per template shape.
_VALUES = {
    Measure.lvef: (60, "%"),
    Measure.mitral_e: (82, "cm/s"),
    Measure.mitral_a: (61, "cm/s"),
    Measure.e_prime_septal: (6.1, "cm/s"),
    Measure.e_prime_lateral: (8.2, "cm/s"),
    Measure.tr_peak_velocity: (3.0, "m/s"),
    Measure.lavi: (38, "ml/m2"),
}


def base_sr(template: Template = Template.tid5300, seed: str = "fuzz") -> Dataset:
    enc = Encoding.tid5200 if template is Template.tid5200 else Encoding.pre
    items = [EchoItem(measure=m, value=v, unit=u, encoding=enc) for m, (v, u) in _VALUES.items()]
    return build_echo_sr(
        items,
        patient=Patient(name="Fuzzcase^Iris", id="HV-FZ-0001"),
        study=Study(seed=seed, accession="HVFZ0001"),
        template=template,
    )


_BASES = {t: base_sr(t) for t in Template}


def encode(ds: Dataset) -> bytes:
    buf = io.BytesIO()
    ds.save_as(buf, enforce_file_format=True)
    return buf.getvalue()


# ---------------------------------------------------------------------------------------------
# mutations of a dataset (in place); each returns a short description
# ---------------------------------------------------------------------------------------------


def all_items(ds: Dataset) -> list[Dataset]:
    """Every dataset in the object (the top level and every sequence item), depth first."""
    out = [ds]
    for elem in list(ds):
        if elem.VR == "SQ" and elem.value is not None:
            for item in elem.value:
                out.extend(all_items(item))
    return out


def content_items(ds: Dataset) -> list[Dataset]:
    """Every SR content item (datasets with a Value Type) below the root."""
    return [d for d in all_items(ds)[1:] if "ValueType" in d]


def sequences(ds: Dataset) -> list[tuple[Dataset, int]]:
    """(owner, tag) of every sequence element in the object."""
    out = []
    for d in all_items(ds):
        for elem in d:
            if elem.VR == "SQ":
                out.append((d, int(elem.tag)))
    return out


def raw(tag: int, vr: str, value: bytes) -> RawDataElement:
    """An element exactly as bytes (pydicom keeps it undecoded until read): how wrong VRs and
    unparseable values reach the reader."""
    if len(value) % 2:
        value += b" "
    return RawDataElement(Tag(tag), vr, len(value), value, 0, False, True)


def m_delete_element(ds: Dataset, draw: Callable) -> str:
    target = draw(st.sampled_from(all_items(ds)))
    tags = [int(e.tag) for e in target]
    if not tags:
        return "nothing to delete"
    tag = draw(st.sampled_from(tags))
    del target[tag]
    return f"deleted {Tag(tag)}"


def m_empty_sequence(ds: Dataset, draw: Callable) -> str:
    owner, tag = draw(st.sampled_from(sequences(ds)))
    owner[tag].value = DicomSequence([])
    return f"emptied {Tag(tag)}"


def m_wrong_vr(ds: Dataset, draw: Callable) -> str:
    """A known element written with another VR and a value that does not fit either."""
    target = draw(st.sampled_from(all_items(ds)))
    tags = [int(e.tag) for e in target]
    if not tags:
        return "no element"
    tag = draw(st.sampled_from(tags))
    vr = draw(st.sampled_from(["US", "FD", "UL", "DS", "IS", "DA", "UI", "OB", "CS"]))
    value = draw(st.binary(min_size=0, max_size=24))
    target[tag] = raw(tag, vr, value)
    return f"{Tag(tag)} as {vr} {value!r}"


_ABSURD = [
    b"1e308",
    b"-1e308",
    b"-5",
    b"0",
    b"NaN",
    b"inf",
    b"-inf",
    b"abc",
    b"1.2.3",
    b"",
    b"\x00\x01\x02",
    b"99999999999999999999999999",
    b"1\\2\\3",
    b"  ",
]


def m_absurd_value(ds: Dataset, draw: Callable) -> str:
    nums = [d for d in content_items(ds) if d.get("ValueType") == "NUM"]
    if not nums:
        return "no NUM"
    item = draw(st.sampled_from(nums))
    value = draw(st.sampled_from(_ABSURD))
    for mv in item.get("MeasuredValueSequence", []):
        mv[0x0040A30A] = raw(0x0040A30A, "DS", value)
        if draw(st.booleans()):
            mv[0x0040A161] = raw(0x0040A161, "FD", value[:8].ljust(8, b"\x00"))
    return f"NUM value {value!r}"


def m_unknown_unit(ds: Dataset, draw: Callable) -> str:
    nums = [d for d in content_items(ds) if d.get("ValueType") == "NUM"]
    if not nums:
        return "no NUM"
    item = draw(st.sampled_from(nums))
    value = draw(st.sampled_from(["[furlong]/[fortnight]", "mm[Hg]", "xyz", "", "1", "cm/s2"]))
    scheme = draw(st.sampled_from(["UCUM", "99X", ""]))
    for mv in item.get("MeasuredValueSequence", []):
        units = mv.get("MeasurementUnitsCodeSequence")
        if units:
            units[0].CodeValue = value or " "
            units[0].CodingSchemeDesignator = scheme or " "
    return f"unit {value!r} ({scheme!r})"


def m_by_reference(ds: Dataset, draw: Callable) -> str:
    """By-reference items (PS3.3 C.17.3.2.5) pointing at the root, their own ancestors (a
    cycle), nowhere, or at nonsense."""
    containers = [ds] + [d for d in content_items(ds) if "ContentSequence" in d]
    owner = draw(st.sampled_from(containers))
    target = draw(
        st.sampled_from([[1], [1, 1], [1, 1, 1], [1, 2, 1], [9999], [0], [1, 1, 1, 1, 1, 1, 1], []])
    )
    n = draw(st.integers(1, 5))
    for _ in range(n):
        ref = Dataset()
        ref.RelationshipType = draw(
            st.sampled_from(["CONTAINS", "INFERRED FROM", "HAS PROPERTIES"])
        )
        ref.ReferencedContentItemIdentifier = target
        owner.setdefault("ContentSequence", DicomSequence([]))
        owner.ContentSequence.append(ref)
    return f"{n} by-reference item(s) to {target}"


def m_huge_sequence(ds: Dataset, draw: Callable) -> str:
    """Thousands of NUM items in one container, or a container nested far too deep."""
    if draw(st.booleans()):
        n = draw(st.sampled_from([300, 1000, 3000]))
        nums = [num_item(LVEF if i % 2 else MITRAL_E, float(i % 97), "%") for i in range(n)]
        ds.ContentSequence.append(container(code("finding_site"), nums))
        return f"{n} NUM items in one container"
    depth = draw(st.sampled_from([70, 200, 400]))
    inner = container(code("finding_site"), [num_item(LVEF, 55.0, "%")])
    for _ in range(depth):
        inner = container(code("finding_site"), [inner])
    ds.ContentSequence.append(inner)
    return f"containers nested {depth} deep"


_WRONG_CLASSES = [
    "1.2.840.10008.5.1.4.1.1.2",  # CT Image Storage
    "1.2.840.10008.5.1.4.1.1.104.1",  # Encapsulated PDF Storage
    "1.2.840.10008.5.1.4.1.1.88.11",  # Basic Text SR: NUM items are not allowed there
    "1.2.840.10008.5.1.4.1.1.88.59",  # Key Object Selection Document
    "1.2.840.10008.5.1.4.1.1.88.72",  # Simplified Adult Echo SR with arbitrary content
    "1.2.3.4",
    "not-a-uid",
]


def m_wrong_sop_class(ds: Dataset, draw: Callable) -> str:
    uid = draw(st.sampled_from(_WRONG_CLASSES))
    ds.SOPClassUID = uid
    if hasattr(ds, "file_meta"):
        ds.file_meta.MediaStorageSOPClassUID = uid
    return f"SOP class {uid}"


def m_odd_codes(ds: Dataset, draw: Callable) -> str:
    """Concept names replaced by unknown, empty or malformed codes."""
    items = content_items(ds)
    item = draw(st.sampled_from(items))
    seq = item.get("ConceptNameCodeSequence")
    if not seq:
        return "no concept name"
    seq[0].CodeValue = draw(st.sampled_from(["", " ", "999999-9", "x" * 16]))
    seq[0].CodingSchemeDesignator = draw(st.sampled_from(["", "LN", "SCT", "99ZZ"]))
    if draw(st.booleans()):
        item.ConceptNameCodeSequence = DicomSequence([])
    return "odd concept name"


def m_rhythm_conflict(ds: Dataset, draw: Callable) -> str:
    """Several contradictory Cardiac Rhythm items."""
    values = draw(st.lists(st.sampled_from(RHYTHMS), min_size=1, max_size=4))
    for value in values:
        ds.ContentSequence.append(code_item(code("cardiac_rhythm"), value, "CONTAINS"))
    return f"{len(values)} rhythm item(s)"


MUTATIONS: dict[str, Callable[[Dataset, Callable], str]] = {
    "delete_element": m_delete_element,
    "empty_sequence": m_empty_sequence,
    "wrong_vr": m_wrong_vr,
    "absurd_value": m_absurd_value,
    "unknown_unit": m_unknown_unit,
    "by_reference": m_by_reference,
    "huge_sequence": m_huge_sequence,
    "wrong_sop_class": m_wrong_sop_class,
    "odd_codes": m_odd_codes,
    "rhythm_conflict": m_rhythm_conflict,
}


@st.composite
def mutated_datasets(draw: Callable, max_mutations: int = 3) -> tuple[Dataset, list[str]]:
    template = draw(st.sampled_from(list(Template)))
    ds = copy.deepcopy(_BASES[template])
    names = draw(st.lists(st.sampled_from(sorted(MUTATIONS)), min_size=1, max_size=max_mutations))
    done = [f"{name}: {MUTATIONS[name](ds, draw)}" for name in names]
    return ds, done


@st.composite
def damaged_bytes(draw: Callable) -> tuple[bytes, str]:
    """Part 10 bytes truncated anywhere, or with a run of bytes overwritten."""
    data = encode(_BASES[draw(st.sampled_from(list(Template)))])
    if draw(st.booleans()):
        cut = draw(st.integers(0, len(data) - 1))
        return data[:cut], f"truncated at {cut} of {len(data)}"
    at = draw(st.integers(132, len(data) - 1))
    junk = draw(st.binary(min_size=1, max_size=16))
    return data[:at] + junk + data[at + len(junk) :], f"{len(junk)} byte(s) overwritten at {at}"


# ---------------------------------------------------------------------------------------------
# checks
# ---------------------------------------------------------------------------------------------

ALLOWED = {GradeStatus.graded, GradeStatus.not_gradable, GradeStatus.rejected}


def check_outcome(ds: Dataset, what: object) -> None:
    outcome = grade_study([ds], GradeOptions())  # must not raise
    assert outcome.status in ALLOWED, what
    if outcome.status is not GradeStatus.graded:
        assert outcome.reason.strip(), f"{outcome.status} without a reason: {what}"
    if outcome.result is not None:
        encode(outcome.result)  # the result, if any, can be written


def grade_cli(path: Path) -> tuple[int, dict | None, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code_ = main(["grade", str(path), "--json"])
    lines = [ln for ln in out.getvalue().splitlines() if ln.strip()]
    return code_, (json.loads(lines[0]) if lines else None), err.getvalue()


def check_cli(path: Path, what: object) -> None:
    code_, row, err = grade_cli(path)
    assert "Traceback" not in err and "internal error" not in err, (what, err)
    assert code_ in (0, 1), (what, code_, err)
    assert row is not None, what
    assert row["status"] in {s.value for s in ALLOWED}, (what, row)
    if row["status"] != GradeStatus.graded.value:
        assert (row.get("reason") or "").strip(), (what, row)
    assert row["caution"]  # every row carries the caution (service.model.CAUTION)


# ---------------------------------------------------------------------------------------------
# tests
# ---------------------------------------------------------------------------------------------


def test_bases_are_gradable():
    """The unmutated objects grade (otherwise every fuzz case would trivially be rejected)."""
    for ds in _BASES.values():
        assert grade_study([ds], GradeOptions()).status is GradeStatus.graded


@FUZZ
@given(case=mutated_datasets())
def test_mutated_dataset_never_raises(case):
    ds, what = case
    check_outcome(ds, what)


@settings(FUZZ, max_examples=20)
@given(case=mutated_datasets(max_mutations=2))
def test_mutated_file_graded_by_the_command_without_traceback(tmp_path_factory, case):
    ds, what = case
    path = tmp_path_factory.mktemp("fz") / "case.dcm"
    try:
        path.write_bytes(encode(ds))
    except Exception:  # pydicom cannot encode it: nothing that could arrive as a file
        return
    check_cli(path, what)


@settings(FUZZ, max_examples=20)
@given(case=damaged_bytes())
def test_damaged_file_is_rejected_or_graded_with_reason(tmp_path_factory, case):
    data, what = case
    path = tmp_path_factory.mktemp("fz") / "damaged.dcm"
    path.write_bytes(data)
    check_cli(path, what)


def test_truncated_file_is_rejected_with_reason(tmp_path):
    """A file cut in the middle of its content tree says so (not only 'not graded')."""
    data = encode(_BASES[Template.tid5300])
    path = tmp_path / "cut.dcm"
    path.write_bytes(data[: len(data) * 2 // 3])
    code_, row, _ = grade_cli(path)
    assert code_ == 1 and row is not None
    assert row["status"] == "rejected"
    assert "truncated" in row["reason"] or "unreadable" in row["reason"], row["reason"]


def test_by_reference_cycle_is_counted_not_followed():
    """A by-reference item pointing at its own ancestors (a cycle) is neither followed nor
    fatal (PS3.3 C.17.3.2.5: the reference names a content item by its position)."""
    ds = copy.deepcopy(_BASES[Template.tid5300])
    inner = ds.ContentSequence[0]
    ref = Dataset()
    ref.RelationshipType = "INFERRED FROM"
    ref.ReferencedContentItemIdentifier = [1, 1]  # its own parent: a cycle if followed
    inner.ContentSequence[0].ContentSequence = DicomSequence([ref])
    outcome = grade_study([ds], GradeOptions())
    assert outcome.status is GradeStatus.graded
    assert outcome.documents[0].by_reference_items == 1


@pytest.mark.parametrize("uid", _WRONG_CLASSES[:2])
def test_non_sr_class_is_rejected_naming_the_class(uid):
    ds = copy.deepcopy(_BASES[Template.tid5300])
    ds.SOPClassUID = uid
    outcome = grade_study([ds], GradeOptions())
    assert outcome.status is GradeStatus.rejected
    assert uid in outcome.reason and "not an SR class" in outcome.reason


def test_deep_nesting_is_cut_with_a_warning():
    ds = copy.deepcopy(_BASES[Template.tid5300])
    inner = container(code("finding_site"), [num_item(LVEF, 55.0, "%")])
    for _ in range(300):
        inner = container(code("finding_site"), [inner])
    ds.ContentSequence.append(inner)
    outcome = grade_study([ds], GradeOptions())  # no RecursionError
    assert outcome.status in ALLOWED
    assert any("deeper than" in w for w in outcome.documents[0].warnings)
