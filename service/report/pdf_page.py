"""A lean PDF writer for the summary page, checked against reportlab.

Why: with reportlab the summary cost about 6 ms of CPU a page, more than grading the study;
half of it is work that is the same on every page (the two embedded fonts' objects: widths,
Unicode maps, the font programs) and the rest is reportlab's general-purpose handling of each
string (docs/performance.md, "Summary PDF").  This writer makes the font objects once per
process, with reportlab's own subsetting and Unicode maps (so the fonts are byte for byte the
ones reportlab embeds), and writes each page's content stream directly.  It knows only what
the summary draws: text in the two faces, lines, rectangles, triangles and circles.

It draws only pages whose text is all in the font's fixed repertoire
(:data:`service.report.fonts.REPERTOIRE`); any other character raises :class:`NotInRepertoire`
and the page is drawn by reportlab instead (``service.report.summary_pdf``).
``tests/test_pdf_page.py`` renders the same summaries both ways and compares the text poppler
extracts and the pixels it renders.
"""

from __future__ import annotations

import threading
from functools import cache
from typing import Any

from service.report.draw import INK, Marker
from service.report.fonts import REPERTOIRE, printable, registered, text_width


class NotInRepertoire(Exception):
    """A character this writer has no code for: reportlab draws the page."""


#: fixed object numbers: catalog, pages, info, then per face: font, descriptor, program, cmap
_CATALOG, _PAGES, _INFO = 1, 2, 3
_FIRST_FONT = 4
_lock = threading.Lock()


def _num(v: float) -> str:
    """A number as PDF writes it: at most 3 decimals, no trailing zeros."""
    if v == int(v):
        return str(int(v))
    text = f"{v:.3f}".rstrip("0").rstrip(".")
    return "0" if text in ("-0", "") else text


def _colour(hex_colour: str) -> str:
    r, g, b = (int(hex_colour[i : i + 2], 16) / 255 for i in (1, 3, 5))
    return f"{_num(r)} {_num(g)} {_num(b)}"


def _obj(number: int, body: bytes) -> bytes:
    return b"%d 0 obj\n" % number + body + b"\nendobj\n"


def _stream(number: int, extra: str, data: bytes) -> bytes:
    head = f"<< /Length {len(data)}{extra} >>\nstream\n".encode("latin-1")
    return _obj(number, head + data + b"\nendstream")


@cache
def _fonts() -> tuple[
    dict[int, int], dict[int, int], tuple[tuple[int, bytes], ...], tuple[str, str]
]:
    """Per process: the character codes of each face (the same for both: reportlab's own
    assignment of the repertoire) and the serialised font objects, numbered from
    :data:`_FIRST_FONT`; the resource names of the two faces."""
    import io

    from reportlab.pdfbase import pdfmetrics
    from reportlab.pdfbase.ttfonts import FF_NONSYMBOLIC, FF_SYMBOLIC, makeToUnicodeCMap
    from reportlab.pdfgen.canvas import Canvas as PdfCanvas

    names = registered()
    codes: list[dict[int, int]] = []
    parts: list[tuple[int, bytes]] = []
    number = _FIRST_FONT
    with _lock:
        probe = PdfCanvas(io.BytesIO())
        for name in names:
            prefix = "AAAAAA"  # subset 0 of each face, as reportlab tags it
            font = pdfmetrics.getFont(name)
            font.assign_repertoire(probe._doc)
            state = font.state[probe._doc]
            subset = list(state.subsets[0])
            codes.append(dict(state.assignments))
            del font.state[probe._doc]
            face = font.face
            base = f"{prefix}+{face.name.decode('latin-1')}{face.subfontNameX.decode('latin-1')}"
            widths = " ".join(_num(face.getCharWidth(u)) for u in subset)
            program = face.makeSubset(subset)
            cmap = makeToUnicodeCMap(base, subset).encode("latin-1")
            flags = (face.flags & ~FF_NONSYMBOLIC) | FF_SYMBOLIC
            font_obj, descriptor, program_obj, cmap_obj = number, number + 1, number + 2, number + 3
            bbox = " ".join(_num(v) for v in face.bbox)
            parts.append(
                (
                    font_obj,
                    _obj(
                        font_obj,
                        (
                            f"<< /Type /Font /Subtype /TrueType /BaseFont /{base} /FirstChar 0 "
                            f"/LastChar {len(subset) - 1} /Widths [ {widths} ] "
                            f"/FontDescriptor {descriptor} 0 R /ToUnicode {cmap_obj} 0 R >>"
                        ).encode("latin-1"),
                    ),
                )
            )
            parts.append(
                (
                    descriptor,
                    _obj(
                        descriptor,
                        (
                            f"<< /Type /FontDescriptor /Ascent {_num(face.ascent)} "
                            f"/CapHeight {_num(face.capHeight)} /Descent {_num(face.descent)} "
                            f"/Flags {flags} /FontBBox [ {bbox} ] /FontName /{base} "
                            f"/ItalicAngle {_num(face.italicAngle)} /StemV {_num(face.stemV)} "
                            f"/FontFile2 {program_obj} 0 R "
                            f"/MissingWidth {_num(face.defaultWidth)} >>"
                        ).encode("latin-1"),
                    ),
                )
            )
            parts.append((program_obj, _stream(program_obj, f" /Length1 {len(program)}", program)))
            parts.append((cmap_obj, _stream(cmap_obj, "", cmap)))
            number += 4
    return codes[0], codes[1], tuple(parts), ("F1", "F2")


