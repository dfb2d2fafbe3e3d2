"""Case folders: an image with reference masks on its grid, as ``validate`` and training read them.

Our layout (every mask a NIfTI file on the image's grid, 0/1 values)::

    <cases>/<case-id>/image/...                   DICOM series (exactly one), or image.nii.gz
    <cases>/<case-id>/wmh_reference.nii.gz        1 = WMH, 0 = not
    <cases>/<case-id>/exclude_mask.nii.gz         optional: 1 = voxel not scored at all
    <cases>/<case-id>/ventricles_reference.nii.gz optional: 1 = lateral ventricles
    <cases>/<case-id>/intracranial_mask.nii.gz    optional: non-zero = inside the skull
    <cases>/<case-id>/case.json                   optional facts (acquisition kind, field strength)

Other layouts, where one file carries several labels, are read through a **label map**
(``flairwatch validate --label-map``): comma-separated ``ROLE=LABELS`` items, where ROLE is
``wmh``, ``exclude`` or ``ventricles``, and LABELS one label value or several joined by ``+``; an
optional ``file=NAME`` names the labelled file inside each case folder (default
``wmh_reference.nii.gz``). Examples::

    wmh=1,exclude=2                       the older multi-label convention (2 = not scored)
    file=labels.nii.gz,wmh=1+3,exclude=2,ventricles=4

Label 0 is always background, and a label the map does not name is refused (so a misread layout
cannot pass silently). Separate ``exclude_mask`` and ``ventricles_reference`` files still count
when a map is given: each role is the union of both. Volumes carry (i, j, k) arrays with an LPS
affine; NIfTI files (RAS) are converted on reading by :func:`flairwatch.intake.load.load_nifti`.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from flairwatch.errors import ConfigInvalid, InputRejected
from flairwatch.intake.assemble import group_series
from flairwatch.intake.discover import discover
from flairwatch.intake.load import load_nifti, load_series
from flairwatch.volume import Volume

IMAGE_NIFTI = "image.nii.gz"
IMAGE_FOLDER = "image"
REFERENCE_FILE = "wmh_reference.nii.gz"
EXCLUDE_FILE = "exclude_mask.nii.gz"
VENTRICLES_FILE = "ventricles_reference.nii.gz"
INTRACRANIAL_FILE = "intracranial_mask.nii.gz"
CASE_FILE = "case.json"
# Grids agree when every affine entry differs by less than this (mm, or mm per voxel): NIfTI
# headers keep the affine in float32, DICOM positions are decimal strings.
GRID_TOLERANCE_MM = 1e-2

ROLES = ("wmh", "exclude", "ventricles")
_LABEL_MAP_HELP = (
    "use e.g. --label-map wmh=1,exclude=2 (roles: wmh, exclude, ventricles; file=NAME)"
)


@dataclass(frozen=True)
class LabelMap:
    """How to read one multi-label reference file: label values per role (label 0 = background)."""

    file: str = REFERENCE_FILE
    labels: Mapping[str, frozenset[int]] = field(default_factory=lambda: {"wmh": frozenset({1})})

    def describe(self) -> str:
        """The map in the ``--label-map`` syntax."""
        items = [f"file={self.file}"] if self.file != REFERENCE_FILE else []
        for role in ROLES:
            if role in self.labels:
                items.append(f"{role}={'+'.join(str(v) for v in sorted(self.labels[role]))}")
        return ",".join(items)


OWN_LAYOUT = LabelMap()
"""Our own layout: ``wmh_reference.nii.gz`` holds 0/1 and nothing else."""


def parse_label_map(text: str) -> LabelMap:
    """Parse the ``--label-map`` syntax (module docstring); one-line :class:`ConfigInvalid`."""
    file = REFERENCE_FILE
    labels: dict[str, frozenset[int]] = {}
    seen: dict[int, str] = {}
    for item in (part.strip() for part in text.split(",")):
        key, eq, value = item.partition("=")
        key, value = key.strip().lower(), value.strip()
        if not eq or not key or not value:
            raise ConfigInvalid(f"--label-map item {item!r} is not ROLE=LABELS; {_LABEL_MAP_HELP}")
        if key == "file":
            if "/" in value or value in (".", ".."):
                raise ConfigInvalid(f"--label-map file={value}: give a file name inside each case")
            file = value
            continue
        if key not in ROLES:
            raise ConfigInvalid(f"--label-map role {key!r} is unknown; {_LABEL_MAP_HELP}")
        if key in labels:
            raise ConfigInvalid(
                f"--label-map names {key} twice; join labels with +, e.g. {key}=1+3"
            )
        if not re.fullmatch(r"\d+(\+\d+)*", value):
            raise ConfigInvalid(
                f"--label-map {key}={value}: labels are whole numbers joined by +, e.g. {key}=1+3"
            )
        values = frozenset(int(v) for v in value.split("+"))
        for v in sorted(values):
            if v == 0:
                raise ConfigInvalid(f"--label-map {key}={value}: label 0 is always background")
            if v in seen:
                raise ConfigInvalid(f"--label-map gives label {v} to both {seen[v]} and {key}")
            seen[v] = key
        labels[key] = values
    if "wmh" not in labels:
        raise ConfigInvalid(f"--label-map must say which labels are WMH; {_LABEL_MAP_HELP}")
    return LabelMap(file, labels)


@dataclass(frozen=True, eq=False)
class CaseInput:
    """One case folder read into memory; every array lies on ``image``'s grid, axes (i, j, k)."""

    case_id: str
    image: Volume
    reference: np.ndarray  # bool, WMH
    exclude: np.ndarray | None  # bool, voxels not scored, when the case has any
    ventricles: np.ndarray | None  # bool, when the case has a ventricle reference
    intracranial: np.ndarray | None  # bool, when the case has a mask
    acquisition: str | None  # acquisition kind from case.json, e.g. "2d_axial"
    field_strength_t: float | None


