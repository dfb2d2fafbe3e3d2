"""Train, export and check flairwatch's WMH segmentation model (training only; needs torch).

Typical use, from the repository root::

    python scripts/train_model.py --from-generator 1-240     # phantoms made in memory, cached once
    python scripts/train_model.py --make-bank 1-200          # or phantom case folders on disk
    python scripts/train_model.py --minutes 45               # train (resumes from the checkpoint)
    python scripts/train_model.py --export --export-dir flairwatch/models/flairwatch-wmh
    python scripts/train_model.py --cases /data/lab_cases --minutes 30   # add the lab's own cases

The default output folder is ``models/flairwatch-wmh`` (the checkpoint of the ``flairwatch-wmh``
model: WMH, intracranial and lateral-ventricle outputs). ``--warm-start CHECKPOINT`` starts a new
run from another run's weights. Case folders (phantom bank, and any ``--cases DIR``) are
converted once with flairwatch's own converter into model-grid arrays under ``--cache``.
Training draws randomised crops (:mod:`flairwatch.training.sampling`) with lesion-aware and
hard-negative sampling and writes a checkpoint (model, optimiser, step, random state) every few
minutes to ``<out>/training-checkpoint.pt``, replaced atomically, so a stopped run resumes
exactly where it was (given the same cached cases). Phantom cases whose seed ends in 0 form the
validation split used to choose the threshold; the generator's held-out seeds are never trained on.

Research use only: the model this makes is not for diagnosis.
"""

from __future__ import annotations

import argparse
import logging
import signal
import time
from pathlib import Path
from types import FrameType
from typing import Any

import numpy as np
import torch

from flairwatch.training.cache import (
    GRID,
    NORM,
    cache_from_generator,
    cached_training_files,
    cached_validation_files,
    make_bank,
    parse_seeds,
    source_of,
    update_cache,
)
from flairwatch.training.checkpoint import (
    CHANNELS,
    OUTPUTS,
    build_net,
    checkpoint_outputs,
    save_checkpoint,
    warm_start,
)
from flairwatch.training.data import CaseData, load_cached
from flairwatch.training.losses import learning_rate, segmentation_loss
from flairwatch.training.network import DEFAULT_WIDTHS, count_parameters
from flairwatch.training.onnx_export import export_and_check
from flairwatch.training.sampling import hard_negative_weights, sample_batch

log = logging.getLogger("train_model")

CHECKPOINT = "training-checkpoint.pt"
__all__ = ["build_net", "main"]  # build_net: tests rebuild the network of a checkpoint


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
    p.add_argument(
        "--export-dir",
        type=Path,
        help="where --export writes them (default: the --out folder); the package ships "
        "flairwatch/models/<name>",
    )
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
    p.add_argument(
        "--altered-cases",
        type=int,
        default=5,
        help="held-out phantoms to score with one acquisition change each (see heldout.py)",
    )
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
        preferred = [p for p in validation if args.prefer and args.prefer in source_of(p)]
        # the threshold is best chosen on cases like those the final phase favoured
        validation = preferred if len(preferred) >= 3 else validation
        validation = validation[: args.max_validation]  # each one costs ONNX time on 2 cores
        export_dir = args.export_dir or args.out
        export_dir.mkdir(parents=True, exist_ok=True)
        export_and_check(
            args.out / CHECKPOINT,
            export_dir,
            validation=validation,
            grid=GRID,
            norm=NORM,
            version=args.version,
            eval_cases=args.eval_cases,
            threads=args.threads,
            cache=args.cache,
            timing_slices=args.timing_slices,
            altered_cases=args.altered_cases,
            lr=args.lr,
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
