"""The look of towerflow's PDF reports: palette, page size and the page frame.

Palette: the Okabe–Ito colour-blind-safe set (Okabe and Ito 2008, "Color Universal Design
(CUD): how to make figures and presentations that are friendly to colorblind people",
https://jfly.uni-koeln.de/color/). Its eight colours stay distinguishable under the common
forms of colour-vision deficiency; where more than eight categories meet (the rejection
reasons), a marker shape is added so that colour is never the only cue. Sequential data
(heat maps, months) use matplotlib's ``cividis``, which was designed to be readable with
colour-vision deficiency (Nuñez et al. 2018, PLoS ONE 13(7): e0199239).

Pages are plain :class:`matplotlib.figure.Figure` objects written by the PDF backend: no
pyplot, no global backend switch, nothing left open.

Every page carries the same frame: a title band on top (report kind, site id, period) and a
footer (software version, page x of n). Both are plain text so that a PDF reader can find
the site and period on every page.
"""
from __future__ import annotations

import contextlib

import matplotlib
import matplotlib.lines
from matplotlib.figure import Figure

__all__ = [
    "OKABE_ITO",
    "ROLE",
    "REASON_STYLE",
    "SEQUENTIAL_CMAP",
    "PAGE_SIZE",
    "report_style",
    "new_page",
    "note",
    "shade_history",
]

#: Okabe–Ito palette (Okabe and Ito 2008), by the names its authors use.
OKABE_ITO: dict[str, str] = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}

#: The same colour always means the same quantity across every page.
ROLE: dict[str, str] = {
    "le": OKABE_ITO["blue"],
    "h": OKABE_ITO["vermillion"],
    "rn": OKABE_ITO["orange"],
    "g": OKABE_ITO["reddish_purple"],
    "rg": OKABE_ITO["sky_blue"],
    "measured": OKABE_ITO["black"],
    "filled": OKABE_ITO["sky_blue"],
    "fit": OKABE_ITO["vermillion"],
    "one_to_one": "#777777",
    "gs": OKABE_ITO["bluish_green"],
    "omega": OKABE_ITO["reddish_purple"],
    "et": OKABE_ITO["blue"],
    "ebr": OKABE_ITO["bluish_green"],
    "history": "#BBBBBB",
    "act": OKABE_ITO["vermillion"],
    "watch": OKABE_ITO["orange"],
    "ok": OKABE_ITO["bluish_green"],
    "quality_good": OKABE_ITO["bluish_green"],
    "quality_fair": OKABE_ITO["yellow"],
    "quality_poor": OKABE_ITO["vermillion"],
    "quality_measured": "#555555",
}

#: rejection reason (short name in pipeline.flags.BITS) -> (colour, marker): colour and shape
#: together keep the eleven reasons apart without relying on colour alone.
REASON_STYLE: dict[str, tuple[str, str]] = {
    "out_of_range": (OKABE_ITO["vermillion"], "x"),
    "spike": (OKABE_ITO["orange"], "^"),
    "instrument_flag": (OKABE_ITO["reddish_purple"], "s"),
    "wet": (OKABE_ITO["blue"], "o"),
    "low_turbulence": (OKABE_ITO["bluish_green"], "v"),
    "history_exclusion": ("#777777", "D"),
    "inconsistent": (OKABE_ITO["reddish_purple"], "P"),
    "flat_line": (OKABE_ITO["black"], "_"),
    "excluded_sector": (OKABE_ITO["yellow"], "<"),
    "snow_or_frozen": (OKABE_ITO["sky_blue"], "*"),
    "suspect_clock": (OKABE_ITO["vermillion"], "d"),
    "missing": ("#999999", "|"),
}

SEQUENTIAL_CMAP = "cividis"
DIVERGING_CMAP = "PuOr_r"  # ColorBrewer purple-orange: colour-blind safe (Brewer, colorbrewer2.org)

#: A4 landscape, inches
PAGE_SIZE = (11.69, 8.27)

