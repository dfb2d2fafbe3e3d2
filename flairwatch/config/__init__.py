"""Settings: loaded once from YAML into a frozen dataclass, validated, overridden by flags.

Every key is documented in ``config.example.yaml``. Errors name the key and say what to do.
The core keys live here; the research tools' sections are in :mod:`flairwatch.config.sections`,
DICOM network transfer's in :mod:`flairwatch.config.network`, shared value checks in
:mod:`flairwatch.config.checks`.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any

import yaml

from flairwatch.config.checks import flag, number
from flairwatch.config.network import (
    SEND_OBJECTS,
    ReceiveSettings,
    SendNode,
    SendSettings,
    receive_section,
    send_section,
)
from flairwatch.config.sections import (
    REVIEW_KEYS,
    CanarySettings,
    LongitudinalSettings,
    OutputSettings,
    ReviewSettings,
    canary_section,
    longitudinal_section,
    outputs_section,
    review_section,
)
from flairwatch.errors import ConfigInvalid
from flairwatch.intake.select import SelectRules, rules_from_mapping

__all__ = [
    "REVIEW_KEYS",
    "SEND_OBJECTS",
    "CanarySettings",
    "Config",
    "Identifiers",
    "LongitudinalSettings",
    "OutputSettings",
    "ReceiveSettings",
    "ReviewSettings",
    "SendNode",
    "SendSettings",
    "config_from_mapping",
    "cpus_available",
    "is_model_name",
    "load_config",
    "model_reference",
    "with_overrides",
]

IDENTIFIER_FIELDS = ("patient_id", "patient_name", "dates")
IDENTIFIER_ACTIONS = ("keep", "pseudonymise", "drop")

DEFAULT_SETTLE_SECONDS = 30.0
DEFAULT_RESCAN_SECONDS = 300.0
DEFAULT_MIN_LESION_MM3 = 10.0
DEFAULT_CONNECTIVITY = 26
# lesion voxels this near the ventricles count as periventricular (common practice: 10 mm)
DEFAULT_PERIVENTRICULAR_MM = 10.0
DEFAULT_RETRY_SECONDS = 30.0
DEFAULT_OVERDUE_SECONDS = 600.0
DEFAULT_OVERDUE_FACTOR = 5.0
DEFAULT_WORKER_MEMORY_MB = 4096


def is_model_name(ref: str | Path) -> bool:
    """True for a bare model name (no folder part, no ``.yaml``/``.yml`` suffix), else a path.

    Names are looked up in the model search path (:mod:`flairwatch.engine.models`).
    """
    text = str(ref)
    return (
        text not in ("", ".", "..")
        and "/" not in text
        and os.sep not in text
        and not text.lower().endswith((".yaml", ".yml"))
    )


def model_reference(text: str, base_dir: Path | None) -> Path:
    """The ``model`` setting as a path: a name stays a bare name, a relative manifest path is
    taken relative to ``base_dir`` (the config file's folder)."""
    p = Path(text).expanduser()
    if is_model_name(text) or base_dir is None or p.is_absolute():
        return p
    return base_dir / p


def cpus_available() -> int:
    """CPUs this process may use: affinity mask, further limited by a cgroup v2 CPU quota."""
    n = len(os.sched_getaffinity(0))
    try:
        quota, period = Path("/sys/fs/cgroup/cpu.max").read_text(encoding="utf-8").split()[:2]
        if quota != "max":
            n = min(n, max(1, int(float(quota) / float(period))))
    except (OSError, ValueError):
        pass
    return max(1, n)


@dataclass(frozen=True)
class Identifiers:
    """What summaries and exports do with each identifier: keep, pseudonymise or drop."""

    patient_id: str = "pseudonymise"
    patient_name: str = "drop"
    dates: str = "keep"


@dataclass(frozen=True)
class Config:
    inbox: Path | None = None
    results: Path | None = None
    state: Path | None = None
    quarantine: Path | None = None
    settle_seconds: float = DEFAULT_SETTLE_SECONDS
    rescan_seconds: float = DEFAULT_RESCAN_SECONDS
    polling: bool = False
    workers: int = 1
    threads: int = 0  # 0 = the CPUs this process may use, divided among workers
    model: Path | None = None  # manifest path or model name; None = the default model
    threshold: float | None = None  # None = the manifest's
    min_lesion_mm3: float = DEFAULT_MIN_LESION_MM3
    connectivity: int = DEFAULT_CONNECTIVITY
    periventricular_mm: float = DEFAULT_PERIVENTRICULAR_MM
    select: SelectRules = field(default_factory=lambda: rules_from_mapping(None))
    identifiers: Identifiers = field(default_factory=Identifiers)
    outputs: OutputSettings = field(default_factory=OutputSettings)
    delete_inbox_files: bool = False
    keep_versions: int = 0  # 0 = keep every model version's results
    retry_seconds: float = DEFAULT_RETRY_SECONDS  # first retry after a failure; then doubled
    overdue_seconds: float = DEFAULT_OVERDUE_SECONDS  # status: a job running longer than
    overdue_factor: float = DEFAULT_OVERDUE_FACTOR  # max(these s, factor x median) is a problem
    worker_memory_mb: int = DEFAULT_WORKER_MEMORY_MB  # address-space cap per worker; 0 = none
    canary: CanarySettings = field(default_factory=CanarySettings)
    longitudinal: LongitudinalSettings = field(default_factory=LongitudinalSettings)
    review: ReviewSettings = field(default_factory=ReviewSettings)
    send: SendSettings | None = None  # None: results go nowhere
    receive: ReceiveSettings | None = None  # None: no Store SCP

    def threads_per_worker(self) -> int:
        if self.threads > 0:
            return self.threads
        return max(1, cpus_available() // max(1, self.workers))


_PATH_KEYS = ("inbox", "results", "state", "quarantine")


def _identifiers(raw: Any) -> Identifiers:
    if raw is None:
        return Identifiers()
    if not isinstance(raw, Mapping):
        raise ConfigInvalid("config key 'identifiers' must be a mapping like {patient_id: drop}")
    unknown = set(raw) - set(IDENTIFIER_FIELDS)
    if unknown:
        raise ConfigInvalid(
            f"config key 'identifiers' has unknown entries {sorted(unknown)}; "
            f"use {', '.join(IDENTIFIER_FIELDS)}"
        )
    for k, v in raw.items():
        if v not in IDENTIFIER_ACTIONS:
            raise ConfigInvalid(
                f"config key 'identifiers.{k}' must be one of {', '.join(IDENTIFIER_ACTIONS)}, got {v!r}"
            )
    return Identifiers(**dict(raw))


def config_from_mapping(raw: Mapping[str, Any], *, base_dir: Path | None = None) -> Config:
    """Validate a parsed YAML mapping; relative paths are taken relative to ``base_dir``."""
    known = {f.name for f in fields(Config)}
    unknown = set(raw) - known
    if unknown:
        raise ConfigInvalid(
            f"unknown config key(s) {', '.join(sorted(unknown))}; see config.example.yaml"
        )
    values: dict[str, Any] = {}
    for key in _PATH_KEYS:
        v = raw.get(key)
        if v in (None, ""):
            continue
        if not isinstance(v, str):
            raise ConfigInvalid(f"config key '{key}' must be a path, got {v!r}")
        p = Path(v).expanduser()
        if base_dir is not None and not p.is_absolute():
            p = base_dir / p
        values[key] = p
    if raw.get("model") not in (None, ""):
        if not isinstance(raw["model"], str):
            raise ConfigInvalid(
                f"config key 'model' must be a manifest path or a model name, got {raw['model']!r}"
            )
        values["model"] = model_reference(raw["model"], base_dir)
    if "settle_seconds" in raw:
        values["settle_seconds"] = number("settle_seconds", raw["settle_seconds"], lo=0)
    if "rescan_seconds" in raw:
        values["rescan_seconds"] = number("rescan_seconds", raw["rescan_seconds"], lo=1)
    for key, lo in (("retry_seconds", 0.0), ("overdue_seconds", 1.0), ("overdue_factor", 1.0)):
        if key in raw:
            values[key] = number(key, raw[key], lo=lo)
    for key in ("polling", "delete_inbox_files"):
        if key in raw:
            values[key] = flag(key, raw[key])
    for key, lo in (("workers", 1), ("threads", 0), ("keep_versions", 0), ("worker_memory_mb", 0)):
        if key in raw:
            v = raw[key]
            if isinstance(v, bool) or not isinstance(v, int) or v < lo:
                raise ConfigInvalid(f"config key '{key}' must be a whole number >= {lo}, got {v!r}")
            values[key] = v
    if raw.get("threshold") not in (None, ""):
        values["threshold"] = number("threshold", raw["threshold"], lo=0.0, hi=1.0)
    if "min_lesion_mm3" in raw:
        values["min_lesion_mm3"] = number("min_lesion_mm3", raw["min_lesion_mm3"], lo=0)
    if "periventricular_mm" in raw:
        values["periventricular_mm"] = number("periventricular_mm", raw["periventricular_mm"], lo=0)
    if "connectivity" in raw:
        if raw["connectivity"] not in (6, 18, 26):
            raise ConfigInvalid(
                f"config key 'connectivity' must be 6, 18 or 26, got {raw['connectivity']!r}"
            )
        values["connectivity"] = int(raw["connectivity"])
    if "select" in raw:
        values["select"] = rules_from_mapping(raw["select"])
    if "identifiers" in raw:
        values["identifiers"] = _identifiers(raw["identifiers"])
    if "outputs" in raw:
        values["outputs"] = outputs_section(raw["outputs"])
    if "review" in raw:
        values["review"] = review_section(raw["review"], base_dir)
    if "canary" in raw:
        values["canary"] = canary_section(raw["canary"])
    if "longitudinal" in raw:
        values["longitudinal"] = longitudinal_section(raw["longitudinal"])
    if raw.get("send") is not None:
        values["send"] = send_section(raw["send"])
    if raw.get("receive") is not None:
        values["receive"] = receive_section(raw["receive"])
    return Config(**values)


def load_config(path: Path | None) -> Config:
    """Read a YAML config file (None = all defaults)."""
    if path is None:
        return Config()
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigInvalid(f"cannot read config file {path}: {exc.strerror}") from None
    try:
        raw = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise ConfigInvalid(f"config file {path} is not valid YAML: {exc}") from None
    if raw is None:
        raw = {}
    if not isinstance(raw, Mapping):
        raise ConfigInvalid(f"config file {path} must hold a mapping of keys to values")
    return config_from_mapping(raw, base_dir=Path(path).resolve().parent)


def with_overrides(cfg: Config, **flags: Any) -> Config:
    """Command-line flags beat the file: every flag that is not None replaces its key."""
    given = {k: v for k, v in flags.items() if v is not None}
    if not given:
        return cfg
    merged = config_from_mapping(
        {k: (str(v) if isinstance(v, Path) else v) for k, v in given.items()}
    )
    return replace(cfg, **{k: getattr(merged, k) for k in given})
