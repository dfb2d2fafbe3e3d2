"""The review pages as HTML text: pure functions of what the ledger and the result folder hold.

Every page carries the research-only banner; every value from the ledger, a summary or a note
is escaped. Links are relative to the application's root and never carry the access token.
"""

from __future__ import annotations

import html
import time
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any
from urllib.parse import urlencode

from flairwatch.notice import BANNER
from flairwatch.review.assets import SERIES_SCRIPT, STYLE
from flairwatch.review.queue import STATUSES, Decision, Filters, QueueItem
from flairwatch.review.viewer import LAYER_COLOURS, LAYER_LABELS

CAUTION = (
    f"{BANNER}. Validate any model on your own scans; follow local rules for identifiable data."
)
KEYS_HELP = (
    "Keys: a accept, r reject, n note (Esc leaves it), j/Down next slice, k/Up previous slice, "
    "o outlines on/off, Space/Right next series, Left previous series."
)
# summary facts shown on the series page: (key, label); volumes in mL
VOLUME_FACTS = (
    ("lesion_volume_ml", "WMH volume (mL)"),
    ("lesion_count", "lesions"),
    ("intracranial_volume_ml", "intracranial volume (mL)"),
    ("wmh_fraction_of_intracranial", "WMH fraction of intracranial volume"),
    ("ventricle_volume_ml", "ventricle volume (mL)"),
    ("periventricular_volume_ml", "periventricular WMH (mL)"),
    ("deep_volume_ml", "deep WMH (mL)"),
)


def e(value: object) -> str:
    """Escaped text ('' for None)."""
    return html.escape("" if value is None else str(value), quote=True)


def stamp(when: float) -> str:
    return time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(when))


def series_url(key: str, f: Filters) -> str:
    """The series page's address, keeping the queue's filters (for next and previous)."""
    q = f.query()
    return f"/series/{key}" + (f"?{urlencode(q)}" if q else "")


def queue_url(f: Filters) -> str:
    q = f.query()
    return "/" + (f"?{urlencode(q)}" if q else "")


def _reviewer_form(reviewer: str | None, back: str) -> str:
    label = "Reviewer" if reviewer else "Your name (kept with every decision)"
    return (
        f'<form method="post" action="/reviewer" class="who">{label}: '
        f'<input type="text" id="name" name="name" value="{e(reviewer)}" maxlength="64" required>'
        f'<input type="hidden" name="next" value="{e(back)}"> <button type="submit">'
        f"{'change' if reviewer else 'save'}</button></form>"
    )


def page(title: str, body: str, *, reviewer: str | None, back: str = "/", script: str = "") -> str:
    """A whole page: banner, title, reviewer's name, ``body``, banner again at the foot."""
    head = f"<style>{STYLE}</style>"
    tail = f"<script>{script}</script>" if script else ""
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f"<title>{e(title)}</title>{head}</head><body>\n"
        f'<p class="banner" id="banner">{e(CAUTION)}</p>\n'
        f'<header><a href="/">Queue</a> {_reviewer_form(reviewer, back)}</header>\n'
        f"<main><h1>{e(title)}</h1>\n{body}\n</main>\n"
        f'<footer class="banner">{e(BANNER)}</footer>{tail}</body></html>\n'
    )


def render_error(status: int, message: str) -> str:
    """An error page: the status, one line saying what happened and what to do."""
    body = f'<p id="error">{e(message)}</p><p><a href="/">Back to the queue</a></p>'
    return page(f"{status}: not possible", body, reviewer=None)


def render_login(problem: str | None) -> str:
    """The password form (only served when ``review.password`` is set)."""
    note = f'<p id="error">{e(problem)}</p>' if problem else ""
    body = (
        f'{note}<form method="post" action="/login"><label>Password: '
        '<input type="password" name="password" autofocus></label> '
        '<button type="submit">log in</button></form>'
    )
    return page("Log in to the review", body, reviewer=None)


def _status(item: QueueItem) -> str:
    extra = " (corrected)" if item.corrected else ""
    return f'<span class="st-{e(item.status)}">{e(item.status)}</span>{extra}'


def _ml(value: float | None) -> str:
    return "" if value is None else f"{value:.2f}"


