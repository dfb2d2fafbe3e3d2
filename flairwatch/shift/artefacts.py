"""The shift suite's own artefacts, applied on the series grid (axes (i, j, k), slices along k).

Phase encoding runs along j (down the columns), as the DICOM header states
(InPlanePhaseEncodingDirection COL). Each artefact is a pure function of the image and a random
generator:

- pulsation ghosts of flowing blood: the vessel signal's k-space lines are amplitude-modulated
  with a period of a few lines, which copies the vessels along j (common practice: pulsatile
  flow ghosts lie along the phase-encoding direction);
- motion ghosting: a random share of phase-encoding lines is acquired with the head displaced
  along j (a linear phase ramp on those lines), which smears ghosts of the whole head along j;
- Gibbs ringing: k-space cut to a central fraction in both in-plane axes with no window;
- bias: a smooth multiplicative field from random low-order cosines of the scanner coordinates,
  scaled to a set log-SD inside the head;
- Rician noise: the magnitude of the signal plus complex Gaussian noise (common practice for
  magnitude MR images).
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

F32 = npt.NDArray[np.float32]
C64 = npt.NDArray[np.complex64]


def pulsation_ghosts(vessels: F32, strength: float, rng: np.random.Generator) -> C64:
    """Vessel signal with its pulsation ghosts along j (complex, same shape)."""
    nj = vessels.shape[1]
    period = float(rng.uniform(3.0, 7.0))
    phase = float(rng.uniform(0.0, 2.0 * np.pi))
    m = np.arange(nj)
    mod = 1.0 + strength * 0.6 * np.cos(2.0 * np.pi * m / period + phase)
    k = np.fft.fft(vessels.astype(np.complex64), axis=1)
    return np.asarray(np.fft.ifft(k * mod.reshape(1, -1, 1), axis=1), dtype=np.complex64)


def motion_ghosts(
    image: C64, fraction: float, shift_mm: float, pixel_mm: float, rng: np.random.Generator
) -> C64:
    """Displace the head by up to ``shift_mm`` along j on a random ``fraction`` of k-space lines."""
    nj = image.shape[1]
    freq = np.fft.fftfreq(nj)
    hit = rng.random(nj) < fraction
    shifts = rng.uniform(0.3, 1.0, nj) * shift_mm / pixel_mm * rng.choice([-1.0, 1.0], nj)
    ramp = np.where(hit, np.exp(-2j * np.pi * freq * shifts), 1.0)
    k = np.fft.fft(image, axis=1)
    return np.asarray(np.fft.ifft(k * ramp.reshape(1, -1, 1), axis=1), dtype=np.complex64)


def truncate_kspace(image: C64, keep: float) -> C64:
    """Keep the central ``keep`` fraction of k-space along i and j, zero the rest (no window)."""
    out: npt.NDArray[np.complexfloating] = image
    for axis in (0, 1):
        n = image.shape[axis]
        half = max(1, round(keep * n / 2))
        freq = np.abs(np.fft.fftfreq(n) * n)
        mask = (freq < half).astype(np.float32)
        shape = [1, 1, 1]
        shape[axis] = n
        out = np.fft.ifft(np.fft.fft(out, axis=axis) * mask.reshape(shape), axis=axis)
    return np.asarray(out, dtype=np.complex64)


def bias_field(
    world: npt.NDArray[np.float64],
    log_sd: float,
    head: npt.NDArray[np.bool_],
    rng: np.random.Generator,
) -> F32:
    """exp of a smooth random field over scanner mm ``world`` (3, I, J, K), log-SD ``log_sd`` in ``head``."""
    field = np.zeros(world.shape[1:], dtype=np.float64)
    for _ in range(6):
        direction = rng.standard_normal(3)
        direction /= np.linalg.norm(direction)
        wavelength = rng.uniform(180.0, 420.0)  # mm: a coil's sensitivity varies over the head
        proj = np.tensordot(direction, world, axes=1)
        field += rng.standard_normal() * np.cos(
            2.0 * np.pi * proj / wavelength + rng.uniform(0, 2 * np.pi)
        )
    inside = field[head] if head.any() else field.ravel()
    field = (field - inside.mean()) / (inside.std() + 1e-9) * log_sd
    return np.asarray(np.exp(field), dtype=np.float32)


def rician(magnitude: F32, sigma: float, rng: np.random.Generator) -> F32:
    """|magnitude + sigma (n1 + i n2)| with independent standard normal n1, n2."""
    n1 = rng.standard_normal(magnitude.shape, dtype=np.float32) * sigma
    n2 = rng.standard_normal(magnitude.shape, dtype=np.float32) * sigma
    return np.asarray(np.sqrt((magnitude + n1) ** 2 + n2**2), dtype=np.float32)