_RC = {
    # Type 3 fonts carry a text encoding, so PDF readers can extract and search the text; they
    # embed much faster than TrueType subsets (a second per report saved)
    "pdf.fonttype": 3,
    "axes.titley": 1.0,  # a fixed title position spares matplotlib a tight-bbox pass per axes
    "font.size": 8.5,
    "axes.titlesize": 9.5,
    "axes.titleweight": "bold",
    "axes.labelsize": 8.5,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#E6E6E6",
    "grid.linewidth": 0.6,
    "legend.fontsize": 7.5,
    "legend.frameon": False,
    "xtick.labelsize": 7.5,
    "ytick.labelsize": 7.5,
    "lines.linewidth": 1.0,
    "axes.prop_cycle": matplotlib.cycler(color=[OKABE_ITO[k] for k in (
        "blue", "vermillion", "bluish_green", "orange", "reddish_purple", "sky_blue", "black", "yellow")]),
    "figure.dpi": 100,
    "savefig.dpi": 120,  # rasterized dense scatters: sharp enough on screen and print, quick to encode
    "path.simplify": True,
    "agg.path.chunksize": 10000,
}


@contextlib.contextmanager
def report_style():
    """Context in which the report's matplotlib settings apply (nothing leaks out)."""
    with matplotlib.rc_context(_RC):
        yield


def new_page(title: str, *, header: str, footer: str) -> Figure:
    """A blank A4-landscape page with the report frame.

    Parameters
    ----------
    title : str
        The page's own title (what the page shows).
    header : str
        Right-hand header text: site id and period (repeated on every page).
    footer : str
        Left-hand footer text (software version, processing time); the page number is added
        by :func:`number_pages` once the page count is known.
    """
    fig = Figure(figsize=PAGE_SIZE)
    fig.text(0.035, 0.972, header, fontsize=8.5, ha="left", va="baseline", color="#333333")
    fig.text(0.035, 0.943, title, fontsize=13, fontweight="bold", ha="left", va="baseline")
    fig.add_artist(matplotlib.lines.Line2D([0.035, 0.965], [0.932, 0.932], transform=fig.transFigure,
                                           color="#333333", linewidth=0.8))
    fig.text(0.035, 0.02, footer, fontsize=7, ha="left", color="#555555")
    return fig


def number_pages(figures: list[Figure]) -> None:
    """Write "page i of n" into the footer of every page."""
    n = len(figures)
    for i, fig in enumerate(figures, start=1):
        fig.text(0.965, 0.02, f"page {i} of {n}", fontsize=7, ha="right", color="#555555")


def note(ax, text: str) -> None:
    """Replace a figure by a short note (a missing input is never a crash)."""
    ax.set_axis_off()
    ax.text(0.5, 0.5, text, ha="center", va="center", wrap=True, fontsize=9, color="#333333",
            transform=ax.transAxes,
            bbox={"boxstyle": "round,pad=0.6", "facecolor": "#F4F4F4", "edgecolor": "#BBBBBB"})


def shade_history(ax, periods, *, label: bool = True, outline: bool = False) -> None:
    """Shade the site-history periods (corrections, exclusions, changes) on a time axis.

    ``periods`` is a list of ``(start, end, label_text, kind)`` with tz-naive local timestamps.
    Corrections and exclusions are shaded over the full height and numbered; irrigation is a
    thin band along the top; site-parameter periods are not drawn (the overview lists them).
    """
    shaded = banded = False
    for start, end, text, kind in periods:
        if kind == "site parameters":
            continue
        if kind == "irrigation":
            ax.axvspan(start, end, ymin=0.97, ymax=1.0, color=OKABE_ITO["sky_blue"], linewidth=0, zorder=0,
                       label="irrigation" if (label and not banded) else None)
            banded = True
            continue
        name = "site-history correction or exclusion" if (label and not shaded) else None
        if outline:  # over an image: a frame, so the colours underneath stay true
            ax.axvspan(start, end, fill=False, edgecolor="#333333", linewidth=0.9, linestyle="--", zorder=3,
                       label=name)
        else:
            ax.axvspan(start, end, color=ROLE["history"], alpha=0.35, linewidth=0, zorder=0, label=name)
        shaded = True
        if label and text:
            ax.text(start, 0.965, f" {text}", transform=ax.get_xaxis_transform(), fontsize=6.5,
                    va="top", ha="left", color="#444444", clip_on=True)
