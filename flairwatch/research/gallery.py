"""The QC gallery: static HTML pages for reviewing results in a browser, no server needed.

``<out>/index.html`` lists every reported series (one row each, linked to its study page);
``<out>/study-<study-key>.html`` shows one study's QC images with volumes, QC marks and
warnings; ``<out>/participant-<subject-key>.html`` (linked from each series card) shows one
participant's WMH volume over time, a small SVG chart and the table of
:mod:`flairwatch.research.longitudinal`. Both pages filter by status (unreviewed, accepted, rejected, corrected) with a few
lines of inline JavaScript; the filter can be preset in the address, e.g. ``#status=rejected``.
Images are linked by relative paths into the results folder (default ``<results>/gallery``),
never copied; the pages load nothing from the network.

The daemon calls :func:`refresh_study` after each series is done; ``flairwatch qc gallery``
calls :func:`write_gallery` for everything. Pages are written atomically.
"""

from __future__ import annotations

import html
import logging
import os
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from flairwatch.config import Identifiers, LongitudinalSettings
from flairwatch.engine import results
from flairwatch.engine.pipeline import QC_FILE
from flairwatch.errors import FlairwatchError
from flairwatch.ledger.queries import ResultRecord, reported_results
from flairwatch.ledger.store import Ledger
from flairwatch.notice import BANNER
from flairwatch.research.export import build_row, iso_date, mark_primary
from flairwatch.research.longitudinal import longitudinal_rows, parse_date
from flairwatch.research.qc_marks import corrected_measures
from flairwatch.research.volume_plot import volume_svg

log = logging.getLogger(__name__)

GALLERY_FOLDER = "gallery"  # under the results folder
INDEX_FILE = "index.html"
STATUSES = ("unreviewed", "accepted", "rejected", "corrected")
DEFAULT_CONNECTIVITY = 26

_STYLE = """
body{font-family:sans-serif;margin:1em;background:#fafafa;color:#222}
.banner{background:#b00020;color:#fff;padding:.4em .8em;font-weight:bold}
.filters label{margin-right:1em}
.cards{display:flex;flex-wrap:wrap;gap:1em}
figure{background:#fff;border:1px solid #ccc;padding:.5em;margin:0;max-width:520px}
figure img{max-width:500px;display:block}
.st-accepted{color:#1b5e20}.st-rejected{color:#b00020}.st-unreviewed{color:#555}
table{border-collapse:collapse}td,th{border:1px solid #ccc;padding:.2em .5em;text-align:left}
.warn{color:#8a4b00}
"""

# Filter by the radio buttons; preset from "#status=..." in the address; count what is shown;
# note how many images loaded (a missing QC image shows as broken, and is counted).
_SCRIPT = """
function fwFilter(s){var n=0,items=document.querySelectorAll('[data-status]');
for(var i=0;i<items.length;i++){var it=items[i];
var show=s==='all'||it.dataset.status===s||(s==='corrected'&&it.dataset.corrected==='1');
it.hidden=!show;if(show)n++;}
document.getElementById('shown').textContent=n+' of '+items.length+' shown';
var r=document.querySelector('input[value="'+s+'"]');if(r)r.checked=true;}
function fwStart(){var m=/status=(\\w+)/.exec(location.hash);fwFilter(m?m[1]:'all');
var radios=document.querySelectorAll('input[name=status]');
for(var i=0;i<radios.length;i++)radios[i].onchange=function(){fwFilter(this.value);};}
document.addEventListener('DOMContentLoaded',fwStart);
window.addEventListener('load',function(){var imgs=document.images,ok=0;
for(var i=0;i<imgs.length;i++)if(imgs[i].complete&&imgs[i].naturalWidth>0)ok++;
document.body.dataset.imagesLoaded=ok;document.body.dataset.imagesTotal=imgs.length;});
"""


@dataclass(frozen=True)
class GalleryItem:
    """What one series shows in the gallery. Volumes in mL; ``qc_image`` is an absolute path."""

    study_key: str
    series_key: str
    description: str | None
    acquisition_date: str | None
    model: str
    lesion_volume_ml: float | None
    lesion_count: int | None
    intracranial_volume_ml: float | None
    status: str
    corrected: bool
    note: str | None
    warnings: tuple[str, ...]
    qc_image: Path | None
    subject_key: str | None = None


