"""Train, export and check flairwatch's WMH segmentation model (training only; needs torch).

Typical use, from the repository root::

    python scripts/train_model.py --make-bank 1-200          # phantom case folders, once
    python scripts/train_model.py --minutes 45               # train (resumes from the checkpoint)
    python scripts/train_model.py --export                   # ONNX + manifest + held-out check
    python scripts/train_model.py --cases /data/lab_cases --minutes 30   # add the lab's own cases

Case folders (phantom bank, and any ``--cases DIR``) are converted once with flairwatch's own
converter into model-grid arrays under ``--cache``. Training draws augmented crops with
lesion-aware sampling and writes a checkpoint (model, optimiser, step, random state) every few
minutes to ``<out>/training-checkpoint.pt``, replaced atomically, so a stopped run resumes
exactly where it was (given the same cached cases). Phantom cases whose seed ends in 0 form the
validation split used to choose the threshold; the generator's held-out seeds are never trained on.

Research use only: the model this makes is not for diagnosis.
"""

from __future__ import annotations

import argparse
import logging
import math
import os
import signal
import time
import zlib
from pathlib import Path
from types import FrameType
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F

from flairwatch.engine.manifest import GridSpec, Normalisation
from flairwatch.training.data import (
    CaseData,
    cache_case,
    case_seed,
    find_cases,
    load_cached,
)
from flairwatch.training.network import DEFAULT_WIDTHS, WmhNet, count_parameters
from flairwatch.training.onnx_export import export_and_check
from flairwatch.training.sampling import hard_negative_weights, sample_batch

log = logging.getLogger("train_model")

GRID = GridSpec(spacing_mm=(1.0, 1.0), shape=(224, 224), through_plane="keep")
NORM = Normalisation()
CHANNELS = 3
CHECKPOINT = "training-checkpoint.pt"
OUTPUTS = ("wmh", "intracranial", "ventricles")  # output channels of a new network, in order


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


# ---------------------------------------------------------------------------------------- losses


def soft_dice_loss(
    logits: torch.Tensor, target: torch.Tensor, weight: torch.Tensor
) -> torch.Tensor:
    """1 - soft Dice over the whole batch (crops without foreground do not make it undefined)."""
    p = torch.sigmoid(logits) * weight
    t = target * weight
    inter = (p * t).sum()
    return 1.0 - (2.0 * inter + 1.0) / (p.sum() + t.sum() + 1.0)


def weighted_bce(logits: torch.Tensor, target: torch.Tensor, weight: torch.Tensor) -> torch.Tensor:
    bce = F.binary_cross_entropy_with_logits(logits, target, reduction="none")
    return (bce * weight).sum() / weight.sum().clamp(min=1.0)


def _term(logits: torch.Tensor, target: torch.Tensor, weight: torch.Tensor) -> torch.Tensor:
    """BCE + soft Dice where ``weight`` > 0; zero (still in the graph) when nothing is labelled."""
    if float(weight.sum()) > 0:
        return weighted_bce(logits, target, weight) + soft_dice_loss(logits, target, weight)
    return logits.sum() * 0.0


def segmentation_loss(
    logits: torch.Tensor, targets: dict[str, torch.Tensor]
) -> tuple[torch.Tensor, dict[str, float]]:
    """BCE + soft Dice for WMH (heavy imbalance) and, at half weight each, for the intracranial
    mask and (networks with a third output) the lateral ventricles. Returns the total and the
    per-output parts."""
    wmh = _term(logits[:, 0], targets["wmh"], targets["wmh_weight"])
    icv = _term(logits[:, 1], targets["icv"], targets["icv_weight"])
    total = wmh + 0.5 * icv
    parts = {"wmh": float(wmh.detach()), "icv": float(icv.detach())}
    if logits.shape[1] > 2:
        vent = _term(logits[:, 2], targets["vent"], targets["vent_weight"])
        total = total + 0.5 * vent
        parts["vent"] = float(vent.detach())
    return total, parts


def learning_rate(step: int, base: float, total: int, warmup: int = 100) -> float:
    """Linear warm-up, then cosine decay to 5 % of ``base`` at ``total`` steps (flat after)."""
    if step < warmup:
        return base * (step + 1) / warmup
    t = min(1.0, (step - warmup) / max(1, total - warmup))
    return base * (0.05 + 0.95 * 0.5 * (1.0 + math.cos(math.pi * t)))


# ------------------------------------------------------------------------------------ checkpoint


