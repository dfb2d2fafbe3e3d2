"""The one in-memory representation of an image: array + 4x4 affine in patient LPS (DICOM/ITK).

Array axes are (i, j, k): i runs along a row (the DICOM row direction cosine, i.e. column index),
j runs down the columns (row index), k runs across slices. ``affine_lps`` maps voxel indices
(i, j, k, 1) to patient coordinates in mm, x to the patient's Left, y to Posterior, z to Superior.
NIfTI files use RAS; convert only at the edges with :func:`lps_to_ras`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

_LPS_RAS_FLIP = np.diag([-1.0, -1.0, 1.0, 1.0])


def lps_to_ras(affine: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """Return the RAS affine (NIfTI world) of an LPS affine (DICOM world)."""
    return _LPS_RAS_FLIP @ np.asarray(affine, dtype=np.float64)


def ras_to_lps(affine: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """Return the LPS affine of a RAS affine (the flip is its own inverse)."""
    return _LPS_RAS_FLIP @ np.asarray(affine, dtype=np.float64)


@dataclass(frozen=True, eq=False)
class Volume:
    """A 3-D image and where it lies in the patient.

    Parameters
    ----------
    data : ndarray, shape (I, J, K)
        Voxel values; axis order (i, j, k) as in the module docstring.
    affine_lps : ndarray, shape (4, 4)
        Voxel (i, j, k, 1) to patient LPS mm. Copied and validated on entry.
    """

    data: np.ndarray
    affine_lps: np.ndarray

    def __post_init__(self) -> None:
        affine = np.array(self.affine_lps, dtype=np.float64, copy=True)
        if affine.shape != (4, 4) or not np.all(np.isfinite(affine)):
            raise ValueError("affine_lps must be a finite 4x4 matrix")
        if not np.allclose(affine[3], [0, 0, 0, 1]):
            raise ValueError("affine_lps last row must be [0, 0, 0, 1]")
        if abs(np.linalg.det(affine[:3, :3])) < 1e-12:
            raise ValueError("affine_lps is singular")
        if self.data.ndim != 3:
            raise ValueError(f"volume data must be 3-D, got shape {self.data.shape}")
        affine.setflags(write=False)
        object.__setattr__(self, "affine_lps", affine)

    @property
    def shape(self) -> tuple[int, int, int]:
        i, j, k = self.data.shape
        return (int(i), int(j), int(k))

    @property
    def spacing(self) -> tuple[float, float, float]:
        """Voxel size along i, j, k in mm."""
        s = np.linalg.norm(self.affine_lps[:3, :3], axis=0)
        return (float(s[0]), float(s[1]), float(s[2]))

    @property
    def voxel_volume_mm3(self) -> float:
        """Volume of one voxel in mm^3 (|det| of the 3x3 part, exact for oblique grids)."""
        return float(abs(np.linalg.det(self.affine_lps[:3, :3])))

    @property
    def affine_ras(self) -> npt.NDArray[np.float64]:
        return lps_to_ras(self.affine_lps)

    def with_data(self, data: np.ndarray) -> Volume:
        """Same grid, other voxel values (shape must match)."""
        if data.shape != self.data.shape:
            raise ValueError(f"shape {data.shape} does not match grid {self.data.shape}")
        return Volume(data, self.affine_lps)
