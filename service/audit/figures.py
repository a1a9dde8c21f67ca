"""The audit's charts, drawn with matplotlib (no pyplot: plain Figure objects, safe to build in
a server thread) and written as SVG to be inlined in the HTML page, or onto PDF pages.

Meaning is never carried by colour alone: each outcome has a colour from the Okabe-Ito
colour-blind-safe palette (Okabe & Ito 2008, "Color Universal Design") and a hatch pattern of
its own, and every bar carries its count and share as text.
"""

from __future__ import annotations

import io
import re
import threading
from collections.abc import Sequence
from datetime import datetime, timedelta

from matplotlib import rc_context
from matplotlib.figure import Figure, FigureBase
from matplotlib.patches import Patch
from matplotlib.ticker import MaxNLocator

from service.audit.labels import measure_label, outcome_label, pathway_label
from service.audit.report import CORE_MEASURES, AuditReport
from service.model import Outcome

FONT = "DejaVu Sans"  # ships with matplotlib
INK = "#1a1a1a"
GREY = "#5c5c5c"
GRID = "#d9d9d9"

#: outcome -> (fill, hatch, hatch/edge colour): Okabe-Ito fills, each with its own pattern
OUTCOME_STYLE: dict[Outcome, tuple[str, str, str]] = {
    Outcome.normal: ("#009E73", "", "#00583f"),
    Outcome.grade_1: ("#56B4E9", "//", "#1f5f86"),
    Outcome.grade_2: ("#E69F00", "\\\\", "#7a5400"),
    Outcome.grade_3: ("#D55E00", "xx", "#ffffff"),
    Outcome.indeterminate: ("#F0E442", "||", "#6b6410"),
    Outcome.not_gradable: ("#c8c8c8", "--", "#4d4d4d"),
    Outcome.atrial_fibrillation: ("#0072B2", "++", "#ffffff"),
    Outcome.special_situation: ("#CC79A7", "*", "#5e2a48"),
}
BLUE = "#0072B2"
SKY = "#56B4E9"

_lock = threading.RLock()  # matplotlib's shared state (font cache, rcParams) is not thread-safe
#: text from the sources (a Station Name, an AE title) is drawn as it is: a "$" in it is not
#: the start of mathematical notation
PLAIN_TEXT = {"text.parse_math": False}


def pct(share: float | None) -> str:
    """0.215 -> "21.5 %", 1 -> "100 %", None -> "–"."""
    if share is None:
        return "–"
    text = f"{share * 100:.1f}"
    return (text[:-2] if text.endswith(".0") else text) + " %"


def _figure(width: float, height: float, into: FigureBase | None = None) -> FigureBase:
    """A new figure of this size, or ``into`` (a sub-figure of a PDF page) as it is."""
    if into is not None:
        return into
    return Figure(figsize=(width, height), dpi=100, layout="constrained")


def _style(ax, *, xgrid: bool = True) -> None:
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.spines["left"].set_color(GREY)
    ax.spines["bottom"].set_color(GREY)
    ax.tick_params(colors=INK, labelsize=9)
    if xgrid:
        ax.xaxis.grid(True, color=GRID, linewidth=0.6)
        ax.set_axisbelow(True)


def _counts_axis(axis) -> None:
    """Whole numbers only on an axis of study counts."""
    axis.set_major_locator(MaxNLocator(integer=True, min_n_ticks=1))


def _bar_style(outcome: Outcome) -> dict:
    fill, hatch, edge = OUTCOME_STYLE[outcome]
    return {"facecolor": fill, "hatch": hatch, "edgecolor": edge, "linewidth": 0.6}


def svg(fig: FigureBase, title: str) -> str:
    """The figure as an inline SVG element (no XML prologue), with a title for screen readers
    and ids made unique to this figure."""
    buf = io.StringIO()
    with _lock, rc_context(PLAIN_TEXT):
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None})
    text = buf.getvalue()
    text = text[text.index("<svg") :]
    prefix = re.sub(r"[^a-z0-9]+", "-", title.lower()).strip("-")[:24] or "fig"
    # matplotlib names clip paths and glyphs the same way in every figure; one page holds many
    text = re.sub(r'id="([^"]+)"', lambda m: f'id="{prefix}-{m.group(1)}"', text)
    text = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{prefix}-{m.group(1)})", text)
    text = re.sub(r'xlink:href="#([^"]+)"', lambda m: f'xlink:href="#{prefix}-{m.group(1)}"', text)
    text = text.replace("<svg ", '<svg role="img" ', 1)
    head_end = text.index(">") + 1
    return text[:head_end] + f"<title>{_escape(title)}</title>" + text[head_end:]


