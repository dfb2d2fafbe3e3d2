"""The shift suite's named subsets and the reproducible draw of one series' recipe.

A :class:`Recipe` holds every number that makes one series; :func:`recipe` draws it from the
subset name and the series number alone (the seed derives from both), so the suite is the same
on every machine. Every subset starts from :func:`_base`, which stays inside the training
generator's ranges (``flairwatch/phantom/params.py``: 2D FLAIR TR 8000-11000 ms, TE 90-130 ms,
pixels 0.41-0.98 mm, slices 3-5 mm with gaps up to 1 mm, tilt -5 to 15 degrees; 3D FLAIR TR
4800-6500 ms, equivalent TE 135-165 ms, 1 mm isotropic, tilt +-8 degrees; TI within -9 % to +5 %
of the CSF null; bias log-SD <= 0.5; noise 2-7 % of WM; half-FOV ghost <= 4 %; head scale
0.84-0.97; ventricles grown <= 4.5 mm), then moves one property beyond them. Units: ms, mm,
degrees, mL, tesla.
"""

from __future__ import annotations

import math
import zlib
from dataclasses import dataclass, replace

import numpy as np

from flairwatch.phantom.physics import TISSUES
from flairwatch.shift import SUITE_VERSION

KINDS = ("2d_axial", "3d_sagittal")
SERIES_PER_SUBSET = 8
SEED_BASE = 710_000  # far from the phantom bank's seeds; only a label here

# name -> what it varies (printed in tables and the model card)
SUBSETS: dict[str, str] = {
    "timing": "TR/TE outside the trained ranges (2D TR 5500-7500 or 12000-14500 ms, TE 65-85 or "
    "140-165 ms; 3D TR 3600-4500 or 7000-8500 ms, TE 95-125 or 175-210 ms), 1.5 T and 3 T",
    "resolution": "in-plane pixels 0.40-0.45 or 1.05-1.20 mm",
    "thickness": "2D slices 1-2.5 or 5.5-6 mm, gaps 0 or 1.5-2.5 mm; 3D partitions 1.5-2 mm",
    "tilt": "slice stack tilted 17-25 degrees (either sign)",
    "bias": "strong bias field, log-SD 0.55-0.80",
    "noise": "low SNR: Rician noise 10-18 % of WM",
    "motion": "motion ghosting: 8-20 % of phase-encoding lines displaced 1.5-4 mm",
    "gibbs": "Gibbs ringing: k-space cut to 35-55 % with no window",
    "csf": "incomplete CSF suppression: TI 15-30 % short of the null, bright sulci",
    "flow": "flow artefacts: bright vessels and sinuses with pulsation ghosts",
    "bright_gm": "bright cortical ribbon and deep grey-matter patches (1.4-2.0 x GM)",
    "atrophy": "atrophy: ventricles grown 6-10 mm, cortex thinned 1.5-2.5 mm",
    "head_size": "small (scale 0.74-0.80) and large (1.00-1.06) heads",
    "faint": "faint lesions, 1.1-1.3 x the WM median",
    "punctate": "punctate lesions of 10-30 mm^3 only",
    "caps": "confluent periventricular caps and bands, 6-40 mL",
    "juxtacortical": "juxtacortical lesions touching the cortex",
    "elderly_free": "lesion-free elderly brains (atrophy, ependymal lining, no WMH)",
}


