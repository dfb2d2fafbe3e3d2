"""The self-check ("canary"): one fixed phantom series through the full pipeline, compared.

A small synthetic FLAIR series ships with the package (``flairwatch/data/canary/``, made once by
``scripts/make_canary.py`` with a fixed seed) together with the result each shipped model gave on
it, stored per model file hash (SHA-256): the mask as a compressed NIfTI and its WMH volume. A
run unpacks the series into a temporary folder, sends it through the same stages the daemon
uses (discover, assemble, select, :class:`~flairwatch.engine.pipeline.Engine`: load, analyse,
write the result folder) and compares the mask with the expected one:

- **passed**: Dice >= ``canary.min_dice`` and the volume within
  ``canary.max_volume_change_percent`` % of the expected volume;
- **drifted**: either number moved beyond its limit (the detail names the numbers);
- **baseline**: the model has no stored expectation (a lab's own model): this run's result is
  kept in the state folder (``canary/<sha256>.json`` and its mask) and later runs compare with it;
- **failed**: the run itself could not finish (the detail says why).

The run uses the configured model with the default settings otherwise (the model's own
threshold, default clean-up, one thread, default selection rules), so it measures the
computation (libraries, CPU, model file), never a lab's choice of settings. Runs are recorded
in the ledger's ``canary_runs`` table only: the canary never touches the series, jobs or results
tables, so it never shows in results, ``export``, the gallery or job counts. Research use only.
"""

from __future__ import annotations

import gzip
import json
import logging
import math
import os
import tarfile
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import numpy.typing as npt

from flairwatch.config import CanarySettings, Config
from flairwatch.engine import results
from flairwatch.engine.pipeline import MASK_FILE, Engine
from flairwatch.engine.process import plan_inputs
from flairwatch.errors import FlairwatchError, StageFailed
from flairwatch.ledger.store import Ledger
from flairwatch.research.metrics import dice

log = logging.getLogger(__name__)

CANARY_DATA = Path(__file__).resolve().parent.parent / "data" / "canary"
"""The shipped series and expectations (package data)."""
SERIES_ARCHIVE = "series.tar.xz"
EXPECTED_FILE = "expected.json"
BASELINE_FOLDER = "canary"  # under the state folder: baselines of models without a shipped one
OUTCOMES = ("passed", "drifted", "baseline", "failed")


@dataclass(frozen=True, eq=False)
class Measurement:
    """One run's result: the model, the WMH mask (i, j, k, 0/1 on the series grid) and its volume."""

    model_name: str
    model_version: str
    model_sha256: str
    mask: npt.NDArray[np.uint8]
    affine: npt.NDArray[np.float64]  # the mask file's RAS affine, as NIfTI stores it
    volume_ml: float


@dataclass(frozen=True, eq=False)
class Expectation:
    """The result a model is expected to give on the canary series; ``source`` is where it lives."""

    model_sha256: str
    model: str
    mask: npt.NDArray[np.uint8]
    volume_ml: float
    source: str


@dataclass(frozen=True)
class Verdict:
    """A run's outcome (one of :data:`OUTCOMES`) and the numbers behind it."""

    outcome: str
    detail: str
    dice: float | None = None
    volume_ml: float | None = None
    expected_volume_ml: float | None = None

    @property
    def ok(self) -> bool:
        return self.outcome in ("passed", "baseline")


def volume_change_percent(volume_ml: float, expected_ml: float) -> float:
    """Signed change of ``volume_ml`` from ``expected_ml`` in % of ``expected_ml``.

    0 when both are 0; infinite when only the expected volume is 0.
    """
    if expected_ml == 0:
        return 0.0 if volume_ml == 0 else math.copysign(math.inf, volume_ml)
    return (volume_ml - expected_ml) / expected_ml * 100.0


def compare(measured: Measurement, expected: Expectation, limits: CanarySettings) -> Verdict:
    """Compare a run with its expectation (pure): passed, or drifted naming what moved."""
    facts = {"volume_ml": measured.volume_ml, "expected_volume_ml": expected.volume_ml}
    if measured.mask.shape != expected.mask.shape:
        detail = (
            f"the mask grid {measured.mask.shape} differs from the expected {expected.mask.shape}"
        )
        return Verdict("drifted", detail, **facts)
    score = dice(measured.mask, expected.mask)
    change = volume_change_percent(measured.volume_ml, expected.volume_ml)
    moved = []
    if score < limits.min_dice:
        moved.append(f"Dice {score:.4f} with the expected mask is below {limits.min_dice}")
    if abs(change) > limits.max_volume_change_percent:
        moved.append(
            f"WMH volume {measured.volume_ml:.3f} mL vs expected {expected.volume_ml:.3f} mL "
            f"({change:+.2f} %, limit {limits.max_volume_change_percent} %)"
        )
    if moved:
        return Verdict("drifted", "; ".join(moved), score, **facts)
    detail = (
        f"Dice {score:.4f}, WMH volume {measured.volume_ml:.3f} mL ({change:+.2f} % from the "
        f"expected {expected.volume_ml:.3f} mL, {expected.source})"
    )
    return Verdict("passed", detail, score, **facts)