def _escape(text: str) -> str:
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


def _empty(fig: FigureBase, message: str) -> FigureBase:
    """A chart with nothing to show: one line of text (short, on a page of its own)."""
    if isinstance(fig, Figure):
        fig.set_size_inches(fig.get_figwidth(), 0.6)
    ax = fig.add_subplot()
    ax.axis("off")
    ax.text(0.5, 0.5, message, ha="center", va="center", color=GREY, fontsize=10)
    return fig


# ---------------------------------------------------------------------------------------------
# Outcomes
# ---------------------------------------------------------------------------------------------


def outcomes(report: AuditReport, into: FigureBase | None = None) -> FigureBase:
    """Every outcome: count and share of the studies assessed."""
    order = list(Outcome)
    fig = _figure(7.2, 3.3, into)
    if not report.studies:
        return _empty(fig, "No study assessed in this period")
    ax = fig.add_subplot()
    y = list(range(len(order)))[::-1]
    counts = [report.outcomes[o.value] for o in order]
    for yi, o, n in zip(y, order, counts, strict=True):
        ax.barh(yi, n, height=0.66, **_bar_style(o))
        share = report.outcome_shares[o.value]
        ax.text(n, yi, f"  {n} ({pct(share)})", va="center", fontsize=9, color=INK)
    ax.set_yticks(y, [outcome_label(o.value) for o in order])
    ax.set_xlim(0, max(counts) * 1.3 or 1)
    ax.set_xlabel(f"studies (of {report.studies} assessed)", fontsize=9, color=INK)
    _counts_axis(ax.xaxis)
    _style(ax)
    return fig


def _stacked_legend(fig: FigureBase, present: Sequence[Outcome]) -> None:
    handles = [Patch(label=outcome_label(o.value, short=True), **_bar_style(o)) for o in present]
    fig.legend(
        handles=handles,
        loc="outside lower center",
        ncols=min(4, len(handles)) or 1,
        fontsize=8.5,
        frameon=False,
        handlelength=2.2,
        handleheight=1.2,
    )


def by_pathway(report: AuditReport, into: FigureBase | None = None) -> FigureBase:
    """Outcomes within each pathway, as shares of the pathway's studies (100 % bars)."""
    pathways = list(report.by_pathway)
    fig = _figure(7.2, 1.2 + 0.55 * max(1, len(pathways)), into)
    if not pathways:
        return _empty(fig, "No study assessed in this period")
    ax = fig.add_subplot()
    present = [o for o in Outcome if any(report.by_pathway[p][o.value] for p in pathways)]
    y = list(range(len(pathways)))[::-1]
    for yi, p in zip(y, pathways, strict=True):
        counts = report.by_pathway[p]
        total = sum(counts.values())
        left = 0.0
        for o in present:
            n = counts[o.value]
            if not n:
                continue
            width = n / total
            ax.barh(yi, width, left=left, height=0.6, **_bar_style(o))
            if width >= 0.07:
                ax.text(
                    left + width / 2,
                    yi,
                    str(n),
                    ha="center",
                    va="center",
                    fontsize=8.5,
                    color=INK,
                    bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none", "alpha": 0.85},
                )
            left += width
        ax.text(1.01, yi, f"n = {total}", va="center", fontsize=8.5, color=GREY)
    ax.set_yticks(y, [pathway_label(p, short=True) for p in pathways])
    ax.set_xlim(0, 1.12)
    ax.set_xticks([0, 0.25, 0.5, 0.75, 1.0], ["0 %", "25 %", "50 %", "75 %", "100 %"])
    _style(ax)
    _stacked_legend(fig, present)
    return fig


