"""Human-readable renderings of a grading result (the one-page PDF summary)."""

from service.report.summary_pdf import (
    SourceDescription,
    SummaryIdentity,
    identity_from_dataset,
    render_summary_pdf,
)

__all__ = ["SourceDescription", "SummaryIdentity", "identity_from_dataset", "render_summary_pdf"]