# ---- the run -------------------------------------------------------------------------------


def canary_config(cfg: Config, *, threads: int = 1) -> Config:
    """The settings of a canary run: the configured model, everything else at its default."""
    return Config(model=cfg.model, threads=threads, worker_memory_mb=cfg.worker_memory_mb)


def unpack_series(archive: Path, target: Path) -> Path:
    """Unpack the shipped series (a tar.xz of DICOM files) into ``target``; return the folder."""
    folder = target / "series"
    folder.mkdir(parents=True)
    with tarfile.open(archive, "r:xz") as tar:
        for member in tar.getmembers():
            # plain files with plain names only: the archive is ours, but a damaged install
            # must not write outside the temporary folder
            name = Path(member.name).name
            if not member.isfile() or name in ("", ".", ".."):
                continue
            src = tar.extractfile(member)
            assert src is not None
            (folder / name).write_bytes(src.read())
    return folder


def read_mask(path: Path) -> tuple[npt.NDArray[np.uint8], npt.NDArray[np.float64]]:
    """A 0/1 mask file as (array in the file's own voxel order, RAS affine)."""
    img = nib.load(path)
    data = (np.asarray(img.dataobj) != 0).astype(np.uint8)  # type: ignore[attr-defined]
    return data, np.asarray(img.affine, dtype=np.float64)  # type: ignore[attr-defined]


def mask_bytes(mask: npt.NDArray[np.uint8], affine: npt.NDArray[np.float64]) -> bytes:
    """A mask as compressed NIfTI-1 bytes (gzip without a time stamp: same mask, same bytes)."""
    img = nib.Nifti1Image(mask.astype(np.uint8), affine)
    img.set_sform(affine, code=1)
    img.set_qform(affine, code=1)
    return gzip.compress(img.to_bytes(), mtime=0)


def measure(cfg: Config, *, data: Path | None = None, engine: Engine | None = None) -> Measurement:
    """Run the canary series through the full pipeline in a temporary folder (removed after).

    ``data`` is the folder of the series and expectations (default :data:`CANARY_DATA`).
    Raises :class:`StageFailed` when the series is not found or not selected as one FLAIR.
    """
    data = CANARY_DATA if data is None else data
    run_cfg = canary_config(cfg)
    engine = engine or Engine(run_cfg)
    with tempfile.TemporaryDirectory(prefix="flairwatch-canary-") as tmp:
        series_dir = unpack_series(data / SERIES_ARCHIVE, Path(tmp))
        plan = plan_inputs([series_dir], run_cfg, all_series=False)
        if len(plan.selected) != 1:
            raise StageFailed(
                f"the canary series in {data} gave {len(plan.selected)} FLAIR series instead of "
                "one; reinstall flairwatch"
            )
        outcome = engine.process(plan.selected[0], Path(tmp) / "results", secret=os.urandom(32))
        mask, affine = read_mask(outcome.result_dir / MASK_FILE)
    m = engine.manifest
    volume = float(outcome.summary["lesion_volume_ml"])
    return Measurement(m.name, m.version, m.sha256, mask, affine, volume)


def _shipped(data: Path) -> dict[str, Any]:
    try:
        raw = json.loads((data / EXPECTED_FILE).read_text(encoding="utf-8"))
    except FileNotFoundError:
        return {}
    return dict(raw) if isinstance(raw, dict) else {}


def find_expectation(
    sha256: str, state: Path | None, data: Path = CANARY_DATA
) -> Expectation | None:
    """The shipped expectation of this model file, else a baseline in the state folder, else None."""
    places = [(data, _shipped(data).get(sha256), "shipped with flairwatch")]
    if state is not None:
        path = state / BASELINE_FOLDER / f"{sha256}.json"
        if path.is_file():
            entry = json.loads(path.read_text(encoding="utf-8"))
            places.append(
                (
                    path.parent,
                    entry,
                    f"baseline of {time.strftime('%Y-%m-%d', time.localtime(entry['made']))}",
                )
            )
    for folder, entry, source in places:
        if entry:
            mask, _ = read_mask(folder / entry["mask"])
            return Expectation(sha256, entry["model"], mask, float(entry["volume_ml"]), source)
    return None


