"""QC gallery: static pages checked in a real headless browser (Debian's Chromium).

The browser runs the pages' own JavaScript (status filter, image-load count) and its DOM is read
back with Python's html.parser; a screenshot is read with Pillow. Without /usr/bin/chromium the
browser tests are skipped with the reason; CI installs it with
``apt-get update && apt-get install -y chromium``.
"""

from __future__ import annotations

import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from PIL import Image

from flairwatch.cli import main
from flairwatch.research.gallery import refresh_study
from tests.review_fixtures import Archive, make_archive

CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)  # fmt: skip
needs_browser = pytest.mark.skipif(
    CHROMIUM is None,
    reason="Chromium not installed; install it with: apt-get update && apt-get install -y chromium",
)
BANNER_RGB = (0xB0, 0x00, 0x20)


class Items(HTMLParser):
    """Collects elements carrying data-status, whether they are hidden, plus body data and text."""

    def __init__(self) -> None:
        super().__init__()
        self.items: list[dict[str, str | None]] = []
        self.body: dict[str, str | None] = {}
        self.text: list[str] = []
        self.tags: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = dict(attrs)
        self.tags.append(tag)
        if "data-status" in a:
            self.items.append(a)
        if tag == "body":
            self.body = a

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def _parse(text: str) -> Items:
    p = Items()
    p.feed(text)
    return p


def _browser(args: list[str], tmp: Path) -> subprocess.CompletedProcess[str]:
    assert CHROMIUM is not None
    profile = tmp / f"profile-{len(list(tmp.glob('profile-*')))}"
    cmd = [
        CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
        "--no-first-run", "--disable-background-networking", "--disable-component-update",
        "--disable-sync", f"--user-data-dir={profile}", "--virtual-time-budget=3000", *args,
    ]  # fmt: skip
    return subprocess.run(cmd, capture_output=True, text=True, timeout=60, check=True)


def _dom(page: Path, fragment: str, tmp: Path) -> Items:
    return _parse(_browser(["--dump-dom", page.as_uri() + fragment], tmp).stdout)


@pytest.fixture
def site(tmp_path: Path, tiny_model_manifest: Path) -> tuple[Archive, Path]:
    """Study 1: a rejected series and a corrected one; study 2: one unreviewed series."""
    arc = make_archive(tmp_path / "site", tiny_model_manifest)
    a = arc.add("a")
    b = arc.add("b", study_uid=a.study_uid)
    arc.add("c")
    cfg = str(arc.config_file)
    note = "motion <b>bold</b> & more"
    assert main(["qc", "mark", "--config", cfg, a.series_key, "rejected", "--note", note]) == 0
    img = nib.load(b.outcome.result_dir / "wmh_mask.nii.gz")
    data = np.asarray(img.dataobj).astype(np.uint8)  # type: ignore[attr-defined]
    data[5:8, 30:33, 1:3] = 1
    edited = tmp_path / "edited.nii.gz"
    nib.save(nib.Nifti1Image(data, img.affine), edited)  # type: ignore[attr-defined]
    assert main(["qc", "correct", "--config", cfg, b.series_key, "--mask", str(edited)]) == 0
    assert main(["qc", "mark", "--config", cfg, b.series_key, "accepted"]) == 0
    assert main(["qc", "gallery", "--config", cfg]) == 0
    assert arc.cfg.results is not None
    return arc, arc.cfg.results / "gallery"


def test_pages_are_static_escaped_and_link_real_images(site: tuple[Archive, Path]) -> None:
    arc, out = site
    a, b, c = arc.entries
    names = sorted(p.name for p in out.iterdir())
    study1, study2 = a.outcome.summary["study_key"], c.outcome.summary["study_key"]
    people = sorted({f"participant-{e.outcome.summary['subject_key']}.html" for e in arc.entries})
    assert names == sorted(["index.html", f"study-{study1}.html", f"study-{study2}.html", *people])
    page = (out / f"study-{study1}.html").read_text(encoding="utf-8")
    parsed = _parse(page)
    assert "b" not in parsed.tags, "a note's markup must be shown as text, not parsed"
    assert "motion <b>bold</b> & more" in "".join(parsed.text)
    assert "RESEARCH USE ONLY" in page
    assert "http://" not in page and "https://" not in page, "nothing loaded from the network"
    # series are listed by key (a hash), so compare as a set of (status, corrected) pairs
    marks = sorted((i["data-status"], i["data-corrected"]) for i in parsed.items)
    assert marks == [("accepted", "1"), ("rejected", "0")]
    # the corrected series shows the corrected volume: automatic + 18 voxels of 1 x 1 x 3 mm
    auto = b.outcome.summary["lesion_volume_ml"]
    assert f"WMH {auto + 0.054:.2f} mL" in page


@needs_browser
def test_filter_in_browser_shows_only_the_chosen_status(
    site: tuple[Archive, Path], tmp_path: Path
) -> None:
    arc, out = site
    study1 = arc.entries[0].outcome.summary["study_key"]
    page = out / f"study-{study1}.html"

    dom = _dom(page, "#status=rejected", tmp_path)
    shown = [i["data-status"] for i in dom.items if "hidden" not in i]
    assert shown == ["rejected"]
    assert "1 of 2 shown" in "".join(dom.text)
    # both QC images really loaded from the results folder (naturalWidth > 0 in the browser)
    assert dom.body.get("data-images-loaded") == dom.body.get("data-images-total") == "2"

    index = out / "index.html"
    dom = _dom(index, "#status=corrected", tmp_path)
    assert [i["data-corrected"] for i in dom.items if "hidden" not in i] == ["1"]
    dom = _dom(index, "", tmp_path)
    assert len(dom.items) == 3 and not any("hidden" in i for i in dom.items)
    assert "3 of 3 shown" in "".join(dom.text)


@needs_browser
def test_screenshot_renders_banner_and_image(site: tuple[Archive, Path], tmp_path: Path) -> None:
    arc, out = site
    study2 = arc.entries[2].outcome.summary["study_key"]
    shot = tmp_path / "shot.png"
    page = (out / f"study-{study2}.html").as_uri()
    _browser([f"--screenshot={shot}", "--window-size=1000,800", page], tmp_path)
    with Image.open(shot) as im:
        rgb = np.asarray(im.convert("RGB"))
    assert rgb.shape == (800, 1000, 3)
    banner = np.all(rgb == BANNER_RGB, axis=2)
    assert banner.sum() > 1000, "the red research-only banner is drawn"
    # the QC montage (mostly dark MR pixels) is drawn below the banner
    lower = rgb[200:, :, :]
    assert (lower.max(axis=2) < 40).sum() > 5000


def test_refresh_after_a_new_series_rewrites_only_its_study(site: tuple[Archive, Path]) -> None:
    arc, out = site
    a, _, c = arc.entries
    other = out / f"study-{c.outcome.summary['study_key']}.html"
    before = other.read_bytes()
    new = arc.add("d", study_uid=a.study_uid)
    with arc.ledger() as ledger:
        written = refresh_study(ledger, out, new.series_id, now=2_000_000_000.0)
    study1 = out / f"study-{a.outcome.summary['study_key']}.html"
    person = out / f"participant-{new.outcome.summary['subject_key']}.html"
    assert written == [study1, person, out / "index.html"]
    assert new.series_key in study1.read_text(encoding="utf-8")
    assert new.series_key in (out / "index.html").read_text(encoding="utf-8")
    assert other.read_bytes() == before
