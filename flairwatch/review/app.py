"""The review web application (Flask): routes, access checks, decisions into the ledger.

Flask lives only here; what the pages show is built by the pure modules beside it. Every
request passes :func:`_check_access` first: the run's token (from ``?token=`` on the first
visit, then a cookie) or, with ``review.password`` set, a log-in. A wrong or missing token gets
403 and changes nothing. Series keys in URLs must have the shape flairwatch makes
(:func:`flairwatch.review.access.is_series_key`) and be known to the ledger, else 404; URLs are
never turned into file paths. Decisions are recorded with
:func:`flairwatch.research.qc_marks.mark_result`, the function ``flairwatch qc mark`` calls, so
they appear at once wherever marks are read (``export``); when the static gallery exists, its
pages of that study and its index are rewritten after each decision.

The ledger is opened per request (one SQLite connection per thread): read-only for pages and
slices, for writing only while a decision is recorded.
"""

from __future__ import annotations

import logging
import math
import time
import zlib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import quote, unquote, urlencode

from flask import Flask, Response, abort, jsonify, redirect, request
from flask.typing import ResponseReturnValue
from werkzeug.exceptions import HTTPException
from werkzeug.serving import BaseWSGIServer, make_server

from flairwatch.config import LongitudinalSettings, ReviewSettings
from flairwatch.errors import ConfigInvalid
from flairwatch.ledger.queries import QC_MARKS, ResultRecord, find_result
from flairwatch.ledger.store import Ledger
from flairwatch.research.gallery import DEFAULT_CONNECTIVITY, INDEX_FILE, refresh_study
from flairwatch.research.qc_marks import mark_result
from flairwatch.review import pages
from flairwatch.review.access import clean_name, clean_note, is_series_key, secret_matches
from flairwatch.review.loading import ViewCache, lesion_table, load_view, summary_of
from flairwatch.review.queue import (
    disagreement,
    gather,
    history,
    item_of,
    neighbours,
    parse_filters,
    select,
)
from flairwatch.review.viewer import LAYER_COLOURS, SeriesView, SliceSettings, slice_png

log = logging.getLogger(__name__)

ACCESS_COOKIE = "flairwatch_review"
NAME_COOKIE = "flairwatch_reviewer"
NAME_DAYS = 365
WRONG_PASSWORD_PAUSE_S = 1.0  # slows guessing
SECURITY_HEADERS = {
    # the pages' own inline style and script only; nothing from elsewhere, no framing
    "Content-Security-Policy": (
        "default-src 'none'; img-src 'self'; style-src 'unsafe-inline'; "
        "script-src 'unsafe-inline'; connect-src 'self'; form-action 'self'; "
        "frame-ancestors 'none'; base-uri 'none'"
    ),
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "X-Frame-Options": "DENY",
}


@dataclass
class Site:
    """What the application serves: the ledger's folder, the run's token, the settings."""

    state: Path
    token: str
    settings: ReviewSettings = field(default_factory=ReviewSettings)
    cache: ViewCache = field(default_factory=ViewCache)
    gallery: Path | None = (
        None  # the static gallery's folder: its pages are rewritten on a decision
    )
    connectivity: int = DEFAULT_CONNECTIVITY
    longitudinal: LongitudinalSettings = field(default_factory=LongitudinalSettings)

    @property
    def tls(self) -> bool:
        return self.settings.tls_cert is not None


def _fail(status: int, message: str) -> Response:
    """An error answer: JSON for the page's script, a page with the banner otherwise."""
    if request.accept_mimetypes.best == "application/json":
        resp = jsonify(error=message)
    else:
        resp = Response(pages.render_error(status, message), mimetype="text/html")
    resp.status_code = status
    return resp


def _reviewer() -> str | None:
    return clean_name(unquote(request.cookies.get(NAME_COOKIE, "")))


def _record(ledger: Ledger, key: str) -> ResultRecord:
    """The current result of the series ``key``; 404 for anything that is not one."""
    if not is_series_key(key):
        abort(404, f"no series {key!r}: series keys look like e0123456789ab")
    try:
        return find_result(ledger, key)
    except ConfigInvalid:
        abort(404, f"no result for series {key} in the ledger; pick one from the queue")


def _view(site: Site, ledger: Ledger, rec: ResultRecord) -> SeriesView:
    return site.cache.get(rec, lambda: load_view(ledger, rec))


def _version(rec: ResultRecord) -> str:
    """Changes when the shown result or its correction changes (keeps cached slices honest)."""
    return f"{rec.result_id}-{zlib.crc32((rec.correction_path or '').encode('utf-8')):08x}"


