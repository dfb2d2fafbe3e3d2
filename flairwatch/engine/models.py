"""Where flairwatch finds its models: the search path, the default model, and the list of models.

A model is a folder holding an ONNX file and its manifest ``model.yaml`` (see
``flairwatch/models/README.md``). The ``model`` setting (config key ``model:``, flag ``--model``)
is either

- a **manifest path** (anything with a folder part, or ending in ``.yaml``/``.yml``): used as is;
- a **model name** (a bare word such as ``wmh-synth``): looked up in the search path below; or
- empty: the default model, :data:`DEFAULT_MODEL`, looked up the same way.

The search path, first match wins:

1. each folder in ``$FLAIRWATCH_MODELS`` (separated like ``PATH``, by ``:`` on POSIX), in order;
2. the models shipped inside the installed package (``flairwatch/models/``).

In a folder of the search path, a model named ``NAME`` is the sub-folder ``NAME/model.yaml``, or
else any sub-folder whose manifest says ``name: NAME`` (the highest version when there are
several), so a lab can keep ``flairwatch-wmh-0.2.0/`` and ``flairwatch-wmh-0.3.0/`` side by side.
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from flairwatch.config import is_model_name
from flairwatch.engine.manifest import file_sha256, load_manifest
from flairwatch.errors import FlairwatchError, ModelInvalid

DEFAULT_MODEL = "wmh-synth"
"""The model used when the ``model`` setting is empty."""

MODELS_ENV = "FLAIRWATCH_MODELS"
MANIFEST_FILE = "model.yaml"
PACKAGE_MODELS = Path(__file__).resolve().parent.parent / "models"
"""The models shipped with flairwatch (package data, present in a wheel too)."""


def search_folders(env: Mapping[str, str] | None = None) -> list[tuple[Path, str]]:
    """The search path in order, each folder with where it came from (for messages)."""
    env = os.environ if env is None else env
    folders = [
        (Path(part).expanduser(), MODELS_ENV)
        for part in env.get(MODELS_ENV, "").split(os.pathsep)
        if part.strip()
    ]
    folders.append((PACKAGE_MODELS, "package"))
    return folders


def _version_key(version: str) -> tuple[tuple[int, Any], ...]:
    """Sort key for semantic versions: numeric parts as numbers ("0.10.0" > "0.9.1")."""
    return tuple((0, int(p)) if p.isdigit() else (1, p) for p in re.split(r"[.+-]", version))


def _read_head(manifest: Path) -> dict[str, Any] | None:
    """The manifest's mapping, or None when it cannot be read (listed as a problem elsewhere)."""
    try:
        raw = yaml.safe_load(manifest.read_text(encoding="utf-8"))
    except (OSError, yaml.YAMLError):
        return None
    return dict(raw) if isinstance(raw, Mapping) else None


def _manifests_in(folder: Path) -> list[Path]:
    try:
        subs = sorted(p for p in folder.iterdir() if p.is_dir())
    except OSError:  # a folder of the search path that does not exist is simply empty
        return []
    return [s / MANIFEST_FILE for s in subs if (s / MANIFEST_FILE).is_file()]


def _find_in(folder: Path, name: str) -> Path | None:
    direct = folder / name / MANIFEST_FILE
    if direct.is_file():
        return direct
    named = []
    for manifest in _manifests_in(folder):
        head = _read_head(manifest)
        if head is not None and head.get("name") == name:
            named.append((_version_key(str(head.get("version", ""))), manifest))
    return max(named)[1] if named else None


def manifest_path(ref: str | Path | None, env: Mapping[str, str] | None = None) -> Path:
    """The manifest file for a ``model`` setting (path, name, or None for the default).

    A path is returned as given (:func:`flairwatch.engine.manifest.load_manifest` reports a
    missing file); a name that is found nowhere raises :class:`ModelInvalid` naming the search
    path.
    """
    if ref is not None and not is_model_name(ref):
        path = Path(ref).expanduser()
        return path / MANIFEST_FILE if path.is_dir() else path
    name = DEFAULT_MODEL if ref is None or str(ref) == "" else str(ref)
    folders = search_folders(env)
    for folder, _where in folders:
        found = _find_in(folder, name)
        if found is not None:
            return found
    if ref is not None and Path(ref).is_dir() and (Path(ref) / MANIFEST_FILE).is_file():
        return Path(ref) / MANIFEST_FILE  # a model folder in the working directory
    where = ", ".join(str(f) for f, _ in folders)
    raise ModelInvalid(
        f"no model named {name!r} in {where}; run 'flairwatch models' to list the models found, "
        f"or give --model a manifest path"
    )


@dataclass(frozen=True)
class FoundModel:
    """One model of the search path, as ``flairwatch models`` lists it.

    ``sha256`` is the ONNX file's actual hash; ``problem`` says why the model would be refused
    (unreadable manifest, missing file, hash mismatch), or is empty.
    """

    name: str
    version: str
    sha256: str
    intended_use: str
    manifest: Path
    source: str
    problem: str = ""
    default: bool = False


def describe(manifest: Path, source: str) -> FoundModel:
    """Read one manifest (checking its file hash) into a :class:`FoundModel`."""
    head = _read_head(manifest) or {}
    name, version = str(head.get("name", manifest.parent.name)), str(head.get("version", "?"))
    try:
        m = load_manifest(manifest, verify_hash=False)
    except FlairwatchError as exc:
        return FoundModel(name, version, "", "", manifest, source, problem=str(exc))
    actual = file_sha256(m.file)
    problem = "" if actual == m.sha256 else "file hash differs from the manifest's sha256"
    return FoundModel(m.name, m.version, actual, m.intended_use, manifest, source, problem)


def find_models(env: Mapping[str, str] | None = None) -> list[FoundModel]:
    """Every model in the search path, in search order; the default model is marked."""
    try:
        default: Path | None = manifest_path(None, env).resolve()
    except ModelInvalid:
        default = None
    found = []
    for folder, source in search_folders(env):
        for manifest in _manifests_in(folder):
            model = describe(manifest, source)
            if default is not None and manifest.resolve() == default:
                model = FoundModel(**{**model.__dict__, "default": True})
            found.append(model)
    return found


def render(models: Sequence[FoundModel]) -> str:
    """Plain-text listing: per model, name, version, short file hash, source, intended use, folder."""
    if not models:
        return f"no models found; set {MODELS_ENV} or give --model a manifest path"
    lines = []
    for m in models:
        mark = "*" if m.default else " "
        short = m.sha256[:12] or "-"
        lines.append(f"{mark} {m.name} {m.version}  sha256 {short}  ({m.source})")
        if m.problem:
            lines.append(f"    REFUSED: {m.problem}")
        else:
            lines.append(f"    intended use: {m.intended_use}")
        lines.append(f"    location: {m.manifest.parent}")
    lines.append("* the default model (used when 'model' is not set)")
    return "\n".join(lines)
