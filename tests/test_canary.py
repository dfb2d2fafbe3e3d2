"""The self-check ("canary"): the shipped phantom through the real pipeline, compared and recorded.

Oracles: the Dice similarity coefficient is recomputed with numpy from its definition
2|A and B| / (|A| + |B|) (Dice 1945, from memory); mask volumes are voxel counts times the voxel
volume |det| of the NIfTI affine read by nibabel (NIfTI-1 sform, nibabel docs); local clock times
come from Python's own datetime (the standard library docs). The expectations are perturbed by
hand so that drift is known to be there.
"""

from __future__ import annotations

import datetime as dt
import json
import shutil
import time
from collections.abc import Iterator
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from flairwatch.cli import main
from flairwatch.config import CanarySettings, Config, Identifiers
from flairwatch.daemon.canary import CanaryRunner, next_daily
from flairwatch.daemon.status import gather, problems, render
from flairwatch.engine.pipeline import Engine
from flairwatch.ledger.store import Ledger
from flairwatch.research import canary
from flairwatch.research.export import gather_rows
from flairwatch.research.metrics import dice

LIMITS = CanarySettings()


@pytest.fixture(scope="module")
def shipped_run(
    tmp_path_factory: pytest.TempPathFactory,
) -> tuple[canary.Verdict, canary.Measurement, Path]:
    """One run of the shipped default model, recorded in a fresh ledger."""
    state = tmp_path_factory.mktemp("canary_state")
    cfg = Config(state=state)
    with Ledger.open(state, check_fs=False) as ledger:
        verdict, measured = canary.run_canary(cfg, ledger, reason="test")
    assert measured is not None
    return verdict, measured, state


def _perturbed_data(tmp: Path, sha: str, *, drop_voxels: int, volume_factor: float) -> Path:
    """A copy of the shipped data whose expectation for ``sha`` is changed by hand."""
    data = tmp / "data"
    shutil.copytree(canary.CANARY_DATA, data)
    expected = json.loads((data / canary.EXPECTED_FILE).read_text(encoding="utf-8"))
    entry = expected[sha]
    mask, affine = canary.read_mask(data / entry["mask"])
    idx = np.flatnonzero(mask)[:drop_voxels]
    mask.flat[idx] = 0
    (data / entry["mask"]).write_bytes(canary.mask_bytes(mask, affine))
    entry["volume_ml"] *= volume_factor
    (data / canary.EXPECTED_FILE).write_text(json.dumps(expected), encoding="utf-8")
    return data


def test_shipped_model_passes_against_its_stored_expectation(
    shipped_run: tuple[canary.Verdict, canary.Measurement, Path],
) -> None:
    verdict, measured, state = shipped_run
    assert verdict.outcome == "passed", verdict.detail
    assert verdict.dice is not None and verdict.dice >= LIMITS.min_dice
    # the expected mask is the shipped file, read here by nibabel alone
    entry = json.loads((canary.CANARY_DATA / canary.EXPECTED_FILE).read_text(encoding="utf-8"))[
        measured.model_sha256
    ]
    img = nib.load(canary.CANARY_DATA / entry["mask"])
    expected = np.asarray(img.dataobj) != 0  # type: ignore[attr-defined]
    voxel_ml = abs(np.linalg.det(img.affine[:3, :3])) / 1000.0  # type: ignore[attr-defined]
    assert expected.sum() == entry["voxels"] > 0
    assert measured.volume_ml == pytest.approx(measured.mask.sum() * voxel_ml, rel=1e-3)
    assert abs(measured.volume_ml - entry["volume_ml"]) / entry["volume_ml"] * 100 <= 0.5
    with Ledger.open(state, check_fs=False) as ledger:
        run = canary.latest_run(ledger)
    assert run is not None and run.outcome == "passed" and run.model_sha256 == measured.model_sha256
    assert run.dice == pytest.approx(verdict.dice) and run.reason == "test"


