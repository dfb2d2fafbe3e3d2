"""The quality benchmark (``scripts/bench_quality.py``): shift suite, old vs new model, gate.

Usage, from the repository root::

    .venv/bin/python scripts/bench_quality.py --card flairwatch/models/NAME/MODEL_CARD.md
    .venv/bin/python scripts/bench_quality.py --build-only          # build the shift suite only
    .venv/bin/python scripts/bench_quality.py --series 4 --heldout-cases 0   # a shorter look

Builds (once, cached in ``--suite``, outside the repository by default) the shift suite of
:mod:`flairwatch.shift`, runs the new model (``--model``), the old model (``--old-model``) and the
intensity-threshold baseline on every series through the engine's ``analyse`` (what
``flairwatch process`` runs), scores them with :mod:`flairwatch.research.scoring`, prints the
figures per subset, per lesion-load bin and overall, side by side, and the issue-9 gate with
PASS/FAIL per line (:mod:`flairwatch.research.quality_gate`). The in-distribution gate on the
generator's held-out phantoms (:mod:`flairwatch.research.quality_heldout`) runs in the same
invocation unless ``--heldout-cases 0``. Prints its own run time and the sgemm unit measured in
the same run; writes the tables to ``--table`` and, with ``--card``, into that model card between
markers. Exit status 0 when every gate line passes, 1 otherwise. Research use only.
"""

from __future__ import annotations

import argparse
import json
import tempfile
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict
from pathlib import Path

import flairwatch
from flairwatch.config import Config
from flairwatch.engine.pipeline import Engine
from flairwatch.research import quality_card, quality_gate, quality_heldout
from flairwatch.research.cases import find_case_folders, read_case
from flairwatch.research.scoring import CaseResult, Segment, Segmentation, json_safe
from flairwatch.research.validate import model_segment, score_folders
from flairwatch.speed import in_units, sgemm_unit
from flairwatch.volume import Volume

REPO = Path(flairwatch.__file__).resolve().parent.parent
WORK = REPO / "work"
OLD_MODEL = Path(flairwatch.__file__).resolve().parent / "models" / "wmh-synth" / "model.yaml"
DEFAULT_SUITE = Path(tempfile.gettempdir()) / "shift-suite"


def segmenters(new: Engine, old: Engine | None, k: float) -> dict[str, Segment]:
    """new, old (unless the same model) and the baseline, which uses the new model's brain mask.

    ``score_folders`` runs them in this order on the same image, so the baseline finds the new
    model's intracranial mask for that image.
    """
    run_new = model_segment(new)
    last: dict[int, Segmentation] = {}

    def first(volume: Volume) -> Segmentation:
        last.clear()
        last[id(volume)] = seg = run_new(volume)
        return seg

    def baseline(volume: Volume) -> Segmentation:
        start = time.perf_counter()
        brain = last[id(volume)].intracranial
        if brain is None:
            raise ValueError("the new model gives no intracranial mask; the baseline needs one")
        mask = quality_heldout.baseline_mask(
            volume,
            brain,
            k,
            min_lesion_mm3=new.cfg.min_lesion_mm3,
            connectivity=new.cfg.connectivity,
        )
        return Segmentation(mask, None, time.perf_counter() - start)

    out: dict[str, Segment] = {"new": first}
    if old is not None:
        out["old"] = model_segment(old)
    out["baseline"] = baseline
    return out


def subset_of(case_dir: Path) -> str:
    """The subset named in the case's case.json (else the case id without its number)."""
    path = case_dir / "case.json"
    if path.is_file():
        subset = json.loads(path.read_text(encoding="utf-8")).get("subset")
        if isinstance(subset, str):
            return subset
    return case_dir.name.rsplit("-", 1)[0]


def suite_cases(args: argparse.Namespace, say: Callable[[str], None]) -> list[Path]:
    """Build (or, with --keep-suite, just find) the shift-suite case folders asked for."""
    from flairwatch.shift.build import CASE_JSON, build_suite
    from flairwatch.shift.recipes import SUBSETS, suite_recipes

    names = tuple(args.subsets) if args.subsets else tuple(SUBSETS)
    recipes = [
        r for r in suite_recipes(names, args.series) if int(r.case_id[-2:]) >= args.first_series
    ]
    if args.keep_suite:
        found = [
            args.suite / r.case_id
            for r in recipes
            if (args.suite / r.case_id / CASE_JSON).is_file()
        ]
        say(
            f"using {len(found)} of {len(recipes)} series already built in {args.suite} (--keep-suite)"
        )
        return found
    return build_suite(args.suite, recipes, workers=args.workers, say=say)


