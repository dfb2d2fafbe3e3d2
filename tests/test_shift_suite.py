"""The shift suite: every subset builds, reads back with an outside reader, holds what it says.

Oracles: SimpleITK's ImageSeriesReader (GDCM) for the DICOM geometry, nibabel for the NIfTI
references, scipy.ndimage.label for lesion sizes, numpy medians for lesion contrast, and the
training generator's own draw (``flairwatch.phantom.params.sample_params``) for the trained
ranges each subset must leave. Series are built in preview (central slices only) to keep the
test short on 2 cores.
"""

from __future__ import annotations

import ast
import dataclasses
import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
import SimpleITK as sitk
from scipy import ndimage

from flairwatch.shift import SUITE_VERSION
from flairwatch.shift.build import (
    CASE_JSON,
    EXCLUDE_FILE,
    ICV_FILE,
    IMAGE_DIR,
    VENTRICLES_FILE,
    WMH_FILE,
    BuiltCase,
    build_case,
    write_case,
)
from flairwatch.shift.recipes import SERIES_PER_SUBSET, SUBSETS, recipe, suite_recipes

REPO = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> dict[str, tuple[BuiltCase, Path]]:
    """Series 0 of every subset (series 1 for punctate: 3D sagittal), preview size, on disk."""
    root = tmp_path_factory.mktemp("shift")
    out = {}
    for subset in SUBSETS:
        case = build_case(recipe(subset, 1 if subset == "punctate" else 0), preview=True)
        write_case(case, root / case.recipe.case_id)
        out[subset] = (case, root / case.recipe.case_id)
    return out


def _read_series(folder: Path) -> sitk.Image:
    reader = sitk.ImageSeriesReader()
    reader.SetFileNames(reader.GetGDCMSeriesFileNames(str(folder)))
    return reader.Execute()


def _ras_affine_of(image: sitk.Image) -> np.ndarray:
    """RAS affine from SimpleITK's LPS origin, spacing and direction (ITK conventions)."""
    lps = np.eye(4)
    lps[:3, :3] = np.asarray(image.GetDirection()).reshape(3, 3) * np.asarray(image.GetSpacing())
    lps[:3, 3] = image.GetOrigin()
    return np.diag([-1.0, -1.0, 1.0, 1.0]) @ lps


def test_every_subset_builds_and_reads_back_with_the_stated_geometry(
    built: dict[str, tuple[BuiltCase, Path]],
) -> None:
    assert set(built) == set(SUBSETS)
    for subset, (case, folder) in built.items():
        facts = json.loads((folder / CASE_JSON).read_text(encoding="utf-8"))
        assert facts["subset"] == subset and facts["suite_version"] == SUITE_VERSION
        assert facts["seed"] == case.recipe.seed
        acq = facts["acquisition"]
        image = _read_series(folder / IMAGE_DIR)  # outside oracle: SimpleITK / GDCM
        assert list(image.GetSize()) == acq["shape_ijk"], subset
        step = acq["slice_mm"] + acq["gap_mm"]
        assert np.allclose(
            image.GetSpacing(), [acq["inplane_mm"], acq["inplane_mm"], step], atol=1e-3
        )
        stated = np.asarray(acq["affine_lps"])
        assert np.allclose(image.GetOrigin(), stated[:3, 3], atol=1e-3), subset
        direction = np.asarray(image.GetDirection()).reshape(3, 3)
        assert np.allclose(
            direction, stated[:3, :3] / np.linalg.norm(stated[:3, :3], axis=0), atol=1e-4
        )
        # tilt: the slice normal's angle to the scanner axis it nominally follows
        normal = direction[:, 2]
        nominal = 2 if acq["kind"] == "2d_axial" else 0
        angle = np.degrees(np.arccos(abs(normal[nominal])))
        assert angle == pytest.approx(abs(acq["tilt_deg"]), abs=0.05), subset
        for name in (WMH_FILE, VENTRICLES_FILE, ICV_FILE):
            ref = nib.nifti1.load(folder / name)
            assert ref.shape == tuple(acq["shape_ijk"]), (subset, name)
            assert np.allclose(ref.affine, _ras_affine_of(image), atol=1e-3), (subset, name)
            values = np.unique(np.asarray(ref.dataobj))
            assert set(values.tolist()) <= {0, 1}, (subset, name)
        assert np.asarray(nib.nifti1.load(folder / ICV_FILE).dataobj).any()
        assert np.asarray(nib.nifti1.load(folder / VENTRICLES_FILE).dataobj).any(), subset


