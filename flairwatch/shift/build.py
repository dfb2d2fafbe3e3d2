"""Build shift-suite series in memory and write them as case folders (layout in ``__init__``).

:func:`build_case` is the pure middle (recipe in, arrays out); :func:`write_case` and
:func:`build_suite` are the edges. A suite folder records the suite version and a hash of this
package's source; a changed source rebuilds every case, a complete case (``case.json`` written
last) with the same recipe is kept.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import logging
import os
import shutil
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import numpy.typing as npt
from scipy import ndimage as ndi

from flairwatch.phantom.anatomy import load_template
from flairwatch.phantom.dicom_writer import uid_from, write_series
from flairwatch.shift import SUITE_VERSION
from flairwatch.shift.acquire import (
    sample_maps,
    series_affine,
    world_coordinates,
    world_to_template,
)
from flairwatch.shift.anatomy import build_head
from flairwatch.shift.artefacts import (
    bias_field,
    motion_ghosts,
    pulsation_ghosts,
    rician,
    truncate_kspace,
)
from flairwatch.shift.recipes import SUBSETS, Recipe
from flairwatch.volume import Volume, lps_to_ras

log = logging.getLogger(__name__)

F32 = npt.NDArray[np.float32]
CASE_JSON = "case.json"
IMAGE_DIR = "image"
WMH_FILE = "wmh_reference.nii.gz"
EXCLUDE_FILE = "exclude_mask.nii.gz"
VENTRICLES_FILE = "ventricles_reference.nii.gz"
ICV_FILE = "intracranial_mask.nii.gz"
SOURCE_FILE = "suite-source.sha256"
PUNCTATE_RANGE_MM3 = (10.0, 30.0)
MAX_STORED = 4095
CAUTION = (
    "Synthetic FLAIR series of the flairwatch shift suite, for research and software testing "
    "only; not a patient scan, not for diagnosis. Anatomy derived from the ICBM152 2009 template."
)
FULL = np.ones((3, 3, 3), dtype=bool)  # 26-connectivity, as the metrics count lesions


@dataclass(frozen=True, eq=False)
class BuiltCase:
    """One series and its references, all on the series grid (axes (i, j, k), LPS affine)."""

    recipe: Recipe
    image: Volume  # stored pixel values 0..4095
    wmh: npt.NDArray[np.uint8]
    exclude: npt.NDArray[np.uint8]
    ventricles: npt.NDArray[np.uint8]
    intracranial: npt.NDArray[np.uint8]
    wm_fraction: F32  # normal white matter, for checks of lesion contrast
    facts: dict[str, Any]


def source_hash() -> str:
    """SHA-256 over this package's source files: any edit makes a new suite."""
    digest = hashlib.sha256()
    for path in sorted(Path(__file__).parent.glob("*.py")):
        digest.update(path.name.encode() + b"\0" + path.read_bytes())
    return digest.hexdigest()


def _render(
    r: Recipe, s: dict[str, F32], gain: float, wm_signal: float, head: npt.NDArray[np.bool_]
) -> F32:
    """Magnitude image (signal units) with every artefact, lesions scaled by ``gain``."""
    rng = np.random.default_rng([r.seed, 3])
    a = r.acquisition
    img = (s["base"] + gain * s["lesion_signal"]).astype(np.complex64)
    if r.flow > 0:
        img = img + pulsation_ghosts(s["vessels"], r.flow, rng)
    if r.motion_fraction > 0:
        img = motion_ghosts(img, r.motion_fraction, r.motion_mm, a.inplane_mm, rng)
    if r.kspace_keep < 1.0:
        img = truncate_kspace(img, r.kspace_keep)
    mag = np.abs(img).astype(np.float32)
    stride = 4
    world = world_coordinates(a, stride)
    coarse = bias_field(world, r.bias_log_sd, head[::stride, ::stride, ::stride], rng)
    zoom = [n / c for n, c in zip(mag.shape, coarse.shape, strict=True)]
    field = ndi.zoom(coarse, zoom, order=1, mode="nearest")[
        : mag.shape[0], : mag.shape[1], : mag.shape[2]
    ]
    return rician(mag * field, r.noise * wm_signal, rng)


