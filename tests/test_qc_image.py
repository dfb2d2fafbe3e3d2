"""QC montage checks.

Oracles: nibabel.orientations.aff2axcodes (axis codes of the reoriented RAS affine) and
nibabel.affines.apply_affine (a voxel keeps its patient position), mask borders computed here
independently by neighbour shifts, and the radiological display convention (common practice:
patient right on the image's left, anterior at the top).
"""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np
import pytest
from nibabel.affines import apply_affine
from nibabel.orientations import aff2axcodes
from PIL import Image
from scipy import ndimage

from flairwatch.engine import qc_image
from flairwatch.engine.qc_image import (
    BANNER_PX,
    BANNER_RGB,
    BANNER_TEXT_RGB,
    CELL_PAD_PX,
    OUTLINE_RGB,
    TEXT_RGB,
    TITLE_LINE_PX,
    TITLE_PAD_PX,
    VENTRICLE_RGB,
    axial_view,
    choose_slices,
    outline_tile,
    qc_montage,
    save_png,
)
from flairwatch.errors import StageFailed
from flairwatch.volume import lps_to_ras

TITLE = ["series 3f9a2c  model wmh-demo 1.0.0", "WMH 1.25 mL in 2 lesions"]


def _rotation(axis: int, degrees: float) -> np.ndarray:
    a = math.radians(degrees)
    c, s = math.cos(a), math.sin(a)
    r = np.eye(3)
    i, j = [n for n in range(3) if n != axis]
    r[i, i], r[i, j], r[j, i], r[j, j] = c, -s, s, c
    return r


def _affine(columns: np.ndarray, spacing: tuple[float, float, float]) -> np.ndarray:
    affine = np.eye(4)
    affine[:3, :3] = columns @ np.diag(spacing)
    affine[:3, 3] = [-90.0, -110.0, -40.0]
    return affine


# Direction columns in LPS for (i, j, k), as in DICOM Image Orientation (Patient) (PS3.3
# C.7.6.2.1.1): row direction, column direction, slice normal.
AFFINES = {
    "axial": _affine(np.eye(3), (1.0, 1.0, 3.0)),
    "axial stored R->L reversed": _affine(np.diag([-1.0, -1.0, 1.0]), (0.9, 0.9, 4.0)),
    "axial oblique 15 deg": _affine(_rotation(0, 15.0) @ _rotation(2, -8.0), (0.9, 0.9, 4.0)),
    # sagittal: rows run anterior->posterior (+y), columns head->feet (-z), slices right->left
    "sagittal": _affine(np.array([[0, 0, 1], [1, 0, 0], [0, -1, 0]], float), (1.0, 1.0, 1.2)),
    # coronal: rows right->left (+x), columns head->feet (-z), slices anterior->posterior
    "coronal": _affine(np.array([[1, 0, 0], [0, 0, 1], [0, -1, 0]], float), (0.8, 0.8, 3.0)),
    "sagittal oblique 12 deg": _affine(
        _rotation(1, 12.0) @ np.array([[0, 0, 1], [1, 0, 0], [0, -1, 0]], float), (1.0, 1.0, 1.0)
    ),
}


@pytest.mark.parametrize("name", list(AFFINES))
def test_axial_view_codes_and_positions(name: str) -> None:
    affine = AFFINES[name]
    rng = np.random.default_rng(5)
    data = rng.random((12, 10, 8))
    out, new_affine = axial_view(data, affine)
    # nibabel oracle: the reoriented array's axes point to Left, Posterior, Superior (RAS codes).
    assert aff2axcodes(lps_to_ras(new_affine)) == ("L", "P", "S")
    assert sorted(out.shape) == sorted(data.shape)
    # nibabel apply_affine oracle: every voxel keeps its patient position (no resampling).
    for idx in [(0, 0, 0), (11, 9, 7), (3, 7, 2)]:
        world = apply_affine(affine, idx)
        new_idx = np.round(apply_affine(np.linalg.inv(new_affine), world)).astype(int)
        assert out[tuple(new_idx)] == data[idx]
        np.testing.assert_allclose(apply_affine(new_affine, new_idx), world, atol=1e-9)