def by_month(report: AuditReport, into: FigureBase | None = None) -> FigureBase:
    """Outcomes per month (counts, stacked)."""
    months = list(report.by_month)
    fig = _figure(7.2, 3.4, into)
    if not months:
        return _empty(fig, "No study assessed in this period")
    ax = fig.add_subplot()
    present = [o for o in Outcome if any(report.by_month[m][o.value] for m in months)]
    x = list(range(len(months)))
    bottoms = [0] * len(months)
    for o in present:
        values = [report.by_month[m][o.value] for m in months]
        ax.bar(x, values, bottom=bottoms, width=0.62, **_bar_style(o))
        bottoms = [b + v for b, v in zip(bottoms, values, strict=True)]
    for xi, total in zip(x, bottoms, strict=True):
        ax.text(xi, total, f"{total}", ha="center", va="bottom", fontsize=8.5, color=INK)
    ax.set_xticks(x, months)
    ax.set_xlim(-0.6, max(len(months), 6) - 0.4)
    ax.set_ylim(0, max(bottoms) * 1.15 or 1)
    _counts_axis(ax.yaxis)
    ax.set_ylabel("studies", fontsize=9, color=INK)
    _style(ax, xgrid=False)
    ax.yaxis.grid(True, color=GRID, linewidth=0.6)
    _stacked_legend(fig, present)
    return fig


# ---------------------------------------------------------------------------------------------
# Indeterminate share beside the registry
# ---------------------------------------------------------------------------------------------


def indeterminate(report: AuditReport, into: FigureBase | None = None) -> FigureBase:
    """The lab's indeterminate share per pathway (with its 95 % interval) and the registry's."""
    rows = report.indeterminate_by_pathway
    fig = _figure(7.2, 1.3 + 0.75 * max(1, len(rows)), into)
    if not rows:
        return _empty(fig, "No study on a standard pathway in this period")
    ax = fig.add_subplot()
    y = list(range(len(rows)))[::-1]
    fill, hatch, edge = OUTCOME_STYLE[Outcome.indeterminate]
    for yi, r in zip(y, rows, strict=True):
        s = r.indeterminate.share
        if s is not None:
            ax.barh(yi + 0.14, s, height=0.34, color=fill, hatch=hatch, edgecolor=edge, lw=0.6)
            if r.ci95 is not None:
                lo, hi = r.ci95
                ax.errorbar(
                    s,
                    yi + 0.14,
                    xerr=[[max(0.0, s - lo)], [max(0.0, hi - s)]],
                    fmt="none",
                    ecolor=INK,
                    capsize=3,
                    lw=1,
                )
            label = f"this lab {pct(s)} ({r.indeterminate.count} of {r.indeterminate.of})"
        else:
            label = "this lab: no study"
        ax.text(1.02, yi + 0.14, label, va="center", fontsize=8.5, color=INK)
        if r.registry_share is not None:
            ax.barh(
                yi - 0.2,
                r.registry_share,
                height=0.22,
                color="white",
                edgecolor=GREY,
                lw=1,
                hatch="///",
            )
            ax.plot([r.registry_share], [yi - 0.2], marker="D", color=INK, markersize=5)
            ax.text(
                1.02,
                yi - 0.2,
                f"{r.registry.split(' (')[-1].rstrip(')')} registry {pct(r.registry_share)}",
                va="center",
                fontsize=8.5,
                color=GREY,
            )
    ax.set_yticks(y, [pathway_label(r.pathway.value, short=True) for r in rows])
    ax.set_xlim(0, 1.0)
    ax.set_xticks([0, 0.25, 0.5, 0.75, 1.0], ["0 %", "25 %", "50 %", "75 %", "100 %"])
    ax.set_xlabel(
        "indeterminate, share of the studies the algorithm was applied to\n"
        "solid bar: this lab, with its 95 % interval; hatched bar and diamond: registry",
        fontsize=8.5,
        color=INK,
    )
    _style(ax)
    return fig


# ---------------------------------------------------------------------------------------------
# Measures
# ---------------------------------------------------------------------------------------------


def measures(report: AuditReport, into: FigureBase | None = None) -> FigureBase:
    """Availability of each measure the rules use, over all studies assessed."""
    names = list(report.measures)
    fig = _figure(7.2, 0.9 + 0.26 * len(names), into)
    if not report.studies:
        return _empty(fig, "No study assessed in this period")
    ax = fig.add_subplot()
    y = list(range(len(names)))[::-1]
    for yi, m in zip(y, names, strict=True):
        s = report.measures[m]
        core = m in {c.value for c in CORE_MEASURES}
        ax.barh(
            yi,
            s,
            height=0.68,
            color=BLUE if core else "white",
            edgecolor=BLUE,
            hatch="" if core else "////",
            lw=0.8,
        )
        ax.text(
            max(s, 0) + 0.01,
            yi,
            f"{report.measure_counts[m]} ({pct(s)})",
            va="center",
            fontsize=8.5,
            color=INK,
        )
    ax.set_yticks(y, [measure_label(m) for m in names])
    ax.set_xlim(0, 1.18)
    ax.set_xticks([0, 0.25, 0.5, 0.75, 1.0], ["0 %", "25 %", "50 %", "75 %", "100 %"])
    ax.set_xlabel(
        f"share of the {report.studies} studies assessed (solid: core; hatched: supplementary)",
        fontsize=8.5,
        color=INK,
    )
    _style(ax)
    return fig