def test_metrics_dice_equals_the_textbook_formula(
    shipped_run: tuple[canary.Verdict, canary.Measurement, Path],
) -> None:
    a = shipped_run[1].mask != 0
    b = a.copy()
    b.flat[np.flatnonzero(b)[:40]] = False  # a smaller mask inside a
    b[0, 0, 0] = True  # and one voxel outside it
    by_hand = 2.0 * np.logical_and(a, b).sum() / (a.sum() + b.sum())  # Dice 1945, from memory
    assert dice(a, b) == pytest.approx(by_hand, abs=1e-12)
    assert 0.9 < by_hand < 1.0


def test_compare_fires_just_beyond_each_limit(
    shipped_run: tuple[canary.Verdict, canary.Measurement, Path],
) -> None:
    m = shipped_run[1]
    same = canary.Expectation(m.model_sha256, "x", m.mask, m.volume_ml, "test")
    assert canary.compare(m, same, LIMITS).outcome == "passed"
    # volume: 0.49 % away passes, 0.51 % away drifts; the detail names the volumes
    for pct, outcome in ((0.49, "passed"), (0.51, "drifted")):
        exp = canary.Expectation(m.model_sha256, "x", m.mask, m.volume_ml / (1 + pct / 100), "t")
        v = canary.compare(m, exp, LIMITS)
        assert v.outcome == outcome, v.detail
    assert (
        "WMH volume" in v.detail and f"{m.volume_ml:.3f} mL" in v.detail and "Dice" not in v.detail
    )
    # Dice: remove k voxels so that 2(n - k) / (2n - k) lands just above / below 0.999
    n = int(m.mask.sum())
    k_pass = int(n * 0.001 / 0.999 / 2)  # Dice = 1 - k / (2n - k) >= 0.999 for small k
    for k, outcome in ((k_pass, "passed"), (k_pass + 2, "drifted")):
        fewer = m.mask.copy()
        fewer.flat[np.flatnonzero(fewer)[: max(k, 0)]] = 0
        exp = canary.Expectation(m.model_sha256, "x", fewer, m.volume_ml, "t")
        by_hand = 2.0 * (n - k) / (2 * n - k)
        assert (by_hand >= 0.999) == (outcome == "passed")
        assert canary.compare(m, exp, LIMITS).outcome == outcome
    grid = canary.Expectation(m.model_sha256, "x", m.mask[:-1], m.volume_ml, "t")
    assert "grid" in canary.compare(m, grid, LIMITS).detail


