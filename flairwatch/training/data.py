"""Training data for the WMH model: case folders -> cached model-grid arrays (crops: sampling.py).

Everything goes through flairwatch's own converter (:mod:`flairwatch.engine.convert`), so training sees
exactly what inference sees. A case folder holds ``image/`` (DICOM) or ``image.nii.gz`` and, on
the image grid, ``wmh_reference.nii.gz`` (0/1 WMH), optionally ``exclude_mask.nii.gz`` (0/1:
voxels not scored), ``ventricles_reference.nii.gz`` (0/1 lateral ventricles) and
``intracranial_mask.nii.gz``. Older folders whose WMH reference marks excluded voxels with label 2
are still read.

Cached arrays (one ``.npz`` per case) are on the model grid, axes (K, H, W): K slices of the
reoriented stack (inferior to superior), H along patient Posterior, W along patient Left (LPS),
1.0 x 1.0 mm pixels. ``image`` is float16 after foreground-median normalisation; ``wmh`` is uint8
0 background, 1 WMH, 2 ignore; ``icv`` and ``vent`` are uint8 0/1, or all 255 when the case has
no such mask (then that output is not trained on it); ``tissue`` (phantoms only) holds the
phantom's tissue labels, 255 where unknown; ``slice_mm`` is the slice spacing.
"""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np

from flairwatch.engine import convert
from flairwatch.engine.manifest import GridSpec, Normalisation
from flairwatch.volume import Volume, ras_to_lps

log = logging.getLogger(__name__)

REFERENCE_FILE = "wmh_reference.nii.gz"
INTRACRANIAL_FILE = "intracranial_mask.nii.gz"
EXCLUDE_FILE = "exclude_mask.nii.gz"
VENTRICLES_FILE = "ventricles_reference.nii.gz"
CASE_FILE = "case.json"
NO_LABEL = 255  # icv value meaning "this case has no intracranial mask"


# ---------------------------------------------------------------------------- reading case folders


def read_nifti(path: Path) -> Volume:
    """A NIfTI file as a :class:`Volume` (the runtime loader when present, else nibabel)."""
    try:
        from flairwatch.intake.load import load_nifti
    except ImportError:  # the runtime loader is optional for training
        img: Any = nib.load(str(path))
        data = np.asarray(img.dataobj)
        return Volume(data.reshape(data.shape[:3]), ras_to_lps(img.affine))
    return load_nifti(path)


def _read_dicom_simpleitk(folder: Path) -> Volume:
    import SimpleITK as sitk

    reader = sitk.ImageSeriesReader()
    ids = reader.GetGDCMSeriesIDs(str(folder))
    if not ids:
        raise ValueError(f"no DICOM series in {folder}")
    reader.SetFileNames(reader.GetGDCMSeriesFileNames(str(folder), ids[0]))
    img = reader.Execute()
    data = sitk.GetArrayFromImage(img).transpose(2, 1, 0)  # ITK (k, j, i) -> (i, j, k)
    affine = np.eye(4)
    affine[:3, :3] = np.array(img.GetDirection()).reshape(3, 3) @ np.diag(img.GetSpacing())
    affine[:3, 3] = img.GetOrigin()  # ITK physical space is LPS
    return Volume(np.ascontiguousarray(data), affine)


def read_dicom_folder(folder: Path) -> Volume:
    """The one series in ``folder`` through flairwatch's own reader (SimpleITK if absent)."""
    try:
        from flairwatch.intake.assemble import group_series
        from flairwatch.intake.discover import discover
        from flairwatch.intake.load import load_series
    except ImportError:
        return _read_dicom_simpleitk(folder)
    series, _unusable = group_series(discover([folder]))
    if len(series) != 1:
        raise ValueError(f"{folder}: expected one usable series, found {len(series)}")
    return load_series(series[0])


def read_image(case_dir: Path) -> Volume:
    nifti = case_dir / "image.nii.gz"
    if nifti.is_file():
        return read_nifti(nifti)
    return read_dicom_folder(case_dir / "image")