def _contrast_ratio(img: F32, wmh: npt.NDArray[np.bool_], wm: F32) -> float:
    """Median over reference lesion voxels / median over pure WM (>= 0.9) away from lesions."""
    away = ~ndi.binary_dilation(wmh, iterations=3)
    normal = (wm >= 0.9) & away
    return float(np.median(img[wmh]) / np.median(img[normal])) if wmh.any() else float("nan")


def _punctate_rule(
    wmh: npt.NDArray[np.bool_], lesion: F32, voxel_mm3: float
) -> tuple[npt.NDArray[np.bool_], npt.NDArray[np.bool_]]:
    """Move components outside 10-30 mm^3 from the reference to the not-scored mask."""
    labels, n = ndi.label(wmh, structure=FULL)
    sizes = np.bincount(labels.ravel(), minlength=n + 1) * voxel_mm3
    lo, hi = PUNCTATE_RANGE_MM3
    bad = np.flatnonzero((sizes < lo) | (sizes > hi))
    bad = bad[bad > 0]
    out = np.isin(labels, bad)
    # the lesion's faint partial-volume fringe goes with it
    out = ndi.binary_dilation(out, structure=FULL, iterations=2) & (lesion > 0.05)
    return wmh & ~out, out


def build_case(r: Recipe, *, preview: bool = False) -> BuiltCase:
    """Render one recipe (``preview`` keeps only the central slices: for tests)."""
    start = time.monotonic()
    if preview:
        keep = 12 if r.acquisition.kind == "2d_axial" else 40
        r = dataclasses.replace(
            r,
            acquisition=dataclasses.replace(
                r.acquisition, n_slices=min(keep, r.acquisition.n_slices)
            ),
        )
    tpl = load_template(1)
    head = build_head(r)
    maps = {
        "base": head.base,
        "lesion_signal": head.lesion_signal,
        "lesion": head.lesion,
        "ventricles": head.ventricles,
        "intracranial": head.intracranial,
        "wm": head.wm,
    }
    if r.flow > 0:
        maps["vessels"] = head.vessels
    s = sample_maps(maps, world_to_template(r, tpl), r.acquisition)
    del maps
    affine = series_affine(r.acquisition)
    voxel_mm3 = float(abs(np.linalg.det(affine[:3, :3])))
    wmh = s["lesion"] >= 0.5
    exclude = np.zeros_like(wmh)
    if r.lesion_style == "punctate":
        wmh, exclude = _punctate_rule(wmh, s["lesion"], voxel_mm3)
    icv = s["intracranial"] >= 0.5
    gain, ratio = 1.0, float("nan")
    img = _render(r, s, gain, head.wm_signal, icv)
    if r.lesion_style == "faint" and wmh.any():
        target = float(np.random.default_rng([r.seed, 4]).uniform(*r.lesion_contrast))
        g0, r0 = gain, _contrast_ratio(img, wmh, s["wm"])
        g1 = 0.8 * g0
        for _ in range(3):  # secant steps on the lesion gain: the measured ratio is ~linear in it
            img = _render(r, s, g1, head.wm_signal, icv)
            r1 = _contrast_ratio(img, wmh, s["wm"])
            if abs(r1 - target) < 0.01 or r1 == r0:
                break
            g0, r0, g1 = g1, r1, max(0.05, g1 + (target - r1) * (g1 - g0) / (r1 - r0))
        gain = g1
    ratio = _contrast_ratio(img, wmh, s["wm"])
    scale = r.signal_wm / head.wm_signal
    top = float(np.percentile(img[icv], 99.9)) if icv.any() else float(img.max())
    scale = min(scale, 3000.0 / max(top, 1e-6))
    stored = np.clip(np.rint(img * scale), 0, MAX_STORED).astype(np.float32)
    a = r.acquisition
    facts = {
        "lesion_ml": round(float(wmh.sum()) * voxel_mm3 / 1000.0, 4),
        "lesion_components": int(ndi.label(wmh, structure=FULL)[1]),
        "lesions_drawn": head.lesion_count,
        "excluded_ml": round(float(exclude.sum()) * voxel_mm3 / 1000.0, 4),
        "ventricles_ml": round(float((s["ventricles"] >= 0.5).sum()) * voxel_mm3 / 1000.0, 2),
        "intracranial_ml": round(float(icv.sum()) * voxel_mm3 / 1000.0, 1),
        "lesion_to_wm_ratio": None if np.isnan(ratio) else round(ratio, 4),
        "lesion_gain": round(gain, 4),
        "build_seconds": round(time.monotonic() - start, 1),
        "shape_ijk": list(wmh.shape),
        "affine_lps": [[round(float(v), 6) for v in row] for row in affine],
        "slice_spacing_mm": a.spacing_mm,
        "voxel_volume_mm3": round(voxel_mm3, 6),
    }
    return BuiltCase(
        recipe=r,
        image=Volume(stored, affine),
        wmh=wmh.astype(np.uint8),
        exclude=exclude.astype(np.uint8),
        ventricles=(s["ventricles"] >= 0.5).astype(np.uint8),
        intracranial=icv.astype(np.uint8),
        wm_fraction=s["wm"],
        facts=facts,
    )


