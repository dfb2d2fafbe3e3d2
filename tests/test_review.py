"""``flairwatch review``: access checks, bad requests, decisions and the slice pictures.

The application runs in Flask's test client on a real processed archive (real DICOM, the tiny
ONNX model, a real ledger; tests/review_fixtures.py). Bad requests are checked to change
nothing: the ledger's full SQL dump (sqlite3's ``iterdump``) is compared before and after.
Outside references: mask borders are recomputed with SciPy's ``binary_erosion``; masks are read
with nibabel; PNGs with Pillow; the radiological convention (patient right on the image's left,
anterior at the top) is common practice for axial MR display.
"""

from __future__ import annotations

import csv
import io
import re
import shutil
import sqlite3
import sys
import threading
from collections.abc import Iterator
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from PIL import Image
from scipy import ndimage

from flairwatch import keys
from flairwatch.cli import main
from flairwatch.cli.review import INSTALL_HINT
from flairwatch.config import ReviewSettings, config_from_mapping
from flairwatch.errors import ConfigInvalid
from flairwatch.ledger.core import LEDGER_FILE
from flairwatch.ledger.queries import find_result
from flairwatch.review.access import check_serving, is_loopback, is_series_key, new_token
from flairwatch.review.loading import ViewCache
from flairwatch.review.queue import Decision, Filters, QueueItem, disagreement, neighbours, select
from flairwatch.review.viewer import (
    LAYER_COLOURS,
    SeriesView,
    SliceSettings,
    border,
    make_view,
    slice_rgb,
)
from tests.model_fixtures import make_tiny_model
from tests.review_fixtures import Archive, make_archive

flask = pytest.importorskip("flask", reason="the review extra is not installed: pip install flask")

from flask.testing import FlaskClient  # noqa: E402

from flairwatch.review.app import ACCESS_COOKIE, NAME_COOKIE, Site, create_app  # noqa: E402

TOKEN = new_token()
RED = LAYER_COLOURS["wmh"]


@pytest.fixture(scope="module")
def arc(tmp_path_factory: pytest.TempPathFactory) -> Archive:
    """Two series in one study and one in another, processed and recorded; none reviewed."""
    manifest = make_tiny_model(tmp_path_factory.mktemp("tiny_model"))
    archive = make_archive(tmp_path_factory.mktemp("review") / "site", manifest)
    a = archive.add("a")
    archive.add("b", study_uid=a.study_uid)
    archive.add("c")
    return archive


def _dump(arc: Archive) -> list[str]:
    assert arc.cfg.state is not None
    with sqlite3.connect(arc.cfg.state / LEDGER_FILE) as db:
        return list(db.iterdump())


def _site(arc: Archive, **settings: object) -> Site:
    assert arc.cfg.state is not None
    return Site(state=arc.cfg.state, token=TOKEN, settings=ReviewSettings(**settings))  # type: ignore[arg-type]


@pytest.fixture
def client(arc: Archive) -> Iterator[FlaskClient]:
    app = create_app(_site(arc))
    with app.test_client() as c:
        c.set_cookie(ACCESS_COOKIE, TOKEN)
        c.set_cookie(NAME_COOKIE, "Reviewer%20One")
        yield c


# ---- pure checks -------------------------------------------------------------------------------


def test_serving_refuses_clear_text_off_loopback(tmp_path: Path) -> None:
    check_serving(ReviewSettings())
    check_serving(ReviewSettings(address="::1", password="pw"))
    for settings in (
        ReviewSettings(address="0.0.0.0", password="pw"),
        ReviewSettings(address="192.168.10.5"),
    ):
        with pytest.raises(ConfigInvalid, match=r"tls_cert and review\.tls_key.*SSH tunnel"):
            check_serving(settings)
    cert, key = tmp_path / "c.pem", tmp_path / "k.pem"
    with pytest.raises(ConfigInvalid, match="not found"):
        check_serving(ReviewSettings(address="0.0.0.0", tls_cert=cert, tls_key=key))
    cert.write_text("x", encoding="utf-8")
    key.write_text("x", encoding="utf-8")
    check_serving(ReviewSettings(address="0.0.0.0", password="pw", tls_cert=cert, tls_key=key))
    assert is_loopback("127.0.0.2") and is_loopback("localhost") and not is_loopback("10.0.0.1")
    assert len(new_token()) >= 32 and new_token() != new_token()