def is_case_ready(case_dir: Path) -> bool:
    """A case folder is complete: reference mask present, and for phantoms ``case.json`` too."""
    if not (case_dir / REFERENCE_FILE).is_file():
        return False
    has_image = (case_dir / "image.nii.gz").is_file() or (case_dir / "image").is_dir()
    return has_image


def find_cases(root: Path) -> list[Path]:
    """Complete case folders directly under ``root``, sorted by name."""
    if not root.is_dir():
        return []
    return sorted(p for p in root.iterdir() if p.is_dir() and is_case_ready(p))


def case_facts(case_dir: Path) -> dict[str, Any]:
    """The case folder's ``case.json`` as a dict (empty when absent or unreadable)."""
    path = case_dir / CASE_FILE
    try:
        facts = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return facts if isinstance(facts, dict) else {}


def case_seed(case_dir: Path) -> int | None:
    """The generator seed recorded in a phantom's ``case.json`` (None for other cases)."""
    facts = case_facts(case_dir)
    for key in ("seed", "params"):
        value = facts.get(key)
        if isinstance(value, int):
            return value
        if isinstance(value, dict) and isinstance(value.get("seed"), int):
            return int(value["seed"])
    return None


# ------------------------------------------------------------------------ conversion to model grid


def _mask_to_model(mask: Volume, gmap: convert.GridMap, grid: GridSpec) -> np.ndarray:
    """Binary mask on its own grid -> model grid (K, H, W) bool (linear, then >= 0.5)."""
    mmap = convert.plan(mask, grid)
    if mmap.reoriented_shape != gmap.reoriented_shape:
        raise ValueError(
            f"mask grid {mmap.reoriented_shape} does not match image grid {gmap.reoriented_shape}"
        )
    out = convert.resample_to_model(mask.data.astype(np.float32), mmap, order=1)
    return np.asarray(out >= 0.5)


def _optional_mask(
    mask: Volume | None, gmap: convert.GridMap, grid: GridSpec, shape: tuple[int, ...]
) -> np.ndarray:
    """A 0/1 mask on the model grid as uint8, or all :data:`NO_LABEL` when there is none."""
    if mask is None:
        return np.full(shape, NO_LABEL, dtype=np.uint8)
    data = (np.asarray(mask.data) > 0).astype(np.uint8)
    return _mask_to_model(mask.with_data(data), gmap, grid).astype(np.uint8)


def case_arrays(
    image: Volume,
    reference: Volume,
    intracranial: Volume | None,
    grid: GridSpec,
    norm: Normalisation,
    *,
    exclude: Volume | None = None,
    ventricles: Volume | None = None,
    tissue: Volume | None = None,
) -> dict[str, np.ndarray]:
    """One case on the model grid, arrays (K, H, W) as described in the module docstring.

    ``reference`` is 0/1 WMH; a label 2 in it (older folders) counts as excluded, as do the
    voxels of ``exclude``. ``tissue`` labels are resampled by nearest neighbour.
    """
    gmap = convert.plan(image, grid)
    img = convert.resample_to_model(convert.normalise(image.data, norm), gmap, order=1)
    ref = np.asarray(reference.data)
    lesion = _mask_to_model(reference.with_data((ref == 1).astype(np.uint8)), gmap, grid)
    excluded = ref == 2
    if exclude is not None:
        excluded = excluded | (np.asarray(exclude.data) > 0)
    ignore = _mask_to_model(reference.with_data(excluded.astype(np.uint8)), gmap, grid)
    wmh = lesion.astype(np.uint8)
    wmh[ignore] = 2
    out: dict[str, np.ndarray] = {
        "image": img.astype(np.float16),
        "wmh": wmh,
        "icv": _optional_mask(intracranial, gmap, grid, wmh.shape),
        "vent": _optional_mask(ventricles, gmap, grid, wmh.shape),
        "slice_mm": np.asarray(gmap.reoriented_spacing_mm[2], dtype=np.float32),
    }
    if tissue is not None:
        labels = convert.resample_to_model(np.asarray(tissue.data, np.float32), gmap, order=0)
        out["tissue"] = np.rint(labels).astype(np.uint8)
    return out


