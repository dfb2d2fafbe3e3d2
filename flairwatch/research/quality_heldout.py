"""In-distribution part of the quality benchmark: held-out phantoms and the intensity baseline.

Held-out cases
    Phantom case folders generated once from the generator's frozen ``HELD_OUT_SEEDS`` (never
    used in training) and kept; an interrupted build resumes. Case n gets load bin ``n % 6``
    (0, <1, 1-5, 5-15, 15-30, >30 mL, the load drawn inside the bin from the seed), acquisition
    ``n // 6 % 2`` (2D axial, 3D sagittal) and field strength ``n // 12 % 2`` (1.5 T, 3 T), so
    36 cases hold every bin x acquisition x field combination at least once.

Baseline
    A simple intensity threshold: inside the model's own intracranial mask, FLAIR divided by
    its median there (a white-matter-ish level: CSF is dark on FLAIR, lesions are few); voxels
    above ``k`` times that level are lesion, then the model's post-processing rule (minimum
    lesion size, connectivity). ``k`` is the value of ``K_GRID`` with the best median Dice on
    phantoms of training seeds (``TUNE_SEEDS``) with >= 1 mL, cached in a JSON file.

In-distribution gate (issue 3, item 6), over the held-out cases: median Dice >= 0.75 (cases
>= 1 mL), pooled lesion recall >= 0.75 (lesions >= 30 mm^3), median absolute volume difference
<= 25 %, largest false-positive volume on lesion-free cases <= 0.5 mL, median intracranial
Dice >= 0.95, median Dice >= 0.10 above the baseline's. Research use only.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import shutil
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from flairwatch.engine.postprocess import threshold_and_clean
from flairwatch.phantom.params import GENERATOR_VERSION, PhantomParams, sample_params
from flairwatch.research import metrics
from flairwatch.research.scoring import CaseResult
from flairwatch.volume import Volume

LOAD_RANGES_ML: tuple[tuple[str, float, float], ...] = (
    ("0", 0.0, 0.0),
    ("<1", 0.35, 0.8),
    ("1-5", 1.8, 3.5),
    ("5-15", 7.0, 11.0),
    ("15-30", 19.0, 25.0),
    (">30", 36.0, 50.0),
)
KINDS = ("2d_axial", "3d_sagittal")
FIELDS_T = (1.5, 3.0)
# training seeds (below the bank's TRAINING_SEED_LIMIT, not in the validation split of seeds
# ending in 0), loads spread over the bins
TUNE_SEEDS: tuple[int, ...] = (1001, 1002, 1003, 1004, 1005, 1006, 1007, 1008)
TUNE_LOADS_ML: tuple[float, ...] = (2.5, 4.0, 6.0, 9.0, 14.0, 22.0, 35.0, 50.0)
K_GRID: tuple[float, ...] = tuple(round(1.10 + 0.05 * i, 2) for i in range(29))  # 1.10 .. 2.50
MIN_CASES = 30
GATE_LOAD_ML = 1.0
FINGERPRINT_FILE = "generator-source.sha256"
Verdict = tuple[str, str, float, bool]


def stratum(index: int) -> tuple[str, str, float]:
    """(load bin, acquisition kind, field strength T) of held-out case number ``index``."""
    return (LOAD_RANGES_ML[index % 6][0], KINDS[index // 6 % 2], FIELDS_T[index // 12 % 2])


def stratified_load_ml(seed: int, bin_name: str) -> float:
    """A lesion load (mL) inside ``bin_name``, drawn log-uniformly from the seed."""
    lo, hi = next((lo, hi) for name, lo, hi in LOAD_RANGES_ML if name == bin_name)
    if hi == 0.0:
        return 0.0
    u = np.random.default_rng([seed, 7]).uniform(math.log(lo), math.log(hi))
    return round(math.exp(u), 3)


def held_out_params(seed: int) -> PhantomParams:
    """Phantom parameters of a held-out seed with its stratum pinned (module level: picklable)."""
    from flairwatch.phantom.bank import HELD_OUT_SEEDS

    bin_name, kind, field = stratum(list(HELD_OUT_SEEDS).index(seed))
    return sample_params(
        seed, kind=kind, field_strength_t=field, load_ml=stratified_load_ml(seed, bin_name)
    )


def quick_params(seed: int) -> PhantomParams:
    """As :func:`held_out_params` on the 2 mm template (fast, for a smoke run only)."""
    return dataclasses.replace(held_out_params(seed), template_mm=2)


def generator_fingerprint() -> str:
    """SHA-256 over the phantom generator's source files: any edit makes new cases."""
    import flairwatch.phantom

    digest = hashlib.sha256()
    for path in sorted(Path(flairwatch.phantom.__file__).parent.glob("*.py")):
        digest.update(path.name.encode() + b"\0" + path.read_bytes())
    return digest.hexdigest()


