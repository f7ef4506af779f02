"""Figure style and deterministic inline SVG for the HTML report.

Every figure is drawn by matplotlib (Agg canvas, SVG writer) from one design's results
entry and returned as an ``<svg>`` element ready to inline: no XML prologue, no metadata
(so no date), a fixed hash salt per figure, text kept as text, and every element id either
dropped or prefixed with the figure's own id, so that several figures share a page without
id clashes. The same data gives the same bytes.

Palette and markers are loopvet's own; each series differs by lightness and line style as
well as by hue, so the figures read in grey and for colour-blind readers:

* current design: deep navy, solid;     approved design: amber, dashed, lighter;
* sweep envelope: pale blue band;       bounds, critical point, Ms circle: plum, dotted;
* forbidden pole regions: grey hatching; guides: mid grey.
"""

from __future__ import annotations

import html
import io
import re
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

import matplotlib

matplotlib.use("Agg")

from matplotlib.figure import Figure  # noqa: E402

INK = "#1b2d55"         # current design
AMBER = "#d4860b"       # approved design
BRANCH = "#8ea3c8"      # whole root locus, thin
BAND = "#cfdcee"        # sweep envelope
PLUM = "#9c2a6b"        # bounds, critical point, Ms circle
GUIDE = "#8b9099"       # reference lines
SHADE = "#d9dbe0"       # forbidden regions (with hatching)

APPROVED_LINE: dict[str, Any] = {"color": AMBER, "linestyle": (0, (5, 2.5)), "linewidth": 1.4}
CURRENT_LINE: dict[str, Any] = {"color": INK, "linewidth": 1.8}
BOUND_LINE: dict[str, Any] = {"color": PLUM, "linestyle": (0, (1.2, 1.8)), "linewidth": 1.4}
GUIDE_LINE: dict[str, Any] = {"color": GUIDE, "linewidth": 0.8}
LABEL_BOX: dict[str, Any] = {"boxstyle": "round,pad=0.15", "facecolor": "white",
                             "edgecolor": "none", "alpha": 0.85}

_RC: dict[str, Any] = {
    "svg.fonttype": "none", "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans", "Liberation Sans", "Arial"], "font.size": 9.0,
    "axes.edgecolor": "#5c6370", "axes.labelcolor": "#20242b", "axes.titlesize": 10.0,
    "axes.titleweight": "bold", "axes.titlelocation": "left", "axes.grid": True,
    "grid.color": "#e3e5e9", "grid.linewidth": 0.6, "xtick.color": "#404650",
    "ytick.color": "#404650", "legend.fontsize": 8.0, "legend.frameon": False,
    "path.simplify": False, "svg.image_inline": True,
}


@contextmanager
def style(salt: str) -> Iterator[None]:
    rc: Any = {**_RC, "svg.hashsalt": f"loopvet-{salt}"}
    with matplotlib.rc_context(rc):
        yield


def new_figure(width: float, height: float) -> Figure:
    return Figure(figsize=(width, height), layout="constrained")


_METADATA = re.compile(r"<metadata>.*?</metadata>\s*", re.S)
_ID = re.compile(r'\sid="([^"]+)"')
_REF = re.compile(r'(url\(#|href="#)([^)"]+)')
_SIZE = re.compile(r'<svg([^>]*?) width="[^"]+" height="[^"]+"')


def to_svg(fig: Figure, fig_id: str, title: str) -> str:
    """The figure as an inline ``<svg>`` element with ids prefixed by ``fig_id``."""
    buf = io.StringIO()
    fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None})
    text = buf.getvalue()
    text = _METADATA.sub("", text[text.index("<svg"):])
    used = {m.group(2) for m in _REF.finditer(text)}
    text = _ID.sub(lambda m: f' id="{fig_id}-{m.group(1)}"' if m.group(1) in used else "", text)
    text = _REF.sub(lambda m: f"{m.group(1)}{fig_id}-{m.group(2)}", text)
    label = html.escape(title, quote=True)
    text = _SIZE.sub(lambda m: f'<svg{m.group(1)} class="plot" role="img" aria-label="{label}"',
                     text, 1)
    return text.strip() + "\n"


def render(draw: Callable[[Figure], bool], fig_id: str, title: str, width: float,
           height: float) -> str | None:
    """Run ``draw`` on a new figure in loopvet's style; None when it has nothing to show."""
    with style(fig_id):
        fig = new_figure(width, height)
        if not draw(fig):
            return None
        return to_svg(fig, fig_id, title)


def floats(values: Any) -> list[float]:
    """Results numbers as floats for plotting (null as NaN, "inf" strings as infinities)."""
    return [float("nan") if v is None else float(v) for v in values]


def design_figures(d: dict[str, Any]) -> list[dict[str, str]]:
    """Every figure of a design page: id, title, caption and the inline SVG."""
    from .fig_frequency import frequency_figure, nyquist_figure
    from .fig_locus import locus_figure
    from .fig_time import responses_figure, sweep_figure

    out = []
    for make in (locus_figure, frequency_figure, nyquist_figure, responses_figure,
                 sweep_figure):
        item = make(d)
        if item is not None:
            out.append(item)
    return out
