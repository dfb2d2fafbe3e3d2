"""A short run of scripts/bench_junk.py (issue 10 item 9): junk mixed with good series, and a
burst of files into a running daemon.

Real ``flairwatch watch`` processes, real files, the tiny test model. The junk follows the
DICOM standard's encoding (PS3.5) as scripts/junk_files.py describes; what counts as handled
is common practice for an unattended inbox: no crash, a one-line reason for every refused
file, every good series done, nothing outside the inbox read, no series lost in a burst.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "scripts"))

import bench_junk  # noqa: E402  (scripts/ is not a package)


def test_junk_mix_refused_with_reasons_and_good_series_done(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    started = time.monotonic()
    junk = bench_junk.junk_run(tmp_path / "junk", tiny_model_manifest, 40, 2, (64, 64, 12))
    assert junk["exit_code"] in (0, 1)  # 1: some series refused, as they must be
    assert junk["tracebacks"] == 0 and junk["unexpected_errors"] == []
    assert junk["junk_files"] == 40
    assert junk["junk_with_reason"] == 40, junk["misses"]
    assert junk["reasons_multi_line"] == 0
    kinds = set(junk["junk_outcomes"])
    assert {"cut", "length", "dimensions", "spacing", "compressed", "plain"} <= kinds
    assert junk["good_done"] == junk["good_series"] == 2
    assert junk["files_outside_inbox_read"] == 0
    assert time.monotonic() - started < 30


def test_burst_of_files_into_a_running_daemon_loses_no_series(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    burst = bench_junk.burst_run(tmp_path / "burst", tiny_model_manifest, 120, 30)
    assert burst["series"] == 4 and burst["files"] == 120
    assert burst["lost"] == 0 and burst["done"] == 4, burst["states"]
    assert burst["tracebacks"] == 0 and burst["exit_code"] == 0