def in_distribution(
    args: argparse.Namespace, engine: Engine, k: float, say: Callable[[str], None]
) -> bool | None:
    """Run the held-out gate with the new model; None when --heldout-cases is 0."""
    if args.heldout_cases <= 0:
        return None
    folder = WORK / ("heldout-quick" if args.quick else "heldout")
    quality_heldout.build_held_out(
        folder, args.heldout_cases, quick=args.quick, workers=args.workers, say=say
    )
    from flairwatch.phantom.bank import HELD_OUT_SEEDS, case_name

    wanted = {case_name(s) for s in list(HELD_OUT_SEEDS)[: args.heldout_cases]}
    dirs = [p for p in find_case_folders(folder) if p.name in wanted]
    runs, failures = score_folders(
        dirs,
        segmenters(engine, None, k),
        connectivity=engine.cfg.connectivity,
        say=say,
        warn=say,
        read=read_case,
    )
    verdicts = quality_heldout.heldout_gate(runs["new"], runs["baseline"])
    for name, need, value, passed in verdicts:
        say(
            f"  in-distribution {'PASS' if passed else 'FAIL'}  {name}: {value:.3f} (required {need})"
        )
    enough = len(runs["new"]) >= min(quality_heldout.MIN_CASES, args.heldout_cases) and not failures
    return all(v[3] for v in verdicts) and enough


def parse(argv: Sequence[str] | None) -> argparse.Namespace:
    ap = argparse.ArgumentParser(
        description="Quality gate on the shift suite: new vs old model vs baseline."
    )
    ap.add_argument(
        "--model",
        type=Path,
        default=None,
        help="new model: manifest path or name (default: the default model)",
    )
    ap.add_argument(
        "--old-model",
        type=Path,
        default=OLD_MODEL,
        help="old model's manifest (default: wmh-synth 0.1.0)",
    )
    ap.add_argument(
        "--suite",
        type=Path,
        default=DEFAULT_SUITE,
        help="shift-suite cache folder (outside the repository)",
    )
    ap.add_argument("--subsets", nargs="*", help="only these subsets (default: all)")
    ap.add_argument("--series", type=int, default=8, help="series per subset (the gate needs 8)")
    ap.add_argument(
        "--first-series",
        type=int,
        default=0,
        help="skip the series numbered below this (split a long run)",
    )
    ap.add_argument(
        "--keep-suite",
        action="store_true",
        help="use the series already built, even if the suite's source changed",
    )
    ap.add_argument("--build-only", action="store_true", help="build the shift suite and stop")
    ap.add_argument(
        "--heldout-cases",
        type=int,
        default=36,
        help="held-out phantoms for the in-distribution gate (0 skips it)",
    )
    ap.add_argument(
        "--quick",
        action="store_true",
        help="held-out phantoms on the 2 mm template (a smoke run, not a gate)",
    )
    ap.add_argument(
        "--baseline-k", type=float, default=None, help="use this baseline k instead of tuning it"
    )
    ap.add_argument("--threads", type=int, default=2, help="ONNX Runtime threads")
    ap.add_argument("--workers", type=int, default=1, help="processes building series")
    ap.add_argument("--table", type=Path, default=WORK / "shift_quality.md", help="Markdown out")
    ap.add_argument(
        "--json", type=Path, default=WORK / "shift_quality.json", help="per-series figures out"
    )
    ap.add_argument(
        "--card", type=Path, default=None, help="model card to update in place (between markers)"
    )
    return ap.parse_args(argv)


