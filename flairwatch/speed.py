"""The machine's speed unit that every benchmark reports its timings against.

One *sgemm unit* is the best of 3 runs of ten float32 2048x2048 matrix products with numpy, on the
threads numpy uses by default. It moves from about 0.5 s to 2.4 s between the machines the project
runs on, so a figure divided by it travels between machines and CI runs far better than seconds do.
Benchmarks measure it in the same run as their own timings and print both.
"""

from __future__ import annotations

import time

SGEMM_N = 2048
SGEMM_PRODUCTS = 10
SGEMM_RUNS = 3


def sgemm_unit(n: int = SGEMM_N, products: int = SGEMM_PRODUCTS, runs: int = SGEMM_RUNS) -> float:
    """Seconds for the best of ``runs`` runs of ``products`` float32 ``n`` x ``n`` matrix products."""
    import numpy as np

    rng = np.random.default_rng(0)
    a = rng.standard_normal((n, n), dtype=np.float32)
    b = rng.standard_normal((n, n), dtype=np.float32)
    a @ b  # warm up the BLAS threads and caches
    best = float("inf")
    for _ in range(runs):
        start = time.perf_counter()
        for _ in range(products):
            a @ b
        best = min(best, time.perf_counter() - start)
    return best


def sgemm_flops(n: int = SGEMM_N, products: int = SGEMM_PRODUCTS) -> float:
    """Floating-point operations in one sgemm unit (2 n^3 per product)."""
    return 2.0 * n**3 * products


def in_units(seconds: float, unit_s: float) -> str:
    """``'1.23 s = 0.45 sgemm units'``: a timing and its ratio to the unit measured in the same run."""
    return f"{seconds:.2f} s = {seconds / unit_s:.2f} sgemm units"