def _prefetch(site: Site, key: str) -> None:
    """Start loading the series ``key`` in the background (its own ledger connection)."""

    def load() -> SeriesView:
        with Ledger.open_readonly(site.state) as ledger:
            return load_view(ledger, find_result(ledger, key))

    with Ledger.open_readonly(site.state) as ledger:
        rec = find_result(ledger, key)
    site.cache.prefetch(rec, load)


def _number(name: str, default: float) -> float:
    raw = request.args.get(name)
    if raw is None or raw == "":
        return default
    try:
        value = float(raw)
    except ValueError:
        abort(400, f"{name} must be a number")
    if not math.isfinite(value):
        abort(400, f"{name} must be a finite number")
    return value


def _slice_settings(view: SeriesView) -> SliceSettings:
    names = [n for n in (request.args.get("layers") or "").split(",") if n]
    unknown = [n for n in names if n not in LAYER_COLOURS]
    if unknown:
        abort(400, f"unknown outline {unknown[0]!r}; use {', '.join(LAYER_COLOURS)}")
    if "layers" not in request.args:
        names = list(LAYER_COLOURS)
    opacity = _number("opacity", 0.0)
    if not 0 <= opacity <= 100:
        abort(400, "opacity must be 0 to 100 (per cent)")
    return SliceSettings(
        level=_number("level", view.level),
        width=max(_number("width", view.width), 1e-6),
        opacity=opacity / 100.0,
        layers=frozenset(names),
    )


def _check_access(site: Site) -> ResponseReturnValue | None:
    given = request.args.get("token")
    if given is not None:
        if not secret_matches(given, site.token):
            return _fail(403, "wrong access token: open the address 'flairwatch review' printed")
        rest = {k: v for k, v in request.args.items() if k != "token"}
        target = request.path + (f"?{urlencode(rest)}" if rest else "")
        resp = redirect(target, code=303)
        resp.set_cookie(
            ACCESS_COOKIE, site.token, httponly=True, samesite="Strict", secure=site.tls
        )
        return resp
    if secret_matches(request.cookies.get(ACCESS_COOKIE), site.token):
        return None
    if site.settings.password and request.path == "/login":
        return None
    hint = " or log in at /login" if site.settings.password else ""
    return _fail(
        403,
        "no access: open the address with the token that 'flairwatch review' printed at start"
        + hint,
    )


