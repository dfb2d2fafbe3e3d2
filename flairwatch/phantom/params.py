"""Parameters of one phantom and their reproducible random draw.

Everything that makes one phantom differ from another is either a field here or drawn from a
random stream keyed by ``PhantomParams.seed``; the same parameters always give the same arrays.
Units: ms for sequence timing, mm for lengths, mL for volumes, tesla for field strength.
"""

from __future__ import annotations

import math
import zlib
from dataclasses import dataclass, field

import numpy as np

from flairwatch.phantom.physics import null_ti_ms, tissue_table

# Bump when anything changes what a given PhantomParams renders to. 1.1 is frozen: the shipped
# model is trained on it; held-out seeds are in bank.HELD_OUT_SEEDS.
GENERATOR_VERSION = "fw-phantom-1.1"

KINDS = ("2d_axial", "3d_sagittal")
FIELD_STRENGTHS = (1.5, 3.0)


def rng_for(seed: int, stream: str) -> np.random.Generator:
    """Independent, reproducible random stream for one part of one phantom."""
    return np.random.default_rng(np.random.SeedSequence([int(seed), zlib.crc32(stream.encode())]))


@dataclass(frozen=True)
class AcquisitionParams:
    """How the phantom is scanned.

    Parameters
    ----------
    kind : str
        ``"2d_axial"`` (thick oblique axial slices) or ``"3d_sagittal"`` (1 mm isotropic).
    field_strength_t : float
        1.5 or 3.0 tesla (selects the tissue table).
    tr_ms, te_ms, ti_ms : float
        Repetition, echo and inversion times in ms. For 3D FLAIR ``te_ms`` is the equivalent
        single-echo T2 weighting, since the long echo train's effective TE overstates it.
    inplane_mm : float
        Pixel size in mm (square pixels).
    slice_mm, gap_mm : float
        Slice thickness and gap between slices in mm (spacing = thickness + gap).
    tilt_deg : float
        Rotation of the slice stack about the patient's left-right axis, degrees.
    matrix : (int, int)
        (rows, cols) of each image.
    n_slices : int
        Number of slices.
    """

    kind: str
    field_strength_t: float
    tr_ms: float
    te_ms: float
    ti_ms: float
    inplane_mm: float
    slice_mm: float
    gap_mm: float
    tilt_deg: float
    matrix: tuple[int, int]
    n_slices: int

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"kind must be one of {KINDS}, got {self.kind!r}")
        if self.inplane_mm <= 0 or self.slice_mm <= 0 or self.gap_mm < 0 or self.n_slices < 1:
            raise ValueError("pixel size and slice thickness must be > 0, gap >= 0")

    @property
    def slice_spacing_mm(self) -> float:
        """Distance between slice centres in mm."""
        return self.slice_mm + self.gap_mm


@dataclass(frozen=True)
class PhantomParams:
    """Everything that defines one phantom (see module docstring for units).

    ``lesion_brightness`` is a (low, high) severity range, 0 ~ 1.3x and 1 ~ 2-3x the WM signal
    on typical FLAIR. Look-alike strengths (``ventricle_lining``, ``inflow``,
    ``cortex_patches``) are 0 (off) .. 1 (strong). ``bias_strength`` is the standard deviation
    of the log bias field; ``noise_level`` the Gaussian sigma relative to the WM signal;
    ``signal_scale`` the WM level in stored pixel units. ``head_scale`` scales the template
    head (about 1.45 L intracranial at 0.89); ``head_aspect`` stretches its x, y, z axes.
    ``relaxation_jitter`` multiplies (WM T1, WM T2, GM T1, GM T2) of the tissue table.
    ``slice_jitter`` is the SD of per-slice gain (2D only); ``ghosting`` the amplitude of a
    half-FOV motion ghost along the phase-encoding (row) axis, relative to the image. ``template_mm`` 2 uses a 2 mm
    template (fast, for tests).
    """

    seed: int
    lesion_load_ml: float
    atrophy: float
    head_scale: float
    head_rotation_deg: tuple[float, float, float]
    head_aspect: tuple[float, float, float]
    deformation_mm: float
    skull_mm: float
    fat_mm: float
    periventricular: float
    lesion_brightness: tuple[float, float]
    ventricle_lining: float
    inflow: float
    cortex_patches: float
    bias_strength: float
    noise_level: float
    signal_scale: float
    relaxation_jitter: tuple[float, float, float, float]
    slice_jitter: float
    ghosting: float
    acquisition: AcquisitionParams
    template_mm: int = 1
    generator_version: str = field(default=GENERATOR_VERSION)


def _draw_jitter(rng: np.random.Generator) -> tuple[float, float, float, float]:
    """(WM T1, WM T2, GM T1, GM T2) multipliers: a shared T1 and T2 factor (+-6 %) times a
    small per-tissue one (+-2 %), which keeps the FLAIR contrast order (tests check it)."""
    c1, c2 = rng.uniform(0.94, 1.06, 2)
    e = rng.uniform(0.98, 1.02, 4)
    return (
        round(float(c1 * e[0]), 4),
        round(float(c2 * e[1]), 4),
        round(float(c1 * e[2]), 4),
        round(float(c2 * e[3]), 4),
    )


