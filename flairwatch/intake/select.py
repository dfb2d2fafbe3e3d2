"""Decide which series are FLAIR from header attributes alone (pure; no file access).

Policy, checked in this order; the first rule that decides names the outcome:

1. ``modality``: Modality (0008,0060) must be one of ``modalities`` (default MR).
2. ``derived``: with ``exclude_derived``, a series whose Image Type (0008,0008) value 1 is
   DERIVED or value 2 is SECONDARY (reformats, projections, maps, screenshots) is skipped.
3. ``description_excluded``: Series Description or Protocol Name matches an exclude pattern
   (localizers, T1-weighted, diffusion...). Exclusion beats inclusion.
4. ``acquisition_type``: MR Acquisition Type (0018,0023), when present, must be listed
   (2D and 3D by default, so only unusual values are skipped).
5. ``inversion_time``: an Inversion Time (0018,0082) outside ``inversion_time_ms`` skips the
   series: a FLAIR nulls CSF, whose T1 needs a TI of roughly 1.5-3.5 s (common practice);
   short-TI inversion recovery (STIR, T1-FLAIR) falls below the range.
6. With TI in range: Scanning Sequence (0018,0020) containing one of ``scanning_sequence_any``
   (IR) selects the series (rule ``inversion_recovery``); otherwise a description match is
   needed (rule ``description``).
7. With TI missing (some enhanced objects keep it per frame; some exports drop it): a
   description that matches an include pattern selects the series (rule ``description``) when
   ``description_fallback`` is true; otherwise the series is skipped (rule ``inversion_time``).

Patterns are Python regular expressions, matched case-insensitively anywhere in the text.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields
from typing import Any

from flairwatch.errors import ConfigInvalid
from flairwatch.records import SeriesHeader

DEFAULT_MODALITIES: tuple[str, ...] = ("MR",)
DEFAULT_SCANNING_SEQUENCE_ANY: tuple[str, ...] = ("IR",)
DEFAULT_INVERSION_TIME_MS: tuple[float, float] = (1500.0, 3500.0)
DEFAULT_ACQUISITION_TYPES: tuple[str, ...] = ("2D", "3D")
DEFAULT_DESCRIPTION_INCLUDE: tuple[str, ...] = (
    r"flair",
    r"dark.?fluid",
    r"ir.?fse",
    r"fse.?ir",
    r"fluid.?att",
)
DEFAULT_DESCRIPTION_EXCLUDE: tuple[str, ...] = (
    r"locali[sz]er",
    r"scout",
    r"survey",
    r"(?<![a-z0-9])t1(?![0-9])",
    r"stir",
    r"diffusion|(?<![a-z])dwi(?![a-z])|(?<![a-z])adc(?![a-z])",
    r"(?<![a-z])mip(?![a-z])|reformat",
)

DEFAULT_RULES_YAML = """\
select:
  # A series is FLAIR when every rule below lets it through, checked in this order.
  # Modality (0008,0060) must be one of these.
  modalities: [MR]
  # Skip derived images: Image Type value 1 DERIVED or value 2 SECONDARY (reformats, maps).
  exclude_derived: true
  # Skip a series whose Series Description or Protocol Name matches one of these
  # (Python regular expressions, case-insensitive, matched anywhere).
  description_exclude:
    - 'locali[sz]er'
    - 'scout'
    - 'survey'
    - '(?<![a-z0-9])t1(?![0-9])'
    - 'stir'
    - 'diffusion|(?<![a-z])dwi(?![a-z])|(?<![a-z])adc(?![a-z])'
    - '(?<![a-z])mip(?![a-z])|reformat'
  # MR Acquisition Type (0018,0023), when the header has it, must be one of these.
  acquisition_types: [2D, 3D]
  # Inversion Time (0018,0082) in ms, [lowest, highest]; outside it the series is skipped.
  inversion_time_ms: [1500, 3500]
  # With the TI in range, Scanning Sequence (0018,0020) must contain one of these...
  scanning_sequence_any: [IR]
  # ...or the description must match one of these patterns.
  description_include:
    - 'flair'
    - 'dark.?fluid'
    - 'ir.?fse'
    - 'fse.?ir'
    - 'fluid.?att'
  # When the header has no Inversion Time, select on a description match alone.
  description_fallback: true
