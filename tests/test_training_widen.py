"""Widening a trained network keeps what it computes (training only; skipped without torch).

Reference: torch itself, the narrower network's own forward pass. The method is function-
preserving widening (Chen, Goodfellow and Shlens, "Net2Net", ICLR 2016, from memory): a wider
network that starts out computing the same function, whose new channels then learn.
"""

from __future__ import annotations

from pathlib import Path

import pytest

torch = pytest.importorskip("torch")

from flairwatch.training.checkpoint import warm_start  # noqa: E402
from flairwatch.training.network import WmhNet, widen_into  # noqa: E402

NARROW, WIDE = (4, 8, 8, 16), (6, 10, 12, 20)


def _trained_looking(widths: tuple[int, int, int, int], n_out: int = 3) -> WmhNet:
    """A network with random weights and random batch-norm statistics and affine terms."""
    net = WmhNet(in_channels=3, n_out=n_out, widths=widths)
    with torch.no_grad():
        for mod in net.modules():
            if isinstance(mod, torch.nn.BatchNorm2d):
                mod.running_mean.uniform_(-0.5, 0.5)
                mod.running_var.uniform_(0.5, 2.0)
                mod.weight.uniform_(0.5, 1.5)
                mod.bias.uniform_(-0.2, 0.2)
    return net


def test_a_widened_network_computes_what_the_narrow_one_did_and_its_new_channels_learn() -> None:
    torch.manual_seed(7)
    narrow = _trained_looking(NARROW)
    wide = WmhNet(in_channels=3, n_out=3, widths=WIDE)
    assert widen_into(wide, narrow.state_dict(), NARROW) == len(narrow.state_dict())
    x = torch.randn(2, 3, 32, 32)
    for train in (False, True):  # running statistics, then the batch's own statistics
        narrow.train(train)
        wide.train(train)
        with torch.no_grad():
            assert torch.allclose(wide(x), narrow(x), atol=1e-5)
    # the new channels are not dead: the head's weights from them get a gradient
    wide.train(True)
    wide.zero_grad()
    wide(x).square().mean().backward()
    grad = wide.head.weight.grad
    assert grad is not None and float(grad[:, NARROW[0] :].abs().sum()) > 0.0
    with pytest.raises(ValueError, match="cannot widen"):
        widen_into(WmhNet(in_channels=3, n_out=3, widths=NARROW), wide.state_dict(), WIDE)


def test_warm_start_widens_a_narrower_checkpoint_and_keeps_two_old_outputs(tmp_path: Path) -> None:
    torch.manual_seed(11)
    narrow = _trained_looking(NARROW, n_out=2).eval()  # before the ventricle output
    path = tmp_path / "narrow.pt"
    state = {"model": narrow.state_dict(), "widths": list(NARROW), "step": 1234}
    state |= {"train_seconds": 600.0, "origin": {"warm_start": {"minutes": 5.0}}}
    torch.save(state, path)
    wide = WmhNet(in_channels=3, n_out=3, widths=WIDE)
    origin = warm_start(wide, path)
    assert origin["widened_from"] == list(NARROW) and origin["minutes"] == pytest.approx(15.0)
    x = torch.randn(1, 3, 16, 16)
    with torch.no_grad():
        assert torch.allclose(wide.eval()(x)[:, :2], narrow(x), atol=1e-5)
