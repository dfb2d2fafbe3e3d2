"""The slice viewer's pictures: one axial slice of a series with its mask outlines, as PNG.

Pure: arrays in, PNG bytes out (Pillow encodes in memory). A :class:`SeriesView` holds a
series' image and masks already turned into the display orientation by
:func:`flairwatch.engine.qc_image.axial_view`: axes (L, P, S), voxels permuted and flipped but
never resampled, so every pixel shown is a voxel of the series' own grid. A slice is drawn in
the radiological convention, as the QC picture is: the patient's right on the image's left,
anterior at the top. Non-square pixels are stretched to their true size in mm (nearest
neighbour, so outlines stay one voxel wide).

Slices are numbered 0 .. depth - 1 from the feet to the head (the S axis).
"""

from __future__ import annotations

import io
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from PIL import Image

from flairwatch.engine.qc_image import (
    LETTER_RGB,
    OUTLINE_RGB,
    VENTRICLE_RGB,
    axial_view,
    intensity_levels,
)

# outline colours: WMH as in the QC picture (red), a reviewer's correction yellow, ventricles
# as in the QC picture (green), the intracranial outline cyan
LAYER_COLOURS: dict[str, tuple[int, int, int]] = {
    "wmh": OUTLINE_RGB,
    "correction": (255, 210, 0),
    "ventricles": VENTRICLE_RGB,
    "intracranial": LETTER_RGB,
}
LAYER_LABELS = {
    "wmh": "WMH (model)",
    "correction": "WMH (corrected)",
    "ventricles": "ventricles",
    "intracranial": "intracranial",
}
FILLED = ("wmh", "correction")  # layers the opacity setting fills; the others are outlines only
PNG_LEVEL = 1  # fastest zlib level: a slice is shown once and thrown away


@dataclass(frozen=True)
class SeriesView:
    """A series ready for display.

    ``image`` is float32 (X, Y, Z) on axes (L, P, S); ``layers`` maps a layer name (keys of
    :data:`LAYER_COLOURS`) to a bool array of the same shape; ``spacing_mm`` is the voxel size
    along (L, P, S); ``level`` and ``width`` are the starting grey window in image units;
    ``source`` says where the image came from, in words. The starting window runs from 0 (or
    the image's 0.5th percentile in the head when that is negative) to the 99.5th percentile of
    the head (:func:`flairwatch.engine.qc_image.intensity_levels`).
    """

    image: np.ndarray
    layers: Mapping[str, np.ndarray]
    spacing_mm: tuple[float, float, float]
    level: float
    width: float
    source: str

    @property
    def depth(self) -> int:
        return int(self.image.shape[2])

    @property
    def start_slice(self) -> int:
        """The slice with the most WMH voxels (the corrected mask first), else the middle."""
        for name in ("correction", "wmh"):
            mask = self.layers.get(name)
            if mask is not None and mask.any():
                return int(np.argmax(np.count_nonzero(mask, axis=(0, 1))))
        return self.depth // 2

    def lesion_slices(self) -> list[int]:
        """Slices holding WMH voxels of the model or the correction."""
        hit = np.zeros(self.depth, dtype=bool)
        for name in FILLED:
            mask = self.layers.get(name)
            if mask is not None:
                hit |= mask.any(axis=(0, 1))
        return [int(k) for k in np.flatnonzero(hit)]


@dataclass(frozen=True)
class SliceSettings:
    """How to draw a slice: grey window (image units), fill opacity 0..1, layers outlined."""

    level: float
    width: float
    opacity: float = 0.0
    layers: frozenset[str] = frozenset(LAYER_COLOURS)


