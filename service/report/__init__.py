"""Human-readable renderings of a grading result (the summary PDF).

``summary_pdf`` renders the page from ``sections`` (what is said, in which order), laid out by
``layout`` (type sizes, wrapping, pages) and drawn with ``draw`` (primitives on a reportlab
canvas) in the font of ``fonts``; ``identity`` and ``numbers`` format the header and values.
"""

from service.report.identity import SourceDescription, SummaryIdentity, identity_from_dataset
from service.report.summary_pdf import render_summary_pdf

__all__ = ["SourceDescription", "SummaryIdentity", "identity_from_dataset", "render_summary_pdf"]