def find_case_folders(root: Path) -> list[Path]:
    """Sub-folders of ``root`` (hidden ones left out), sorted by name: one case each."""
    if not root.is_dir():
        raise ConfigInvalid(f"cases folder {root} does not exist; check --cases")
    return sorted(p for p in root.iterdir() if p.is_dir() and not p.name.startswith("."))


def _find_value(facts: Any, key: str) -> Any:
    """First value stored under ``key`` in a nested mapping (breadth first), else None."""
    queue = [facts]
    while queue:
        item = queue.pop(0)
        if isinstance(item, Mapping):
            if key in item and not isinstance(item[key], Mapping):
                return item[key]
            queue.extend(v for v in item.values() if isinstance(v, Mapping))
    return None


def case_facts(facts: Mapping[str, Any]) -> tuple[str | None, float | None]:
    """Acquisition kind and field strength (T) recorded in a case.json, where it says."""
    kind = _find_value(facts, "kind")
    strength = _find_value(facts, "field_strength_t")
    kind_text = str(kind) if isinstance(kind, str) and kind else None
    field_t = (
        float(strength) if isinstance(strength, int | float) and math.isfinite(strength) else None
    )
    return kind_text, field_t


def read_case_image(case_dir: Path) -> Volume:
    """The case's image: ``image.nii.gz``, or the one DICOM series under ``image/``."""
    nifti = case_dir / IMAGE_NIFTI
    if nifti.is_file():
        return load_nifti(nifti)
    folder = case_dir / IMAGE_FOLDER
    if not folder.is_dir():
        raise InputRejected(f"no {IMAGE_NIFTI} and no {IMAGE_FOLDER}/ folder; add the image")
    series, unusable = group_series(discover([folder]))
    if len(series) != 1:
        extra = f" and {len(unusable)} unusable file(s)" if unusable else ""
        raise InputRejected(
            f"{IMAGE_FOLDER}/ holds {len(series)} DICOM series{extra}; keep exactly one series there"
        )
    return load_series(series[0])


