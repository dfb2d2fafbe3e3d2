"""Shift-suite figures per subset, per load bin and overall, and the issue-9 quality gate.

Pure arithmetic over :class:`~flairwatch.research.scoring.CaseResult` lists, one list per
segmenter ("new", "old", "baseline"), all in the same case order. Figures follow
:mod:`flairwatch.research.metrics` (2019 IEEE TMI WMH segmentation challenge definitions):

- Dice: median over series with >= 1 mL of reference lesion (and over all series);
- HD95 (mm) and absolute volume difference (%): medians over series with >= 1 mL;
- lesion recall: pooled over reference lesions >= 30 mm^3; for the faint and punctate subsets
  the gate uses recall over *all* reference lesions (punctate lesions are 10-30 mm^3);
- lesion F1: median over series with lesions;
- false-positive volume (mL): on lesion-free series (median and largest);
- ventricle Dice (when the segmenter gives ventricles) and intracranial Dice: medians.

Gate (issue 9, item 4), for the new model: median Dice >= 0.78 over series >= 1 mL and >= 0.10
above the old model's on the same series; median Dice >= 0.65 in every subset whose series
carry >= 1 mL; lesion recall >= 0.60 in the faint and punctate subsets; pooled recall (>= 30
mm^3) >= 0.80; median absolute volume difference <= 25 %; false positives <= 0.5 mL on every
lesion-free series and <= 0.2 mL in their median; the in-distribution gate still passes; median
Dice >= 0.15 above the intensity-threshold baseline; and (item 3) median ventricle Dice >= 0.85.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

from flairwatch.research import metrics
from flairwatch.research.quality_heldout import median, pooled_recall
from flairwatch.research.scoring import CaseResult

LOAD_ML = 1.0
LOOSE_RECALL_SUBSETS = ("faint", "punctate")


@dataclass(frozen=True)
class Line:
    """One gate criterion: what, the requirement, the measured value (text) and the verdict.

    ``passed`` is None when the criterion could not be measured in this run (counts as not
    passed in the overall verdict).
    """

    criterion: str
    required: str
    measured: str
    passed: bool | None

    @property
    def result(self) -> str:
        return {True: "PASS", False: "FAIL", None: "NOT MEASURED"}[self.passed]


def _f(value: float, digits: int = 3) -> str:
    return "n/a" if math.isnan(value) else f"{value:.{digits}f}"


def _big(results: Sequence[CaseResult]) -> list[CaseResult]:
    return [r for r in results if r.scores.reference_ml >= LOAD_ML]


def all_lesion_recall(results: Sequence[CaseResult]) -> float:
    """Detected / reference lesions of any size, pooled; NaN when there is none."""
    ref = sum(r.scores.reference_lesions for r in results)
    return sum(r.scores.detected_lesions for r in results) / ref if ref else math.nan


def figures(results: Sequence[CaseResult]) -> dict[str, float]:
    """Every figure of one group of series (module docstring); NaN where nothing counts."""
    big = _big(results)
    free = [r for r in results if r.scores.reference_ml == 0.0]
    with_lesions = [r for r in results if r.scores.reference_lesions > 0]
    return {
        "series": float(len(results)),
        "series_1ml": float(len(big)),
        "dice_1ml": median([r.scores.dice for r in big]),
        "dice_all": median([r.scores.dice for r in results]),
        "hd95_mm": median([r.scores.hd95_mm for r in big]),
        "avd_pct": median([r.scores.volume_difference_pct for r in big]),
        "recall_30mm3": pooled_recall(results),
        "recall_all": all_lesion_recall(results),
        "f1": median([r.scores.lesion_f1 for r in with_lesions]),
        "fp_free_median_ml": median([r.scores.false_positive_ml for r in free]),
        "fp_free_max_ml": max((r.scores.false_positive_ml for r in free), default=math.nan),
        "fp_median_ml": median([r.scores.false_positive_ml for r in results]),
        "ventricles_dice": median([r.ventricles_dice for r in results]),
        "intracranial_dice": median([r.intracranial_dice for r in results]),
    }


COLUMNS: tuple[tuple[str, str, int], ...] = (
    ("series", "series", 0),
    ("series_1ml", ">= 1 mL", 0),
    ("dice_1ml", "Dice (>= 1 mL)", 3),
    ("dice_all", "Dice (all)", 3),
    ("hd95_mm", "HD95 mm", 1),
    ("avd_pct", "abs. vol. diff. %", 1),
    ("recall_30mm3", "recall >= 30 mm^3", 3),
    ("recall_all", "recall (all)", 3),
    ("f1", "lesion F1", 3),
    ("fp_median_ml", "FP mL (median)", 2),
    ("fp_free_max_ml", "FP mL, lesion-free (max)", 2),
    ("ventricles_dice", "ventricle Dice", 3),
    ("intracranial_dice", "intracranial Dice", 3),
)


def _rows(
    groups: Sequence[tuple[str, list[int]]], runs: Mapping[str, Sequence[CaseResult]]
) -> list[list[str]]:
    rows = []
    for name, idx in groups:
        for model, results in runs.items():
            fig = figures([results[i] for i in idx])
            rows.append([name, model] + [_f(fig[key], d) for key, _, d in COLUMNS])
    return rows


def markdown(header: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    """A Markdown table."""
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    lines += ["| " + " | ".join(str(c) for c in row) + " |" for row in rows]
    return "\n".join(lines) + "\n"


def tables(subsets: Sequence[str], runs: Mapping[str, Sequence[CaseResult]]) -> dict[str, str]:
    """Markdown tables by subset, by reference load bin and overall; models side by side.

    ``subsets`` gives each case's subset, in the runs' case order.
    """
    first = next(iter(runs.values()))
    names = list(dict.fromkeys(subsets))
    by_subset = [(s, [i for i, x in enumerate(subsets) if x == s]) for s in names]
    by_bin = [
        (b, [i for i, r in enumerate(first) if r.scores.load_bin == b])
        for b in metrics.LOAD_BIN_NAMES
    ]
    by_bin = [(b, idx) for b, idx in by_bin if idx]
    header = ["group", "model"] + [title for _, title, _ in COLUMNS]
    return {
        "by_subset": markdown(header, _rows(by_subset, runs)),
        "by_load_bin": markdown(header, _rows(by_bin, runs)),
        "overall": markdown(header, _rows([("all", list(range(len(first))))], runs)),
    }


def _line(
    name: str, need: str, value: float, test: Callable[[float], bool], digits: int = 3
) -> Line:
    passed = None if math.isnan(value) else bool(test(value))
    return Line(name, need, _f(value, digits), passed)


def shift_gate(
    subsets: Sequence[str],
    new: Sequence[CaseResult],
    old: Sequence[CaseResult],
    baseline: Sequence[CaseResult],
    *,
    in_distribution: bool | None,
) -> list[Line]:
    """The issue-9 gate lines (module docstring); ``in_distribution`` None = not run."""
    big_new, big_old, big_base = _big(new), _big(old), _big(baseline)
    dice = median([r.scores.dice for r in big_new])
    old_dice = median([r.scores.dice for r in big_old])
    base_dice = median([r.scores.dice for r in big_base])
    per_subset = {}
    for s in dict.fromkeys(subsets):
        group = _big([r for r, x in zip(new, subsets, strict=True) if x == s])
        if group:
            per_subset[s] = median([r.scores.dice for r in group])
    worst = min(per_subset, key=lambda s: per_subset[s]) if per_subset else None
    worst_value = per_subset[worst] if worst else math.nan
    failing = sorted(s for s, v in per_subset.items() if v < 0.65)
    free = [r.scores.false_positive_ml for r in new if r.scores.reference_ml == 0.0]
    vent = median([r.ventricles_dice for r in new])
    lines = [
        _line("median Dice, series >= 1 mL", ">= 0.78", dice, lambda v: v >= 0.78),
        _line(
            f"median Dice margin over the old model (old {_f(old_dice)})",
            ">= 0.10",
            dice - old_dice,
            lambda v: v >= 0.10,
        ),
        Line(
            "median Dice in every subset with series >= 1 mL"
            + (f" (worst: {worst})" if worst else "")
            + (f"; below: {', '.join(failing)}" if failing else ""),
            ">= 0.65",
            _f(worst_value),
            None if worst is None else not failing,
        ),
    ]
    for s in LOOSE_RECALL_SUBSETS:
        rec = all_lesion_recall([r for r, x in zip(new, subsets, strict=True) if x == s])
        lines.append(
            _line(
                f"lesion recall, {s} subset (all lesions, pooled)",
                ">= 0.60",
                rec,
                lambda v: v >= 0.60,
            )
        )
    rec30 = pooled_recall(new)
    avd = median([r.scores.volume_difference_pct for r in big_new])
    lines += [
        _line("lesion recall, lesions >= 30 mm^3 (pooled)", ">= 0.80", rec30, lambda v: v >= 0.80),
        _line(
            "median abs. volume difference %, series >= 1 mL", "<= 25", avd, lambda v: v <= 25.0, 1
        ),
        _line(
            "largest false-positive volume mL, lesion-free series",
            "<= 0.5",
            max(free, default=math.nan),
            lambda v: v <= 0.5,
            2,
        ),
        _line(
            "median false-positive volume mL, lesion-free series",
            "<= 0.2",
            median(free),
            lambda v: v <= 0.2,
            2,
        ),
        Line(
            "in-distribution gate (held-out phantoms) passes",
            "all PASS",
            {True: "all PASS", False: "a FAIL", None: "not run"}[in_distribution],
            in_distribution,
        ),
        _line(
            f"median Dice margin over the intensity baseline (baseline {_f(base_dice)})",
            ">= 0.15",
            dice - base_dice,
            lambda v: v >= 0.15,
        ),
        _line("median ventricle Dice (issue 9 item 3)", ">= 0.85", vent, lambda v: v >= 0.85),
    ]
    return lines


def gate_table(lines: Sequence[Line]) -> str:
    """The gate as a Markdown table."""
    return markdown(
        ("criterion", "required", "measured", "result"),
        [(x.criterion, x.required, x.measured, x.result) for x in lines],
    )
