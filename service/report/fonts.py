"""The page's typeface: DejaVu Sans (shipped with matplotlib; it covers e′, ≤, ≥, ², Greek and
Cyrillic), reduced once to the characters a summary can hold and embedded as TrueType by
reportlab.  Text is measured with the same font, so the layout knows each line's width.
"""

from __future__ import annotations

import atexit
import hashlib
import importlib.util
import os
import shutil
import tempfile
import threading
from functools import cache, lru_cache
from pathlib import Path

#: Unicode blocks kept in the page's font: Latin (basic, Latin-1, Extended-A/B, Additional),
#: Greek, Cyrillic, punctuation, super/subscripts, currency, letterlike symbols, arrows,
#: mathematical operators, geometric shapes.  Other characters print as "?".
FONT_RANGES: tuple[tuple[int, int], ...] = (
    (0x0020, 0x007E),
    (0x00A0, 0x024F),
    (0x0370, 0x03FF),
    (0x0400, 0x04FF),
    (0x1E00, 0x1EFF),
    (0x2000, 0x206F),
    (0x2070, 0x209F),
    (0x20A0, 0x20CF),
    (0x2100, 0x214F),
    (0x2190, 0x21FF),
    (0x2200, 0x22FF),
    (0x25A0, 0x25FF),
)

REGULAR = "DSR-Sans"
BOLD = "DSR-Sans-Bold"

#: bump when :func:`_reduce_font` changes, so cached copies are rebuilt
_FONT_RECIPE = "2"
_lock = threading.Lock()


def _reduce_font(source: Path, target: Path) -> None:
    """Write a copy of a TrueType font cut to :data:`FONT_RANGES`, without layout tables
    (GSUB, GPOS, GDEF, kern) and hinting: a PDF places every glyph itself, and the smaller
    font is read and subset faster for each page.  Outlines and metrics are unchanged (the
    page is set without kerning)."""
    from fontTools import subset
    from fontTools.ttLib import TTFont

    options = subset.Options()
    options.layout_features = []
    options.drop_tables += ["GSUB", "GPOS", "GDEF", "kern", "FFTM"]
    options.hinting = False
    options.glyph_names = True
    options.notdef_outline = True
    options.name_IDs = ["*"]  # keep the font's names and its licence text
    options.name_languages = ["*"]
    subsetter = subset.Subsetter(options)
    subsetter.populate(unicodes=[u for lo, hi in FONT_RANGES for u in range(lo, hi + 1)])
    with TTFont(source) as font:
        subsetter.subset(font)
        font.save(target)


def _reduced_copies(originals: tuple[Path, ...], folder: Path) -> tuple[str, ...]:
    """Reduced copies of ``originals`` in ``folder``, made once and reused: the file name
    carries a digest of the source font, the ranges, the recipe and the fontTools version, and
    files are written under a temporary name then renamed, so concurrent processes never see a
    half-written font."""
    import fontTools

    copies = []
    for source in originals:
        h = hashlib.sha256(source.read_bytes())
        h.update(repr((FONT_RANGES, _FONT_RECIPE, fontTools.version)).encode())
        target = folder / f"{source.stem}-{h.hexdigest()[:16]}.ttf"
        if not target.exists():
            folder.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(dir=folder, suffix=".part")
            os.close(fd)
            try:
                _reduce_font(source, Path(tmp))
                os.replace(tmp, target)
            finally:
                if os.path.exists(tmp):
                    os.unlink(tmp)
        copies.append(str(target))
    return tuple(copies)


def _originals() -> tuple[Path, Path]:
    """matplotlib's bundled DejaVu Sans, found without importing matplotlib (its import costs
    more than drawing a page)."""
    spec = importlib.util.find_spec("matplotlib")
    if spec is None or not spec.submodule_search_locations:
        raise RuntimeError("matplotlib (which ships the page's font) is not installed")
    folder = Path(next(iter(spec.submodule_search_locations))) / "mpl-data" / "fonts" / "ttf"
    return folder / "DejaVuSans.ttf", folder / "DejaVuSans-Bold.ttf"


def _cache_folder() -> Path:
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "diastolic-sr" / "fonts"