def create_app(site: Site) -> Flask:
    """The Flask application serving ``site`` (no static folder: nothing is served from disk)."""
    app = Flask(__name__, static_folder=None)
    app.config["MAX_CONTENT_LENGTH"] = 64 * 1024

    @app.before_request
    def access() -> ResponseReturnValue | None:
        return _check_access(site)

    @app.after_request
    def headers(resp: Response) -> Response:
        resp.headers.update(SECURITY_HEADERS)
        if resp.mimetype != "image/png":
            resp.headers["Cache-Control"] = "no-store"
        return resp

    @app.errorhandler(HTTPException)
    def http_error(exc: HTTPException) -> Response:
        code = exc.code or 500
        message = exc.description or exc.name
        if message == type(exc).description:  # werkzeug's own text: say what to do instead
            message = "nothing here: pick a series from the queue" if code == 404 else exc.name
        return _fail(code, message)

    def html(text: str) -> Response:
        return Response(text, mimetype="text/html")

    @app.get("/")
    def queue() -> Response:
        try:
            f = parse_filters(request.args)
        except ConfigInvalid as exc:
            abort(400, str(exc))
        with Ledger.open_readonly(site.state) as ledger:
            items = gather(ledger)
        return html(pages.render_queue(items, select(items, f), f, _reviewer()))

    @app.route("/login", methods=["GET", "POST"])
    def login() -> ResponseReturnValue:
        if not site.settings.password:
            abort(404)
        if request.method == "GET":
            return html(pages.render_login(None))
        if not secret_matches(request.form.get("password"), site.settings.password):
            time.sleep(WRONG_PASSWORD_PAUSE_S)
            refused = html(pages.render_login("wrong password; ask whoever runs the review"))
            refused.status_code = 403
            return refused
        resp = redirect("/", code=303)
        resp.set_cookie(
            ACCESS_COOKIE, site.token, httponly=True, samesite="Strict", secure=site.tls
        )
        return resp

    @app.post("/reviewer")
    def reviewer() -> ResponseReturnValue:
        name = clean_name(request.form.get("name"))
        if name is None:
            abort(400, "a reviewer's name is 1 to 64 printable characters")
        back = request.form.get("next") or "/"
        if not back.startswith("/") or back.startswith("//") or "\\" in back:
            back = "/"
        resp = redirect(back, code=303)
        resp.set_cookie(
            NAME_COOKIE, quote(name), max_age=NAME_DAYS * 86400, samesite="Strict", secure=site.tls
        )
        return resp

    @app.get("/series/<key>")
    def series(key: str) -> Response:
        try:
            f = parse_filters(request.args)
        except ConfigInvalid as exc:
            abort(400, str(exc))
        with Ledger.open_readonly(site.state) as ledger:
            rec = _record(ledger, key)
            view = _view(site, ledger, rec)
            items = gather(ledger)
            decisions = history(ledger, rec)
        summary = summary_of(rec)
        item = next((it for it in items if it.series_key == key), None) or item_of(rec, summary)
        before, after = neighbours(items, key, f)
        if after is not None:
            _prefetch(site, after.series_key)
        header, rows = lesion_table(rec, summary)
        page = pages.SeriesPage(
            item=item, result_id=rec.result_id, version=_version(rec), depth=view.depth,
            start=view.start_slice, level=view.level, width=view.width,
            layers=tuple(view.layers), lesion_slices=tuple(view.lesion_slices()),
            source=view.source, summary=summary, lesion_header=header, lesion_rows=rows,
            history=decisions, dispute=disagreement(reversed(decisions), rec.result_id),
            prev_url=pages.series_url(before.series_key, f) if before else None,
            next_url=pages.series_url(after.series_key, f) if after else None, filters=f,
        )  # fmt: skip
        return html(pages.render_series(page, _reviewer()))

    @app.get("/series/<key>/slice/<int:k>.png")
    def slice_image(key: str, k: int) -> Response:
        with Ledger.open_readonly(site.state) as ledger:
            rec = _record(ledger, key)
            view = _view(site, ledger, rec)
        if not 0 <= k < view.depth:
            abort(404, f"no slice {k}: series {key} has slices 0 to {view.depth - 1}")
        png = slice_png(view, k, _slice_settings(view))
        resp = Response(png, mimetype="image/png")
        resp.headers["Cache-Control"] = "private, max-age=600"
        return resp

    @app.post("/series/<key>/decision")
    def decision(key: str) -> ResponseReturnValue:
        mark = request.form.get("mark", "")
        if mark not in QC_MARKS:
            abort(400, f"decision must be one of {', '.join(QC_MARKS)}")
        name = _reviewer()
        if name is None:
            abort(400, "enter your name at the top of the page first")
        note = clean_note(request.form.get("note"))
        if note is None:
            abort(400, "the note is too long (at most 2000 characters)")
        with Ledger.open(site.state, check_fs=False) as ledger:
            rec = _record(ledger, key)
            if request.form.get("result") != str(rec.result_id):
                abort(409, "a newer result of this series arrived: reload the page and look again")
            mark_result(ledger, key, mark, note, by=name, now=time.time())
            decisions = history(ledger, rec)
            if site.gallery is not None and (site.gallery / INDEX_FILE).is_file():
                refresh_study(
                    ledger, site.gallery, rec.series_id, connectivity=site.connectivity,
                    longitudinal=site.longitudinal, now=time.time(),
                )  # fmt: skip
        if request.accept_mimetypes.best != "application/json":
            return redirect(pages.series_url(key, parse_filters({})), code=303)
        return jsonify(
            status=mark,
            message=f"saved: {mark} by {name}",
            history=pages.render_history(decisions, rec.result_id),
            dispute=pages.render_dispute(disagreement(reversed(decisions), rec.result_id)),
        )

    return app


def make_server_for(site: Site, app: Flask) -> BaseWSGIServer:
    """A threaded server on the configured address and port (0: a free one), TLS if set."""
    s = site.settings
    tls = (str(s.tls_cert), str(s.tls_key)) if s.tls_cert and s.tls_key else None
    # request log lines would carry the first visit's token in the URL
    logging.getLogger("werkzeug").setLevel(logging.WARNING)
    return make_server(s.address, s.port, app, threaded=True, ssl_context=tls)


def address_of(site: Site, server: BaseWSGIServer) -> str:
    """The address to open, with the token (IPv6 addresses in brackets)."""
    host = site.settings.address
    host = f"[{host}]" if ":" in host else host
    scheme = "https" if site.tls else "http"
    return f"{scheme}://{host}:{server.port}/?token={site.token}"


def run_server(site: Site, *, announce: Callable[[str], None]) -> None:
    """Serve until interrupted; ``announce`` gets the address to open."""
    server = make_server_for(site, create_app(site))
    announce(address_of(site, server))
    try:
        server.serve_forever()
    finally:
        server.server_close()
