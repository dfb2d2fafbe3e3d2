"""Synthetic FLAIR phantoms with known WMH masks, for training and testing (research use only).

Anatomy comes from the ICBM152 2009 template bundled with nilearn (see NOTICE-ICBM152.txt);
contrast from the magnitude inversion-recovery signal equation with published tissue
relaxation times (``physics``). What varies from one phantom to the next (``PhantomParams``):

- anatomy: head size and aspect, pose, smooth random deformation, atrophy (larger ventricles,
  thinner cortex, wider sulci), skull and scalp-fat thickness, per-head relaxation jitter;
- lesions: 0-60 mL of periventricular caps and bands, deep punctate and patchy lesions,
  confluent at high burden, irregular borders, brightness from faint (~1.3x WM) to bright;
- look-alikes that are not WMH: thin bright ventricular lining and a faint halo, CSF inflow
  in the ventricles and basal cisterns, mildly bright cortex patches, incomplete CSF nulling
  (TI off the null), strong bias fields, bright scalp fat and diploe, motion ghosts;
- acquisition: 2D oblique axial (0.4-1 mm pixels, 3-5 mm slices, gaps, tilt up to 15 deg,
  slice profile) or 3D sagittal 1 mm, 1.5 or 3 T, Rician noise, slice-to-slice gain jitter.

Outputs: ``generate`` (arrays on the acquisition grid, no disk access except the cached
template read), ``write_case`` (DICOM series + NIfTI masks + case.json), ``make_bank``.
"""

from __future__ import annotations

from flairwatch.phantom.bank import HELD_OUT_SEEDS, make_bank
from flairwatch.phantom.casefolder import write_case
from flairwatch.phantom.dicom_writer import write_series
from flairwatch.phantom.generator import PhantomCase, generate, make_other_contrast
from flairwatch.phantom.params import (
    GENERATOR_VERSION,
    AcquisitionParams,
    PhantomParams,
    sample_params,
)

__all__ = [
    "GENERATOR_VERSION",
    "HELD_OUT_SEEDS",
    "AcquisitionParams",
    "PhantomCase",
    "PhantomParams",
    "generate",
    "make_bank",
    "make_other_contrast",
    "sample_params",
    "write_case",
    "write_series",
]