def test_review_config_section(tmp_path: Path) -> None:
    cfg = config_from_mapping(
        {"review": {"address": "10.1.2.3", "port": 8443, "tls_cert": "c.pem", "tls_key": "k.pem"}},
        base_dir=tmp_path,
    )
    assert cfg.review.port == 8443 and cfg.review.tls_cert == tmp_path / "c.pem"
    for bad, words in (
        ({"port": 70000}, "0 to 65535"),
        ({"tls_cert": "c.pem"}, "go together"),
        ({"passwd": "x"}, "unknown entries"),
        ({"password": 123}, "must be text"),
    ):
        with pytest.raises(ConfigInvalid, match=words):
            config_from_mapping({"review": bad})


def test_series_keys_are_the_only_accepted_names() -> None:
    assert is_series_key(keys.series_key("1.2.3.4")) and is_series_key(keys.series_key("1.2", 3))
    for bad in ("..", "../etc/passwd", "/etc/passwd", "e123", "E0123456789AB", "e0123456789ab/x"):
        assert not is_series_key(bad)


def test_border_matches_scipy_erosion() -> None:
    rng = np.random.default_rng(3)
    mask = ndimage.binary_dilation(rng.random((40, 50)) > 0.93, iterations=2)
    mask[0, 10:20] = True  # touching the picture's edge counts as a border
    four = ndimage.generate_binary_structure(2, 1)
    expected = mask & ~ndimage.binary_erosion(mask, structure=four, border_value=0)
    assert np.array_equal(border(mask), expected)


def test_slice_is_radiological_and_windowed() -> None:
    # identity LPS affine: i runs to the patient's left, j to posterior, k up
    image = np.zeros((6, 5, 3), dtype=np.float32)
    image[0, 0, 1] = 100.0  # the patient's right-most, anterior-most voxel
    mask = np.zeros((6, 5, 3), dtype=np.uint8)
    mask[2:5, 1:4, 1] = 1
    view = make_view(image, np.eye(4), {"wmh": mask}, "test")
    rgb = slice_rgb(view, 1, SliceSettings(level=50.0, width=100.0, layers=frozenset({"wmh"})))
    assert rgb.shape == (5, 6, 3), "rows are the P axis (5), columns the L axis (6)"
    assert tuple(rgb[0, 0]) == (255, 255, 255), "right-anterior voxel at top left"
    assert tuple(rgb[4, 5]) == (0, 0, 0)
    assert tuple(rgb[2, 3]) == (0, 0, 0), "the inside of the mask is left showing the image"
    assert tuple(rgb[1, 2]) == RED
    filled = slice_rgb(view, 1, SliceSettings(level=50.0, width=100.0, opacity=0.5))
    assert tuple(filled[2, 3]) == tuple(round(0.5 * c) for c in RED)


def _item(key: str, status: str = "unreviewed", **kw: object) -> QueueItem:
    base: dict[str, object] = {"study_key": "t1", "date": "2026-03-01", "description": None, "model": "m 1",
            "volume_ml": 1.0, "lesion_count": 1, "corrected": False}  # fmt: skip
    base.update(kw)
    return QueueItem(series_key=key, status=status, **base)  # type: ignore[arg-type]


