"""One-page PDF summary: renders for every outcome, text and fonts as a reader's tools see them.

External checks use Debian poppler-utils (``pdftoppm``, ``pdftotext``, ``pdffonts``,
``pdfinfo``).  Outside CI a missing tool skips the test; in CI (env ``CI`` set) it fails.
Assessments are built here directly, not by the grading engine.  All people are fictional
patients of the fictional Harbour Vale Cardiac Centre.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from functools import cache
from pathlib import Path

import pydicom
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from PIL import Image

from service import SOFTWARE_NAME, __version__
from service.errors import UserError
from service.model import (
    CANONICAL_UNITS,
    CAUTION,
    Assessment,
    AssessmentSet,
    BorderlineFlag,
    Comparison,
    Criterion,
    FillingPressure,
    Grade,
    Guideline,
    Measure,
    Measurements,
    MeasureValue,
    Origin,
    Pathway,
    Rhythm,
    SpecialSituation,
    SupportingFinding,
    Verdict,
)
from service.report import SummaryIdentity, identity_from_dataset, render_summary_pdf
from service.report.fonts import _reduced_copies
from service.report.summary_pdf import (
    OKABE_ITO,
    SourceDescription,
    font_files,
    format_number,
    marker_for,
    printable,
    scale_for,
)
from service.wording import headline

CITATION_2016 = "Nagueh SF et al. J Am Soc Echocardiogr 2016;29:277-314"
RESULT_UID = "2.25.301166477052781349187447612829761153841"


def tool(name: str) -> str:
    path = shutil.which(name)
    if path is None:
        if os.environ.get("CI"):
            pytest.fail(f"{name} (poppler-utils) is required in CI")
        pytest.skip(f"{name} (poppler-utils) not installed")
    return path


# ---------------------------------------------------------------------------------------------
# Cases, one per outcome
# ---------------------------------------------------------------------------------------------

IDENTITY = SummaryIdentity(
    patient_name="Quayle^Oona^Maren",
    patient_id="HVCC-204117",
    birth_date="19580312",
    age="068Y",
    sex="F",
    study_date="20261130",
    accession_number="HV26-88412",
    study_description="Transthoracic echocardiogram",
    institution="Harbour Vale Cardiac Centre",
    sources=(
        SourceDescription(
            sop_instance_uid="2.25.118406284712553399218805577402168510087",
            description="Adult echo measurements",
            manufacturer="Lanternfish Acoustics",
            model="Tidewater 5",
        ),
    ),
)


#: criterion labels as a reader sees them
NAMES = {
    Measure.e_prime_septal: "Septal e′",
    Measure.e_e_prime_average: "Average E/e′",
    Measure.e_e_prime_septal: "Septal E/e′",
    Measure.tr_peak_velocity: "TR velocity",
    Measure.lavi: "LAVI",
    Measure.e_a_ratio: "E/A",
    Measure.mitral_e: "Mitral E",
    Measure.lvef: "LVEF",
    Measure.deceleration_time: "DT",
}


def crit(
    cid: str, step: str, measure: Measure, op: Comparison, threshold: float, value: float | None
) -> Criterion:
    symbol = {">": ">", ">=": "≥", "<": "<", "<=": "≤"}[op.value]
    if value is None:
        verdict = Verdict.unavailable
    else:
        verdict = Verdict.met if op.holds(value, threshold) else Verdict.not_met
    return Criterion(
        id=cid,
        step=step,
        label=f"{NAMES[measure]} {symbol} {threshold:g}",
        measure=measure,
        value=value,
        unit=CANONICAL_UNITS[measure],
        comparison=op,
        threshold=threshold,
        verdict=verdict,
        source="Nagueh 2016 JASE 29:277",
    )


def measured(measure: Measure, value: float, origin: Origin = Origin.measured, n: int = 1):
    return MeasureValue(
        measure=measure, value=value, unit=CANONICAL_UNITS[measure], origin=origin, n=n
    )


def measurements_of(criteria: tuple[Criterion, ...], *extra: MeasureValue) -> Measurements:
    values = {c.measure: measured(c.measure, c.value) for c in criteria if c.value is not None}
    for mv in extra:
        values[mv.measure] = mv
    return Measurements(values=values)


def ase16(**kw) -> Assessment:
    base = {
        "guideline": Guideline.ase_eacvi_2016,
        "guideline_citation": CITATION_2016,
        "rule_set_version": "ase-eacvi-2016/1",
        "pathway": Pathway.normal_lvef,
        "pathway_reason": "LVEF 62 % is not reduced",
        "rhythm": Rhythm.sinus,
    }
    base.update(kw)
    return Assessment(**base)


A = "algorithm A"
B1 = "algorithm B step 1"
B2 = "algorithm B step 2"
M = Measure
C = Comparison


def algorithm_a(septal: float | None, avg: float | None, tr: float | None, lavi: float | None):
    # cut-offs: Nagueh 2016 JASE 29:277, Figure 8A
    return (
        crit("ase16.a.e_prime_septal", A, M.e_prime_septal, C.lt, 7, septal),
        crit("ase16.a.e_e_prime_average", A, M.e_e_prime_average, C.gt, 14, avg),
        crit("ase16.a.tr_peak_velocity", A, M.tr_peak_velocity, C.gt, 2.8, tr),
        crit("ase16.a.lavi", A, M.lavi, C.gt, 34, lavi),
    )


def case_normal():
    c = algorithm_a(9.4, 7.8, 2.3, 27)
    a = ase16(
        grade=Grade.normal,
        filling_pressure=FillingPressure.normal,
        criteria=c,
        reasoning=(
            "Septal e′ 9.4 cm/s against < 7 cm/s: not met.",
            "Average E/e′ 7.8 against > 14: not met.",
            "TR peak velocity 2.3 m/s against > 2.8 m/s: not met.",
            "LA volume index 27 mL/m² against > 34 mL/m²: not met.",
            "Algorithm A: 0 of 4 met (less than half): normal diastolic function.",
        ),
    )
    m = measurements_of(c, measured(M.lvef, 62), measured(M.age, 68, Origin.patient))
    return a, m


def case_grade_1():
    c = (
        crit("ase16.route.lvef", "routing", M.lvef, C.lt, 50, 41),
        crit("ase16.b1.e_a_low", B1, M.e_a_ratio, C.le, 0.8, 0.72),
        crit("ase16.b1.mitral_e_low", B1, M.mitral_e, C.le, 50, 46),
    )
    a = ase16(
        pathway=Pathway.reduced_lvef_or_myocardial_disease,
        pathway_reason="LVEF 41 % is below 50 %",
        grade=Grade.grade_1,
        filling_pressure=FillingPressure.normal,
        criteria=c,
        reasoning=(
            "LVEF 41 % is below 50 %: Algorithm B (Figure 8B) applies.",
            "Algorithm B: E/A 0.72 ≤ 0.8 and E 46 cm/s ≤ 50 cm/s: grade 1, normal pressure.",
        ),
        supporting=(
            SupportingFinding(
                name="Valsalva",
                text="E/A fell by 0.2 during Valsalva.",
                supports_elevated_pressure=False,
                agrees_with_result=True,
            ),
        ),
    )
    m = measurements_of(
        c,
        measured(M.mitral_a, 64, Origin.mean_of_repeats, 3),
        measured(M.e_a_ratio, 0.72, Origin.derived),
        measured(M.deceleration_time, 238, Origin.selected),
    )
    return a, m


def case_grade_2():
    c = (
        *algorithm_a(5.6, 14.6, 3.0, 39),
        crit("ase16.b1.e_a_high", B1, M.e_a_ratio, C.ge, 2, 1.3),
        crit("ase16.b2.e_e_prime_average", B2, M.e_e_prime_average, C.gt, 14, 14.6),
        crit("ase16.b2.tr_peak_velocity", B2, M.tr_peak_velocity, C.gt, 2.8, 3.0),
        crit("ase16.b2.lavi", B2, M.lavi, C.gt, 34, 39),
    )
    a = ase16(
        grade=Grade.grade_2,
        filling_pressure=FillingPressure.elevated,
        criteria=c,
        reasoning=(
            "Algorithm A: 4 of 4 met: diastolic dysfunction.",
            "Algorithm B: E/A 1.3 between the branches; step 2 applies.",
            "Step 2: 3 of 3 met: grade 2 with elevated filling pressure.",
        ),
        borderline=(
            BorderlineFlag(
                criterion_id="ase16.b2.e_e_prime_average",
                measure=M.e_e_prime_average,
                value=14.6,
                threshold=14,
                alternative_grade=Grade.grade_2,
                alternative_filling_pressure=FillingPressure.elevated,
                text="average E/e′ 14.6 lies within 10 % of the cut-off > 14.",
            ),
        ),
    )
    other = Assessment(
        guideline=Guideline.ase_2025,
        guideline_citation="ASE 2025",
        rule_set_version="ase-2025/1",
        pathway=Pathway.sinus_general,
        pathway_reason="sinus rhythm",
        grade=Grade.grade_2,
        filling_pressure=FillingPressure.elevated,
    )
    m = measurements_of(c, measured(M.mitral_e, 88, Origin.device_mean, 3))
    return AssessmentSet(primary=a, others=(other,)), m


def case_grade_3():
    c = (
        crit("ase16.route.lvef", "routing", M.lvef, C.lt, 50, 33),
        crit("ase16.b1.e_a_high", B1, M.e_a_ratio, C.ge, 2, 2.6),
    )
    a = ase16(
        pathway=Pathway.reduced_lvef_or_myocardial_disease,
        pathway_reason="LVEF 33 % is below 50 %",
        grade=Grade.grade_3,
        filling_pressure=FillingPressure.elevated,
        criteria=c,
        reasoning=(
            "LVEF 33 % is below 50 %: Algorithm B (Figure 8B) applies.",
            "Algorithm B: E/A ≥ 2: grade 3 with elevated filling pressure.",
        ),
    )
    return a, measurements_of(c)


def case_indeterminate():
    c = algorithm_a(6.1, 15.2, None, 30)  # TR velocity missing
    a = ase16(
        grade=Grade.indeterminate,
        filling_pressure=FillingPressure.indeterminate,
        criteria=c,
        reasoning=(
            "TR peak velocity not available; criterion not evaluated.",
            "Algorithm A: 2 of 3 available met: indeterminate.",
        ),
        notes=("TR peak velocity was not measured.",),
    )
    m = measurements_of(c).model_copy(update={"notes": ("E/A reported 0.9, computed 1.2.",)})
    return a, m


def case_not_gradable():
    a = ase16(
        grade=Grade.not_gradable,
        filling_pressure=FillingPressure.not_estimated,
        pathway_reason="none of the measurements the guideline uses is available",
        reasoning=("Not graded: none of the measurements the guideline uses is available.",),
    )
    return a, Measurements(values={M.age: measured(M.age, 68, Origin.patient)})


def case_af():
    step = "atrial fibrillation"
    c = (
        crit("af.e_e_prime_septal", step, M.e_e_prime_septal, C.gt, 11, 13.4),
        crit("af.mitral_e", step, M.mitral_e, C.ge, 100, 112),
        crit("af.deceleration_time", step, M.deceleration_time, C.le, 160, 148),
        crit("af.tr_peak_velocity", step, M.tr_peak_velocity, C.gt, 2.8, None),
    )
    a = Assessment(
        guideline=Guideline.ase_2025,
        guideline_citation="ASE 2025 recommendations on diastolic function",
        rule_set_version="ase-2025/1",
        pathway=Pathway.atrial_fibrillation,
        pathway_reason="atrial fibrillation, stated by a coded Cardiac Rhythm item",
        grade=Grade.not_applicable,
        filling_pressure=FillingPressure.elevated,
        rhythm=Rhythm.af,
        criteria=c,
        reasoning=(
            "Rhythm is atrial fibrillation: filling pressure only, no grade.",
            "3 of 3 available criteria met: elevated filling pressure.",
        ),
    )
    return a, measurements_of(c, measured(M.heart_rate, 92))


def case_special():
    a = ase16(
        pathway=Pathway.not_applicable,
        pathway_reason="moderate or severe mitral stenosis",
        special_situations=(SpecialSituation.mitral_stenosis,),
        grade=Grade.not_applicable,
        filling_pressure=FillingPressure.not_estimated,
        reasoning=("Mitral stenosis is flagged: the standard algorithm does not apply.",),
    )
    return a, measurements_of((), measured(M.mitral_e, 160), measured(M.lavi, 58))


#: case name → (builder, literal wording the reader must find on the page)
CASES = {
    "normal": (case_normal, "Normal diastolic function"),
    "grade-1": (case_grade_1, "Grade I diastolic dysfunction"),
    "grade-2": (case_grade_2, "Grade II diastolic dysfunction"),
    "grade-3": (case_grade_3, "Grade III diastolic dysfunction"),
    "indeterminate": (case_indeterminate, "Diastolic function indeterminate"),
    "not-gradable": (case_not_gradable, "Diastolic function not gradable"),
    "atrial-fibrillation": (
        case_af,
        "Grade not applicable in atrial fibrillation; LV filling pressure elevated by the "
        "ASE 2025 atrial-fibrillation criteria.",
    ),
    "special-situation": (case_special, "the standard algorithm does not apply"),
}
GUIDELINE_WORDS = {
    Guideline.ase_eacvi_2016: "ASE/EACVI 2016",
    Guideline.ase_2025: "ASE 2025",
}


def build(name: str) -> tuple[AssessmentSet, Measurements]:
    made, m = CASES[name][0]()
    return (made if isinstance(made, AssessmentSet) else AssessmentSet(primary=made)), m


@cache
def render(name: str, page_size: str = "A4") -> bytes:
    """Rendered once per case and page size (the rendering is deterministic)."""
    s, m = build(name)
    return render_summary_pdf(s, m, IDENTITY, result_sr_uid=RESULT_UID, page_size=page_size)


def pdf_text(pdf: Path) -> str:
    out = subprocess.run(
        [tool("pdftotext"), "-enc", "UTF-8", str(pdf), "-"],
        capture_output=True,
        check=True,
        timeout=30,
    )
    return " ".join(out.stdout.decode("utf-8").split())


def pdf_info(pdf: Path) -> dict[str, str]:
    out = subprocess.run(
        [tool("pdfinfo"), str(pdf)], capture_output=True, check=True, timeout=30, text=True
    )
    return dict(
        (k.strip(), v.strip()) for k, v in (ln.split(":", 1) for ln in out.stdout.splitlines())
    )


# ---------------------------------------------------------------------------------------------
# Rendering, per outcome
# ---------------------------------------------------------------------------------------------


@pytest.mark.external
@pytest.mark.parametrize("name", list(CASES))
def test_first_page_renders_to_a_non_blank_png(name: str, tmp_path: Path) -> None:
    pdf = tmp_path / "summary.pdf"
    pdf.write_bytes(render(name))
    # poppler-utils pdftoppm rasterises page 1 at 50 dpi
    subprocess.run(
        [
            tool("pdftoppm"),
            "-r",
            "50",
            "-f",
            "1",
            "-l",
            "1",
            "-png",
            "-singlefile",
            str(pdf),
            str(tmp_path / "page"),
        ],
        check=True,
        timeout=60,
    )
    with Image.open(tmp_path / "page.png") as img:
        # ISO 216 A4 = 210 x 297 mm → 413 x 585 px at 50 dpi (±1 for rounding)
        assert abs(img.width - 413) <= 1 and abs(img.height - 585) <= 1, img.size
        grey = img.convert("L")
        hist = grey.histogram()
        ink = sum(hist[:200])  # pixels clearly darker than paper
        assert ink > 0.01 * img.width * img.height, f"page looks blank ({ink} dark pixels)"


@pytest.mark.external
@pytest.mark.parametrize("name", list(CASES))
def test_text_has_conclusion_guideline_caution_and_footer(name: str, tmp_path: Path) -> None:
    pdf = tmp_path / "summary.pdf"
    pdf.write_bytes(render(name))
    text = pdf_text(pdf)  # poppler-utils pdftotext, whitespace collapsed
    s, _ = build(name)
    assert CASES[name][1] in text
    assert headline(s.primary) in text  # the conclusion as the SR and the table say it
    assert GUIDELINE_WORDS[s.primary.guideline] in text
    assert " ".join(CAUTION.split()) in text  # the caution in full
    assert f"{SOFTWARE_NAME} {__version__}" in text
    assert s.primary.rule_set_version in text
    assert RESULT_UID in text
    assert "Quayle, Oona Maren" in text and "HVCC-204117" in text
    assert "2026-11-30" in text and "HV26-88412" in text
    info = pdf_info(pdf)
    assert info["Pages"] == "1"


@pytest.mark.external
@pytest.mark.parametrize("name", list(CASES))
def test_all_fonts_embedded(name: str, tmp_path: Path) -> None:
    pdf = tmp_path / "summary.pdf"
    pdf.write_bytes(render(name))
    out = subprocess.run(
        [tool("pdffonts"), str(pdf)], capture_output=True, check=True, timeout=30, text=True
    ).stdout.splitlines()
    header = out[0]
    rows = out[2:]  # poppler-utils pdffonts: header, dashes, one row per font
    assert rows, "no fonts listed"
    emb = header.index("emb")
    for row in rows:
        assert row[emb : emb + 3].strip() == "yes", row


@pytest.mark.external
@pytest.mark.parametrize(("size", "points"), [("A4", "595.276 x 841.89"), ("Letter", "612 x 792")])
def test_page_sizes(size: str, points: str, tmp_path: Path) -> None:
    pdf = tmp_path / "summary.pdf"
    pdf.write_bytes(render("grade-2", page_size=size))
    # A4 210 x 297 mm (ISO 216); US Letter 8.5 x 11 in; 72 points per inch
    assert pdf_info(pdf)["Page size"].startswith(points)


@pytest.mark.external
def test_missing_value_is_shown_as_not_available(tmp_path: Path) -> None:
    pdf = tmp_path / "summary.pdf"
    pdf.write_bytes(render("indeterminate"))
    text = pdf_text(pdf)
    assert "not available" in text
    assert "Measurements" in text and "15.2" in text
    assert "TR peak velocity was not measured." in text  # the assessment's note
    assert "E/A reported 0.9, computed 1.2." in text  # the measurements' note


@pytest.mark.external
def test_measurement_sources_are_named(tmp_path: Path) -> None:
    pdf = tmp_path / "summary.pdf"
    pdf.write_bytes(render("grade-1"))
    text = pdf_text(pdf)
    for words in ("mean of 3", "derived", "selected in source", "measured"):
        assert words in text, words
    assert "Valsalva" in text  # supporting finding listed beside the algorithm


@pytest.mark.external
def test_other_guidelines_and_borderline_shown(tmp_path: Path) -> None:
    pdf = tmp_path / "summary.pdf"
    pdf.write_bytes(render("grade-2"))
    text = pdf_text(pdf)
    assert "Borderline:" in text and "14.6" in text
    assert "Other guidelines" in text and "ASE 2025" in text


@pytest.mark.external
def test_overflowing_content_goes_on_a_second_page_and_nothing_is_cut(tmp_path: Path) -> None:
    s, _ = build("grade-2")
    crowded = s.primary.model_copy(
        update={
            "reasoning": tuple(f"Reasoning sentence number {i} of many." for i in range(90)),
            "notes": tuple(f"Note {i}." for i in range(20)),
        }
    )
    values = {
        mm: MeasureValue(measure=mm, value=1.5, unit=CANONICAL_UNITS[mm], origin=Origin.measured)
        for mm in Measure
    }
    pdf = tmp_path / "summary.pdf"
    pdf.write_bytes(
        render_summary_pdf(
            AssessmentSet(primary=crowded),
            Measurements(values=values),
            IDENTITY,
            page_size="Letter",
        )
    )
    pages = int(pdf_info(pdf)["Pages"])
    assert pages >= 2
    text = pdf_text(pdf)
    for i in range(90):  # every sentence, none cut, none dropped
        assert f"Reasoning sentence number {i} of many." in text
    assert "…" not in text
    assert all(f"Page {n} of {pages}" in text for n in range(1, pages + 1))
    assert " ".join(CAUTION.split()) in text
    assert "not yet assigned" in text  # no result SR UID given


@pytest.mark.external
def test_many_criteria_and_long_texts_are_all_shown(tmp_path: Path) -> None:
    s, m = build("indeterminate")
    many = tuple(crit(f"x.{i}", f"step {i // 5}", M.lavi, C.gt, 34 + i, 20.0) for i in range(60))
    long = "a very long pathway reason " * 40
    crowded = s.primary.model_copy(
        update={
            "criteria": many,
            "pathway_reason": long,
            "guideline_citation": long,
            "reasoning": tuple(f"Sentence {i}." for i in range(40)),
        }
    )
    pdf = tmp_path / "summary.pdf"
    pdf.write_bytes(render_summary_pdf(AssessmentSet(primary=crowded), m, IDENTITY))
    text = pdf_text(pdf)
    for i in range(60):
        assert f"LAVI > {34 + i}" in text
    assert " ".join(long.split()) in text  # wrapped over several lines, not cut
    assert "…" not in text
    assert " ".join(CAUTION.split()) in text
    assert RESULT_UID not in text and "not yet assigned" in text


@pytest.mark.external
def test_non_finite_numbers_do_not_break_the_page(tmp_path: Path) -> None:
    s, m = build("normal")
    odd = (
        crit("x.nan_value", A, M.lavi, C.gt, 34, float("nan")),
        crit("x.inf_cut", A, M.lavi, C.gt, float("inf"), 40),
        crit("x.huge", A, M.e_e_prime_average, C.gt, 14, 1e9),
    )
    a = s.primary.model_copy(update={"criteria": odd})
    pdf = tmp_path / "summary.pdf"
    pdf.write_bytes(render_summary_pdf(AssessmentSet(primary=a), m, IDENTITY))
    assert pdf_info(pdf)["Pages"] == "1"
    assert "not available" in pdf_text(pdf)  # the NaN value is not drawn


@pytest.mark.external
def test_text_is_not_parsed_as_markup(tmp_path: Path) -> None:
    s, m = build("normal")
    odd = s.primary.model_copy(update={"reasoning": ("Cost $5$ and 10% _x_ ^y^ {z}.",)})
    pdf = tmp_path / "summary.pdf"
    pdf.write_bytes(render_summary_pdf(AssessmentSet(primary=odd), m, IDENTITY))
    assert "Cost $5$ and 10% _x_ ^y^ {z}." in pdf_text(pdf)


@settings(max_examples=8, deadline=None, derandomize=True)
@given(
    words=st.lists(st.text(max_size=120), min_size=1, max_size=4),
    name=st.text(max_size=80),
)
def test_any_text_renders(words: list[str], name: str) -> None:
    # control characters, scripts outside the font, emoji, "$" and newlines all print
    s, m = build("grade-2")
    a = s.primary.model_copy(
        update={"reasoning": tuple(words), "notes": tuple(words), "pathway_reason": words[0]}
    )
    ident = IDENTITY.model_copy(update={"patient_name": name, "institution": name})
    pdf = render_summary_pdf(AssessmentSet(primary=a), m, ident)
    assert pdf.startswith(b"%PDF-") and pdf.rstrip().endswith(b"%%EOF")


def test_reduced_font_is_made_once_and_keeps_the_needed_characters(tmp_path: Path) -> None:
    from matplotlib import ft2font

    regular = Path(font_files()[0])
    source = tmp_path / "src" / "Face.ttf"
    source.parent.mkdir()
    # start from the page's own reduced face (small, so the test is quick)
    source.write_bytes(regular.read_bytes())
    (made,) = _reduced_copies((source,), tmp_path / "cache")
    stamp = os.stat(made).st_mtime_ns
    assert _reduced_copies((source,), tmp_path / "cache") == (made,)
    assert os.stat(made).st_mtime_ns == stamp  # reused, not rebuilt
    assert not list((tmp_path / "cache").glob("*.part"))
    charmap = ft2font.FT2Font(made).get_charmap()
    for ch in "Ae′≤≥²·—Øμж":  # the page's own symbols, Latin-1, Greek, Cyrillic
        assert ord(ch) in charmap, ch
    assert ord("山") not in charmap


def test_characters_outside_the_font_print_as_question_marks() -> None:
    assert printable("Øyen 山田 e′ ≤ 😀\n") == "Øyen ?? e′ ≤ ??"


# ---------------------------------------------------------------------------------------------
# Pure parts
# ---------------------------------------------------------------------------------------------


def test_verdicts_differ_by_shape_and_fill_not_only_colour() -> None:
    met, not_met = marker_for(Verdict.met), marker_for(Verdict.not_met)
    assert met is not None and not_met is not None
    assert met.shape != not_met.shape
    assert met.filled != not_met.filled
    # colours from the Okabe-Ito palette (Okabe & Ito 2008, Color Universal Design)
    assert {met.colour, not_met.colour} <= set(OKABE_ITO.values())
    assert marker_for(Verdict.unavailable) is None  # never drawn as a value


def test_scale_widens_to_hold_value_and_cutoff() -> None:
    c = crit("x.e_e_prime_average", A, M.e_e_prime_average, C.gt, 14, 42.0)
    lo, hi = scale_for(c)
    assert lo == 0 and hi > 42  # 0-30 is the usual track (common practice), widened
    c = crit("x.tr", A, M.tr_peak_velocity, C.gt, 2.8, 2.1)
    assert scale_for(c) == (1, 5)


@pytest.mark.parametrize(
    ("value", "decimals", "text"),
    [
        (14.0, 0, "14"),
        (0.8, 0, "0.8"),
        (2.85, 0, "2.85"),
        (182.4, 0, "182.4"),
        (238.0, 0, "238"),
        (14.96, 0, "14.96"),
        (14.999, 0, "15"),
        (-0.001, 0, "0"),
        (3.0, 1, "3.0"),
        (2.85, 1, "2.85"),
        (-12.5, 0, "-12.5"),
    ],
)
def test_number_format(value: float, decimals: int, text: str) -> None:
    assert format_number(value, decimals) == text


def test_same_inputs_same_bytes() -> None:
    s, m = build("grade-3")
    first = render_summary_pdf(s, m, IDENTITY, result_sr_uid=RESULT_UID)
    assert first == render_summary_pdf(s, m, IDENTITY, result_sr_uid=RESULT_UID)
    assert first != render_summary_pdf(s, m, IDENTITY, result_sr_uid=RESULT_UID + "1")


def test_pages_rendered_in_threads_equal_pages_rendered_alone() -> None:
    from concurrent.futures import ThreadPoolExecutor

    names = ["normal", "grade-3", "atrial-fibrillation", "special-situation"]
    alone = [render(n) for n in names]

    def fresh(name: str) -> bytes:
        s, m = build(name)
        return render_summary_pdf(s, m, IDENTITY, result_sr_uid=RESULT_UID)

    with ThreadPoolExecutor(max_workers=4) as pool:
        assert list(pool.map(fresh, names)) == alone


def test_unknown_page_size_is_a_user_error() -> None:
    s, m = build("normal")
    with pytest.raises(UserError, match="page size"):
        render_summary_pdf(s, m, IDENTITY, page_size="A3")  # type: ignore[arg-type]


def test_identity_from_dataset() -> None:
    ds = pydicom.Dataset()
    ds.PatientName = "Marlow^Ines"
    ds.PatientID = "HVCC-377001"
    ds.PatientBirthDate = "19700101"
    ds.PatientSex = "F"
    ds.StudyDate = "20261201"
    ds.AccessionNumber = "HV26-90001"
    ds.InstitutionName = "Harbour Vale Cardiac Centre"
    ds.SOPInstanceUID = "2.25.1"
    ds.Manufacturer = "Lanternfish Acoustics"
    ds.ManufacturerModelName = "Tidewater 5"
    ds.SeriesDescription = "Echo measurements"
    second = pydicom.Dataset()
    second.SOPInstanceUID = "2.25.2"
    ident = identity_from_dataset(ds, second)
    assert ident.patient_name == "Marlow^Ines" and ident.patient_id == "HVCC-377001"
    assert ident.birth_date == "19700101" and ident.age == ""
    assert [s.sop_instance_uid for s in ident.sources] == ["2.25.1", "2.25.2"]
    assert ident.sources[0].model == "Tidewater 5"
    assert identity_from_dataset(pydicom.Dataset()) == SummaryIdentity(
        sources=(SourceDescription(sop_instance_uid=""),)
    )
    with pytest.raises(UserError):
        identity_from_dataset("not a dataset")  # type: ignore[arg-type]


@pytest.mark.external
def test_age_from_birth_and_study_date_when_absent(tmp_path: Path) -> None:
    s, m = build("normal")
    ident = IDENTITY.model_copy(update={"age": ""})
    pdf = tmp_path / "summary.pdf"
    pdf.write_bytes(render_summary_pdf(s, m, ident))
    # born 1958-03-12, study 2026-11-30: 68 full years
    assert re.search(r"1958-03-12 · 68 years", pdf_text(pdf))
