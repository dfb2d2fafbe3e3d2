"""The change report after a reprocess: how each series' result moved from one model to another.

Per series: old and new lesion volume (mL), the difference (mL and % of the old), Dice between
the old and new masks (:func:`flairwatch.research.metrics.dice`), lesions that appeared (new lesions
touching no old lesion voxel) and vanished (old lesions touching no new voxel), both from
:func:`flairwatch.research.metrics.match_lesions`. A series is flagged for review when its change
passes any of the :class:`Limits`. A corrected mask is not compared (it is a person's work and
stays the reported result); the row says the series has one.

Written as ``changes.csv`` (one row per series, units in the column names), ``summary.json``
(the distribution of changes and the flagged series) and ``report.html`` (the same with an
inline SVG scatter plot of old vs new volume; no network, no script).
"""

from __future__ import annotations

import html
import json
import statistics
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np

from flairwatch.engine import results
from flairwatch.engine.pipeline import MASK_FILE
from flairwatch.intake.load import load_nifti
from flairwatch.notice import BANNER, NOTICE_FILE, NOTICE_TEXT
from flairwatch.research.metrics import dice, match_lesions
from flairwatch.research.tables import csv_bytes

CHANGE_COLUMNS: tuple[str, ...] = (
    "subject_key", "study_key", "series_key", "old_model", "new_model",
    "old_volume_ml", "new_volume_ml", "difference_ml", "difference_pct", "dice",
    "old_lesions", "new_lesions", "lesions_appeared", "lesions_vanished",
    "has_correction", "flagged", "flag_reasons", "old_result_path", "new_result_path",
)  # fmt: skip


@dataclass(frozen=True)
class Limits:
    """When a change needs a person's look: any one limit passed flags the series.

    volume_ml : absolute volume change, mL. percent : change relative to the old volume, %
    (only when the old volume is at least ``percent_from_ml``, since tiny loads swing wildly).
    dice : Dice between old and new masks below this (only when either mask is non-empty).
    """

    volume_ml: float = 1.0
    percent: float = 30.0
    percent_from_ml: float = 0.5
    dice: float = 0.6


@dataclass(frozen=True)
class MaskChange:
    """Old vs new mask of one series on one grid. Volumes in mL."""

    old_volume_ml: float
    new_volume_ml: float
    dice: float
    old_lesions: int
    new_lesions: int
    lesions_appeared: int
    lesions_vanished: int


def compare_masks(
    old: np.ndarray, new: np.ndarray, spacing_mm: Sequence[float], connectivity: int
) -> MaskChange:
    """Compare two binary masks (I, J, K) on the same grid; ``spacing_mm`` is the voxel size."""
    if old.shape != new.shape:
        raise ValueError(f"masks differ in shape: {old.shape} vs {new.shape}")
    voxel_ml = float(np.prod(spacing_mm)) / 1000.0
    match = match_lesions(old, new, spacing_mm, connectivity=connectivity)
    n_old = int(match.reference_detected.size)
    return MaskChange(
        old_volume_ml=int(np.count_nonzero(old)) * voxel_ml,
        new_volume_ml=int(np.count_nonzero(new)) * voxel_ml,
        dice=dice(old, new),
        old_lesions=n_old,
        new_lesions=match.segmentation_lesions,
        lesions_appeared=match.segmentation_lesions - match.correct_segmentation_lesions,
        lesions_vanished=n_old - int(np.count_nonzero(match.reference_detected)),
    )


def flag_reasons(change: MaskChange, limits: Limits) -> list[str]:
    """Why a change passes the limits (empty: no review needed)."""
    reasons = []
    diff = change.new_volume_ml - change.old_volume_ml
    if abs(diff) > limits.volume_ml:
        reasons.append(f"volume changed {diff:+.2f} mL (limit {limits.volume_ml:g})")
    if change.old_volume_ml >= limits.percent_from_ml:
        pct = 100.0 * diff / change.old_volume_ml
        if abs(pct) > limits.percent:
            reasons.append(f"volume changed {pct:+.0f}% (limit {limits.percent:g}%)")
    if (change.old_volume_ml > 0 or change.new_volume_ml > 0) and change.dice < limits.dice:
        reasons.append(f"Dice {change.dice:.2f} (limit {limits.dice:g})")
    return reasons


def change_row(
    keys: dict[str, Any],
    change: MaskChange,
    limits: Limits,
    *,
    has_correction: bool,
) -> dict[str, Any]:
    """One CSV row; ``keys`` gives the key, model and path columns."""
    diff = change.new_volume_ml - change.old_volume_ml
    reasons = flag_reasons(change, limits)
    pct = 100.0 * diff / change.old_volume_ml if change.old_volume_ml > 0 else None
    return {
        **{k: keys.get(k) for k in CHANGE_COLUMNS},
        "old_volume_ml": round(change.old_volume_ml, 4),
        "new_volume_ml": round(change.new_volume_ml, 4),
        "difference_ml": round(diff, 4),
        "difference_pct": None if pct is None else round(pct, 2),
        "dice": round(change.dice, 4),
        "old_lesions": change.old_lesions,
        "new_lesions": change.new_lesions,
        "lesions_appeared": change.lesions_appeared,
        "lesions_vanished": change.lesions_vanished,
        "has_correction": int(has_correction),
        "flagged": int(bool(reasons)),
        "flag_reasons": "; ".join(reasons),
    }