def _matches(facts: dict[str, Any], params: PhantomParams) -> bool:
    saved = facts.get("params", {})
    acq = saved.get("acquisition", {})
    return bool(
        facts.get("generator_version") == GENERATOR_VERSION
        and saved.get("lesion_load_ml") == params.lesion_load_ml
        and saved.get("template_mm") == params.template_mm
        and acq.get("kind") == params.acquisition.kind
        and acq.get("field_strength_t") == params.acquisition.field_strength_t
    )


def build_held_out(
    folder: Path,
    n: int,
    *,
    quick: bool,
    workers: int,
    keep: bool = False,
    say: Callable[[str], None] = print,
) -> list[Path]:
    """Generate (or find) the first ``n`` held-out cases under ``folder``.

    The folder records the generator source it was made with; when the source has changed
    since, the cases are rebuilt, unless ``keep`` (then a warning).
    """
    from flairwatch.phantom.bank import HELD_OUT_SEEDS, case_name, make_bank

    if n > len(HELD_OUT_SEEDS):
        raise SystemExit(f"at most {len(HELD_OUT_SEEDS)} held-out seeds exist; ask for fewer cases")
    seeds = list(HELD_OUT_SEEDS)[:n]
    fn = quick_params if quick else held_out_params
    stamp = folder / FINGERPRINT_FILE
    current = generator_fingerprint()
    made_by = stamp.read_text(encoding="utf-8").strip() if stamp.is_file() else None
    if made_by not in (None, current):
        if keep:
            say(f"WARNING: the cases in {folder} were made by another generator source (kept)")
            return [folder / case_name(s) for s in seeds]
        say(f"the generator source changed since {folder} was made: rebuilding it")
        shutil.rmtree(folder)
    folder.mkdir(parents=True, exist_ok=True)
    stamp.write_text(current + "\n", encoding="utf-8")
    for seed in seeds:  # a folder made with other parameters is rebuilt
        facts_path = folder / case_name(seed) / "case.json"
        if facts_path.is_file() and not _matches(
            json.loads(facts_path.read_text(encoding="utf-8")), fn(seed)
        ):
            shutil.rmtree(facts_path.parent)
    return make_bank(folder, seeds, workers=workers, progress=True, params_fn=fn)


# ------------------------------------------------------------------------- baseline


def ratio_image(image: np.ndarray, brain: np.ndarray) -> np.ndarray:
    """FLAIR intensity divided by its median inside ``brain`` (float32, (i, j, k))."""
    inside = image[brain]
    level = float(np.median(inside)) if inside.size else 0.0
    if level <= 0:
        return np.zeros(image.shape, dtype=np.float32)
    return (image / np.float32(level)).astype(np.float32)


def baseline_mask(
    volume: Volume, brain: np.ndarray, k: float, *, min_lesion_mm3: float, connectivity: int
) -> np.ndarray:
    """The baseline's WMH mask (uint8, (i, j, k)): ratio > k inside ``brain``, small ones dropped."""
    brain = np.asarray(brain) != 0
    ratio = ratio_image(np.asarray(volume.data, dtype=np.float32), brain)
    candidates = ((ratio > k) & brain).astype(np.float32)
    result = threshold_and_clean(
        candidates,
        volume.affine_lps,
        threshold=0.5,
        min_lesion_mm3=min_lesion_mm3,
        connectivity=connectivity,
        restrict_to=brain,
    )
    return result.mask


