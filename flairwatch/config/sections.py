"""Config sections of the research tools: ``outputs:``, ``review:``, ``canary:``, ``longitudinal:``.

Each section is a frozen dataclass with its defaults and a parser from the YAML mapping.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from flairwatch.config.checks import flag, number, section
from flairwatch.errors import ConfigInvalid


@dataclass(frozen=True)
class CanarySettings:
    """``canary:``: the daily self-check (:mod:`flairwatch.research.canary`).

    ``time`` is the local wall-clock time "HH:MM" of the daily run; ``min_dice`` the lowest
    Dice with the expected mask that passes; ``max_volume_change_percent`` the largest change
    of the WMH volume from the expected one, in % of the expected volume, that passes.
    """

    enabled: bool = True
    time: str = "03:00"
    min_dice: float = 0.999
    max_volume_change_percent: float = 0.5


@dataclass(frozen=True)
class LongitudinalSettings:
    """``longitudinal:``: ``export --longitudinal`` flags a later scan whose WMH volume drops
    by more than ``drop_percent`` % of the previous scan's and by more than ``drop_ml`` mL."""

    drop_percent: float = 20.0
    drop_ml: float = 1.0


@dataclass(frozen=True)
class OutputSettings:
    """``outputs:``: DICOM SEG / SR per result; ``identifiers``: ``copy`` the scan's patient
    data into them (archives file them with the scan) or ``follow`` the ``identifiers`` key."""

    segmentation: bool = True
    measurements: bool = True  # the SR references the SEG, so it needs segmentation
    identifiers: str = "copy"


@dataclass(frozen=True)
class ReviewSettings:
    """``review:``: where ``flairwatch review`` listens (README, "Reviewing results in the browser").

    ``port`` 0 takes a free port at start. Off the loopback address, TLS (``tls_cert`` and
    ``tls_key``, PEM files) is required; ``password`` lets reviewers log in without the token.
    """

    address: str = "127.0.0.1"
    port: int = 0
    password: str | None = None
    tls_cert: Path | None = None
    tls_key: Path | None = None


REVIEW_KEYS = ("address", "port", "password", "tls_cert", "tls_key")


def outputs_section(raw: Any) -> OutputSettings:
    keys = ("segmentation", "measurements", "identifiers")
    if raw is None:
        return OutputSettings()
    if not isinstance(raw, Mapping) or set(raw) - set(keys):
        raise ConfigInvalid(f"config key 'outputs' must be a mapping of {', '.join(keys)}")
    out = OutputSettings(**{k: flag(f"outputs.{k}", raw[k]) for k in keys[:2] if k in raw},
                         identifiers=raw.get("identifiers", "copy"))  # fmt: skip
    if out.identifiers not in ("copy", "follow"):
        raise ConfigInvalid(f"config key 'outputs.identifiers' must be copy or follow, got "
                            f"{out.identifiers!r}")  # fmt: skip
    if out.measurements and not out.segmentation:
        raise ConfigInvalid("config key 'outputs.measurements' needs 'outputs.segmentation' "
                            "(the SR references the SEG); turn both off or keep segmentation")  # fmt: skip
    return out


def review_section(raw: Any, base_dir: Path | None) -> ReviewSettings:
    if raw is None:
        return ReviewSettings()
    if not isinstance(raw, Mapping):
        raise ConfigInvalid("config key 'review' must be a mapping like {address: 127.0.0.1}")
    unknown = set(raw) - set(REVIEW_KEYS)
    if unknown:
        raise ConfigInvalid(
            f"config key 'review' has unknown entries {sorted(unknown)}; use {', '.join(REVIEW_KEYS)}"
        )
    values: dict[str, Any] = {}
    for key in ("address", "password"):
        v = raw.get(key)
        if v in (None, ""):
            continue
        if not isinstance(v, str):
            raise ConfigInvalid(f"config key 'review.{key}' must be text, got a {type(v).__name__}")
        values[key] = v
    port = raw.get("port")
    if port not in (None, ""):
        if isinstance(port, bool) or not isinstance(port, int) or not 0 <= port <= 65535:
            raise ConfigInvalid(f"config key 'review.port' must be 0 to 65535, got {port!r}")
        values["port"] = port
    for key in ("tls_cert", "tls_key"):
        v = raw.get(key)
        if v in (None, ""):
            continue
        if not isinstance(v, str):
            raise ConfigInvalid(f"config key 'review.{key}' must be a path, got {v!r}")
        p = Path(v).expanduser()
        values[key] = base_dir / p if base_dir is not None and not p.is_absolute() else p
    if ("tls_cert" in values) != ("tls_key" in values):
        raise ConfigInvalid(
            "config keys 'review.tls_cert' and 'review.tls_key' go together; set both"
        )
    return ReviewSettings(**values)


def canary_section(raw: Any) -> CanarySettings:
    given = section("canary", raw, ("enabled", "time", "min_dice", "max_volume_change_percent"))
    values: dict[str, Any] = {}
    if "enabled" in given:
        values["enabled"] = flag("canary.enabled", given["enabled"])
    if "time" in given:
        hh, sep, mm = str(given["time"]).partition(":")
        if not (sep and hh.isdigit() and mm.isdigit() and int(hh) < 24 and int(mm) < 60):
            raise ConfigInvalid(
                "config key 'canary.time' must be a local time HH:MM in quotes, such as "
                f'"03:00", got {given["time"]!r}'
            )
        values["time"] = f"{int(hh):02d}:{int(mm):02d}"
    if "min_dice" in given:
        values["min_dice"] = number("canary.min_dice", given["min_dice"], lo=0.0, hi=1.0)
    if "max_volume_change_percent" in given:
        values["max_volume_change_percent"] = number(
            "canary.max_volume_change_percent", given["max_volume_change_percent"], lo=0.0
        )
    return CanarySettings(**values)


def longitudinal_section(raw: Any) -> LongitudinalSettings:
    given = section("longitudinal", raw, ("drop_percent", "drop_ml"))
    return LongitudinalSettings(
        **{k: number(f"longitudinal.{k}", v, lo=0.0) for k, v in given.items()}
    )