def compare_folders(old_dir: Path, new_dir: Path, connectivity: int) -> MaskChange:
    """Read both result folders' masks (series grid, must agree) and compare them."""
    old = load_nifti(old_dir / MASK_FILE)
    new = load_nifti(new_dir / MASK_FILE)
    if old.shape != new.shape or not np.allclose(old.affine_lps, new.affine_lps, atol=1e-3):
        raise ValueError(f"{old_dir} and {new_dir} are not on the same grid")
    return compare_masks(old.data > 0.5, new.data > 0.5, old.spacing, connectivity)


def _quartiles(values: Sequence[float]) -> dict[str, float] | None:
    if not values:
        return None
    q = (
        statistics.quantiles(values, n=4, method="inclusive")
        if len(values) > 1
        else [values[0]] * 3
    )
    return {"min": min(values), "q1": q[0], "median": q[1], "q3": q[2], "max": max(values)}


def summarise(rows: Sequence[dict[str, Any]], limits: Limits) -> dict[str, Any]:
    """Distribution of the changes and the series flagged for review."""
    return {
        "series": len(rows),
        "flagged": len([r for r in rows if r["flagged"]]),
        "limits": asdict(limits),
        "difference_ml": _quartiles([r["difference_ml"] for r in rows]),
        "dice": _quartiles([r["dice"] for r in rows]),
        "lesions_appeared": sum(r["lesions_appeared"] for r in rows),
        "lesions_vanished": sum(r["lesions_vanished"] for r in rows),
        "flagged_series": [
            {"series_key": r["series_key"], "reasons": r["flag_reasons"]}
            for r in rows
            if r["flagged"]
        ],
        "notice": BANNER,
    }


def svg_scatter(points: Sequence[tuple[float, float, bool, str]], size: int = 360) -> str:
    """Scatter of old (x) vs new (y) volume in mL with the identity line; flagged points red."""
    pad = 44
    top = max([1e-6] + [max(x, y) for x, y, _, _ in points]) * 1.05
    span = size - 2 * pad

    def px(v: float) -> float:
        return pad + span * v / top

    def py(v: float) -> float:
        return size - pad - span * v / top

    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{size}" height="{size}" role="img" '
        'aria-label="old versus new lesion volume">',
        f'<rect x="{pad}" y="{pad}" width="{span}" height="{span}" fill="none" stroke="#888"/>',
        f'<line x1="{px(0)}" y1="{py(0)}" x2="{px(top)}" y2="{py(top)}" stroke="#bbb" '
        'stroke-dasharray="4 3"/>',
        f'<text x="{size / 2}" y="{size - 8}" text-anchor="middle" font-size="12">'
        "old volume (mL)</text>",
        f'<text x="12" y="{size / 2}" text-anchor="middle" font-size="12" '
        f'transform="rotate(-90 12 {size / 2})">new volume (mL)</text>',
        f'<text x="{pad}" y="{size - pad + 14}" font-size="10">0</text>',
        f'<text x="{size - pad}" y="{size - pad + 14}" font-size="10" text-anchor="end">'
        f"{top:.2f}</text>",
    ]
    for x, y, flagged, label in points:
        colour = "#b00020" if flagged else "#1f5fa8"
        parts.append(
            f'<circle cx="{px(x):.1f}" cy="{py(y):.1f}" r="4" fill="{colour}" '
            f'data-flagged="{int(flagged)}"><title>{html.escape(label)}</title></circle>'
        )
    parts.append("</svg>")
    return "\n".join(parts)


def render_html(rows: Sequence[dict[str, Any]], summary: dict[str, Any], title: str) -> str:
    points = [
        (r["old_volume_ml"], r["new_volume_ml"], bool(r["flagged"]), r["series_key"] or "")
        for r in rows
    ]
    flagged = "".join(
        f"<tr><td>{html.escape(str(r['series_key']))}</td><td>{r['old_volume_ml']:.2f}</td>"
        f"<td>{r['new_volume_ml']:.2f}</td><td>{r['dice']:.2f}</td>"
        f"<td>{html.escape(r['flag_reasons'])}</td></tr>"
        for r in rows
        if r["flagged"]
    )
    diff = summary["difference_ml"] or {}
    spread = ", ".join(f"{k} {v:+.2f}" for k, v in diff.items())
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f'<title>{html.escape(title)}</title></head><body style="font-family:sans-serif">\n'
        f'<p style="background:#b00020;color:#fff;padding:.4em">{html.escape(BANNER)}</p>\n'
        f"<h1>{html.escape(title)}</h1>\n"
        f"<p>{summary['series']} series compared, {summary['flagged']} flagged for review. "
        f"Volume change (mL): {html.escape(spread or 'none')}. Lesions appeared "
        f"{summary['lesions_appeared']}, vanished {summary['lesions_vanished']}.</p>\n"
        f'{svg_scatter(points)}\n<h2>Flagged for review</h2>\n<table border="1">'
        "<tr><th>series</th><th>old mL</th><th>new mL</th><th>Dice</th><th>why</th></tr>"
        f"{flagged}</table>\n<p>Every row: changes.csv.</p>\n</body></html>\n"
    )


def write_report(
    folder: Path, rows: Sequence[dict[str, Any]], limits: Limits, title: str
) -> list[Path]:
    """Write changes.csv, summary.json, report.html and the notice into ``folder`` (atomically)."""
    folder.mkdir(parents=True, exist_ok=True, mode=results.DIR_MODE)
    summary = summarise(rows, limits)
    files = {
        "changes.csv": csv_bytes(rows, CHANGE_COLUMNS),
        "summary.json": (json.dumps(summary, indent=2) + "\n").encode("utf-8"),
        "report.html": render_html(rows, summary, title).encode("utf-8"),
        NOTICE_FILE: NOTICE_TEXT.encode("utf-8"),
    }
    for name, data in files.items():
        results.write_atomic(folder / name, data)
    return [folder / n for n in files]
