"""Server-rendered pages (the audit report and the node's status page): Jinja2 templates
packaged with the code, HTML escaped by default, no script, no external resource."""

from __future__ import annotations

import functools
from datetime import datetime
from typing import Any

from jinja2 import Environment, PackageLoader, StrictUndefined, select_autoescape

from service.audit.figures import pct
from service.audit.labels import guideline_label, measure_label, outcome_label, pathway_label


def duration(seconds: float | None) -> str:
    """A short human duration: 0.42 -> "0.42 s", 95 -> "1 min 35 s", None -> "–"."""
    if seconds is None:
        return "–"
    if seconds < 10:
        return f"{seconds:.2g} s" if seconds < 1 else f"{seconds:.1f} s"
    if seconds < 120:
        return f"{seconds:.0f} s"
    minutes, secs = divmod(round(seconds), 60)
    if minutes < 120:
        return f"{minutes} min {secs} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes} min"


def when(ts: float | None) -> str:
    """Epoch seconds as local "YYYY-MM-DD HH:MM:SS"."""
    if ts is None:
        return "–"
    return datetime.fromtimestamp(ts).strftime("%Y-%m-%d %H:%M:%S")


def _lower_first(text: str) -> str:
    """A label inside a sentence: "Septal e′" -> "septal e′"; "LVEF", "TR peak velocity" and
    "E/A ratio" stay as they are."""
    if len(text) > 1 and text[0].isupper() and text[1].islower():
        return text[0].lower() + text[1:]
    return text


@functools.cache
def environment() -> Environment:
    env = Environment(
        loader=PackageLoader("service.web", "templates"),
        autoescape=select_autoescape(enabled_extensions=("html", "j2"), default=True),
        undefined=StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters.update(
        pct=pct,
        duration=duration,
        when=when,
        outcome=outcome_label,
        outcome_short=lambda t: outcome_label(t, short=True),
        pathway=pathway_label,
        pathway_short=lambda t: pathway_label(t, short=True),
        measure=measure_label,
        measure_lower=lambda t: _lower_first(measure_label(t)),
        guideline=guideline_label,
    )
    return env


def render(template: str, **context: Any) -> str:
    return environment().get_template(template).render(**context)
