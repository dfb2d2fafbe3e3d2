"""Re-runs on a Dask distributed cluster: the coordinator keeps the ledger, workers compute.

Used by ``flairwatch reprocess --cluster ADDRESS`` (a running scheduler, e.g. one started by
dask-jobqueue on Slurm) or ``--cluster local:N`` (a local cluster of N worker processes).

- Only the coordinator (this process) opens the ledger: it claims re-run jobs, sends each
  worker the series' file paths, and records what comes back. The ledger stays on the
  coordinator's local disk (docs/architecture.md, failure modes: SQLite over a network file system corrupts).
- Workers build one :class:`~flairwatch.engine.pipeline.Engine` each (a worker plugin, so the ONNX
  session is reused) and write result folders straight into the shared results folder, with
  the same build-then-rename as on one machine; a folder finished by a worker that the
  coordinator never heard about is adopted on the next try, not recomputed.
- The inbox/archive files and the results folder must have the same paths on every worker.

Needs the optional ``cluster`` extra (``dask[distributed]``).
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, cast

from distributed import Client, LocalCluster, WorkerPlugin, as_completed, get_worker

from flairwatch.config import Config
from flairwatch.engine import results
from flairwatch.errors import ConfigInvalid, FlairwatchError, InputRejected
from flairwatch.ledger.store import JobRow, JobState, Ledger
from flairwatch.research.reprocess import claim_rerun

log = logging.getLogger(__name__)

PLUGIN_NAME = "flairwatch-engine"
DEFAULT_IN_FLIGHT_PER_WORKER = 2


@dataclass(frozen=True)
class WorkItem:
    """What a worker needs for one series (plain, picklable)."""

    job_id: int
    paths: tuple[str, ...]
    study_uid: str
    series_uid: str
    revision: int


@dataclass(frozen=True)
class WorkDone:
    job_id: int
    result_dir: str
    summary: dict[str, Any]
    adopted: bool
    seconds: float


class EnginePlugin(WorkerPlugin):
    """Dask worker plugin: one Engine per worker process, built once at worker start."""

    name = PLUGIN_NAME

    def __init__(self, cfg: Config, manifest_path: Path, secret: bytes) -> None:
        self.cfg, self.manifest_path, self.secret = cfg, manifest_path, secret
        self.engine: Any = None

    def setup(self, worker: Any) -> None:
        from flairwatch.engine.manifest import load_manifest
        from flairwatch.engine.pipeline import Engine

        self.engine = Engine(self.cfg, manifest=load_manifest(self.manifest_path))

    def teardown(self, worker: Any) -> None:
        self.engine = None


def compute(item: WorkItem) -> WorkDone:
    """Run on a worker: read the series' files, process, write the result folder atomically."""
    from flairwatch.intake.assemble import group_series
    from flairwatch.intake.discover import read_record

    plugin = cast(EnginePlugin, get_worker().plugins[PLUGIN_NAME])
    cfg = plugin.cfg
    assert cfg.results is not None and plugin.engine is not None
    start = time.monotonic()
    found, _ = group_series(read_record(Path(p)) for p in item.paths if os.path.isfile(p))
    series = [s for s in found if s.key == (item.study_uid, item.series_uid)]
    if not series:
        raise InputRejected("its input files are not readable from this worker; share them")
    out = plugin.engine.process(
        series[0], cfg.results, secret=plugin.secret, revision=item.revision
    )
    return WorkDone(
        item.job_id, str(out.result_dir), dict(out.summary), out.adopted,
        time.monotonic() - start,
    )  # fmt: skip


def _item(ledger: Ledger, job: JobRow) -> WorkItem:
    paths = tuple(f.path for f in ledger.revision_files(job.series_id))
    return WorkItem(job.id, paths, job.study_uid, job.series_uid, job.revision)


def run_on_cluster(
    ledger: Ledger,
    client: Any,
    cfg: Config,
    manifest_path: Path,
    secret: bytes,
    *,
    name: str,
    version: str,
    on_step: Callable[[int, str], None] = lambda job_id, outcome: None,
) -> tuple[list[int], int]:
    """Run every queued re-run job for the model on the cluster; return (done series, failures).

    Keeps at most :data:`DEFAULT_IN_FLIGHT_PER_WORKER` jobs per worker claimed at a time, so
    new arrivals and a crash leave few jobs to requeue.
    """
    client.register_plugin(EnginePlugin(cfg, manifest_path, secret), name=PLUGIN_NAME)
    workers = max(1, len(client.scheduler_info().get("workers", {})))
    limit = workers * DEFAULT_IN_FLIGHT_PER_WORKER
    pid = os.getpid()
    done: list[int] = []
    failures = 0
    pending = as_completed()
    in_flight: dict[str, JobRow] = {}  # future key -> claimed job

    def top_up() -> None:
        while len(in_flight) < limit:
            job = claim_rerun(ledger, name, version, pid, time.time())
            if job is None:
                return
            future = client.submit(compute, _item(ledger, job), pure=False)
            in_flight[future.key] = job
            pending.add(future)

    top_up()
    for future in pending:
        job = in_flight.pop(future.key)
        try:
            result: WorkDone = future.result()
        except Exception as exc:  # any worker error is recorded for its series; the run goes on
            state = JobState.REFUSED if isinstance(exc, InputRejected) else JobState.FAILED
            message = str(exc) if isinstance(exc, FlairwatchError | OSError) else (
                f"unexpected {type(exc).__name__}: {exc}")  # fmt: skip
            ledger.move_job(job.id, [JobState.RUNNING], state, time.time(), error=message)
            log.error("series job %d: %s: %s", job.id, state.value, message)
            failures += 1
            on_step(job.id, state.value)
        else:
            ledger.finish_done(
                job.id, result.result_dir, result.summary, adopted=result.adopted,
                seconds=result.seconds, now=time.time(),
            )  # fmt: skip
            folder = Path(result.result_dir)
            results.set_current(folder.parent, folder.name)
            done.append(job.series_id)
            on_step(job.id, "done")
        top_up()
    return done, failures


def connect(address: str) -> tuple[Any, Any]:
    """``local:N`` starts N local worker processes; anything else is a scheduler address."""
    if address.startswith("local:"):
        try:
            n = int(address.split(":", 1)[1])
        except ValueError:
            raise ConfigInvalid(f"--cluster {address!r}: use local:N with N workers") from None
        cluster = LocalCluster(
            n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None
        )
        return Client(cluster), cluster
    return Client(address), None