def item_from(
    rec: ResultRecord, summary: dict[str, Any], corrected: tuple[float, int] | None
) -> GalleryItem:
    """Combine a ledger record, its summary (may be empty) and a correction's (mL, count)."""
    folder = Path(rec.result_path)
    qc_name = (summary.get("files") or {}).get("qc", QC_FILE)
    volume = summary.get("lesion_volume_ml", rec.lesion_volume_ml)
    count = summary.get("lesion_count", rec.lesion_count)
    if corrected is not None:
        volume, count = corrected
    return GalleryItem(
        study_key=rec.study_key or "unknown",
        series_key=rec.series_key or "unknown",
        description=summary.get("series_description"),
        acquisition_date=iso_date(summary.get("acquisition_date")),
        model=f"{rec.model_name} {rec.model_version}",
        lesion_volume_ml=volume,
        lesion_count=count,
        intracranial_volume_ml=summary.get("intracranial_volume_ml"),
        status=rec.qc_status,
        corrected=corrected is not None,
        note=rec.qc_note,
        warnings=tuple(summary.get("warnings") or ()),
        qc_image=folder / qc_name if summary else None,
        subject_key=rec.subject_key,
    )


def _e(value: object) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _ml(value: float | None) -> str:
    return "" if value is None else f"{value:.2f} mL"


def _status_text(item: GalleryItem) -> str:
    return item.status + (" (corrected)" if item.corrected else "")


def _attrs(item: GalleryItem) -> str:
    return f'data-status="{_e(item.status)}" data-corrected="{int(item.corrected)}"'


def _page(title: str, body: str, generated: float) -> str:
    radios = " ".join(
        f'<label><input type="radio" name="status" value="{s}">{s}</label>'
        for s in ("all", *STATUSES)
    )
    stamp = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime(generated))
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f"<title>{_e(title)}</title><style>{_STYLE}</style><script>{_SCRIPT}</script>"
        f'</head><body>\n<p class="banner">{_e(BANNER)}. Validate on your own scans; '
        "follow local rules for identifiable data.</p>\n"
        f"<h1>{_e(title)}</h1>\n<p>Generated {stamp}.</p>\n"
        f'<p class="filters">Show: {radios} <span id="shown"></span></p>\n{body}\n'
        "</body></html>\n"
    )


def render_study(
    study_key: str, items: Sequence[GalleryItem], out_dir: Path, generated: float
) -> str:
    """One study's page: a card per series with its QC image (linked relative to ``out_dir``)."""
    cards = []
    for it in items:
        img = ""
        if it.qc_image is not None:
            src = Path(os.path.relpath(it.qc_image, out_dir)).as_posix()
            img = f'<img src="{_e(src)}" alt="QC image of series {_e(it.series_key)}">'
        warnings = "".join(f'<li class="warn">{_e(w)}</li>' for w in it.warnings)
        who = ""
        if it.subject_key:
            who = (f'<a href="participant-{_e(it.subject_key)}.html">participant '
                   f"{_e(it.subject_key)}: volume over time</a><br>")  # fmt: skip
        cards.append(
            f'<figure id="{_e(it.series_key)}" {_attrs(it)}>{img}<figcaption>'
            f"<strong>{_e(it.series_key)}</strong> {_e(it.description)} {_e(it.acquisition_date)}<br>"
            f"WMH {_e(_ml(it.lesion_volume_ml))} in {_e(it.lesion_count)} lesions; "
            f"intracranial {_e(_ml(it.intracranial_volume_ml))}; model {_e(it.model)}<br>{who}"
            f'QC: <span class="st-{_e(it.status)}">{_e(_status_text(it))}</span> '
            f"{_e(it.note)}<ul>{warnings}</ul></figcaption></figure>"
        )
    body = '<p><a href="index.html">All studies</a></p>\n<div class="cards">\n'
    body += "\n".join(cards) + "\n</div>"
    return _page(f"QC review: study {study_key}", body, generated)


