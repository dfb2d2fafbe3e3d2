"""The model manifest: a YAML file next to the ``.onnx`` that says what the model expects and gives.

Any lab can drop in its own model that fits this contract. The runner refuses a model whose file
hash or tensor shapes disagree with its manifest.
"""

from __future__ import annotations

import hashlib
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from flairwatch.errors import ModelInvalid

_SEMVER = re.compile(r"^\d+\.\d+\.\d+([-+][0-9A-Za-z.-]+)?$")
_SAFE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")
NORMALISATIONS = ("foreground_median",)


@dataclass(frozen=True)
class GridSpec:
    """The model grid: axial slices (the series' stack reoriented so slices are closest to axial).

    In-plane spacing and shape are along (i, j) of the reoriented volume, i towards patient Left,
    j towards Posterior (LPS). ``through_plane`` is "keep": the series' own slice positions are kept,
    so the way back along the slice axis is exact.
    """

    spacing_mm: tuple[float, float]
    shape: tuple[int, int]
    through_plane: str = "keep"


@dataclass(frozen=True)
class Normalisation:
    """Intensity normalisation: divide by the median of the head foreground.

    Foreground = voxels above ``foreground_fraction`` x the ``reference_percentile`` percentile of
    the whole volume. After it, normal brain tissue is near 1 and background near 0.
    """

    method: str = "foreground_median"
    reference_percentile: float = 99.5
    foreground_fraction: float = 0.1


@dataclass(frozen=True)
class ModelManifest:
    name: str
    version: str
    file: Path  # absolute path of the ONNX file
    sha256: str
    input_name: str
    input_layout: str  # "NCHW": N slices, C adjacent slices, H along j, W along i
    channels: int  # adjacent slices fed per output slice (odd)
    grid: GridSpec
    normalisation: Normalisation
    output_name: str
    output_channels: tuple[str, ...]  # meaning of each output channel, e.g. ("wmh", "intracranial")
    threshold: float
    intended_use: str
    batch_size: int = 8
    description: str = ""
    training_data: str = ""
    metrics: Mapping[str, Any] | None = None
    path: Path | None = None  # the manifest file itself

    @property
    def label(self) -> str:
        """``<name>-<version>``: the result version folder's name."""
        return f"{self.name}-{self.version}"


def _require(raw: Mapping[str, Any], key: str, where: Path) -> Any:
    if key not in raw or raw[key] in (None, ""):
        raise ModelInvalid(f"model manifest {where} lacks '{key}'; add it (see models/README.md)")
    return raw[key]


def manifest_from_mapping(raw: Mapping[str, Any], *, where: Path) -> ModelManifest:
    """Validate a parsed manifest; ``where`` is the manifest path (files are relative to it)."""
    name = str(_require(raw, "name", where))
    if not _SAFE_NAME.match(name):
        raise ModelInvalid(f"model manifest {where}: name {name!r} must be letters, digits, . _ -")
    version = str(_require(raw, "version", where))
    if not _SEMVER.match(version):
        raise ModelInvalid(f"model manifest {where}: version {version!r} is not semantic (1.2.3)")
    use = str(_require(raw, "intended_use", where))
    if "research" not in use.lower():
        raise ModelInvalid(f"model manifest {where}: intended_use must say 'research only'")
    inp = _require(raw, "input", where)
    out = _require(raw, "output", where)
    grid = _require(raw, "grid", where)
    norm = raw.get("normalisation") or {}
    try:
        channels = int(inp["channels"])
        gspec = GridSpec(
            spacing_mm=(float(grid["spacing_mm"][0]), float(grid["spacing_mm"][1])),
            shape=(int(grid["shape"][0]), int(grid["shape"][1])),
            through_plane=str(grid.get("through_plane", "keep")),
        )
        normalisation = Normalisation(
            method=str(norm.get("method", "foreground_median")),
            reference_percentile=float(norm.get("reference_percentile", 99.5)),
            foreground_fraction=float(norm.get("foreground_fraction", 0.1)),
        )
        out_channels = tuple(str(c) for c in out["channels"])
        manifest = ModelManifest(
            name=name,
            version=version,
            file=(where.parent / str(_require(raw, "file", where))).resolve(),
            sha256=str(_require(raw, "sha256", where)).lower(),
            input_name=str(inp["name"]),
            input_layout=str(inp.get("layout", "NCHW")),
            channels=channels,
            grid=gspec,
            normalisation=normalisation,
            output_name=str(out["name"]),
            output_channels=out_channels,
            threshold=float(_require(raw, "threshold", where)),
            intended_use=use,
            batch_size=int(inp.get("batch_size", 8)),
            description=str(raw.get("description", "")),
            training_data=str(raw.get("training_data", "")),
            metrics=raw.get("metrics"),
            path=where,
        )
    except (KeyError, TypeError, ValueError, IndexError) as exc:
        raise ModelInvalid(
            f"model manifest {where} is malformed ({exc!r}); see models/README.md"
        ) from None
    if manifest.input_layout != "NCHW":
        raise ModelInvalid(f"model manifest {where}: only input layout NCHW is supported")
    if channels < 1 or channels % 2 == 0:
        raise ModelInvalid(f"model manifest {where}: input channels must be odd (1, 3, 5...)")
    if gspec.through_plane != "keep":
        raise ModelInvalid(f"model manifest {where}: grid.through_plane must be 'keep'")
    if min(gspec.spacing_mm) <= 0 or min(gspec.shape) < 16:
        raise ModelInvalid(f"model manifest {where}: grid spacing must be > 0 and shape >= 16")
    if normalisation.method not in NORMALISATIONS:
        raise ModelInvalid(
            f"model manifest {where}: normalisation {normalisation.method!r} unknown; "
            f"use one of {', '.join(NORMALISATIONS)}"
        )
    if "wmh" not in out_channels:
        raise ModelInvalid(f"model manifest {where}: output channels must include 'wmh'")
    if not 0.0 < manifest.threshold < 1.0:
        raise ModelInvalid(f"model manifest {where}: threshold must be between 0 and 1")
    return manifest


def file_sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def load_manifest(path: Path, *, verify_hash: bool = True) -> ModelManifest:
    """Read and validate a manifest; check the ONNX file exists and matches its ``sha256``."""
    path = Path(path)
    try:
        raw = yaml.safe_load(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ModelInvalid(
            f"cannot read model manifest {path}: {exc.strerror}; pass --model with a manifest path"
        ) from None
    except yaml.YAMLError as exc:
        raise ModelInvalid(f"model manifest {path} is not valid YAML: {exc}") from None
    if not isinstance(raw, Mapping):
        raise ModelInvalid(f"model manifest {path} must be a YAML mapping")
    manifest = manifest_from_mapping(raw, where=path.resolve())
    if not manifest.file.is_file():
        raise ModelInvalid(f"model file {manifest.file} named by {path} is missing")
    if verify_hash:
        actual = file_sha256(manifest.file)
        if actual != manifest.sha256:
            raise ModelInvalid(
                f"model file {manifest.file.name} has sha256 {actual[:12]}..., manifest says "
                f"{manifest.sha256[:12]}...; the file is corrupt or the manifest is stale"
            )
    return manifest
