"""Training data for the WMH model: case folders -> cached model-grid arrays -> augmented crops.

Everything goes through flairwatch's own converter (:mod:`flairwatch.engine.convert`), so training sees
exactly what inference sees. A case folder follows DESIGN.md: ``image/`` (DICOM) or
``image.nii.gz``, ``wmh_reference.nii.gz`` on the image grid (1 WMH, 2 ignore) and optionally
``intracranial_mask.nii.gz``.

Cached arrays (one ``.npz`` per case) are on the model grid, axes (K, H, W): K slices of the
reoriented stack (inferior to superior), H along patient Posterior, W along patient Left (LPS),
1.0 x 1.0 mm pixels. ``image`` is float16 after foreground-median normalisation; ``wmh`` is uint8
0 background, 1 WMH, 2 ignore; ``icv`` is uint8 0/1, or all 255 when the case has no
intracranial mask (then that output is not trained on it).
"""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
from scipy import ndimage

from flairwatch.engine import convert
from flairwatch.engine.manifest import GridSpec, Normalisation
from flairwatch.volume import Volume, ras_to_lps

log = logging.getLogger(__name__)

REFERENCE_FILE = "wmh_reference.nii.gz"
INTRACRANIAL_FILE = "intracranial_mask.nii.gz"
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


def case_arrays(
    image: Volume,
    reference: Volume,
    intracranial: Volume | None,
    grid: GridSpec,
    norm: Normalisation,
) -> dict[str, np.ndarray]:
    """One case on the model grid: ``image`` float16, ``wmh`` uint8 0/1/2, ``icv`` uint8 (K, H, W)."""
    gmap = convert.plan(image, grid)
    img = convert.resample_to_model(convert.normalise(image.data, norm), gmap, order=1)
    ref = np.asarray(reference.data)
    lesion = _mask_to_model(reference.with_data((ref == 1).astype(np.uint8)), gmap, grid)
    ignore = _mask_to_model(reference.with_data((ref == 2).astype(np.uint8)), gmap, grid)
    wmh = lesion.astype(np.uint8)
    wmh[ignore] = 2
    if intracranial is None:
        icv = np.full(wmh.shape, NO_LABEL, dtype=np.uint8)
    else:
        icv_data = (np.asarray(intracranial.data) > 0).astype(np.uint8)
        icv = _mask_to_model(intracranial.with_data(icv_data), gmap, grid).astype(np.uint8)
    return {"image": img.astype(np.float16), "wmh": wmh, "icv": icv}


def cache_case(case_dir: Path, out: Path, grid: GridSpec, norm: Normalisation) -> None:
    """Convert one case folder and write its arrays to ``out`` (.npz, written then renamed)."""
    image = read_image(case_dir)
    reference = read_nifti(case_dir / REFERENCE_FILE)
    icv_path = case_dir / INTRACRANIAL_FILE
    intracranial = read_nifti(icv_path) if icv_path.is_file() else None
    arrays = case_arrays(image, reference, intracranial, grid, norm)
    version = case_facts(case_dir).get("generator_version")
    source = f"generator {version}" if version else f"case folder {case_dir.name}"
    save_arrays(out, arrays, seed=case_seed(case_dir), source=source)


def save_arrays(out: Path, arrays: dict[str, np.ndarray], *, seed: int | None, source: str) -> None:
    """Write cached arrays with their provenance (written beside ``out``, then renamed)."""
    tmp = out.with_name(out.name + ".part.npz")
    np.savez(
        tmp,
        image=arrays["image"],
        wmh=arrays["wmh"],
        icv=arrays["icv"],
        seed=np.int64(-1 if seed is None else seed),
        source=np.str_(source),
    )
    tmp.replace(out)


def phantom_arrays(
    seed: int, grid: GridSpec, norm: Normalisation
) -> tuple[dict[str, np.ndarray], str]:
    """Generate one phantom in memory and convert it; returns the arrays and generator version.

    Skips the DICOM round trip of a written case folder, so it is quicker for building a bank.
    """
    from flairwatch.phantom.generator import generate
    from flairwatch.phantom.params import sample_params

    case = generate(sample_params(seed))
    arrays = case_arrays(case.image, case.wmh, case.intracranial, grid, norm)
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


def load_cached(path: Path) -> CaseData:
    with np.load(path) as z:
        image, wmh, icv = z["image"], z["wmh"], z["icv"]
        source = str(z["source"]) if "source" in z.files else ""
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
    )


# ---------------------------------------------------------------------------- sampling and augment


@dataclass(frozen=True)
class Batch:
    """A training batch as numpy arrays: x (N, C, h, w) float32, targets and weights (N, h, w)."""

    x: np.ndarray
    wmh: np.ndarray
    wmh_weight: np.ndarray
    icv: np.ndarray
    icv_weight: np.ndarray