def test_faint_lesions_are_1_1_to_1_3_times_the_white_matter_median(
    built: dict[str, tuple[BuiltCase, Path]],
) -> None:
    case, folder = built["faint"]
    pixels = sitk.GetArrayFromImage(_read_series(folder / IMAGE_DIR)).transpose(2, 1, 0)
    ref = np.asarray(nib.nifti1.load(folder / WMH_FILE).dataobj).astype(bool)
    assert ref.sum() > 20
    normal_wm = (case.wm_fraction >= 0.9) & ~ndimage.binary_dilation(ref, iterations=3)
    ratio = np.median(pixels[ref]) / np.median(pixels[normal_wm])
    assert 1.1 <= ratio <= 1.3  # issue 9's definition of faint


def test_punctate_lesions_are_10_to_30_mm3(built: dict[str, tuple[BuiltCase, Path]]) -> None:
    _, folder = built["punctate"]
    ref_img = nib.nifti1.load(folder / WMH_FILE)
    ref = np.asarray(ref_img.dataobj).astype(bool)
    voxel_mm3 = abs(np.linalg.det(ref_img.affine[:3, :3]))
    labels, n = ndimage.label(ref, structure=np.ones((3, 3, 3)))  # 26-connected lesions
    assert n >= 3
    sizes = np.bincount(labels.ravel())[1:] * voxel_mm3
    assert sizes.min() >= 10.0 and sizes.max() <= 30.0
    if (folder / EXCLUDE_FILE).is_file():  # excluded voxels never overlap the reference
        assert not (
            np.asarray(nib.nifti1.load(folder / EXCLUDE_FILE).dataobj).astype(bool) & ref
        ).any()


def test_lesion_free_elderly_have_empty_references(
    built: dict[str, tuple[BuiltCase, Path]],
) -> None:
    case, folder = built["elderly_free"]
    assert not np.asarray(nib.nifti1.load(folder / WMH_FILE).dataobj).any()
    assert case.recipe.ventricle_grow_mm >= 3.0
    for i in range(SERIES_PER_SUBSET):
        assert recipe("elderly_free", i).lesion_ml == 0.0


def test_recipes_are_deterministic_and_seeds_distinct() -> None:
    first, again = suite_recipes(), suite_recipes()
    assert first == again
    assert len({r.seed for r in first}) == len(first) == SERIES_PER_SUBSET * len(SUBSETS)
    kinds = {(r.subset, r.acquisition.kind) for r in first}
    assert kinds == {(s, k) for s in SUBSETS for k in ("2d_axial", "3d_sagittal")}
    fields = {(r.subset, r.acquisition.field_strength_t) for r in first}
    assert {f for s, f in fields if s == "timing"} == {1.5, 3.0}


def test_each_subset_leaves_the_training_generators_range() -> None:
    from flairwatch.phantom.params import sample_params

    train = [sample_params(s) for s in range(400)]  # the training generator's own draws

    def span(values: list[float]) -> tuple[float, float]:
        return min(values), max(values)

    def outside(value: float, lo_hi: tuple[float, float]) -> bool:
        return value < lo_hi[0] or value > lo_hi[1]

    for kind in ("2d_axial", "3d_sagittal"):
        acqs = [p.acquisition for p in train if p.acquisition.kind == kind]
        tr, te = span([a.tr_ms for a in acqs]), span([a.te_ms for a in acqs])
        tilt = span([a.tilt_deg for a in acqs])
        px = span([a.inplane_mm for a in acqs])
        thick = span([a.slice_mm for a in acqs])
        for i in range(SERIES_PER_SUBSET):
            rs = {s: recipe(s, i) for s in ("timing", "tilt", "resolution", "thickness")}
            if rs["timing"].acquisition.kind != kind:
                continue
            assert outside(rs["timing"].acquisition.tr_ms, tr)
            assert outside(rs["timing"].acquisition.te_ms, te)
            assert outside(rs["tilt"].acquisition.tilt_deg, tilt)
            assert (
                outside(rs["resolution"].acquisition.inplane_mm, px)
                or rs["resolution"].acquisition.inplane_mm <= 0.45
            )
            t = rs["thickness"].acquisition
            assert outside(t.slice_mm, thick) or t.gap_mm > 1.0
    bias = max(p.bias_strength for p in train)
    noise = max(p.noise_level for p in train)
    scale = span([p.head_scale for p in train])
    ghost = max(p.ghosting for p in train)
    for i in range(SERIES_PER_SUBSET):
        assert recipe("bias", i).bias_log_sd > bias
        assert recipe("noise", i).noise > noise
        assert outside(recipe("head_size", i).head_scale, scale)
        assert recipe("motion", i).motion_fraction > ghost
        assert recipe("csf", i).ti_error < -0.09  # the trained TI error reaches -9 %
        assert recipe("atrophy", i).ventricle_grow_mm > 4.5  # trained growth <= 4.5 mm
        assert (
            1.1
            <= recipe("faint", i).lesion_contrast[0]
            <= recipe("faint", i).lesion_contrast[1]
            <= 1.3
        )


