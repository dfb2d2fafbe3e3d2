"""The re-run batch of ``flairwatch reprocess``: run the queued re-runs, then report and prune.

The queue itself (which series, in which order, one job at a time) is
:mod:`flairwatch.research.reprocess`; this module runs the queued jobs in this process
(:func:`run_all`) or on Dask workers (:func:`run_cluster`, through
:mod:`flairwatch.research.scaleout`), writes the change report of the series it finished
(:func:`report`) and then applies ``keep_versions`` (:func:`prune`). Progress and outcomes go to
stderr.
"""

from __future__ import annotations

import os
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from flairwatch import keys
from flairwatch.config import Config
from flairwatch.engine.models import manifest_path
from flairwatch.errors import ConfigInvalid
from flairwatch.ledger.store import Ledger
from flairwatch.research.change_report import Limits, write_report
from flairwatch.research.reprocess import (
    ARRIVAL_POLL_SECONDS,
    EXIT_FAILED,
    EXIT_OK,
    Progress,
    arrivals_waiting,
    change_rows,
    claim_rerun,
    remaining,
    run_one,
)


def run_cluster(ledger: Ledger, cfg: Config, address: str, name: str, version: str,
                 limits: Limits) -> int:  # fmt: skip
    try:
        from flairwatch.research.scaleout import connect, run_on_cluster
    except ImportError as exc:
        if (exc.name or "").split(".")[0] not in ("dask", "distributed"):
            raise
        raise ConfigInvalid(
            "--cluster needs Dask distributed; install the 'cluster' extra (dask[distributed])"
        ) from None

    secret = keys.load_or_create_secret(cfg.state or Path("."))
    progress = Progress(remaining(ledger, name, version), sys.stderr,
                        tty=sys.stderr.isatty(), clock=time.monotonic)  # fmt: skip
    client, cluster = connect(address)
    try:
        finished, failures = run_on_cluster(
            ledger, client, cfg, manifest_path(cfg.model), secret, name=name, version=version,
            on_step=lambda job_id, outcome: progress.step(f"job {job_id} {outcome}"),
        )  # fmt: skip
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    if finished:
        report(ledger, cfg, finished, name, version, limits)
        prune(ledger, cfg)
    return EXIT_FAILED if failures else EXIT_OK


def run_all(ledger: Ledger, cfg: Config, manifest: Any, name: str, version: str,
             limits: Limits) -> int:  # fmt: skip
    from flairwatch.engine.pipeline import Engine

    engine = Engine(cfg, manifest=manifest)
    secret = keys.load_or_create_secret(cfg.state or Path("."))
    progress = Progress(remaining(ledger, name, version), sys.stderr,
                        tty=sys.stderr.isatty(), clock=time.monotonic)  # fmt: skip
    finished: list[int] = []
    failures = 0
    while True:
        while arrivals_waiting(ledger, time.time()):
            time.sleep(ARRIVAL_POLL_SECONDS)
        job = claim_rerun(ledger, name, version, os.getpid(), time.time())
        if job is None:
            break
        outcome = run_one(ledger, engine, cfg, secret, job, time.time())
        key = ledger.series(job.series_id).series_key or str(job.series_id)
        if outcome == "done":
            finished.append(job.series_id)
        elif outcome != "retry":
            failures += 1
        progress.step(f"{key} {outcome}")
    left = remaining(ledger, name, version)
    if left:
        print(f"{left} re-run job(s) still waiting (a retry later, or another process has them);"
              " run reprocess again to finish them", file=sys.stderr)  # fmt: skip
    if finished:
        report(ledger, cfg, finished, name, version, limits)
        prune(ledger, cfg)
    return EXIT_FAILED if failures else EXIT_OK


def prune(ledger: Ledger, cfg: Config) -> None:
    """After the change report (which reads the old folders): apply ``keep_versions``."""
    from flairwatch.research.retention import prune_versions

    removed = prune_versions(ledger, cfg.keep_versions)
    if removed:
        print(f"removed {len(removed)} older result folder(s) (keep_versions {cfg.keep_versions})",
              file=sys.stderr)  # fmt: skip


def report(ledger: Ledger, cfg: Config, ids: Sequence[int], name: str, version: str,
            limits: Limits) -> int:  # fmt: skip
    assert cfg.results is not None
    rows = change_rows(ledger, ids, name, version, limits, cfg.connectivity)
    stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime())
    base = cfg.results / "reports" / f"changes-{name}-{version}-{stamp}"
    folder, n = base, 1
    while folder.exists():  # two reports in one second: never overwrite the first
        n += 1
        folder = base.with_name(f"{base.name}-{n}")
    write_report(folder, rows, limits, f"Changes with model {name} {version}")
    flagged = sum(r["flagged"] for r in rows)
    print(f"change report: {folder / 'report.html'} ({len(rows)} series, {flagged} flagged)",
          file=sys.stderr)  # fmt: skip
    return EXIT_OK
