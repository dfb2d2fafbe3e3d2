"""The output folder of ``flairwatch validate``: per-case CSV, summary JSON, Markdown report, plots.

Figures come from :mod:`flairwatch.research.validate` (definitions of the 2019 IEEE TMI WMH segmentation
challenge paper, via :mod:`flairwatch.research.metrics`). The folder is built under a temporary name and
swapped into place, so readers never see a half-written report. Every file that shows figures
also shows the research-only caution.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import shutil
import uuid
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

from flairwatch import __version__
from flairwatch.engine.pipeline import Engine
from flairwatch.engine.qc_image import save_png
from flairwatch.engine.results import fsync_path
from flairwatch.errors import ConfigInvalid
from flairwatch.notice import BANNER, NOTICE_FILE, NOTICE_TEXT
from flairwatch.research import metrics
from flairwatch.research.report_plots import markdown_table, scatter_log_x, strip_by_group
from flairwatch.research.scoring import (
    LARGE_LESION_MM3,
    CaseFailure,
    CaseResult,
    json_safe,
    summarise_results,
)

# Per-case CSV columns, in order (names are ours; definitions in the module docstring).
CASE_COLUMNS: tuple[str, ...] = (
    "case",
    "acquisition",
    "field_strength_t",
    "load_bin",
    "reference_ml",
    "segmented_ml",
    "dice",
    "hd95_mm",
    "abs_volume_diff_pct",
    "false_positive_ml",
    "lesion_f1",
    "lesion_recall",
    "reference_lesions",
    "detected_lesions",
    "lesion_recall_30mm3",
    "reference_lesions_30mm3",
    "detected_lesions_30mm3",
    "intracranial_dice",
    "ventricles_dice",
    "seconds",
    "warnings",
)


def case_row(r: CaseResult) -> dict[str, object]:
    """One CSV row (keys :data:`CASE_COLUMNS`); NaN becomes an empty cell, floats are rounded."""

    def num(x: float, digits: int = 4) -> object:
        return "" if math.isnan(x) else round(x, digits)

    s = r.scores
    return {
        "case": r.case_id,
        "acquisition": r.acquisition or "",
        "field_strength_t": "" if r.field_strength_t is None else r.field_strength_t,
        "load_bin": s.load_bin,
        "reference_ml": num(s.reference_ml),
        "segmented_ml": num(s.segmentation_ml),
        "dice": num(s.dice),
        "hd95_mm": num(s.hd95_mm, 2),
        "abs_volume_diff_pct": num(s.volume_difference_pct, 2),
        "false_positive_ml": num(s.false_positive_ml),
        "lesion_f1": num(s.lesion_f1),
        "lesion_recall": num(s.lesion_recall),
        "reference_lesions": s.reference_lesions,
        "detected_lesions": s.detected_lesions,
        "lesion_recall_30mm3": num(r.large_lesion_recall),
        "reference_lesions_30mm3": r.large_reference_lesions,
        "detected_lesions_30mm3": r.large_detected_lesions,
        "intracranial_dice": num(r.intracranial_dice),
        "ventricles_dice": num(r.ventricles_dice),
        "seconds": round(r.seconds, 2),
        "warnings": " | ".join(r.warnings),
    }


OUTPUT_KIND = "flairwatch validation"
CASES_CSV = "cases.csv"
SUMMARY_JSON = "summary.json"
REPORT_MD = "report.md"
DICE_VOLUME_PNG = "dice_vs_volume.png"
DICE_LOAD_PNG = "dice_by_load_bin.png"

GROUP_HEADER = (
    "group",
    "cases",
    "median Dice",
    "median HD95 (mm)",
    "median abs. volume diff. (%)",
    "lesion recall (pooled)",
    "lesion recall >= 30 mm^3 (pooled)",
    "median false-positive volume (mL)",
    "median intracranial Dice",
)


CASE_TABLE_LIMIT = 200
CASE_HEADER = (
    "case",
    "acquisition",
    "load bin",
    "reference (mL)",
    "segmented (mL)",
    "Dice",
    "HD95 (mm)",
    "lesions >= 30 mm^3 found",
    "intracranial Dice",
)


def _fmt(value: Any, digits: int = 3) -> object:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return None
    if isinstance(value, float):
        return f"{value:.{digits}f}"
    return value


def group_rows(groups: Mapping[str, Mapping[str, Any]]) -> list[list[object]]:
    """Table rows (columns :data:`GROUP_HEADER`) from :func:`group_figures` dicts."""
    return [
        [
            name,
            g["cases"],
            _fmt(g["median_dice"]),
            _fmt(g["median_hd95_mm"], 1),
            _fmt(g["median_volume_difference_pct"], 1),
            _fmt(g["pooled_lesion_recall"]),
            _fmt(g["pooled_lesion_recall_30mm3"]),
            _fmt(g["median_false_positive_ml"], 2),
            _fmt(g["median_intracranial_dice"]),
        ]
        for name, g in groups.items()
    ]


def report_markdown(
    document: Mapping[str, Any],
    failures: Sequence[CaseFailure],
    results: Sequence[CaseResult] = (),
) -> str:
    """The short Markdown report: caution, settings, tables by load bin and acquisition, plots.

    Up to ``CASE_TABLE_LIMIT`` cases are listed one per row (the CSV always has them all).
    """
    model = document["model"]
    lines = [
        f"# Validation of {model['name']} {model['version']}",
        "",
        f"**{BANNER}.** These figures describe agreement with the reference masks of these cases "
        "only. They do not show that the model is fit for any clinical purpose; validate on your "
        "own labelled scans and follow your local rules.",
        "",
        f"Cases scored: {document['cases_scored']}; failed: {document['cases_failed']}. "
        f"Threshold {document['threshold']}, minimum lesion {document['min_lesion_mm3']} mm^3, "
        f"{document['connectivity']}-connected lesions.",
        "",
        "Definitions as in the 2019 IEEE TMI WMH segmentation challenge paper (excluded "
        "voxels not scored). Medians over cases; lesion recall pooled over all reference lesions.",
        "",
        "## All cases",
        "",
        markdown_table(GROUP_HEADER, group_rows({"all": document["overall"]})),
        "## By reference lesion load (mL)",
        "",
        markdown_table(GROUP_HEADER, group_rows(document["by_load_bin"])),
        "## By acquisition",
        "",
        markdown_table(GROUP_HEADER, group_rows(document["by_acquisition"])),
        "## Plots",
        "",
        f"![Dice against reference volume]({DICE_VOLUME_PNG})",
        "",
        f"![Dice by lesion-load bin]({DICE_LOAD_PNG})",
        "",
        f"Per-case figures: [{CASES_CSV}]({CASES_CSV}); all figures: [{SUMMARY_JSON}]({SUMMARY_JSON}).",
        "",
    ]
    if results:
        shown = results[:CASE_TABLE_LIMIT]
        lines += ["## Cases", ""]
        if len(results) > len(shown):
            lines += [f"The first {len(shown)} of {len(results)} cases; see {CASES_CSV}.", ""]
        lines.append(
            markdown_table(
                CASE_HEADER,
                [
                    [
                        r.case_id,
                        r.acquisition,
                        r.scores.load_bin,
                        _fmt(r.scores.reference_ml, 2),
                        _fmt(r.scores.segmentation_ml, 2),
                        _fmt(r.scores.dice),
                        _fmt(r.scores.hd95_mm, 1),
                        f"{r.large_detected_lesions}/{r.large_reference_lesions}",
                        _fmt(r.intracranial_dice),
                    ]
                    for r in shown
                ],
            )
        )
    if failures:
        lines += ["## Cases that could not be scored", ""]
        lines += [f"- `{f.case_id}`: {f.message}" for f in failures]
        lines.append("")
    return "\n".join(lines)


def _csv_bytes(results: Sequence[CaseResult]) -> bytes:

    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=list(CASE_COLUMNS), lineterminator="\n")
    writer.writeheader()
    writer.writerows(case_row(r) for r in results)
    return buf.getvalue().encode("utf-8")


def write_report_files(
    folder: Path,
    results: Sequence[CaseResult],
    failures: Sequence[CaseFailure],
    document: Mapping[str, Any],
) -> None:
    """Write the CSV, JSON, Markdown, plots and notice into an existing empty ``folder``."""

    (folder / CASES_CSV).write_bytes(_csv_bytes(results))
    (folder / NOTICE_FILE).write_text(NOTICE_TEXT, encoding="utf-8")
    by_kind: dict[str, list[tuple[float, float]]] = {}
    for r in results:
        by_kind.setdefault(r.acquisition or "unknown", []).append(
            (r.scores.reference_ml, r.scores.dice)
        )
    save_png(
        scatter_log_x(
            by_kind,
            title="Dice per case against reference lesion volume (lesion-free cases not shown)",
            x_label="reference lesion volume (mL, log scale)",
            y_label="Dice",
        ),
        folder / DICE_VOLUME_PNG,
    )
    groups = [
        (name, [r.scores.dice for r in results if r.scores.load_bin == name])
        for name in metrics.LOAD_BIN_NAMES
    ]
    save_png(
        strip_by_group(groups, title="Dice per case by reference lesion load (mL)", y_label="Dice"),
        folder / DICE_LOAD_PNG,
    )
    (folder / REPORT_MD).write_text(report_markdown(document, failures, results), encoding="utf-8")
    # summary last: its presence marks a complete folder
    (folder / SUMMARY_JSON).write_text(
        json.dumps(json_safe(dict(document)), indent=2, sort_keys=True) + "\n", encoding="utf-8"
    )


def _is_previous_output(folder: Path) -> bool:
    try:
        doc = json.loads((folder / SUMMARY_JSON).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(doc, Mapping) and doc.get("kind") == OUTPUT_KIND


def check_output_folder(out: Path, cases_root: Path) -> None:
    """Refuse an output folder inside the cases folder, or an existing folder of other files."""
    o, c = out.resolve(), cases_root.resolve()
    if o == c or c in o.parents:
        raise ConfigInvalid(f"--out {out} lies inside --cases {cases_root}; choose another folder")
    if out.exists() and not (out.is_dir() and _is_previous_output(out)):
        raise ConfigInvalid(
            f"--out {out} exists and is not an earlier validation output; choose another folder"
        )


def publish_folder(out: Path, fill: Callable[[Path], None]) -> None:
    """Build ``out`` under a temporary name beside it, then swap it into place.

    An earlier output in ``out`` (checked by :func:`check_output_folder`) is replaced: it is
    renamed aside, the new folder renamed in, and the old one removed, so a reader sees either
    the old or the new complete folder (or, for an instant, none), never a half-written one.
    """

    out.parent.mkdir(parents=True, exist_ok=True)
    tag = uuid.uuid4().hex[:8]
    tmp = out.parent / f".{out.name}.building-{tag}"
    tmp.mkdir()
    try:
        fill(tmp)
        for item in tmp.iterdir():
            with open(item, "rb") as fh:
                os.fsync(fh.fileno())
        fsync_path(tmp)
        old = out.parent / f".{out.name}.old-{tag}"
        if out.exists():
            os.rename(out, old)
        os.rename(tmp, out)
        fsync_path(out.parent)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    shutil.rmtree(old, ignore_errors=True)


def validation_document(
    engine: Engine,
    results: Sequence[CaseResult],
    failures: Sequence[CaseFailure],
    cases_root: Path,
) -> dict[str, Any]:
    """Everything ``summary.json`` holds (NaN still in; :func:`json_safe` converts)."""

    m = engine.manifest
    return {
        "kind": OUTPUT_KIND,
        "notice": BANNER,
        "cases_folder": str(cases_root),
        "model": {"name": m.name, "version": m.version, "sha256": m.sha256},
        "threshold": engine.threshold,
        "min_lesion_mm3": engine.cfg.min_lesion_mm3,
        "connectivity": engine.cfg.connectivity,
        "large_lesion_mm3": LARGE_LESION_MM3,
        "cases_scored": len(results),
        "cases_failed": len(failures),
        "failures": [{"case": f.case_id, "error": f.message} for f in failures],
        **summarise_results(results),
        "flairwatch_version": __version__,
    }
