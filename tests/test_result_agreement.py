"""The result says one thing, once, in clinical words: the result SR (read by DCMTK ``dsrdump``
and by pydicom), the summary PDF (read by poppler-utils ``pdftotext``), the ``grade`` table and
the JSON line agree, for every kind of outcome of the demo set.

Outside sources: DCMTK ``dsrdump`` (Debian ``dcmtk``) reads the result SR and resolves its
by-reference items (PS3.3 C.17.3.2.5); ``pdftotext`` (Debian ``poppler-utils``) extracts the
summary's text.  The vocabulary checked is docs/vocabulary.md; the demo patients are invented
(fictional Harbour Vale Cardiac Centre).

Run as a script to regenerate the pictures in docs/ (80 dpi, ``pdftoppm``)::

    python tests/test_result_agreement.py docs
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import re
import shutil
import subprocess
import sys
from functools import cache
from pathlib import Path

import pytest
from pydicom import dcmread

from service.cli import main
from service.demo.scenario import SITE_MAPPING, write_demo_files
from service.model import CAUTION, FillingPressure, Grade, Guideline, Outcome
from service.sr import codes as C
from service.wording import GUIDELINE_NAMES

#: outcome case -> (demo file, extra grade options, the outcome token it must give)
CASES: dict[str, tuple[str, tuple[str, ...], Outcome]] = {
    "normal": ("normal", (), Outcome.normal),
    "grade-1": ("grade-1", (), Outcome.grade_1),
    "grade-2": ("grade-2", (), Outcome.grade_2),
    "grade-3": ("grade-3", (), Outcome.grade_3),
    "indeterminate": ("indeterminate", (), Outcome.indeterminate),
    "not-gradable": ("not-gradable", (), Outcome.not_gradable),
    "atrial-fibrillation": ("atrial-fibrillation", (), Outcome.atrial_fibrillation),
    # alternative criteria (ASE/EACVI 2016 section V.C), stated by the study's own SR (a coded
    # finding), and no alternative at all, given by the run option
    "special-situation": ("mitral-stenosis", (), Outcome.special_situation),
    "special-not-applicable": (
        "grade-2",
        ("--situation", "heart-transplant"),
        Outcome.special_situation,
    ),
    "borderline": ("borderline", (), Outcome.grade_1),
    # ASE/EACVI 2016 indeterminate, ASE 2025 normal: the guidelines disagree
    "compared": ("indeterminate", ("--compare",), Outcome.indeterminate),
    # both guidelines route by the same stated rhythm: the reason is written once
    "compared-af": ("atrial-fibrillation", ("--compare",), Outcome.atrial_fibrillation),
}
#: the cases whose summary is pictured in docs/ (one per kind of outcome)
PICTURED = [case for case in CASES if case != "compared-af"]

#: an internal rule identifier (I-16-7, I-25-1, I-B-2)
INTERNAL_TAG = re.compile(r"\bI-(?:16|25|B)-\d+\b")
#: a DICOM UID: numeric components separated by dots, at least five of them (PS3.5 9.1)
UID = re.compile(r"\b\d+(?:\.\d+){4,}\b")
#: concept names of the result SR's TEXT items a person reads as sentences
PROSE = (
    "Impression",
    "Study note",
    "Reasoning step",
    "Assessment note",
    "Pathway reason",
    "Reading of an ambiguous guideline rule",
    "Borderline criterion",
    "Supporting finding",
    "Guideline disagreement",
    "Criterion rule",
    "Cut-off source",
)


def tool(name: str) -> str:
    path = shutil.which(name, path="/usr/bin") or shutil.which(name)
    if path is None:
        if os.environ.get("CI"):
            pytest.fail(f"{name} is required in CI (Debian dcmtk, poppler-utils)")
        pytest.skip(f"{name} not installed")
    return path


def _run_cli(args: list[str]) -> str:
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        main(args)
    return out.getvalue()


@cache
def _demo_folder() -> Path:
    import tempfile

    folder = Path(tempfile.mkdtemp(prefix="diastolic-sr-agreement-"))
    write_demo_files(folder / "demo")
    return folder


class Graded:
    """One case graded the way a user does it: table, JSON, result SR and summary PDF."""

    def __init__(self, case: str) -> None:
        stem, options, self.expected = CASES[case]
        root = _demo_folder()
        self.source = root / "demo" / f"{stem}.dcm"
        self.out = root / case
        common = [str(self.source), "--mapping", str(SITE_MAPPING), "--jobs", "1", *options]
        self.table = _run_cli(["grade", *common, "--out", str(self.out), "--pdf"])
        self.json = json.loads(_run_cli(["grade", *common, "--json"]).strip())
        self.result_path = self.out / f"{stem}.result.dcm"
        self.summary_path = self.out / f"{stem}.summary.dcm"
        self.sr = dcmread(self.result_path)
        summary = dcmread(self.summary_path)
        self.pdf = self.out / f"{stem}.pdf"
        self.pdf.write_bytes(
            bytes(summary.EncapsulatedDocument)[: int(summary.EncapsulatedDocumentLength)]
        )

    def table_row(self) -> list[str]:
        lines = self.table.splitlines()
        [row] = [ln for ln in lines if ln.startswith(str(self.source))]
        return re.split(r"\s{2,}", row.strip())

    def dsrdump(self) -> str:
        done = subprocess.run(
            [tool("dsrdump"), "+Pl", str(self.result_path)],
            capture_output=True,
            text=True,
            timeout=60,
        )
        assert done.returncode == 0, done.stderr
        return done.stdout

    def pdf_text(self) -> str:
        done = subprocess.run(
            [tool("pdftotext"), "-enc", "UTF-8", str(self.pdf), "-"],
            capture_output=True,
            check=True,
            timeout=60,
        )
        return done.stdout.decode("utf-8")


@cache
def graded(case: str) -> Graded:
    return Graded(case)


def _items(ds, name: str) -> list:
    """Content items (by value) whose concept name meaning is ``name``, depth first."""
    out = []
    for item in ds.get("ContentSequence", []):
        if "ConceptNameCodeSequence" in item:
            if item.ConceptNameCodeSequence[0].CodeMeaning == name:
                out.append(item)
            out += _items(item, name)
    return out


def _flat(text: str) -> str:
    return " ".join(text.split())


# ---------------------------------------------------------------------------------------------


@pytest.mark.external
@pytest.mark.parametrize("case", list(CASES))
def test_impression_table_json_and_pdf_headline_agree(case: str) -> None:
    g = graded(case)
    j = g.json
    # the outcome token (service.model.Outcome) in the JSON and in the table
    assert j["outcome"] == g.expected.value
    row = g.table_row()
    assert row[2] == j["outcome"] and row[3] == j["filling_pressure"]
    assert row[1] == ("not-gradable" if g.expected is Outcome.not_gradable else "graded")
    # the one conclusion sentence: JSON, table, SR impression (after the guideline), PDF
    conclusion = j["conclusion"]
    assert row[-1].startswith(conclusion)  # the last column (after the result path)
    # the impression is the table's conclusion column word for word (borderline measures
    # included), then each compared guideline's JSON conclusion
    [impression] = _items(g.sr, "Impression")
    compared = "".join(
        f" For comparison, {GUIDELINE_NAMES[Guideline(o['guideline'])]}: {o['conclusion']}"
        for o in j.get("compared", ())
    )
    assert impression.TextValue == f"ASE/EACVI 2016: {row[-1]}{compared}"
    assert conclusion in _flat(g.pdf_text())
    assert conclusion in g.dsrdump()
    # the coded items say the same as the tokens
    [grade] = _items(g.sr, "LV diastolic function grade")[:1]
    assert grade.ConceptCodeSequence[0].CodeValue == C.GRADE_VALUES[Grade(j["grade"])].value
    [pressure] = _items(g.sr, "Estimated LV filling pressure")[:1]
    fp = C.FILLING_PRESSURE_VALUES[FillingPressure(j["filling_pressure"])]
    assert pressure.ConceptCodeSequence[0].CodeValue == fp.value
    # the caution everywhere
    assert CAUTION in g.table and j["caution"] == CAUTION
    assert _flat(CAUTION) in _flat(g.pdf_text())


@pytest.mark.external
def test_atrial_fibrillation_is_its_own_outcome_everywhere() -> None:
    g = graded("atrial-fibrillation")
    assert g.json["grade"] == "not-applicable" and g.json["status"] == "graded"
    text = " ".join((g.json["conclusion"], g.table, g.dsrdump(), g.pdf_text()))
    assert "Grade not applicable in atrial fibrillation" in g.json["conclusion"]
    assert "by the ASE/EACVI 2016 atrial-fibrillation criteria" in g.json["conclusion"]
    for contradiction in ("not gradable", "not-gradable", "not estimated", "unknown"):
        assert contradiction not in text.lower(), contradiction


@pytest.mark.external
@pytest.mark.parametrize("case", list(CASES))
def test_no_internal_tag_or_uid_in_prose(case: str) -> None:
    g = graded(case)
    dump = g.dsrdump()
    prose = [ln for ln in dump.splitlines() if any(f'(,,"{name}")=' in ln for name in PROSE)]
    assert prose
    for line in prose:
        assert not INTERNAL_TAG.search(line), line
        assert not UID.search(line), line
    # the PDF: everything but the footer line naming the result SR's instance UID
    text = [ln for ln in g.pdf_text().splitlines() if not ln.startswith("Result SR instance UID")]
    for line in text:
        assert not INTERNAL_TAG.search(line), line
        assert not UID.search(line), line
    for value in (g.json["conclusion"], *g.json["reasoning"], *g.json["notes"]):
        assert not INTERNAL_TAG.search(value) and not UID.search(value), value
    # identifiers are kept for software, as items of their own
    for item in _items(g.sr, "Reading of an ambiguous guideline rule"):
        (ident,) = item.ContentSequence
        assert INTERNAL_TAG.fullmatch(ident.TextValue)
        assert item.TextValue.startswith(
            "This service's reading of an ambiguity in the guideline: "
        )
    assert [r["id"] for r in g.json["readings"]] == [
        i.ContentSequence[0].TextValue
        for i in _items(g.sr, "Reading of an ambiguous guideline rule")
    ][: len(g.json["readings"])]


@pytest.mark.external
@pytest.mark.parametrize("case", list(CASES))
def test_each_criterion_once_in_the_content_tree(case: str) -> None:
    g = graded(case)
    dump = g.dsrdump()
    for assessment in _items(g.sr, "LV diastolic function assessment"):
        rules = [i.TextValue for i in _items(assessment, "Criterion rule")]
        assert len(rules) == len(set(rules)), rules  # none written twice
    # DCMTK resolves the conclusions' references to the criteria ("inferred from 1.3.10.2")
    references = re.findall(r"<inferred from (1(?:\.\d+)+)>", dump)
    assert references
    if case == "grade-2":
        # Figure 8A and Figure 8B step 2 share E/e′, TR velocity and LAVI: evaluated once
        assert dump.count('"Criterion rule")="Average E/e′ > 14"') == 1
        assert "algorithm A and algorithm B step 2" in dump
        # septal and lateral e′ are shown as two rows but count as one criterion
        assert dump.count('"Counted as one criterion")="septal or lateral e′: one criterion"') == 2


#: what a sentence about one criterion looks like ("Septal e′ 5.1 cm/s against < 7 cm/s: met.",
#: "LAVI > 34 mL/m²: not evaluated, LAVI not available.", "Septal or lateral e′: one
#: criterion, met."): the criteria are written once, in the Criteria container, and the
#: reasoning holds only the decisions made from them
CRITERION_SENTENCE = re.compile(
    r"\bagainst [<>≤≥]|: not evaluated\b|: one criterion, (?:met|not met|not available)\b"
)
#: a verdict said after a criterion's rule ("E/A ≤ 0.8: not met")
VERDICTS = (": met", ": not met", ": not evaluated", ": unavailable", ": not available")
#: the result SR's sentences a person reads, other than a criterion's own items (its rule and
#: the source of its cut-off) and the comparison of two guidelines, which names the one
#: finding they judge differently with both cut-offs side by side
OTHER_PROSE = tuple(n for n in PROSE if n not in ("Criterion rule", "Cut-off source"))


def _reasoning_steps(assessment) -> list[str]:
    return [i.TextValue for i in _items(assessment, "Reasoning step")]


@pytest.mark.external
@pytest.mark.parametrize("case", list(CASES))
def test_reasoning_holds_the_decisions_and_no_criterion_twice(case: str) -> None:
    g = graded(case)
    assessments = _items(g.sr, "LV diastolic function assessment")
    rules = [i.TextValue for a in assessments for i in _items(a, "Criterion rule")]
    prose = [
        i.TextValue
        for name in OTHER_PROSE
        if name != "Guideline disagreement"
        for i in _items(g.sr, name)
    ]
    assert prose
    for text in prose:
        assert not CRITERION_SENTENCE.search(text), text
        for rule in rules:
            low = text.casefold()
            assert not any(rule.casefold() + v in low for v in VERDICTS), (rule, text)
            # a criterion's rule is never a sentence of its own outside its criterion item
            sentences = {s.strip().rstrip(".").casefold() for s in re.split(r"(?<=\.)\s", text)}
            assert rule.casefold() not in sentences, (rule, text)
    # the JSON's reasoning is the primary assessment's reasoning, step for step
    assert g.json["reasoning"] == _reasoning_steps(assessments[0])
    for text in (*g.json["reasoning"], *g.json["notes"]):
        assert not CRITERION_SENTENCE.search(text), text
    # within one guideline's assessment nothing is said twice (the pathway refers to the
    # reasoning step that chose it, by reference, instead of repeating it)
    for a in assessments:
        said = [i.TextValue for name in OTHER_PROSE for i in _items(a, name)]
        assert len(said) == len(set(said)), [t for t in said if said.count(t) > 1]


def _sentences(text: str) -> list[str]:
    """The sentences and semicolon-separated clauses of a text, normalised for comparison."""
    parts = re.split(r"(?<=[.;])\s+", text)
    return [" ".join(p.strip().rstrip(".;").casefold().split()) for p in parts if p.strip()]


@pytest.mark.external
@pytest.mark.parametrize("case", list(CASES))
def test_nothing_is_said_twice_in_the_result_sr(case: str) -> None:
    # across the whole document (impression, study notes, every guideline's assessment): a
    # sentence of five words or more is in one prose item only.  The guideline comparison is
    # left out: it names both results and quotes the step that left one undecided, by design.
    g = graded(case)
    seen: dict[str, int] = {}
    items = [
        i.TextValue
        for name in OTHER_PROSE
        if name != "Guideline disagreement"
        for i in _items(g.sr, name)
    ]
    for n, text in enumerate(items):
        for sentence in set(_sentences(text)):
            if len(sentence.split()) >= 5:
                assert seen.setdefault(sentence, n) == n, (sentence, items[seen[sentence]], text)


@pytest.mark.external
def test_a_pathway_reason_both_guidelines_give_is_written_once() -> None:
    # atrial fibrillation stated by a coded Cardiac Rhythm item (8884-9 LN = 49436004 SCT, both
    # in pydicom's PS3.16 dictionary) routes both guidelines: one Pathway reason item, and
    # the second assessment's pathway inferred from it by reference (DCMTK resolves it)
    g = graded("compared-af")
    [reason] = _items(g.sr, "Pathway reason")
    assert (
        reason.TextValue
        == "atrial fibrillation, stated by a coded Cardiac Rhythm item in the source SR"
    )
    dump = g.dsrdump()
    assert dump.count(reason.TextValue) == 1
    pathways = [m.end() for m in re.finditer(r'\(,,"Grading pathway"\)=\(PW-AF,', dump)]
    assert len(pathways) == 2
    assert re.match(r"[^\n]*\n\s*<inferred from 1(?:\.\d+)+>", dump[pathways[1] :])


@pytest.mark.external
def test_a_study_note_is_said_once_for_the_study() -> None:
    # the demo's indeterminate study states no rhythm: both guidelines assume sinus rhythm, and
    # the result says so once, as a study note before the assessments (not in each of them)
    g = graded("compared")
    [note] = _items(g.sr, "Study note")
    assert (
        note.TextValue
        == "Cardiac rhythm was not stated; sinus rhythm was assumed for the algorithm."
    )
    assert len(_items(g.sr, "LV diastolic function assessment")) == 2
    assert g.dsrdump().count(note.TextValue) == 1
    assert _flat(g.pdf_text()).count(note.TextValue) == 1
    assert g.json["notes"].count(note.TextValue) == 1


@pytest.mark.external
@pytest.mark.parametrize("case", list(CASES))
def test_measure_names_keep_their_clinical_spelling(case: str) -> None:
    from test_clinical_spelling import BROKEN

    g = graded(case)
    for text in (g.dsrdump(), g.pdf_text(), g.table, json.dumps(g.json, ensure_ascii=False)):
        found = BROKEN.search(text)
        assert found is None, text[max(0, found.start() - 80) : found.end() + 40]


@pytest.mark.external
def test_grade_2_reasoning_is_the_four_decisions_of_figures_8a_and_8b() -> None:
    # Nagueh 2016 JASE 29:277, Figure 8A (more than half of 4 criteria met: dysfunction) and
    # Figure 8B (E/A between 0.8 and 2: step 2; 2 or 3 of 3 met: grade II)
    g = graded("grade-2")
    expected = [
        "LVEF 58 % is not below 50 % and no myocardial disease is flagged: Algorithm A "
        "(Figure 8A) for normal LVEF applies.",
        "Algorithm A: 4 of 4 available criteria met (more than half): diastolic dysfunction "
        "present; Algorithm B (Figure 8B) grades it.",
        "Algorithm B: E/A between the branches; step 2 applies.",
        "Step 2: 3 of 3 available criteria met: grade II, elevated filling pressure.",
    ]
    assert g.json["reasoning"] == expected
    [primary] = _items(g.sr, "LV diastolic function assessment")
    assert _reasoning_steps(primary) == expected
    dump = g.dsrdump()
    # the routing sentence once, the pathway inferred from it by reference (DCMTK resolves it)
    assert dump.count(expected[0]) == 1
    assert '"Pathway reason"' not in dump
    pathway = dump.index('(,,"Grading pathway")')
    assert re.match(r"\s*<inferred from 1(?:\.\d+)+>", dump[dump.index("\n", pathway) :])


@pytest.mark.external
@pytest.mark.parametrize("case", list(CASES))
def test_nothing_cut_and_nothing_said_twice_in_the_summary(case: str) -> None:
    g = graded(case)
    text = g.pdf_text()
    flat = _flat(text)
    assert "…" not in text and "..." not in text
    # every citation of a guideline paper carries its year
    for m in re.finditer(r"J Am Soc Echocardiogr(.{0,12})", flat):
        assert re.match(r" (2016|2025|1999);", m.group(1)), m.group(0)
    assert "Nagueh SF et al. J Am Soc Echocardiogr 2016;29:277–314" in flat
    # no sentence of five words or more twice (each thing is said once)
    sentences = [s.strip() for s in re.split(r"(?<=[.;])\s+", flat) if len(s.split()) >= 5]
    repeated = {s for s in sentences if sentences.count(s) > 1}
    assert not repeated, repeated
    # the conclusion's "standard algorithm does not apply" once, not three times
    assert flat.count("does not apply") <= 1


@pytest.mark.external
@pytest.mark.parametrize("case", list(CASES))
def test_every_word_stays_inside_the_margins(case: str) -> None:
    # poppler-utils pdftotext -bbox: each word's box, in points; the page is A4 (595.3 pt wide)
    # with 36 pt margins: nothing may run past them (a word over the edge is a word cut)
    g = graded(case)
    out = subprocess.run(
        [tool("pdftotext"), "-bbox", str(g.pdf), "-"], capture_output=True, text=True, check=True
    ).stdout
    boxes = re.findall(r'<word xMin="([\d.]+)" yMin="[\d.]+" xMax="([\d.]+)"', out)
    assert boxes
    for x_min, x_max in boxes:
        assert float(x_min) >= 36 - 0.5 and float(x_max) <= 595.28 - 36 + 0.5, (x_min, x_max)


@pytest.mark.external
def test_special_situation_stated_by_the_sr_or_given_by_the_option() -> None:
    # the demo study's SR states mitral stenosis by a coded finding (121071 DCM "Finding" =
    # 79619009 SCT "Mitral stenosis", both in pydicom's PS3.16 dictionary); the same situation
    # given by --situation on another study is applied alike, without that attribution
    g = graded("special-situation")
    assert g.json["pathway_reason"].startswith(
        "mitral stenosis (stated by a coded finding in the source SR): "
    )
    assert "stated by a coded finding in the source SR" in g.dsrdump()
    assert g.json["conclusion"].startswith("Grade not applicable in mitral stenosis;")
    root = _demo_folder()
    common = [str(root / "demo" / "grade-2.dcm"), "--mapping", str(SITE_MAPPING), "--jobs", "1"]
    flagged = json.loads(_run_cli(["grade", *common, "--json", "--situation", "mitral-stenosis"]))
    assert flagged["outcome"] == "special-situation"
    assert flagged["conclusion"].startswith("Grade not applicable in mitral stenosis;")
    assert "stated by a coded finding" not in flagged["pathway_reason"]


@pytest.mark.external
def test_compared_guidelines_say_where_they_differ() -> None:
    g = graded("compared")
    [other] = g.json["compared"]
    assert other["outcome"] == "normal"
    assert g.json["disagreements"]
    flat = _flat(g.pdf_text())
    # the summary says it once: in the sentence saying where they differ, which names both
    # results (not again in a list of other guidelines)
    for sentence in g.json["disagreements"]:
        assert _flat(sentence) in flat
    assert f"ASE 2025: {other['conclusion']}" not in flat
    [impression] = _items(g.sr, "Impression")
    assert f"For comparison, ASE 2025: {other['conclusion']}" in impression.TextValue


@pytest.mark.external
def test_borderline_names_the_measure_clinically() -> None:
    g = graded("borderline")
    row = g.table_row()
    assert row[-1].endswith("Borderline: Average E/e′.")
    assert "e_e_prime_average" not in g.table
    assert "Borderline:" in _flat(g.pdf_text())


@pytest.mark.external
def test_borderline_flag_is_said_once() -> None:
    # the impression (like the table) names the measure; the sentence saying how near the
    # cut-off the value is and what the result would be across it is the borderline item's,
    # once in the SR (DCMTK dsrdump) and once under the summary's headline (pdftotext)
    g = graded("borderline")
    [flag] = g.json["borderline"]
    sentence = flag["text"]
    assert sentence.startswith("Average E/e′ ") and "on the other side of it" in sentence
    [item] = _items(g.sr, "Borderline criterion")
    assert item.TextValue == sentence
    [impression] = _items(g.sr, "Impression")
    assert "Borderline: Average E/e′." in impression.TextValue
    assert "on the other side" not in impression.TextValue
    assert g.dsrdump().count(sentence) == 1
    assert _flat(g.pdf_text()).count(_flat(f"Borderline: {sentence}")) == 1


def test_vocabulary_document_lists_every_token_and_reading() -> None:
    # docs/vocabulary.md is the one place the vocabulary is written down: it must not drift
    from service.grading.readings import READINGS, SWITCHED
    from service.wording import OUTCOME_WORDS, PRESSURE_WORDS, SITUATION_NAMES

    doc = (Path(__file__).parents[1] / "docs" / "vocabulary.md").read_text(encoding="utf-8")
    for outcome, words in OUTCOME_WORDS.items():
        assert f"| `{outcome.value}` | {words}" in doc, outcome
    for pressure, words in PRESSURE_WORDS.items():
        assert f"| `{pressure.value}` | {words}" in doc, pressure
    for ident, words in READINGS.items():
        assert f"| `{ident}` | {words} |" in doc, ident
    for (ident, setting), words in SWITCHED.items():
        assert f"| `{ident}` | `{setting}` | {words} |" in doc, (ident, setting)
    for situation, words in SITUATION_NAMES.items():
        assert f"| `{situation.value}` | {words} |" in doc, situation


# ---------------------------------------------------------------------------------------------
# Pictures for docs/
# ---------------------------------------------------------------------------------------------


def write_doc_pictures(folder: Path, dpi: int = 80) -> list[Path]:
    """``folder/summary-<case>.png``: page 1 of each case's summary at ``dpi`` (pdftoppm)."""
    from PIL import Image

    folder.mkdir(parents=True, exist_ok=True)
    written = []
    for case in PICTURED:
        g = graded(case)
        target = folder / f"summary-{case}"
        subprocess.run(
            [
                tool("pdftoppm"),
                "-r",
                str(dpi),
                "-f",
                "1",
                "-l",
                "1",
                "-png",
                "-singlefile",
                str(g.pdf),
                str(target),
            ],
            check=True,
            timeout=60,
        )
        png = target.with_suffix(".png")
        with Image.open(png) as img:  # a 128-colour palette keeps the pictures small
            small = img.convert("RGB").quantize(colors=128, method=Image.Quantize.MEDIANCUT)
        small.save(png, optimize=True)
        written.append(png)
    return written


if __name__ == "__main__":  # python tests/test_result_agreement.py docs
    for path in write_doc_pictures(Path(sys.argv[1] if len(sys.argv) > 1 else "docs")):
        print(path)
