"""Training losses and the learning-rate schedule (training only; needs torch).

Logits are (N, n_out, h, w): channel 0 WMH, 1 intracranial, 2 lateral ventricles (networks with
a third output). Targets and weights are (N, h, w) float32; a weight of 0 leaves a pixel out (an
excluded voxel, or a case without that mask).
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F


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