# ---------------------------------------------------------------- training never imports the suite


def _module_file(name: str, root: Path) -> Path | None:
    base = root.joinpath(*name.split("."))
    for candidate in (base.with_suffix(".py"), base / "__init__.py"):
        if candidate.is_file():
            return candidate
    return None


def _names_import_call(node: ast.Call) -> bool:
    func = getattr(node.func, "attr", getattr(node.func, "id", ""))
    first = node.args[0] if node.args else None
    return func in ("import_module", "__import__") and (
        isinstance(first, ast.Constant) and isinstance(first.value, str)
    )


def flairwatch_imports(path: Path, package: str) -> set[str]:
    """Every flairwatch module a source file imports, anywhere in it (functions included)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    here = package.split(".")
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = ".".join(here[: len(here) - node.level + 1])
                mod = f"{base}.{node.module}" if node.module else base
            else:
                mod = node.module or ""
            names.add(mod)
            names |= {f"{mod}.{a.name}" for a in node.names}
        elif isinstance(node, ast.Call) and _names_import_call(node):
            # importlib.import_module("flairwatch.x") and __import__("flairwatch.x")
            names.add(str(node.args[0].value))  # type: ignore[attr-defined]
    return {n for n in names if n == "flairwatch" or n.startswith("flairwatch.")}


def reachable_modules(start: list[str], root: Path) -> set[str]:
    """Transitive closure of flairwatch imports from ``start`` (module names), parents included."""
    seen: set[str] = set()
    todo = list(start)
    while todo:
        name = todo.pop()
        if name in seen:
            continue
        seen.add(name)
        parts = name.split(".")
        todo += [".".join(parts[:n]) for n in range(1, len(parts))]  # importing a.b runs a
        path = _module_file(name, root)
        if path is None:
            continue
        package = name if path.name == "__init__.py" else ".".join(parts[:-1])
        todo += sorted(flairwatch_imports(path, package) - seen)
    return seen


def _training_modules(root: Path) -> list[str]:
    return sorted(
        ".".join(p.relative_to(root).with_suffix("").parts).removesuffix(".__init__")
        for p in (root / "flairwatch" / "training").rglob("*.py")
    )


def test_training_code_never_imports_the_shift_suite() -> None:
    start = _training_modules(REPO)
    assert len(start) >= 3
    reached = reachable_modules(start, REPO)
    assert "flairwatch.engine.convert" in reached  # the walk does follow imports
    assert not [m for m in reached if m == "flairwatch.shift" or m.startswith("flairwatch.shift.")]


def test_the_import_walk_finds_an_indirect_import(tmp_path: Path) -> None:
    pkg = tmp_path / "flairwatch"
    (pkg / "training").mkdir(parents=True)
    (pkg / "shift").mkdir()
    (pkg / "__init__.py").write_text("", encoding="utf-8")
    (pkg / "helper.py").write_text("def f():\n    from .shift import recipes\n", encoding="utf-8")
    (pkg / "shift" / "__init__.py").write_text("", encoding="utf-8")
    (pkg / "shift" / "recipes.py").write_text("", encoding="utf-8")
    (pkg / "training" / "__init__.py").write_text("", encoding="utf-8")
    (pkg / "training" / "loop.py").write_text("from flairwatch import helper\n", encoding="utf-8")
    reached = reachable_modules(_training_modules(tmp_path), tmp_path)
    assert "flairwatch.shift.recipes" in reached


def test_recipe_round_trips_through_case_json(built: dict[str, tuple[BuiltCase, Path]]) -> None:
    case, folder = built["timing"]
    facts = json.loads((folder / CASE_JSON).read_text(encoding="utf-8"))
    assert facts["recipe"] == json.loads(json.dumps(dataclasses.asdict(case.recipe)))