def expectation_entry(measured: Measurement, mask_name: str, now: float) -> dict[str, Any]:
    """The JSON entry of an expectation (shipped or baseline) made from a run."""
    return {
        "model": f"{measured.model_name} {measured.model_version}",
        "volume_ml": round(measured.volume_ml, 6),
        "voxels": int(np.count_nonzero(measured.mask)),
        "mask": mask_name,
        "made": round(now, 3),
    }


def store_baseline(measured: Measurement, state: Path, now: float) -> Path:
    """Keep a run as its model's baseline in ``<state>/canary/`` (atomic writes); return the JSON."""
    folder = state / BASELINE_FOLDER
    folder.mkdir(parents=True, exist_ok=True, mode=results.DIR_MODE)
    mask_name = f"{measured.model_sha256}-mask.nii.gz"
    results.write_atomic(folder / mask_name, mask_bytes(measured.mask, measured.affine))
    entry = expectation_entry(measured, mask_name, now)
    target = folder / f"{measured.model_sha256}.json"
    results.write_atomic(target, (json.dumps(entry, indent=1) + "\n").encode("utf-8"))
    return target


# ---- the ledger record ---------------------------------------------------------------------


@dataclass(frozen=True)
class CanaryRun:
    """One row of ``canary_runs`` (times in seconds since the epoch)."""

    id: int
    started: float
    seconds: float | None
    reason: str | None
    model: str
    model_sha256: str | None
    dice: float | None
    volume_ml: float | None
    expected_volume_ml: float | None
    outcome: str
    detail: str | None


def record_run(
    ledger: Ledger,
    verdict: Verdict,
    *,
    started: float,
    seconds: float,
    reason: str,
    model: tuple[str, str, str] | None,
) -> int:
    """Add one ``canary_runs`` row; ``model`` is (name, version, file sha256) when known."""
    name, version, sha = model or (None, None, None)
    with ledger.transaction() as db:
        cur = db.execute(
            "INSERT INTO canary_runs (started, seconds, reason, model_name, model_version,"
            " model_sha256, dice, volume_ml, expected_volume_ml, outcome, detail)"
            " VALUES (?,?,?,?,?,?,?,?,?,?,?)",
            (started, seconds, reason, name, version, sha, verdict.dice, verdict.volume_ml,
             verdict.expected_volume_ml, verdict.outcome, verdict.detail),
        )  # fmt: skip
        return int(cur.lastrowid or 0)


def latest_run(ledger: Ledger, after_id: int = 0) -> CanaryRun | None:
    """The newest ``canary_runs`` row (with an id above ``after_id``), or None."""
    rows = ledger.query(
        "SELECT id, started, seconds, reason, COALESCE(model_name, '') || ' ' ||"
        " COALESCE(model_version, ''), model_sha256, dice, volume_ml, expected_volume_ml,"
        " outcome, detail FROM canary_runs WHERE id > ? ORDER BY id DESC LIMIT 1",
        (after_id,),
    )
    return CanaryRun(*rows[0]) if rows else None


def run_canary(
    cfg: Config,
    ledger: Ledger,
    *,
    reason: str,
    data: Path | None = None,
    clock: Callable[[], float] = time.time,
    engine: Engine | None = None,
) -> tuple[Verdict, Measurement | None]:
    """Measure, compare (or keep a baseline) and record one canary run; never raises for a
    failed run (that is recorded as ``failed``). ``cfg.state`` holds the baselines."""
    started = clock()
    data = CANARY_DATA if data is None else data
    measured: Measurement | None = None
    try:
        measured = measure(cfg, data=data, engine=engine)
        expected = find_expectation(measured.model_sha256, cfg.state, data)
        if expected is not None:
            verdict = compare(measured, expected, cfg.canary)
        elif cfg.state is None:
            verdict = Verdict("failed", "no expectation for this model and no state folder "
                              "to keep a baseline in; set 'state' in the config",
                              volume_ml=measured.volume_ml)  # fmt: skip
        else:
            kept = store_baseline(measured, cfg.state, clock())
            verdict = Verdict(
                "baseline",
                f"no stored expectation for model {measured.model_name} "
                f"{measured.model_version} (sha256 {measured.model_sha256[:12]}): this run "
                f"(WMH {measured.volume_ml:.3f} mL) is kept as the baseline in {kept}; later "
                "runs are compared with it",
                volume_ml=measured.volume_ml,
            )
    except (FlairwatchError, OSError, ValueError) as exc:
        verdict = Verdict("failed", f"the self-check could not run: {exc}")
    model = None
    if measured is not None:
        model = (measured.model_name, measured.model_version, measured.model_sha256)
    record_run(ledger, verdict, started=started, seconds=clock() - started, reason=reason,
               model=model)  # fmt: skip
    return verdict, measured