@dataclass(frozen=True)
class Acquisition:
    """How one series is scanned.

    ``kind`` "2d_axial" (oblique axial slices) or "3d_sagittal"; ``inplane_mm`` square pixels;
    ``slice_mm`` and ``gap_mm`` give the slice spacing; ``tilt_deg`` rotates the stack (about
    the left-right axis for axial, about the superior axis for sagittal); ``matrix`` is
    (rows, columns); ``phase_axis`` is "j" (phase encoding down the columns) or "i".
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
    phase_axis: str = "j"

    @property
    def spacing_mm(self) -> float:
        """Distance between slice centres in mm."""
        return self.slice_mm + self.gap_mm


@dataclass(frozen=True)
class Recipe:
    """Everything that defines one shift-suite series (units in the module docstring).

    Lesions: ``lesion_style`` "mixed", "faint", "punctate", "caps", "juxtacortical" or "none";
    ``lesion_ml`` the target load (the reference on the image grid decides the measured one);
    ``lesion_contrast`` the (low, high) FLAIR ratio to normal WM drawn per lesion.
    Anatomy: ``head_scale`` multiplies the template head, ``ventricle_grow_mm`` and
    ``cortex_thin_mm`` model atrophy, ``lining`` (0..1) a bright ependymal rim.
    Look-alikes: ``ribbon`` and ``deep_gm`` brighten cortical and deep grey-matter patches by
    that fraction; ``sulcal_csf`` adds CSF signal in sulci; ``flow`` (0..1) vessel brightness.
    Artefacts: ``bias_log_sd``, ``noise`` (sigma / WM level), ``motion_fraction`` and
    ``motion_mm``, ``kspace_keep`` (1 = no truncation), ``ti_error`` (fraction of the null TI).
    """

    case_id: str
    subset: str
    seed: int
    acquisition: Acquisition
    head_scale: float
    head_rotation_deg: tuple[float, float, float]
    head_shift_mm: tuple[float, float, float]
    ventricle_grow_mm: float
    cortex_thin_mm: float
    lining: float
    lesion_style: str
    lesion_ml: float
    lesion_contrast: tuple[float, float]
    ribbon: float
    deep_gm: float
    sulcal_csf: float
    flow: float
    bias_log_sd: float
    noise: float
    motion_fraction: float
    motion_mm: float
    kspace_keep: float
    ti_error: float
    relaxation_scale: tuple[float, float]
    signal_wm: float
    suite_version: str = SUITE_VERSION


def seed_of(subset: str, index: int) -> int:
    """Seed of series ``index`` of ``subset`` (stable: the subset's position never matters)."""
    return SEED_BASE + (zlib.crc32(subset.encode()) % 9000) * 10 + index


def csf_null_ti_ms(field_strength_t: float, tr_ms: float) -> float:
    """TI nulling CSF after an inversion, TI = T1 ln(2 / (1 + exp(-TR/T1))) (standard IR physics)."""
    t1 = TISSUES[1.5 if field_strength_t < 2.25 else 3.0]["csf"].t1_ms
    return t1 * math.log(2.0 / (1.0 + math.exp(-tr_ms / t1)))


def _acquisition(rng: np.random.Generator, kind: str, field: float) -> Acquisition:
    """An acquisition inside the trained ranges (kept small: the suite runs on 2 cores)."""
    if kind == "2d_axial":
        tr, te = rng.uniform(8200.0, 10800.0), rng.uniform(92.0, 128.0)
        rows = int(rng.choice([256, 288]))
        inplane = rng.uniform(225.0, 240.0) / rows
        thickness = float(rng.choice([3.0, 4.0, 5.0]))
        gap = float(rng.choice([0.0, 0.5, 1.0]))
        n = math.ceil(150.0 / (thickness + gap))
        tilt = rng.uniform(-4.0, 14.0)
        return Acquisition(kind, field, tr, te, 0.0, inplane, thickness, gap, tilt, (rows, rows), n)
    tr, te = rng.uniform(4900.0, 6400.0), rng.uniform(137.0, 163.0)
    tilt = rng.uniform(-7.0, 7.0)
    return Acquisition(kind, field, tr, te, 0.0, 1.0, 1.0, 0.0, tilt, (224, 224), 160)


def _base(subset: str, index: int) -> tuple[Recipe, np.random.Generator]:
    seed = seed_of(subset, index)
    rng = np.random.default_rng(seed)
    kind = KINDS[index % 2]
    field = (1.5, 3.0)[index // 2 % 2]
    acq = _acquisition(rng, kind, field)
    base = Recipe(
        case_id=f"{subset}-{index:02d}",
        subset=subset,
        seed=seed,
        acquisition=acq,
        head_scale=float(rng.uniform(0.85, 0.96)),
        head_rotation_deg=tuple(float(x) for x in rng.uniform(-6.0, 6.0, 3)),  # type: ignore[arg-type]
        head_shift_mm=tuple(float(x) for x in rng.uniform(-6.0, 6.0, 3)),  # type: ignore[arg-type]
        ventricle_grow_mm=float(rng.uniform(0.0, 3.0)),
        cortex_thin_mm=float(rng.uniform(0.0, 1.0)),
        lining=float(rng.uniform(0.0, 0.5)),
        lesion_style="mixed",
        lesion_ml=float(math.exp(rng.uniform(math.log(1.5), math.log(25.0)))),
        lesion_contrast=(1.55, 2.6),
        ribbon=0.0,
        deep_gm=0.0,
        sulcal_csf=0.0,
        flow=0.0,
        bias_log_sd=float(rng.uniform(0.05, 0.25)),
        noise=float(rng.uniform(0.025, 0.06)),
        motion_fraction=0.0,
        motion_mm=0.0,
        kspace_keep=1.0,
        ti_error=float(rng.uniform(-0.03, 0.03)),
        relaxation_scale=(float(rng.uniform(0.96, 1.04)), float(rng.uniform(0.96, 1.04))),
        signal_wm=float(rng.uniform(280.0, 520.0)),
    )
    return base, np.random.default_rng([seed, 1])


def _either(rng: np.random.Generator, low: tuple[float, float], high: tuple[float, float]) -> float:
    lo, hi = low if rng.random() < 0.5 else high
    return float(rng.uniform(lo, hi))


def _vary(r: Recipe, rng: np.random.Generator, index: int) -> Recipe:
    a = r.acquisition
    two_d = a.kind == "2d_axial"
    low_half = index // 2 % 2 == 0  # alternate the two sides of a range over the series
    match r.subset:
        case "timing":
            if two_d:
                tr = rng.uniform(5500.0, 7500.0) if low_half else rng.uniform(12000.0, 14500.0)
                te = _either(rng, (65.0, 85.0), (140.0, 165.0))
            else:
                tr = rng.uniform(3600.0, 4500.0) if low_half else rng.uniform(7000.0, 8500.0)
                te = _either(rng, (95.0, 125.0), (175.0, 210.0))
            return replace(r, acquisition=replace(a, tr_ms=tr, te_ms=te))
        case "resolution":
            px = rng.uniform(0.40, 0.45) if low_half else rng.uniform(1.05, 1.20)
            fov = a.matrix[0] * a.inplane_mm
            rows = int(round(fov / px / 2) * 2)
            n = a.n_slices if two_d else 150
            return replace(
                r, acquisition=replace(a, inplane_mm=fov / rows, matrix=(rows, rows), n_slices=n)
            )
        case "thickness":
            if two_d:
                t = rng.uniform(1.0, 2.5) if low_half else rng.uniform(5.5, 6.0)
                gap = 0.0 if index % 4 < 2 else rng.uniform(1.5, 2.5)
                n = math.ceil(150.0 / (t + gap))
            else:
                t, gap = rng.uniform(1.5, 2.0), 0.0
                n = math.ceil(160.0 / t)
            return replace(r, acquisition=replace(a, slice_mm=t, gap_mm=gap, n_slices=n))
        case "tilt":
            sign = 1.0 if low_half else -1.0
            return replace(r, acquisition=replace(a, tilt_deg=sign * rng.uniform(17.0, 25.0)))
        case "bias":
            return replace(r, bias_log_sd=float(rng.uniform(0.55, 0.80)))
        case "noise":
            return replace(r, noise=float(rng.uniform(0.10, 0.18)))
        case "motion":
            return replace(
                r,
                motion_fraction=float(rng.uniform(0.08, 0.2)),
                motion_mm=float(rng.uniform(1.5, 4.0)),
            )
        case "gibbs":
            return replace(r, kspace_keep=float(rng.uniform(0.35, 0.55)), noise=min(r.noise, 0.03))
        case "csf":
            return replace(
                r, ti_error=-float(rng.uniform(0.15, 0.30)), sulcal_csf=float(rng.uniform(0.3, 0.8))
            )
        case "flow":
            return replace(r, flow=float(rng.uniform(0.6, 1.0)))
        case "bright_gm":
            return replace(
                r, ribbon=float(rng.uniform(0.4, 1.0)), deep_gm=float(rng.uniform(0.4, 1.0))
            )
        case "atrophy":
            return replace(
                r,
                ventricle_grow_mm=float(rng.uniform(6.0, 10.0)),
                cortex_thin_mm=float(rng.uniform(1.5, 2.5)),
            )
        case "head_size":
            scale = rng.uniform(0.74, 0.80) if low_half else rng.uniform(1.00, 1.06)
            return replace(r, head_scale=float(scale))
        case "faint":
            return replace(
                r,
                lesion_style="faint",
                lesion_contrast=(1.15, 1.25),
                lesion_ml=float(rng.uniform(2.0, 15.0)),
                bias_log_sd=min(r.bias_log_sd, 0.12),
            )
        case "punctate":
            thin = replace(a, slice_mm=3.0, gap_mm=0.0, n_slices=50) if two_d else a
            return replace(
                r, acquisition=thin, lesion_style="punctate", lesion_ml=float(rng.uniform(0.4, 0.9))
            )
        case "caps":
            return replace(r, lesion_style="caps", lesion_ml=float(rng.uniform(6.0, 40.0)))
        case "juxtacortical":
            return replace(r, lesion_style="juxtacortical", lesion_ml=float(rng.uniform(1.5, 10.0)))
        case "elderly_free":
            return replace(
                r,
                lesion_style="none",
                lesion_ml=0.0,
                ventricle_grow_mm=float(rng.uniform(3.0, 6.0)),
                cortex_thin_mm=float(rng.uniform(1.0, 2.0)),
                lining=float(rng.uniform(0.5, 1.0)),
            )
    raise ValueError(f"unknown subset {r.subset!r}; choose from {', '.join(SUBSETS)}")


def recipe(subset: str, index: int) -> Recipe:
    """The recipe of series ``index`` (0-based) of ``subset``, TI set from the CSF null."""
    if subset not in SUBSETS:
        raise ValueError(f"unknown subset {subset!r}; choose from {', '.join(SUBSETS)}")
    base, rng = _base(subset, index)
    r = _vary(base, rng, index)
    a = r.acquisition
    ti = csf_null_ti_ms(a.field_strength_t, a.tr_ms) * (1.0 + r.ti_error)
    rounded = replace(
        a,
        tr_ms=round(a.tr_ms, 1),
        te_ms=round(a.te_ms, 1),
        ti_ms=round(ti, 1),
        inplane_mm=round(a.inplane_mm, 4),
        slice_mm=round(a.slice_mm, 3),
        gap_mm=round(a.gap_mm, 3),
        tilt_deg=round(a.tilt_deg, 2),
    )
    return replace(r, acquisition=rounded)


def suite_recipes(
    subsets: tuple[str, ...] | None = None, n: int = SERIES_PER_SUBSET
) -> list[Recipe]:
    """Recipes of the first ``n`` series of each subset, in subset then series order."""
    names = tuple(SUBSETS) if subsets is None else subsets
    return [recipe(s, i) for s in names for i in range(n)]
