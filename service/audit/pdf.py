"""The audit as a PDF (``audit --pdf FILE``): A4 pages drawn with matplotlib's PDF backend, the
same charts as the HTML page, a first page with the key figures, the caution and the sources."""

from __future__ import annotations

import textwrap
from pathlib import Path

from matplotlib import rc_context
from matplotlib.backends.backend_pdf import PdfPages
from matplotlib.figure import Figure

from service.audit import figures as F
from service.audit.figures import INK, pct
from service.audit.render import period_text
from service.audit.report import AuditReport
from service.web import duration

A4 = (210 / 25.4, 297 / 25.4)  # ISO 216, inches

#: charts on each page after the first, with their share of the page's height
PAGES: tuple[tuple[tuple[str, float], ...], ...] = (
    (("outcomes", 1.0), ("by_pathway", 0.8)),
    (("by_month", 1.0), ("indeterminate", 0.9)),
    (("measures", 1.0),),
    (("devices", 1.0), ("missing", 0.7)),
    (("borderline", 0.7), ("disagreement", 0.45), ("per_day", 0.8)),
)
_CHARTS = {key: (title, build) for key, title, build in F.CHARTS}


def _wrap(text: str, width: int = 95) -> str:
    return "\n".join(textwrap.wrap(text, width))


def _first_page(report: AuditReport) -> Figure:
    fig = Figure(figsize=A4)
    r = report
    lines = [
        ("Diastolic function audit", 18, "bold"),
        (f"{period_text(r) or 'All studies in the journal'} · generated {r.generated}", 10, None),
        ("", 8, None),
        (_wrap(r.caution), 10, None),
        ("", 8, None),
        (f"Studies assessed: {r.studies} (not assessed: {r.not_assessed})", 11, None),
        (
            f"Indeterminate: {r.outcomes['indeterminate']} "
            f"({pct(r.outcome_shares['indeterminate'])})"
            f"   Not gradable: {r.outcomes['not-gradable']} "
            f"({pct(r.outcome_shares['not-gradable'])})",
            11,
            None,
        ),
        (
            f"Borderline: {r.borderline.studies.count} ({pct(r.borderline.studies.share)})"
            f"   Guidelines disagree: {r.disagreement.disagree.count} of "
            f"{r.disagreement.compared} ({pct(r.disagreement.disagree.share)})",
            11,
            None,
        ),
        (
            f"Last object to result delivered: median {duration(r.processing.latency_p50_seconds)}"
            f", p95 {duration(r.processing.latency_p95_seconds)}; failed at present: "
            f"{r.processing.failed}",
            11,
            None,
        ),
        ("", 8, None),
        ("Failures by reason", 11, "bold"),
    ]
    lines += [(f"{n} × {reason}", 9.5, None) for reason, n in r.processing.failures.items()] or [
        ("none", 9.5, None)
    ]
    lines += [("", 8, None), ("Case mix", 11, "bold"), (_wrap(r.caveat), 9.5, None)]
    for citation in dict.fromkeys(x.citation for x in r.indeterminate_by_pathway if x.citation):
        lines += [("", 6, None), ("Source", 11, "bold"), (_wrap(citation), 9.5, None)]
    y = 0.95
    for text, size, weight in lines:
        if text:
            fig.text(0.08, y, text, fontsize=size, fontweight=weight, color=INK, va="top")
        y -= (text.count("\n") + 1) * size * 1.45 / (A4[1] * 72)
    return fig


def audit_pdf(report: AuditReport, path: Path) -> Path:
    """Write the audit as a PDF file; returns its path."""
    path = Path(path)
    with (
        F._lock,
        rc_context(F.PLAIN_TEXT),
        PdfPages(path, metadata={"Title": "Diastolic function audit"}) as pdf,
    ):
        pdf.savefig(_first_page(report))
        for page in PAGES:
            fig = Figure(figsize=A4, layout="constrained")
            subs = fig.subfigures(len(page), 1, height_ratios=[h for _, h in page])
            for sub, (key, _) in zip(subs if len(page) > 1 else [subs], page, strict=True):
                title, build = _CHARTS[key]
                sub.suptitle(title, x=0.02, ha="left", fontsize=12, fontweight="bold", color=INK)
                build(report, sub)
            pdf.savefig(fig)
    return path