def test_queue_filters_and_next_series() -> None:
    items = [
        _item("e1", "accepted"),
        _item("e2"),
        _item("e3", "rejected", corrected=True, date="2026-05-02", study_key="t2"),
        _item("e4"),
    ]
    todo = Filters(status="unreviewed")
    assert [i.series_key for i in select(items, todo)] == ["e2", "e4"]
    assert [i.series_key for i in select(items, Filters(status="corrected"))] == ["e3"]
    assert [i.series_key for i in select(items, Filters(date_from="2026-04-01"))] == ["e3"]
    assert [i.series_key for i in select(items, Filters(study="t1", date_to="2026-03-01"))] == [
        "e1", "e2", "e4",
    ]  # fmt: skip
    # e2 was just accepted: it left the 'unreviewed' queue, and the next one is still e4
    assert [x and x.series_key for x in neighbours(items, "e2", todo)] == [None, "e4"]
    assert neighbours(items, "e4", Filters()) == (items[2], None)


def test_disagreement_uses_each_reviewers_latest_decision() -> None:
    d = [
        Decision(1, "accepted", "", "ann", 10.0, "m"),
        Decision(1, "rejected", "", "bo", 11.0, "m"),
    ]
    assert disagreement(d, 1) == "reviewers disagree: ann accepted, bo rejected"
    assert disagreement([*d, Decision(1, "accepted", "", "bo", 12.0, "m")], 1) is None
    assert disagreement([*d, Decision(2, "accepted", "", "bo", 12.0, "m")], 2) is None


# ---- the application ---------------------------------------------------------------------------


def test_token_in_address_sets_a_cookie_and_wrong_token_is_refused(arc: Archive) -> None:
    before = _dump(arc)
    app = create_app(_site(arc))
    with app.test_client() as c:
        r = c.get("/")
        assert r.status_code == 403 and b"token" in r.data and b"RESEARCH USE ONLY" in r.data
        assert c.get("/?token=wrong").status_code == 403
        assert c.get(f"/series/{arc.entries[0].series_key}").status_code == 403
        r = c.post(f"/series/{arc.entries[0].series_key}/decision", data={"mark": "accepted"})
        assert r.status_code == 403
        r = c.get(f"/?token={TOKEN}&status=unreviewed")
        assert r.status_code == 303 and r.headers["Location"] == "/?status=unreviewed"
        assert TOKEN not in r.headers["Location"]
        page = c.get("/")
        assert page.status_code == 200 and b"RESEARCH USE ONLY" in page.data
        for e in arc.entries:
            assert e.series_key.encode() in page.data
        assert page.headers["Referrer-Policy"] == "no-referrer"
    assert _dump(arc) == before


@pytest.mark.parametrize(
    "path",
    [
        "/series/e0123456789ab",  # the shape of a key, unknown to the ledger
        "/series/..%2F..%2Fetc%2Fpasswd",
        "/series/../../etc/passwd",
        "/series//etc/passwd",
        "/series/%2Fetc%2Fpasswd/slice/0.png",
        "/series/e0123456789ab/slice/0.png",
        "/series/%2e%2e/slice/0.png",
        "/static/../flairwatch.yaml",
        "/state/ledger.sqlite3",
    ],
)
def test_path_tricks_and_unknown_keys_are_404(arc: Archive, client: FlaskClient, path: str) -> None:
    before = _dump(arc)
    r = client.get(path)
    assert r.status_code == 404, path
    assert b"RESEARCH USE ONLY" in r.data
    r = client.post(path.split("/slice")[0] + "/decision", data={"mark": "accepted"})
    assert r.status_code in (404, 405)
    assert _dump(arc) == before


def test_bad_decisions_change_nothing(arc: Archive, client: FlaskClient) -> None:
    key = arc.entries[0].series_key
    before = _dump(arc)
    json_accept = {"Accept": "application/json"}
    r = client.post(f"/series/{key}/decision", data={"mark": "maybe"}, headers=json_accept)
    assert r.status_code == 400 and "accepted, rejected" in r.get_json()["error"]
    r = client.post(f"/series/{key}/decision", data={"mark": "accepted", "result": "-1"})
    assert r.status_code == 409 and b"reload" in r.data
    r = client.post(f"/series/{key}/decision", data={"mark": "accepted", "note": "x" * 2001})
    assert r.status_code == 400
    client.delete_cookie(NAME_COOKIE)
    r = client.post(f"/series/{key}/decision", data={"mark": "accepted"})
    assert r.status_code == 400 and b"name" in r.data
    r = client.get(f"/series/{key}/slice/0.png?opacity=500")
    assert r.status_code == 400
    r = client.get(f"/series/{key}/slice/0.png?layers=bones")
    assert r.status_code == 400
    r = client.get(f"/series/{key}/slice/999.png")
    assert r.status_code == 404
    assert client.get("/?from=yesterday").status_code == 400
    assert _dump(arc) == before


