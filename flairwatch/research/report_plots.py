"""Small PNG charts and Markdown tables for validation reports, drawn with Pillow only.

Two charts: a scatter of per-case Dice against the reference lesion volume (mL, log axis), and
a strip chart of per-case Dice per group (lesion-load bin) with each group's median and
inter-quartile box. Every chart carries the research-only banner. Pure functions return
``PIL.Image`` objects; :func:`flairwatch.engine.qc_image.save_png` writes them atomically.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np
from PIL import Image, ImageDraw, ImageFont

from flairwatch.notice import BANNER

WIDTH, HEIGHT = 760, 500
# plot area margins in pixels: left holds the y labels, top the banner and title
LEFT, RIGHT, TOP, BOTTOM = 70, 24, 78, 64
FONT_PX, SMALL_PX = 15, 12
BANNER_RGB = (255, 210, 0)
GRID_RGB = (225, 225, 225)
AXIS_RGB = (60, 60, 60)
MEDIAN_RGB = (200, 30, 30)
# colour-blind-safe series colours (Okabe-Ito palette, common practice in scientific charts)
SERIES_RGB = ((0, 114, 178), (230, 159, 0), (0, 158, 115), (204, 121, 167), (86, 180, 233))

Font = ImageFont.FreeTypeFont | ImageFont.ImageFont


def _fonts() -> tuple[Font, Font]:
    return ImageFont.load_default(size=FONT_PX), ImageFont.load_default(size=SMALL_PX)


def _canvas(title: str) -> tuple[Image.Image, ImageDraw.ImageDraw, Font, Font]:
    img = Image.new("RGB", (WIDTH, HEIGHT), "white")
    draw = ImageDraw.Draw(img)
    font, small = _fonts()
    draw.rectangle((0, 0, WIDTH, 26), fill=BANNER_RGB)
    draw.text((WIDTH / 2, 13), BANNER, fill="black", font=font, anchor="mm")
    draw.text((WIDTH / 2, 44), title, fill="black", font=font, anchor="mm")
    return img, draw, font, small


def _plot_box() -> tuple[int, int, int, int]:
    return LEFT, TOP, WIDTH - RIGHT, HEIGHT - BOTTOM


def _y_axis(
    draw: ImageDraw.ImageDraw, small: Font, font: Font, label: str, lo: float, hi: float
) -> None:
    x0, y0, x1, y1 = _plot_box()
    for tick in np.linspace(lo, hi, 6):
        y = _scale(float(tick), lo, hi, y1, y0)
        draw.line((x0, y, x1, y), fill=GRID_RGB)
        draw.text((x0 - 6, y), f"{tick:.1f}", fill=AXIS_RGB, font=small, anchor="rm")
    draw.rectangle((x0, y0, x1, y1), outline=AXIS_RGB)
    draw.text((14, (y0 + y1) / 2), label, fill="black", font=font, anchor="lm")


def _scale(v: float, lo: float, hi: float, out_lo: float, out_hi: float) -> float:
    if hi <= lo:
        return (out_lo + out_hi) / 2
    return out_lo + (v - lo) / (hi - lo) * (out_hi - out_lo)


def _dot(draw: ImageDraw.ImageDraw, x: float, y: float, rgb: tuple[int, int, int]) -> None:
    draw.ellipse((x - 4, y - 4, x + 4, y + 4), fill=rgb, outline=AXIS_RGB)


def scatter_log_x(
    series: Mapping[str, Sequence[tuple[float, float]]],
    *,
    title: str,
    x_label: str,
    y_label: str,
    y_range: tuple[float, float] = (0.0, 1.0),
) -> Image.Image:
    """Scatter chart with a log10 x axis; points with x <= 0 or NaN are left out.

    Parameters
    ----------
    series : mapping of name to (x, y) points
        One colour per name, shown in a legend (e.g. acquisition kinds).
    """
    img, draw, font, small = _canvas(title)
    x0, y0, x1, y1 = _plot_box()
    lo_y, hi_y = y_range
    _y_axis(draw, small, font, y_label, lo_y, hi_y)
    pts = {
        name: [(x, y) for x, y in values if x > 0 and math.isfinite(x) and math.isfinite(y)]
        for name, values in series.items()
    }
    xs = [x for values in pts.values() for x, _ in values]
    lo_d = math.floor(math.log10(min(xs))) if xs else -1
    hi_d = math.ceil(math.log10(max(xs))) if xs else 2
    hi_d = max(hi_d, lo_d + 1)
    for d in range(lo_d, hi_d + 1):
        x = _scale(d, lo_d, hi_d, x0, x1)
        draw.line((x, y0, x, y1), fill=GRID_RGB)
        draw.text((x, y1 + 6), f"{10.0**d:g}", fill=AXIS_RGB, font=small, anchor="mt")
    draw.rectangle((x0, y0, x1, y1), outline=AXIS_RGB)
    draw.text(((x0 + x1) / 2, HEIGHT - 22), x_label, fill="black", font=font, anchor="mm")
    for n, (name, values) in enumerate(pts.items()):
        rgb = SERIES_RGB[n % len(SERIES_RGB)]
        for x, y in values:
            px = _scale(math.log10(x), lo_d, hi_d, x0, x1)
            py = _scale(min(max(y, lo_y), hi_y), lo_y, hi_y, y1, y0)
            _dot(draw, px, py, rgb)
        # legend in one row above the plot area, where it can never hide a point
        lx, ly = x0 + 8 + 190 * n, TOP - 12
        _dot(draw, lx, ly, rgb)
        draw.text((lx + 10, ly), f"{name} (n={len(values)})", fill="black", font=small, anchor="lm")
    if not xs:
        draw.text(
            ((x0 + x1) / 2, (y0 + y1) / 2), "no case to show", fill=AXIS_RGB, font=font, anchor="mm"
        )
    return img


def strip_by_group(
    groups: Sequence[tuple[str, Sequence[float]]],
    *,
    title: str,
    y_label: str,
    y_range: tuple[float, float] = (0.0, 1.0),
) -> Image.Image:
    """Strip chart: one column of points per group, its median (red bar) and quartile box.

    NaN values are left out; groups keep the given order and are shown even when empty.
    """
    img, draw, font, small = _canvas(title)
    x0, y0, x1, y1 = _plot_box()
    lo_y, hi_y = y_range
    _y_axis(draw, small, font, y_label, lo_y, hi_y)
    width = (x1 - x0) / max(1, len(groups))

    def y_of(v: float) -> float:
        return _scale(min(max(v, lo_y), hi_y), lo_y, hi_y, y1, y0)

    for g, (name, raw) in enumerate(groups):
        values = np.array([v for v in raw if math.isfinite(v)], dtype=np.float64)
        cx = x0 + width * (g + 0.5)
        draw.text((cx, y1 + 6), name, fill="black", font=font, anchor="mt")
        draw.text((cx, y1 + 26), f"n={values.size}", fill=AXIS_RGB, font=small, anchor="mt")
        if values.size == 0:
            continue
        q1, med, q3 = np.percentile(values, [25, 50, 75])
        half = width * 0.3
        draw.rectangle((cx - half, y_of(q3), cx + half, y_of(q1)), outline=AXIS_RGB)
        # spread points evenly across the column so equal values stay visible
        offsets = np.linspace(-half * 0.8, half * 0.8, values.size) if values.size > 1 else [0.0]
        for v, dx in zip(values, offsets, strict=True):
            _dot(draw, cx + float(dx), y_of(float(v)), SERIES_RGB[0])
        draw.line((cx - half, y_of(med), cx + half, y_of(med)), fill=MEDIAN_RGB, width=3)
    draw.text(
        (x1 - 4, y0 + 6), "red bar: median; box: quartiles", fill=AXIS_RGB, font=small, anchor="rt"
    )
    return img


def markdown_table(header: Sequence[str], rows: Sequence[Sequence[object]]) -> str:
    """A GitHub-flavoured Markdown table; None and NaN cells show as an en dash."""

    def cell(v: object) -> str:
        if v is None or (isinstance(v, float) and math.isnan(v)):
            return "–"
        return str(v).replace("|", "/")

    lines = [
        "| " + " | ".join(header) + " |",
        "|" + "|".join("---" for _ in header) + "|",
        *("| " + " | ".join(cell(v) for v in row) + " |" for row in rows),
    ]
    return "\n".join(lines) + "\n"
