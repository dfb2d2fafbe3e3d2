"""`flairwatch reprocess` and the change report on a real ledger and real result folders.

Oracles: SimpleITK's LabelOverlapMeasuresImageFilter for Dice between old and new masks;
nibabel + numpy for volumes; scipy.ndimage.label (26-connectivity) for lesion counts; the
Dice definition 2|A and B| / (|A| + |B|) (WMH challenge paper, IEEE TMI 2019) for the worked
example; Python's csv, json and xml.etree to read the outputs back.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import subprocess
import sys
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
import SimpleITK as sitk
from scipy import ndimage

from flairwatch.cli import main
from flairwatch.ledger.store import JobState, Ledger
from flairwatch.research.change_report import Limits, compare_masks, flag_reasons, svg_scatter
from flairwatch.research.reprocess import (
    HEARTBEAT_FRESH_SECONDS,
    REPROCESS_PRIORITY,
    Candidate,
    Progress,
    arrivals_waiting,
    claim_rerun,
    parse_since,
    queue_reruns,
    requeue_orphans,
    version_key,
    wants_rerun,
)
from tests.model_fixtures import make_tiny_model
from tests.review_fixtures import NOW, Archive, make_archive


@pytest.fixture
def archive(tmp_path: Path, tiny_model_manifest: Path) -> Archive:
    arc = make_archive(tmp_path / "site", tiny_model_manifest)
    arc.add("one")
    arc.add("two")
    return arc


@pytest.fixture
def ledger_only(tmp_path: Path) -> Iterator[Ledger]:
    """A real ledger with two done series of model 0.0.1 (no result folders: queueing only)."""
    with Ledger.open(tmp_path / "state", check_fs=False) as ledger:
        for n in range(2):
            now = NOW + n
            key = ("s1", "t1", f"e{n}")

            def keys(revision: int, key: tuple[str, str, str] = key) -> tuple[str, str, str]:
                return key

            _row, job = ledger.new_revision("1.2.826.0.1.7", f"1.2.826.0.1.7.{n}", keys, now)
            ledger.move_job(job.id, [JobState.SETTLING], JobState.QUEUED, now)
            claimed = ledger.claim_next(now, "tiny-threshold", "0.0.1", os.getpid())
            assert claimed is not None
            summary = {"model": {"name": "tiny-threshold", "version": "0.0.1"}}
            ledger.finish_done(claimed.id, f"/nowhere/e{n}", summary, adopted=False,
                               seconds=1.0, now=now)  # fmt: skip
        yield ledger


def _mask(path: Path) -> np.ndarray:
    return np.asarray(nib.load(path).dataobj) > 0  # type: ignore[attr-defined]


def _digest(folder: Path) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in folder.iterdir()}


def test_reprocess_reruns_reports_and_resumes(
    archive: Archive, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    v2 = make_tiny_model(
        tmp_path / "v2", grid_shape=(40, 40), spacing_mm=(1.6, 1.6), version="0.0.2"
    )
    old_dirs = [e.outcome.result_dir for e in archive.entries]
    before = [_digest(d) for d in old_dirs]
    cfg = str(archive.config_file)
    assert main(["reprocess", "--config", cfg, "--model", str(v2)]) == 0
    err = capsys.readouterr().err
    assert "queued 2 series" in err
    assert "reprocess 1/2" in err and "reprocess 2/2" in err  # plain lines when not a TTY

    with archive.ledger() as ledger:
        jobs = ledger.query(
            "SELECT state, priority, model_version FROM jobs WHERE priority < 0 ORDER BY id"
        )
        current = ledger.query(
            "SELECT series_id, model_version, result_path FROM results WHERE current = 1"
        )
    assert jobs == [("done", REPROCESS_PRIORITY, "0.0.2")] * 2
    assert sorted(v for _, v, _ in current) == ["0.0.2", "0.0.2"]
    for old, digest in zip(old_dirs, before, strict=True):
        assert _digest(old) == digest, "old version folders are kept untouched"
        assert (old.parent / "current_version.txt").read_text(
            encoding="utf-8"
        ).strip() == "tiny-threshold-0.0.2"

    assert archive.cfg.results is not None
    (report,) = sorted((archive.cfg.results / "reports").iterdir())
    with open(report / "changes.csv", encoding="utf-8", newline="") as fh:
        rows = {r["series_key"]: r for r in csv.DictReader(fh)}
    assert set(rows) == {e.series_key for e in archive.entries}
    for entry, old in zip(archive.entries, old_dirs, strict=True):
        row = rows[entry.series_key]
        new = Path(row["new_result_path"])
        a, b = _mask(old / "wmh_mask.nii.gz"), _mask(new / "wmh_mask.nii.gz")
        assert float(row["old_volume_ml"]) == pytest.approx(a.sum() * 3.0 / 1000, abs=1e-4)
        assert float(row["new_volume_ml"]) == pytest.approx(b.sum() * 3.0 / 1000, abs=1e-4)
        assert np.any(a != b), "the coarser model grid moves the lesion borders"
        overlap = sitk.LabelOverlapMeasuresImageFilter()
        overlap.Execute(
            sitk.GetImageFromArray(a.astype(np.uint8)), sitk.GetImageFromArray(b.astype(np.uint8))
        )
        assert float(row["dice"]) == pytest.approx(overlap.GetDiceCoefficient(), abs=1e-4)
        s26 = ndimage.generate_binary_structure(3, 3)
        assert int(row["old_lesions"]) == ndimage.label(a, structure=s26)[1]
        assert int(row["new_lesions"]) == ndimage.label(b, structure=s26)[1]
    summary = json.loads((report / "summary.json").read_text(encoding="utf-8"))
    assert summary["series"] == 2 and summary["flagged"] == sum(
        int(r["flagged"]) for r in rows.values()
    )
    svg = (report / "report.html").read_text(encoding="utf-8")
    assert svg.count("<circle") == 2 and "RESEARCH USE ONLY" in svg

    # running it again queues nothing: every series is current with this model
    assert main(["reprocess", "--config", cfg, "--model", str(v2)]) == 0
    assert "queued 0 series" in capsys.readouterr().err

    # a stricter Dice limit flags both series (their Dice is about 0.9)
    args = ["--model", str(v2), "--report-only", "--flag-dice", "0.99"]
    assert main(["reprocess", "--config", cfg, *args]) == 0
    assert "2 series, 2 flagged" in capsys.readouterr().err
    newest = sorted((archive.cfg.results / "reports").iterdir())
    assert len(newest) == 2, "a second report never overwrites the first"
    flagged = json.loads((newest[-1] / "summary.json").read_text(encoding="utf-8"))[
        "flagged_series"
    ]
    assert len(flagged) == 2 and all("Dice" in f["reasons"] for f in flagged)


def test_new_arrivals_go_first_and_reruns_never_take_them(ledger_only: Ledger) -> None:
    ledger = ledger_only
    assert queue_reruns(ledger, "tiny-threshold", "0.0.2", now=NOW + 10) == (2, 0)
    assert queue_reruns(ledger, "tiny-threshold", "0.0.2", now=NOW + 11) == (0, 2), "resumable"
    row, job = ledger.new_revision(
        "1.2.826.0.1.99", "1.2.826.0.1.99.1", lambda r: ("s2", "t2", "e9"), NOW + 12
    )
    ledger.move_job(job.id, [JobState.SETTLING], JobState.QUEUED, NOW + 12)
    # the daemon running the new model takes the arrival before any re-run
    first = ledger.claim_next(NOW + 13, "tiny-threshold", "0.0.2", 1)
    assert first is not None and first.id == job.id
    ledger.move_job(job.id, [JobState.RUNNING], JobState.QUEUED, NOW + 13)
    # the re-run runner never takes the arrival's job
    taken = claim_rerun(ledger, "tiny-threshold", "0.0.2", os.getpid(), NOW + 14)
    assert taken is not None and taken.priority == REPROCESS_PRIORITY
    assert taken.series_id != row.id


def test_orphaned_rerun_jobs_are_queued_again(ledger_only: Ledger) -> None:
    # ownership is by lock, not pid (flairwatch/ledger/owners.py): another re-run process claims
    # a job and dies without a word; its lock goes with it, so its job is an orphan
    ledger = ledger_only
    queue_reruns(ledger, "tiny-threshold", "0.0.2", now=NOW + 10)
    script = (
        "import os, sys\n"
        "from pathlib import Path\n"
        "from flairwatch.ledger.store import Ledger\n"
        "from flairwatch.research.reprocess import claim_rerun\n"
        "job = claim_rerun(Ledger(Path(sys.argv[1])), 'tiny-threshold', '0.0.2', os.getpid(),"
        f" {NOW + 11})\n"
        "print(job.id, flush=True)\n"
        "os._exit(0)\n"
    )
    dead = subprocess.run([sys.executable, "-c", script, str(ledger.path)], capture_output=True,
                          text=True, check=True)  # fmt: skip
    a = ledger.job(int(dead.stdout))
    b = claim_rerun(ledger, "tiny-threshold", "0.0.2", os.getpid(), NOW + 11)
    assert a.state is JobState.RUNNING and b is not None
    assert requeue_orphans(ledger, "tiny-threshold", "0.0.2", NOW + 12) == 1
    assert ledger.job(a.id).state is JobState.QUEUED
    assert ledger.job(b.id).state is JobState.RUNNING  # ours: this process lives


def test_since_limits_the_series_queued(ledger_only: Ledger) -> None:
    # the fixture records its series at NOW and NOW + 1
    ledger = ledger_only
    assert queue_reruns(ledger, "tiny-threshold", "0.0.2", now=NOW + 5, since=NOW + 0.5) == (1, 0)
    (sid,) = ledger.query("SELECT series_id FROM jobs WHERE priority < 0")[0]
    assert ledger.series(sid).series_key == "e1"
    assert parse_since("2026-03-15") == 1773532800.0  # 2026-03-15T00:00:00Z (from `date -d`)


@pytest.mark.parametrize(
    ("current", "only_outdated", "expected"),
    [
        ("0.0.1", False, True),
        ("0.0.2", False, False),  # already current with the target
        ("0.0.3", False, True),
        ("0.0.3", True, False),  # never downgrade with --only-outdated
        ("0.0.1", True, True),
    ],
)
def test_wants_rerun(current: str, only_outdated: bool, expected: bool) -> None:
    c = Candidate(1, "e1", "tiny-threshold", current)
    assert wants_rerun(c, "tiny-threshold", "0.0.2", only_outdated=only_outdated) is expected


def test_version_order_is_numeric() -> None:
    # semantic versioning 2.0.0, item 11: numeric identifiers compare numerically
    assert version_key("0.10.0") > version_key("0.9.1") > version_key("0.9.0")


def test_compare_masks_worked_example() -> None:
    old = np.zeros((10, 10, 4), bool)
    new = np.zeros((10, 10, 4), bool)
    old[1:3, 1:3, 1] = True  # lesion A: 4 voxels, kept in new as 2 voxels
    old[7:9, 7:9, 2] = True  # lesion B: 4 voxels, vanished
    new[1:3, 1, 1] = True
    new[5, 1:4, 3] = True  # lesion C: 3 voxels, appeared
    ch = compare_masks(old, new, (1.0, 1.0, 2.0), 26)
    # |A and B| = 2, |A| = 8, |B| = 5 -> Dice = 4 / 13
    assert ch.dice == pytest.approx(4 / 13)
    assert (ch.old_lesions, ch.new_lesions, ch.lesions_appeared, ch.lesions_vanished) == (
        2,
        2,
        1,
        1,
    )
    assert ch.old_volume_ml == pytest.approx(8 * 2.0 / 1000)
    assert ch.new_volume_ml == pytest.approx(5 * 2.0 / 1000)
    assert any("Dice" in r for r in flag_reasons(ch, Limits()))
    assert flag_reasons(ch, Limits(dice=0.0)) == []  # 0.006 mL: below the volume limits


def test_flag_limits_table() -> None:
    big = compare_masks(np.ones((10, 10, 10), bool), np.ones((10, 10, 10), bool), (1, 1, 1), 26)
    assert flag_reasons(big, Limits()) == []
    old = np.zeros((12, 12, 14), bool)
    old[1:11, 1:11, 1:11] = True  # 1000 voxels of 8 mm^3 = 8 mL
    new = old.copy()
    new[1:11, 1:11, 11:13] = True  # 1200 voxels = 9.6 mL
    grown = compare_masks(old, new, (2, 2, 2), 26)
    reasons = flag_reasons(grown, Limits(volume_ml=1.0, percent=10.0))
    assert len(reasons) == 2 and "+1.60 mL" in reasons[0] and "+20%" in reasons[1]


def test_svg_scatter_is_valid_and_marks_flagged() -> None:
    svg = svg_scatter([(1.0, 1.1, False, "a"), (2.0, 5.0, True, "b<&>")])
    root = ET.fromstring(svg)
    circles = root.findall("{http://www.w3.org/2000/svg}circle")
    assert [c.get("data-flagged") for c in circles] == ["0", "1"]
    assert float(circles[1].get("cy") or 0) < float(circles[0].get("cy") or 0)  # higher new


def test_progress_eta_and_terminal_bar() -> None:
    t = [0.0]
    out = io.StringIO()
    p = Progress(4, out, tty=False, clock=lambda: t[0])
    t[0] = 10.0
    p.step("e1 done")
    t[0] = 20.0
    p.step("e2 done")
    assert p.eta_seconds() == pytest.approx(20.0)
    assert out.getvalue().splitlines()[-1] == "reprocess 2/4 e2 done ETA 00:00:20"
    bar = io.StringIO()
    q = Progress(2, bar, tty=True, clock=lambda: t[0])
    q.step("x")
    q.step("y")
    assert bar.getvalue().startswith("\r[###############---------------] 1/2 x")
    assert bar.getvalue().endswith("\n")


def test_reruns_wait_for_arrivals_only_while_a_daemon_is_alive(ledger_only: Ledger) -> None:
    ledger = ledger_only
    _row, job = ledger.new_revision("1.2.3", "1.2.3.4", lambda r: ("s", "t", "e"), NOW + 20)
    ledger.move_job(job.id, [JobState.SETTLING], JobState.QUEUED, NOW + 20)
    assert not arrivals_waiting(ledger, NOW + 21), "no daemon: nobody will take the arrival"
    ledger.beat(4242, "running", NOW + 21, inbox="/inbox", started=NOW)
    assert arrivals_waiting(ledger, NOW + 22)
    assert not arrivals_waiting(ledger, NOW + 21 + HEARTBEAT_FRESH_SECONDS + 1), "stale beat"
    ledger.move_job(job.id, [JobState.QUEUED], JobState.SKIPPED, NOW + 23)
    assert not arrivals_waiting(ledger, NOW + 23)
