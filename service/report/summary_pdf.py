"""The one-page summary of a grading result, as PDF bytes.

The page reads top to bottom in the order a reader decides (:mod:`service.report.sections`):
who and which study, the conclusion, the caution, a chart of every criterion on its own
scale, how the result was reached and the measurements behind it; the footer names the
software, the rule set and the result SR the page belongs to.  The layout
(:mod:`service.report.layout`) is measured at the largest type scale first and at smaller
ones until it fits on one page; nothing is cut.  Drawing (:mod:`service.report.draw`) uses
reportlab with the page's TrueType font embedded (:mod:`service.report.fonts`).

Why reportlab and not matplotlib: matplotlib drew a page in about 0.3 s of CPU, most of it in
its text layout and font subsetting for some 150 text objects; reportlab draws the same page
in a few milliseconds (docs/performance.md, "Summary PDF").
"""

from __future__ import annotations

import io
import threading
from typing import Literal

from service import SOFTWARE_NAME, __version__
from service.errors import UserError
from service.model import AssessmentSet, Measurements
from service.report.draw import OKABE_ITO, Canvas, Marker, marker_for
from service.report.fonts import (
    font_files,
    printable,
    registered,
    start_document,
    text_width,
)
from service.report.identity import SourceDescription, SummaryIdentity, identity_from_dataset
from service.report.layout import (
    MARGIN,
    PAGE_SIZES_PT,
    SCALES,
    PageSize,
    Type,
    paginate,
    total_height,
    wrap,
)
from service.report.numbers import format_number, scale_for
from service.report.pdf_page import NotInRepertoire, PageWriter, document
from service.report.sections import TITLE, Page, footer, footer_height, page_rows

__all__ = [
    "OKABE_ITO",
    "PAGE_SIZES_PT",
    "Marker",
    "PageSize",
    "SourceDescription",
    "SummaryIdentity",
    "font_files",
    "format_number",
    "identity_from_dataset",
    "marker_for",
    "printable",
    "render_summary_pdf",
    "scale_for",
    "text_width",
    "wrap",
]

_config_lock = threading.Lock()
_configured: list[bool] = []


def _configure() -> None:
    """reportlab settings for every page: no ASCII85 wrapping of compressed streams (binary
    streams are smaller and faster), pages compressed."""
    with _config_lock:
        if _configured:
            return
        from reportlab import rl_config

        rl_config.useA85 = 0
        _configured.append(True)


def _fitted(page: Page) -> tuple[Type, list]:
    """The largest type scale at which the page fits, and its rows; the smallest scale (and
    more than one page) when nothing fits.  Heights shrink about linearly with the scale, so
    the scale to try is estimated from the largest and the smallest, then checked."""

    def laid(k: float) -> tuple[Type, list, bool]:
        t = Type(k)
        rows = page_rows(page, t)
        room = page.height - MARGIN * 0.7 - footer_height(t) - MARGIN * 0.8
        return t, rows, total_height(rows) <= room

    first = laid(SCALES[0])
    if first[2]:
        return first[0], first[1]
    last = laid(SCALES[-1])
    if not last[2]:
        return last[0], last[1]
    tall, short = total_height(first[1]), total_height(last[1])
    room = page.height - MARGIN * 0.7 - footer_height(last[0]) - MARGIN * 0.8
    share = (tall - room) / (tall - short) if tall > short else 1.0
    guess = SCALES[0] - share * (SCALES[0] - SCALES[-1])
    for k in SCALES[1:-1]:
        if k <= guess + 1e-9:
            t, rows, fits = laid(k)
            if fits:
                return t, rows
    return last[0], last[1]


#: the document information of every summary (PDF Info dictionary)
INFO = {
    "Title": f"{TITLE}: summary",
    "Author": SOFTWARE_NAME,
    "Subject": "Decision support only; confirm by a qualified reader",
    "Creator": f"{SOFTWARE_NAME} {__version__}",
}


def render_summary_pdf(
    assessments: AssessmentSet,
    measurements: Measurements,
    identity: SummaryIdentity,
    *,
    page_size: PageSize = "A4",
    result_sr_uid: str = "",
    writer: Literal["auto", "reportlab"] = "auto",
) -> bytes:
    """Render the summary of ``assessments`` and return the PDF bytes: one page, or more only
    when the content does not fit on one at the smallest readable type (nothing is cut).

    The page is written by the lean writer of :mod:`service.report.pdf_page` when all its text
    is in the font's fixed repertoire (``writer="auto"``), else (or with
    ``writer="reportlab"``) by reportlab.  The same inputs give the same bytes (no creation
    date or random document ID is written)."""
    if page_size not in PAGE_SIZES_PT:
        raise UserError(f"unknown page size {page_size!r}: use one of {', '.join(PAGE_SIZES_PT)}")
    if not isinstance(assessments, AssessmentSet):
        raise UserError("render_summary_pdf needs an AssessmentSet")
    registered()
    width, height = PAGE_SIZES_PT[page_size]
    page = Page(assessments, measurements, identity, result_sr_uid, width, height)
    t, rows = _fitted(page)
    bottom = height - MARGIN * 0.7 - footer_height(t)
    pages = paginate(rows, MARGIN * 0.8, bottom)
    if writer == "auto":
        try:
            return _lean(page, t, pages)
        except NotInRepertoire:
            pass
    return _with_reportlab(page, t, pages)


def _lean(page: Page, t: Type, pages: list) -> bytes:
    drawn = []
    for number, placed in enumerate(pages, 1):
        c = PageWriter(page.height)
        for row, y in placed:
            row.draw(c, y)
        footer(c, page, t, number, len(pages))
        drawn.append(c)
    return document(drawn, page.width, page.height, INFO)


def _with_reportlab(page: Page, t: Type, pages: list) -> bytes:
    _configure()
    from reportlab.pdfgen.canvas import Canvas as PdfCanvas

    out = io.BytesIO()
    regular, _ = registered()
    pdf = PdfCanvas(
        out,
        pagesize=(page.width, page.height),
        invariant=1,
        pageCompression=0,
        initialFontName=regular,
        initialFontSize=t.body,
    )
    start_document(pdf._doc)
    pdf.setTitle(INFO["Title"])
    pdf.setAuthor(INFO["Author"])
    pdf.setSubject(INFO["Subject"])
    pdf.setCreator(INFO["Creator"])
    for number, placed in enumerate(pages, 1):
        c = Canvas(pdf, page.height)
        for row, y in placed:
            row.draw(c, y)
        footer(c, page, t, number, len(pages))
        c.finish()
        pdf.showPage()
    pdf.save()
    return out.getvalue()
