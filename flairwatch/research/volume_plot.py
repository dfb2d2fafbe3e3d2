"""A small inline SVG chart of one participant's WMH volume over time (for the gallery).

Plain SVG text, no plotting library: the gallery is static HTML that loads nothing from the
network. x is the scan date (days, linear), y the WMH volume in mL from 0; flagged scans (a
drop, a QC rejection, a model change) are drawn as red squares, the others as blue dots
(Okabe-Ito colours, as :mod:`flairwatch.research.report_plots` uses).
"""

from __future__ import annotations

import datetime as dt
import html
import math
from collections.abc import Sequence

WIDTH, HEIGHT = 520, 240
LEFT, RIGHT, TOP, BOTTOM = 56, 20, 30, 40  # plot margins in pixels (labels go there)
DOT_RGB, FLAG_RGB, LINE_RGB, GRID_RGB = "#0072b2", "#b00020", "#56b4e9", "#dddddd"


def _nice_top(v: float) -> float:
    """The smallest of 1, 2, 5 x 10^n at or above ``v`` (an axis end a reader can read)."""
    if v <= 0:
        return 1.0
    exp = 10 ** math.floor(math.log10(v))
    return next(m * exp for m in (1, 2, 5, 10) if m * exp >= v)


def volume_svg(points: Sequence[tuple[dt.date, float, bool]], *, title: str) -> str:
    """An SVG element: (date, volume mL, flagged) points joined in date order.

    Points must be dated (undated scans are listed in the page's table, not drawn).
    """
    pts = sorted(points)
    x0, y0, x1, y1 = LEFT, TOP, WIDTH - RIGHT, HEIGHT - BOTTOM
    top = _nice_top(max((v for _, v, _ in pts), default=0.0) * 1.05)
    first = pts[0][0] if pts else dt.date.today()
    span = max(1, (pts[-1][0] - first).days) if pts else 1

    def x_of(d: dt.date) -> float:
        return x0 + (d - first).days / span * (x1 - x0) if len(pts) > 1 else (x0 + x1) / 2

    def y_of(v: float) -> float:
        return y1 - v / top * (y1 - y0)

    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{WIDTH}" height="{HEIGHT}" '
        f'viewBox="0 0 {WIDTH} {HEIGHT}" role="img"><title>{html.escape(title)}</title>',
        f'<text x="{WIDTH / 2}" y="18" text-anchor="middle" font-size="13">'
        f"{html.escape(title)}</text>",
    ]
    for frac in (0.0, 0.25, 0.5, 0.75, 1.0):
        y = y_of(top * frac)
        parts.append(
            f'<line x1="{x0}" y1="{y:.1f}" x2="{x1}" y2="{y:.1f}" stroke="{GRID_RGB}"/>'
            f'<text x="{x0 - 6}" y="{y + 4:.1f}" text-anchor="end" font-size="11">'
            f"{top * frac:g}</text>"
        )
    parts.append(
        f'<text x="14" y="{(y0 + y1) / 2}" font-size="11" transform="rotate(-90 14 '
        f'{(y0 + y1) / 2})" text-anchor="middle">WMH volume (mL)</text>'
    )
    coords = [(x_of(d), y_of(v)) for d, v, _ in pts]
    if len(coords) > 1:
        line = " ".join(f"{x:.1f},{y:.1f}" for x, y in coords)
        parts.append(
            f'<polyline points="{line}" fill="none" stroke="{LINE_RGB}" stroke-width="2"/>'
        )
    for (d, v, flagged), (x, y) in zip(pts, coords, strict=True):
        label = f"{d.isoformat()}: {v:.2f} mL" + (" (flagged)" if flagged else "")
        if flagged:
            tag, shape = "rect", f'x="{x - 5:.1f}" y="{y - 5:.1f}" width="10" height="10"'
        else:
            tag, shape = "circle", f'cx="{x:.1f}" cy="{y:.1f}" r="5"'
        colour = FLAG_RGB if flagged else DOT_RGB
        parts.append(f'<{tag} {shape} fill="{colour}"><title>{html.escape(label)}</title></{tag}>')
    if pts:
        for d, anchor, x in ((first, "start", x0), (pts[-1][0], "end", x1)):
            parts.append(
                f'<text x="{x}" y="{y1 + 18}" text-anchor="{anchor}" font-size="11">'
                f"{d.isoformat()}</text>"
            )
    else:
        parts.append(f'<text x="{(x0 + x1) / 2}" y="{(y0 + y1) / 2}" text-anchor="middle" '
                     'font-size="12">no dated scan to draw</text>')  # fmt: skip
    parts.append(f'<rect x="{x0}" y="{y0}" width="{x1 - x0}" height="{y1 - y0}" fill="none" '
                 'stroke="#444"/></svg>')  # fmt: skip
    return "".join(parts)