def _read_optional(path: Path) -> Volume | None:
    return read_nifti(path) if path.is_file() else None


def cache_case(case_dir: Path, out: Path, grid: GridSpec, norm: Normalisation) -> None:
    """Convert one case folder and write its arrays to ``out`` (.npz, written then renamed)."""
    image = read_image(case_dir)
    reference = read_nifti(case_dir / REFERENCE_FILE)
    arrays = case_arrays(
        image,
        reference,
        _read_optional(case_dir / INTRACRANIAL_FILE),
        grid,
        norm,
        exclude=_read_optional(case_dir / EXCLUDE_FILE),
        ventricles=_read_optional(case_dir / VENTRICLES_FILE),
    )
    version = case_facts(case_dir).get("generator_version")
    source = f"generator {version}" if version else f"case folder {case_dir.name}"
    save_arrays(out, arrays, seed=case_seed(case_dir), source=source)


def save_arrays(out: Path, arrays: dict[str, np.ndarray], *, seed: int | None, source: str) -> None:
    """Write cached arrays with their provenance (written beside ``out``, then renamed)."""
    tmp = out.with_name(out.name + ".part.npz")
    payload: dict[str, Any] = {
        **arrays,
        "seed": np.int64(-1 if seed is None else seed),
        "source": np.str_(source),
    }
    np.savez(tmp, **payload)
    tmp.replace(out)


def phantom_arrays(
    seed: int, grid: GridSpec, norm: Normalisation
) -> tuple[dict[str, np.ndarray], str]:
    """Generate one phantom in memory and convert it; returns the arrays and generator version.

    Skips the DICOM round trip of a written case folder, so it is quicker for building a bank.
    """
    from flairwatch.phantom.generator import generate
    from flairwatch.phantom.params import sample_params

    case = generate(sample_params(seed), with_tissue=True)
    arrays = case_arrays(
        case.image,
        case.wmh,
        case.intracranial,
        grid,
        norm,
        ventricles=case.ventricles,
        tissue=case.tissue,
    )
    return arrays, str(case.params.generator_version)


# ----------------------------------------------------------------------------- in-memory data set


@dataclass
class CaseData:
    """One cached case in memory, with the slice indices the sampler draws from."""

    name: str
    image: np.ndarray  # (K, H, W) float16
    wmh: np.ndarray  # (K, H, W) uint8 0/1/2
    icv: np.ndarray  # (K, H, W) uint8 0/1, or 255 = unknown
    lesion_slices: np.ndarray  # indices of slices with WMH
    head_slices: np.ndarray  # indices of slices with any head signal
    source: str = ""  # provenance, e.g. "generator fw-phantom-1.1"
    vent: np.ndarray | None = None  # (K, H, W) uint8 0/1, None = unknown
    tissue: np.ndarray | None = None  # (K, H, W) uint8 phantom tissue labels, None = unknown
    slice_mm: float = 0.0  # slice spacing, 0 = unknown


def load_cached(path: Path) -> CaseData:
    """A cached case (arrays written by :func:`save_arrays`; older files lack vent/tissue)."""
    with np.load(path) as z:
        image, wmh, icv = z["image"], z["wmh"], z["icv"]
        source = str(z["source"]) if "source" in z.files else ""
        vent = z["vent"] if "vent" in z.files else None
        tissue = z["tissue"] if "tissue" in z.files else None
        slice_mm = float(z["slice_mm"]) if "slice_mm" in z.files else 0.0
    if vent is not None and vent.size and vent.flat[0] == NO_LABEL and (vent == NO_LABEL).all():
        vent = None
    per_slice_lesion = (wmh == 1).reshape(wmh.shape[0], -1).sum(axis=1)
    per_slice_head = (image > 0.2).reshape(image.shape[0], -1).sum(axis=1)
    return CaseData(
        name=path.stem,
        image=image,
        wmh=wmh,
        icv=icv,
        lesion_slices=np.flatnonzero(per_slice_lesion > 0),
        head_slices=np.flatnonzero(per_slice_head > 100),
        source=source,
        vent=vent,
        tissue=tissue,
        slice_mm=slice_mm,
    )
