"""The audit as one self-contained HTML page: every chart inline as SVG, the CSS in the page,
no script, font or other resource fetched from anywhere."""

from __future__ import annotations

from datetime import datetime

from service.audit.figures import all_svg
from service.audit.report import AuditReport
from service.web import render


def period_text(report: AuditReport) -> str:
    """E.g. "2026-11-01 to 2026-11-30", "from 2026-11-01", "" (whole journal)."""

    def day(text: str | None) -> str | None:
        return None if text is None else datetime.fromisoformat(text).strftime("%Y-%m-%d %H:%M")

    since, until = day(report.since), day(report.until)
    if since and until:
        return f"{since} to {until}"
    if since:
        return f"from {since}"
    if until:
        return f"until {until}"
    return ""


def audit_html(
    report: AuditReport,
    *,
    node: str = "",
    back_link: str = "",
    period_links: tuple[tuple[str, str], ...] = (),
    identities: bool = False,
) -> str:
    """The page; ``back_link``/``period_links``: navigation when served by the node."""
    return render(
        "audit.html.j2",
        report=report,
        charts=all_svg(report),
        period=period_text(report),
        node=node,
        back_link=back_link,
        period_links=period_links,
        identities=identities,
    )
