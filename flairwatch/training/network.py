"""The 2.5D U-Net behind the shipped ``wmh-synth`` model (training only; needs torch).

Input: a batch of model-grid slices, shape (N, C, H, W), C adjacent axial slices (centre slice in
the middle), H along patient Posterior, W along patient Left, 1.0 x 1.0 mm pixels, intensities
after foreground-median normalisation (normal tissue near 1). Output of :class:`WmhNet`: logits
(N, 2, H, W), channel 0 WMH, channel 1 intracranial; :class:`WithSigmoid` turns them into the
probabilities that the exported ONNX graph returns.

Design: four resolution levels, two 3x3 convolutions with batch normalisation and ReLU per level,
max-pooling down, 2x2 transposed convolutions up, skip connections by concatenation. Batch
normalisation folds into the convolutions at export, so it costs nothing at inference. H and W
must be multiples of 8.
"""

from __future__ import annotations

import torch
from torch import nn

DEFAULT_WIDTHS: tuple[int, int, int, int] = (12, 24, 48, 96)


class ConvBlock(nn.Sequential):
    """Two 3x3 convolutions, each followed by batch normalisation and ReLU (spatial size kept)."""

    def __init__(self, c_in: int, c_out: int) -> None:
        super().__init__(
            nn.Conv2d(c_in, c_out, 3, padding=1, bias=False),
            nn.BatchNorm2d(c_out),
            nn.ReLU(inplace=True),
            nn.Conv2d(c_out, c_out, 3, padding=1, bias=False),
            nn.BatchNorm2d(c_out),
            nn.ReLU(inplace=True),
        )


class WmhNet(nn.Module):
    """Four-level 2.5D U-Net returning logits (N, n_out, H, W) for (N, in_channels, H, W) input.

    Parameters
    ----------
    in_channels : int
        Adjacent slices per sample (odd).
    n_out : int
        Output maps (WMH, intracranial).
    widths : tuple of 4 int
        Feature channels at full, 1/2, 1/4 and 1/8 resolution.
    """

    def __init__(
        self,
        in_channels: int = 3,
        n_out: int = 2,
        widths: tuple[int, int, int, int] = DEFAULT_WIDTHS,
    ) -> None:
        super().__init__()
        w0, w1, w2, w3 = widths
        self.enc0 = ConvBlock(in_channels, w0)
        self.enc1 = ConvBlock(w0, w1)
        self.enc2 = ConvBlock(w1, w2)
        self.bottom = ConvBlock(w2, w3)
        self.pool = nn.MaxPool2d(2)
        self.up2 = nn.ConvTranspose2d(w3, w2, 2, stride=2)
        self.dec2 = ConvBlock(2 * w2, w2)
        self.up1 = nn.ConvTranspose2d(w2, w1, 2, stride=2)
        self.dec1 = ConvBlock(2 * w1, w1)
        self.up0 = nn.ConvTranspose2d(w1, w0, 2, stride=2)
        self.dec0 = ConvBlock(2 * w0, w0)
        self.head = nn.Conv2d(w0, n_out, 1)
        self.widths = widths
        self.in_channels = in_channels
        self.n_out = n_out

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        e0 = self.enc0(x)
        e1 = self.enc1(self.pool(e0))
        e2 = self.enc2(self.pool(e1))
        b = self.bottom(self.pool(e2))
        d2 = self.dec2(torch.cat([self.up2(b), e2], dim=1))
        d1 = self.dec1(torch.cat([self.up1(d2), e1], dim=1))
        d0 = self.dec0(torch.cat([self.up0(d1), e0], dim=1))
        out: torch.Tensor = self.head(d0)
        return out


class WithSigmoid(nn.Module):
    """Wraps a logit network so that it returns probabilities 0..1 (the exported graph)."""

    def __init__(self, net: nn.Module) -> None:
        super().__init__()
        self.net = net

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return torch.sigmoid(self.net(x))


def count_parameters(net: nn.Module) -> int:
    """Number of trainable parameters."""
    return sum(p.numel() for p in net.parameters() if p.requires_grad)


def _layer_inputs(
    old: tuple[int, int, int, int], new: tuple[int, int, int, int], in_channels: int
) -> dict[str, list[tuple[int, int]]]:
    """Per convolution of :class:`WmhNet`: its input channels as (old, new) segments, two for
    a skip concatenation."""
    lv = [(old[i], new[i]) for i in range(4)]
    layers: dict[str, list[tuple[int, int]]] = {}
    for name, src, dst in (
        ("enc0", (in_channels, in_channels), lv[0]),
        ("enc1", lv[0], lv[1]),
        ("enc2", lv[1], lv[2]),
        ("bottom", lv[2], lv[3]),
    ):
        layers[f"{name}.0"] = [src]
        layers[f"{name}.3"] = [dst]
    for name, up, level in (("2", lv[3], lv[2]), ("1", lv[2], lv[1]), ("0", lv[1], lv[0])):
        layers[f"up{name}"] = [up]
        layers[f"dec{name}.0"] = [level, level]  # cat([upsampled, skip])
        layers[f"dec{name}.3"] = [level]
    layers["head"] = [lv[0]]
    return layers


def _index(segments: list[tuple[int, int]]) -> torch.Tensor:
    """Where each old input channel sits among the new ones."""
    idx: list[int] = []
    start = 0
    for n_old, n_new in segments:
        idx.extend(range(start, start + n_old))
        start += n_new
    return torch.tensor(idx, dtype=torch.long)


@torch.no_grad()
def widen_into(net: WmhNet, old_state: dict[str, torch.Tensor], old_widths: tuple[int, ...]) -> int:
    """Load a narrower :class:`WmhNet`'s weights into ``net`` so that it computes the same
    outputs (function-preserving widening, as in "Net2Net": Chen, Goodfellow and Shlens, 2016).

    Old channels keep their weights and ignore every new channel (zero weights from new inputs,
    so their values and batch statistics are unchanged, and the head reads old channels only);
    new channels keep their fresh random weights, so they compute something and learn from the
    first step. Returns the number of tensors filled.
    """
    w_old = tuple(int(w) for w in old_widths)
    if len(w_old) != 4 or any(o > n for o, n in zip(w_old, net.widths, strict=True)):
        raise ValueError(f"cannot widen widths {w_old} into {net.widths}")
    own = net.state_dict()
    layers = _layer_inputs((w_old[0], w_old[1], w_old[2], w_old[3]), net.widths, net.in_channels)
    filled = 0
    for key, value in old_state.items():
        layer, _, kind = key.rpartition(".")
        if key not in own:
            continue
        target = own[key]
        if kind == "num_batches_tracked":
            target.copy_(value)
        elif layer in layers:  # a convolution (or the transposed one going up)
            idx = _index(layers[layer])
            if kind == "bias":
                target[: value.shape[0]] = value
            elif layer.startswith("up"):  # ConvTranspose2d weight: (in, out, kh, kw)
                out_old = value.shape[1]
                target[:, :out_old] = 0.0
                target[idx, :out_old] = value
            else:  # Conv2d weight: (out, in, kh, kw)
                out_old = value.shape[0]
                target[:out_old] = 0.0
                target[:out_old, idx] = value
        else:  # batch normalisation after a convolution: per output channel
            target[: value.shape[0]] = value
        filled += 1
    net.load_state_dict(own)
    return filled