def _pdf_text(s: str) -> bytes:
    """A PDF literal string for document information (ASCII, escaped)."""
    safe = s.encode("ascii", "replace").replace(b"\\", b"\\\\")
    return b"(" + safe.replace(b"(", b"\\(").replace(b")", b"\\)") + b")"


class PageWriter:
    """One page's content, drawn with the same calls as :class:`service.report.draw.Canvas`
    (top-left origin, y downwards)."""

    def __init__(self, page_height: float) -> None:
        self.h = page_height
        regular, bold, _, (self._f1, self._f2) = _fonts()
        self._codes = (regular, bold)
        self._ops: list[str] = []
        self._text: list[str] = []
        self._fill: str | None = None
        self._stroke: str | None = None
        self._width: float | None = None
        self._font: tuple[int, float] | None = None
        self._text_fill: str | None = None

    # -- graphics ----------------------------------------------------------------------------

    def _set_fill(self, c: str) -> None:
        if c != self._fill:
            self._ops.append(f"{_colour(c)} rg")
            self._fill = c

    def _set_stroke(self, c: str, width: float) -> None:
        if c != self._stroke:
            self._ops.append(f"{_colour(c)} RG")
            self._stroke = c
        if width != self._width:
            self._ops.append(f"{_num(width)} w")
            self._width = width

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
        self._set_stroke(colour, width)
        h = self.h
        path = f"{_num(x0)} {_num(h - y0)} m {_num(x1)} {_num(h - y1)} l S"
        if dash:
            self._ops.append(f"[{_num(dash[0])} {_num(dash[1])}] 0 d {path} [] 0 d")
        else:
            self._ops.append(path)

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
            self._set_stroke(stroke, width)
        op = "B" if fill and stroke else "f" if fill else "S" if stroke else "n"
        self._ops.append(f"{_num(x)} {_num(self.h - y - h)} {_num(w)} {_num(h)} re {op}")

    def marker(self, x: float, y: float, m: Marker, size: float) -> None:
        r = size / 2
        cy = self.h - y
        if m.shape == "^":
            self._set_fill(m.colour)
            self._set_stroke(INK, 0.8)
            self._ops.append(
                f"{_num(x - r)} {_num(cy - r * 0.85)} m {_num(x + r)} {_num(cy - r * 0.85)} l "
                f"{_num(x)} {_num(cy + r)} l h B"
            )
        else:
            self._set_fill("#ffffff")
            self._set_stroke(m.colour, 1.5)
            k = r * 0.8
            c = k * 0.5523  # Bézier control distance for a quarter circle
            # four Bézier quarter circles, counter-clockwise from the right
            pts = [
                ((k, c), (c, k), (0, k)),
                ((-c, k), (-k, c), (-k, 0)),
                ((-k, -c), (-c, -k), (0, -k)),
                ((c, -k), (k, -c), (k, 0)),
            ]
            path = [f"{_num(x + k)} {_num(cy)} m"]
            for quarter in pts:
                path.append(
                    " ".join(f"{_num(x + dx)} {_num(cy + dy)}" for dx, dy in quarter) + " c"
                )
            self._ops.append(" ".join(path) + " h B")

    # -- text --------------------------------------------------------------------------------

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
        s = printable(s)
        codes = self._codes[1 if bold else 0]
        try:
            encoded = bytes(codes[ord(ch)] for ch in s).hex()
        except KeyError:
            raise NotInRepertoire(s) from None
        if align != "left":
            w = text_width(s, size, bold)
            x -= w if align == "right" else w / 2
        out = self._text
        font = (1 if bold else 0, size)
        if font != self._font:
            out.append(f"/{self._f2 if bold else self._f1} {_num(size)} Tf")
            self._font = font
        if colour != self._text_fill:
            out.append(f"{_colour(colour)} rg")
            self._text_fill = colour
        out.append(f"1 0 0 1 {_num(x)} {_num(self.h - baseline)} Tm <{encoded}> Tj")

    def finish(self) -> None:
        """Nothing to do: the page's text is written over its shapes by :meth:`content`."""

    def content(self) -> bytes:
        text = ["BT", *self._text, "ET"] if self._text else []
        return "\n".join([*self._ops, *text]).encode("latin-1")