def _on_grid(mask: Volume, image: Volume, name: str) -> np.ndarray:
    if mask.shape != image.shape or not np.allclose(
        mask.affine_lps, image.affine_lps, atol=GRID_TOLERANCE_MM
    ):
        raise InputRejected(
            f"{name} (shape {mask.shape}) does not lie on the image grid (shape {image.shape}); "
            "resample it onto the image grid"
        )
    return mask.data


def _labels(path: Path, image: Volume) -> np.ndarray:
    data = _on_grid(load_nifti(path), image, path.name)
    labels = np.rint(data)
    if not np.array_equal(labels, data) or labels.min() < 0:
        raise InputRejected(f"{path.name} holds values that are not labels (whole numbers >= 0)")
    return labels.astype(np.int64)


def split_labels(labels: np.ndarray, label_map: LabelMap, name: str) -> dict[str, np.ndarray]:
    """Boolean masks per role of a label array (label 0 background); refuses unnamed labels."""
    named = set().union(*label_map.labels.values())
    present = labels[labels != 0]
    odd = present[~np.isin(present, sorted(named))]
    if odd.size:
        found = sorted({int(v) for v in np.unique(odd)})[:5]
        if label_map == OWN_LAYOUT:
            hint = (
                "wmh_reference.nii.gz holds 0/1 only; keep voxels not to score in "
                f"{EXCLUDE_FILE}, or read the older multi-label layout with --label-map "
                "wmh=1,exclude=2"
            )
        else:
            hint = f"add them to --label-map (now {label_map.describe()})"
        raise InputRejected(f"{name} has label(s) {found} that the label map does not name; {hint}")
    return {role: np.isin(labels, sorted(v)) for role, v in label_map.labels.items()}


def read_reference(
    case_dir: Path, image: Volume, label_map: LabelMap = OWN_LAYOUT
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
    """WMH, exclusion and ventricle masks (bool, on ``image``'s grid) of one case folder."""
    ref_path = case_dir / label_map.file
    if not ref_path.is_file():
        raise InputRejected(f"no {label_map.file}; add the reference mask on the image grid")
    roles = split_labels(_labels(ref_path, image), label_map, label_map.file)
    extra: dict[str, np.ndarray | None] = {"exclude": None, "ventricles": None}
    for role, name in (("exclude", EXCLUDE_FILE), ("ventricles", VENTRICLES_FILE)):
        path = case_dir / name
        mask = roles.get(role)
        if path.is_file():
            own = split_labels(_labels(path, image), LabelMap(name, {role: frozenset({1})}), name)
            mask = own[role] if mask is None else mask | own[role]
        extra[role] = mask
    return roles["wmh"], extra["exclude"], extra["ventricles"]


def read_case(case_dir: Path, label_map: LabelMap = OWN_LAYOUT) -> CaseInput:
    """Read one case folder (layout in the module docstring)."""
    if not (case_dir / label_map.file).is_file():
        raise InputRejected(f"no {label_map.file}; add the reference mask on the image grid")
    image = read_case_image(case_dir)
    wmh, exclude, ventricles = read_reference(case_dir, image, label_map)
    icv_path = case_dir / INTRACRANIAL_FILE
    intracranial = None
    if icv_path.is_file():
        intracranial = _on_grid(load_nifti(icv_path), image, icv_path.name) != 0
    kind: str | None = None
    strength: float | None = None
    facts_path = case_dir / CASE_FILE
    if facts_path.is_file():
        try:
            facts = json.loads(facts_path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise InputRejected(
                f"{CASE_FILE} is not readable JSON ({exc}); fix or remove it"
            ) from None
        if isinstance(facts, Mapping):
            kind, strength = case_facts(facts)
    return CaseInput(case_dir.name, image, wmh, exclude, ventricles, intracranial, kind, strength)
