"""Domain randomisation for training crops: pure numpy functions, no I/O.

The aim is that the network learns the shape and context of white-matter hyperintensities, not one
generator's intensities: tissue contrasts, contrast curves, bias fields, noise, blur, slice
thickness, head shape and bright structures that are not lesions all vary far beyond what the
phantom physics produces. Intensity transforms never touch labels; geometric transforms move
labels with nearest-neighbour interpolation, so they stay label values.

Array conventions: a crop stack ``x`` is float32 (C, h, w), C adjacent axial slices (centre in
the middle), h along patient Posterior, w along patient Left, 1 mm pixels, intensities after
foreground-median normalisation (normal tissue near 1). Label maps are (h, w) or (C, h, w) uint8.
``tissue`` uses the phantom's labels (``flairwatch.phantom.generator.TISSUE_CLASSES``: 0 outside
the intracranial space, 1 CSF, 2 ventricles, 3 grey matter, 4 white matter, 5 WMH; 255 unknown).
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

OUTSIDE, CSF, VENTRICLE, GM, WM, WMH = 0, 1, 2, 3, 4, 5
UNKNOWN = 255
N_TISSUES = 6

FloatArray = np.ndarray


# ------------------------------------------------------------------------ intensity (labels kept)


def random_tissue_factors(rng: np.random.Generator) -> np.ndarray:
    """Multiplicative factor per tissue class (index = class), drawn far beyond the physics model.

    CSF may come out bright (incomplete fluid suppression: bright sulci), grey matter brighter or
    darker than white matter (field strength, timing), scalp and fat anything. A lesion keeps
    its contrast to white matter within 0.9 to 1.15 of the original ratio, so it stays a lesion.
    """
    f = np.ones(N_TISSUES, dtype=np.float32)
    f[OUTSIDE] = np.exp(rng.uniform(np.log(0.4), np.log(1.8)))
    f[CSF] = np.exp(rng.uniform(np.log(0.5), np.log(3.5)))
    f[VENTRICLE] = np.exp(rng.uniform(np.log(0.5), np.log(2.0)))
    f[GM] = np.exp(rng.uniform(np.log(0.8), np.log(1.5)))
    f[WM] = np.exp(rng.uniform(np.log(0.85), np.log(1.15)))
    f[WMH] = f[WM] * rng.uniform(0.9, 1.15)
    return f


def remap_tissues(
    x: FloatArray, tissue: np.ndarray, factors: np.ndarray, smooth_px: float = 0.7
) -> FloatArray:
    """Multiply each voxel by its tissue's factor; unknown tissue (255) keeps factor 1.

    The factor map is smoothed in-plane (Gaussian, ``smooth_px`` pixels) so that partial-volume
    borders stay soft. ``x`` and ``tissue`` have the same shape, (C, h, w) or (h, w).
    """
    lut = np.ones(256, dtype=np.float32)
    lut[: factors.size] = factors
    fmap = lut[tissue]
    if smooth_px > 0:
        sigma = (0.0,) * (fmap.ndim - 2) + (smooth_px, smooth_px)
        fmap = ndimage.gaussian_filter(fmap, sigma=sigma, mode="nearest")
    return np.asarray(x * fmap, dtype=np.float32)


def fluid_levels(
    x: FloatArray, tissue: np.ndarray, csf_ratio: float, ventricle_ratio: float
) -> FloatArray:
    """Set the median of CSF and of the ventricles to the given multiples of white matter's.

    Incomplete fluid suppression (an inversion time that does not null CSF, inflow, a short
    TR) leaves sulci, cisterns and ventricles anywhere from dark to brighter than white
    matter; the physics model always nulls them well. Each class is scaled by one factor
    (texture and soft borders kept, through :func:`remap_tissues`, so a thin structure comes out
    a little below its target); classes with fewer than
    20 voxels in the crop, or a crop with little white matter, are left alone. ``x`` and
    ``tissue`` are (C, h, w).
    """
    wm = x[tissue == WM]
    if wm.size < 50:
        return x
    wm_level = float(np.median(wm))
    factors = np.ones(N_TISSUES, dtype=np.float32)
    for cls, ratio in ((CSF, csf_ratio), (VENTRICLE, ventricle_ratio)):
        values = x[tissue == cls]
        level = float(np.median(values)) if values.size >= 20 else 0.0
        if level > 0:
            factors[cls] = ratio * wm_level / level
    return remap_tissues(x, tissue, factors)


def motion_ghosts(
    x: FloatArray, shifts: tuple[int, ...], amplitudes: tuple[float, ...], axis: int
) -> FloatArray:
    """Add shifted, attenuated copies of the image along one in-plane axis (motion ghosts).

    Periodic motion during a scan replicates the head along the phase-encoding direction
    (common practice: ghosts appear along phase encoding only); each ghost is the crop rolled by
    ``shifts[i]`` pixels along ``axis`` (1 = h, 2 = w of a (C, h, w) stack) times
    ``amplitudes[i]``. Labels stay: a ghost of a lesion is not a lesion.
    """
    out = np.array(x, dtype=np.float32, copy=True)
    for shift, amplitude in zip(shifts, amplitudes, strict=True):
        out += np.float32(amplitude) * np.roll(x, shift, axis=axis)
    return out


def motion_during_scan(x: FloatArray, displacement_px: np.ndarray, axis: int) -> FloatArray:
    """The magnitude image of a head that moved along ``axis`` while k-space was filled.

    Phase-encoding line n (in acquisition order, from the most negative spatial frequency up)
    was recorded with the head displaced by ``displacement_px[n]`` pixels; a shift multiplies
    that line by a linear phase (Fourier shift theorem, common practice), so smooth or periodic
    trajectories give ghosts of the whole head along ``axis`` and sudden moves give smearing.
    Labels stay: a ghost of a lesion is not a lesion. ``axis`` is 1 (h) or 2 (w) of (C, h, w).
    """
    n = x.shape[axis]
    if displacement_px.shape != (n,):
        raise ValueError(f"need one displacement per line ({n}), got {displacement_px.shape}")
    freq = np.fft.fftfreq(n)
    ramp = np.exp(-2j * np.pi * freq * np.fft.ifftshift(displacement_px))
    shape = [1, 1, 1]
    shape[axis] = n
    k = np.fft.fft(x, axis=axis) * ramp.reshape(shape)
    return np.asarray(np.abs(np.fft.ifft(k, axis=axis)), dtype=np.float32)


def random_trajectory(n: int, rng: np.random.Generator) -> np.ndarray:
    """Displacements (pixels) of the head over ``n`` phase-encoding lines, of three kinds:
    periodic motion (breathing, pulsation: a sine of 3 to 40 lines' period), restless motion
    (random jitter from line to line, smoothed over 0 to 2 lines, RMS 0.4 to 2 pixels: ghosts
    spread over the whole phase-encoding axis) or one sudden move part-way. At most 5 pixels."""
    t = np.arange(n, dtype=np.float64)
    kind = rng.random()
    if kind < 0.45:
        period = float(rng.uniform(3.0, 40.0))
        amplitude = float(rng.uniform(0.3, 2.5))
        return amplitude * np.sin(2 * np.pi * t / period + rng.uniform(0, 2 * np.pi))
    if kind < 0.75:
        jitter = rng.standard_normal(n)
        smooth = float(rng.uniform(0.0, 2.0))
        if smooth > 0.3:
            jitter = ndimage.gaussian_filter1d(jitter, smooth, mode="wrap")
        jitter *= float(rng.uniform(0.4, 2.0)) / max(float(np.sqrt(np.mean(jitter**2))), 1e-9)
        return np.clip(jitter, -5.0, 5.0)
    start = int(rng.integers(n // 8, 7 * n // 8))
    return np.where(t >= start, float(rng.uniform(1.0, 5.0)) * rng.choice((-1.0, 1.0)), 0.0)


def fade_lesions(
    x: FloatArray, tissue: np.ndarray, target_ratio: float, smooth_px: float = 0.7
) -> FloatArray:
    """Scale each lesion's excess over white matter so that its median is ``target_ratio`` x WM.

    Lesion voxels keep their texture and their soft partial-volume edges: a voxel's excess over
    the crop's white-matter median is multiplied by one factor (at most 1, so lesions only ever
    get fainter), blended by a smoothed lesion map. Faint lesions, barely brighter than white
    matter, are what the phantom physics rarely makes and what a model must still find. ``x``
    and ``tissue`` are (C, h, w); crops without enough white matter or lesion are returned as is.
    """
    wm = x[tissue == WM]
    lesion_values = x[tissue == WMH]
    if wm.size < 50 or lesion_values.size < 5:
        return x
    wm_level = float(np.median(wm))
    excess = float(np.median(lesion_values)) - wm_level
    if wm_level <= 0 or excess <= 0:
        return x
    k = min(1.0, (target_ratio - 1.0) * wm_level / excess)
    weight = (tissue == WMH).astype(np.float32)
    if smooth_px > 0:
        sigma = (0.0,) * (weight.ndim - 2) + (smooth_px, smooth_px)
        weight = ndimage.gaussian_filter(weight, sigma=sigma, mode="nearest")
    factor = 1.0 - weight * np.float32(1.0 - k)
    out = wm_level + (x - wm_level) * factor
    return np.asarray(np.where(x > wm_level, out, x), dtype=np.float32)


def gamma_curve(x: FloatArray, gamma: float, reference: float = 1.0) -> FloatArray:
    """``reference * (x / reference) ** gamma`` for x >= 0 (negatives clipped to 0): monotone."""
    base = np.maximum(x, 0.0) / np.float32(reference)
    return np.asarray(np.float32(reference) * base ** np.float32(gamma), dtype=np.float32)


def contrast_curve(x: FloatArray, rng: np.random.Generator, spread: float = 0.25) -> FloatArray:
    """A random strictly increasing piecewise-linear intensity map (keeps the order of values).

    Knots at 0, 0.5, 1, 1.5, 2, 3 and 6 (normalised units); each segment's slope is the identity's
    times exp(N(0, ``spread``)), so curves bend but never fold.
    """
    knots = np.array([0.0, 0.5, 1.0, 1.5, 2.0, 3.0, 6.0], dtype=np.float32)
    slopes = np.exp(rng.normal(0.0, spread, size=knots.size - 1)).astype(np.float32)
    values = np.concatenate([[0.0], np.cumsum(np.diff(knots) * slopes)]).astype(np.float32)
    factor = np.float32(1.0 / np.interp(1.0, knots, values))  # white matter stays near 1
    values *= factor
    top_slope = slopes[-1] * factor  # beyond the last knot: continue the last segment
    xc = np.maximum(x, 0.0)
    out = np.interp(xc, knots, values).astype(np.float32)
    beyond = xc > knots[-1]
    out[beyond] = values[-1] + (xc[beyond] - knots[-1]) * top_slope
    return out


def bias_field(
    shape: tuple[int, int], strength: float, rng: np.random.Generator, cells: int = 4
) -> FloatArray:
    """Smooth positive multiplicative field (h, w): exp of a cubic-upsampled coarse random grid.

    ``strength`` is the standard deviation of the log field at the coarse points (0.3 gives
    roughly +-35 % over a crop). Always > 0.
    """
    coarse = rng.normal(0.0, strength, size=(cells, cells)).astype(np.float32)
    zoom = (shape[0] / cells, shape[1] / cells)
    log_field = ndimage.zoom(coarse, zoom, order=3, mode="nearest", grid_mode=True)
    log_field = log_field[: shape[0], : shape[1]]
    return np.exp(log_field).astype(np.float32)


def rician_noise(x: FloatArray, sd: float, rng: np.random.Generator) -> FloatArray:
    """Magnitude of the signal plus complex Gaussian noise of standard deviation ``sd`` per part."""
    n1 = rng.standard_normal(x.shape, dtype=np.float32) * np.float32(sd)
    n2 = rng.standard_normal(x.shape, dtype=np.float32) * np.float32(sd)
    return np.asarray(np.sqrt((x + n1) ** 2 + n2**2), dtype=np.float32)


def blur_inplane(x: FloatArray, sigma_px: tuple[float, float]) -> FloatArray:
    """Gaussian blur along (h, w) only, as a coarser in-plane acquisition gives."""
    sigma = (0.0,) * (x.ndim - 2) + sigma_px
    return np.asarray(ndimage.gaussian_filter(x, sigma=sigma, mode="nearest"), dtype=np.float32)


def thick_slices(stack: FloatArray, thickness: int) -> FloatArray:
    """Simulated thick slices: each slice becomes the mean of ``thickness`` adjacent ones.

    Along axis 0, centred (for even ``thickness`` the extra slice is on the superior side),
    edge slices repeated at the ends. A slab average is what a thick 2D slice measures
    (common practice: the slice profile integrates signal through the slab).
    """
    if thickness <= 1:
        return np.asarray(stack, dtype=np.float32)
    n = stack.shape[0]
    lo = -((thickness - 1) // 2)
    idx = np.clip(np.arange(n)[:, None] + np.arange(lo, lo + thickness)[None, :], 0, n - 1)
    return np.asarray(stack[idx].astype(np.float32).mean(axis=1), dtype=np.float32)


# ------------------------------------------------------------------------- geometry (labels move)


def random_warp(
    shape: tuple[int, int],
    rng: np.random.Generator,
    *,
    scale: tuple[float, float] = (0.85, 1.15),
    max_rotation_deg: float = 12.0,
    elastic_px: float = 3.0,
) -> FloatArray:
    """Sampling coordinates (2, h, w) for a random similarity transform plus smooth elastic warp.

    Scaling about the crop centre stands for small and large heads; the elastic part (a coarse
    random displacement grid, cubic-upsampled, up to about ``elastic_px`` pixels) bends anatomy
    and varies ventricle size and shape.
    """
    h, w = shape
    yy, xx = np.meshgrid(
        np.arange(h, dtype=np.float32) - (h - 1) / 2,
        np.arange(w, dtype=np.float32) - (w - 1) / 2,
        indexing="ij",
    )
    s = rng.uniform(*scale, size=2).astype(np.float32)  # per-axis: head shape changes too
    a = np.deg2rad(rng.uniform(-max_rotation_deg, max_rotation_deg))
    c, n = np.float32(np.cos(a)), np.float32(np.sin(a))
    src_y = (c * yy - n * xx) / s[0] + (h - 1) / 2
    src_x = (n * yy + c * xx) / s[1] + (w - 1) / 2
    if elastic_px > 0:
        for grid in (src_y, src_x):
            coarse = rng.normal(0.0, elastic_px / 2, size=(5, 5)).astype(np.float32)
            disp = ndimage.zoom(coarse, (h / 5, w / 5), order=3, mode="nearest", grid_mode=True)
            grid += disp[:h, :w]
    return np.stack([src_y, src_x])


def warp(data: np.ndarray, coords: FloatArray, *, labels: bool) -> np.ndarray:
    """Resample (h, w) or (C, h, w) ``data`` at ``coords`` (2, h, w).

    Images use linear interpolation (outside: 0); label maps nearest neighbour (outside: edge
    value), so labels keep their values.
    """
    order = 0 if labels else 1
    mode = "nearest" if labels else "constant"
    if data.ndim == 2:
        out = ndimage.map_coordinates(data, coords, order=order, mode=mode, cval=0.0)
        return np.asarray(out, dtype=data.dtype)
    return np.stack([warp(d, coords, labels=labels) for d in data])


# ----------------------------------------------------------- bright structures labelled background


def smooth_blobs(shape: tuple[int, int], grain_px: float, rng: np.random.Generator) -> FloatArray:
    """Smooth random field scaled to 0..1 with features about ``grain_px`` pixels across."""
    field = ndimage.gaussian_filter(rng.standard_normal(shape).astype(np.float32), grain_px)
    lo, hi = float(field.min()), float(field.max())
    return np.asarray((field - lo) / max(hi - lo, 1e-6), dtype=np.float32)


def bright_lookalikes(
    x: FloatArray,
    tissue: np.ndarray | None,
    lesion: np.ndarray,
    rng: np.random.Generator,
) -> FloatArray:
    """Add bright structures that are not lesions; the labels stay background.

    Bright cortical ribbon patches (grey matter), bright sulci (CSF outside the ventricles:
    incomplete fluid suppression) and small flow-like spots in fluid. Without tissue labels (lab
    cases) only spots are added, on dark pixels. ``lesion`` (h, w) bool: these pixels are never brightened.
    ``x`` is (C, h, w); the same pattern applies to every slice, with per-slice strength jitter.
    """
    shape = x.shape[1:]
    boost = np.zeros(shape, dtype=np.float32)
    centre_tissue = tissue[tissue.shape[0] // 2] if tissue is not None else None
    if centre_tissue is not None:
        if rng.random() < 0.6:  # bright cortical ribbon patches
            patches = np.clip(smooth_blobs(shape, 6.0, rng) - 0.55, 0.0, 1.0) / 0.45
            boost += (centre_tissue == GM) * patches * np.float32(rng.uniform(0.3, 0.9))
        if rng.random() < 0.5:  # bright sulci
            patches = np.clip(smooth_blobs(shape, 8.0, rng) - 0.5, 0.0, 1.0) / 0.5
            boost += (centre_tissue == CSF) * patches * np.float32(rng.uniform(0.5, 1.5))
    # Flow-like spots: small bright discs in fluid (CSF, ventricles; dark pixels when tissue is
    # unknown). Never in white matter, where a bright dot is what a punctate lesion looks like.
    if centre_tissue is not None:
        fluid = np.isin(centre_tissue, (CSF, VENTRICLE))
    else:
        fluid = x[x.shape[0] // 2] < 0.5
    candidates = np.argwhere(fluid & ~lesion)
    if candidates.size and rng.random() < 0.5:
        yy, xx = np.mgrid[: shape[0], : shape[1]]
        for _ in range(int(rng.integers(1, 6))):
            cy, cx = candidates[rng.integers(len(candidates))]
            r = rng.uniform(1.0, 3.0)
            spot = np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * r * r)).astype(np.float32)
            boost += spot * fluid * np.float32(rng.uniform(0.4, 1.5))
    boost[lesion] = 0.0
    jitter = np.asarray(rng.uniform(0.7, 1.0, size=x.shape[0]), dtype=np.float32)
    jitter[x.shape[0] // 2] = 1.0
    return np.asarray(x + boost[None] * jitter[:, None, None], dtype=np.float32)


# ---------------------------------------------------------------------------------- the pipeline


def randomise_intensities(
    x: FloatArray,
    tissue: np.ndarray | None,
    lesion: np.ndarray,
    rng: np.random.Generator,
) -> FloatArray:
    """The intensity part of training randomisation for one crop stack (labels untouched).

    Per-tissue remapping, unsuppressed fluid and faint lesions (when tissue labels are known),
    bright look-alikes, motion ghosts, a contrast curve or gamma, a bias field, blur, a global scale and noise,
    each with its own probability.
    """
    if tissue is not None and rng.random() < 0.8:
        x = remap_tissues(x, tissue, random_tissue_factors(rng))
    if tissue is not None and rng.random() < 0.25:
        ventricle_ratio = float(rng.uniform(0.25, 1.3))
        x = fluid_levels(x, tissue, ventricle_ratio * float(rng.uniform(0.8, 1.3)), ventricle_ratio)
    if tissue is not None and rng.random() < 0.3:
        x = fade_lesions(x, tissue, float(rng.uniform(1.08, 1.35)))
    if rng.random() < 0.5:
        x = bright_lookalikes(x, tissue, lesion, rng)
    if rng.random() < 0.2:
        n = int(rng.integers(1, 4))
        step = int(rng.integers(min(8, x.shape[1] // 4), max(9, x.shape[1] // 2)))
        x = motion_ghosts(
            x,
            tuple(step * (i + 1) * int(rng.choice((-1, 1))) for i in range(n)),
            tuple(float(rng.uniform(0.03, 0.2)) / (i + 1) for i in range(n)),
            axis=int(rng.integers(1, 3)),
        )
    r = rng.random()
    if r < 0.35:
        x = contrast_curve(x, rng)
    elif r < 0.7:
        x = gamma_curve(x, float(np.exp(rng.uniform(np.log(0.6), np.log(1.6)))))
    if rng.random() < 0.6:
        x = x * bias_field(x.shape[1:], float(rng.uniform(0.05, 0.35)), rng)[None]
    if rng.random() < 0.35:
        x = blur_inplane(x, (float(rng.uniform(0, 1.3)), float(rng.uniform(0, 1.3))))
    x = x * np.float32(rng.uniform(0.85, 1.15))
    if rng.random() < 0.6:
        x = rician_noise(x, float(np.exp(rng.uniform(np.log(0.01), np.log(0.12)))), rng)
    return np.ascontiguousarray(x, dtype=np.float32)