def save_checkpoint(path: Path, state: dict[str, Any]) -> None:
    """Write the checkpoint beside its final place, flush it to disk, then rename it into place."""
    tmp = path.with_name(path.name + ".tmp")
    with open(tmp, "wb") as fh:
        torch.save(state, fh)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    dir_fd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)


def build_net(widths: tuple[int, int, int, int], n_out: int = len(OUTPUTS)) -> WmhNet:
    return WmhNet(in_channels=CHANNELS, n_out=n_out, widths=widths)


def checkpoint_outputs(state: dict[str, Any]) -> list[str]:
    """Output channel names of a checkpoint (those from before ventricles have two)."""
    return list(state.get("outputs", ["wmh", "intracranial"]))


def warm_start(net: WmhNet, path: Path) -> dict[str, Any]:
    """Copy the weights of the checkpoint at ``path`` into ``net`` where shapes allow.

    Every layer of the same shape is copied; the output layer copies the channels both share
    (WMH, intracranial), and a new channel keeps its fresh initialisation. Returns provenance.
    """
    state = torch.load(path, weights_only=False)
    own = net.state_dict()
    copied = 0
    for key, value in state["model"].items():
        if key in own and own[key].shape == value.shape:
            own[key] = value.clone()
            copied += 1
        elif key in own and key.startswith("head.") and own[key].shape[1:] == value.shape[1:]:
            n = min(own[key].shape[0], value.shape[0])
            own[key][:n] = value[:n]
            copied += 1
    net.load_state_dict(own)
    log.info("warm start from %s (step %d): %d tensors copied", path, state["step"], copied)
    return {
        "from": str(path),
        "step": int(state["step"]),
        "minutes": float(state["train_seconds"]) / 60.0,
        "outputs": checkpoint_outputs(state),
        "tensors_copied": copied,
    }


class StopFlag:
    """Set by SIGTERM/SIGINT so the loop saves a checkpoint and stops cleanly."""

    def __init__(self) -> None:
        self.stop = False

    def __call__(self, signum: int, frame: FrameType | None) -> None:
        log.info("signal %d: saving a checkpoint and stopping", signum)
        self.stop = True


def case_weights(cases: list[CaseData], prefer: str, share: float) -> np.ndarray | None:
    """Sampling weights giving cases whose name or source contains ``prefer`` ``share`` of draws.

    None (uniform over cases) when ``prefer`` is empty, ``share`` is 0, or either group is empty.
    """
    chosen = np.array([bool(prefer) and (prefer in c.name or prefer in c.source) for c in cases])
    if share <= 0.0 or chosen.all() or not chosen.any():
        return None
    w = np.where(chosen, share / chosen.sum(), (1.0 - share) / (~chosen).sum())
    return np.asarray(w / w.sum())


def sampling_weights(cases: list[CaseData], args: argparse.Namespace) -> np.ndarray:
    """Case weights: preferred cases (``--prefer``) times hard negatives (lesion-free cases)."""
    base = case_weights(cases, args.prefer, args.prefer_share)
    w = hard_negative_weights(cases, args.lesion_free_factor)
    if base is not None:
        w = w * base
    return np.asarray(w / w.sum())


def _load_cases(files: list[Path], known: dict[str, CaseData]) -> list[CaseData]:
    for path in files:
        if path.stem not in known:
            known[path.stem] = load_cached(path)
    return [known[p.stem] for p in files]