def devices(report: AuditReport, into: FigureBase | None = None) -> FigureBase:
    """Availability of each core measure per sending device (numbers in every cell)."""
    keys = list(report.devices)
    names = [m.value for m in CORE_MEASURES]
    extra = [
        m
        for m in report.measures
        if m not in names and any(d.measures.get(m) for d in report.devices.values())
    ]
    names += extra
    fig = _figure(min(7.2, 2.6 + 1.25 * max(1, len(keys))), 0.8 + 0.3 * len(names), into)
    if not keys:
        return _empty(fig, "No study assessed in this period")
    ax = fig.add_subplot()
    grid = [[report.devices[k].measures.get(m, 0.0) for k in keys] for m in names]
    ax.imshow(grid, cmap="cividis", vmin=0, vmax=1, aspect="auto")
    for i, row in enumerate(grid):
        for j, v in enumerate(row):
            ax.text(
                j,
                i,
                pct(v),
                ha="center",
                va="center",
                fontsize=8.5,
                color="black" if v >= 0.55 else "white",
                fontweight="bold" if v == 0 else "normal",
            )
    ax.set_yticks(range(len(names)), [measure_label(m) for m in names])
    ax.set_xticks(range(len(keys)), [f"{k}\n({report.devices[k].studies} studies)" for k in keys])
    ax.xaxis.tick_top()
    ax.tick_params(length=0, labelsize=8.5, colors=INK)
    for spine in ax.spines.values():
        spine.set_visible(False)
    return fig


def missing(report: AuditReport, into: FigureBase | None = None) -> FigureBase:
    """Missing measures that would (whatever their value) or could (for some values) have
    decided the studies that ended indeterminate or not gradable."""
    rows = report.missing
    fig = _figure(7.2, 1.3 + 0.4 * max(1, len(rows)), into)
    if not report.undecided:
        return _empty(fig, "No study ended indeterminate or not gradable in this period")
    if not rows:
        return _empty(fig, "No single missing measure would have decided any of them")
    ax = fig.add_subplot()
    y = list(range(len(rows)))[::-1]
    for yi, r in zip(y, rows, strict=True):
        ax.barh(yi, r.would_decide, height=0.62, color=BLUE, edgecolor=BLUE, lw=0.8)
        ax.barh(
            yi,
            r.could_decide - r.would_decide,
            left=r.would_decide,
            height=0.62,
            color="white",
            edgecolor=BLUE,
            hatch="////",
            lw=0.8,
        )
        ax.text(
            r.could_decide,
            yi,
            f"  {r.would_decide} whatever its value; {r.could_decide} for some values",
            va="center",
            fontsize=8.5,
            color=INK,
        )
    ax.set_yticks(y, [measure_label(r.measure.value) for r in rows])
    ax.set_xlim(0, max(r.could_decide for r in rows) * 1.9 or 1)
    _counts_axis(ax.xaxis)
    ax.set_xlabel(
        f"studies, of the {report.undecided} undecided, that this measure alone would have "
        "decided\nsolid: whatever its value; hatched: only for some of its values",
        fontsize=8.5,
        color=INK,
    )
    _style(ax)
    return fig


# ---------------------------------------------------------------------------------------------
# Borderline, disagreement, processing
# ---------------------------------------------------------------------------------------------