def test_drift_is_recorded_and_turns_status_unhealthy(
    tmp_path: Path,
    shipped_run: tuple[canary.Verdict, canary.Measurement, Path],
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    sha = shipped_run[1].model_sha256
    data = _perturbed_data(tmp_path, sha, drop_voxels=60, volume_factor=1.02)
    monkeypatch.setattr(canary, "CANARY_DATA", data)
    (tmp_path / "cfg.yaml").write_text(f"state: {tmp_path / 'state'}\n", encoding="utf-8")
    rc = main(["canary", "--config", str(tmp_path / "cfg.yaml")])
    out = capsys.readouterr().out
    assert rc == 1 and "DRIFTED" in out
    with Ledger.open(tmp_path / "state", check_fs=False) as ledger:
        run = canary.latest_run(ledger)
        assert run is not None and run.outcome == "drifted"
        assert run.detail is not None and "Dice" in run.detail and "WMH volume" in run.detail
        ledger.beat(1, "running", time.time(), inbox="/in", started=time.time())
        report = gather(ledger, time.time())
    assert not report.healthy
    (problem,) = report.problems
    assert "self-check" in problem and "drifted" in problem and "\n" not in problem
    assert "health: PROBLEM: the self-check" in render(report)


def _problems(canary_row: tuple[str, str, float]) -> list[str]:
    beat = {"state": "running", "beat": 100.0, "pid": 1, "host": "h"}
    return problems(beat, 110.0, oldest_wait_s=None, last_activity=100.0, outcomes=[],
                    stale_s=60.0, stuck_s=3600.0, failure_run=3, canary=canary_row)  # fmt: skip


def test_status_problem_is_pure_and_a_later_pass_clears_it() -> None:
    drifted = _problems(("drifted", "Dice 0.9800", 90.0))
    assert len(drifted) == 1 and "Dice 0.9800" in drifted[0]
    assert _problems(("passed", "ok", 95.0)) == []
    assert _problems(("baseline", "kept", 95.0)) == []
    assert "could not run" in _problems(("failed", "no model", 95.0))[0]


def test_own_model_records_a_baseline_then_passes(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    state = tmp_path / "state"
    cfg = Config(state=state, model=tiny_model_manifest)
    engine = Engine(canary.canary_config(cfg))
    with Ledger.open(state, check_fs=False) as ledger:
        first, m1 = canary.run_canary(cfg, ledger, reason="test", engine=engine)
        second, m2 = canary.run_canary(cfg, ledger, reason="test", engine=engine)
        outcomes = [r[0] for r in ledger.query("SELECT outcome FROM canary_runs ORDER BY id")]
        counts = ledger.state_counts()
        tables = {t: ledger.query(f"SELECT COUNT(*) FROM {t}")[0][0]
                  for t in ("series", "jobs", "results", "files")}  # fmt: skip
        rows = gather_rows(ledger, ids=Identifiers(), secret=lambda: b"k" * 32, connectivity=26)
    assert m1 is not None and m2 is not None
    assert first.outcome == "baseline" and "baseline" in first.detail, first.detail
    assert second.outcome == "passed" and second.dice == 1.0, second.detail
    assert outcomes == ["baseline", "passed"]
    kept = json.loads((state / "canary" / f"{m1.model_sha256}.json").read_text(encoding="utf-8"))
    assert kept["voxels"] == int(m1.mask.sum()) and kept["volume_ml"] == pytest.approx(m1.volume_ml)
    # canary runs never reach jobs, results, the export or job counts
    assert counts == {} or sum(counts.values()) == 0
    assert tables == {"series": 0, "jobs": 0, "results": 0, "files": 0}
    assert rows == []


def test_next_daily_follows_the_local_clock() -> None:
    day = dt.datetime(2026, 3, 10, 2, 59, 30)  # naive local time
    assert dt.datetime.fromtimestamp(next_daily(day.timestamp(), "03:00")) == day.replace(
        minute=0, second=0, hour=3
    )
    at = dt.datetime(2026, 3, 10, 3, 0, 0)
    assert dt.datetime.fromtimestamp(next_daily(at.timestamp(), "03:00")) == dt.datetime(
        2026, 3, 11, 3, 0
    )
    late = dt.datetime(2026, 12, 31, 23, 30)
    assert dt.datetime.fromtimestamp(next_daily(late.timestamp(), "00:15")) == dt.datetime(
        2027, 1, 1, 0, 15
    )


@pytest.fixture
def runner_ledger(tmp_path: Path) -> Iterator[Ledger]:
    with Ledger.open(tmp_path / "state", check_fs=False) as ledger:
        yield ledger


def test_daemon_runner_starts_a_child_at_start_up_and_logs_it(
    tmp_path: Path,
    tiny_model_manifest: Path,
    runner_ledger: Ledger,
    caplog: pytest.LogCaptureFixture,
) -> None:
    cfg = Config(state=tmp_path / "state", model=tiny_model_manifest, threads=1)
    clock = [1_800_000_000.0]
    runner = CanaryRunner(cfg, runner_ledger, wall=lambda: clock[0])
    with caplog.at_level("INFO"):
        runner.tick()  # start-up: due at once
        assert runner.proc is not None
        runner.proc.join(timeout=120)
        runner.tick()  # reports the finished child; nothing is due until the daily time
    assert runner.proc is None
    assert "self-check baseline" in caplog.text
    run = canary.latest_run(runner_ledger)
    assert run is not None and run.outcome == "baseline" and run.reason == "start-up"
    assert runner.next_due == next_daily(clock[0], "03:00") and runner.reason == "daily"