def train(args: argparse.Namespace) -> None:
    torch.set_num_threads(args.threads)
    ckpt_path = args.out / CHECKPOINT
    args.out.mkdir(parents=True, exist_ok=True)
    widths = tuple(args.widths)
    assert len(widths) == 4
    torch.manual_seed(args.seed)  # before the network is built: fixes its initial weights
    rng = np.random.default_rng(args.seed)
    net = build_net((widths[0], widths[1], widths[2], widths[3]))
    step, train_s, case_names = 0, 0.0, []
    history: list[dict[str, Any]] = []
    origin: dict[str, Any] = {"warm_start": None}
    resuming = ckpt_path.is_file() and not args.fresh
    if args.warm_start and not resuming:
        origin["warm_start"] = warm_start(net, args.warm_start)
    opt = torch.optim.AdamW(net.parameters(), lr=args.lr, weight_decay=1e-4)
    if resuming:
        state = torch.load(ckpt_path, weights_only=False)
        outputs = checkpoint_outputs(state)
        net = build_net(tuple(state["widths"]), n_out=len(outputs))
        net.load_state_dict(state["model"])
        opt = torch.optim.AdamW(net.parameters(), lr=args.lr, weight_decay=1e-4)
        opt.load_state_dict(state["optimizer"])
        rng.bit_generator.state = state["numpy_rng"]
        torch.set_rng_state(state["torch_rng"])
        step, train_s, case_names = state["step"], state["train_seconds"], state["cases"]
        history = list(state.get("history", []))
        origin = dict(state.get("origin", {"warm_start": None}))
        if not history and step > 0:  # a checkpoint from before sessions were recorded
            history = [
                {
                    "from_step": 0,
                    "to_step": step,
                    "minutes": train_s / 60.0,
                    "cases": len(case_names),
                    "prefer": "",
                    "prefer_share": 0.0,
                    "started": "not recorded",
                }
            ]
        log.info("resumed from %s at step %d (%.1f min trained)", ckpt_path, step, train_s / 60)
    known: dict[str, CaseData] = {}
    # the resumed run first sees exactly the cases it had, in the same order
    files = [args.cache / f"{n}.npz" for n in case_names if (args.cache / f"{n}.npz").is_file()]
    files += [p for p in cached_training_files(args.cache) if p.stem not in set(case_names)]
    cases = _load_cases(files, known)
    if not cases:
        raise SystemExit(
            f"no cached training cases in {args.cache}; build the bank and cache first"
        )
    log.info(
        "network widths %s, %d parameters; %d training cases",
        net.widths,
        count_parameters(net),
        len(cases),
    )
    stop = StopFlag()
    signal.signal(signal.SIGTERM, stop)
    signal.signal(signal.SIGINT, stop)

    session = {
        "from_step": step,
        "to_step": step,
        "minutes": 0.0,
        "cases": len(cases),
        "prefer": args.prefer,
        "prefer_share": args.prefer_share,
        "started": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
    }
    session_start_s = train_s

    def checkpoint() -> None:
        session.update(to_step=step, minutes=(train_s - session_start_s) / 60.0, cases=len(cases))
        save_checkpoint(
            ckpt_path,
            {
                "model": net.state_dict(),
                "optimizer": opt.state_dict(),
                "numpy_rng": rng.bit_generator.state,
                "torch_rng": torch.get_rng_state(),
                "step": step,
                "train_seconds": train_s,
                "cases": [c.name for c in cases],
                "widths": list(net.widths),
                "channels": CHANNELS,
                "outputs": list(OUTPUTS[: net.n_out]),
                "origin": origin,
                "crop": args.crop,
                "batch_size": args.batch_size,
                "threads": args.threads,
                "saved_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                "history": [*history, dict(session)],
            },
        )
        log.info("checkpoint saved at step %d", step)

    net.train()
    deadline = time.monotonic() + args.minutes * 60.0
    last_ckpt = time.monotonic()
    run_loss, run_n, t_log = 0.0, 0, time.monotonic()
    run_parts: dict[str, float] = {}
    while time.monotonic() < deadline and not stop.stop:
        if args.max_steps and step >= args.max_steps:
            break
        t0 = time.monotonic()
        lr = learning_rate(step, args.lr, args.total_steps)
        for group in opt.param_groups:
            group["lr"] = lr
        b = sample_batch(
            cases,
            rng,
            batch_size=args.batch_size,
            crop=args.crop,
            channels=CHANNELS,
            weights=sampling_weights(cases, args),
        )
        targets = {
            name: torch.from_numpy(getattr(b, name))
            for name in ("wmh", "wmh_weight", "icv", "icv_weight", "vent", "vent_weight")
        }
        opt.zero_grad(set_to_none=True)
        loss, parts = segmentation_loss(net(torch.from_numpy(b.x)), targets)
        loss.backward()
        opt.step()
        step += 1
        train_s += time.monotonic() - t0
        run_loss, run_n = run_loss + float(loss.detach()), run_n + 1
        for key, value in parts.items():
            run_parts[key] = run_parts.get(key, 0.0) + value
        if step % args.log_every == 0:
            rate = run_n * 60.0 / max(1e-9, time.monotonic() - t_log)
            detail = ", ".join(f"{k} {v / run_n:.4f}" for k, v in run_parts.items())
            log.info(
                "step %d loss %.4f (%s) lr %.2e %.1f steps/min %d cases %.1f min",
                step,
                run_loss / run_n,
                detail,
                lr,
                rate,
                len(cases),
                train_s / 60,
            )
            run_loss, run_n, t_log = 0.0, 0, time.monotonic()
            run_parts = {}
        if args.rescan_every and step % args.rescan_every == 0:
            if args.bank_sources:
                update_cache(args.bank_sources, args.cache)
            new = [p for p in cached_training_files(args.cache) if p.stem not in known]
            if new:
                cases = cases + _load_cases(new, known)
                log.info("added %d cached cases (now %d)", len(new), len(cases))
        if time.monotonic() - last_ckpt > args.checkpoint_minutes * 60.0:
            checkpoint()
            last_ckpt = time.monotonic()
    checkpoint()


