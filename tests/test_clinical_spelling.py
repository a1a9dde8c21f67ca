"""Measure and situation names keep their clinical spelling wherever a sentence is built from
them: LAVI, TR, E/A, LVEF, IVRT, LAP, LBBB and e′, never "lAVI", "tR", "e/A", "iVRT", "lAP",
"Lbbb" or "E′".

Sources: the measure names and abbreviations are those of Nagueh SF et al., J Am Soc
Echocardiogr 2016;29:277–314 and 2025;38(7) (e′ is the early diastolic mitral annular velocity,
E the mitral inflow E wave: two different measures, so the case of the letter matters); LBBB
(left bundle branch block) is written in capitals by common practice.  pdftotext (Debian
poppler-utils) reads the summary PDF.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest
from grading_builders import measurements

from service.grading import RuleSwitches, assess
from service.grading import readings as R
from service.grading import thresholds_ase2016 as T16
from service.grading import thresholds_ase2025 as T25
from service.grading.ase2025 import Ase2025Options
from service.grading.compare import assess_all
from service.grading.criteria import Threshold
from service.model import (
    Assessment,
    AssessmentSet,
    Context,
    Guideline,
    Rhythm,
    SpecialSituation,
)
from service.wording import (
    MEASURE_NAMES,
    SITUATION_NAMES,
    headline,
    in_sentence,
    sentence_start,
)

#: a name after other words: only an ordinary capitalised first word is lowered
IN_SENTENCE = {
    "LAVI": "LAVI",
    "LVEF": "LVEF",
    "IVRT": "IVRT",
    "PASP": "PASP",
    "BMI": "BMI",
    "E/A": "E/A",
    "TR peak velocity": "TR peak velocity",
    "LA reservoir strain": "LA reservoir strain",
    "LA volume index": "LA volume index",
    "PA systolic pressure": "PA systolic pressure",
    "Ar-A duration": "Ar-A duration",
    "Ar − A duration": "Ar − A duration",
    "E deceleration time": "E deceleration time",
    "LAP indeterminate: no grade": "LAP indeterminate: no grade",
    "Septal e′": "septal e′",
    "Lateral E/e′": "lateral E/e′",
    "Average E/e′": "average E/e′",
    "Mitral E": "mitral E",
    "Pulmonary-vein S/D": "pulmonary-vein S/D",
    "Peak acceleration rate of mitral E": "peak acceleration rate of mitral E",
    "Step 2: no supplementary marker is available": "step 2: no supplementary marker is available",
    "Input should be less than 100": "input should be less than 100",
}

#: the start of a sentence: only an ordinary lower-case first word gets its capital
SENTENCE_START = {
    "e′ is reduced when any of average": "e′ is reduced when any of average",
    "E/A of exactly 2 is grade III": "E/A of exactly 2 is grade III",
    "TR velocity and PASP are one criterion": "TR velocity and PASP are one criterion",
    "LBBB or ventricular pacing: no criteria": "LBBB or ventricular pacing: no criteria",
    "mitral stenosis: 1 of 2": "Mitral stenosis: 1 of 2",
    "pulmonary-vein S/D": "Pulmonary-vein S/D",
    "the guideline gives no number": "The guideline gives no number",
    "sinus rhythm assumed, no special situation": "Sinus rhythm assumed, no special situation",
}

#: what lowering or raising a first letter by hand makes of a clinical name
BROKEN = re.compile(
    r"\b(?:lAVI|lVEF|iVRT|pASP|bMI|tR|lA|lAP|pA|e/A|ar-A|ar − A|[Ll]bbb)\b|E′|\bSeptal E/e′ and"
)


def _threshold_names() -> set[str]:
    from service.grading import atrial_fibrillation, special_situations

    names: set[str] = set()
    for module in (T16, T25, atrial_fibrillation, special_situations):
        for value in vars(module).values():
            rows = value if isinstance(value, tuple) else (value,)
            names |= {row.name for row in rows if isinstance(row, Threshold)}
    return names


@pytest.mark.parametrize("text", list(IN_SENTENCE))
def test_in_sentence_keeps_clinical_spelling(text: str) -> None:
    assert in_sentence(text) == IN_SENTENCE[text]


@pytest.mark.parametrize("text", list(SENTENCE_START))
def test_sentence_start_keeps_clinical_spelling(text: str) -> None:
    assert sentence_start(text) == SENTENCE_START[text]


def test_every_name_the_service_uses_survives_both_ways() -> None:
    names = _threshold_names() | set(MEASURE_NAMES.values()) | set(SITUATION_NAMES.values())
    assert {"LAVI", "E/A", "LVEF", "TR peak velocity", "Septal e′"} <= names
    for name in names:
        for changed in (in_sentence(name), sentence_start(name), sentence_start(in_sentence(name))):
            assert changed[1:] == name[1:], (name, changed)  # only the first letter may change
            assert not BROKEN.search(changed), (name, changed)


def _prose(a: Assessment) -> list[str]:
    return [
        headline(a),
        a.pathway_reason,
        *a.reasoning,
        *a.notes,
        *(sentence_start(r.text) for r in a.readings),  # as the summary lists them
        *(f.text for f in a.borderline),
    ]


def _battery() -> list[AssessmentSet]:
    """Results whose sentences are built from measure and situation names: every special
    situation under both guidelines, a compared result left undecided by ASE 2025 (its
    reason quoted inside a sentence), single-site E/e′, missing criteria, the ASE 2025 site
    switches."""
    sinus = Context(rhythm=Rhythm.sinus, borderline_fraction=0.0)
    abnormal = dict(
        lvef=60,
        e_e_prime_average=17,
        e_prime_average=5,
        e_prime_septal=5,
        tr_peak_velocity=3.2,
        lavi=42,
        e_a_ratio=1.4,
        mitral_e=95,
        mitral_a=68,
        ar_a_duration=40,
    )
    out = []
    for situation in SpecialSituation:
        context = sinus.model_copy(update={"special_situations": frozenset({situation})})
        out.append(assess_all(measurements(**abnormal), context, Guideline.ase_eacvi_2016))
    # ASE 2025: step 1 discordant and no step-2 marker: "LAP indeterminate: no grade."
    undecided = dict(
        lvef=60,
        e_prime_septal=8,
        e_prime_lateral=11,
        e_prime_average=9.5,
        e_e_prime_average=15,
        tr_peak_velocity=2.5,
        e_a_ratio=1.0,
        mitral_e=80,
    )
    out.append(assess_all(measurements(**undecided), sinus, Guideline.ase_eacvi_2016))
    # single-site E/e′ (no average) and LAVI missing
    single = dict(
        lvef=60,
        e_e_prime_septal=17,
        e_e_prime_lateral=14,
        e_prime_septal=5,
        e_prime_lateral=7,
        tr_peak_velocity=3.2,
        e_a_ratio=1.4,
        mitral_e=95,
    )
    out.append(assess_all(measurements(**single), sinus, Guideline.ase_eacvi_2016))
    switched = RuleSwitches(
        ase2025=Ase2025Options(
            e_prime_sites="any-site", e_e_prime_sites="any-site", supplementary="hierarchy"
        )
    )
    for values in (abnormal, undecided, single):
        out.append(
            AssessmentSet(
                primary=assess(measurements(**values), sinus, Guideline.ase_2025, switched)
            )
        )
    return out


def test_no_sentence_breaks_a_clinical_name() -> None:
    seen = 0
    for s in _battery():
        texts = [t for a in (s.primary, *s.others) for t in _prose(a)] + list(s.disagreements)
        for text in texts:
            seen += 1
            assert not BROKEN.search(text), text
    assert seen > 100


def test_single_site_e_over_e_prime_note_names_the_sites_in_sentence() -> None:
    # Nagueh 2016, Figure 8 footnote: septal E/e′ > 15 or lateral E/e′ > 13 when only one site
    sinus = Context(rhythm=Rhythm.sinus, borderline_fraction=0.0)
    a = assess(
        measurements(lvef=60, e_e_prime_septal=17, e_e_prime_lateral=14, e_prime_septal=5),
        sinus,
        Guideline.ase_eacvi_2016,
    )
    assert (
        "Average E/e′ was not available; septal E/e′ and lateral E/e′ used with the single-site "
        "cut-off (septal > 15, lateral > 13)."
    ) in a.notes


def test_lbbb_conclusion_keeps_its_capitals() -> None:
    context = Context(
        rhythm=Rhythm.sinus,
        borderline_fraction=0.0,
        special_situations=frozenset({SpecialSituation.lbbb_or_ventricular_pacing}),
    )
    a = assess(measurements(lvef=60, mitral_e=80), context, Guideline.ase_eacvi_2016)
    assert headline(a).startswith("Grade not applicable in LBBB or ventricular pacing: ")
    assert a.reasoning[0].startswith("LBBB or ventricular pacing: ")


def _pdftotext() -> str:
    path = shutil.which("pdftotext", path="/usr/bin") or shutil.which("pdftotext")
    if path is None:
        if os.environ.get("CI"):
            pytest.fail("pdftotext (poppler-utils) is required in CI")
        pytest.skip("pdftotext (poppler-utils) not installed")
    return path


@pytest.mark.external
def test_summary_lists_a_reading_that_starts_with_e_prime_as_e_prime(tmp_path: Path) -> None:
    from test_summary_pdf import IDENTITY, RESULT_UID

    from service.report import render_summary_pdf

    switched = RuleSwitches(ase2025=Ase2025Options(e_prime_sites="any-site"))
    values = dict(lvef=60, e_prime_septal=5.5, e_prime_lateral=8, e_prime_average=6.75)
    m = measurements(**values, e_e_prime_average=10, tr_peak_velocity=2.2, e_a_ratio=0.7)
    a = assess(m, Context(rhythm=Rhythm.sinus), Guideline.ase_2025, switched)
    words = R.words("I-25-1", "any-site")
    assert words.startswith("e′ is reduced")
    assert any(r.text == words for r in a.readings)
    pdf = tmp_path / "summary.pdf"
    pdf.write_bytes(
        render_summary_pdf(AssessmentSet(primary=a), m, IDENTITY, result_sr_uid=RESULT_UID)
    )
    done = subprocess.run(
        [_pdftotext(), "-enc", "UTF-8", str(pdf), "-"], capture_output=True, check=True, timeout=60
    )
    text = " ".join(done.stdout.decode("utf-8").split())
    assert "e′ is reduced when any of average" in text
    assert not BROKEN.search(text), BROKEN.search(text)


def test_an_assumed_rhythm_is_said_once_in_an_ase_2025_result():
    # the study note says that sinus rhythm was assumed; the routing step does not say it again
    from service.demo.scenario import CASES, case_datasets
    from service.model import Guideline
    from service.pipeline import GradeOptions, grade_study

    case = next(c for c in CASES if c.key == "normal")
    outcome = grade_study(case_datasets(case), GradeOptions(guideline=Guideline.ase_2025))
    assessment = outcome.assessment
    said = [*outcome.assessments.context_notes, *assessment.notes, *assessment.reasoning]
    assert sum("assumed" in s for s in said) == 1, said
    assert any("ASE 2025 general algorithm for sinus rhythm" in s for s in assessment.reasoning)