@cache
def font_files() -> tuple[str, str]:
    """Paths of the regular and bold faces, reduced by :func:`_reduce_font`: kept in the user's
    cache folder and reused by later processes; failing that, made in a temporary folder for
    this process; failing that, the originals (slower, same look)."""
    originals = _originals()
    try:
        regular, bold = _reduced_copies(originals, _cache_folder())
        return (regular, bold)
    except Exception:  # cache folder not writable
        pass
    try:
        tmp = Path(tempfile.mkdtemp(prefix="diastolic-sr-fonts-"))
        atexit.register(shutil.rmtree, tmp, ignore_errors=True)
        regular, bold = _reduced_copies(originals, tmp)
        return (regular, bold)
    except Exception:  # no writable temporary folder either
        return (str(originals[0]), str(originals[1]))


#: characters every page's font subset starts with, in this order, so that the embedded
#: subset is the same from page to page (and made once per process, :func:`start_document`)
REPERTOIRE = "".join(chr(c) for c in range(0x20, 0x7F)) + "′≤≥²·•—–−§“”’"


@cache
def registered() -> tuple[str, str]:
    """The two faces registered with reportlab (once per process); their names.  Each face
    keeps the subsets it has made: a page whose characters are all in :data:`REPERTOIRE`
    reuses the subset of the pages before it (reportlab makes it again otherwise)."""
    from reportlab.pdfbase import pdfmetrics
    from reportlab.pdfbase.ttfonts import TTFont

    regular, bold = font_files()
    with _lock:
        for name, path in ((REGULAR, regular), (BOLD, bold)):
            font = TTFont(name, path)
            _remember_subsets(font)
            pdfmetrics.registerFont(font)
    return REGULAR, BOLD


def _remember_subsets(font: object) -> None:
    """Let ``font`` (a reportlab TTFont) reuse what does not change between pages: the subset
    made for a set of characters, and how a string of :data:`REPERTOIRE` characters is split
    into subset codes (the same in every document once :func:`start_document` has given the
    repertoire its codes).  Strings with other characters take reportlab's own path."""
    face = font.face  # type: ignore[attr-defined]
    made = face.makeSubset
    subsets = lru_cache(maxsize=32)(lambda key: made(list(key)))
    face.makeSubset = lambda subset: subsets(tuple(subset))
    split = font.splitString  # type: ignore[attr-defined]
    known = frozenset(REPERTOIRE)
    splits: dict[str, list] = {}

    def split_string(text: str, doc: object, encoding: str = "utf-8") -> list:
        found = splits.get(text)
        if found is not None:
            return found
        parts = split(text, doc, encoding)
        if known.issuperset(text) and len(splits) < 20000:
            splits[text] = parts
        return parts

    font.splitString = split_string  # type: ignore[attr-defined]
    # a new document's codes must really be assigned: this bypasses the cache
    font.assign_repertoire = lambda doc: split(REPERTOIRE, doc)  # type: ignore[attr-defined]


def start_document(doc: object) -> None:
    """Give the page's characters their subset codes in a fixed order for a new document
    (reportlab assigns codes in the order characters are first drawn), so every page built
    from the same characters embeds the same, already made, font subset."""
    from reportlab.pdfbase import pdfmetrics

    for name in registered():
        pdfmetrics.getFont(name).assign_repertoire(doc)


@cache
def _charset() -> frozenset[int]:
    from reportlab.pdfbase import pdfmetrics

    regular, bold = registered()
    faces = [pdfmetrics.getFont(name).face for name in (regular, bold)]
    return frozenset(faces[0].charToGlyph) & frozenset(faces[1].charToGlyph)


def printable(s: str) -> str:
    """``s`` with characters the page's font lacks replaced by "?" (never a blank box)."""
    if s.isascii() and s.isprintable():  # the font has every printable ASCII character
        return s
    return _printable(s)


@lru_cache(maxsize=4096)
def _printable(s: str) -> str:
    charset = _charset()
    return "".join(ch if ord(ch) in charset else "?" for ch in s)


def text_width(s: str, size: float, bold: bool = False) -> float:
    """Advance width of ``s`` in points at ``size`` points (no kerning, as the page is set):
    the width at 1 point, measured once per string and face, times the size."""
    if not s:
        return 0.0
    return _unit_width(s, bold) * size


@lru_cache(maxsize=16384)
def _unit_width(s: str, bold: bool) -> float:
    from reportlab.pdfbase.pdfmetrics import stringWidth

    regular, heavy = registered()
    return stringWidth(printable(s), heavy if bold else regular, 1.0)
