"""Value checks shared by the config's sections: each error names the key and says what is wanted."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from flairwatch.errors import ConfigInvalid


def number(key: str, value: Any, *, lo: float, hi: float | None = None) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ConfigInvalid(f"config key '{key}' must be a number, got {value!r}")
    if value < lo or (hi is not None and value > hi):
        rng = f">= {lo}" if hi is None else f"between {lo} and {hi}"
        raise ConfigInvalid(f"config key '{key}' must be {rng}, got {value!r}")
    return float(value)


def flag(key: str, value: Any) -> bool:
    if not isinstance(value, bool):
        raise ConfigInvalid(f"config key '{key}' must be true or false, got {value!r}")
    return value


def section(key: str, raw: Any, names: tuple[str, ...]) -> Mapping[str, Any]:
    if raw is None:
        return {}
    if not isinstance(raw, Mapping):
        raise ConfigInvalid(f"config key '{key}' must be a mapping like {{{names[0]}: ...}}")
    unknown = set(raw) - set(names)
    if unknown:
        raise ConfigInvalid(
            f"config key '{key}' has unknown entries {sorted(unknown)}; use {', '.join(names)}"
        )
    return raw
