"""Quality gate of the shipped WMH model on held-out phantoms, with an intensity-threshold baseline.

Usage, from the repository root::

    .venv/bin/python scripts/bench_quality.py                 # generate (once), score, gate
    .venv/bin/python scripts/bench_quality.py --generate-only # build the held-out cases only
    .venv/bin/python scripts/bench_quality.py --model other/model.yaml

Held-out cases
    ``--cases`` (default 36, at least 30 for the gate) phantom case folders are generated once
    under ``work/heldout`` from the generator's frozen ``HELD_OUT_SEEDS`` (never used in
    training) and kept; an interrupted build resumes. The cases are stratified: case n gets load
    bin ``n % 6`` (0, <1, 1-5, 5-15, 15-30, >30 mL, the lesion load drawn inside the bin from the
    seed), acquisition ``n // 6 % 2`` (2D axial, 3D sagittal) and field strength ``n // 12 % 2``
    (1.5 T, 3 T), so 36 cases hold every bin x acquisition x field combination at least once.
    The truth mask's volume on the acquisition grid decides the bin a case is reported in.

Baseline (measured in the same run, on the same cases)
    A simple intensity threshold. Inside the model's own intracranial mask for that case (so the
    baseline is spared the bright scalp fat), the FLAIR intensity is divided by its median there
    (a white-matter-ish tissue level: CSF is dark on FLAIR and lesions are few), voxels above
    ``k`` times that level are lesion, and the model's post-processing rule is applied (same
    minimum lesion size and connectivity). ``k`` is chosen on phantoms made from training seeds
    only (``TUNE_SEEDS``, with the phantoms' own intracranial masks), as the value of
    ``K_GRID`` giving the best median Dice over the tuning cases with >= 1 mL of lesion; the
    choice is cached in ``work/baseline_tuning.json``.

Gate (issue 3, item 6), over the held-out cases
    1. median Dice >= 0.75 over cases with >= 1 mL of reference lesion;
    2. pooled lesion recall >= 0.75 over reference lesions >= 30 mm^3;
    3. median absolute volume difference <= 25 % over cases with >= 1 mL;
    4. false-positive volume <= 0.5 mL on every lesion-free case (the largest is checked);
    5. median intracranial-mask Dice >= 0.95 (the smallest is printed too);
    6. median Dice at least 0.10 above the baseline's, over cases with >= 1 mL.
    Figures follow flairwatch.research.metrics (2019 IEEE TMI WMH segmentation challenge definitions).

Prints tables by load bin and acquisition, PASS/FAIL per criterion, and writes the Markdown
tables to ``work/quality_table.md`` (for the model card and README) plus the model's full
validation report (flairwatch validate's output folder) to ``work/heldout-validation``. A failed
criterion is reported, never hidden; the exit status is 0 when every criterion passes, 1 when
one fails. Research use only: phantoms are not patients.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
import shutil
import sys
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from flairwatch.config import Config  # noqa: E402
from flairwatch.engine.models import manifest_path  # noqa: E402
from flairwatch.engine.pipeline import Engine  # noqa: E402
from flairwatch.engine.postprocess import threshold_and_clean  # noqa: E402
from flairwatch.phantom.params import GENERATOR_VERSION, PhantomParams, sample_params  # noqa: E402
from flairwatch.research import metrics  # noqa: E402
from flairwatch.research.cases import find_case_folders  # noqa: E402
from flairwatch.research.report_plots import markdown_table  # noqa: E402
from flairwatch.research.scoring import CaseResult, Segment, Segmentation  # noqa: E402
from flairwatch.research.validate import model_segment, score_folders  # noqa: E402
from flairwatch.volume import Volume  # noqa: E402

# Load bins of metrics.LOAD_BIN_NAMES and the generator lesion loads (mL) drawn for each,
# log-uniform, kept near the middle of each bin: the truth mask on the acquisition grid (voxels at
# least half lesion) holds somewhat more or less than the generator's load.
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
# Training seeds (below the bank's TRAINING_SEED_LIMIT, not in the trainer's validation split of
# seeds ending in 0) for tuning the baseline, with loads spread over the bins.
TUNE_SEEDS: tuple[int, ...] = (1001, 1002, 1003, 1004, 1005, 1006, 1007, 1008)
TUNE_LOADS_ML: tuple[float, ...] = (2.5, 4.0, 6.0, 9.0, 14.0, 22.0, 35.0, 50.0)
K_GRID: tuple[float, ...] = tuple(round(1.10 + 0.05 * i, 2) for i in range(29))  # 1.10 .. 2.50

MIN_CASES = 30
GATE_DICE = 0.75
GATE_RECALL = 0.75
GATE_AVD_PCT = 25.0
GATE_FP_ML = 0.5
GATE_ICV_DICE = 0.95
GATE_MARGIN = 0.10
GATE_LOAD_ML = 1.0

WORK = REPO / "work"
FINGERPRINT_FILE = "generator-source.sha256"


# ------------------------------------------------------------------------- held-out phantoms


def stratum(index: int) -> tuple[str, str, float]:
    """(load bin, acquisition kind, field strength T) of held-out case number ``index``."""
    return (
        LOAD_RANGES_ML[index % 6][0],
        KINDS[index // 6 % 2],
        FIELDS_T[index // 12 % 2],
    )


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

    index = list(HELD_OUT_SEEDS).index(seed)
    bin_name, kind, field = stratum(index)
    return sample_params(
        seed, kind=kind, field_strength_t=field, load_ml=stratified_load_ml(seed, bin_name)
    )


def quick_params(seed: int) -> PhantomParams:
    """As :func:`held_out_params` on the 2 mm template (fast, for a smoke run only)."""
    return dataclasses.replace(held_out_params(seed), template_mm=2)


def generator_fingerprint() -> str:
    """SHA-256 over the phantom generator's source files: any edit makes new cases."""
    import hashlib

    import flairwatch.phantom

    digest = hashlib.sha256()
    for path in sorted(Path(flairwatch.phantom.__file__).parent.glob("*.py")):
        digest.update(path.name.encode() + b"\0" + path.read_bytes())
    return digest.hexdigest()