def _grid(rgb: np.ndarray, title_lines: int = len(TITLE)) -> np.ndarray:
    """The tile grid of a montage: below the title band (title lines, the view convention and the
    legend) and above the bottom banner (our own layout)."""
    top = BANNER_PX + (title_lines + 2) * TITLE_LINE_PX + 2 * TITLE_PAD_PX
    return rgb[top:-BANNER_PX]


def _ring_components(rgb: np.ndarray) -> list[tuple[tuple[slice, slice], np.ndarray]]:
    outline = np.all(rgb == OUTLINE_RGB, axis=2)
    labels, n = ndimage.label(outline, structure=np.ones((3, 3)))
    return [(box, labels[box] == i + 1) for i, box in enumerate(ndimage.find_objects(labels))][:n]


def _border_by_shifts(mask: np.ndarray) -> np.ndarray:
    """Independent border: mask pixels with a 4-neighbour outside (padding counts as outside)."""
    p = np.pad(mask, 1)
    inner = p[:-2, 1:-1] & p[2:, 1:-1] & p[1:-1, :-2] & p[1:-1, 2:] & mask
    return mask & ~inner


def test_outlines_on_mask_border_not_interior() -> None:
    shape = (128, 128, 20)
    image = np.full(shape, 300.0, dtype=np.float32)
    image += np.random.default_rng(1).normal(0, 20, shape).astype(np.float32)
    ii, jj = np.meshgrid(np.arange(128), np.arange(128), indexing="ij")
    disk = (ii - 50) ** 2 + (jj - 70) ** 2 <= 10**2  # centre i=50, j=70, radius 10 voxels
    mask = np.zeros(shape, dtype=np.uint8)
    mask[:, :, 5:15] = disk[:, :, None]
    image[mask != 0] = 900.0  # a bright lesion: the grey image must sit under its outline
    # 1 mm voxels and cells of 128 + 2 pads: one image pixel per voxel.
    montage = qc_montage(
        image, mask, np.eye(4), title_lines=TITLE, n_slices=4, tile_px=128 + 2 * CELL_PAD_PX
    )
    rgb = _grid(np.asarray(montage.convert("RGB")))
    rings = _ring_components(rgb)
    assert len(rings) == 4  # one outline per tile, all 4 tiles on lesion slices
    # Display rows run along j (anterior at top), columns along i (patient left on the right).
    expected = _border_by_shifts(disk.T)
    rows, cols = np.nonzero(expected)
    expected = expected[rows.min() : rows.max() + 1, cols.min() : cols.max() + 1]
    for box, ring in rings:
        np.testing.assert_array_equal(ring, expected)
        interior = ndimage.binary_erosion(ndimage.binary_fill_holes(ring))
        inside = rgb[box][interior]
        assert inside.size > 0
        # interior shows the grey image: R = G = B, no outline colour
        assert np.all(inside[:, 0] == inside[:, 1]) and np.all(inside[:, 1] == inside[:, 2])
        assert inside[:, 0].min() > 200  # the bright lesion, not the ~300 background (grey ~90)


def test_outline_tile_unit() -> None:
    grey = np.full((9, 9), 200, dtype=np.uint8)
    mask = np.zeros((9, 9), dtype=bool)
    mask[2:7, 2:7] = True
    tile = outline_tile(grey, mask)
    outline = tile == qc_image.GREY_LEVELS  # first colour after the grey ramp
    np.testing.assert_array_equal(outline, _border_by_shifts(mask))
    assert np.all(tile[~outline] < qc_image.GREY_LEVELS)