def _draw_acquisition(
    rng: np.random.Generator, kind: str, field_strength_t: float
) -> AcquisitionParams:
    csf_t1 = tissue_table(field_strength_t)["csf"].t1_ms
    # Most scans null CSF well; some are set slightly off (incomplete nulling, bright-ish CSF).
    ti_error = rng.uniform(-0.09, 0.05) if rng.random() < 0.35 else rng.normal(0.0, 0.01)
    if kind == "2d_axial":
        tr = rng.uniform(8000.0, 11000.0)  # common practice for 2D FLAIR
        te = rng.uniform(90.0, 130.0)
        rows = int(rng.choice([256, 320, 384, 448, 512]))
        fov = rng.uniform(210.0, 250.0)
        inplane = fov / rows
        cols = int(round(rows * float(rng.choice([1.0, 0.875, 0.8125])) / 2) * 2)
        thickness = float(rng.choice([3.0, 3.5, 4.0, 4.5, 5.0]))
        gap = float(rng.choice([0.0, 0.0, 0.3, 0.5, 1.0, 0.2 * thickness]))
        coverage = rng.uniform(140.0, 165.0)
        n_slices = math.ceil(coverage / (thickness + gap))
        tilt = rng.uniform(-5.0, 15.0)
    else:
        tr = rng.uniform(4800.0, 6500.0)  # common practice for 3D FLAIR
        # Equivalent single-echo TE: the variable-flip-angle echo train's effective TE
        # (300-400 ms) overstates its T2 weighting (from memory).
        te = rng.uniform(135.0, 165.0)
        rows, cols = 240, 240
        inplane, thickness, gap = 1.0, 1.0, 0.0
        n_slices = int(rng.choice([160, 168, 176]))
        tilt = rng.uniform(-8.0, 8.0)
    ti = null_ti_ms(csf_t1, tr) * (1.0 + ti_error)
    return AcquisitionParams(
        kind=kind,
        field_strength_t=field_strength_t,
        tr_ms=round(tr, 1),
        te_ms=round(te, 1),
        ti_ms=round(ti, 1),
        inplane_mm=round(inplane, 4),
        slice_mm=thickness,
        gap_mm=gap,
        tilt_deg=round(tilt, 2),
        matrix=(rows, cols),
        n_slices=n_slices,
    )


def sample_params(
    seed: int,
    *,
    kind: str | None = None,
    field_strength_t: float | None = None,
    load_ml: float | None = None,
) -> PhantomParams:
    """Reproducible random phantom parameters covering the generator's whole range.

    Both kinds (60 % 2D axial), both field strengths, lesion loads 0..60 mL with many small
    ones (about 12 % lesion-free, the rest log-uniform 0.2..60 mL, so about half under 5 mL).
    Keyword arguments pin one property and leave the rest random.
    """
    rng = rng_for(seed, "params")
    # Draw every value even when pinned, so that pinning one keeps the others unchanged.
    drawn_kind = "2d_axial" if rng.random() < 0.6 else "3d_sagittal"
    drawn_field = float(rng.choice(FIELD_STRENGTHS))
    kind = drawn_kind if kind is None else kind
    field_strength_t = drawn_field if field_strength_t is None else float(field_strength_t)
    drawn_load = (
        0.0 if rng.random() < 0.12 else math.exp(rng.uniform(math.log(0.2), math.log(60.0)))
    )
    load = drawn_load if load_ml is None else float(load_ml)
    atrophy = float(np.clip(rng.beta(1.5, 2.5) + 0.25 * min(load / 30.0, 1.0), 0.0, 1.0))
    lo = rng.uniform(0.0, 0.45)
    hi = rng.uniform(min(lo + 0.2, 1.0), 1.0)
    strong_bias = rng.random() < 0.25
    return PhantomParams(
        seed=int(seed),
        lesion_load_ml=round(load, 3),
        atrophy=round(atrophy, 3),
        head_scale=round(rng.uniform(0.84, 0.97), 3),
        head_rotation_deg=tuple(round(float(x), 2) for x in np.clip(rng.normal(0, 3, 3), -8, 8)),  # type: ignore[arg-type]
        head_aspect=tuple(round(float(x), 3) for x in rng.uniform(0.95, 1.05, 3)),  # type: ignore[arg-type]
        deformation_mm=round(rng.uniform(1.5, 4.5), 2),
        skull_mm=round(rng.uniform(5.0, 8.5), 2),
        fat_mm=round(rng.uniform(2.5, 7.0), 2),
        periventricular=round(rng.uniform(0.2, 1.0), 3),
        lesion_brightness=(round(lo, 3), round(hi, 3)),
        ventricle_lining=round(rng.uniform(0.0, 1.0), 3) if rng.random() < 0.7 else 0.0,
        inflow=round(rng.uniform(0.0, 1.0), 3) if rng.random() < 0.5 else 0.0,
        cortex_patches=round(rng.uniform(0.0, 1.0), 3) if rng.random() < 0.5 else 0.0,
        bias_strength=round(rng.uniform(0.3, 0.5) if strong_bias else rng.uniform(0.05, 0.25), 3),
        noise_level=round(rng.uniform(0.02, 0.07), 4),
        signal_scale=round(rng.uniform(300.0, 700.0), 1),
        relaxation_jitter=_draw_jitter(rng),
        slice_jitter=round(rng.uniform(0.0, 0.03), 4),
        ghosting=round(rng.uniform(0.005, 0.04), 4) if rng.random() < 0.3 else 0.0,
        acquisition=_draw_acquisition(rng, kind, field_strength_t),
    )
