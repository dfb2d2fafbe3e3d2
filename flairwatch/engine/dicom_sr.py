"""The DICOM measurement report of one result: a Comprehensive 3D SR following TID 1500.

:func:`build_report` takes the SEG made by :mod:`flairwatch.engine.dicom_seg`, the source
headers and the result's numbers, and returns a :class:`highdicom.sr.Comprehensive3DSR`
(PS3.3 A.35.13) whose content is an Imaging Measurement Report (PS3.16 TID 1500) with one
Volumetric ROI group (TID 1411) per SEG segment; each group references its segment. No file is
written here; :mod:`flairwatch.engine.outputs` writes ``measurements.dcm``.

Measurement names come from PS3.16 where it has a concept (SCT 118565006 "Volume",
SCT 246206008 "Number of lesions"); the WMH fraction of the intracranial volume and the
periventricular/deep volumes have no standard concept, so they use this program's private
coding scheme (:data:`PRIVATE_SCHEME`; PS3.3 section 8 keeps designators starting "99" for
private schemes). Units are UCUM (``ml``, ``%``, ``{lesions}``). Codes are listed in
docs/sources.md, "DICOM SEG and SR".
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import highdicom as hd
from pydicom.dataset import Dataset
from pydicom.sequence import Sequence as DicomSequence
from pydicom.sr.coding import Code
from pydicom.uid import generate_uid

from flairwatch.engine.dicom_seg import MANUFACTURER, SEGMENT_KINDS
from flairwatch.notice import BANNER

SR_FILE = "measurements.dcm"
SR_SERIES_DESCRIPTION = "WMH research measurements - not for diagnosis"
SR_SERIES_NUMBER = 9902
PRIVATE_SCHEME = "99FLAIRWATCH"

# PS3.16 CID 7021: DCM 126000 "Imaging Measurement Report"; CID 100: LN 25056-3
# "MRI unspecified body region"; CID 7181 / UCUM: ml, %, {lesions} (an annotation, unit 1)
REPORT_TITLE = Code("126000", "DCM", "Imaging Measurement Report")
PROCEDURE = Code("25056-3", "LN", "MRI unspecified body region")
VOLUME = Code("118565006", "SCT", "Volume")
LESION_COUNT = Code("246206008", "SCT", "Number of lesions")
WMH_FRACTION = Code("WMH-ICV-PCT", PRIVATE_SCHEME, "WMH fraction of intracranial volume")
PERIVENTRICULAR = Code("WMH-PV-VOL", PRIVATE_SCHEME, "Periventricular WMH volume")
DEEP = Code("WMH-DEEP-VOL", PRIVATE_SCHEME, "Deep WMH volume")
COMMENT = Code("121106", "DCM", "Comment")
MILLILITRE = Code("ml", "UCUM", "milliliter")
PERCENT = Code("%", "UCUM", "percent")
LESIONS = Code("{lesions}", "UCUM", "lesions")
RESEARCH_TEXT = (
    f"{BANNER}. Made automatically by flairwatch (open-source research software, not a medical "
    "device). Validate on your own scans; follow local rules for identifiable data."
)


@dataclass(frozen=True)
class Numbers:
    """The result's numbers the report carries (None where the model gives no such output)."""

    wmh_ml: float
    lesion_count: int
    intracranial_ml: float | None = None
    ventricles_ml: float | None = None
    periventricular_ml: float | None = None
    deep_ml: float | None = None


def _measure(
    name: Code, value: float, unit: Code, algorithm: hd.sr.AlgorithmIdentification
) -> hd.sr.Measurement:
    return hd.sr.Measurement(name=name, value=value, unit=unit, algorithm_id=algorithm)


def _group_measurements(
    output: str, numbers: Numbers, algorithm: hd.sr.AlgorithmIdentification
) -> list[hd.sr.Measurement]:
    """The measurements of one segment's group, volumes in mL (rounded as summary.json)."""
    out: list[hd.sr.Measurement] = []
    if output == "wmh":
        out.append(_measure(VOLUME, round(numbers.wmh_ml, 4), MILLILITRE, algorithm))
        out.append(_measure(LESION_COUNT, numbers.lesion_count, LESIONS, algorithm))
        if numbers.intracranial_ml:
            pct = 100.0 * numbers.wmh_ml / numbers.intracranial_ml
            out.append(_measure(WMH_FRACTION, round(pct, 4), PERCENT, algorithm))
        if numbers.periventricular_ml is not None and numbers.deep_ml is not None:
            pv = round(numbers.periventricular_ml, 4)
            out.append(_measure(PERIVENTRICULAR, pv, MILLILITRE, algorithm))
            out.append(_measure(DEEP, round(numbers.deep_ml, 4), MILLILITRE, algorithm))
    elif output == "intracranial" and numbers.intracranial_ml is not None:
        out.append(_measure(VOLUME, round(numbers.intracranial_ml, 2), MILLILITRE, algorithm))
    elif output == "ventricles" and numbers.ventricles_ml is not None:
        out.append(_measure(VOLUME, round(numbers.ventricles_ml, 2), MILLILITRE, algorithm))
    return out


