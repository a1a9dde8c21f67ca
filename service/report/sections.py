"""The sections of the summary page, top to bottom in the order a reader decides: who and
which study, the conclusion, the caution, a chart of every criterion on its own scale, how the
result was reached (the decisions, not the criteria again), notes, this service's readings of
ambiguous rules, other guidelines, the measurements behind it all; the footer on each page.

Each section turns the result into :class:`service.report.layout.Row` s at a type scale.  The
words are those of :mod:`service.wording`, so the headline is the sentence the result SR's
impression, the command-line table and the JSON say.  Each thing is said once: the criteria
are in the chart only (the reasoning holds the decisions made from them), the pathway's reason
only where the reasoning does not already give it.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace

from service import SOFTWARE_NAME, __version__
from service.model import (
    CAUTION,
    Assessment,
    AssessmentSet,
    Comparison,
    Criterion,
    Measure,
    Measurements,
    MeasureValue,
    Origin,
    Verdict,
)
from service.report.draw import (
    GREY,
    INK,
    LIGHT,
    OKABE_ITO,
    PANEL,
    RULE,
    STRIPE,
    Canvas,
    marker_for,
    tint,
)
from service.report.fonts import text_width
from service.report.identity import (
    SEX_WORDS,
    SummaryIdentity,
    shown_age,
    shown_date,
    shown_name,
)
from service.report.layout import MARGIN, Row, Type, total_height, wrap
from service.report.numbers import format_number, format_value, scale_for, unit_display, with_unit
from service.wording import (
    GUIDELINE_NAMES,
    PATHWAY_WORDS,
    SHORT_CITATIONS,
    headline,
    measure_name,
    sentence_start,
)

TITLE = "Automated LV diastolic function assessment"

_SYMBOL = {Comparison.gt: ">", Comparison.ge: "≥", Comparison.lt: "<", Comparison.le: "≤"}


@dataclass(frozen=True)
class Page:
    """What the page shows, and its geometry."""

    assessments: AssessmentSet
    measurements: Measurements
    identity: SummaryIdentity
    result_sr_uid: str
    width: float
    height: float
    #: a column of the page: its left edge and width (None: the whole text width)
    x0: float = MARGIN
    column: float | None = None

    @property
    def a(self) -> Assessment:
        return self.assessments.primary

    @property
    def left(self) -> float:
        return self.x0

    @property
    def inner(self) -> float:
        return self.column if self.column is not None else self.width - 2 * MARGIN

    @property
    def right(self) -> float:
        return self.left + self.inner


# ---------------------------------------------------------------------------------------------
# Small builders
# ---------------------------------------------------------------------------------------------


def _gap(h: float) -> Row:
    return Row(h, lambda c, y: None)


def _heading(p: Page, t: Type, text: str) -> Row:
    """A heading, wrapped to its column, kept with the row after it."""
    size = t.heading
    lines = wrap(text, p.inner, size, True)

    def draw(c: Canvas, y: float) -> None:
        for i, line in enumerate(lines):
            c.text(p.left, y + size + i * t.lead(size), line, size, bold=True)

    return Row(len(lines) * t.lead(size) + 2, draw, keep=True)


def _paragraph(
    p: Page,
    t: Type,
    text: str,
    *,
    mark: str = "",
    size: float | None = None,
    colour: str = INK,
    bold: bool = False,
    x: float | None = None,
    width: float | None = None,
) -> list[Row]:
    """A wrapped paragraph, one row per line (a paragraph may continue on the next page);
    ``mark`` ("1.", "•") hangs in the margin of its first line."""
    size = size or t.body
    x0 = p.left if x is None else x
    indent = text_width("00. ", size) if mark else 0.0
    w = (p.inner if width is None else width) - indent
    rows = []
    for i, line in enumerate(wrap(text, w, size, bold)):

        def draw(c: Canvas, y: float, line: str = line, first: bool = i == 0) -> None:
            if first and mark:
                c.text(x0, y + size, mark, size, colour=GREY)
            c.text(x0 + indent, y + size, line, size, bold=bold, colour=colour)

        rows.append(Row(t.lead(size), draw))
    return rows


def _list(p: Page, t: Type, title: str, items: Sequence[str], numbered: bool) -> list[Row]:
    if not items:
        return []
    rows = [_gap(t.body * 0.5), _heading(p, t, title)]
    for n, item in enumerate(items, 1):
        rows += _paragraph(p, t, item, mark=f"{n}." if numbered else "•")
    return rows


# ---------------------------------------------------------------------------------------------
# Header
# ---------------------------------------------------------------------------------------------


def header(p: Page, t: Type) -> list[Row]:
    ident = p.identity
    rows: list[Row] = []
    title_h = t.lead(t.title) + t.lead(t.small) + 6

    def draw_title(c: Canvas, y: float) -> None:
        base = y + t.title
        c.text(p.left, base, TITLE, t.title, bold=True)
        if ident.institution:
            c.text(p.right, base, ident.institution, t.small, colour=GREY, align="right")
        c.text(
            p.left,
            base + t.lead(t.small),
            "One-page summary of the result SR · decision support",
            t.small,
            colour=GREY,
        )
        rule = y + title_h - 2
        c.line(p.left, rule, p.right, rule, colour=OKABE_ITO["blue"], width=1.6)

    rows.append(Row(title_h + t.body * 0.6, draw_title))

    sources = [s for s in ident.sources if s.sop_instance_uid or s.description]
    equipment = sorted({" ".join(x for x in (s.manufacturer, s.model) if x) for s in sources})
    born_age = " · ".join(x for x in (shown_date(ident.birth_date), shown_age(ident)) if x)
    pairs = [
        (
            ("Patient", shown_name(ident.patient_name) or "—"),
            ("Study date", shown_date(ident.study_date) or "—"),
        ),
        (("Patient ID", ident.patient_id or "—"), ("Accession", ident.accession_number or "—")),
        (("Born · age", born_age or "—"), ("Study", ident.study_description or "—")),
        (
            ("Sex", SEX_WORDS.get(ident.sex.strip().upper(), ident.sex) or "—"),
            ("Scanner", ", ".join(e for e in equipment if e) or "—"),
        ),
    ]
    label_w = 64 * t.k
    col_w = p.inner / 2
    value_w = col_w - label_w - 8
    for (l_label, l_value), (r_label, r_value) in pairs:
        left = wrap(l_value, value_w, t.body, l_label == "Patient")
        right = wrap(r_value, value_w, t.body)
        n = max(len(left), len(right))

        def draw(c: Canvas, y: float, ll=l_label, lv=left, rl=r_label, rv=right) -> None:
            for x0, label, lines in ((p.left, ll, lv), (p.left + col_w, rl, rv)):
                c.text(x0, y + t.body, label, t.small, colour=GREY)
                for i, line in enumerate(lines):
                    c.text(
                        x0 + label_w,
                        y + t.body + i * t.lead(t.body),
                        line,
                        t.body,
                        bold=label == "Patient",
                    )

        rows.append(Row(n * t.lead(t.body), draw))
    rows.append(_gap(t.body * 0.4))

    a = p.a
    described = [s.description for s in sources if s.description]
    source = described[0] if described else "—"
    if len(sources) > 1:
        source += f" and {len(sources) - 1} more source SR{'s' if len(sources) > 2 else ''}"
    guideline = GUIDELINE_NAMES.get(a.guideline, a.guideline.value)
    citation = SHORT_CITATIONS.get(a.guideline, a.guideline_citation)
    # the reason names the pathway itself; where the reasoning already gives it, the pathway's
    # name stands alone
    pathway = PATHWAY_WORDS.get(a.pathway, a.pathway.value)
    if a.pathway_reason and not _said_in_reasoning(a, a.pathway_reason):
        pathway = a.pathway_reason
    for label, value in (
        ("Source SR", source),
        ("Guideline", f"{guideline} — {citation}"),
        ("Pathway", pathway),
    ):
        lines = wrap(value, p.inner - label_w, t.body)

        def draw(c: Canvas, y: float, label=label, lines=lines) -> None:
            c.text(p.left, y + t.body, label, t.small, colour=GREY)
            for i, line in enumerate(lines):
                c.text(p.left + label_w, y + t.body + i * t.lead(t.body), line, t.body)

        rows.append(Row(len(lines) * t.lead(t.body), draw))
    rows.append(_gap(t.body * 0.6))
    return rows


def _norm(s: str) -> str:
    s = s.strip().rstrip(".").lower()
    return s


def _said_in_reasoning(a: Assessment, sentence: str) -> bool:
    return any(_norm(r) == _norm(sentence) for r in a.reasoning)


# ---------------------------------------------------------------------------------------------
# Conclusion and caution
# ---------------------------------------------------------------------------------------------


def conclusion(p: Page, t: Type) -> list[Row]:
    pad = 7 * t.k
    bar = 4 * t.k
    x = p.left + bar + pad
    width = p.inner - bar - 2 * pad
    lines = wrap(headline(p.a), width, t.conclusion, True)
    flags = [wrap(f"Borderline: {f.text.strip()}", width, t.body) for f in p.a.borderline]
    flag_lines = [line for lines_ in flags for line in lines_]
    height = 2 * pad + len(lines) * t.lead(t.conclusion) + len(flag_lines) * t.lead(t.body)

    def draw(c: Canvas, y: float) -> None:
        c.rect(p.left, y, p.inner, height, fill=PANEL)
        c.rect(p.left, y, bar, height, fill=OKABE_ITO["blue"])
        yy = y + pad
        for line in lines:
            c.text(x, yy + t.conclusion * 0.95, line, t.conclusion, bold=True)
            yy += t.lead(t.conclusion)
        for block in flags:
            for i, line in enumerate(block):
                if i == 0 and line.startswith("Borderline:"):
                    c.text(
                        x,
                        yy + t.body,
                        "Borderline:",
                        t.body,
                        bold=True,
                        colour=OKABE_ITO["vermillion"],
                    )
                    offset = text_width("Borderline: ", t.body, True)
                    c.text(x + offset, yy + t.body, line[len("Borderline: ") :], t.body)
                else:
                    c.text(x, yy + t.body, line, t.body)
                yy += t.lead(t.body)

    return [Row(height, draw), _gap(t.body * 0.8)]


def caution(p: Page, t: Type) -> list[Row]:
    pad = 5 * t.k
    label = "Caution"
    label_w = text_width(label + "  ", t.body, True)
    lines = wrap(p.a.caution or CAUTION, p.inner - 2 * pad - label_w, t.body)
    height = 2 * pad + len(lines) * t.lead(t.body)

    def draw(c: Canvas, y: float) -> None:
        c.rect(p.left, y, p.inner, height, stroke=INK, width=0.8)
        c.text(p.left + pad, y + pad + t.body, label, t.body, bold=True)
        for i, line in enumerate(lines):
            c.text(p.left + pad + label_w, y + pad + t.body + i * t.lead(t.body), line, t.body)

    return [Row(height, draw), _gap(t.body * 1.0)]


# ---------------------------------------------------------------------------------------------
# Criteria chart
# ---------------------------------------------------------------------------------------------


def criteria(p: Page, t: Type) -> list[Row]:
    a = p.a
    title = "Criteria, in the order the algorithm used them"
    if not a.criteria:
        return [
            _heading(p, t, title),
            *_paragraph(p, t, "No criterion was evaluated.", colour=GREY),
            _gap(t.body * 0.6),
        ]
    rows: list[Row] = []
    size = t.heading

    def draw_heading(c: Canvas, y: float) -> None:
        base = y + size
        c.text(p.left, base, title, size, bold=True)
        lx = p.right
        for verdict, words in (
            (None, "cut-off"),
            (Verdict.not_met, "not met"),
            (Verdict.met, "criterion met"),
        ):
            w = text_width(words, t.small)
            c.text(lx, base, words, t.small, colour=GREY, align="right")
            lx -= w + 5 * t.k
            mid = base - t.small * 0.35
            m = marker_for(verdict) if verdict else None
            if m is not None:
                c.marker(lx - 3 * t.k, mid, m, 6.5 * t.k)
            else:
                c.line(lx - 3 * t.k, mid - 4 * t.k, lx - 3 * t.k, mid + 4 * t.k, width=1.0)
            lx -= 14 * t.k

    rows.append(Row(t.lead(size) + 4, draw_heading, keep=True))
    label_w = p.inner * 0.34
    value_w = p.inner * 0.16
    x0 = p.left + label_w + 10 * t.k
    x1 = p.right - value_w - 10 * t.k
    step = None
    shown_groups: set[str] = set()
    for cr in a.criteria:
        if cr.step != step:
            step = cr.step

            def draw_step(c: Canvas, y: float, s: str = cr.step or "") -> None:
                c.text(p.left, y + t.small + 2, s.upper(), t.tiny, bold=True, colour=GREY)

            rows.append(Row(t.lead(t.small) + 2, draw_step, keep=True))
        group = cr.group if cr.group and cr.group not in shown_groups else ""
        if group:
            shown_groups.add(group)
        rows.append(_criterion_row(p, t, cr, group, label_w, x0, x1))
    rows.append(_gap(t.body * 0.6))
    return rows


def _criterion_row(
    p: Page, t: Type, cr: Criterion, group: str, label_w: float, x0: float, x1: float
) -> Row:
    label = wrap(cr.label or measure_name(cr.measure), label_w, t.body)
    note = wrap(group, label_w, t.small) if group else []
    text_h = len(label) * t.lead(t.body) + len(note) * t.lead(t.small)
    track_h = 2 * t.tiny + 12 * t.k  # cut-off label above the track, tick labels below
    height = max(text_h, track_h) + 3 * t.k
    available = (
        cr.value is not None and math.isfinite(cr.value) and cr.verdict is not Verdict.unavailable
    )
    lo, hi = scale_for(cr)

    def px(v: float) -> float:
        return x0 + (v - lo) / (hi - lo) * (x1 - x0)

    def draw(c: Canvas, y: float) -> None:
        mid = y + height * 0.48
        c.line(p.left, y + height, p.right, y + height, colour=RULE, width=0.5)
        top = mid - (len(label) * t.lead(t.body) + len(note) * t.lead(t.small)) / 2
        for i, line in enumerate(label):
            c.text(p.left, top + t.body + i * t.lead(t.body), line, t.body)
        below = top + len(label) * t.lead(t.body)
        for i, line in enumerate(note):
            c.text(p.left, below + t.small + i * t.lead(t.small), line, t.small, colour=GREY)
        # track and its end labels
        if available:
            c.line(x0, mid, x1, mid, colour=LIGHT, width=2.2)
        else:
            c.line(x0, mid, x1, mid, colour=LIGHT, width=1.2, dash=(1.5, 2.5))
        unit = unit_display(cr.unit)
        tick = mid + 4 * t.k + t.tiny
        c.text(x0, tick, format_number(lo), t.tiny, colour=GREY)
        c.text(x1, tick, f"{format_number(hi)} {unit}".strip(), t.tiny, colour=GREY, align="right")
        # the side where the criterion is met, shaded, then the cut-off line and its label
        finite = math.isfinite(cr.threshold)
        tx = px(cr.threshold) if finite else (x0 + x1) / 2
        if finite:
            met_to = x1 if cr.comparison in (Comparison.gt, Comparison.ge) else x0
            c.rect(
                min(tx, met_to),
                mid - 4.5 * t.k,
                abs(met_to - tx),
                9 * t.k,
                fill=tint(OKABE_ITO["vermillion"], 0.16),
            )
            c.line(tx, mid - 6 * t.k, tx, mid + 5 * t.k, width=1.1)
            cut = f"{_SYMBOL[cr.comparison]} {format_number(cr.threshold)}"
            c.text(tx, mid - 7.5 * t.k, cut, t.tiny, align="center")
        value_x = p.right
        if available:
            assert cr.value is not None
            m = marker_for(cr.verdict)
            if m is not None:
                c.marker(px(cr.value), mid, m, 8 * t.k)
                c.text(
                    value_x,
                    mid + t.body * 0.1,
                    with_unit(cr.value, cr.unit),
                    t.body,
                    bold=True,
                    align="right",
                )
                c.text(
                    value_x,
                    mid + t.body * 0.1 + t.lead(t.small),
                    m.words,
                    t.small,
                    colour=GREY,
                    align="right",
                )
        else:
            c.text(
                value_x, mid + t.body * 0.35, "not available", t.body, colour=GREY, align="right"
            )

    return Row(height, draw)


# ---------------------------------------------------------------------------------------------
# How the result was reached, notes, readings, other guidelines
# ---------------------------------------------------------------------------------------------


def decisions(a: Assessment) -> list[str]:
    """The reasoning: the decision steps only (each criterion is in the chart, and the rule
    sets write no sentence per criterion)."""
    return [r for r in a.reasoning if r.strip()]


def reasoning(p: Page, t: Type) -> list[Row]:
    a = p.a
    rows = _list(p, t, "How the result was reached", decisions(a), numbered=True)
    study = p.assessments.context_notes
    notes = list(dict.fromkeys(n for n in (*study, *a.notes, *p.measurements.notes) if n.strip()))
    rows += _list(p, t, "Notes", notes, numbered=False)
    rows += _list(
        p,
        t,
        "This service's readings of ambiguities in the guideline",
        [sentence_start(r.text) for r in a.readings],
        numbered=False,
    )
    rows += _list(
        p,
        t,
        "Supporting findings (not part of the algorithm)",
        [f"{s.name}: {s.text}" for s in a.supporting],
        numbered=False,
    )
    # a guideline whose result differs is named, with both results, by the sentence saying
    # where they differ: listed here are only those that agree
    same = (a.grade, a.filling_pressure)
    others = [
        f"{GUIDELINE_NAMES.get(o.guideline, o.guideline)}: {headline(o)}"
        for o in p.assessments.others
        if (o.grade, o.filling_pressure) == same or not p.assessments.disagreements
    ]
    rows += _list(p, t, "Other guidelines", others, numbered=False)
    rows += _list(
        p, t, "Where the guidelines differ", list(p.assessments.disagreements), numbered=False
    )
    return rows


# ---------------------------------------------------------------------------------------------
# Measurements
# ---------------------------------------------------------------------------------------------


def source_wording(mv: MeasureValue) -> str:
    """Where a value came from, in the words of the measurements table."""
    match mv.origin:
        case Origin.measured:
            return "measured"
        case Origin.selected:
            return "selected in source"
        case Origin.device_mean:
            return f"device mean of {mv.n}" if mv.n > 1 else "device mean"
        case Origin.mean_of_repeats:
            return f"mean of {mv.n}"
        case Origin.derived:
            return "derived"
        case Origin.patient:
            return "patient record"
    return str(mv.origin)  # pragma: no cover


def measurement_rows(m: Measurements) -> list[tuple[str, str, str, str]]:
    rows = []
    for measure in Measure:
        mv = m.values.get(measure)
        if mv is None:
            continue
        rows.append(
            (
                measure_name(measure),
                format_value(mv.value, mv.unit),
                unit_display(mv.unit),
                source_wording(mv),
            )
        )
    return rows


def measurements(p: Page, t: Type, *, split: int = 2) -> list[Row]:
    """The measurements table, in ``split`` side-by-side columns.  The columns are as wide as
    their content (value, unit and source keep their width; a measure's name wraps when the
    column is narrow), so nothing passes the column's edge."""
    entries = measurement_rows(p.measurements)
    rows = [_gap(t.body * 0.5), _heading(p, t, "Measurements")]
    if not entries:
        return rows + _paragraph(p, t, "No measurement was recognised.", colour=GREY)
    gap = 16 * t.k
    pad = 5 * t.k
    col_w = (p.inner - gap * (split - 1)) / split
    size = t.small
    lead = t.lead(size) * 1.05

    def widest(i: int, bold: bool = False) -> float:
        return max(text_width(e[i], size, bold) for e in entries)

    value_w, unit_w = widest(1, True), max(widest(2), text_width("unit", t.tiny))
    src_w = max(widest(3), text_width("source", t.tiny))
    name_w = col_w - value_w - unit_w - src_w - 3 * pad
    if name_w < col_w * 0.3:  # very long words: the source column takes what is left
        name_w = col_w * 0.3
        src_w = col_w - name_w - value_w - unit_w - 3 * pad
    half = (len(entries) + split - 1) // split
    columns = [entries[i * half : (i + 1) * half] for i in range(split)]

    def cells(x: float) -> tuple[float, float, float, float]:
        value_right = x + name_w + pad + value_w
        unit_x = value_right + pad * 0.6
        return x, value_right, unit_x, unit_x + unit_w + pad

    def draw_head(c: Canvas, y: float) -> None:
        for col in range(split):
            name_x, value_x, unit_x, src_x = cells(p.left + col * (col_w + gap))
            base = y + t.tiny
            c.text(name_x, base, "measure", t.tiny, colour=GREY)
            c.text(value_x, base, "value", t.tiny, colour=GREY, align="right")
            c.text(unit_x, base, "unit", t.tiny, colour=GREY)
            c.text(src_x, base, "source", t.tiny, colour=GREY)
        rule = y + t.lead(t.tiny)
        c.line(p.left, rule, p.right, rule, colour=LIGHT, width=0.6)

    rows.append(Row(t.lead(t.tiny) + 3, draw_head, keep=True))
    for i in range(half):
        pair = [col[i] if i < len(col) else None for col in columns]
        cells_text = [
            (wrap(e[0], name_w, size), wrap(e[3], src_w, size)) if e else ([], []) for e in pair
        ]
        n = max(max(len(a), len(b)) for a, b in cells_text) or 1
        height = lead + (n - 1) * t.lead(size)

        def draw(c: Canvas, y: float, pair=pair, texts=cells_text, h=height, i=i) -> None:
            if i % 2 == 1:
                c.rect(p.left, y - lead * 0.1, p.inner, h, fill=STRIPE)
            for col, entry in enumerate(pair):
                if entry is None:
                    continue
                _, value, unit, _ = entry
                names, sources = texts[col]
                name_x, value_x, unit_x, src_x = cells(p.left + col * (col_w + gap))
                base = y + size
                for k, line in enumerate(names):
                    c.text(name_x, base + k * t.lead(size), line, size)
                c.text(value_x, base, value, size, bold=True, align="right")
                c.text(unit_x, base, unit, size, colour=GREY)
                for k, line in enumerate(sources):
                    c.text(src_x, base + k * t.lead(size), line, size, colour=GREY)

        rows.append(Row(height, draw))
    return rows


