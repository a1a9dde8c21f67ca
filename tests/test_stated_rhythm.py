"""A rhythm the source SR states by a coded Cardiac Rhythm item decides the route, ahead of any
configured default; a stated rhythm that is neither sinus rhythm nor atrial fibrillation
(atrial flutter, sinus tachycardia, a paced rhythm) gets no grade and no estimate.

Outside sources:
- pydicom's bundled PS3.16 dictionary (``pydicom.sr._concepts_dict``, ``pydicom.sr._cid_dict``)
  for every rhythm code the reader knows: CID 3415 "Cardiac Rhythm" (MDC), CID 3826 (normal
  sinus rhythm, SCT), CID 3230 (atrial fibrillation, SCT), CID 230 ("Undetermined") and CID
  3703 ("Unknown"); 106067008 SCT "Sinus rhythm" is from memory (not in the dictionary).
- Nagueh SF et al., J Am Soc Echocardiogr 2016;29:277–314: the algorithms of Figures 8A/8B are
  for sinus rhythm, §VI gives criteria of their own for atrial fibrillation, and the mitral
  inflow table says that in atrial flutter E, E/A and DT are not usable.
- dicom3tools ``dciodvfy`` for the result that carries the source's rhythm code.
Patients and values are invented (fictional Harbour Vale Cardiac Centre).
"""

from __future__ import annotations

import pytest
from grading_builders import GRADE_2_STUDY
from pydicom.sr._cid_dict import cid_concepts
from pydicom.sr._concepts_dict import concepts
from test_write import walk

from service.config import config_from_dict
from service.errors import UserError
from service.model import (
    Code,
    Context,
    FillingPressure,
    Grade,
    Guideline,
    Outcome,
    Pathway,
    Rhythm,
)
from service.pipeline import (
    AF_VALUES,
    SINUS_VALUES,
    UNSTATED_VALUES,
    GradeOptions,
    grade_study,
)
from service.sr.echo_builder import EchoItem, Patient, Study, build_echo_sr
from service.wording import headline, rhythm_name

FLUTTER = Code(value="10:9456", scheme="MDC", meaning="Atrial flutter")
SINUS_TACHY = Code(value="10:9264", scheme="MDC", meaning="Sinus Tachycardia")
PACED = Code(value="10:10240", scheme="MDC", meaning="Ventricular Demand Mode Pacing")
SINUS_BRADY = Code(value="10:9248", scheme="MDC", meaning="Sinus Bradycardia")
UNDETERMINED = Code(value="373068000", scheme="SCT", meaning="Undetermined")
#: a normal-LVEF study that the sinus algorithm grades (grade II) when nothing else applies
VALUES = GRADE_2_STUDY


def _sr(seed: str, rhythm: Code | None):
    return build_echo_sr(
        [EchoItem(measure=m, value=v) for m, v in VALUES.items()],
        patient=Patient(name="Wrenfield^Tamsin", id="HV-R-0001"),
        study=Study(seed=seed),
        rhythm=rhythm,
    )


def _options(guideline: Guideline = Guideline.ase_eacvi_2016, rhythm=Rhythm.sinus):
    # the sender's configured default says sinus rhythm: a stated rhythm must win over it
    return GradeOptions(
        guideline=guideline,
        context=Context(rhythm=rhythm, rhythm_source="the configured default"),
    )


def _cid_members(cid: int, scheme: str) -> dict[str, str]:
    """value -> meaning of every code of ``scheme`` in CID ``cid`` of pydicom's dictionary."""
    out = {}
    for keyword in cid_concepts[cid].get(scheme, []):
        for value, (meaning, _cids) in concepts[scheme][keyword].items():
            out[value] = meaning
    return out


def test_every_rhythm_code_read_is_in_the_standards_dictionary() -> None:
    cid3415 = _cid_members(3415, "MDC")
    mdc_sinus = {v for s, v in SINUS_VALUES if s == "MDC"}
    assert mdc_sinus and all("sinus" in cid3415[v].lower() for v in mdc_sinus)
    assert "tachycardia" not in " ".join(cid3415[v].lower() for v in mdc_sinus)
    assert _cid_members(3826, "SCT")["64730000"] == "normal sinus rhythm"
    assert cid3415["10:9472"] == "Atrial fibrillation"
    assert _cid_members(3230, "SCT")["49436004"] == "Atrial Fibrillation"
    assert {("SCT", "49436004"), ("MDC", "10:9472")} == AF_VALUES
    assert _cid_members(230, "SCT")["373068000"] == "Undetermined"
    assert _cid_members(3703, "SCT")["261665006"] == "Unknown"
    assert {("SCT", "373068000"), ("SCT", "261665006")} == UNSTATED_VALUES
    # the other rhythms these tests state are CID 3415 members too
    for code in (FLUTTER, SINUS_TACHY, PACED, SINUS_BRADY):
        assert cid3415[code.value] == code.meaning


