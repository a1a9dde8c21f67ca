"""One-page visual summary of a grading result, as PDF bytes.

The page reads top to bottom in the order a reader decides: who and which study, the
conclusion in one line, the caution, a chart of every criterion on its own physiological
scale, then how the result was reached and the measurements behind it.  The footer names the
software, the rule set and the result SR the page belongs to.

Drawing uses matplotlib's PDF backend with TrueType fonts embedded (``pdf.fonttype`` 42), one
full-page axes in points with the origin at the top left, and a small layout pass: the page is
measured first, then drawn at the largest type scale that fits on one page.  If the content
still does not fit at the smallest scale, the two bottom columns are cut with a line saying how
much was left out; the page never spills onto a second one.

Criterion markers differ by shape *and* fill, not only by colour, so the chart reads in
greyscale and for colour-blind readers (colours from the Okabe-Ito palette).
"""

from __future__ import annotations

import atexit
import hashlib
import io
import math
import os
import re
import shutil
import tempfile
import threading
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date
from functools import cache
from pathlib import Path
from typing import Literal, NamedTuple

import pydicom
from pydantic import BaseModel, ConfigDict

from service import SOFTWARE_NAME, __version__
from service.errors import UserError
from service.model import (
    CAUTION,
    Assessment,
    AssessmentSet,
    Comparison,
    Criterion,
    FillingPressure,
    Grade,
    Guideline,
    Measure,
    Measurements,
    MeasureValue,
    Origin,
    Pathway,
    Verdict,
)

PageSize = Literal["A4", "Letter"]

#: page sizes in PDF points (1/72 inch): ISO 216 A4 is 210 x 297 mm; US Letter 8.5 x 11 in
PAGE_SIZES_PT: dict[str, tuple[float, float]] = {
    "A4": (210 / 25.4 * 72, 297 / 25.4 * 72),
    "Letter": (8.5 * 72, 11 * 72),
}

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
GREY = "#5c5c5c"
LIGHT = "#bdbdbd"
FONT_FAMILY = "DejaVu Sans"  # ships with matplotlib; wide Unicode coverage (e′, ≤, ², …)


# ---------------------------------------------------------------------------------------------
# Identity shown in the header
# ---------------------------------------------------------------------------------------------