def _head(shape: tuple[int, int, int], seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    grids = np.meshgrid(*[np.linspace(-1, 1, n) for n in shape], indexing="ij")
    inside = sum(g**2 for g in grids) < 0.8
    image = np.where(inside, 500.0, 0.0) + rng.rayleigh(25.0, shape)
    return image.astype(np.float32)


def test_banner_title_and_size() -> None:
    shape = (256, 256, 30)
    image = _head(shape)
    mask = np.zeros(shape, dtype=np.uint8)
    mask[100:120, 100:110, 10:20] = 1
    montage = qc_montage(image, mask, np.diag([0.9, 0.9, 3.0, 1.0]), title_lines=TITLE)
    # Layout: 12 tiles -> 4 columns x 3 rows of 256 px, banners, title band (our own layout).
    title_band = (len(TITLE) + 2) * TITLE_LINE_PX + 2 * TITLE_PAD_PX
    assert montage.size == (4 * 256, 2 * BANNER_PX + title_band + 3 * 256)
    rgb = np.asarray(montage.convert("RGB"))
    for band in (rgb[:BANNER_PX], rgb[-BANNER_PX:]):
        colours = band.reshape(-1, 3)
        assert np.mean(np.all(colours == BANNER_RGB, axis=1)) > 0.6  # banner colour fills the bar
        assert np.any(np.all(colours == BANNER_TEXT_RGB, axis=1))  # and text is burned in
    title = rgb[BANNER_PX : BANNER_PX + title_band].reshape(-1, 3)
    assert np.any(np.all(title == TEXT_RGB, axis=1))
    other = qc_montage(image, mask, np.diag([0.9, 0.9, 3.0, 1.0]), title_lines=TITLE, banner="X")
    assert not np.array_equal(np.asarray(other)[:BANNER_PX], np.asarray(montage)[:BANNER_PX])


def test_sagittal_series_shows_lesion_on_patient_left_anterior() -> None:
    # 3-D sagittal grid: i anterior->posterior, j head->feet, k right->left.
    affine = AFFINES["sagittal"]
    shape = (96, 96, 80)
    image = _head(shape, seed=2)
    mask = np.zeros(shape, dtype=np.uint8)
    # anterior (small i), mid height (j), patient left (large k)
    mask[15:25, 40:50, 60:70] = 1
    image[mask != 0] = 2000.0
    montage = qc_montage(image, mask, affine, title_lines=TITLE, n_slices=6, tile_px=128)
    rgb = _grid(np.asarray(montage.convert("RGB")))
    rings = _ring_components(rgb)
    assert len(rings) == 6
    for box, ring in rings:
        interior = ndimage.binary_erosion(ndimage.binary_fill_holes(ring))
        assert rgb[box][interior][:, 0].min() == 255  # bright block under the outline
        x = (box[1].start + box[1].stop) / 2 % 128
        y = ((box[0].start + box[0].stop) / 2) % 128
        # Radiological convention (common practice): patient left on the image right, anterior up.
        assert x > 64 and y < 64


def test_choose_slices() -> None:
    image = np.zeros((20, 20, 40), dtype=np.float32)
    image[5:15, 5:15, 10:30] = 100.0  # head occupies slices 10..29
    many = np.zeros(image.shape, dtype=bool)
    many[8:10, 8:10, 12:28] = True  # 16 lesion slices
    chosen = choose_slices(image, many, 4)
    assert chosen == [12, 17, 22, 27]  # even spread over lesion slices, ends included
    few = np.zeros(image.shape, dtype=bool)
    few[8, 8, [14, 15]] = True
    chosen = choose_slices(image, few, 6)
    assert len(chosen) == 6 and {14, 15} <= set(chosen)
    assert all(10 <= s <= 29 for s in chosen)  # the rest from the head's slices
    none = choose_slices(image, np.zeros(image.shape, dtype=bool), 5)
    assert none == [10, 15, 20, 24, 29]
    assert choose_slices(np.zeros((4, 4, 3)), np.zeros((4, 4, 3), dtype=bool), 12) == [0, 1, 2]


def test_blank_volume_and_no_lesion_still_render() -> None:
    montage = qc_montage(
        np.zeros((32, 32, 5)), np.zeros((32, 32, 5)), np.eye(4), title_lines=[], tile_px=64
    )
    assert montage.size[1] > 2 * BANNER_PX
    grid = _grid(np.asarray(montage.convert("RGB")), title_lines=0)
    assert not np.any(np.all(grid == OUTLINE_RGB, axis=2))


def test_save_png_small_atomic_and_readable(tmp_path: Path) -> None:
    shape = (256, 256, 40)
    image = _head(shape, seed=3)
    mask = np.zeros(shape, dtype=np.uint8)
    mask[100:140, 90:130, 8:32] = 1
    montage = qc_montage(image, mask, np.diag([0.94, 0.94, 3.0, 1.0]), title_lines=TITLE)
    path = tmp_path / "qc.png"
    path.write_bytes(b"old")
    save_png(montage, path)
    assert os.listdir(tmp_path) == ["qc.png"]  # temp file renamed into place, none left
    assert path.stat().st_size < 1_000_000  # 12 tiles of 256 x 256 stay under ~1 MB
    with Image.open(path) as reread:
        assert reread.format == "PNG"
        assert "RESEARCH USE ONLY" in reread.info.get("Comment", "")
        np.testing.assert_array_equal(
            np.asarray(reread.convert("RGB")), np.asarray(montage.convert("RGB"))
        )


def test_save_png_failure_keeps_old_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = tmp_path / "qc.png"
    path.write_bytes(b"old")

    def broken_replace(src: object, dst: object) -> None:
        raise OSError("disk full")

    monkeypatch.setattr(os, "replace", broken_replace)
    with pytest.raises(OSError):
        save_png(Image.new("RGB", (8, 8)), path)
    assert path.read_bytes() == b"old"
    assert os.listdir(tmp_path) == ["qc.png"]


def _has_colour(rgb: np.ndarray, colour: tuple[int, int, int]) -> bool:
    return bool(np.any(np.all(rgb == colour, axis=2)))


def test_ventricle_outline_and_legend_only_when_ventricles_are_given() -> None:
    shape = (96, 96, 12)
    image = _head(shape, seed=4)
    mask = np.zeros(shape, dtype=np.uint8)
    mask[30:36, 30:36, 4:8] = 1
    vent = np.zeros(shape, dtype=np.uint8)
    vent[50:62, 40:60, 3:9] = 1
    kwargs = {"title_lines": TITLE, "n_slices": 4, "tile_px": 128}
    without = np.asarray(qc_montage(image, mask, np.eye(4), **kwargs).convert("RGB"))
    with_vent = np.asarray(
        qc_montage(image, mask, np.eye(4), ventricles=vent, **kwargs).convert("RGB")
    )
    assert not _has_colour(without, VENTRICLE_RGB)
    # ventricles: outlined in the tiles and named in the legend (a swatch in the title band)
    assert _has_colour(_grid(with_vent), VENTRICLE_RGB)
    assert _has_colour(with_vent[: with_vent.shape[0] - _grid(with_vent).shape[0]], VENTRICLE_RGB)
    # WMH keeps its own colour in both, in the tiles and the legend
    for rgb in (without, with_vent):
        assert _has_colour(_grid(rgb), OUTLINE_RGB)
        assert _has_colour(rgb[: rgb.shape[0] - _grid(rgb).shape[0]], OUTLINE_RGB)
    # one ventricle ring per tile: the 4 tiles are the lesion slices 4..7, all crossing the box
    outline = np.all(_grid(with_vent) == VENTRICLE_RGB, axis=2)
    _, n = ndimage.label(outline, structure=np.ones((3, 3)))
    assert n == 4


def test_ventricle_mask_of_another_shape_is_refused() -> None:
    shape = (32, 32, 5)
    with pytest.raises(StageFailed):
        qc_montage(
            np.zeros(shape),
            np.zeros(shape),
            np.eye(4),
            title_lines=[],
            ventricles=np.zeros((8, 8, 5)),
        )
