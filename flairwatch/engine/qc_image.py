"""QC picture: an axial montage of the FLAIR image with WMH outlines and a research-only banner.

WMH are outlined in red; when the model gives ventricles, they are outlined in green, and a
legend line under the title names the colours drawn.

Pure except :func:`save_png`. Input arrays use the axis order of :mod:`flairwatch.volume`,
(i, j, k), with ``affine_lps`` mapping (i, j, k, 1) to patient LPS mm. Whatever the acquisition
plane (axial, oblique, sagittal, coronal), the volume is first reoriented to the nearest axial
stack with nibabel's orientation tools, and tiles are shown in the **radiological convention**:
the patient's right on the image's left, anterior at the top, viewed from the feet. Each tile
carries the letters R, L, A, P on its edges. Pixels are square in mm (thick slices are stretched
to their true size).

The picture holds only what the caller passes as ``title_lines`` (series keys, model version,
volumes): never patient names.
"""

from __future__ import annotations

import io
import logging
import math
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import numpy.typing as npt
from nibabel.orientations import (
    apply_orientation,
    axcodes2ornt,
    inv_ornt_aff,
    io_orientation,
    ornt_transform,
)
from PIL import Image, ImageDraw, ImageFont
from PIL.PngImagePlugin import PngInfo
from scipy import ndimage

from flairwatch.engine.results import write_atomic
from flairwatch.errors import StageFailed
from flairwatch.notice import BANNER
from flairwatch.volume import lps_to_ras

logger = logging.getLogger(__name__)

# Layout in pixels: banner bars at top and bottom, title lines under the top banner, then a grid
# of square cells of ``tile_px`` with COLUMNS cells per row.
COLUMNS = 4
BANNER_PX = 28
TITLE_LINE_PX = 20
TITLE_PAD_PX = 6
CELL_PAD_PX = 3  # dark margin inside each cell so neighbouring tiles stay apart
FONT_PX = 16
LETTER_FONT_PX = 13

# A palette image keeps the PNG small (one byte a pixel, grey compresses well): grey levels
# first, then the few colours of outlines and text.
GREY_LEVELS = 248
OUTLINE_RGB = (255, 40, 40)
BANNER_RGB = (255, 210, 0)
BANNER_TEXT_RGB = (0, 0, 0)
TITLE_BG_RGB = (20, 24, 48)
TEXT_RGB = (255, 255, 255)
LETTER_RGB = (0, 220, 255)
VENTRICLE_RGB = (60, 230, 60)
_OUTLINE, _BANNER, _BANNER_TEXT, _TITLE_BG, _TEXT, _LETTER, _VENTRICLE = range(
    GREY_LEVELS, GREY_LEVELS + 7
)
LEGEND_SWATCH_PX = 12

_DISPLAY_AXCODES = ("L", "P", "S")  # array axes after reorientation (nibabel RAS-style codes)
_CONVENTION = "Radiological view: patient right on image left, anterior at top."


def _palette() -> list[int]:
    grey = np.round(np.arange(GREY_LEVELS) * 255.0 / (GREY_LEVELS - 1)).astype(int)
    colours = [
        OUTLINE_RGB,
        BANNER_RGB,
        BANNER_TEXT_RGB,
        TITLE_BG_RGB,
        TEXT_RGB,
        LETTER_RGB,
        VENTRICLE_RGB,
    ]
    flat = [int(v) for g in grey for v in (g, g, g)]
    flat += [c for rgb in colours for c in rgb]
    return flat + [0] * (768 - len(flat))


def axial_view(
    data: np.ndarray, affine_lps: npt.ArrayLike
) -> tuple[np.ndarray, npt.NDArray[np.float64]]:
    """Reorient a volume so its axes run to patient Left, Posterior, Superior.

    Parameters
    ----------
    data : ndarray, shape (I, J, K)
        Voxel values on the grid of ``affine_lps``.
    affine_lps : array_like, shape (4, 4)
        Voxel (i, j, k, 1) to patient LPS mm.

    Returns
    -------
    data : ndarray
        The same voxels with axes permuted and flipped (no resampling), nearest to (L, P, S).
    affine_lps : ndarray, shape (4, 4)
        The LPS affine of the returned array; ``nibabel.orientations.aff2axcodes`` of its RAS
        form is ("L", "P", "S").
    """
    affine = np.asarray(affine_lps, dtype=np.float64)
    transform = ornt_transform(io_orientation(lps_to_ras(affine)), axcodes2ornt(_DISPLAY_AXCODES))
    out = apply_orientation(data, transform)
    return out, affine @ inv_ornt_aff(transform, data.shape)