# ---------------------------------------------------------------------------------------------
# Footer
# ---------------------------------------------------------------------------------------------


def footer_height(t: Type) -> float:
    return 2 * t.lead(t.tiny) + 10


def footer(c: Canvas, p: Page, t: Type, page: int, pages: int) -> None:
    lead = t.lead(t.tiny)
    base2 = p.height - MARGIN * 0.7
    base1 = base2 - lead
    top = base1 - t.tiny - 4
    c.line(p.left, top, p.right, top, colour=LIGHT, width=0.6)
    c.text(
        p.left,
        base1,
        f"{SOFTWARE_NAME} {__version__} · rule set {p.a.rule_set_version or '—'}",
        t.tiny,
        colour=GREY,
    )
    c.text(
        p.left,
        base2,
        f"Result SR instance UID: {p.result_sr_uid or 'not yet assigned'}",
        t.tiny,
        colour=GREY,
    )
    c.text(p.right, base2, f"Page {page} of {pages}", t.tiny, colour=GREY, align="right")


def details(p: Page, t: Type) -> list[Row]:
    """How the result was reached (and the notes, readings, other guidelines) beside the
    measurements table, in two columns, as one block; when that block is taller than a page,
    the two one after the other at full width (so they can go on to a second page)."""
    gap = 14 * t.k
    left_w = p.inner * 0.56
    left = reasoning(replace(p, column=left_w), t)
    right_p = replace(p, x0=p.left + left_w + gap, column=p.inner - left_w - gap)
    right = measurements(right_p, t, split=1)
    height = max(total_height(left), total_height(right))
    if height > p.height * 0.6:
        return [*reasoning(p, t), *measurements(p, t)]

    def draw(c: Canvas, y: float) -> None:
        for column in (left, right):
            yy = y
            for row in column:
                row.draw(c, yy)
                yy += row.height

    return [Row(height, draw)]


def page_rows(p: Page, t: Type) -> list[Row]:
    """Every row of the summary, in reading order."""
    return [
        *header(p, t),
        *conclusion(p, t),
        *caution(p, t),
        *criteria(p, t),
        *details(p, t),
    ]