def render_index(items: Sequence[GalleryItem], generated: float) -> str:
    """The overview: one row per series, linked to its study page.

    It shows only what the ledger knows (plus corrected volumes), so the daemon can rewrite it
    after every series without reading every summary.
    """
    rows = []
    for it in items:
        link = f"study-{it.study_key}.html#{it.series_key}"
        rows.append(
            f'<tr {_attrs(it)}><td><a href="{_e(link)}">{_e(it.study_key)}</a></td>'
            f"<td>{_e(it.series_key)}</td><td>{_e(_ml(it.lesion_volume_ml))}</td>"
            f"<td>{_e(it.lesion_count)}</td><td>{_e(it.model)}</td>"
            f'<td class="st-{_e(it.status)}">{_e(_status_text(it))}</td></tr>'
        )
    head = (
        "<tr><th>study</th><th>series</th><th>WMH volume</th><th>lesions</th><th>model</th>"
        "<th>QC</th></tr>"
    )
    body = f"<table>\n{head}\n" + "\n".join(rows) + "\n</table>"
    return _page("QC review: all series", body, generated)


_FLAG_TEXT = {
    "flag_drop": "volume drop",
    "flag_rejected": "rejected in QC",
    "flag_model_changed": "other model than the scan before",
    "flag_no_date": "no date",
}
# the participant pages show no identifiers, so no pseudonym key is ever needed
_NO_IDS = Identifiers(patient_id="drop", patient_name="drop", dates="keep")


def _flags(row: dict[str, Any]) -> list[str]:
    return [text for key, text in _FLAG_TEXT.items() if row.get(key)]


def render_participant(subject: str, rows: Sequence[dict[str, Any]], generated: float) -> str:
    """One participant's page: the volume-over-time chart and the longitudinal rows."""
    points = [
        (when, float(r["lesion_volume_ml"]), bool(_flags(r)))
        for r in rows
        if (when := parse_date(r.get("scan_date"))) and r.get("lesion_volume_ml") is not None
    ]
    chart = volume_svg(points, title=f"WMH volume over time, participant {subject}")
    lines = []
    for r in rows:
        link = f"study-{r.get('study_key')}.html#{r.get('series_key')}"
        change, per_year = r.get("change_ml"), r.get("change_ml_per_year")
        lines.append(
            f'<tr data-status="{_e(r.get("qc_status"))}" '
            f'data-corrected="{int(r.get("mask_source") == "corrected")}">'
            f"<td>{_e(r.get('scan_date') or 'no date')}</td>"
            f'<td><a href="{_e(link)}">{_e(r.get("study_key"))}</a></td>'
            f"<td>{_e(_ml(r.get('lesion_volume_ml')))}</td>"
            f"<td>{_e('' if change is None else f'{change:+.2f} mL')}</td>"
            f"<td>{_e('' if per_year is None else f'{per_year:+.2f} mL/year')}</td>"
            f"<td>{_e(r.get('qc_status'))}</td><td>{_e(r.get('model_name'))} "
            f"{_e(r.get('model_version'))}</td>"
            f'<td class="warn">{_e(", ".join(_flags(r)))}</td></tr>'
        )
    head = (
        "<tr><th>date</th><th>study</th><th>WMH volume</th><th>change</th><th>per year</th>"
        "<th>QC</th><th>model</th><th>flags</th></tr>"
    )
    body = (
        '<p><a href="index.html">All studies</a></p>\n'
        f"{chart}\n<table>\n{head}\n" + "\n".join(lines) + "\n</table>\n"
        "<p>One row per study (its primary FLAIR), corrected masks where a reviewer attached "
        "one. A change smaller than the method's repeatability means nothing; a flagged scan "
        "needs a look before it enters an analysis.</p>"
    )
    return _page(f"Participant {subject}: WMH volume over time", body, generated)


def participant_histories(
    ledger: Ledger,
    *,
    connectivity: int = DEFAULT_CONNECTIVITY,
    subject_key: str | None = None,
    settings: LongitudinalSettings | None = None,
) -> dict[str, list[dict[str, Any]]]:
    """Longitudinal rows per participant (of one, or all), read from the ledger and summaries."""
    rows = []
    for rec in reported_results(ledger):
        if not rec.subject_key or subject_key not in (None, rec.subject_key):
            continue
        folder = Path(rec.result_path)
        summary = results.read_summary(folder) if results.is_complete(folder) else {}
        correction = None
        if rec.correction_path:
            correction = corrected_measures(Path(rec.correction_path), connectivity)
        rows.append(build_row(rec, summary, correction, _NO_IDS, lambda: b""))
    out: dict[str, list[dict[str, Any]]] = {}
    for row in longitudinal_rows(mark_primary(rows), settings or LongitudinalSettings()):
        out.setdefault(str(row["subject_key"]), []).append(row)
    return out


