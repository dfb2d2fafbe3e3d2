"""Where each 2-D image of a DICOM series lies, and the grid its stack forms (pure).

Geometry follows DICOM PS3.3 C.7.6.2.1.1: a pixel at column index i and row index j of a slice at
Image Position (Patient) P lies at ``P + i * dc * X + j * dr * Y``, where X and Y are the row and
column direction cosines of Image Orientation (Patient) and Pixel Spacing is ``(dr, dc)`` =
(row spacing, column spacing). Slices are ordered by the projection of P on the slice normal
``X x Y``, never by file name or Instance Number. Classic single-frame images and enhanced
multi-frame images (per-frame or shared functional groups) are read alike. Every refusal is an
:class:`~flairwatch.errors.InputRejected` with one line: the series, what is wrong, what to do.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from pydicom.dataset import Dataset

from flairwatch.errors import InputRejected
from flairwatch.intake.discover import functional_group

#: Largest allowed difference between slice steps: this fraction of the step, or
#: :data:`SPACING_TOLERANCE_MM`, whichever is larger (positions carry rounded decimals).
SPACING_TOLERANCE_FRACTION = 0.01
SPACING_TOLERANCE_MM = 0.01
#: Direction cosines that differ by more than this are different orientations.
ORIENTATION_TOLERANCE = 1e-3
#: Slices whose centres drift sideways from the normal by more than this fraction of the
#: smallest pixel spacing do not form a rectangular grid (gantry tilt, sheared stacks).
SHEAR_TOLERANCE_FRACTION = 0.1


def printable(text: str, limit: int = 60) -> str:
    """Text safe for a one-line message (control characters, newlines in names, become spaces)."""
    return "".join(c if c.isprintable() else " " for c in text).strip()[:limit]


def reject(label: str, reason: str, todo: str) -> InputRejected:
    return InputRejected(f"{label}: {reason}; {todo}")


@dataclass(frozen=True)
class Frame:
    """One 2-D image of the stack: where it lies (LPS mm) and how to get its pixels."""

    position: tuple[float, float, float]
    orientation: tuple[float, float, float, float, float, float]
    spacing: tuple[float, float]  # (row spacing, column spacing) in mm
    shape: tuple[int, int]  # (rows, columns)
    dataset: int
    frame: int
    slope: float
    intercept: float


def _floats(value: object, n: int) -> tuple[float, ...] | None:
    try:
        numbers = tuple(float(v) for v in value)  # type: ignore[attr-defined]
    except Exception:  # missing, not a sequence, or bad DS text
        return None
    if len(numbers) != n or not all(math.isfinite(v) for v in numbers):
        return None
    return numbers


def _rescale(ds: Dataset | None) -> tuple[float, float]:
    if ds is None:
        return (1.0, 0.0)
    slope = _floats([ds.get("RescaleSlope", 1.0)], 1)
    intercept = _floats([ds.get("RescaleIntercept", 0.0)], 1)
    return (slope[0] if slope else 1.0, intercept[0] if intercept else 0.0)


def frames_of(ds: Dataset, index: int, label: str) -> list[Frame]:
    rows, cols = int(ds.Rows), int(ds.Columns)
    try:
        n_frames = int(ds.get("NumberOfFrames") or 1)
    except (TypeError, ValueError):
        raise reject(label, "bad Number of Frames", "resend the series") from None
    no_geometry = (
        "the header lacks Image Position/Orientation (Patient) or Pixel Spacing",
        "send the series as the scanner made it",
    )
    if "PerFrameFunctionalGroupsSequence" in ds:
        if len(ds.PerFrameFunctionalGroupsSequence) != n_frames:
            raise reject(
                label,
                f"{n_frames} frames but {len(ds.PerFrameFunctionalGroupsSequence)} per-frame "
                "descriptions",
                "resend the series",
            )
        frames = []
        for f in range(n_frames):
            position = functional_group(ds, "PlanePositionSequence", f)
            orientation = functional_group(ds, "PlaneOrientationSequence", f)
            measures = functional_group(ds, "PixelMeasuresSequence", f)
            ipp = _floats(position and position.get("ImagePositionPatient"), 3)
            iop = _floats(orientation and orientation.get("ImageOrientationPatient"), 6)
            ps = _floats(measures and measures.get("PixelSpacing"), 2)
            if ipp is None or iop is None or ps is None:
                raise reject(label, f"frame {f + 1}: {no_geometry[0]}", no_geometry[1])
            slope, intercept = _rescale(functional_group(ds, "PixelValueTransformationSequence", f))
            frames.append(Frame(ipp, iop, ps, (rows, cols), index, f, slope, intercept))  # type: ignore[arg-type]
        return frames
    if n_frames != 1:
        raise reject(
            label,
            f"multi-frame image ({n_frames} frames) without per-frame positions",
            "send the series as single-frame or enhanced MR images",
        )
    ipp = _floats(ds.get("ImagePositionPatient"), 3)
    iop = _floats(ds.get("ImageOrientationPatient"), 6)
    ps = _floats(ds.get("PixelSpacing"), 2)
    if ipp is None or iop is None or ps is None:
        raise reject(label, no_geometry[0], no_geometry[1])
    slope, intercept = _rescale(ds)
    return [Frame(ipp, iop, ps, (rows, cols), index, 0, slope, intercept)]  # type: ignore[arg-type]


def stack_geometry(
    positions: npt.ArrayLike,
    orientation: Sequence[float],
    pixel_spacing: tuple[float, float],
    label: str,
) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.float64]]:
    """Slice order and LPS affine of a stack of parallel slices (pure).

    Parameters
    ----------
    positions : array, shape (N, 3)
        Image Position (Patient) of each slice, LPS mm, in any order.
    orientation : sequence of 6 floats
        Image Orientation (Patient): row direction cosine X, then column direction cosine Y.
    pixel_spacing : (float, float)
        Pixel Spacing as in DICOM: (row spacing, column spacing) in mm.
    label : str
        Series name for messages.

    Returns
    -------
    order : array of int, shape (N,)
        Indices of ``positions`` sorted along the slice normal X x Y.
    affine : array, shape (4, 4)
        Maps (i, j, k, 1), i = column index, j = row index, k = position in ``order``, to LPS mm.

    Raises
    ------
    InputRejected
        Single slice, duplicate positions, gaps or uneven spacing, slices not stacked along the
        normal, an invalid orientation, or a pixel spacing that is zero, negative or not a number.
    """
    row_mm, col_mm = (float(v) for v in pixel_spacing)
    if not (np.isfinite(row_mm) and np.isfinite(col_mm) and row_mm > 0 and col_mm > 0):
        raise reject(
            label,
            f"Pixel Spacing {row_mm:g}\\{col_mm:g} mm is not two positive numbers",
            "the header is damaged; send the series as the scanner made it",
        )
    pos = np.asarray(positions, dtype=np.float64).reshape(-1, 3)
    n = pos.shape[0]
    if n < 2:
        raise reject(
            label,
            "only one slice",
            "a 3-D volume needs at least two; check that the whole series arrived",
        )
    x = np.asarray(orientation[:3], dtype=np.float64)
    y = np.asarray(orientation[3:], dtype=np.float64)
    nx, ny = np.linalg.norm(x), np.linalg.norm(y)
    if abs(nx - 1) > 0.01 or abs(ny - 1) > 0.01 or abs(float(x @ y)) > 0.01:
        raise reject(
            label,
            "Image Orientation (Patient) is not two unit perpendicular vectors",
            "the header is damaged; send the series as the scanner made it",
        )
    x, y = x / nx, y / ny
    normal = np.cross(x, y)
    normal /= np.linalg.norm(normal)
    along = pos @ normal
    order = np.argsort(along, kind="stable")
    along = along[order]
    steps = np.diff(along)
    if np.any(steps < SPACING_TOLERANCE_MM):
        dup = int(np.sum(steps < SPACING_TOLERANCE_MM))
        raise reject(
            label,
            f"{dup} duplicate slice position(s)",
            "the series holds several images per position (echoes, repeats or phases); "
            "export one image per position",
        )
    typical = float(np.median(steps))
    tolerance = max(SPACING_TOLERANCE_MM, SPACING_TOLERANCE_FRACTION * typical)
    if np.max(np.abs(steps - typical)) > tolerance:
        widest = int(np.argmax(steps))
        if steps[widest] > 1.5 * typical:
            raise reject(
                label,
                f"gap between slices {widest + 1} and {widest + 2} of {n} "
                f"({steps[widest]:.2f} mm apart, the others {typical:.2f} mm)",
                "check that every slice arrived and resend the series",
            )
        raise reject(
            label,
            f"uneven slice spacing ({steps.min():.3f} to {steps.max():.3f} mm)",
            "reconstruct or export the series with even spacing",
        )
    spacing_k = float((along[-1] - along[0]) / (n - 1))
    offsets = pos[order] - pos[order[0]]
    sideways = offsets - np.outer(offsets @ normal, normal)
    drift = float(np.max(np.linalg.norm(sideways, axis=1)))
    if drift > SHEAR_TOLERANCE_FRACTION * min(pixel_spacing):
        raise reject(
            label,
            f"slices drift {drift:.2f} mm sideways from the slice normal (tilted or sheared stack)",
            "reconstruct the series on a rectangular grid",
        )
    row_spacing, col_spacing = pixel_spacing
    affine = np.eye(4)
    affine[:3, 0] = x * col_spacing
    affine[:3, 1] = y * row_spacing
    affine[:3, 2] = normal * spacing_k
    affine[:3, 3] = pos[order[0]]
    return order, affine
