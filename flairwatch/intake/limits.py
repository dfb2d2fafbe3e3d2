"""Size caps for input files, checked on header values before anything large is allocated.

A DICOM header can declare any size (Rows and Columns up to 65535, Number of Frames in the
billions); decoding what it declares would take memory in proportion. MR images are far
smaller: matrices of 64 to 1024 per side and a few hundred slices are common practice, so the
caps below leave a wide margin for real scans and refuse only what no MR series needs.
"""

from __future__ import annotations

GIB = 1024**3
MAX_FILE_BYTES = 2 * GIB  # one DICOM file (a whole enhanced multi-frame series fits easily)
MAX_SIDE = 4096  # Rows, Columns
MAX_FRAMES = 4096  # Number of Frames in one file
MAX_SLICES = 4096  # slices in one series
MAX_VOXELS = 2**28  # one volume: 268 M voxels, 1 GiB as float32
MAX_DECODED_BYTES = 2 * GIB  # decoded pixel data of one file


def file_size_problem(size: int) -> str | None:
    """Why a file is too large to read (bytes), or None (pure)."""
    if size > MAX_FILE_BYTES:
        return (
            f"file is {size / GIB:.1f} GiB, over the {MAX_FILE_BYTES // GIB} GiB limit for one "
            "DICOM file; split the series into smaller files"
        )
    return None


def image_size_problem(rows: int, columns: int, frames: int = 1, bits: int = 16) -> str | None:
    """Why an image's declared size cannot be processed, or None (pure; no allocation).

    Parameters
    ----------
    rows, columns : int
        Rows and Columns of the header (pixels).
    frames : int
        Number of Frames (1 for a single-frame image).
    bits : int
        Bits Allocated per sample.
    """
    if rows <= 0 or columns <= 0:
        return f"image size {rows}x{columns} (zero rows or columns: the header is damaged)"
    if rows > MAX_SIDE or columns > MAX_SIDE:
        return f"image size {rows}x{columns} is over the {MAX_SIDE}x{MAX_SIDE} limit"
    if frames <= 0:
        return f"Number of Frames is {frames} (the header is damaged)"
    if frames > MAX_FRAMES:
        return f"{frames} frames in one file, over the limit of {MAX_FRAMES}"
    if bits not in (1, 8, 16, 32, 64):
        return f"Bits Allocated is {bits} (the header is damaged)"
    decoded = rows * columns * frames * max(bits, 8) // 8
    if decoded > MAX_DECODED_BYTES:
        return (
            f"{rows}x{columns}x{frames} image needs {decoded / GIB:.1f} GiB decoded, over the "
            f"{MAX_DECODED_BYTES // GIB} GiB limit"
        )
    return None


def volume_size_problem(rows: int, columns: int, slices: int) -> str | None:
    """Why a series' volume is too large to build, or None (pure)."""
    if slices > MAX_SLICES:
        return f"{slices} slices, over the limit of {MAX_SLICES} for one series"
    if rows * columns * slices > MAX_VOXELS:
        return (
            f"volume {columns}x{rows}x{slices} has {rows * columns * slices / 1e6:.0f} M voxels, "
            f"over the limit of {MAX_VOXELS / 1e6:.0f} M"
        )
    return None
