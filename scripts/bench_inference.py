"""Inference time of a WMH model on one 256 x 256 x 48 FLAIR series, per pipeline stage.

Usage, from the repository root::

    .venv/bin/python scripts/bench_inference.py                     # shipped model, 2 threads
    .venv/bin/python scripts/bench_inference.py --model other/model.yaml --runs 9

The series is a phantom from the generator (2D axial, 256 x 256 pixels of 0.9 mm, 48 slices of
3 mm, a 6 mL lesion load), generated in memory once; ``--synthetic`` uses a plain numpy
ellipsoid head with bright blobs instead (no brain template needed). The model session is built
once (as a worker does), one untimed warm-up run follows, then ``--runs`` timed runs of
:func:`flairwatch.engine.pipeline.analyse`: the median of each stage (to_model_grid, infer,
to_series_grid, post_process) and of the total are printed.

Timings depend on the machine and on what else runs on it, so a reference workload is timed in
the same run, interleaved with the model runs: a fixed float32 matrix product (numpy, 1024 x
1024, 8 times). The ratio model / reference is the figure to compare between machines. The
target (issue 3) is a total of at most 3 s on 2 cores.
"""

from __future__ import annotations

import os
import sys

# BLAS threads for the reference workload must match the model's thread count; numpy reads
# these variables when it is first imported.
_THREADS = "2"
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, _THREADS)

import argparse  # noqa: E402
import dataclasses  # noqa: E402
import statistics  # noqa: E402
import time  # noqa: E402
from collections.abc import Sequence  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from flairwatch.config import Config  # noqa: E402
from flairwatch.engine.models import manifest_path  # noqa: E402
from flairwatch.engine.pipeline import Engine, analyse  # noqa: E402
from flairwatch.volume import Volume  # noqa: E402

SHAPE = (256, 256, 48)  # (i, j, k): columns, rows, slices
PIXEL_MM, SLICE_MM = 0.9, 3.0
STAGES = ("to_model_grid", "infer", "to_series_grid", "post_process")
TARGET_S = 3.0
REFERENCE_N, REFERENCE_REPEAT = 1024, 8


def phantom_series(seed: int = 4242) -> Volume:
    """A 2D axial phantom on a 256 x 256 x 48 grid (0.9 x 0.9 x 3 mm)."""
    from flairwatch.phantom.generator import generate
    from flairwatch.phantom.params import sample_params

    params = sample_params(seed, kind="2d_axial", field_strength_t=3.0, load_ml=6.0)
    acq = dataclasses.replace(
        params.acquisition,
        matrix=(SHAPE[1], SHAPE[0]),
        n_slices=SHAPE[2],
        inplane_mm=PIXEL_MM,
        slice_mm=SLICE_MM,
        gap_mm=0.0,
    )
    image = generate(dataclasses.replace(params, acquisition=acq)).image
    if image.shape != SHAPE:
        raise SystemExit(f"phantom came out {image.shape}, not {SHAPE}; use --synthetic")
    return image


def synthetic_series(seed: int = 4242) -> Volume:
    """Ellipsoid 'head' (tissue 300) with 40 bright blobs (600) on the benchmark grid, LPS axial."""
    rng = np.random.default_rng(seed)
    i, j, k = np.meshgrid(*(np.arange(n, dtype=np.float32) for n in SHAPE), indexing="ij")
    c = [(n - 1) / 2 for n in SHAPE]
    head = ((i - c[0]) / 100) ** 2 + ((j - c[1]) / 115) ** 2 + ((k - c[2]) / 26) ** 2 <= 1
    data = np.where(head, 300.0, 0.0).astype(np.float32)
    for _ in range(40):
        ci, cj, ck = rng.uniform(70, 186), rng.uniform(60, 196), rng.uniform(12, 36)
        r = rng.uniform(2, 6)
        blob = (i - ci) ** 2 + (j - cj) ** 2 + ((k - ck) * SLICE_MM / PIXEL_MM) ** 2 <= r * r
        data[blob & head] = 600.0
    data += rng.normal(0, 6, SHAPE).astype(np.float32) * head
    affine = np.diag([PIXEL_MM, PIXEL_MM, SLICE_MM, 1.0])
    affine[:3, 3] = [-115.0, -115.0, -70.0]
    return Volume(data, affine)


def reference_seconds(a: np.ndarray, b: np.ndarray) -> float:
    start = time.perf_counter()
    for _ in range(REFERENCE_REPEAT):
        a @ b
    return time.perf_counter() - start


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Time a WMH model on a 256x256x48 series.")
    ap.add_argument("--model", type=Path, default=manifest_path(None), help="model manifest")
    ap.add_argument("--runs", type=int, default=5, help="timed runs (median reported)")
    ap.add_argument("--threads", type=int, default=int(_THREADS), help="ONNX Runtime threads")
    ap.add_argument("--synthetic", action="store_true", help="numpy head instead of a phantom")
    args = ap.parse_args(argv)

    volume = synthetic_series() if args.synthetic else phantom_series()
    cfg = Config(model=args.model, threads=args.threads)
    engine = Engine(cfg)
    rng = np.random.default_rng(0)
    a = rng.standard_normal((REFERENCE_N, REFERENCE_N), dtype=np.float32)
    b = rng.standard_normal((REFERENCE_N, REFERENCE_N), dtype=np.float32)

    def run() -> dict[str, float]:
        start = time.perf_counter()
        result = analyse(
            volume,
            engine.segmenter,
            threshold=engine.threshold,
            min_lesion_mm3=cfg.min_lesion_mm3,
            connectivity=cfg.connectivity,
        )
        timings = dict(result.timings_s)
        timings["total"] = time.perf_counter() - start
        return timings

    run()  # warm-up: ONNX Runtime allocates its arena on the first run
    reference_seconds(a, b)
    runs, refs = [], []
    for _ in range(args.runs):
        runs.append(run())
        refs.append(reference_seconds(a, b))
    med = {s: statistics.median(r[s] for r in runs) for s in (*STAGES, "total")}
    ref = statistics.median(refs)

    print(
        f"model {engine.manifest.label}, series {SHAPE[0]}x{SHAPE[1]}x{SHAPE[2]} "
        f"({'synthetic' if args.synthetic else 'phantom'}), {args.threads} threads, "
        f"median of {args.runs} runs; load average {os.getloadavg()[0]:.2f} "
        f"on {os.cpu_count()} CPUs"
    )
    for stage in STAGES:
        print(f"  {stage:<15} {med[stage]:7.3f} s")
    print(
        f"  {'total':<15} {med['total']:7.3f} s   (all runs: "
        + ", ".join(f"{r['total']:.2f}" for r in runs)
        + ")"
    )
    print(
        f"reference workload ({REFERENCE_N}x{REFERENCE_N} float32 matmul x {REFERENCE_REPEAT}): "
        f"{ref:.3f} s; ratio model/reference {med['total'] / ref:.2f}"
    )
    verdict = "PASS" if med["total"] <= TARGET_S else "FAIL"
    print(f"{verdict}  total {med['total']:.2f} s (target <= {TARGET_S:g} s on 2 cores)")
    return 0 if verdict == "PASS" else 1


if __name__ == "__main__":
    sys.exit(main())