def _filters_form(f: Filters, studies: Sequence[str]) -> str:
    status = "".join(
        f'<option value="{s}"{" selected" if s == f.status else ""}>{s}</option>' for s in STATUSES
    )
    study = '<option value="">all studies</option>' + "".join(
        f'<option value="{e(s)}"{" selected" if s == f.study else ""}>{e(s)}</option>'
        for s in studies
    )
    return (
        '<form method="get" action="/" id="filters">'
        f'<label>Status <select name="status">{status}</select></label> '
        f'<label>Study <select name="study">{study}</select></label> '
        f'<label>From <input type="date" name="from" value="{e(f.date_from)}"></label> '
        f'<label>To <input type="date" name="to" value="{e(f.date_to)}"></label> '
        '<button type="submit">show</button></form>'
    )


def render_queue(
    items: Sequence[QueueItem], shown: Sequence[QueueItem], f: Filters, reviewer: str | None
) -> str:
    """The queue: the filters, then one row per series shown, each linked to its page."""
    studies = sorted({it.study_key for it in items})
    rows = []
    for it in shown:
        dispute = (
            f'<br><span class="dispute">{e(it.disagreement)}</span>' if it.disagreement else ""
        )
        rows.append(
            f'<tr data-key="{e(it.series_key)}" data-status="{e(it.status)}">'
            f'<td><a href="{e(series_url(it.series_key, f))}">{e(it.series_key)}</a></td>'
            f"<td>{e(it.study_key)}</td><td>{e(it.date)}</td><td>{e(it.description)}</td>"
            f"<td>{e(_ml(it.volume_ml))}</td><td>{e(it.lesion_count)}</td><td>{e(it.model)}</td>"
            f"<td>{_status(it)}{dispute}</td></tr>"
        )
    first = (
        f'<p><a id="start" href="{e(series_url(shown[0].series_key, f))}">Start reviewing '
        "(the first series shown)</a></p>"
        if shown
        else '<p id="empty">No series match these filters.</p>'
    )
    body = (
        _filters_form(f, studies)
        + f'<p id="count">{len(shown)} of {len(items)} series shown.</p>{first}'
        + "<table><tr><th>series</th><th>study</th><th>date</th><th>description</th>"
        + "<th>WMH (mL)</th><th>lesions</th><th>model</th><th>QC</th></tr>\n"
        + "\n".join(rows)
        + "</table>"
    )
    return page("QC review queue", body, reviewer=reviewer, back=queue_url(f))


def render_history(decisions: Sequence[Decision], result_id: int) -> str:
    """The decision history, newest first; decisions on another model result say so."""
    if not decisions:
        return '<p class="muted">No decision yet.</p>'
    rows = []
    for d in decisions:
        other = "" if d.result_id == result_id else " (another model result)"
        rows.append(
            f'<tr data-mark="{e(d.mark)}"><td>{e(stamp(d.when))}</td><td>{e(d.by)}</td>'
            f'<td class="st-{e(d.mark)}">{e(d.mark)}</td><td>{e(d.note)}</td>'
            f"<td>{e(d.model)}{other}</td></tr>"
        )
    return (
        "<table><tr><th>when</th><th>reviewer</th><th>decision</th><th>note</th><th>model</th></tr>"
        + "".join(rows)
        + "</table>"
    )


def render_dispute(text: str | None) -> str:
    return f'<p class="dispute" id="dispute-line">{e(text)}</p>' if text else ""


@dataclass(frozen=True)
class SeriesPage:
    """Everything the series page shows (built by the application from the ledger and files)."""

    item: QueueItem
    result_id: int
    version: str
    depth: int
    start: int
    level: float
    width: float
    layers: tuple[str, ...]
    lesion_slices: tuple[int, ...]
    source: str
    summary: dict[str, Any]
    lesion_header: Sequence[str]
    lesion_rows: Sequence[Sequence[str]]
    history: Sequence[Decision]
    dispute: str | None
    prev_url: str | None
    next_url: str | None
    filters: Filters


def _controls(p: SeriesPage) -> str:
    boxes = "".join(
        f'<label><input type="checkbox" data-layer="{name}" checked> '
        f'<span style="color:rgb{LAYER_COLOURS[name]}">&#9632;</span> {e(LAYER_LABELS[name])}'
        "</label>"
        for name in LAYER_COLOURS
        if name in p.layers
    )
    missing = [LAYER_LABELS[n] for n in LAYER_COLOURS if n not in p.layers and n != "correction"]
    absent = f'<p class="muted">Not in this result: {e(", ".join(missing))}.</p>' if missing else ""
    step = max(p.width / 200.0, 1e-6)
    return (
        f'<div class="controls">{boxes}{absent}'
        f'<label>Fill opacity <input type="range" id="opacity" min="0" max="100" value="0"></label>'
        f'<label>Level <input type="number" id="level" value="{p.level:.6g}" step="{step:.3g}">'
        f'</label><label>Width <input type="number" id="width" value="{p.width:.6g}" '
        f'step="{step:.3g}" min="0"></label></div>'
    )


