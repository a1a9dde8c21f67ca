"""Drawing primitives of the summary page: text, lines, rectangles and verdict markers on a
reportlab canvas, in points with the origin at the top left and y growing downwards (as the
page is laid out).

Criterion markers differ by shape *and* fill, not only by colour, so the chart reads in
greyscale and for colour-blind readers (colours from the Okabe-Ito palette).
"""

from __future__ import annotations

from typing import Any, NamedTuple

from service.model import Verdict
from service.report.fonts import printable, registered, text_width

#: Okabe-Ito colour-blind-safe palette (Okabe & Ito 2008, "Color Universal Design")
OKABE_ITO = {
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
    "black": "#000000",
}

INK = "#1a1a1a"
GREY = "#4d4d4d"  # secondary text: dark enough to read at 80 dpi
LIGHT = "#bdbdbd"
RULE = "#e0e0e0"
PANEL = "#eef4f9"  # the conclusion's background
STRIPE = "#f3f3f3"


def tint(colour: str, amount: float) -> str:
    """``colour`` mixed with white: ``amount`` 1 is the colour, 0 white (an opaque tint draws
    faster and prints the same as a transparent fill)."""
    r, g, b = (int(colour[i : i + 2], 16) for i in (1, 3, 5))
    mix = [round(255 - (255 - c) * amount) for c in (r, g, b)]
    return "#" + "".join(f"{c:02x}" for c in mix)


class Marker(NamedTuple):
    """How a measured value is drawn: shape and fill carry the verdict, colour repeats it."""

    shape: str  # "^" triangle, "o" circle
    filled: bool
    colour: str
    words: str  # printed beside the value, so the page reads without the marker too


def marker_for(verdict: Verdict) -> Marker | None:
    """Met: filled vermillion triangle.  Not met: hollow blue circle.  Unavailable: no marker
    (the row says "not available"; a missing value is never drawn as zero)."""
    match verdict:
        case Verdict.met:
            return Marker("^", True, OKABE_ITO["vermillion"], "met")
        case Verdict.not_met:
            return Marker("o", False, OKABE_ITO["blue"], "not met")
        case Verdict.unavailable:
            return None
    raise AssertionError(verdict)  # pragma: no cover


class Canvas:
    """A reportlab canvas seen from the top left of the page, y downwards."""

    def __init__(self, rl: Any, page_height: float) -> None:
        from reportlab.lib.colors import HexColor

        self.rl = rl
        self.h = page_height
        self._regular, self._bold = registered()
        self._colours: dict[str, Any] = {}
        self._hex = HexColor
        self._font: tuple[str, float] | None = None
        self._fill: str | None = None
        self._text_fill: str | None = None
        self._stroke: str | None = None
        #: all of a page's text goes into one text object, drawn over the shapes by
        #: :meth:`finish` (one object instead of one per string: fewer PDF operators)
        self._words = rl.beginText()

    def _colour(self, c: str) -> Any:
        found = self._colours.get(c)
        if found is None:
            found = self._colours[c] = self._hex(c)
        return found

    def _set_fill(self, c: str) -> None:
        if c != self._fill:
            self.rl.setFillColor(self._colour(c))
            self._fill = c

    def _set_stroke(self, c: str) -> None:
        if c != self._stroke:
            self.rl.setStrokeColor(self._colour(c))
            self._stroke = c

    def text(
        self,
        x: float,
        baseline: float,
        s: str,
        size: float,
        *,
        bold: bool = False,
        colour: str = INK,
        align: str = "left",
    ) -> None:
        if not s:
            return
        words = self._words
        font = (self._bold if bold else self._regular, size)
        if font != self._font:
            words.setFont(*font)
            self._font = font
        if colour != self._text_fill:
            words.setFillColor(self._colour(colour))
            self._text_fill = colour
        s = printable(s)
        if align != "left":
            w = text_width(s, size, bold)
            x -= w if align == "right" else w / 2
        words.setTextOrigin(x, self.h - baseline)
        words.textOut(s)

    def finish(self) -> None:
        """Draw the page's text (over everything drawn so far)."""
        self.rl.drawText(self._words)
        self._words = self.rl.beginText()
        self._font = self._text_fill = None

    def line(
        self,
        x0: float,
        y0: float,
        x1: float,
        y1: float,
        *,
        colour: str = INK,
        width: float = 0.8,
        dash: tuple[float, float] | None = None,
    ) -> None:
        self._set_stroke(colour)
        self.rl.setLineWidth(width)
        if dash:
            self.rl.setDash(*dash)
        self.rl.line(x0, self.h - y0, x1, self.h - y1)
        if dash:
            self.rl.setDash()

    def rect(
        self,
        x: float,
        y: float,
        w: float,
        h: float,
        *,
        fill: str | None = None,
        stroke: str | None = None,
        width: float = 0.8,
    ) -> None:
        if fill:
            self._set_fill(fill)
        if stroke:
            self._set_stroke(stroke)
            self.rl.setLineWidth(width)
        self.rl.rect(x, self.h - y - h, w, h, stroke=1 if stroke else 0, fill=1 if fill else 0)

    def marker(self, x: float, y: float, m: Marker, size: float) -> None:
        """A verdict marker centred on (x, y), ``size`` points across."""
        r = size / 2
        cy = self.h - y
        if m.shape == "^":
            self._set_fill(m.colour)
            self._set_stroke(INK)
            self.rl.setLineWidth(0.8)
            p = self.rl.beginPath()
            p.moveTo(x - r, cy - r * 0.85)
            p.lineTo(x + r, cy - r * 0.85)
            p.lineTo(x, cy + r)
            p.close()
            self.rl.drawPath(p, fill=1, stroke=1)
        else:
            self._set_fill("#ffffff")
            self._set_stroke(m.colour)
            self.rl.setLineWidth(1.5)
            self.rl.circle(x, cy, r * 0.8, stroke=1, fill=1)