def _ledger_marks(arc: Archive) -> list[tuple[object, ...]]:
    with arc.ledger() as ledger:
        return ledger.query("SELECT result_id, mark, note, marked_by FROM qc_marks ORDER BY id")


def test_decisions_are_recorded_like_qc_mark_and_reach_export(
    arc: Archive, client: FlaskClient, tmp_path: Path
) -> None:
    a, b, _ = arc.entries
    page = client.get(f"/series/{a.series_key}").data.decode()
    assert "No decision yet" in page and "DICOM files in the inbox" in page
    start = len(_ledger_marks(arc))
    r = client.post(
        f"/series/{a.series_key}/decision",
        data={"mark": "rejected", "note": "motion <b>", "result": str(a.result_id)},
        headers={"Accept": "application/json"},
    )
    assert r.status_code == 200 and r.get_json()["status"] == "rejected"
    # the same row 'flairwatch qc mark' writes, with the reviewer's name from the cookie
    cfg = str(arc.config_file)
    assert main(["qc", "mark", "--config", cfg, b.series_key, "accepted", "--by", "cli"]) == 0
    marks = _ledger_marks(arc)[start:]
    assert marks == [
        (a.result_id, "rejected", "motion <b>", "Reviewer One"),
        (b.result_id, "accepted", "", "cli"),
    ]
    out = tmp_path / "export.csv"
    assert main(["export", "--config", cfg, "--out", str(out)]) == 0
    rows = {r["series_key"]: r for r in csv.DictReader(io.StringIO(out.read_text("utf-8")))}
    assert rows[a.series_key]["qc_status"] == "rejected"
    assert rows[a.series_key]["qc_note"] == "motion <b>"
    # a second reviewer disagrees: the page says so, and the history keeps both
    client.set_cookie(NAME_COOKIE, "Reviewer%20Two")
    r = client.post(
        f"/series/{a.series_key}/decision", data={"mark": "accepted", "result": str(a.result_id)}
    )
    assert r.status_code == 303
    page = client.get(f"/series/{a.series_key}").data.decode()
    assert "reviewers disagree: Reviewer One rejected, Reviewer Two accepted" in page
    assert "motion &lt;b&gt;" in page and "<b>" not in page.split("<main>")[1].split("</h1>")[0]
    queue = client.get("/?status=accepted").data.decode()
    assert a.series_key in queue and "reviewers disagree" in queue


def _red_pixels(png: bytes) -> np.ndarray:
    with Image.open(io.BytesIO(png)) as im:
        rgb = np.asarray(im.convert("RGB"))
    return np.all(rgb == RED, axis=2)


def test_slice_shows_the_mask_outline_of_the_result(arc: Archive, client: FlaskClient) -> None:
    a = arc.entries[0]
    mask = np.asarray(nib.load(a.outcome.result_dir / "wmh_mask.nii.gz").dataobj) > 0  # type: ignore[attr-defined]
    assert mask.any()
    # the tiny series: axial, identity directions, 1 x 1 mm in plane, so the slice is mask[:, :, k].T
    # (nibabel's RAS array axes are the LPS ones here, only the affine's signs differ)
    k = int(np.argmax(mask.sum(axis=(0, 1))))
    r = client.get(f"/series/{a.series_key}/slice/{k}.png?layers=wmh&opacity=0")
    assert r.status_code == 200 and r.mimetype == "image/png"
    four = ndimage.generate_binary_structure(2, 1)
    plane = mask[:, :, k].T
    expected = plane & ~ndimage.binary_erosion(plane, structure=four, border_value=0)
    assert np.array_equal(_red_pixels(r.data), expected)
    off = client.get(f"/series/{a.series_key}/slice/{k}.png?layers=")
    assert not _red_pixels(off.data).any(), "outlines off"