# ------------------------------------------------------------------------------------------- CLI


def _source(path: Path) -> str:
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


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    p.add_argument("--bank", type=Path, default=Path("work/bank"), help="phantom case folders")
    p.add_argument("--cases", type=Path, action="append", default=[], help="lab case folders")
    p.add_argument("--cache", type=Path, default=Path("work/cache"), help="model-grid arrays")
    p.add_argument("--out", type=Path, default=Path("models/flairwatch-wmh"), help="model folder")
    p.add_argument("--make-bank", metavar="SEEDS", help="build phantom cases, e.g. 1-200, and stop")
    p.add_argument("--bank-workers", type=int, default=1)
    p.add_argument(
        "--from-generator", metavar="SEEDS", help="cache phantoms made in memory, e.g. 1000-1199"
    )
    p.add_argument("--minutes", type=float, default=0.0, help="training budget (0: no training)")
    p.add_argument("--max-steps", type=int, default=0, help="stop after this many steps (0: none)")
    p.add_argument(
        "--total-steps", type=int, default=3000, help="length of the learning-rate decay"
    )
    p.add_argument("--export", action="store_true", help="write model.onnx, manifest, model card")
    p.add_argument("--fresh", action="store_true", help="ignore an existing checkpoint")
    p.add_argument(
        "--warm-start",
        type=Path,
        metavar="CHECKPOINT",
        help="start a new run from another run's weights (layers of matching shape)",
    )
    p.add_argument(
        "--lesion-free-factor", type=float, default=2.0, help="sampling weight of lesion-free cases"
    )
    p.add_argument("--widths", type=int, nargs=4, default=list(DEFAULT_WIDTHS))
    p.add_argument("--batch-size", type=int, default=12)
    p.add_argument("--crop", type=int, default=160, help="crop size in pixels (multiple of 8)")
    p.add_argument("--lr", type=float, default=2e-3)
    p.add_argument(
        "--prefer",
        default="",
        help="cases whose name or source contains this text (e.g. a generator version) ...",
    )
    p.add_argument(
        "--prefer-share", type=float, default=0.0, help="... get this fraction of the crops"
    )
    p.add_argument("--seed", type=int, default=20261201)
    p.add_argument("--threads", type=int, default=2)
    p.add_argument("--checkpoint-minutes", type=float, default=3.0)
    p.add_argument("--log-every", type=int, default=20)
    p.add_argument("--rescan-every", type=int, default=200, help="steps between cache updates")
    p.add_argument("--eval-cases", type=int, default=6, help="held-out phantoms to score")
    p.add_argument("--max-validation", type=int, default=12, help="validation cases to use")
    p.add_argument("--timing-slices", type=int, default=48, help="slices for the speed check")
    p.add_argument("--version", default="0.2.0", help="model version written to the manifest")
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    logging.basicConfig(
        level=logging.INFO, format="%(asctime)s %(levelname)s %(message)s", datefmt="%H:%M:%S"
    )
    if args.make_bank:
        make_bank(args.bank, parse_seeds(args.make_bank), args.bank_workers)
        return 0
    if args.from_generator:
        cache_from_generator(args.cache, parse_seeds(args.from_generator))
        return 0
    sources = [("bank", args.bank)] + [(f"lab{i}", d) for i, d in enumerate(args.cases, 1)]
    args.bank_sources = sources
    added = update_cache(sources, args.cache)
    log.info(
        "cache: %d cases added, %d training, %d validation",
        added,
        len(cached_training_files(args.cache)),
        len(cached_validation_files(args.cache)),
    )
    if args.minutes > 0:
        train(args)
    if args.export:
        validation = cached_validation_files(args.cache)
        preferred = [p for p in validation if args.prefer and args.prefer in _source(p)]
        # the threshold is best chosen on cases like those the final phase favoured
        validation = preferred if len(preferred) >= 3 else validation
        validation = validation[: args.max_validation]  # each one costs ONNX time on 2 cores
        export_and_check(
            args.out / CHECKPOINT,
            args.out,
            validation=validation,
            grid=GRID,
            norm=NORM,
            version=args.version,
            eval_cases=args.eval_cases,
            threads=args.threads,
            cache=args.cache,
            timing_slices=args.timing_slices,
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
