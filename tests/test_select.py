"""Series selection: which headers count as FLAIR, and the ``select`` config block."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import Any

import pytest
import yaml

from flairwatch.errors import ConfigInvalid
from flairwatch.intake.discover import read_record
from flairwatch.intake.select import (
    DEFAULT_RULES_YAML,
    SelectRules,
    rules_from_mapping,
    select_series,
)
from flairwatch.records import SeriesHeader
from tests.dicom_fixtures import DICOMDIR_TESTS, PYDICOM_FILES

BASE = SeriesHeader(
    study_uid="1.2.3",
    series_uid="1.2.3.4",
    modality="MR",
    image_type=("ORIGINAL", "PRIMARY", "M", "ND"),
    scanning_sequence=("SE", "IR"),
    mr_acquisition_type="2D",
    repetition_time_ms=9000.0,
    echo_time_ms=90.0,
    inversion_time_ms=2500.0,
    series_description="ax flair",
)

# FLAIR nulls CSF with a long inversion: TI about 2000-2800 ms on 2D and about 1600-1900 ms on
# 3D variable-flip-angle sequences (common practice); STIR uses TI 150-250 ms and T1-weighted
# inversion recovery TI 700-1200 ms (common practice), both outside the default range.
CASES: list[tuple[str, dict[str, Any], bool, str]] = [
    ("2D FLAIR, IR and TI in range", {}, True, "inversion_recovery"),
    (
        "3D FLAIR TI 1650",
        {"mr_acquisition_type": "3D", "inversion_time_ms": 1650.0},
        True,
        "inversion_recovery",
    ),
    ("TI at the lower limit", {"inversion_time_ms": 1500.0}, True, "inversion_recovery"),
    ("TI at the upper limit", {"inversion_time_ms": 3500.0}, True, "inversion_recovery"),
    ("CT", {"modality": "CT"}, False, "modality"),
    ("no modality", {"modality": None}, False, "modality"),
    ("lower-case modality", {"modality": "mr"}, True, "inversion_recovery"),
    ("derived reformat", {"image_type": ("DERIVED", "PRIMARY", "MPR")}, False, "derived"),
    ("secondary capture", {"image_type": ("ORIGINAL", "SECONDARY")}, False, "derived"),
    (
        "localizer described",
        {"series_description": "3-plane localizer"},
        False,
        "description_excluded",
    ),
    (
        "localiser in protocol",
        {"series_description": None, "protocol_name": "Localiser"},
        False,
        "description_excluded",
    ),
    (
        "T1 FLAIR excluded by name",
        {"series_description": "sag T1_FLAIR"},
        False,
        "description_excluded",
    ),
    ("t1w excluded", {"series_description": "t1w flair"}, False, "description_excluded"),
    (
        "T2 FLAIR not caught by the t1 pattern",
        {"series_description": "t2_flair_tra_T10"},
        True,
        "inversion_recovery",
    ),
    (
        "STIR by name",
        {"series_description": "cor STIR", "inversion_time_ms": None},
        False,
        "description_excluded",
    ),
    ("diffusion", {"series_description": "ep2d_diff DWI"}, False, "description_excluded"),
    ("odd acquisition type", {"mr_acquisition_type": "1D"}, False, "acquisition_type"),
    (
        "STIR by TI",
        {"inversion_time_ms": 180.0, "series_description": "cor ir"},
        False,
        "inversion_time",
    ),
    (
        "T1 inversion recovery TI 900",
        {"inversion_time_ms": 900.0, "series_description": "ax"},
        False,
        "inversion_time",
    ),
    ("TI too long", {"inversion_time_ms": 4000.0}, False, "inversion_time"),
    ("TI in range, no IR, FLAIR name", {"scanning_sequence": ("SE",)}, True, "description"),
    (
        "TI in range, no IR, dark fluid name",
        {"scanning_sequence": (), "series_description": "Dark-Fluid tra"},
        True,
        "description",
    ),
    (
        "TI in range, no IR, other name",
        {"scanning_sequence": ("SE",), "series_description": "ax t2"},
        False,
        "scanning_sequence",
    ),
    ("no TI, FLAIR name", {"inversion_time_ms": None}, True, "description"),
    (
        "no TI, IR FSE name",
        {"inversion_time_ms": None, "series_description": "AX IR_FSE"},
        True,
        "description",
    ),
    (
        "no TI, plain name",
        {"inversion_time_ms": None, "series_description": "ax t2 tse"},
        False,
        "inversion_time",
    ),
    (
        "no TI, no name",
        {"inversion_time_ms": None, "series_description": None},
        False,
        "inversion_time",
    ),
]


@pytest.mark.parametrize(
    ("changes", "selected", "rule"),
    [pytest.param(c, s, r, id=name) for name, c, s, r in CASES],
)
def test_select_table(changes: dict[str, Any], selected: bool, rule: str) -> None:
    decision = select_series(replace(BASE, **changes), SelectRules())
    assert (decision.selected, decision.rule) == (selected, rule), decision.reason
    assert decision.reason and "\n" not in decision.reason


def test_description_fallback_off_needs_inversion_time() -> None:
    rules = rules_from_mapping({"description_fallback": False})
    decision = select_series(replace(BASE, inversion_time_ms=None), rules)
    assert (decision.selected, decision.rule) == (False, "inversion_time")


def test_derived_kept_when_rule_off() -> None:
    rules = rules_from_mapping({"exclude_derived": False})
    header = replace(BASE, image_type=("DERIVED", "PRIMARY"))
    assert select_series(header, rules).selected


def test_custom_ranges_and_patterns() -> None:
    rules = rules_from_mapping(
        {"inversion_time_ms": [100, 300], "description_exclude": [], "modalities": ["mr"]}
    )
    stir = replace(BASE, inversion_time_ms=180.0, series_description="cor stir")
    assert select_series(stir, rules).selected
    assert not select_series(BASE, rules).selected


def test_real_headers_are_not_flair() -> None:
    # pydicom test files: MR_small is a derived spin-echo image (Image Type DERIVED\SECONDARY);
    # MR2's "FAST LOCALIZER" and "T/S/C RF FAST PILOT" are localizers (gradient echo, no TI).
    names = [PYDICOM_FILES / "MR_small.dcm", *sorted((DICOMDIR_TESTS / "98892003/MR2").iterdir())]
    rules_seen = []
    for path in names:
        header = read_record(path).header
        assert header is not None
        decision = select_series(header, SelectRules())
        assert not decision.selected, (path.name, decision)
        rules_seen.append(decision.rule)
    assert rules_seen[0] == "derived"
    # neither localizer description matches an exclude pattern, so they fall to the TI rule
    assert set(rules_seen[1:]) <= {"inversion_time", "description_excluded"}


def test_default_yaml_matches_defaults() -> None:
    raw = yaml.safe_load(DEFAULT_RULES_YAML)
    assert set(raw) == {"select"}
    assert rules_from_mapping(raw["select"]) == SelectRules()
    assert rules_from_mapping(None) == SelectRules()
    assert rules_from_mapping({}) == SelectRules()


def test_config_example_select_block_matches_defaults() -> None:
    # config.example.yaml documents the defaults: its `select` block must be them
    example = Path(__file__).resolve().parent.parent / "config.example.yaml"
    raw = yaml.safe_load(example.read_text(encoding="utf-8"))
    assert rules_from_mapping(raw["select"]) == SelectRules()


@pytest.mark.parametrize(
    ("raw", "key"),
    [
        ({"modality": ["MR"]}, "select.modality"),
        ({"modalities": "MR"}, "select.modalities"),
        ({"modalities": [1]}, "select.modalities"),
        ({"modalities": [""]}, "select.modalities"),
        ({"exclude_derived": "yes"}, "select.exclude_derived"),
        ({"inversion_time_ms": [3000, 1000]}, "select.inversion_time_ms"),
        ({"inversion_time_ms": [1000]}, "select.inversion_time_ms"),
        ({"inversion_time_ms": ["a", "b"]}, "select.inversion_time_ms"),
        ({"description_include": ["(unclosed"]}, "select.description_include"),
        ({"description_exclude": "flair"}, "select.description_exclude"),
        ({"description_fallback": 1}, "select.description_fallback"),
    ],
)
def test_bad_config_names_the_key(raw: dict[str, Any], key: str) -> None:
    with pytest.raises(ConfigInvalid, match=key.replace(".", r"\.")) as info:
        rules_from_mapping(raw)
    assert "\n" not in str(info.value)


def test_rules_are_hashable_and_frozen() -> None:
    rules = SelectRules()
    assert hash(rules) == hash(rules_from_mapping(None))
    with pytest.raises(AttributeError):
        rules.modalities = ("CT",)  # type: ignore[misc]
