"""How fast ``flairwatch review`` shows the next slice and the next series, over real HTTP.

Builds (or reuses) the demo's processed phantom series (``flairwatch demo --out FOLDER``: three
invented participants, 2-D axial and 3-D sagittal synthetic FLAIR, the shipped model), starts
``flairwatch review`` on it as its own process on a free port, and times what a browser asks
for:

- next series: the series page plus its first slice, after the previous series' slices were
  viewed (the application loads the next series of the queue in the background while one is
  shown), target <= 1 s; the first series, with nothing loaded, is reported apart;
- next slice: one slice PNG of a loaded series, default window and outlines, target <= 100 ms.

Times are wall-clock round trips (client and server on this machine) and are also given in the
sgemm unit measured in the same run (:mod:`flairwatch.speed`). Nothing is marked in the ledger.

Usage: python scripts/bench_review.py [--folder work/review-bench] [--slices 30]
"""

from __future__ import annotations

import argparse
import http.cookiejar
import re
import statistics
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

from flairwatch.speed import sgemm_unit

TARGET_SLICE_S = 0.100
TARGET_SERIES_S = 1.0


def fetch(opener: urllib.request.OpenerDirector, url: str) -> tuple[float, bytes]:
    start = time.perf_counter()
    with opener.open(url, timeout=60) as resp:
        body = resp.read()
    return time.perf_counter() - start, body


def start_app(config: Path) -> tuple[subprocess.Popen[str], str]:
    proc = subprocess.Popen(
        [sys.executable, "-m", "flairwatch", "review", "--config", str(config), "--port", "0"],
        stdout=subprocess.PIPE,
        text=True,
    )
    assert proc.stdout is not None
    line = proc.stdout.readline()
    match = re.search(r"(http\S+)", line)
    if match is None:
        proc.terminate()
        raise SystemExit(f"flairwatch review did not start: {line!r}")
    return proc, match.group(1)


def ms(seconds: float) -> str:
    return f"{seconds * 1000:.0f} ms"


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--folder", type=Path, default=Path("work/review-bench"))
    parser.add_argument("--slices", type=int, default=30, help="slices timed per series")
    args = parser.parse_args()
    config = args.folder / "flairwatch.yaml"
    if not config.is_file():
        from flairwatch.cli import main as cli

        if cli(["demo", "--out", str(args.folder)]) != 0:
            return 1
    unit = sgemm_unit()
    proc, address = start_app(config)
    try:
        opener = urllib.request.build_opener(
            urllib.request.HTTPCookieProcessor(http.cookiejar.CookieJar())
        )
        _, queue = fetch(opener, address)  # the token becomes a cookie
        base = address.split("/?")[0]
        keys = list(dict.fromkeys(re.findall(rb'data-key="(e[0-9a-f]{12}(?:-r\d+)?)"', queue)))
        if not keys:
            raise SystemExit("no series in the queue")
        series_times: list[float] = []
        slice_times: list[float] = []
        for raw in keys:
            key = raw.decode()
            page_s, page = fetch(opener, f"{base}/series/{key}")
            depth = int(re.search(rb'data-depth="(\d+)"', page).group(1))  # type: ignore[union-attr]
            start = int(re.search(rb'data-start="(\d+)"', page).group(1))  # type: ignore[union-attr]
            first_s, _ = fetch(opener, f"{base}/series/{key}/slice/{start}.png")
            series_times.append(page_s + first_s)
            own = []
            for n in range(min(args.slices, depth)):
                k = (start + 1 + n) % depth
                took, png = fetch(opener, f"{base}/series/{key}/slice/{k}.png?opacity=30")
                assert png.startswith(b"\x89PNG")
                own.append(took)
            slice_times.extend(own)
            print(
                f"series {key} ({depth} slices): page + first slice {ms(page_s + first_s)} "
                f"(page {ms(page_s)}); next slice median {ms(statistics.median(own))}, "
                f"max {ms(max(own))}"
            )
    finally:
        proc.terminate()
        proc.wait(timeout=10)
    cold, following = series_times[0], series_times[1:] or series_times
    worst_series = max(following)
    p95 = sorted(slice_times)[int(0.95 * (len(slice_times) - 1))]
    print(f"sgemm unit: {unit:.2f} s")
    print(
        f"first series (nothing loaded yet): {ms(cold)} = {cold / unit:.3f} units; "
        f"longest cold load {ms(max(series_times))}"
    )
    print(
        f"next series (prefetched while the previous one was viewed): worst {ms(worst_series)} "
        f"= {worst_series / unit:.3f} units (target {ms(TARGET_SERIES_S)})"
    )
    print(
        f"next slice: median {ms(statistics.median(slice_times))}, 95th percentile {ms(p95)} = "
        f"{p95 / unit:.4f} units, max {ms(max(slice_times))} (target {ms(TARGET_SLICE_S)})"
    )
    ok = worst_series <= TARGET_SERIES_S and p95 <= TARGET_SLICE_S
    print("within targets" if ok else "OUTSIDE the targets")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
