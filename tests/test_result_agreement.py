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
from service.model import CAUTION, FillingPressure, Grade, Outcome
from service.sr import codes as C

#: outcome case -> (demo file, extra grade options, the outcome token it must give)
CASES: dict[str, tuple[str, tuple[str, ...], Outcome]] = {
    "normal": ("normal", (), Outcome.normal),
    "grade-1": ("grade-1", (), Outcome.grade_1),
    "grade-2": ("grade-2", (), Outcome.grade_2),
    "grade-3": ("grade-3", (), Outcome.grade_3),
    "indeterminate": ("indeterminate", (), Outcome.indeterminate),
    "not-gradable": ("not-gradable", (), Outcome.not_gradable),
    "atrial-fibrillation": ("atrial-fibrillation", (), Outcome.atrial_fibrillation),
    # alternative criteria (ASE/EACVI 2016 section V.C) and no alternative at all
    "special-situation": ("grade-2", ("--situation", "mitral-stenosis"), Outcome.special_situation),
    "special-not-applicable": (
        "grade-2",
        ("--situation", "heart-transplant"),
        Outcome.special_situation,
    ),
    "borderline": ("borderline", (), Outcome.grade_1),
    # ASE/EACVI 2016 indeterminate, ASE 2025 normal: the guidelines disagree
    "compared": ("indeterminate", ("--compare",), Outcome.indeterminate),
}

#: an internal rule identifier (I-16-7, I-25-1, I-B-2)
INTERNAL_TAG = re.compile(r"\bI-(?:16|25|B)-\d+\b")
#: a DICOM UID: numeric components separated by dots, at least five of them (PS3.5 9.1)
UID = re.compile(r"\b\d+(?:\.\d+){4,}\b")
#: concept names of the result SR's TEXT items a person reads as sentences
PROSE = (
    "Impression",
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
    [impression] = _items(g.sr, "Impression")
    assert impression.TextValue.startswith(f"ASE/EACVI 2016: {conclusion}")
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


def test_vocabulary_document_lists_every_token_and_reading() -> None:
    # docs/vocabulary.md is the one place the vocabulary is written down: it must not drift
    from service.grading.readings import READINGS, SWITCHED
    from service.wording import OUTCOME_WORDS, PRESSURE_WORDS

    doc = (Path(__file__).parents[1] / "docs" / "vocabulary.md").read_text(encoding="utf-8")
    for outcome, words in OUTCOME_WORDS.items():
        assert f"| `{outcome.value}` | {words}" in doc, outcome
    for pressure, words in PRESSURE_WORDS.items():
        assert f"| `{pressure.value}` | {words}" in doc, pressure
    for ident, words in READINGS.items():
        assert f"| `{ident}` | {words} |" in doc, ident
    for (ident, setting), words in SWITCHED.items():
        assert f"| `{ident}` | `{setting}` | {words} |" in doc, (ident, setting)


# ---------------------------------------------------------------------------------------------
# Pictures for docs/
# ---------------------------------------------------------------------------------------------


def write_doc_pictures(folder: Path, dpi: int = 80) -> list[Path]:
    """``folder/summary-<case>.png``: page 1 of each case's summary at ``dpi`` (pdftoppm)."""
    from PIL import Image

    folder.mkdir(parents=True, exist_ok=True)
    written = []
    for case in CASES:
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
