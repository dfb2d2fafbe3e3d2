"""The shift suite: synthetic FLAIR series built to differ from the training phantoms.

Evaluation only, never trained on (a test proves that no module under ``flairwatch/training``
imports this package). Its randomisation is its own: lesion shapes (:mod:`.lesions`), look-alikes
and the subject's anatomy changes (:mod:`.anatomy`), artefacts (:mod:`.artefacts`) and the
acquisition sampling (:mod:`.acquire`). From :mod:`flairwatch.phantom` it reuses only the ICBM152
template maps, the published tissue relaxation table and the DICOM writer.

Each named subset (:mod:`.recipes`) pushes one property beyond the training generator's ranges
(``flairwatch/phantom/params.py``) and keeps the rest inside them. :mod:`.build` writes one case
folder per series::

    <suite>/<case-id>/image/*.dcm                DICOM series
    <suite>/<case-id>/wmh_reference.nii.gz       uint8 0/1 WMH on the image grid
    <suite>/<case-id>/exclude_mask.nii.gz        uint8 0/1 voxels not scored (optional)
    <suite>/<case-id>/ventricles_reference.nii.gz uint8 0/1 lateral ventricles
    <suite>/<case-id>/intracranial_mask.nii.gz   uint8 0/1 intracranial space
    <suite>/<case-id>/case.json                  subset, acquisition facts, seed, suite version

Synthetic data for research and software testing only: not patients, not for diagnosis.
"""

from __future__ import annotations

SUITE_VERSION = "fw-shift-1.0"