def main(argv: Sequence[str] | None = None) -> int:
    args = parse(argv)

    def say(text: str) -> None:
        print(text, flush=True)

    unit = sgemm_unit()
    start = time.monotonic()
    say(f"sgemm unit: {unit:.3f} s (best of 3 runs of ten float32 2048x2048 products)")
    case_dirs = suite_cases(args, say)
    built_s = time.monotonic() - start
    say(f"shift suite ready: {len(case_dirs)} series in {args.suite} ({in_units(built_s, unit)})")
    if args.build_only:
        return 0
    new = Engine(Config(model=args.model, threads=args.threads))
    old_engine = Engine(Config(model=args.old_model, threads=args.threads))
    same = (old_engine.manifest.label, old_engine.manifest.sha256) == (
        new.manifest.label,
        new.manifest.sha256,
    )
    if args.baseline_k is not None:
        k = args.baseline_k
    else:
        k = quality_heldout.tune_baseline(
            WORK / ("baseline_tuning-quick.json" if args.quick else "baseline_tuning.json"),
            min_lesion_mm3=new.cfg.min_lesion_mm3,
            connectivity=new.cfg.connectivity,
            template_mm=2 if args.quick else 1,
            say=say,
        )
    say(
        f"new model {new.manifest.label}; old model {old_engine.manifest.label}{' (the same model)' if same else ''}; baseline k = {k:.2f}"
    )
    bench_start = time.monotonic()
    runs, failures = score_folders(
        case_dirs,
        segmenters(new, None if same else old_engine, k),
        connectivity=new.cfg.connectivity,
        say=say,
        warn=say,
        read=read_case,
    )
    bench_s = time.monotonic() - bench_start
    scored = {r.case_id for r in runs["new"]}
    subsets = [subset_of(d) for d in case_dirs if d.name in scored]
    new_r, base_r = runs["new"], runs["baseline"]
    old_r = runs.get("old", new_r)
    held = in_distribution(args, new, k, say)
    lines = quality_gate.shift_gate(subsets, new_r, old_r, base_r, in_distribution=held)
    shown: dict[str, Sequence[CaseResult]] = {f"new: {new.manifest.label}": new_r}
    if not same:
        shown[f"old: {old_engine.manifest.label}"] = old_r
    shown["baseline"] = base_r
    parts = quality_gate.tables(subsets, shown)
    total_s = time.monotonic() - start
    per_series = bench_s / max(len(new_r), 1)
    facts = [
        f"new model {new.manifest.label}, old model {old_engine.manifest.label}"
        + (" (the same model: old = new)" if same else "")
        + f"; threshold {new.threshold}, minimum lesion {new.cfg.min_lesion_mm3} mm^3",
        f"{len(new_r)} series scored ({len(failures)} failed) in {len(set(subsets))} subsets",
        "baseline: FLAIR > "
        + f"{k:.2f} x its median inside the new model's intracranial mask, same minimum lesion size",
        f"run time {in_units(total_s, unit)} (scoring {in_units(bench_s, unit)}, "
        f"{in_units(per_series, unit)} per series for all models together), sgemm unit {unit:.3f} s",
    ]
    say("")
    for title, key in (
        ("By subset", "by_subset"),
        ("By reference lesion load (mL)", "by_load_bin"),
        ("All series", "overall"),
    ):
        say(f"{title}:\n{parts[key]}")
    for line in lines:
        say(f"{line.result:<12} {line.criterion}: {line.measured} (required {line.required})")
    for fact in facts:
        say(fact)
    from flairwatch.shift import SUITE_VERSION
    from flairwatch.shift.recipes import SUBSETS

    text = quality_card.section(
        title=f"Quality on the shift suite ({SUITE_VERSION}): {new.manifest.label}",
        facts=facts,
        lines=lines,
        parts=parts,
        subsets={s: SUBSETS[s] for s in dict.fromkeys(subsets) if s in SUBSETS},
    )
    args.table.parent.mkdir(parents=True, exist_ok=True)
    args.table.write_text(text + "\n", encoding="utf-8")
    payload = {name: [json_safe(asdict(r)) for r in results] for name, results in runs.items()}
    args.json.write_text(
        json.dumps({"subsets": subsets, "runs": payload}, indent=1), encoding="utf-8"
    )
    if args.card is not None:
        quality_card.write_into(args.card, text)
        say(f"model card updated: {args.card}")
    say(f"Markdown: {args.table}; per-series figures: {args.json}")
    return 0 if all(line.passed for line in lines) and not failures else 1