@pytest.mark.parametrize("guideline", [Guideline.ase_eacvi_2016, Guideline.ase_2025])
def test_stated_atrial_flutter_gets_no_grade_whatever_the_default(guideline) -> None:
    # without a stated rhythm the configured sinus default grades the study (grade II) ...
    plain = grade_study([_sr("rh-plain", None)], _options(guideline)).assessment
    assert plain.grade is Grade.grade_2
    # ... but atrial flutter stated by the SR is never graded by the sinus algorithm
    outcome = grade_study([_sr("rh-flutter", FLUTTER)], _options(guideline))
    a = outcome.assessment
    assert a.rhythm is Rhythm.other and a.rhythm_code == FLUTTER
    assert a.pathway is Pathway.not_applicable
    assert a.grade is Grade.not_applicable
    assert a.filling_pressure is FillingPressure.not_estimated
    assert a.outcome is Outcome.special_situation
    assert not a.criteria
    assert headline(a) == (
        "Grade not applicable in atrial flutter: the standard algorithm does not apply; "
        "LV filling pressure not estimated."
    )
    assert a.pathway_reason.startswith(
        "atrial flutter (stated by a coded Cardiac Rhythm item in the source SR): the "
    )
    # the result SR carries the source's own code for the rhythm
    [item] = [
        i
        for _depth, i in walk(outcome.result)
        if i.ConceptNameCodeSequence[0].CodeValue == "8884-9"
    ]
    value = item.ConceptCodeSequence[0]
    assert (value.CodeValue, value.CodingSchemeDesignator, value.CodeMeaning) == (
        "10:9456",
        "MDC",
        "Atrial flutter",
    )


@pytest.mark.parametrize("code", [SINUS_TACHY, PACED], ids=["sinus-tachycardia", "paced"])
def test_any_other_stated_rhythm_is_not_graded(code) -> None:
    a = grade_study([_sr(f"rh-{code.value}", code)], _options()).assessment
    assert a.grade is Grade.not_applicable and a.rhythm_code == code
    assert f"in {rhythm_name(code)}:" in headline(a)


def test_stated_sinus_bradycardia_is_sinus_rhythm_and_undetermined_is_no_statement() -> None:
    brady = grade_study([_sr("rh-brady", SINUS_BRADY)], _options(rhythm=Rhythm.af)).assessment
    assert brady.rhythm is Rhythm.sinus and brady.grade is Grade.grade_2
    # "Undetermined" states nothing: the configured default (here AF) applies
    und = grade_study([_sr("rh-und", UNDETERMINED)], _options(rhythm=Rhythm.af)).assessment
    assert und.rhythm is Rhythm.af and und.pathway is Pathway.atrial_fibrillation


def test_rhythm_names_read_as_prose() -> None:
    assert rhythm_name(PACED) == "ventricular demand mode pacing"
    assert rhythm_name(
        Code(value="10:9536", scheme="MDC", meaning="AV junctional (nodal) rhythm")
    ) == ("AV junctional (nodal) rhythm")
    assert rhythm_name(None) == "a rhythm other than sinus rhythm or atrial fibrillation"


def test_other_is_never_configured_and_needs_its_code() -> None:
    with pytest.raises(UserError) as info:
        config_from_dict({"senders": {"HV_ECHO": {"rhythm": "other"}}})
    assert "senders.HV_ECHO.rhythm" in str(info.value)
    assert "only ever stated by an SR" in str(info.value)
    with pytest.raises(ValueError):
        Context(rhythm=Rhythm.other)
    with pytest.raises(ValueError):
        Context(rhythm=Rhythm.sinus, rhythm_code=FLUTTER)
    Context(rhythm=Rhythm.other, rhythm_code=FLUTTER)  # valid


def test_command_line_offers_only_settable_rhythms(capsys) -> None:
    from service.cli import main

    with pytest.raises(SystemExit) as info:
        main(["grade", "--rhythm", "other", "nothing.dcm"])
    assert info.value.code == 2
    assert "invalid choice: 'other'" in capsys.readouterr().err


@pytest.mark.external
def test_the_flutter_result_passes_dciodvfy_and_dcmtk_reads_it(tmp_path) -> None:
    from test_result_validators import dciodvfy, dsrdump

    outcome = grade_study([_sr("rh-dciodvfy", FLUTTER)], _options())
    path = tmp_path / "flutter.result.dcm"
    outcome.result.save_as(path, enforce_file_format=True)
    _rc, lines = dciodvfy(str(path))
    errors = [line for line in lines if line.startswith("Error")]
    assert not errors, "\n".join(lines)
    rc, out, _err = dsrdump(str(path))
    assert rc == 0
    assert 'CODE:(8884-9,LN,"Cardiac Rhythm")=(10:9456,MDC,"Atrial flutter")' in out
    assert "Grade not applicable in atrial flutter" in out