def _volumes(p: SeriesPage) -> str:
    rows = "".join(
        f"<tr><th>{e(label)}</th><td>{e(p.summary.get(key))}</td></tr>"
        for key, label in VOLUME_FACTS
        if p.summary.get(key) is not None
    )
    warnings = "".join(f"<li>{e(w)}</li>" for w in p.summary.get("warnings") or ())
    return f"<table id='volumes'>{rows}</table>" + (f"<ul>{warnings}</ul>" if warnings else "")


def _lesions(p: SeriesPage) -> str:
    if not p.lesion_header:
        return '<p class="muted">No lesion table in this result.</p>'
    head = "".join(f"<th>{e(h)}</th>" for h in p.lesion_header)
    rows = "".join("<tr>" + "".join(f"<td>{e(c)}</td>" for c in r) + "</tr>" for r in p.lesion_rows)
    return f"<table id='lesions'><tr>{head}</tr>{rows}</table>"


def render_series(p: SeriesPage, reviewer: str | None) -> str:
    """One series: the slice viewer, decisions with their history, volumes, lesion table."""
    it = p.item
    key = it.series_key
    here = series_url(key, p.filters)
    lesion_at = ", ".join(str(k + 1) for k in p.lesion_slices[:40]) or "none"
    viewer = (
        f'<div id="viewer" data-key="{e(key)}" data-depth="{p.depth}" data-start="{p.start}" '
        f'data-version="{e(p.version)}" data-slice-base="/series/{e(key)}/slice/" '
        f'data-next="{e(p.next_url or "")}" data-prev="{e(p.prev_url or "")}">'
        f'<img id="slice" alt="slice of series {e(key)}" width="512">'
        f'<p><input type="range" id="k" min="0" max="{p.depth - 1}" value="{p.start}" '
        f'style="width:512px"><br><span id="pos"></span>; WMH on slices {e(lesion_at)}</p>'
        f'<p class="muted">Radiological view (patient right on image left, anterior at top), '
        f"slices numbered feet to head. Image: {e(p.source)}.</p></div>"
    )
    named = "1" if reviewer else "0"
    decide = (
        f'<div id="decide" data-named="{named}" data-result="{p.result_id}" '
        f'data-action="/series/{e(key)}/decision">'
        f'<p>QC now: <span id="status" class="st-{e(it.status)}">{e(it.status)}</span></p>'
        f'<div id="dispute">{render_dispute(p.dispute)}</div>'
        '<button type="button" id="accept">Accept (a)</button>'
        '<button type="button" id="reject">Reject (r)</button>'
        '<button type="button" id="note-button">Note (n)</button>'
        '<button type="button" id="prev">Previous (&larr;)</button>'
        '<button type="button" id="next">Next (Space)</button>'
        '<p><textarea id="note" rows="2" maxlength="2000" '
        'placeholder="note kept with the next decision"></textarea></p>'
        '<label><input type="checkbox" id="auto"> go on to the next series after a decision'
        '</label><p id="msg" role="status"></p></div>'
    )
    facts = (
        f"<p>Study {e(it.study_key)}, {e(it.date)}, {e(it.description)}; model {e(it.model)}"
        + ("; a corrected mask exists (yellow)" if it.corrected else "")
        + "</p>"
    )
    body = (
        f'{facts}<div class="layout"><div class="view">{viewer}</div><div class="side">'
        f"{_controls(p)}{decide}<p class='keys'>{e(KEYS_HELP)}</p>"
        f'<h2>Decisions</h2><div id="history">{render_history(p.history, p.result_id)}</div>'
        f"<h2>Volumes</h2>{_volumes(p)}</div></div>"
        f"<h2>Lesions</h2>{_lesions(p)}"
        f'<p><a href="{e(queue_url(p.filters))}">Back to the queue</a></p>'
    )
    return page(f"Series {key}", body, reviewer=reviewer, back=here, script=SERIES_SCRIPT)