def build_report(
    seg: hd.seg.Segmentation,
    headers: list[Dataset],
    numbers: Numbers,
    segments: Mapping[str, int],
    *,
    algorithm_name: str,
    algorithm_version: str,
    software_version: str,
) -> hd.sr.Comprehensive3DSR:
    """A TID 1500 measurement report over ``seg``'s segments.

    Parameters
    ----------
    seg : highdicom Segmentation
        The result's SEG; every measurement group references one of its segments.
    headers : list of pydicom Dataset
        The source images; the report names their series as each segment's source (TID 1411).
    numbers : Numbers
        Volumes in mL and the lesion count.
    segments : mapping of output name to segment number
        As :func:`flairwatch.engine.dicom_seg.segment_numbers` gives them.
    algorithm_name, algorithm_version
        The model (TID 4019 Algorithm Identification in every measurement).
    software_version
        This program's version.
    """
    algorithm = hd.sr.AlgorithmIdentification(name=algorithm_name, version=algorithm_version)
    device = hd.sr.DeviceObserverIdentifyingAttributes(
        uid=generate_uid(),
        name="flairwatch",
        manufacturer_name=MANUFACTURER,
        model_name=f"{algorithm_name} {algorithm_version}",
    )
    context = hd.sr.ObservationContext(
        observer_device_context=hd.sr.ObserverContext(
            observer_type=hd.sr.CodedConcept("121007", "DCM", "Device"),
            observer_identifying_attributes=device,
        )
    )
    # TID 1411 asks for the segment's source images or series; the series is one reference
    source_series = hd.sr.SourceSeriesForSegmentation(str(headers[0].SeriesInstanceUID))
    groups = []
    for kind in SEGMENT_KINDS:
        if kind.output not in segments:
            continue
        number = segments[kind.output]
        groups.append(
            hd.sr.VolumetricROIMeasurementsAndQualitativeEvaluations(
                tracking_identifier=hd.sr.TrackingIdentifier(
                    uid=generate_uid(), identifier=f"{kind.label} segment {number}"
                ),
                referenced_segment=hd.sr.ReferencedSegment(
                    sop_class_uid=seg.SOPClassUID,
                    sop_instance_uid=seg.SOPInstanceUID,
                    segment_number=number,
                    source_series=source_series,
                ),
                finding_type=kind.kind,
                algorithm_id=algorithm,
                measurements=_group_measurements(kind.output, numbers, algorithm),
            )
        )
    report = hd.sr.MeasurementReport(
        observation_context=context,
        procedure_reported=PROCEDURE,
        imaging_measurements=groups,
        title=REPORT_TITLE,
    )
    # the research-only notice as a text item of the document itself (TID 1500 is extensible)
    report[0].ContentSequence.append(
        hd.sr.TextContentItem(
            name=COMMENT,
            value=RESEARCH_TEXT,
            relationship_type=hd.sr.RelationshipTypeValues.CONTAINS,
        )
    )
    # the evidence is the SEG alone: PS3.3 C.17.2.3 asks the Current Requested Procedure
    # Evidence Sequence for the instances the content tree references, and the tree names the
    # source images only by their series (the SEG references them frame by frame); listing all
    # of them as well cost a fifth of the SEG and SR's writing time
    sr = hd.sr.Comprehensive3DSR(
        evidence=[seg],
        content=report[0],
        series_instance_uid=generate_uid(),
        series_number=SR_SERIES_NUMBER,
        sop_instance_uid=generate_uid(),
        instance_number=1,
        manufacturer=MANUFACTURER,
        is_complete=True,
        is_final=False,
        is_verified=False,
        series_description=SR_SERIES_DESCRIPTION,
    )
    sr.SoftwareVersions = software_version
    private = Dataset()
    private.CodingSchemeDesignator = PRIVATE_SCHEME
    private.CodingSchemeName = "flairwatch local codes"
    private.CodingSchemeResponsibleOrganization = "flairwatch project"
    sr.CodingSchemeIdentificationSequence = DicomSequence([private])  # type: ignore[assignment]
    return sr
