"""The pure middle of the engine: one volume in, WMH (and what the model adds) out, on its own grid.

:func:`analyse` takes a :class:`~flairwatch.volume.Volume` and a model session and returns
arrays on the volume's grid, axes (i, j, k): model grid -> infer -> series grid ->
post-process. No file is read or written here; :mod:`flairwatch.engine.pipeline` adds the edges.

Output channels a model may declare (``output.channels`` in its manifest, see the models README):
``wmh`` (required), ``intracranial`` (restricts WMH to the head, gives the intracranial volume)
and ``ventricles`` (gives the ventricle volume and the periventricular/deep split).
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np

from flairwatch.engine import convert
from flairwatch.engine.infer import Segmenter
from flairwatch.engine.postprocess import (
    LesionResult,
    bounding_box,
    connected_components,
    threshold_and_clean,
)
from flairwatch.engine.regions import (
    DEFAULT_PERIVENTRICULAR_MM,
    VentricleSplit,
    split_by_ventricles,
)
from flairwatch.volume import Volume

# the training data's lesion loads reach 60 mL; beyond that results are extrapolation
TRAINED_LOAD_LIMIT_ML = 60.0
# a probability map becomes a mask at one half (intracranial and ventricle channels)
MASK_LEVEL = 0.5


@dataclass(frozen=True, eq=False)
class Analysis:
    """What the model and post-processing made of one volume, on the series' own grid."""

    probability: np.ndarray  # (I, J, K) float32 WMH probability 0..1; 0 outside the head
    intracranial: np.ndarray | None  # (I, J, K) uint8, when the model gives it
    lesions: LesionResult
    intracranial_volume_ml: float | None
    warnings: tuple[str, ...]
    timings_s: dict[str, float] = field(default_factory=dict)
    ventricles: np.ndarray | None = None  # (I, J, K) uint8, when the model gives it
    split: VentricleSplit | None = None  # periventricular/deep, when ventricles are given


@contextmanager
def timed(timings: dict[str, float], stage: str) -> Iterator[None]:
    """Record the wall time of the ``with`` block in ``timings[stage]``, seconds."""
    start = time.perf_counter()
    try:
        yield
    finally:
        timings[stage] = round(time.perf_counter() - start, 3)


def fill_holes(mask: np.ndarray) -> np.ndarray:
    """Fill the holes of a 3-D mask: the same result as ``ndimage.binary_fill_holes(mask)``.

    A hole is a background region (face-connected) that does not reach the array's border.
    Labelling the background once, inside the mask's bounding box grown by one voxel, finds
    them in one pass; ``binary_fill_holes`` dilates from the border until nothing changes (five
    to ten times slower on a 256 x 256 x 48 series). The grown box is exact: its outer layer is
    background and joins the rest of the outside, so a region touching the box's edge touches
    the outside.
    """
    m = np.asarray(mask, dtype=bool)
    box = tuple(
        slice(max(0, sl.start - 1), min(n, sl.stop + 1))
        for sl, n in zip(bounding_box(m), m.shape, strict=True)
    )
    sub = m[box]
    background, n = connected_components(~sub, 6)
    edge = np.concatenate(
        [
            background[[0, -1], :, :].ravel(),
            background[:, [0, -1], :].ravel(),
            background[:, :, [0, -1]].ravel(),
        ]
    )
    hole = np.ones(n + 1, dtype=bool)
    hole[edge] = False  # label 0 (the mask itself) is on the edge or, if not, filled anyway
    out = m.copy()
    out[box] |= hole[background]
    return out


def largest_component_filled(mask: np.ndarray) -> np.ndarray:
    """Keep the largest 26-connected component and fill its holes (an intracranial mask is one piece)."""
    box = bounding_box(mask)
    labels, n = connected_components(mask[box], 26)
    if n == 0:
        return np.asarray(mask, dtype=np.uint8)
    sizes = np.bincount(labels.ravel())[1:]
    largest = np.zeros(np.shape(mask), dtype=bool)
    largest[box] = labels == (int(np.argmax(sizes)) + 1)
    return fill_holes(largest).astype(np.uint8)


def head_cut_off(slices: np.ndarray, level: float = 0.3, fraction: float = 0.01) -> bool:
    """True when normalised tissue (> ``level``) covers more than ``fraction`` of the model
    grid's border pixels, i.e. the series' head does not fit the model's field of view.
    ``slices`` is (K, H, W) on the model grid."""
    border = np.concatenate(
        [slices[:, 0, :], slices[:, -1, :], slices[:, :, 0], slices[:, :, -1]], axis=1
    )
    return bool(np.mean(border > level) > fraction)