"""


def _compile(patterns: Sequence[str], key: str) -> tuple[re.Pattern[str], ...]:
    compiled = []
    for pattern in patterns:
        try:
            compiled.append(re.compile(pattern, re.IGNORECASE))
        except re.error as exc:
            raise ConfigInvalid(
                f"select.{key}: {pattern!r} is not a valid regular expression ({exc}); "
                "fix the pattern"
            ) from None
    return tuple(compiled)


@dataclass(frozen=True)
class SelectRules:
    """Rules that decide whether a series is FLAIR (see the module docstring for the policy).

    Parameters
    ----------
    modalities : tuple of str
        Accepted Modality values.
    exclude_derived : bool
        Skip series whose Image Type says DERIVED or SECONDARY.
    description_exclude, description_include : tuple of str
        Case-insensitive regular expressions matched against Series Description and Protocol Name.
    acquisition_types : tuple of str
        Accepted MR Acquisition Type values (checked only when present).
    inversion_time_ms : (float, float)
        Lowest and highest accepted Inversion Time, in ms.
    scanning_sequence_any : tuple of str
        Scanning Sequence values of which at least one must be present (IR).
    description_fallback : bool
        Select on a description match when the header has no Inversion Time.
    """

    modalities: tuple[str, ...] = DEFAULT_MODALITIES
    exclude_derived: bool = True
    description_exclude: tuple[str, ...] = DEFAULT_DESCRIPTION_EXCLUDE
    acquisition_types: tuple[str, ...] = DEFAULT_ACQUISITION_TYPES
    inversion_time_ms: tuple[float, float] = DEFAULT_INVERSION_TIME_MS
    scanning_sequence_any: tuple[str, ...] = DEFAULT_SCANNING_SEQUENCE_ANY
    description_include: tuple[str, ...] = DEFAULT_DESCRIPTION_INCLUDE
    description_fallback: bool = True
    _exclude_re: tuple[re.Pattern[str], ...] = field(init=False, repr=False, compare=False)
    _include_re: tuple[re.Pattern[str], ...] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(
            self, "_exclude_re", _compile(self.description_exclude, "description_exclude")
        )
        object.__setattr__(
            self, "_include_re", _compile(self.description_include, "description_include")
        )


@dataclass(frozen=True)
class Selection:
    """Outcome of :func:`select_series`: whether selected, the deciding rule, and why in words."""

    selected: bool
    rule: str
    reason: str


_PUBLIC_KEYS = tuple(f.name for f in fields(SelectRules) if f.init)


def _str_list(value: Any, key: str, *, upper: bool) -> tuple[str, ...]:
    if not isinstance(value, list | tuple) or not all(isinstance(v, str) for v in value):
        raise ConfigInvalid(f"select.{key}: expected a list of strings, got {value!r}")
    items = tuple(v.strip().upper() if upper else v for v in value)
    if any(not v for v in items):
        raise ConfigInvalid(f"select.{key}: empty string in the list; remove it")
    return items


def _bool(value: Any, key: str) -> bool:
    if not isinstance(value, bool):
        raise ConfigInvalid(f"select.{key}: expected true or false, got {value!r}")
    return value


def _ti_range(value: Any, key: str) -> tuple[float, float]:
    ok = (
        isinstance(value, list | tuple)
        and len(value) == 2
        and all(isinstance(v, int | float) and not isinstance(v, bool) for v in value)
    )
    if ok:
        low, high = float(value[0]), float(value[1])
        if math.isfinite(low) and math.isfinite(high) and 0 <= low <= high:
            return (low, high)
    raise ConfigInvalid(
        f"select.{key}: expected [lowest, highest] in ms with 0 <= lowest <= highest, got {value!r}"
    )


def rules_from_mapping(raw: Mapping[str, Any] | None) -> SelectRules:
    """Build and validate :class:`SelectRules` from the ``select`` block of the config.

    Missing keys keep their defaults; ``None`` gives all defaults.

    Raises
    ------
    ConfigInvalid
        For an unknown key or a value of the wrong type, naming the key as ``select.<name>``.
    """
    if raw is None:
        return SelectRules()
    if not isinstance(raw, Mapping):
        raise ConfigInvalid(f"select: expected a mapping of rule names to values, got {raw!r}")
    kwargs: dict[str, Any] = {}
    for key, value in raw.items():
        if key not in _PUBLIC_KEYS:
            raise ConfigInvalid(
                f"select.{key}: unknown key; known keys are {', '.join(_PUBLIC_KEYS)}"
            )
        if key in ("modalities", "acquisition_types", "scanning_sequence_any"):
            kwargs[key] = _str_list(value, key, upper=True)
        elif key in ("description_include", "description_exclude"):
            kwargs[key] = _str_list(value, key, upper=False)
        elif key in ("exclude_derived", "description_fallback"):
            kwargs[key] = _bool(value, key)
        else:  # inversion_time_ms
            kwargs[key] = _ti_range(value, key)
    return SelectRules(**kwargs)


def _describe(header: SeriesHeader) -> list[str]:
    return [t for t in (header.series_description, header.protocol_name) if t]


def _is_derived(image_type: tuple[str, ...]) -> bool:
    values = [v.strip().upper() for v in image_type]
    return (len(values) > 0 and values[0] == "DERIVED") or (
        len(values) > 1 and values[1] == "SECONDARY"
    )


def select_series(header: SeriesHeader, rules: SelectRules) -> Selection:
    """Decide whether one series is FLAIR.

    Parameters
    ----------
    header : SeriesHeader
        Header facts of the series (inversion time in ms).
    rules : SelectRules
        The rules from the ``select`` config block.

    Returns
    -------
    Selection
        ``selected``, the name of the deciding rule and a one-line reason.
    """
    modality = (header.modality or "").strip().upper()
    if modality not in rules.modalities:
        return Selection(
            False,
            "modality",
            f"modality {modality or 'missing'} is not {'/'.join(rules.modalities)}",
        )
    if rules.exclude_derived and _is_derived(header.image_type):
        shown = "\\".join(header.image_type)
        return Selection(False, "derived", f"derived image type {shown}")
    texts = _describe(header)
    for pattern in rules._exclude_re:
        for text in texts:
            if pattern.search(text):
                return Selection(
                    False,
                    "description_excluded",
                    f"description {text!r} matches exclude pattern {pattern.pattern!r}",
                )
    acq = (header.mr_acquisition_type or "").strip().upper()
    if acq and acq not in rules.acquisition_types:
        return Selection(False, "acquisition_type", f"MR acquisition type {acq} is not accepted")
    include_hit = next(
        ((text, p.pattern) for p in rules._include_re for text in texts if p.search(text)),
        None,
    )
    ti = header.inversion_time_ms
    low, high = rules.inversion_time_ms
    if ti is not None:
        if not low <= ti <= high:
            return Selection(
                False,
                "inversion_time",
                f"inversion time {ti:g} ms outside {low:g}-{high:g} ms",
            )
        sequences = {s.strip().upper() for s in header.scanning_sequence}
        if sequences.intersection(rules.scanning_sequence_any):
            return Selection(
                True,
                "inversion_recovery",
                f"inversion recovery with inversion time {ti:g} ms",
            )
        if include_hit is not None:
            return Selection(
                True,
                "description",
                f"inversion time {ti:g} ms and description {include_hit[0]!r} "
                f"matches {include_hit[1]!r}",
            )
        return Selection(
            False,
            "scanning_sequence",
            f"scanning sequence {'/'.join(header.scanning_sequence) or 'missing'} has none of "
            f"{'/'.join(rules.scanning_sequence_any)} and the description does not match",
        )
    if rules.description_fallback and include_hit is not None:
        return Selection(
            True,
            "description",
            f"no inversion time; description {include_hit[0]!r} matches {include_hit[1]!r}",
        )
    return Selection(
        False,
        "inversion_time",
        "no inversion time"
        + ("" if rules.description_fallback else " (description fallback off)")
        + " and the description does not match a FLAIR pattern",
    )