def borderline(report: AuditReport, into: FigureBase | None = None) -> FigureBase:
    """The cut-offs borderline values sat on."""
    rows = report.borderline.cutoffs
    fig = _figure(7.2, 1.1 + 0.36 * max(1, len(rows)), into)
    if not rows:
        return _empty(fig, "No borderline value in this period")
    ax = fig.add_subplot()
    y = list(range(len(rows)))[::-1]
    of = report.studies
    for yi, c in zip(y, rows, strict=True):
        ax.barh(yi, c.studies, height=0.6, color=SKY, edgecolor=BLUE, lw=0.8)
        ax.text(
            c.studies,
            yi,
            f"  {c.studies} ({pct(c.studies / of if of else None)})",
            va="center",
            fontsize=8.5,
        )
    ax.set_yticks(y, [c.label for c in rows])
    ax.set_xlim(0, max(c.studies for c in rows) * 1.5)
    _counts_axis(ax.xaxis)
    ax.set_xlabel(f"studies with a value on this cut-off (of {of} assessed)", fontsize=8.5)
    _style(ax)
    return fig


def disagreement(report: AuditReport, into: FigureBase | None = None) -> FigureBase:
    """Studies where the implemented guidelines agree or disagree (one 100 % bar)."""
    d = report.disagreement
    fig = _figure(7.2, 1.35, into)
    if not d.compared:
        return _empty(fig, "No study was evaluated by more than one guideline")
    ax = fig.add_subplot()
    agree = d.compared - d.disagree.count
    ax.barh(0, agree / d.compared, color="#009E73", edgecolor="#00583f", height=0.5, lw=0.6)
    ax.barh(
        0,
        d.disagree.count / d.compared,
        left=agree / d.compared,
        color="#D55E00",
        edgecolor="white",
        hatch="xx",
        height=0.5,
        lw=0.6,
    )
    if agree:
        ax.text(
            agree / d.compared / 2,
            0,
            f"agree: {agree} ({pct(agree / d.compared)})",
            ha="center",
            va="center",
            fontsize=9,
            bbox={"boxstyle": "round,pad=0.2", "fc": "white", "ec": "none", "alpha": 0.85},
        )
    if d.disagree.count:
        ax.text(
            1.01,
            0,
            f"disagree: {d.disagree.count} ({pct(d.disagree.share)})",
            va="center",
            fontsize=9,
        )
    ax.set_xlim(0, 1.3)
    ax.set_yticks([])
    ax.set_xticks([0, 0.5, 1.0], ["0 %", "50 %", "100 %"])
    _style(ax)
    ax.spines["left"].set_visible(False)
    return fig


def per_day(report: AuditReport, into: FigureBase | None = None) -> FigureBase:
    """Studies graded per day, every calendar day of the span shown (days without a study as
    gaps)."""
    days = report.processing.per_day
    fig = _figure(7.2, 2.4, into)
    if not days:
        return _empty(fig, "No study in this period")
    ax = fig.add_subplot()
    first = datetime.strptime(min(days), "%Y-%m-%d").date()
    last = datetime.strptime(max(days), "%Y-%m-%d").date()
    labels = [str(first + timedelta(days=i)) for i in range((last - first).days + 1)]
    ax.bar(range(len(labels)), [days.get(d, 0) for d in labels], color=BLUE, width=0.8)
    step = max(1, len(labels) // 10)
    ticks = list(range(0, len(labels), step))
    ax.set_xticks(ticks, [labels[i][5:] for i in ticks])
    ax.set_ylabel("studies", fontsize=9)
    _counts_axis(ax.yaxis)
    _style(ax, xgrid=False)
    ax.yaxis.grid(True, color=GRID, linewidth=0.6)
    ax.set_xlim(-0.6, max(len(labels), 14) - 0.4)
    return fig


#: every chart of the page, in its order: (key, title, builder)
CHARTS = (
    ("outcomes", "Outcomes", outcomes),
    ("by_pathway", "Outcomes by pathway", by_pathway),
    ("by_month", "Outcomes by month", by_month),
    ("indeterminate", "Indeterminate share beside a registry", indeterminate),
    ("measures", "Measure availability", measures),
    ("devices", "Measure availability by sending device", devices),
    ("missing", "Missing measures that kept studies undecided", missing),
    ("borderline", "Borderline values by cut-off", borderline),
    ("disagreement", "Guideline disagreement", disagreement),
    ("per_day", "Studies per day", per_day),
)


def all_svg(report: AuditReport) -> dict[str, str]:
    """Every chart as inline SVG, by key."""
    out = {}
    for key, title, build in CHARTS:
        with _lock, rc_context(PLAIN_TEXT):
            fig = build(report)
        out[key] = svg(fig, title)
    return out