def tune_baseline(
    cache: Path,
    *,
    min_lesion_mm3: float,
    connectivity: int,
    template_mm: int = 1,
    say: Callable[[str], None] = print,
) -> float:
    """Choose ``k`` on training-seed phantoms (cached in ``cache`` with its settings); return it."""
    settings = {
        "seeds": list(TUNE_SEEDS),
        "loads_ml": list(TUNE_LOADS_ML),
        "k_grid": list(K_GRID),
        "min_lesion_mm3": min_lesion_mm3,
        "connectivity": connectivity,
        "template_mm": template_mm,
        "generator_source": generator_fingerprint(),
    }
    if cache.is_file():
        saved = json.loads(cache.read_text(encoding="utf-8"))
        if saved.get("settings") == settings:
            return float(saved["k"])
    from flairwatch.phantom.bank import HELD_OUT_SEEDS, TRAINING_SEED_LIMIT
    from flairwatch.phantom.generator import generate

    if set(TUNE_SEEDS) & set(HELD_OUT_SEEDS) or max(TUNE_SEEDS) >= TRAINING_SEED_LIMIT:
        raise SystemExit("the baseline's tuning seeds must be training seeds")
    dice_by_k: dict[float, list[float]] = {k: [] for k in K_GRID}
    for seed, load in zip(TUNE_SEEDS, TUNE_LOADS_ML, strict=True):
        start = time.monotonic()
        params = sample_params(seed, load_ml=load)
        case = generate(dataclasses.replace(params, template_mm=template_mm))
        truth = case.wmh.data
        if truth.sum() * case.wmh.voxel_volume_mm3 / 1000.0 < GATE_LOAD_ML:
            continue
        for k in K_GRID:
            mask = baseline_mask(
                case.image,
                case.intracranial.data,
                k,
                min_lesion_mm3=min_lesion_mm3,
                connectivity=connectivity,
            )
            dice_by_k[k].append(metrics.dice(truth, mask))
        say(f"tuning baseline: seed {seed} ({time.monotonic() - start:.0f} s)")
    medians = {k: float(np.median(v)) if v else -1.0 for k, v in dice_by_k.items()}
    best = max(K_GRID, key=lambda k: medians[k])
    cache.parent.mkdir(parents=True, exist_ok=True)
    payload = {
        "settings": settings,
        "k": best,
        "median_dice_by_k": {str(k): medians[k] for k in K_GRID},
    }
    cache.write_text(json.dumps(payload, indent=2), encoding="utf-8")
    return best


# ------------------------------------------------------------------------- in-distribution gate


def median(values: Sequence[float]) -> float:
    """Median of the finite values; NaN when there is none."""
    finite = [v for v in values if not math.isnan(v)]
    return float(np.median(finite)) if finite else math.nan


def pooled_recall(results: Sequence[CaseResult]) -> float:
    """Detected / reference lesions >= 30 mm^3, pooled over cases; NaN when there is none."""
    ref = sum(r.large_reference_lesions for r in results)
    return sum(r.large_detected_lesions for r in results) / ref if ref else math.nan


def _ok(value: float, test: Callable[[float], bool]) -> bool:
    return not math.isnan(value) and test(value)


def heldout_gate(model: Sequence[CaseResult], base: Sequence[CaseResult]) -> list[Verdict]:
    """(criterion, requirement, measured value, passed) of the in-distribution gate."""
    big = [r for r in model if r.scores.reference_ml >= GATE_LOAD_ML]
    big_base = [r for r in base if r.scores.reference_ml >= GATE_LOAD_ML]
    free = [r for r in model if r.scores.reference_ml == 0.0]
    dice = median([r.scores.dice for r in big])
    margin = dice - median([r.scores.dice for r in big_base])
    recall = pooled_recall(model)
    avd = median([r.scores.volume_difference_pct for r in big])
    fp = max((r.scores.false_positive_ml for r in free), default=math.nan)
    icv = median([r.intracranial_dice for r in model])
    return [
        ("median Dice, cases >= 1 mL", ">= 0.75", dice, _ok(dice, lambda v: v >= 0.75)),
        (
            "lesion recall, lesions >= 30 mm^3 (pooled)",
            ">= 0.75",
            recall,
            _ok(recall, lambda v: v >= 0.75),
        ),
        (
            "median abs. volume difference %, cases >= 1 mL",
            "<= 25",
            avd,
            _ok(avd, lambda v: v <= 25.0),
        ),
        (
            "largest false-positive volume mL, lesion-free cases",
            "<= 0.5",
            fp,
            _ok(fp, lambda v: v <= 0.5),
        ),
        ("median intracranial-mask Dice", ">= 0.95", icv, _ok(icv, lambda v: v >= 0.95)),
        (
            "median Dice margin over baseline, cases >= 1 mL",
            ">= 0.10",
            margin,
            _ok(margin, lambda v: v >= 0.10),
        ),
    ]