class _Frozen(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class SourceDescription(_Frozen):
    """One source SR as the header names it."""

    sop_instance_uid: str
    description: str = ""  # Series Description, else the document title's meaning
    manufacturer: str = ""
    model: str = ""


class SummaryIdentity(_Frozen):
    """Patient and study identity for the header, as plain strings in DICOM formats
    (dates YYYYMMDD, age as DICOM AS such as "064Y", sex M/F/O)."""

    patient_name: str = ""  # DICOM PN, e.g. "Quayle^Oona"
    patient_id: str = ""
    birth_date: str = ""
    age: str = ""
    sex: str = ""
    study_date: str = ""
    accession_number: str = ""
    study_description: str = ""
    institution: str = ""
    sources: tuple[SourceDescription, ...] = ()


def _text(ds: pydicom.Dataset, keyword: str) -> str:
    try:
        value = ds.get(keyword, None)
    except Exception:  # a malformed element must not stop the summary
        return ""
    if value is None:
        return ""
    if isinstance(value, pydicom.valuerep.PersonName):
        return str(value)
    if isinstance(value, pydicom.multival.MultiValue):
        return "\\".join(str(v) for v in value)
    return str(value).strip()


def _describe_source(ds: pydicom.Dataset) -> SourceDescription:
    description = _text(ds, "SeriesDescription")
    if not description:
        try:
            seq = ds.get("ConceptNameCodeSequence")
            if seq:
                description = str(seq[0].get("CodeMeaning", "")).strip()
        except Exception:
            description = ""
    return SourceDescription(
        sop_instance_uid=_text(ds, "SOPInstanceUID"),
        description=description,
        manufacturer=_text(ds, "Manufacturer"),
        model=_text(ds, "ManufacturerModelName"),
    )


def identity_from_dataset(ds: pydicom.Dataset, *more: pydicom.Dataset) -> SummaryIdentity:
    """Header identity from a source SR; further source SRs of the same study add to the list
    of sources.  Missing or malformed attributes give empty strings, never an exception."""
    if not isinstance(ds, pydicom.Dataset):
        raise UserError(f"identity_from_dataset needs a pydicom Dataset, got {type(ds).__name__}")
    return SummaryIdentity(
        patient_name=_text(ds, "PatientName"),
        patient_id=_text(ds, "PatientID"),
        birth_date=_text(ds, "PatientBirthDate"),
        age=_text(ds, "PatientAge"),
        sex=_text(ds, "PatientSex"),
        study_date=_text(ds, "StudyDate"),
        accession_number=_text(ds, "AccessionNumber"),
        study_description=_text(ds, "StudyDescription"),
        institution=_text(ds, "InstitutionName"),
        sources=tuple(_describe_source(d) for d in (ds, *more)),
    )


# ---------------------------------------------------------------------------------------------
# Wording
# ---------------------------------------------------------------------------------------------

GUIDELINE_NAMES: dict[Guideline, str] = {
    Guideline.ase_eacvi_2016: "ASE/EACVI 2016",
    Guideline.ase_2025: "ASE 2025",
    Guideline.bse_2024: "BSE 2024",
}

GRADE_WORDING: dict[Grade, str] = {
    Grade.normal: "Normal diastolic function",
    Grade.grade_1: "Grade 1 diastolic dysfunction",
    Grade.grade_2: "Grade 2 diastolic dysfunction",
    Grade.grade_3: "Grade 3 diastolic dysfunction",
    Grade.indeterminate: "Diastolic function indeterminate",
    Grade.not_gradable: "Not gradable",
}

PRESSURE_WORDING: dict[FillingPressure, str] = {
    FillingPressure.normal: "LV filling pressure normal",
    FillingPressure.elevated: "LV filling pressure elevated",
    FillingPressure.indeterminate: "LV filling pressure indeterminate",
    FillingPressure.not_estimated: "LV filling pressure not estimated",
}

PATHWAY_WORDING: dict[Pathway, str] = {
    Pathway.normal_lvef: "normal LVEF",
    Pathway.reduced_lvef_or_myocardial_disease: "reduced LVEF or myocardial disease",
    Pathway.sinus_general: "sinus rhythm, general algorithm",
    Pathway.atrial_fibrillation: "atrial fibrillation",
    Pathway.special_situation: "special situation",
    Pathway.not_applicable: "standard algorithm not applicable",
}

MEASURE_NAMES: dict[Measure, str] = {
    Measure.mitral_e: "Mitral E",
    Measure.mitral_a: "Mitral A",
    Measure.e_a_ratio: "E/A",
    Measure.deceleration_time: "E deceleration time",
    Measure.e_prime_septal: "Septal e′",
    Measure.e_prime_lateral: "Lateral e′",
    Measure.e_prime_average: "Average e′",
    Measure.e_e_prime_septal: "Septal E/e′",
    Measure.e_e_prime_lateral: "Lateral E/e′",
    Measure.e_e_prime_average: "Average E/e′",
    Measure.tr_peak_velocity: "TR peak velocity",
    Measure.pasp: "PA systolic pressure",
    Measure.lavi: "LA volume index",
    Measure.lvef: "LVEF",
    Measure.ivrt: "IVRT",
    Measure.pv_s_d_ratio: "Pulmonary vein S/D",
    Measure.la_reservoir_strain: "LA reservoir strain",
    Measure.age: "Age",
    Measure.e_acceleration_rate: "E acceleration rate",
    Measure.bmi: "BMI",
    Measure.heart_rate: "Heart rate",
    Measure.ar_a_duration: "Ar − A duration",
    Measure.mitral_e_valsalva: "Mitral E (Valsalva)",
    Measure.mitral_a_valsalva: "Mitral A (Valsalva)",
    Measure.e_a_ratio_valsalva: "E/A (Valsalva)",
}

_UNIT_DISPLAY = {
    "{ratio}": "",
    "mm[Hg]": "mmHg",
    "mL/m2": "mL/m²",
    "cm/s2": "cm/s²",
    "kg/m2": "kg/m²",
    "a": "years",
    "/min": "/min",
}

_COMPARISON_SYMBOL = {
    Comparison.gt: ">",
    Comparison.ge: "≥",
    Comparison.lt: "<",
    Comparison.le: "≤",
}

#: Display range of each measure's track in the criteria chart, in its canonical unit.  These
#: are drawing ranges that hold most adult values (common practice), not reference ranges; a
#: value or cut-off outside the range widens that row's track so nothing is drawn off-scale.
SCALES: dict[Measure, tuple[float, float]] = {
    Measure.mitral_e: (0, 150),
    Measure.mitral_a: (0, 150),
    Measure.e_a_ratio: (0, 4),
    Measure.deceleration_time: (50, 350),
    Measure.e_prime_septal: (0, 20),
    Measure.e_prime_lateral: (0, 20),
    Measure.e_prime_average: (0, 20),
    Measure.e_e_prime_septal: (0, 30),
    Measure.e_e_prime_lateral: (0, 30),
    Measure.e_e_prime_average: (0, 30),
    Measure.tr_peak_velocity: (1, 5),
    Measure.pasp: (10, 80),
    Measure.lavi: (10, 80),
    Measure.lvef: (10, 80),
    Measure.ivrt: (30, 150),
    Measure.pv_s_d_ratio: (0, 3),
    Measure.la_reservoir_strain: (0, 60),
    Measure.age: (0, 100),
    Measure.e_acceleration_rate: (0, 4000),
    Measure.bmi: (15, 50),
    Measure.heart_rate: (40, 160),
    Measure.ar_a_duration: (-60, 80),
    Measure.mitral_e_valsalva: (0, 150),
    Measure.mitral_a_valsalva: (0, 150),
    Measure.e_a_ratio_valsalva: (0, 4),
}


def unit_display(unit: str) -> str:
    return _UNIT_DISPLAY.get(unit, unit)


#: fewest decimals shown per unit (velocities in m/s read as "3.0", common practice)
_MIN_DECIMALS = {"m/s": 1}


def format_number(value: float, min_decimals: int = 0) -> str:
    """Two decimals at most (one from 100 up), trailing zeros dropped down to ``min_decimals``:
    14.0 → "14", 0.80 → "0.8", 14.96 → "14.96", 182.44 → "182.4"; 3.0 with one decimal → "3.0".
    Values are not rounded further, so a value just beside a cut-off never prints as the
    cut-off itself (at instrument precision)."""
    if not math.isfinite(value):
        return "—"
    decimals = 1 if abs(value) >= 100 else 2
    decimals = max(decimals, min_decimals)
    text = f"{value:.{decimals}f}"
    if "." in text:
        whole, frac = text.split(".")
        frac = frac.rstrip("0").ljust(min_decimals, "0")
        text = f"{whole}.{frac}" if frac else whole
    return "0" if text.strip("-0.") == "" else text


def format_value(value: float, unit: str) -> str:
    return format_number(value, _MIN_DECIMALS.get(unit, 0))


def _with_unit(value: float, unit: str) -> str:
    shown = unit_display(unit)
    return f"{format_value(value, unit)} {shown}".strip()


def scale_for(criterion: Criterion) -> tuple[float, float]:
    """Track range of a criterion row: the measure's physiological range, widened to hold the
    cut-off and the value when either falls outside it."""
    lo, hi = SCALES.get(criterion.measure, (0.0, 0.0))
    points = [
        p for p in (criterion.threshold, criterion.value) if p is not None and math.isfinite(p)
    ]
    if hi <= lo:  # unknown measure: from 0 to twice the cut-off
        cut = criterion.threshold if math.isfinite(criterion.threshold) else 1.0
        lo, hi = min(0.0, cut), max(cut * 2, 1.0)
    if not points:
        return float(lo), float(hi)
    span = hi - lo
    if min(points) < lo:
        lo = min(points) - 0.05 * span
    if max(points) > hi:
        hi = max(points) + 0.05 * span
    return float(lo), float(hi)


class Marker(NamedTuple):
    """How a measured value is drawn: shape and fill carry the verdict, colour repeats it."""

    shape: str  # matplotlib marker code
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


def source_wording(mv: MeasureValue) -> str:
    """Where a value came from, in the words of the measurements table."""
    match mv.origin:
        case Origin.measured:
            return "measured"
        case Origin.selected:
            return "selected in source"
        case Origin.device_mean:
            return f"device mean of {mv.n}" if mv.n > 1 else "device mean"
        case Origin.mean_of_repeats:
            return f"mean of {mv.n}"
        case Origin.derived:
            return "derived"
        case Origin.patient:
            return "patient record"
    return str(mv.origin)  # pragma: no cover


def conclusion_text(a: Assessment) -> str:
    """The conclusion in one sentence: grade and filling pressure, or why no grade was given."""
    pressure = PRESSURE_WORDING[a.filling_pressure]
    if a.pathway == Pathway.atrial_fibrillation:
        if a.grade in (Grade.normal, Grade.grade_1, Grade.grade_2, Grade.grade_3):
            return f"Atrial fibrillation: {GRADE_WORDING[a.grade]} · {pressure}"
        return f"{pressure} · no grade in atrial fibrillation"
    if a.pathway == Pathway.not_applicable:
        reason = a.pathway_reason.strip().rstrip(".")
        text = "No grade: the standard algorithm does not apply"
        return f"{text} ({reason})" if reason else text
    if a.grade == Grade.not_gradable:
        reason = a.pathway_reason.strip().rstrip(".")
        return f"Not gradable: {reason}" if reason else "Not gradable"
    return f"{GRADE_WORDING[a.grade]} · {pressure}"


def _date(value: str) -> str:
    v = value.strip()
    if re.fullmatch(r"\d{8}", v):
        return f"{v[:4]}-{v[4:6]}-{v[6:]}"
    return v


def _parse_date(value: str) -> date | None:
    v = value.strip()
    if not re.fullmatch(r"\d{8}", v):
        return None
    try:
        return date(int(v[:4]), int(v[4:6]), int(v[6:]))
    except ValueError:
        return None


def _age(identity: SummaryIdentity) -> str:
    m = re.fullmatch(r"(\d{3})([DWMY])", identity.age.strip())
    if m:
        unit = {"D": "days", "W": "weeks", "M": "months", "Y": "years"}[m.group(2)]
        return f"{int(m.group(1))} {unit}"
    born, seen = _parse_date(identity.birth_date), _parse_date(identity.study_date)
    if born and seen and seen >= born:
        years = seen.year - born.year - ((seen.month, seen.day) < (born.month, born.day))
        return f"{years} years"
    return identity.age.strip()


def _person_name(pn: str) -> str:
    alphabetic = pn.split("=")[0]
    parts = [p.strip() for p in alphabetic.split("^")]
    parts += [""] * (5 - len(parts))
    family, given, middle, prefix, suffix = parts[:5]
    rest = " ".join(p for p in (prefix, given, middle) if p)
    name = f"{family}, {rest}" if family and rest else family or rest
    return f"{name} {suffix}".strip()


_SEX = {"M": "male", "F": "female", "O": "other"}


# ---------------------------------------------------------------------------------------------
# Text measurement
# ---------------------------------------------------------------------------------------------

_font_lock = threading.Lock()
_render_lock = threading.Lock()
_font_dir: list[str] = []


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


def _reduce_font(source: Path, target: Path) -> None:
    """Write a copy of a TrueType font cut to :data:`FONT_RANGES`, without layout tables
    (GSUB, GPOS, GDEF, kern) and hinting.

    PDF places every glyph explicitly, so a viewer needs neither; but matplotlib subsets the
    font again on every page it embeds, and on the full font (about 6,000 glyphs with large
    layout tables) that costs more than drawing the page.  Outlines and metrics are unchanged
    (the page is laid out without kerning)."""
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


#: sub-folder of matplotlib's cache folder that holds the reduced fonts
_FONT_CACHE = "diastolic-sr-fonts"
#: bump when :func:`_reduce_font` changes, so cached copies are rebuilt
_FONT_RECIPE = "1"


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


@cache
def font_files() -> tuple[str, str]:
    """Paths of the regular and bold faces used for the page: matplotlib's bundled DejaVu Sans,
    reduced by :func:`_reduce_font`.  The copies are kept in matplotlib's cache folder and
    reused by later processes; failing that, made in a temporary folder for this process;
    failing that, the originals are used (slower, same look)."""
    import matplotlib

    folder = Path(matplotlib.get_data_path()) / "fonts" / "ttf"
    originals = (folder / "DejaVuSans.ttf", folder / "DejaVuSans-Bold.ttf")
    try:
        regular, bold = _reduced_copies(originals, Path(matplotlib.get_cachedir()) / _FONT_CACHE)
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


@cache
def _charset() -> frozenset[int]:
    from matplotlib import ft2font

    regular = ft2font.FT2Font(font_files()[0]).get_charmap()
    bold = ft2font.FT2Font(font_files()[1]).get_charmap()
    return frozenset(regular) & frozenset(bold)


def printable(s: str) -> str:
    """``s`` with characters the page's font lacks replaced by "?" (never a blank box)."""
    charset = _charset()
    return "".join(ch if ord(ch) in charset else "?" for ch in s)


@cache
def _advances(bold: bool) -> tuple[object, dict[str, float]]:
    from matplotlib import ft2font

    font = ft2font.FT2Font(font_files()[1 if bold else 0])
    font.set_size(100, 72)  # 100 pt at 72 dpi: one pixel per point
    return font, {}


def text_width(s: str, size: float, bold: bool = False) -> float:
    """Advance width of ``s`` in points at ``size`` points (sum of glyph advances; the page
    is set without kerning)."""
    if not s:
        return 0.0
    from matplotlib import ft2font

    with _font_lock:
        font, cache_ = _advances(bold)
        total = 0.0
        for ch in printable(s):
            w = cache_.get(ch)
            if w is None:
                glyph = font.load_char(ord(ch), flags=ft2font.LoadFlags.NO_HINTING)  # type: ignore[attr-defined]
                w = cache_[ch] = glyph.linearHoriAdvance / 65536.0
            total += w
    return total * size / 100.0


def wrap(s: str, width: float, size: float, bold: bool = False) -> list[str]:
    """Greedy word wrap to ``width`` points; over-long words are split."""
    lines: list[str] = []
    for paragraph in s.splitlines() or [""]:
        line = ""
        for word in paragraph.split():
            candidate = f"{line} {word}" if line else word
            if text_width(candidate, size, bold) <= width * 0.98:
                line = candidate
                continue
            if line:
                lines.append(line)
            while text_width(word, size, bold) > width and len(word) > 1:
                cut = len(word) - 1
                while cut > 1 and text_width(word[:cut], size, bold) > width:
                    cut -= 1
                lines.append(word[:cut])
                word = word[cut:]
            line = word
        lines.append(line)
    return lines


def clip(lines: list[str], n: int, width: float, size: float, bold: bool = False) -> list[str]:
    """At most ``n`` lines; the last one kept ends with "…" when lines were dropped."""
    if len(lines) <= n:
        return lines
    return [*lines[: n - 1], ellipsize(lines[n - 1] + " …", width, size, bold)]


def ellipsize(s: str, width: float, size: float, bold: bool = False) -> str:
    if text_width(s, size, bold) <= width:
        return s
    while s and text_width(s + "…", size, bold) > width:
        s = s[:-1]
    return s + "…"


# ---------------------------------------------------------------------------------------------
# Layout
# ---------------------------------------------------------------------------------------------


@dataclass
class _Type:
    """Type sizes (points) at one scale."""

    k: float

    @property
    def title(self) -> float:
        return 15 * self.k

    @property
    def heading(self) -> float:
        return 9.5 * self.k

    @property
    def body(self) -> float:
        return 8.5 * self.k

    @property
    def small(self) -> float:
        return 7 * self.k

    @property
    def tiny(self) -> float:
        return 6 * self.k

    @property
    def conclusion(self) -> float:
        return 13 * self.k

    def lead(self, size: float) -> float:
        return size * 1.28


@cache
def _font_properties(bold: bool):  # -> matplotlib.font_manager.FontProperties
    from matplotlib.font_manager import FontProperties

    return FontProperties(fname=font_files()[1 if bold else 0])


class _Canvas:
    """Either measures (``ax`` is None) or draws into a full-page axes in points, y downwards."""

    def __init__(self, ax, width: float, height: float) -> None:  # ax: matplotlib Axes | None
        self.ax = ax
        self.width = width
        self.height = height

    @property
    def drawing(self) -> bool:
        return self.ax is not None

    def text(
        self,
        x: float,
        baseline: float,
        s: str,
        size: float,
        *,
        bold: bool = False,
        colour: str = INK,
        ha: str = "left",
        box: bool = False,
    ) -> None:
        if self.ax is None or not s:
            return
        props = _font_properties(bold).copy()
        props.set_size(size)
        self.ax.text(
            x,
            baseline,
            printable(s),
            fontproperties=props,
            color=colour,
            ha=ha,
            va="baseline",
            parse_math=False,
            usetex=False,
            bbox={"boxstyle": "square,pad=0.2", "facecolor": "white", "edgecolor": "none"}
            if box
            else None,
            zorder=6 if box else 4,
        )

    def line(self, xs: Sequence[float], ys: Sequence[float], **kw: object) -> None:
        if self.ax is not None:
            self.ax.plot(xs, ys, solid_capstyle="butt", **kw)

    def rect(self, x: float, y: float, w: float, h: float, **kw: object) -> None:
        if self.ax is not None:
            from matplotlib.patches import Rectangle

            self.ax.add_patch(Rectangle((x, y), w, h, **kw))

    def marker(self, x: float, y: float, m: Marker, size: float) -> None:
        if self.ax is not None:
            self.ax.plot(
                [x],
                [y],
                linestyle="none",
                marker=m.shape,
                markersize=size,
                markerfacecolor=m.colour if m.filled else "white",
                markeredgecolor=INK if m.filled else m.colour,
                markeredgewidth=0.8 if m.filled else 1.5,
                zorder=5,
            )


@dataclass
class _Column:
    """A list of lines (text and style) drawn in a column, cut to the space left."""

    lines: list[tuple[str, float, bool, str, float]]  # text, size, bold, colour, indent

    def height(self, t: _Type) -> float:
        return sum(t.lead(size) for _, size, _, _, _ in self.lines)


class _Summary:
    def __init__(
        self,
        assessments: AssessmentSet,
        measurements: Measurements,
        identity: SummaryIdentity,
        result_sr_uid: str,
        page: tuple[float, float],
    ) -> None:
        self.set = assessments
        self.a = assessments.primary
        self.m = measurements
        self.id = identity
        self.result_sr_uid = result_sr_uid
        self.width, self.height = page
        self.margin = 36.0
        self.left = self.margin
        self.right = self.width - self.margin
        self.inner = self.right - self.left

    # -- blocks; each returns the y below it ------------------------------------------------

    def header(self, c: _Canvas, t: _Type, y: float) -> float:
        base = y + t.title
        c.text(self.left, base, "Diastolic function summary", t.title, bold=True)
        institution = ellipsize(self.id.institution, self.inner * 0.45, t.small)
        c.text(self.right, base, institution, t.small, colour=GREY, ha="right")
        y = base + t.small * 1.2
        c.text(
            self.left,
            y,
            "Automated reading of echocardiographic measurements",
            t.small,
            colour=GREY,
        )
        y += t.small * 0.8
        c.line([self.left, self.right], [y, y], color=OKABE_ITO["blue"], linewidth=1.6)
        y += t.body * 0.9

        name = _person_name(self.id.patient_name) or "—"
        born = _date(self.id.birth_date)
        age = _age(self.id)
        born_age = " · ".join(p for p in (born, age) if p) or "—"
        sources = [s for s in self.id.sources if s.sop_instance_uid or s.description]
        equipment = sorted({" ".join(p for p in (s.manufacturer, s.model) if p) for s in sources})
        equipment = [e for e in equipment if e]
        source_words = "—"
        if sources:
            first = sources[0]
            source_words = " · ".join(p for p in (first.description, first.sop_instance_uid) if p)
            if len(sources) > 1:
                source_words = f"{source_words} and {len(sources) - 1} more"
        left = [
            ("Patient", name),
            ("Patient ID", self.id.patient_id or "—"),
            ("Born · age", born_age),
            ("Sex", _SEX.get(self.id.sex.strip().upper(), self.id.sex) or "—"),
        ]
        right = [
            ("Study date", _date(self.id.study_date) or "—"),
            ("Accession", self.id.accession_number or "—"),
            ("Study", self.id.study_description or "—"),
            ("Scanner", ", ".join(equipment) or "—"),
        ]
        col_w = self.inner / 2
        label_w = 62 * t.k
        lead = t.lead(t.body)
        for i, ((l_label, l_value), (r_label, r_value)) in enumerate(zip(left, right, strict=True)):
            base = y + t.body + i * lead
            for x0, label, value in (
                (self.left, l_label, l_value),
                (self.left + col_w, r_label, r_value),
            ):
                c.text(x0, base, label, t.small, colour=GREY)
                bold = label == "Patient"
                value = ellipsize(value, col_w - label_w - 8, t.body, bold)
                c.text(x0 + label_w, base, value, t.body, bold=bold)
        y += 4 * lead + t.body * 0.4

        guideline = GUIDELINE_NAMES.get(self.a.guideline, str(self.a.guideline))
        citation = f" — {self.a.guideline_citation}" if self.a.guideline_citation else ""
        pathway = PATHWAY_WORDING.get(self.a.pathway, str(self.a.pathway))
        if self.a.special_situations:
            pathway += (
                " (" + ", ".join(s.value.replace("-", " ") for s in self.a.special_situations) + ")"
            )
        reason = f": {self.a.pathway_reason}" if self.a.pathway_reason else ""
        label = "Source SR" if len(sources) < 2 else f"Source SRs ({len(sources)})"
        c.text(self.left, y + t.body, label, t.small, colour=GREY)
        c.text(
            self.left + label_w,
            y + t.body,
            ellipsize(source_words, self.inner - label_w, t.body),
            t.body,
        )
        y += lead
        for label, value in (("Guideline", guideline + citation), ("Pathway", pathway + reason)):
            lines = clip(wrap(value, self.inner - label_w, t.body), 3, self.inner - label_w, t.body)
            for j, line in enumerate(lines):
                base = y + t.body
                if j == 0:
                    c.text(self.left, base, label, t.small, colour=GREY)
                c.text(self.left + label_w, base, line, t.body)
                y += lead
        return y + t.body * 0.3

    def conclusion(self, c: _Canvas, t: _Type, y: float) -> float:
        pad = 7 * t.k
        bar = 4 * t.k
        text_x = self.left + bar + pad
        width = self.inner - bar - 2 * pad
        lines = clip(
            wrap(conclusion_text(self.a), width, t.conclusion, True), 3, width, t.conclusion, True
        )
        flags: list[str] = []
        for f in self.a.borderline:  # the flag's text names the other side's outcome
            text = f.text.strip()
            flags += wrap(f"Borderline: {text}", width, t.body)
        flags = clip(flags, 6, width, t.body)
        height = pad * 2 + len(lines) * t.lead(t.conclusion) + len(flags) * t.lead(t.body)
        height -= (t.lead(t.conclusion) - t.conclusion) * 0.6
        c.rect(self.left, y, self.inner, height, facecolor="#eef4f9", edgecolor="none", zorder=0)
        c.rect(self.left, y, bar, height, facecolor=OKABE_ITO["blue"], edgecolor="none", zorder=1)
        yy = y + pad
        for line in lines:
            c.text(text_x, yy + t.conclusion * 0.95, line, t.conclusion, bold=True)
            yy += t.lead(t.conclusion)
        for i, line in enumerate(flags):
            bold = i == 0 or line.startswith("Borderline:")
            if bold and line.startswith("Borderline:"):
                c.text(
                    text_x,
                    yy + t.body,
                    "Borderline:",
                    t.body,
                    bold=True,
                    colour=OKABE_ITO["vermillion"],
                )
                offset = text_width("Borderline: ", t.body, True)
                c.text(text_x + offset, yy + t.body, line[len("Borderline: ") :], t.body)
            else:
                c.text(text_x, yy + t.body, line, t.body)
            yy += t.lead(t.body)
        return y + height + t.body * 0.8

    def caution(self, c: _Canvas, t: _Type, y: float) -> float:
        pad = 5 * t.k
        label = "Caution  "
        label_w = text_width(label, t.body, True)
        text = self.a.caution or CAUTION
        lines = wrap(text, self.inner - 2 * pad - label_w, t.body)
        height = 2 * pad + len(lines) * t.lead(t.body) - (t.lead(t.body) - t.body) * 0.6
        c.rect(self.left, y, self.inner, height, facecolor="none", edgecolor=INK, linewidth=0.8)
        c.text(self.left + pad, y + pad + t.body * 0.95, label.strip(), t.body, bold=True)
        for i, line in enumerate(lines):
            c.text(
                self.left + pad + label_w,
                y + pad + t.body * 0.95 + i * t.lead(t.body),
                line,
                t.body,
            )
        return y + height + t.body * 1.2

    def criteria(self, c: _Canvas, t: _Type, y: float, limit: float | None = None) -> float:
        """The chart; with ``limit``, rows that would pass it are left out and counted."""
        heading_base = y + t.heading
        c.text(
            self.left,
            heading_base,
            "Criteria, in the order the algorithm used them",
            t.heading,
            bold=True,
        )
        y = heading_base + t.heading * 0.5
        crit = self.a.criteria
        if not crit:
            lines = wrap(
                "No criterion was evaluated"
                + (f": {self.a.pathway_reason}" if self.a.pathway_reason else "."),
                self.inner,
                t.body,
            )
            for line in lines:
                c.text(self.left, y + t.body, line, t.body, colour=GREY)
                y += t.lead(t.body)
            return y + t.body * 0.8

        # legend, right-aligned on the heading line
        lx = self.right
        items: list[tuple[Marker | None, str]] = [
            (marker_for(Verdict.met), "criterion met"),
            (marker_for(Verdict.not_met), "not met"),
            (None, "cut-off"),
        ]
        for m, words in reversed(items):
            w = text_width(words, t.small)
            c.text(lx, heading_base, words, t.small, colour=GREY, ha="right")
            lx -= w + 4 * t.k
            mid = heading_base - t.small * 0.35
            if m is not None:
                c.marker(lx - 3 * t.k, mid, m, 5.5 * t.k)
            else:
                c.line([lx - 3 * t.k] * 2, [mid - 4 * t.k, mid + 4 * t.k], color=INK, linewidth=1.0)
            lx -= 12 * t.k

        label_w = self.inner * 0.33
        value_w = self.inner * 0.19
        track_x0 = self.left + label_w + 8 * t.k
        track_x1 = self.right - value_w - 10 * t.k
        row_h = 25 * t.k
        step = None
        y += t.small * 0.6
        for i, cr in enumerate(crit):
            need = row_h + (t.lead(t.small) + 2 * t.k if cr.step != step else 0)
            if limit is not None and y + need + t.lead(t.body) > limit:
                c.text(
                    self.left,
                    y + t.body,
                    f"… {len(crit) - i} more criteria: see the result SR",
                    t.body,
                    colour=GREY,
                )
                y += t.lead(t.body)
                break
            if cr.step != step:
                step = cr.step
                c.text(
                    self.left,
                    y + t.small + 2 * t.k,
                    (cr.step or "").upper(),
                    t.tiny,
                    bold=True,
                    colour=GREY,
                )
                y += t.lead(t.small) + 2 * t.k
            self._criterion_row(c, t, cr, y, row_h, label_w, track_x0, track_x1)
            y += row_h
        return y + t.body * 0.6

    def _criterion_row(
        self,
        c: _Canvas,
        t: _Type,
        cr: Criterion,
        y: float,
        row_h: float,
        label_w: float,
        x0: float,
        x1: float,
    ) -> None:
        mid = y + row_h * 0.45
        c.line([self.left, self.right], [y + row_h, y + row_h], color="#e4e4e4", linewidth=0.5)
        c.text(self.left, mid + t.body * 0.35, ellipsize(cr.label, label_w, t.body), t.body)
        available = (
            cr.value is not None and math.isfinite(cr.value) and cr.verdict != Verdict.unavailable
        )
        lo, hi = scale_for(cr)

        def px(v: float) -> float:
            return x0 + (v - lo) / (hi - lo) * (x1 - x0)

        # track and its end labels
        if available:
            c.line([x0, x1], [mid, mid], color=LIGHT, linewidth=2.2)
        else:
            c.line([x0, x1], [mid, mid], color=LIGHT, linewidth=1.2, linestyle=(0, (1.5, 2.5)))
        unit = unit_display(cr.unit)
        c.text(x0, mid + t.tiny * 1.9, format_number(lo), t.tiny, colour=GREY, ha="left")
        c.text(
            x1,
            mid + t.tiny * 1.9,
            f"{format_number(hi)} {unit}".strip(),
            t.tiny,
            colour=GREY,
            ha="right",
        )
        # the side where the criterion is met, lightly shaded, then the cut-off line
        finite_cut = math.isfinite(cr.threshold)
        tx = px(cr.threshold) if finite_cut else (x0 + x1) / 2
        if finite_cut:
            met_to = x1 if cr.comparison in (Comparison.gt, Comparison.ge) else x0
            c.rect(
                min(tx, met_to),
                mid - 4.5 * t.k,
                abs(met_to - tx),
                9 * t.k,
                facecolor=OKABE_ITO["vermillion"],
                alpha=0.13,
                edgecolor="none",
                zorder=1,
            )
            c.line([tx, tx], [mid - 7 * t.k, mid + 6 * t.k], color=INK, linewidth=1.1, zorder=3)
            cut = f"{_COMPARISON_SYMBOL[cr.comparison]} {format_number(cr.threshold)}"
            c.text(tx, mid - 8.5 * t.k, cut, t.tiny, colour=INK, ha="center")
        # value
        vx = self.right
        if available:
            assert cr.value is not None
            m = marker_for(cr.verdict)
            if m is not None:
                c.marker(px(cr.value), mid, m, 7.5 * t.k)
                c.text(
                    vx,
                    mid + t.body * 0.35,
                    _with_unit(cr.value, cr.unit),
                    t.body,
                    bold=True,
                    ha="right",
                )
                c.text(
                    vx,
                    mid + t.body * 0.35 + t.lead(t.small),
                    m.words,
                    t.small,
                    colour=GREY,
                    ha="right",
                )
        else:
            c.text(
                (x0 + x1) / 2 if abs(tx - (x0 + x1) / 2) > 40 * t.k else (x0 * 3 + x1) / 4,
                mid + t.small * 0.35,
                "not available",
                t.small,
                colour=GREY,
                ha="center",
                box=True,
            )
            c.text(
                vx,
                mid + t.body * 0.35,
                "not available",
                t.body,
                colour=GREY,
                ha="right",
            )

    def _reasoning_column(self, t: _Type, width: float) -> _Column:
        lines: list[tuple[str, float, bool, str, float]] = []

        def heading(s: str) -> None:
            if lines:
                lines.append(("", t.small * 0.5, False, INK, 0))
            lines.append((s, t.heading, True, INK, 0))

        def items(texts: Sequence[str], numbered: bool, colour: str = INK) -> None:
            for i, s in enumerate(texts, 1):
                mark = f"{i}." if numbered else "•"
                indent = text_width("00. ", t.body)
                for j, line in enumerate(wrap(s, width - indent, t.body)):
                    lines.append(
                        ((f"{mark}\t" if j == 0 else "") + line, t.body, False, colour, indent)
                    )

        heading("How the result was reached")
        if self.a.reasoning:
            items(self.a.reasoning, numbered=True)
        else:
            items(["No reasoning was recorded."], numbered=False, colour=GREY)
        notes = list(dict.fromkeys((*self.a.notes, *self.m.notes)))  # grading, then data
        if notes:
            heading("Notes")
            items(notes, numbered=False)
        if self.a.supporting:
            heading("Supporting findings (not part of the algorithm)")
            items([f"{s.name}: {s.text}" for s in self.a.supporting], numbered=False)
        if self.set.others:
            heading("Other guidelines")
            items(
                [
                    f"{GUIDELINE_NAMES.get(o.guideline, o.guideline)}: {conclusion_text(o)}"
                    for o in self.set.others
                ],
                numbered=False,
            )
        if self.set.disagreements:
            heading("Where the guidelines differ")
            items(self.set.disagreements, numbered=False)
        return _Column(lines)

    def _measurements_rows(self) -> list[tuple[str, str, str, str]]:
        rows = []
        for measure in Measure:
            mv = self.m.values.get(measure)
            if mv is None:
                continue
            rows.append(
                (
                    MEASURE_NAMES.get(measure, measure.value),
                    format_value(mv.value, mv.unit),
                    unit_display(mv.unit),
                    source_wording(mv),
                )
            )
        return rows

    def columns(self, c: _Canvas, t: _Type, y: float, bottom: float) -> float:
        gap = 14 * t.k
        left_w = self.inner * 0.54
        right_x = self.left + left_w + gap
        right_w = self.right - right_x
        col = self._reasoning_column(t, left_w)
        rows = self._measurements_rows()

        # left column
        yy = y
        room = bottom - y
        total = col.height(t)
        cut_at = len(col.lines)
        if total > room:
            used = t.lead(t.body)  # the "more" line
            cut_at = 0
            for i, line in enumerate(col.lines):
                if used + t.lead(line[1]) > room:
                    break
                used += t.lead(line[1])
                cut_at = i + 1
        for text, size, bold, colour, indent in col.lines[:cut_at]:
            base = yy + size
            if "\t" in text:
                mark, rest = text.split("\t", 1)
                c.text(self.left, base, mark, size, colour=GREY)
                c.text(self.left + indent, base, rest, size, colour=colour)
            else:
                c.text(
                    self.left + (indent if text and not bold else 0),
                    base,
                    text,
                    size,
                    bold=bold,
                    colour=colour,
                )
            yy += t.lead(size)
        if cut_at < len(col.lines):
            c.text(
                self.left,
                yy + t.body,
                f"… {len(col.lines) - cut_at} more lines: see the result SR",
                t.body,
                colour=GREY,
            )
            yy += t.lead(t.body)
        left_bottom = yy

        # right column: measurements table
        yy = y
        c.text(right_x, yy + t.heading, "Measurements", t.heading, bold=True)
        yy += t.lead(t.heading)
        name_w = right_w * 0.40
        value_x = right_x + right_w * 0.54  # right edge of the value
        unit_x = value_x + 3 * t.k
        src_x = right_x + right_w * 0.69
        lead = t.lead(t.small) * 1.05
        if not rows:
            c.text(
                right_x,
                yy + t.small,
                "No measurement was recognised.",
                t.small,
                colour=GREY,
            )
            return max(left_bottom, yy + lead)
        c.text(right_x, yy + t.tiny, "measure", t.tiny, colour=GREY)
        c.text(value_x, yy + t.tiny, "value", t.tiny, colour=GREY, ha="right")
        c.text(unit_x, yy + t.tiny, "unit", t.tiny, colour=GREY)
        c.text(src_x, yy + t.tiny, "source", t.tiny, colour=GREY)
        yy += t.lead(t.tiny)
        c.line([right_x, self.right], [yy - t.tiny * 0.3] * 2, color=LIGHT, linewidth=0.6)
        fit = int(max(0.0, bottom - yy) // lead)
        shown = rows if len(rows) <= fit else rows[: max(0, fit - 1)]
        for i, (name, value, unit, source) in enumerate(shown):
            base = yy + t.small
            if i % 2 == 1:
                c.rect(
                    right_x,
                    yy - lead * 0.12,
                    right_w,
                    lead,
                    facecolor="#f3f3f3",
                    edgecolor="none",
                    zorder=0,
                )
            c.text(right_x, base, ellipsize(name, name_w, t.small), t.small)
            c.text(value_x, base, value, t.small, bold=True, ha="right")
            c.text(unit_x, base, ellipsize(unit, src_x - unit_x - 2, t.small), t.small, colour=GREY)
            c.text(
                src_x, base, ellipsize(source, self.right - src_x, t.small), t.small, colour=GREY
            )
            yy += lead
        if len(shown) < len(rows):
            c.text(
                right_x,
                yy + t.small,
                f"… {len(rows) - len(shown)} more: see the result SR",
                t.small,
                colour=GREY,
            )
            yy += lead
        return max(left_bottom, yy)

    def natural_columns_height(self, t: _Type) -> float:
        left = self._reasoning_column(t, self.inner * 0.54).height(t)
        right = (
            t.lead(t.heading)
            + t.lead(t.tiny)
            + (len(self._measurements_rows()) + 1) * t.lead(t.small) * 1.05
        )
        return max(left, right)

    def footer(self, c: _Canvas, t: _Type) -> float:
        """Draws the footer at the page bottom; returns its top edge."""
        lead = t.lead(t.tiny)
        base2 = self.height - self.margin * 0.7
        base1 = base2 - lead
        top = base1 - t.tiny - 4 * t.k
        c.line([self.left, self.right], [top, top], color=LIGHT, linewidth=0.6)
        c.text(
            self.left,
            base1,
            f"{SOFTWARE_NAME} {__version__} · rule set {self.a.rule_set_version or '—'} · "
            f"{GUIDELINE_NAMES.get(self.a.guideline, self.a.guideline)}",
            t.tiny,
            colour=GREY,
        )
        c.text(
            self.left,
            base2,
            f"Result SR instance UID: {self.result_sr_uid or 'not yet assigned'}",
            t.tiny,
            colour=GREY,
        )
        c.text(self.right, base2, "Page 1 of 1", t.tiny, colour=GREY, ha="right")
        return top - 6 * t.k

    # -- page ---------------------------------------------------------------------------------

    def compose(self, c: _Canvas, t: _Type) -> float:
        """Lays out (and, when drawing, draws) the page; returns the height the columns need
        beyond the space left (<= 0 when everything fits)."""
        y = self.margin * 0.8
        y = self.header(c, t, y)
        y = self.conclusion(c, t, y)
        y = self.caution(c, t, y)
        bottom = self.footer(c, t)
        # when drawing, keep room for the columns' headings and a few lines
        limit = bottom - 70 * t.k if c.drawing else None
        y = self.criteria(c, t, y, limit)
        overflow = y + self.natural_columns_height(t) - bottom
        if c.drawing:
            self.columns(c, t, y, bottom)
        return overflow


#: type scales tried in turn, largest first, until the page fits
_SCALES = (1.0, 0.94, 0.88, 0.82, 0.76, 0.70)


def render_summary_pdf(
    assessments: AssessmentSet,
    measurements: Measurements,
    identity: SummaryIdentity,
    *,
    page_size: PageSize = "A4",
    result_sr_uid: str = "",
) -> bytes:
    """Render the one-page summary of ``assessments`` and return the PDF bytes.

    The same inputs give the same bytes (no creation date is written)."""
    if page_size not in PAGE_SIZES_PT:
        raise UserError(f"unknown page size {page_size!r}: use one of {', '.join(PAGE_SIZES_PT)}")
    if not isinstance(assessments, AssessmentSet):
        raise UserError("render_summary_pdf needs an AssessmentSet")

    import matplotlib
    from matplotlib.figure import Figure

    width, height = PAGE_SIZES_PT[page_size]
    summary = _Summary(assessments, measurements, identity, result_sr_uid, (width, height))

    scale = _SCALES[-1]
    for k in _SCALES:
        if summary.compose(_Canvas(None, width, height), _Type(k)) <= 0:
            scale = k
            break

    rc = {
        "pdf.fonttype": 42,  # TrueType, embedded (subset) so every viewer shows the same glyphs
        "pdf.compression": 6,
        "font.family": FONT_FAMILY,
        "text.usetex": False,
        "axes.unicode_minus": True,
        "path.simplify": True,
    }
    # rc_context changes matplotlib's global settings: one page at a time per process
    with _render_lock, matplotlib.rc_context(rc):
        fig = Figure(figsize=(width / 72, height / 72), dpi=72)
        ax = fig.add_axes((0, 0, 1, 1))
        ax.set_xlim(0, width)
        ax.set_ylim(height, 0)
        ax.set_axis_off()
        summary.compose(_Canvas(ax, width, height), _Type(scale))
        out = io.BytesIO()
        fig.savefig(
            out,
            format="pdf",
            metadata={
                "Title": "Diastolic function summary",
                "Author": SOFTWARE_NAME,
                "Subject": "Decision support only; confirm by a qualified reader",
                "Creator": f"{SOFTWARE_NAME} {__version__}",
                "CreationDate": None,  # deterministic output
            },
        )
    return out.getvalue()