def test_source_image_gone_shows_the_probability_map(arc: Archive, tmp_path: Path) -> None:
    c = arc.entries[2]
    inbox = arc.root / "inbox" / "c"
    moved = tmp_path / "c"
    shutil.move(inbox, moved)
    try:
        app = create_app(_site(arc))  # a new cache
        with app.test_client() as cl:
            cl.set_cookie(ACCESS_COOKIE, TOKEN)
            page = cl.get(f"/series/{c.series_key}").data.decode()
            assert "showing the WMH probability map" in page
            assert cl.get(f"/series/{c.series_key}/slice/3.png").status_code == 200
    finally:
        shutil.move(moved, inbox)


def test_password_login(arc: Archive, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr("flairwatch.review.app.WRONG_PASSWORD_PAUSE_S", 0.0)
    app = create_app(_site(arc, password="correct horse"))
    with app.test_client() as c:
        assert c.get("/").status_code == 403
        assert c.get("/login").status_code == 200
        assert c.post("/login", data={"password": "wrong"}).status_code == 403
        assert c.get("/").status_code == 403
        assert c.post("/login", data={"password": "correct horse"}).status_code == 303
        assert c.get("/").status_code == 200


def test_command_without_flask_says_how_to_install(
    arc: Archive, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setitem(sys.modules, "flask", None)
    monkeypatch.delitem(sys.modules, "flairwatch.review.app", raising=False)
    assert main(["review", "--config", str(arc.config_file)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"flairwatch: error: {INSTALL_HINT}"]
    assert "pip install 'flairwatch[review]'" in INSTALL_HINT


def test_command_refuses_a_network_address_without_tls(
    arc: Archive, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["review", "--config", str(arc.config_file), "--address", "0.0.0.0"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "SSH tunnel" in err[0]


def test_decision_rewrites_the_static_gallery_at_once(arc: Archive) -> None:
    assert arc.cfg.results is not None
    gallery = arc.cfg.results / "gallery"
    assert main(["qc", "gallery", "--config", str(arc.config_file)]) == 0
    c = arc.entries[2]
    page = gallery / f"study-{c.outcome.summary['study_key']}.html"
    before = re.findall(r'id="([^"]+)" data-status="(\w+)"', page.read_text("utf-8"))
    assert (c.series_key, "unreviewed") in before
    site = _site(arc)
    site.gallery = gallery
    with create_app(site).test_client() as cl:
        cl.set_cookie(ACCESS_COOKIE, TOKEN)
        cl.set_cookie(NAME_COOKIE, "Reviewer%20Three")
        r = cl.post(
            f"/series/{c.series_key}/decision",
            data={"mark": "rejected", "result": str(c.result_id)},
        )
        assert r.status_code == 303
    after = re.findall(r'id="([^"]+)" data-status="(\w+)"', page.read_text("utf-8"))
    assert (c.series_key, "rejected") in after
    index = (gallery / "index.html").read_text("utf-8")
    assert re.search(rf'data-status="rejected"[^>]*>.*{c.series_key}', index)


def test_view_cache_loads_a_series_once_even_while_prefetching(arc: Archive) -> None:
    with arc.ledger() as ledger:
        rec = find_result(ledger, arc.entries[0].series_key)
    calls: list[int] = []
    gate = threading.Event()
    view = make_view(np.zeros((2, 2, 2), np.float32), np.eye(4), {}, "test")

    def slow() -> SeriesView:
        calls.append(1)
        gate.wait(5)
        return view

    cache = ViewCache(size=1)
    thread = cache.prefetch(rec, slow)
    assert thread is not None and cache.prefetch(rec, slow) is None, "already loading"
    threading.Timer(0.2, gate.set).start()
    assert cache.get(rec, slow) is view  # waits for the prefetch instead of loading again
    thread.join(5)
    assert calls == [1] and len(cache) == 1