def document(pages: list[PageWriter], width: float, height: float, info: dict[str, str]) -> bytes:
    """The PDF file holding ``pages`` (same size each), with document information ``info``."""
    _, _, fonts, (f1, f2) = _fonts()
    first_page = _FIRST_FONT + 8
    page_numbers = [first_page + 2 * i for i in range(len(pages))]
    objects: list[tuple[int, bytes]] = [
        (_CATALOG, _obj(_CATALOG, b"<< /Type /Catalog /Pages 2 0 R >>")),
        (
            _PAGES,
            _obj(
                _PAGES,
                b"<< /Type /Pages /Count %d /Kids [ %s ] >>"
                % (len(pages), b" ".join(b"%d 0 R" % n for n in page_numbers)),
            ),
        ),
        (
            _INFO,
            _obj(
                _INFO,
                b"<< "
                + b" ".join(b"/%s %s" % (k.encode(), _pdf_text(v)) for k, v in info.items())
                + b" >>",
            ),
        ),
        *fonts,
    ]
    resources = (
        f"/Resources << /Font << /{f1} {_FIRST_FONT} 0 R /{f2} {_FIRST_FONT + 4} 0 R >> "
        "/ProcSet [ /PDF /Text ] >>"
    )
    box = f"/MediaBox [ 0 0 {_num(width)} {_num(height)} ]"
    for number, page in zip(page_numbers, pages, strict=True):
        body = (
            f"<< /Type /Page /Parent {_PAGES} 0 R {box} {resources} /Contents {number + 1} 0 R >>"
        ).encode("latin-1")
        objects.append((number, _obj(number, body)))
        objects.append((number + 1, _stream(number + 1, "", page.content())))
    objects.sort()
    out = [b"%PDF-1.4\n%\xe2\xe3\xcf\xd3\n"]
    at = len(out[0])
    offsets = []
    for _, data in objects:
        offsets.append(at)
        out.append(data)
        at += len(data)
    count = len(objects) + 1
    out.append(
        b"xref\n0 %d\n0000000000 65535 f \n" % count
        + b"".join(b"%010d 00000 n \n" % o for o in offsets)
    )
    out.append(
        b"trailer\n<< /Size %d /Root 1 0 R /Info 3 0 R >>\nstartxref\n%d\n%%%%EOF\n" % (count, at)
    )
    return b"".join(out)


def can_write() -> Any:
    """The writer's fonts, made now (a node can call this at start-up)."""
    return _fonts()


__all__ = ["REPERTOIRE", "NotInRepertoire", "PageWriter", "can_write", "document"]