def build_held_out(
    folder: Path, n: int, *, quick: bool, workers: int, keep: bool = False
) -> list[Path]:
    """Generate (or find) the first ``n`` held-out cases under ``folder``.

    The folder records the generator source it was made with (:func:`generator_fingerprint`);
    when the source has changed since, the cases are rebuilt, unless ``keep`` (then a warning).
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
            print(
                f"WARNING: the cases in {folder} were made by generator source {made_by[:12]}, "
                f"the current source is {current[:12]} (kept because of --keep-cases)",
                flush=True,
            )
            return [folder / case_name(s) for s in seeds]
        print(f"the generator source changed since {folder} was made: rebuilding it", flush=True)
        shutil.rmtree(folder)
    folder.mkdir(parents=True, exist_ok=True)
    stamp.write_text(current + "\n", encoding="utf-8")
    for seed in seeds:  # a folder made with other parameters (or generator) is rebuilt
        facts_path = folder / case_name(seed) / "case.json"
        if facts_path.is_file() and not _matches(
            json.loads(facts_path.read_text(encoding="utf-8")), fn(seed)
        ):
            print(f"rebuilding {facts_path.parent.name}: made with other parameters", flush=True)
            shutil.rmtree(facts_path.parent)
    done = make_bank(folder, seeds, workers=workers, progress=True, params_fn=fn)
    if generator_fingerprint() != current:
        # edited while this process ran (it kept the old code): mark the folder for a rebuild
        stamp.write_text("changed-during-build\n", encoding="utf-8")
        print("WARNING: the generator source changed during the build; run again", flush=True)
    return done


def _matches(facts: dict[str, Any], params: PhantomParams) -> bool:
    saved = facts.get("params", {})
    return bool(
        facts.get("generator_version") == GENERATOR_VERSION
        and saved.get("lesion_load_ml") == params.lesion_load_ml
        and saved.get("template_mm") == params.template_mm
        and saved.get("acquisition", {}).get("kind") == params.acquisition.kind
        and saved.get("acquisition", {}).get("field_strength_t")
        == params.acquisition.field_strength_t
    )


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
    cache: Path, *, min_lesion_mm3: float, connectivity: int, template_mm: int = 1
) -> float:
    """Choose ``k`` on training-seed phantoms; return it.

    Cached in ``cache`` (JSON) with its settings and the generator source; chosen again when
    either changes.
    """
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

    assert not set(TUNE_SEEDS) & set(HELD_OUT_SEEDS)
    assert max(TUNE_SEEDS) < TRAINING_SEED_LIMIT
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
        print(f"tuning baseline: seed {seed} ({time.monotonic() - start:.0f} s)", flush=True)
    medians = {k: float(np.median(v)) if v else -1.0 for k, v in dice_by_k.items()}
    best = max(K_GRID, key=lambda k: medians[k])
    cache.parent.mkdir(parents=True, exist_ok=True)
    cache.write_text(
        json.dumps(
            {
                "settings": settings,
                "k": best,
                "median_dice_by_k": {str(k): medians[k] for k in K_GRID},
            },
            indent=2,
        ),
        encoding="utf-8",
    )
    return best


def paired_segmenters(engine: Engine, k: float) -> dict[str, Segment]:
    """The model and the baseline as segmenters; the baseline reuses the model's brain mask.

    ``score_folders`` runs the segmenters in order on the same image, so the baseline finds the
    model's intracranial mask for that image in ``last``.
    """
    run_model = model_segment(engine)
    last: dict[int, Segmentation] = {}

    def model(volume: Volume) -> Segmentation:
        last.clear()
        seg = run_model(volume)
        last[id(volume)] = seg
        return seg

    def baseline(volume: Volume) -> Segmentation:
        start = time.perf_counter()
        brain = last[id(volume)].intracranial
        if brain is None:
            raise SystemExit("the model gives no intracranial mask; the baseline needs one")
        mask = baseline_mask(
            volume,
            brain,
            k,
            min_lesion_mm3=engine.cfg.min_lesion_mm3,
            connectivity=engine.cfg.connectivity,
        )
        return Segmentation(mask, None, time.perf_counter() - start)

    return {"model": model, "baseline": baseline}


# ------------------------------------------------------------------------- gate and tables


def _median(values: Sequence[float]) -> float:
    finite = [v for v in values if not math.isnan(v)]
    return float(np.median(finite)) if finite else math.nan


def _pooled_recall(results: Sequence[CaseResult]) -> float:
    ref = sum(r.large_reference_lesions for r in results)
    return sum(r.large_detected_lesions for r in results) / ref if ref else math.nan


def gate(
    model: Sequence[CaseResult], base: Sequence[CaseResult]
) -> list[tuple[str, str, float, bool]]:
    """(criterion, requirement, measured value, passed) for each gate criterion."""
    big = [r for r in model if r.scores.reference_ml >= GATE_LOAD_ML]
    big_base = [r for r in base if r.scores.reference_ml >= GATE_LOAD_ML]
    free = [r for r in model if r.scores.reference_ml == 0.0]
    dice = _median([r.scores.dice for r in big])
    base_dice = _median([r.scores.dice for r in big_base])
    recall = _pooled_recall(model)
    avd = _median([r.scores.volume_difference_pct for r in big])
    fp = max((r.scores.false_positive_ml for r in free), default=math.nan)
    icv = _median([r.intracranial_dice for r in model])

    def ok(value: float, test: Callable[[float], bool]) -> bool:
        return not math.isnan(value) and test(value)

    return [
        ("median Dice, cases >= 1 mL", f">= {GATE_DICE}", dice, ok(dice, lambda v: v >= GATE_DICE)),
        (
            "lesion recall, lesions >= 30 mm^3 (pooled)",
            f">= {GATE_RECALL}",
            recall,
            ok(recall, lambda v: v >= GATE_RECALL),
        ),
        (
            "median abs. volume difference %, cases >= 1 mL",
            f"<= {GATE_AVD_PCT:g}",
            avd,
            ok(avd, lambda v: v <= GATE_AVD_PCT),
        ),
        (
            "largest false-positive volume mL, lesion-free cases",
            f"<= {GATE_FP_ML}",
            fp,
            ok(fp, lambda v: v <= GATE_FP_ML),
        ),
        (
            "median intracranial-mask Dice",
            f">= {GATE_ICV_DICE}",
            icv,
            ok(icv, lambda v: v >= GATE_ICV_DICE),
        ),
        (
            "median Dice margin over baseline, cases >= 1 mL",
            f">= {GATE_MARGIN}",
            dice - base_dice,
            ok(dice - base_dice, lambda v: v >= GATE_MARGIN),
        ),
    ]


def _f(value: float, digits: int = 3) -> str | None:
    return None if math.isnan(value) else f"{value:.{digits}f}"


def _shown(value: float) -> str:
    return _f(value) or "n/a (no case to measure)"


GROUP_HEADER = (
    "group",
    "cases",
    "median Dice (model)",
    "median Dice (baseline)",
    "median abs. volume diff. % (model)",
    "lesion recall >= 30 mm^3 (model, pooled)",
    "median false-positive mL (model)",
    "median intracranial Dice (model)",
)


def group_row(name: str, model: Sequence[CaseResult], base: Sequence[CaseResult]) -> list[object]:
    return [
        name,
        len(model),
        _f(_median([r.scores.dice for r in model])),
        _f(_median([r.scores.dice for r in base])),
        _f(_median([r.scores.volume_difference_pct for r in model]), 1),
        _f(_pooled_recall(model)),
        _f(_median([r.scores.false_positive_ml for r in model]), 2),
        _f(_median([r.intracranial_dice for r in model])),
    ]


def tables(model: Sequence[CaseResult], base: Sequence[CaseResult]) -> dict[str, str]:
    """Markdown tables by load bin, by acquisition and field strength, and overall."""
    pairs = list(zip(model, base, strict=True))

    def rows(key: Callable[[CaseResult], str], names: Sequence[str]) -> list[list[object]]:
        return [
            group_row(
                name,
                [m for m, _ in pairs if key(m) == name],
                [b for m, b in pairs if key(m) == name],
            )
            for name in names
        ]

    kinds = sorted({m.acquisition or "unknown" for m in model})
    fields = sorted({f"{m.field_strength_t:g} T" for m in model if m.field_strength_t})
    return {
        "by_load_bin": markdown_table(
            GROUP_HEADER, rows(lambda r: r.scores.load_bin, metrics.LOAD_BIN_NAMES)
        ),
        "by_acquisition": markdown_table(
            GROUP_HEADER,
            rows(lambda r: r.acquisition or "unknown", kinds)
            + rows(lambda r: f"{r.field_strength_t:g} T" if r.field_strength_t else "", fields),
        ),
        "overall": markdown_table(GROUP_HEADER, [group_row("all", model, base)]),
    }


def write_markdown(
    path: Path,
    engine: Engine,
    k: float,
    verdicts: Sequence[tuple[str, str, float, bool]],
    parts: dict[str, str],
    n_cases: int,
    generator_version: str,
    generator_source: str,
) -> None:
    m = engine.manifest
    gate_rows = [
        [name, need, _f(value), "PASS" if passed else "FAIL"]
        for name, need, value, passed in verdicts
    ]
    text = "\n".join(
        [
            f"## Quality on held-out phantoms: {m.name} {m.version}",
            "",
            "RESEARCH USE ONLY - NOT FOR DIAGNOSIS OR TREATMENT. Measured on synthetic phantoms "
            f"({n_cases} held-out cases, generator {generator_version} (source "
            f"{generator_source[:12]}), seeds never used in training), not on patients; "
            "validate on your own scans.",
            "",
            f"Threshold {engine.threshold}, minimum lesion {engine.cfg.min_lesion_mm3} mm^3. "
            f"Baseline: FLAIR > {k:.2f} x its median inside the model's intracranial mask, same "
            "minimum lesion size (k tuned on training seeds). Made by scripts/bench_quality.py.",
            "",
            markdown_table(("criterion", "required", "measured", "result"), gate_rows),
            "### By reference lesion load (mL)",
            "",
            parts["by_load_bin"],
            "### By acquisition and field strength",
            "",
            parts["by_acquisition"],
            "### All cases",
            "",
            parts["overall"],
        ]
    )
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0] if __doc__ else None)
    ap.add_argument("--model", type=Path, default=manifest_path(None), help="model manifest")
    ap.add_argument("--cases", type=int, default=36, help="held-out cases (>= 30 for the gate)")
    ap.add_argument("--heldout", type=Path, default=WORK / "heldout", help="case-folder cache")
    ap.add_argument("--table", type=Path, default=WORK / "quality_table.md", help="Markdown out")
    ap.add_argument(
        "--report", type=Path, default=WORK / "heldout-validation", help="validate report folder"
    )
    ap.add_argument("--threads", type=int, default=2, help="ONNX Runtime threads")
    ap.add_argument("--workers", type=int, default=1, help="processes generating phantoms")
    ap.add_argument(
        "--keep-cases",
        action="store_true",
        help="use existing cases even if the generator source changed since (warns)",
    )
    ap.add_argument("--generate-only", action="store_true", help="build the cases and tune only")
    ap.add_argument(
        "--quick",
        action="store_true",
        help="smoke run: 2 mm template, cases under work/heldout-quick (not a gate measurement)",
    )
    args = ap.parse_args(argv)
    heldout = WORK / "heldout-quick" if args.quick else args.heldout
    if args.quick:  # never overwrite the real measurement's outputs with a smoke run's
        args.table = args.table.with_name(args.table.stem + "-quick.md")
        args.report = args.report.with_name(args.report.name + "-quick")
    if args.cases < MIN_CASES and not args.quick:
        print(f"the gate needs at least {MIN_CASES} cases; use --quick for a smoke run")
        return 2
    cfg = Config(model=args.model, threads=args.threads)
    start = time.monotonic()
    build_held_out(
        heldout, args.cases, quick=args.quick, workers=args.workers, keep=args.keep_cases
    )
    print(f"held-out cases ready in {heldout} ({time.monotonic() - start:.0f} s)", flush=True)
    k = tune_baseline(
        WORK / ("baseline_tuning-quick.json" if args.quick else "baseline_tuning.json"),
        min_lesion_mm3=cfg.min_lesion_mm3,
        connectivity=cfg.connectivity,
        template_mm=2 if args.quick else 1,
    )
    print(f"baseline k = {k:.2f} (tuned on training seeds {TUNE_SEEDS[0]}-{TUNE_SEEDS[-1]})")
    if args.generate_only:
        return 0

    from flairwatch.phantom.bank import case_name
    from flairwatch.research.validate_report import (
        publish_folder,
        validation_document,
        write_report_files,
    )

    engine = Engine(cfg)
    from flairwatch.phantom.bank import HELD_OUT_SEEDS

    wanted = {case_name(s) for s in list(HELD_OUT_SEEDS)[: args.cases]}
    case_dirs = [p for p in find_case_folders(heldout) if p.name in wanted]
    results, failures = score_folders(
        case_dirs,
        paired_segmenters(engine, k),
        connectivity=engine.cfg.connectivity,
        say=lambda s: print(s, flush=True),
        warn=lambda s: print(s, flush=True),
    )
    model, base = results["model"], results["baseline"]
    verdicts = gate(model, base)
    parts = tables(model, base)
    seconds = [r.seconds for r in model]
    print()
    print(
        f"model {engine.manifest.label}, {len(model)} cases scored, {len(failures)} failed; "
        f"model time per case median {_median(seconds):.1f} s, max {max(seconds, default=0):.1f} s"
    )
    print("\nBy reference lesion load (mL):\n" + parts["by_load_bin"])
    print("By acquisition and field strength:\n" + parts["by_acquisition"])
    print("All:\n" + parts["overall"])
    for name, need, value, passed in verdicts:
        print(f"{'PASS' if passed else 'FAIL'}  {name}: {_shown(value)} (required {need})")
    if len(model) < MIN_CASES and not args.quick:
        print(f"FAIL  only {len(model)} cases scored; the gate needs {MIN_CASES}")
    stamp = heldout / FINGERPRINT_FILE
    source = stamp.read_text(encoding="utf-8").strip() if stamp.is_file() else "unknown"
    write_markdown(args.table, engine, k, verdicts, parts, len(model), GENERATOR_VERSION, source)
    document = validation_document(engine, model, failures, heldout)
    publish_folder(args.report, lambda tmp: write_report_files(tmp, model, failures, document))
    print(f"\nMarkdown tables: {args.table}\nvalidation report: {args.report / 'report.md'}")
    passed = all(v[3] for v in verdicts) and not failures and len(model) >= MIN_CASES
    return 0 if passed else 1


if __name__ == "__main__":
    sys.exit(main())