def _write_participants(
    out_dir: Path, histories: dict[str, list[dict[str, Any]]], now: float
) -> list[Path]:
    pages = []
    for subject, rows in sorted(histories.items()):
        page = out_dir / f"participant-{subject}.html"
        results.write_atomic(page, render_participant(subject, rows, now).encode("utf-8"))
        pages.append(page)
    return pages


def gather_items(
    ledger: Ledger,
    *,
    connectivity: int = DEFAULT_CONNECTIVITY,
    study_key: str | None = None,
    summaries: bool = True,
) -> list[GalleryItem]:
    """Reported series as gallery items, of one study or all.

    With ``summaries`` each result's summary.json is read (description, date, warnings, QC
    image); without, only the ledger and corrected masks are.
    """
    items = []
    for rec in reported_results(ledger):
        if study_key is not None and rec.study_key != study_key:
            continue
        folder = Path(rec.result_path)
        summary = results.read_summary(folder) if summaries and results.is_complete(folder) else {}
        corrected = None
        if rec.correction_path:
            m = corrected_measures(Path(rec.correction_path), connectivity)
            corrected = (round(m.lesion_volume_ml, 4), m.lesion_count)
        items.append(item_from(rec, summary, corrected))
    return items


def _write_study(out_dir: Path, study: str, items: Sequence[GalleryItem], now: float) -> Path:
    page = out_dir / f"study-{study}.html"
    results.write_atomic(page, render_study(study, items, out_dir, now).encode("utf-8"))
    return page


def _write_index(out_dir: Path, items: Sequence[GalleryItem], now: float) -> Path:
    page = out_dir / INDEX_FILE
    results.write_atomic(page, render_index(items, now).encode("utf-8"))
    return page


def write_gallery(
    ledger: Ledger,
    out_dir: Path,
    *,
    connectivity: int = DEFAULT_CONNECTIVITY,
    longitudinal: LongitudinalSettings | None = None,
    now: float,
) -> list[Path]:
    """Write the index, every study page and every participant page into ``out_dir``.

    ``longitudinal`` holds the drop thresholds of the participant pages (None: the defaults).
    Returns the pages written.
    """
    out_dir.mkdir(parents=True, exist_ok=True, mode=results.DIR_MODE)
    items = gather_items(ledger, connectivity=connectivity)
    by_study: dict[str, list[GalleryItem]] = {}
    for it in items:
        by_study.setdefault(it.study_key, []).append(it)
    pages = [_write_study(out_dir, study, group, now) for study, group in sorted(by_study.items())]
    histories = participant_histories(ledger, connectivity=connectivity, settings=longitudinal)
    pages += _write_participants(out_dir, histories, now)
    return [*pages, _write_index(out_dir, items, now)]


def refresh_study(
    ledger: Ledger,
    out_dir: Path,
    series_id: int,
    *,
    connectivity: int = DEFAULT_CONNECTIVITY,
    longitudinal: LongitudinalSettings | None = None,
    now: float,
) -> list[Path]:
    """After a series is done: rewrite its study's page and the index (for the daemon).

    Reads the summaries of that study only. Failures are logged and swallowed: the gallery
    must never stop processing.
    """
    rows = ledger.query("SELECT study_key, subject_key FROM series WHERE id = ?", (series_id,))
    if not rows:
        return []
    study = rows[0][0] or "unknown"
    try:
        out_dir.mkdir(parents=True, exist_ok=True, mode=results.DIR_MODE)
        items = gather_items(ledger, connectivity=connectivity, study_key=study)
        page = _write_study(out_dir, study, items, now)
        history = {}
        if rows[0][1]:
            history = participant_histories(
                ledger, connectivity=connectivity, subject_key=rows[0][1], settings=longitudinal
            )
        people = _write_participants(out_dir, history, now)
        index = gather_items(ledger, connectivity=connectivity, summaries=False)
        return [page, *people, _write_index(out_dir, index, now)]
    except (OSError, FlairwatchError) as exc:
        log.warning("gallery %s not updated: %s", out_dir, exc)
        return []
