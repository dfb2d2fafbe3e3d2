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
