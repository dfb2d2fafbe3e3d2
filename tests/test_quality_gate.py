"""The quality benchmark's arithmetic: gate lines worked by hand, tables from a tiny model.

The figures' definitions come from flairwatch.research.metrics (2019 IEEE TMI WMH segmentation
challenge); here the gate thresholds are issue 9's numbers, and the expected values are worked
by hand from the made-up per-series scores below. The table test runs a fixed tiny ONNX model
(tests/model_fixtures.py) through the engine and checks the table against metrics.dice computed
directly on the engine's mask.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from flairwatch.config import Config
from flairwatch.engine.pipeline import Engine
from flairwatch.research import metrics
from flairwatch.research.cases import read_case
from flairwatch.research.quality_card import END, START, replace_section
from flairwatch.research.quality_gate import COLUMNS, figures, shift_gate, tables
from flairwatch.research.quality_run import segmenters, subset_of
from flairwatch.research.scoring import CaseResult
from flairwatch.research.validate import score_folders
from tests.model_fixtures import make_tiny_model
from tests.series_fixtures import SeriesSpec, phantom_array, write_series
from tests.test_validate import spec_affine_ras, write_nifti


def result(
    case_id: str,
    dice: float,
    ref_ml: float,
    *,
    fp: float = 0.0,
    avd: float = 10.0,
    ref_lesions: int = 4,
    detected: int = 3,
    large: tuple[int, int] = (2, 2),
    vent: float = math.nan,
) -> CaseResult:
    scores = metrics.CaseScores(
        dice=dice,
        hd95_mm=2.0,
        volume_difference_pct=avd,
        lesion_recall=math.nan,
        lesion_f1=0.8,
        reference_ml=ref_ml,
        segmentation_ml=ref_ml + fp,
        false_positive_ml=fp,
        reference_lesions=ref_lesions,
        detected_lesions=detected,
        load_bin=metrics.load_bin(ref_ml),
    )
    return CaseResult(
        case_id, scores, math.nan, large[0], large[1], 0.97, None, None, 1.0, ventricles_dice=vent
    )


SUBSETS = ["timing", "timing", "faint", "punctate", "elderly_free", "elderly_free"]


def runs() -> tuple[list[CaseResult], list[CaseResult], list[CaseResult]]:
    new = [
        result("timing-00", 0.90, 5.0, avd=20.0, vent=0.9),
        result("timing-01", 0.80, 2.0, avd=30.0, vent=0.8),
        result("faint-00", 0.60, 3.0, avd=10.0, ref_lesions=10, detected=7, vent=0.88),
        result("punctate-00", 0.40, 0.3, ref_lesions=10, detected=5, large=(0, 0), vent=0.9),
        result(
            "elderly_free-00", 1.0, 0.0, fp=0.1, ref_lesions=0, detected=0, large=(0, 0), vent=0.86
        ),
        result(
            "elderly_free-01", 0.0, 0.0, fp=0.6, ref_lesions=0, detected=0, large=(0, 0), vent=0.87
        ),
    ]
    old = [result(r.case_id, r.scores.dice - 0.2, r.scores.reference_ml) for r in new]
    base = [result(r.case_id, 0.5, r.scores.reference_ml) for r in new]
    return new, old, base


def test_gate_lines_worked_by_hand() -> None:
    new, old, base = runs()
    lines = {
        x.criterion.split(" (")[0].split(";")[0]: x
        for x in shift_gate(SUBSETS, new, old, base, in_distribution=True)
    }
    # series >= 1 mL: timing-00 0.90, timing-01 0.80, faint-00 0.60 -> median 0.80
    assert lines["median Dice, series >= 1 mL"].measured == "0.800"
    assert lines["median Dice, series >= 1 mL"].passed is True
    # old: 0.70, 0.60, 0.40 -> 0.60; margin 0.20 >= 0.10
    assert lines["median Dice margin over the old model"].measured == "0.200"
    # per subset (>= 1 mL only): timing median 0.85, faint 0.60 < 0.65 -> fails, worst faint
    sub = next(x for x in lines.values() if x.criterion.startswith("median Dice in every subset"))
    assert sub.measured == "0.600" and sub.passed is False and "faint" in sub.criterion
    # all-lesion recall: faint 7/10 = 0.70 passes, punctate 5/10 = 0.50 fails
    assert lines["lesion recall, faint subset"].measured == "0.700"
    assert lines["lesion recall, faint subset"].passed is True
    assert lines["lesion recall, punctate subset"].passed is False
    # pooled >= 30 mm^3: (2 + 2 + 2) / (2 + 2 + 2) = 1.0
    assert lines["lesion recall, lesions >= 30 mm^3"].measured == "1.000"
    # AVD over >= 1 mL: 20, 30, 10 -> median 20
    assert lines["median abs. volume difference %, series >= 1 mL"].measured == "20.0"
    # lesion-free false positives 0.1 and 0.6: max 0.6 fails, median 0.35 fails
    assert lines["largest false-positive volume mL, lesion-free series"].measured == "0.60"
    assert lines["largest false-positive volume mL, lesion-free series"].passed is False
    assert lines["median false-positive volume mL, lesion-free series"].measured == "0.35"
    assert lines["in-distribution gate"].passed is True
    # baseline 0.5 -> margin 0.30
    assert lines["median Dice margin over the intensity baseline"].measured == "0.300"
    # ventricles 0.9, 0.8, 0.88, 0.9, 0.86, 0.87 -> median 0.875
    assert lines["median ventricle Dice"].measured == "0.875"


def test_gate_line_not_measured_when_nothing_counts() -> None:
    new, old, base = runs()
    lines = shift_gate(SUBSETS, new, old, base, in_distribution=None)
    held = next(x for x in lines if x.criterion.startswith("in-distribution"))
    assert held.passed is None and held.result == "NOT MEASURED"
    no_vent = [result(r.case_id, r.scores.dice, r.scores.reference_ml) for r in new]
    vent = shift_gate(SUBSETS, no_vent, old, base, in_distribution=True)[-1]
    assert vent.passed is None and vent.measured == "n/a"


def test_card_section_replaced_between_markers_only() -> None:
    card = f"# Card\nintro\n\n{START}\nold table\n{END}\n\n## Limits\nkept\n"
    out = replace_section(card, "new table")
    assert "old table" not in out and "new table" in out
    assert out.startswith("# Card\nintro\n") and out.endswith("## Limits\nkept\n")
    assert replace_section(out, "newer").count(START) == 1
    appended = replace_section("# Card\n", "table")
    assert appended.index(START) > appended.index("# Card")


def _case(root: Path, name: str, reference: np.ndarray, subset: str) -> Path:
    spec = SeriesSpec()
    case = root / name
    write_series(case / "image", spec)
    write_nifti(case / "wmh_reference.nii.gz", reference.astype(np.uint8), spec_affine_ras(spec))
    head = (phantom_array(spec) > 0).astype(np.uint8)
    write_nifti(case / "intracranial_mask.nii.gz", head, spec_affine_ras(spec))
    (case / "case.json").write_text(json.dumps({"subset": subset}), encoding="utf-8")
    return case


def test_per_subset_table_with_a_tiny_model(tmp_path: Path) -> None:
    truth = phantom_array(SeriesSpec()) == 600
    dirs = [
        _case(tmp_path / "suite", "timing-00", truth, "timing"),
        _case(tmp_path / "suite", "timing-01", np.roll(truth, 2, axis=0), "timing"),
        _case(tmp_path / "suite", "elderly_free-00", np.zeros_like(truth), "elderly_free"),
    ]
    new = Engine(Config(model=make_tiny_model(tmp_path / "new"), threads=1))
    old = Engine(
        Config(model=make_tiny_model(tmp_path / "old", threshold=0.95, version="0.0.2"), threads=1)
    )
    runs_, failures = score_folders(
        dirs, segmenters(new, old, 1.5), say=lambda s: None, warn=lambda s: None, read=read_case
    )
    assert not failures and set(runs_) == {"new", "old", "baseline"}
    subsets = [subset_of(d) for d in dirs]
    assert subsets == ["timing", "timing", "elderly_free"]
    # outside check: the Dice of the engine's own mask, computed directly with metrics.dice
    for d, r in zip(dirs, runs_["new"], strict=True):
        case = read_case(d)
        assert r.scores.dice == pytest.approx(
            metrics.dice(case.reference, new.analyse(case.image).lesions.mask)
        )
    shown = {"new": runs_["new"], "old": runs_["old"], "baseline": runs_["baseline"]}
    parts = tables(subsets, shown)
    rows = [line.split(" | ") for line in parts["by_subset"].splitlines()[2:]]
    assert [(r[0].strip("| "), r[1]) for r in rows] == [
        (s, m) for s in ("timing", "elderly_free") for m in ("new", "old", "baseline")
    ]
    timing_new = figures(runs_["new"][:2])
    dice_col = 2 + [key for key, _, _ in COLUMNS].index("dice_all")
    assert rows[0][dice_col] == f"{timing_new['dice_all']:.3f}"
    assert "| all | new |" in parts["overall"]