def write_nifti(
    data: npt.NDArray[np.uint8], affine_lps: npt.NDArray[np.float64], path: Path
) -> None:
    """uint8 mask as NIfTI-1 with the RAS form of the series' LPS affine (sform and qform)."""
    affine = lps_to_ras(affine_lps)
    img = nib.Nifti1Image(np.asarray(data, dtype=np.uint8), affine)
    img.set_sform(affine, code=1)
    img.set_qform(affine, code=1)
    nib.save(img, str(path))


def dicom_header(r: Recipe) -> dict[str, Any]:
    """DICOM attributes of the series (invented participant and site)."""
    a = r.acquisition
    study = uid_from("flairwatch-shift", SUITE_VERSION, r.case_id, "study")
    return {
        "PatientID": f"SHIFT-{r.case_id}",
        "PatientName": f"Shift^{r.subset.title().replace('_', '')}{r.case_id[-2:]}",
        "PatientSex": "O",
        "StudyInstanceUID": study,
        "SeriesInstanceUID": uid_from(study, "flair", "series"),
        "FrameOfReferenceUID": uid_from(study, "frame"),
        "StudyDate": "20260601",
        "SeriesDate": "20260601",
        "StudyTime": "100000",
        "StudyDescription": "HEAD SHIFT SUITE",
        "SeriesDescription": "AX FLAIR" if a.kind == "2d_axial" else "SAG 3D FLAIR",
        "SeriesNumber": 5,
        "BodyPartExamined": "HEAD",
        "MRAcquisitionType": "2D" if a.kind == "2d_axial" else "3D",
        "MagneticFieldStrength": format(a.field_strength_t, ".1f"),
        "InstitutionName": "Invented Test Site",
        "ScanningSequence": "IR",
        "SequenceVariant": ["SK", "SP"],
        "ScanOptions": "IR",
        "RepetitionTime": format(a.tr_ms, ".1f"),
        "EchoTime": format(a.te_ms, ".1f"),
        "InversionTime": format(a.ti_ms, ".1f"),
        "InPlanePhaseEncodingDirection": "COL",
    }


def _write_json_last(path: Path, payload: dict[str, Any]) -> None:
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(json.dumps(payload, indent=2, sort_keys=True), encoding="utf-8")
    os.replace(tmp, path)


