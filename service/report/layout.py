"""Layout of the summary: type sizes, word wrap, and the flow of rows onto pages.

The page is a column of rows.  Each section (:mod:`service.report.sections`) turns its content
into rows of known height at a given type scale; :func:`paginate` places them top to bottom,
above the footer.  The layout is measured at the largest type scale first and at smaller ones
until everything fits on one page; text is wrapped, never cut or ended with "…".  If the
content does not fit even at the smallest scale (which stays readable at 80 dpi), the rows go
on to a second page rather than being cut.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Literal

from service.report.draw import Canvas
from service.report.fonts import text_width

PageSize = Literal["A4", "Letter"]

#: page sizes in PDF points (1/72 inch): ISO 216 A4 is 210 x 297 mm; US Letter 8.5 x 11 in
PAGE_SIZES_PT: dict[str, tuple[float, float]] = {
    "A4": (210 / 25.4 * 72, 297 / 25.4 * 72),
    "Letter": (8.5 * 72, 11 * 72),
}

MARGIN = 36.0

#: type scales tried in turn, largest first, until the page fits
SCALES = (1.0, 0.96, 0.92, 0.88, 0.85, 0.82)

#: smallest type on the page, in points: 7 pt is 7.8 pixels at 80 dpi (common practice: about
#: 7 px is the least a sans-serif stays legible on screen)
MIN_SIZE = 7.0


@dataclass(frozen=True)
class Type:
    """Type sizes (points) at one scale; none below :data:`MIN_SIZE`."""

    k: float

    def _at(self, size: float) -> float:
        return max(size * self.k, MIN_SIZE)

    @property
    def title(self) -> float:
        return self._at(15)

    @property
    def conclusion(self) -> float:
        return self._at(13)

    @property
    def heading(self) -> float:
        return self._at(10)

    @property
    def body(self) -> float:
        return self._at(9)

    @property
    def small(self) -> float:
        return self._at(8)

    @property
    def tiny(self) -> float:
        """Tick labels and the footer."""
        return self._at(7.5)

    def lead(self, size: float) -> float:
        return size * 1.3


def wrap(s: str, width: float, size: float, bold: bool = False) -> list[str]:
    """Greedy word wrap to ``width`` points; a word longer than a line is broken inside (never
    cut).  Paragraphs (newlines) are kept."""
    lines: list[str] = []
    space = text_width(" ", size, bold)
    for paragraph in s.splitlines() or [""]:
        line, used = "", 0.0
        for word in paragraph.split():
            w = text_width(word, size, bold)
            if line and used + space + w <= width:
                line, used = f"{line} {word}", used + space + w
                continue
            if line:
                lines.append(line)
            while w > width and len(word) > 1:
                cut = len(word) - 1
                while cut > 1 and text_width(word[:cut], size, bold) > width:
                    cut -= 1
                lines.append(word[:cut])
                word = word[cut:]
                w = text_width(word, size, bold)
            line, used = word, w
        lines.append(line)
    return lines


#: draws a row at the given top y
Draw = Callable[[Canvas, float], None]


@dataclass(frozen=True)
class Row:
    """A piece of the page that is never split: its height, and how to draw it at a top y.
    ``keep`` keeps it on the same page as the next row (headings)."""

    height: float
    draw: Draw
    keep: bool = False


def paginate(rows: Sequence[Row], top: float, bottom: float) -> list[list[tuple[Row, float]]]:
    """Rows placed on pages, each with its top y; a new page starts when the next row (with
    the rows kept with it) would pass ``bottom``."""
    pages: list[list[tuple[Row, float]]] = [[]]
    y = top
    i = 0
    while i < len(rows):
        j = i
        need = rows[j].height
        while rows[j].keep and j + 1 < len(rows):
            j += 1
            need += rows[j].height
        if y + need > bottom and pages[-1]:
            pages.append([])
            y = top
        for row in rows[i : j + 1]:
            pages[-1].append((row, y))
            y += row.height
        i = j + 1
    return pages


def total_height(rows: Sequence[Row]) -> float:
    return sum(r.height for r in rows)