def intensity_levels(data: np.ndarray) -> tuple[float, float, float]:
    """Head threshold and grey window of an image, from a 1-in-8 voxel sample.

    Returns ``(head, low, high)``: voxels above ``head`` (a tenth of the 99th percentile, the
    background being near zero on MR magnitude images) count as head; ``low`` and ``high`` are
    the 0.5th and 99.5th percentiles of the head voxels.
    """
    sample = data[::2, ::2, ::2].astype(np.float64)
    sample = sample[np.isfinite(sample)]
    if sample.size == 0:
        return -math.inf, 0.0, 1.0
    top = float(np.percentile(sample, 99.0))
    head_threshold = 0.1 * top if top > 0 else -math.inf
    head = sample[sample > head_threshold]
    if head.size == 0:
        head = sample
    low, high = (float(v) for v in np.percentile(head, (0.5, 99.5)))
    return head_threshold, low, high if high > low else low + 1.0


def choose_slices(
    data: np.ndarray, mask: np.ndarray, n_slices: int, head_threshold: float | None = None
) -> list[int]:
    """Axial slice indices (along the last axis) for the montage, in ascending order.

    Every lesion-bearing slice is a candidate first; when there are more than ``n_slices`` of
    them, an even spread across them is taken. Remaining places go to an even spread across the
    head's slices (those holding at least 5 % of the largest slice's head voxels, head voxels
    being above ``head_threshold``; by default that of :func:`intensity_levels`).
    """
    depth = data.shape[2]
    n = min(n_slices, depth)
    lesion = np.flatnonzero(mask.any(axis=(0, 1)))
    if lesion.size >= n:
        return [int(s) for s in lesion[np.linspace(0, lesion.size - 1, n).round().astype(int)]]
    if head_threshold is None:
        head_threshold = intensity_levels(data)[0]
    per_slice = np.count_nonzero(data > head_threshold, axis=(0, 1))
    head = np.flatnonzero(per_slice >= max(1.0, 0.05 * per_slice.max()))
    pool = head if head.size >= n else np.arange(depth)
    extra = np.setdiff1d(pool, lesion)
    # extra holds at least n - lesion.size slices, and a linspace step >= 1 rounds to distinct ones
    pick = extra[np.linspace(0, extra.size - 1, n - lesion.size).round().astype(int)]
    return sorted(int(s) for s in np.concatenate([lesion, pick]))


def _border(mask: np.ndarray) -> np.ndarray:
    """Pixels of ``mask`` with a 4-neighbour outside it."""
    inside = ndimage.binary_erosion(mask, structure=ndimage.generate_binary_structure(2, 1))
    return mask & ~inside


