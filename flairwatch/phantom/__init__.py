"""Synthetic FLAIR phantoms with known WMH masks, for training and testing (research use only).

Anatomy comes from the ICBM152 2009 template bundled with nilearn (see NOTICE-ICBM152.txt);
contrast from the inversion-recovery signal equation with published tissue relaxation times.
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