def make_view(
    image: np.ndarray,
    affine_lps: np.ndarray,
    layers: Mapping[str, np.ndarray],
    source: str,
) -> SeriesView:
    """Turn an image and its masks (all (i, j, k) on one grid, ``affine_lps`` mapping voxels to
    patient LPS mm) into a :class:`SeriesView`."""
    shown, shown_affine = axial_view(np.asarray(image, dtype=np.float32), affine_lps)
    oriented = {name: axial_view(np.asarray(m) > 0.5, affine_lps)[0] for name, m in layers.items()}
    spacing = np.linalg.norm(np.asarray(shown_affine)[:3, :3], axis=0)
    _, low, high = intensity_levels(shown)
    if low >= 0:  # magnitude images: black at 0 keeps fluid dark and tissue grey (common practice)
        low = 0.0
    return SeriesView(
        image=np.ascontiguousarray(shown),
        layers={k: np.ascontiguousarray(v) for k, v in oriented.items()},
        spacing_mm=(float(spacing[0]), float(spacing[1]), float(spacing[2])),
        level=(low + high) / 2.0,
        width=max(high - low, 1e-6),
        source=source,
    )


def border(mask: np.ndarray) -> np.ndarray:
    """Pixels of a 2-D bool mask with a 4-neighbour outside the mask (or outside the picture)."""
    inside = mask.copy()
    inside[1:, :] &= mask[:-1, :]
    inside[:-1, :] &= mask[1:, :]
    inside[:, 1:] &= mask[:, :-1]
    inside[:, :-1] &= mask[:, 1:]
    inside[0, :] = inside[-1, :] = False
    inside[:, 0] = inside[:, -1] = False
    return mask & ~inside


def grey(plane: np.ndarray, level: float, width: float) -> np.ndarray:
    """Window a 2-D image to uint8: ``level - width/2`` is black, ``level + width/2`` white."""
    width = max(float(width), 1e-6)
    scaled = (plane.astype(np.float32) - np.float32(level - width / 2.0)) * np.float32(
        255.0 / width
    )
    return np.clip(scaled, 0, 255).astype(np.uint8)


def slice_rgb(view: SeriesView, k: int, settings: SliceSettings) -> np.ndarray:
    """Slice ``k`` as an (H, W, 3) uint8 picture: rows anterior to posterior, columns R to L."""
    if not 0 <= k < view.depth:
        raise IndexError(f"slice {k} outside 0..{view.depth - 1}")
    g = grey(view.image[:, :, k].T, settings.level, settings.width)
    rgb = np.repeat(g[:, :, None], 3, axis=2)
    alpha = min(max(float(settings.opacity), 0.0), 1.0)
    for name, colour in LAYER_COLOURS.items():
        mask3d = view.layers.get(name)
        if mask3d is None or name not in settings.layers:
            continue
        mask = mask3d[:, :, k].T
        if not mask.any():
            continue
        if alpha > 0 and name in FILLED:
            blend = rgb[mask].astype(np.float32) * (1 - alpha) + np.float32(alpha) * np.asarray(
                colour, dtype=np.float32
            )
            rgb[mask] = blend.round().astype(np.uint8)
        rgb[border(mask)] = colour
    return rgb


def display_size(
    shape_hw: tuple[int, int], spacing_mm: tuple[float, float, float]
) -> tuple[int, int]:
    """(width, height) in pixels that shows a slice with square millimetres.

    The finer in-plane spacing keeps one pixel per voxel; the coarser axis is stretched.
    """
    h, w = shape_hw
    sx, sy = spacing_mm[0], spacing_mm[1]  # along columns (L) and rows (P)
    finest = min(sx, sy)
    return max(1, round(w * sx / finest)), max(1, round(h * sy / finest))


def slice_png(view: SeriesView, k: int, settings: SliceSettings) -> bytes:
    """Slice ``k`` drawn with ``settings``, as PNG bytes (square pixels in mm)."""
    rgb = slice_rgb(view, k, settings)
    img = Image.fromarray(rgb, mode="RGB")
    size = display_size((rgb.shape[0], rgb.shape[1]), view.spacing_mm)
    if size != img.size:
        img = img.resize(size, Image.Resampling.NEAREST)
    buf = io.BytesIO()
    img.save(buf, format="PNG", compress_level=PNG_LEVEL)
    return buf.getvalue()
