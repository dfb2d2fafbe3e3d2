"""The resumable training checkpoint: atomic writes, network rebuild, warm start (needs torch).

A checkpoint is one ``torch.save`` dict: ``model``, ``optimizer``, ``numpy_rng``, ``torch_rng``,
``step``, ``train_seconds``, ``cases`` (cached case names in training order), ``widths``,
``channels``, ``crop``, ``batch_size``, ``threads``, ``saved_at``, ``history`` (one entry per
training session) and, since the ventricle output, ``outputs`` (channel names) and ``origin``
(warm-start provenance). Checkpoints without ``outputs`` have the two outputs wmh, intracranial.
"""

from __future__ import annotations

import logging
import os
from pathlib import Path
from typing import Any

import torch

from flairwatch.training.network import WmhNet, widen_into

log = logging.getLogger("train_model")

CHANNELS = 3  # adjacent slices per input
OUTPUTS = ("wmh", "intracranial", "ventricles")  # output channels of a new network, in order


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
    (WMH, intracranial), and a new channel keeps its fresh initialisation. A checkpoint with
    narrower levels is widened (:func:`~flairwatch.training.network.widen_into`): the wider
    network starts computing what the narrower one did. Returns provenance.
    """
    state = torch.load(path, weights_only=False)
    widths = tuple(int(w) for w in state["widths"])
    provenance: dict[str, Any] = {}
    if widths != tuple(net.widths):  # wider levels: same function at the start, room to learn
        copied = widen_into(net, state["model"], widths)
        provenance["widened_from"] = list(widths)
        how = f"widths {widths} widened to {net.widths}, {copied} tensors filled"
    else:
        copied = _copy_matching(net, state["model"])
        how = f"{copied} tensors copied"
    log.info("warm start from %s (step %d): %s", path, state["step"], how)
    earlier = (state.get("origin") or {}).get("warm_start") or {}
    return {
        "from": str(path),
        "step": int(state["step"]),
        # CPU time behind the starting weights, the checkpoint's own warm start included
        "minutes": float(state["train_seconds"]) / 60.0 + float(earlier.get("minutes", 0.0)),
        "outputs": checkpoint_outputs(state),
        "tensors_copied": copied,
        **provenance,
    }


def _copy_matching(net: WmhNet, model: dict[str, torch.Tensor]) -> int:
    """Copy every tensor of the same shape, and the output channels both heads share."""
    own = net.state_dict()
    copied = 0
    for key, value in model.items():
        if key in own and own[key].shape == value.shape:
            own[key] = value.clone()
            copied += 1
        elif key in own and key.startswith("head.") and own[key].shape[1:] == value.shape[1:]:
            n = min(own[key].shape[0], value.shape[0])
            own[key][:n] = value[:n]
            copied += 1
    net.load_state_dict(own)
    return copied