def _warnings(
    x: np.ndarray, segmenter: Segmenter, icv_ml: float | None, lesions: LesionResult
) -> list[str]:
    m = segmenter.manifest
    warnings = []
    if head_cut_off(x[:, m.channels // 2]):
        fov = np.multiply(m.grid.shape, m.grid.spacing_mm)
        warnings.append(
            f"the head reaches the edge of the model's {fov[0]:.0f} x {fov[1]:.0f} mm view; "
            "tissue outside it is not segmented: check the QC image"
        )
    if icv_ml is not None and not 800.0 <= icv_ml <= 2300.0:
        warnings.append(
            f"intracranial volume {icv_ml:.0f} mL is outside the usual adult range; check the QC image"
        )
    if lesions.total_volume_ml > TRAINED_LOAD_LIMIT_ML:
        warnings.append(
            f"lesion volume {lesions.total_volume_ml:.1f} mL is above the model's training range "
            f"(0-{TRAINED_LOAD_LIMIT_ML:.0f} mL)"
        )
    return warnings


def analyse(
    volume: Volume,
    segmenter: Segmenter,
    *,
    threshold: float,
    min_lesion_mm3: float,
    connectivity: int,
    periventricular_mm: float = DEFAULT_PERIVENTRICULAR_MM,
) -> Analysis:
    """Segment WMH in ``volume`` and return everything on the volume's own grid.

    Parameters
    ----------
    volume : Volume
        The series on its own grid.
    segmenter : Segmenter
        The model session; its manifest says which output channels there are.
    threshold, min_lesion_mm3, connectivity
        Post-processing settings (see :func:`flairwatch.engine.postprocess.threshold_and_clean`).
    periventricular_mm : float
        Distance from the ventricles within which lesion voxels count as periventricular, mm;
        used only when the model has a ``ventricles`` output.
    """
    channels = segmenter.manifest.output_channels
    timings: dict[str, float] = {}
    with timed(timings, "to_model_grid"):
        m = segmenter.manifest
        x, gmap = convert.to_model_input(
            volume, m.grid, m.normalisation, m.channels, threads=segmenter.threads
        )
    with timed(timings, "infer"):
        probs = segmenter.predict(x)

    def channel(name: str) -> np.ndarray:
        return probs[:, channels.index(name)]

    threads = segmenter.threads
    with timed(timings, "to_series_grid"):
        wmh = convert.resample_to_series(channel("wmh"), gmap, threads=threads)
        icv = vent = None
        if "intracranial" in channels:
            icv = largest_component_filled(
                convert.resample_mask_to_series(
                    channel("intracranial"), gmap, MASK_LEVEL, threads=threads
                )
            )
        if "ventricles" in channels:
            vent = convert.resample_mask_to_series(
                channel("ventricles"), gmap, MASK_LEVEL, threads=threads
            )
            if icv is not None:
                vent &= icv != 0
            vent = vent.astype(np.uint8)
        if icv is not None:
            # outside the head the WMH probability is noise near zero (below 1e-4 on the
            # phantoms); exact zeros there make the probability file 3-4 times smaller and its
            # compression 2-3 times faster, and no lesion can lie there (restrict_to below).
            np.copyto(wmh, np.float32(0.0), where=icv == 0)
    with timed(timings, "post_process"):
        lesions = threshold_and_clean(
            wmh,
            volume.affine_lps,
            threshold=threshold,
            min_lesion_mm3=min_lesion_mm3,
            connectivity=connectivity,
            restrict_to=icv,
        )
        split = None
        if vent is not None and lesions.labels is not None:
            split = split_by_ventricles(
                lesions.labels,
                len(lesions.lesions),
                vent,
                volume.spacing,
                distance_mm=periventricular_mm,
                voxel_mm3=volume.voxel_volume_mm3,
            )
    icv_ml = None if icv is None else float(icv.sum()) * volume.voxel_volume_mm3 / 1000.0
    return Analysis(
        probability=wmh,
        intracranial=icv,
        lesions=lesions,
        intracranial_volume_ml=icv_ml,
        warnings=tuple(_warnings(x, segmenter, icv_ml, lesions)),
        timings_s=timings,
        ventricles=vent,
        split=split,
    )