def case_payload(built: BuiltCase) -> dict[str, Any]:
    """What case.json holds: subset, acquisition facts, seed, suite version, recipe, truth."""
    r = built.recipe
    files = {
        "image": IMAGE_DIR,
        "wmh_reference": WMH_FILE,
        "ventricles_reference": VENTRICLES_FILE,
        "intracranial_mask": ICV_FILE,
    }
    if built.exclude.any():
        files["exclude_mask"] = EXCLUDE_FILE
    return {
        "suite_version": SUITE_VERSION,
        "caution": CAUTION,
        "case_id": r.case_id,
        "subset": r.subset,
        "subset_varies": SUBSETS[r.subset],
        "seed": r.seed,
        "acquisition": {
            **dataclasses.asdict(r.acquisition),
            **{
                k: built.facts[k]
                for k in ("shape_ijk", "affine_lps", "slice_spacing_mm", "voxel_volume_mm3")
            },
        },
        "truth": {k: v for k, v in built.facts.items() if k not in ("shape_ijk", "affine_lps")},
        "recipe": dataclasses.asdict(r),
        "files": files,
    }


def write_case(built: BuiltCase, case_dir: Path) -> None:
    """Write one case folder; ``case.json`` last (its presence marks the folder complete)."""
    if case_dir.exists():
        shutil.rmtree(case_dir)
    case_dir.mkdir(parents=True)
    write_series(
        built.image,
        case_dir / IMAGE_DIR,
        header=dicom_header(built.recipe),
        slice_thickness_mm=built.recipe.acquisition.slice_mm,
    )
    aff = built.image.affine_lps
    write_nifti(built.wmh, aff, case_dir / WMH_FILE)
    write_nifti(built.ventricles, aff, case_dir / VENTRICLES_FILE)
    write_nifti(built.intracranial, aff, case_dir / ICV_FILE)
    if built.exclude.any():
        write_nifti(built.exclude, aff, case_dir / EXCLUDE_FILE)
    _write_json_last(case_dir / CASE_JSON, case_payload(built))


def _complete(case_dir: Path, r: Recipe) -> bool:
    path = case_dir / CASE_JSON
    if not path.is_file():
        return False
    saved = json.loads(path.read_text(encoding="utf-8"))
    return bool(saved.get("recipe") == json.loads(json.dumps(dataclasses.asdict(r))))


def _build_one(job: tuple[Recipe, Path]) -> tuple[str, float, float]:
    r, case_dir = job
    built = build_case(r)
    write_case(built, case_dir)
    return r.case_id, float(built.facts["lesion_ml"]), float(built.facts["build_seconds"])


def build_suite(
    root: Path, recipes: Sequence[Recipe], *, workers: int = 1, say: Callable[[str], None] = print
) -> list[Path]:
    """Build (or find) every recipe's case folder under ``root``; returns them in recipe order.

    ``workers`` > 1 builds in that many processes (each reads the template once, ~1.5 GB).
    """
    root.mkdir(parents=True, exist_ok=True)
    stamp = root / SOURCE_FILE
    current = f"{SUITE_VERSION} {source_hash()}"
    if stamp.is_file() and stamp.read_text(encoding="utf-8").strip() != current:
        say(f"the shift suite's source changed since {root} was built: rebuilding every case")
        for child in root.iterdir():
            if child.is_dir() and (child / CASE_JSON).is_file():
                shutil.rmtree(child)
    stamp.write_text(current + "\n", encoding="utf-8")
    out = [root / r.case_id for r in recipes]
    todo = [(r, d) for r, d in zip(recipes, out, strict=True) if not _complete(d, r)]
    if not todo:
        return out
    say(f"building {len(todo)} of {len(recipes)} shift-suite series in {root}")
    if workers > 1:
        from concurrent.futures import ProcessPoolExecutor

        with ProcessPoolExecutor(max_workers=workers) as pool:
            done = pool.map(_build_one, todo)
            for n, (case_id, ml, seconds) in enumerate(done, start=1):
                say(f"[{n}/{len(todo)}] {case_id}: {ml:.2f} mL lesion, {seconds:.0f} s")
    else:
        for n, job in enumerate(todo, start=1):
            case_id, ml, seconds = _build_one(job)
            say(f"[{n}/{len(todo)}] {case_id}: {ml:.2f} mL lesion, {seconds:.0f} s")
    return out