def _pick_slice(case: CaseData, rng: np.random.Generator) -> tuple[int, bool]:
    """Lesion-aware slice choice: half lesion slices, most others inside the head, some anywhere."""
    r = rng.random()
    if r < 0.5 and case.lesion_slices.size:
        return int(rng.choice(case.lesion_slices)), True
    if r < 0.85 and case.head_slices.size:
        return int(rng.choice(case.head_slices)), False
    return int(rng.integers(case.image.shape[0])), False


def _crop_origin(
    case: CaseData, k: int, on_lesion: bool, crop: int, rng: np.random.Generator
) -> tuple[int, int]:
    h, w = case.image.shape[1:]
    centre: np.ndarray | None = None
    if on_lesion and rng.random() < 0.7:
        pts = np.argwhere(case.wmh[k] == 1)
        if pts.size:
            centre = pts[rng.integers(len(pts))] + rng.integers(-crop // 3, crop // 3 + 1, size=2)
    if centre is None:
        pts = np.argwhere(case.image[k] > 0.2)  # head, scalp included: its fat is a look-alike
        centre = pts[rng.integers(len(pts))] if pts.size else np.array([h // 2, w // 2])
    y0 = int(np.clip(centre[0] - crop // 2, 0, h - crop))
    x0 = int(np.clip(centre[1] - crop // 2, 0, w - crop))
    return y0, x0


def _bias_field(shape: tuple[int, int], rng: np.random.Generator) -> np.ndarray:
    """A smooth multiplicative field, exp of a random quadratic over the crop."""
    yy, xx = np.meshgrid(
        np.linspace(-1, 1, shape[0], dtype=np.float32),
        np.linspace(-1, 1, shape[1], dtype=np.float32),
        indexing="ij",
    )
    c = rng.uniform(-0.25, 0.25, size=5).astype(np.float32)
    return np.exp(c[0] * yy + c[1] * xx + c[2] * yy * xx + c[3] * yy**2 + c[4] * xx**2)


def augment(
    x: np.ndarray, labels: list[np.ndarray], rng: np.random.Generator
) -> tuple[np.ndarray, list[np.ndarray]]:
    """Random left-right flip, in-plane blur, bias field, gamma/contrast and Rician-like noise.

    ``x`` is (C, h, w) float32 after normalisation; ``labels`` are (h, w) arrays flipped alike.
    """
    if rng.random() < 0.5:  # left-right: W runs along patient Left
        x = x[:, :, ::-1]
        labels = [lab[:, ::-1] for lab in labels]
    if rng.random() < 0.3:  # coarser in-plane acquisition than the 1 mm grid
        sigma = (0.0, float(rng.uniform(0, 1.2)), float(rng.uniform(0, 1.2)))
        x = ndimage.gaussian_filter(x, sigma=sigma, mode="nearest")
    if rng.random() < 0.5:
        x = x * _bias_field(x.shape[1:], rng)[None]
    if rng.random() < 0.5:
        x = np.maximum(x, 0) ** np.float32(rng.uniform(0.7, 1.4))
    x = x * np.float32(rng.uniform(0.9, 1.1))
    if rng.random() < 0.5:
        sd = np.float32(rng.uniform(0.01, 0.06))
        n1 = rng.standard_normal(x.shape, dtype=np.float32) * sd
        n2 = rng.standard_normal(x.shape, dtype=np.float32) * sd
        x = np.sqrt((x + n1) ** 2 + n2**2)
    return np.ascontiguousarray(x, dtype=np.float32), [np.ascontiguousarray(lab) for lab in labels]


def sample_batch(
    cases: list[CaseData],
    rng: np.random.Generator,
    *,
    batch_size: int,
    crop: int,
    channels: int,
    do_augment: bool = True,
    weights: np.ndarray | None = None,
) -> Batch:
    """Draw ``batch_size`` augmented crops (crop x crop pixels) from randomly chosen cases.

    ``weights`` (one per case, summing to 1) makes some cases likelier; uniform when None.
    """
    half = channels // 2
    xs, wmh, wmh_w, icv, icv_w = [], [], [], [], []
    for _ in range(batch_size):
        if weights is None:
            case = cases[int(rng.integers(len(cases)))]
        else:
            case = cases[int(rng.choice(len(cases), p=weights))]
        k, on_lesion = _pick_slice(case, rng)
        y0, x0 = _crop_origin(case, k, on_lesion, crop, rng)
        ks = np.clip(np.arange(k - half, k + half + 1), 0, case.image.shape[0] - 1)
        win = (slice(y0, y0 + crop), slice(x0, x0 + crop))
        x = case.image[ks][:, win[0], win[1]].astype(np.float32)
        labels = [case.wmh[k][win], case.icv[k][win]]
        if do_augment:
            x, labels = augment(x, labels, rng)
        w_lab, i_lab = labels
        xs.append(x)
        wmh.append((w_lab == 1).astype(np.float32))
        wmh_w.append((w_lab != 2).astype(np.float32))
        icv.append((i_lab == 1).astype(np.float32))
        icv_w.append((i_lab != NO_LABEL).astype(np.float32))
    return Batch(np.stack(xs), np.stack(wmh), np.stack(wmh_w), np.stack(icv), np.stack(icv_w))
