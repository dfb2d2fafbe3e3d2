"""The training cache: case folders and in-memory phantoms -> model-grid arrays (``.npz``).

Cached files are ``<tag>-<case>.npz`` (``val-`` in front for the validation split: phantom seeds
ending in 0, else one name in ten by hash). The phantom generator's held-out seeds are never
cached. Research use only.
"""

from __future__ import annotations

import logging
import time
import zlib
from pathlib import Path

import numpy as np

from flairwatch.engine.manifest import GridSpec, Normalisation
from flairwatch.training.data import cache_case, case_seed, find_cases

log = logging.getLogger("train_model")

GRID = GridSpec(spacing_mm=(1.0, 1.0), shape=(224, 224), through_plane="keep")
NORM = Normalisation()


def held_out_seeds() -> frozenset[int]:
    """Seeds the phantom generator keeps for evaluation (empty when the generator is absent)."""
    try:
        from flairwatch.phantom.bank import HELD_OUT_SEEDS
    except ImportError:
        return frozenset()
    return frozenset(int(s) for s in HELD_OUT_SEEDS)


def is_validation(name: str, seed: int | None) -> bool:
    """About one case in ten goes to validation: seed ending in 0, else a hash of the name."""
    if seed is not None:
        return seed % 10 == 0
    return zlib.crc32(name.encode("utf-8")) % 10 == 0


# ------------------------------------------------------------------------------------ data cache


def update_cache(sources: list[tuple[str, Path]], cache: Path) -> int:
    """Convert every complete case folder not yet cached; returns how many were added.

    ``sources`` are (tag, folder of case folders); a cached file is ``<tag>-<case>.npz``.
    """
    cache.mkdir(parents=True, exist_ok=True)
    forbidden = held_out_seeds()
    added = 0
    for tag, root in sources:
        for case_dir in find_cases(root):
            if tag == "bank" and not (case_dir / "case.json").is_file():
                continue  # a phantom folder still being written
            seed = case_seed(case_dir)
            prefix = "val-" if is_validation(case_dir.name, seed) else ""
            out = cache / f"{prefix}{tag}-{case_dir.name}.npz"
            if out.exists():
                continue
            if seed is not None and seed in forbidden:
                log.warning("skipping %s: its seed is held out for evaluation", case_dir)
                continue
            start = time.perf_counter()
            try:
                cache_case(case_dir, out, GRID, NORM)
            except (ValueError, OSError, RuntimeError) as exc:
                log.warning("skipping %s: %s", case_dir, exc)
                continue
            added += 1
            log.info("cached %s (%.1f s)", out.name, time.perf_counter() - start)
    return added


def _complete(paths: list[Path]) -> list[Path]:
    """Cached files that are fully written (a ``.part.npz`` is still being written)."""
    return sorted(p for p in paths if not p.name.endswith(".part.npz"))


def cached_training_files(cache: Path) -> list[Path]:
    return _complete([p for p in cache.glob("*.npz") if not p.name.startswith("val-")])


def cached_validation_files(cache: Path) -> list[Path]:
    return _complete(list(cache.glob("val-*.npz")))


def source_of(path: Path) -> str:
    """The provenance stored in a cached file ("" when absent)."""
    with np.load(path) as z:
        return str(z["source"]) if "source" in z.files else ""


def parse_seeds(text: str) -> list[int]:
    """``"1-200"`` or ``"1,5,9"`` or a mix -> sorted seeds."""
    seeds: set[int] = set()
    for part in text.split(","):
        if "-" in part:
            lo, hi = part.split("-", 1)
            seeds.update(range(int(lo), int(hi) + 1))
        elif part.strip():
            seeds.add(int(part))
    return sorted(seeds)


def cache_from_generator(cache: Path, seeds: list[int]) -> None:
    """Generate phantoms in memory and cache their model-grid arrays (no case folders written)."""
    from flairwatch.training.data import phantom_arrays, save_arrays

    cache.mkdir(parents=True, exist_ok=True)
    forbidden = held_out_seeds()
    for seed in seeds:
        if seed in forbidden or seed >= 100000:
            log.warning("seed %d is held out or out of range; skipped", seed)
            continue
        name = f"gen-case-{seed:05d}"
        out = cache / (("val-" if is_validation(name, seed) else "") + name + ".npz")
        if out.exists():
            continue
        start = time.perf_counter()
        arrays, version = phantom_arrays(seed, GRID, NORM)
        save_arrays(out, arrays, seed=seed, source=f"generator {version}")
        log.info("cached %s (%.1f s)", out.name, time.perf_counter() - start)


def make_bank(out: Path, seeds: list[int], workers: int) -> None:
    from flairwatch.phantom.bank import HELD_OUT_SEEDS
    from flairwatch.phantom.bank import make_bank as build

    keep = [s for s in seeds if s not in set(HELD_OUT_SEEDS) and s < 100000]
    if len(keep) < len(seeds):
        log.warning("left out %d held-out or out-of-range seeds", len(seeds) - len(keep))
    build(out, keep, workers=workers, progress=True)