def outline_tile(
    grey: np.ndarray, mask: np.ndarray, ventricles: np.ndarray | None = None
) -> np.ndarray:
    """Palette indices of one tile: grey levels, with the masks' border pixels as outlines.

    Parameters
    ----------
    grey : ndarray of uint8, shape (H, W)
        Windowed image, 0..255.
    mask : ndarray of bool, shape (H, W)
        Lesion pixels; only those with a 4-neighbour outside the mask are drawn, the inside is
        left showing the image.
    ventricles : ndarray of bool, shape (H, W), optional
        Ventricle pixels, outlined the same way in their own colour, under the lesion outline.
    """
    tile = ((grey.astype(np.uint16) * (GREY_LEVELS - 1) + 127) // 255).astype(np.uint8)
    if ventricles is not None:
        tile[_border(ventricles)] = _VENTRICLE
    tile[_border(mask)] = _OUTLINE
    return tile


def _fit(
    draw: ImageDraw.ImageDraw,
    text: str,
    font: ImageFont.FreeTypeFont | ImageFont.ImageFont,
    width: int,
) -> str:
    """Printable text shortened with '...' to fit ``width`` pixels."""
    text = "".join(ch if ch.isprintable() else " " for ch in text)
    if draw.textlength(text, font=font) <= width:
        return text
    while text and draw.textlength(text + "...", font=font) > width:
        text = text[:-1]
    return text + "..."


def qc_montage(
    image: np.ndarray,
    mask: np.ndarray,
    affine_lps: np.ndarray,
    *,
    title_lines: Sequence[str],
    n_slices: int = 12,
    banner: str = BANNER,
    tile_px: int = 256,
    ventricles: np.ndarray | None = None,
) -> Image.Image:
    """Axial montage with lesion outlines, title lines and a burned-in banner at top and bottom.

    Parameters
    ----------
    image : ndarray, shape (I, J, K)
        FLAIR intensities on the series grid.
    mask : ndarray, shape (I, J, K)
        WMH mask on the same grid (non-zero = lesion).
    affine_lps : ndarray, shape (4, 4)
        Voxel (i, j, k, 1) to patient LPS mm.
    title_lines : sequence of str
        Lines under the top banner (series key, model version, lesion volume in mL...). Never
        pass patient names.
    n_slices : int
        Number of axial tiles (fewer when the volume has fewer slices).
    banner : str
        Caution burned into the top and bottom bars.
    tile_px : int
        Side of each square cell in pixels; the slice is scaled to fit it, less CELL_PAD_PX on
        each side, with square pixels in mm.
    ventricles : ndarray, shape (I, J, K), optional
        Ventricle mask on the same grid; outlined in its own colour and named in the legend.

    Returns
    -------
    PIL.Image.Image
        Palette ("P") image; width ``COLUMNS x tile_px`` (fewer columns for fewer tiles, wider if
        the text needs it), height ``2 BANNER_PX + title band + rows x tile_px``.
    """
    if image.shape != mask.shape or image.ndim != 3:
        raise StageFailed(
            f"QC image and mask shapes differ ({image.shape} vs {mask.shape}); report this as a bug"
        )
    if n_slices < 1 or tile_px < 16:
        raise ValueError("n_slices must be >= 1 and tile_px >= 16")
    data, affine = axial_view(np.asarray(image, dtype=np.float32), affine_lps)
    lesion, _ = axial_view(np.asarray(mask) != 0, affine_lps)
    vent = None
    if ventricles is not None:
        if np.shape(ventricles) != image.shape:
            raise StageFailed(
                f"QC ventricle mask shape {np.shape(ventricles)} differs from the image "
                f"{image.shape}; report this as a bug"
            )
        vent, _ = axial_view(np.asarray(ventricles) != 0, affine_lps)
    head_threshold, low, high = intensity_levels(data)
    slices = choose_slices(data, lesion, n_slices, head_threshold)

    spacing = np.linalg.norm(affine[:3, :3], axis=0)
    width_mm, height_mm = data.shape[0] * spacing[0], data.shape[1] * spacing[1]
    scale = (tile_px - 2 * CELL_PAD_PX) / max(width_mm, height_mm)
    tile_w = max(1, round(width_mm * scale))
    tile_h = max(1, round(height_mm * scale))

    font = ImageFont.load_default(size=FONT_PX)
    small = ImageFont.load_default(size=LETTER_FONT_PX)
    columns = min(COLUMNS, len(slices))
    rows = math.ceil(len(slices) / columns)
    legend = [("WMH", _OUTLINE)] + ([("ventricles", _VENTRICLE)] if vent is not None else [])
    lines = [*title_lines, _CONVENTION, ""]  # the last line holds the legend
    probe = ImageDraw.Draw(Image.new("P", (1, 1)))
    text_w = max(probe.textlength(t, font=font) for t in [banner, *lines])
    width = max(columns * tile_px, min(int(text_w) + 2 * TITLE_PAD_PX, 2 * columns * tile_px))
    title_h = len(lines) * TITLE_LINE_PX + 2 * TITLE_PAD_PX
    grid_top = BANNER_PX + title_h
    height = grid_top + rows * tile_px + BANNER_PX

    canvas = np.zeros((height, width), dtype=np.uint8)
    canvas[:BANNER_PX] = _BANNER
    canvas[height - BANNER_PX :] = _BANNER
    canvas[BANNER_PX:grid_top] = _TITLE_BG
    origins = []
    for n, k in enumerate(slices):
        grey = np.clip((data[:, :, k].T - low) / (high - low) * 255.0, 0, 255).astype(np.uint8)
        grey_img = Image.fromarray(grey).resize((tile_w, tile_h), Image.Resampling.BILINEAR)
        mask_img = Image.fromarray(lesion[:, :, k].T.astype(np.uint8) * 255)
        mask_px = np.asarray(mask_img.resize((tile_w, tile_h), Image.Resampling.NEAREST)) > 127
        vent_px = None
        if vent is not None:
            vent_img = Image.fromarray(vent[:, :, k].T.astype(np.uint8) * 255)
            vent_px = np.asarray(vent_img.resize((tile_w, tile_h), Image.Resampling.NEAREST)) > 127
        x0 = (n % columns) * tile_px + (tile_px - tile_w) // 2
        y0 = grid_top + (n // columns) * tile_px + (tile_px - tile_h) // 2
        canvas[y0 : y0 + tile_h, x0 : x0 + tile_w] = outline_tile(
            np.asarray(grey_img), mask_px, vent_px
        )
        superior_mm = float((affine @ [(data.shape[0] - 1) / 2, (data.shape[1] - 1) / 2, k, 1])[2])
        origins.append((x0, y0, superior_mm))

    out = Image.fromarray(canvas, mode="P")
    out.putpalette(_palette())
    draw = ImageDraw.Draw(out)
    for y in (0, height - BANNER_PX):
        text = _fit(draw, banner, font, width - 2 * TITLE_PAD_PX)
        draw.text((width / 2, y + BANNER_PX / 2), text, fill=_BANNER_TEXT, font=font, anchor="mm")
    for n, line in enumerate(lines):
        y = BANNER_PX + TITLE_PAD_PX + n * TITLE_LINE_PX
        draw.text(
            (TITLE_PAD_PX, y),
            _fit(draw, line, font, width - 2 * TITLE_PAD_PX),
            fill=_TEXT,
            font=font,
        )
    _draw_legend(draw, legend, BANNER_PX + TITLE_PAD_PX + (len(lines) - 1) * TITLE_LINE_PX, small)
    for x0, y0, superior_mm in origins:
        pad = 2
        draw.text((x0 + pad, y0 + tile_h / 2), "R", fill=_LETTER, font=small, anchor="lm")
        draw.text((x0 + tile_w - pad, y0 + tile_h / 2), "L", fill=_LETTER, font=small, anchor="rm")
        draw.text((x0 + tile_w / 2, y0 + pad), "A", fill=_LETTER, font=small, anchor="mt")
        draw.text((x0 + tile_w / 2, y0 + tile_h - pad), "P", fill=_LETTER, font=small, anchor="mb")
        draw.text((x0 + pad, y0 + pad), f"S {superior_mm:.0f} mm", fill=_TEXT, font=small)
    logger.debug("QC montage %dx%d with %d slices", width, height, len(slices))
    return out


def _draw_legend(
    draw: ImageDraw.ImageDraw,
    entries: Sequence[tuple[str, int]],
    y: int,
    font: ImageFont.FreeTypeFont | ImageFont.ImageFont,
) -> None:
    """One legend line at height ``y``: a swatch of each outline colour and its name."""
    x = TITLE_PAD_PX
    draw.text((x, y), "Outlines:", fill=_TEXT, font=font)
    x += int(draw.textlength("Outlines:", font=font)) + 8
    for name, colour in entries:
        draw.rectangle((x, y + 2, x + LEGEND_SWATCH_PX, y + 2 + LEGEND_SWATCH_PX), fill=colour)
        x += LEGEND_SWATCH_PX + 4
        draw.text((x, y), name, fill=_TEXT, font=font)
        x += int(draw.textlength(name, font=font)) + 12


def save_png(img: Image.Image, path: Path) -> None:
    """Write ``img`` as a PNG atomically (temp file in the same folder, fsync, rename, fsync).

    The research-only caution is also stored in the PNG's text chunk.
    """
    info = PngInfo()
    info.add_text("Comment", BANNER)
    buf = io.BytesIO()
    # zlib level 6 without PIL's optimize pass: 1 % larger, a quarter of the time (measured on a
    # 12-tile montage: 226 kB in 17 ms of CPU against 224 kB in 73 ms); pixels are the same
    img.save(buf, format="PNG", compress_level=6, pnginfo=info)
    write_atomic(path, buf.getvalue())
