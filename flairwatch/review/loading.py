"""Reading what a series page shows: the image, the masks, the lesion table (the I/O edge).

**Where the image comes from.** A result folder holds masks, the probability map and the QC
picture, never the source image (the image may hold what the ``identifiers`` setting keeps out
of results). The viewer therefore reads the series' DICOM files from where the ledger recorded
them in the inbox (``files`` rows of the series revision, as ``qc cases`` does), only while each
is unchanged since it was scanned, and checks that they give the grid of the result's mask. When they are gone (``delete_inbox_files``, an archive
moved away) or give another grid, it shows the result's own WMH probability map instead, and
the page says so: outlines can still be judged against it, grey levels cannot.

Masks come from the result folder: ``wmh_mask.nii.gz``, the ventricle and intracranial masks
when the summary names them, and the series' latest corrected mask when there is one.

:class:`ViewCache` keeps the last few loaded series (a least-recently-used cache) so that
scrolling through slices never reads a file.
"""

from __future__ import annotations

import csv
import logging
import threading
from collections import OrderedDict
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from flairwatch.engine import results
from flairwatch.engine.outputs import LESIONS_FILE, MASK_FILE, PROBABILITY_FILE
from flairwatch.errors import FlairwatchError
from flairwatch.intake.load import load_nifti, load_series
from flairwatch.ledger.queries import ResultRecord
from flairwatch.ledger.store import Ledger
from flairwatch.records import FileRecord, Series, SeriesHeader
from flairwatch.research.qc_marks import AFFINE_TOLERANCE_MM
from flairwatch.review.viewer import SeriesView, make_view
from flairwatch.volume import Volume

log = logging.getLogger(__name__)

CACHE_SERIES = 4  # a 256 x 256 x 48 series with its masks takes about 16 MB
MAX_LESION_ROWS = 500
SOURCE_DICOM = "the series' DICOM files in the inbox"


def summary_of(rec: ResultRecord) -> dict[str, Any]:
    """The result's summary.json ({} while the folder is incomplete or unreadable)."""
    folder = Path(rec.result_path)
    try:
        return results.read_summary(folder) if results.is_complete(folder) else {}
    except (OSError, ValueError):
        return {}


def lesion_table(rec: ResultRecord, summary: dict[str, Any]) -> tuple[list[str], list[list[str]]]:
    """The result's lesion table (header, rows as text), at most :data:`MAX_LESION_ROWS` rows."""
    name = (summary.get("files") or {}).get("lesions", LESIONS_FILE)
    try:
        with open(Path(rec.result_path) / name, encoding="utf-8", newline="") as fh:
            reader = csv.reader(fh)
            header = next(reader, [])
            rows = [row for _, row in zip(range(MAX_LESION_ROWS), reader, strict=False)]
    except OSError:
        return [], []
    return header, rows


def recorded_series(ledger: Ledger, rec: ResultRecord) -> Series:
    """The series' files as the ledger recorded them (path, size, modification time, instance).

    No header is read again: :func:`flairwatch.intake.load.read_datasets` reads a file only
    while its size and modification time are still the recorded ones, so the image shown is
    the one that was processed. One file per instance (the first path), as intake keeps.
    """
    files: dict[str, FileRecord] = {}
    for f in ledger.revision_files(rec.series_id):
        if (
            f.reason
            or not f.sop_uid
            or (f.study_uid, f.series_uid) != (rec.study_uid, rec.series_uid)
        ):
            continue
        files.setdefault(f.sop_uid, FileRecord(Path(f.path), f.size, f.mtime_ns, f.sop_uid))
    if not files:
        raise FileNotFoundError("the ledger records no DICOM files for this series")
    return Series(SeriesHeader(rec.study_uid, rec.series_uid), tuple(files.values()))


def _same_grid(a: Volume, b: Volume) -> bool:
    if a.shape != b.shape:
        return False
    return float(np.max(np.abs(a.affine_lps - b.affine_lps))) <= AFFINE_TOLERANCE_MM


def load_view(ledger: Ledger, rec: ResultRecord) -> SeriesView:
    """Read one result's image and masks into a :class:`SeriesView` (see the module text)."""
    folder = Path(rec.result_path)
    files = summary_of(rec).get("files") or {}
    mask = load_nifti(folder / files.get("mask", MASK_FILE))
    layers: dict[str, np.ndarray] = {"wmh": mask.data}
    for layer in ("ventricles", "intracranial"):
        name = files.get(layer)
        if name and (folder / name).is_file():
            vol = load_nifti(folder / name)
            if _same_grid(vol, mask):
                layers[layer] = vol.data
    if rec.correction_path and Path(rec.correction_path).is_file():
        corrected = load_nifti(Path(rec.correction_path))
        if _same_grid(corrected, mask):
            layers["correction"] = corrected.data
    try:
        image = load_series(recorded_series(ledger, rec))
        if not _same_grid(image, mask):
            raise FlairwatchError("the DICOM files give another grid than the result's mask")
        source = SOURCE_DICOM
    except (FlairwatchError, OSError) as exc:
        log.info("series %s: showing the probability map: %s", rec.series_key, exc)
        image = load_nifti(folder / files.get("probability", PROBABILITY_FILE))
        source = (
            f"the source image could not be read ({exc}); showing the WMH probability map "
            "(0 to 1) instead"
        )
    return make_view(image.data, mask.affine_lps, layers, source)


class ViewCache:
    """The last :data:`CACHE_SERIES` loaded series, least recently used dropped first.

    Safe to share between the server's threads. A view is keyed by the result and its
    correction, so a new correction or a new model result is read afresh.
    """

    def __init__(self, size: int = CACHE_SERIES) -> None:
        self.size = size
        self._views: OrderedDict[tuple[int, str | None], SeriesView] = OrderedDict()
        self._loading: dict[tuple[int, str | None], threading.Event] = {}
        self._lock = threading.Lock()

    def get(self, rec: ResultRecord, load: Callable[[], SeriesView]) -> SeriesView:
        """The cached view of ``rec``, or ``load()``'s (read outside the lock), kept.

        While another thread loads the same series (a prefetch), this waits for it instead of
        reading the files a second time.
        """
        key = (rec.result_id, rec.correction_path)
        while True:
            with self._lock:
                view = self._views.get(key)
                if view is not None:
                    self._views.move_to_end(key)
                    return view
                busy = self._loading.get(key)
                if busy is None:
                    done = self._loading[key] = threading.Event()
                    break
            busy.wait()  # the other load finished (or failed: then this thread tries)
        try:
            view = load()
            with self._lock:
                self._views[key] = view
                self._views.move_to_end(key)
                while len(self._views) > self.size:
                    self._views.popitem(last=False)
            return view
        finally:
            with self._lock:
                del self._loading[key]
            done.set()

    def prefetch(
        self, rec: ResultRecord, load: Callable[[], SeriesView]
    ) -> threading.Thread | None:
        """Load ``rec`` in a background thread unless it is cached or loading; errors are logged.

        The series page prefetches the next series of the queue, so that moving on shows it
        without waiting for its files.
        """
        key = (rec.result_id, rec.correction_path)
        with self._lock:
            if key in self._views or key in self._loading:
                return None

        def run() -> None:
            try:
                self.get(rec, load)
            except (FlairwatchError, OSError, ValueError) as exc:
                log.info("series %s not prefetched: %s", rec.series_key, exc)

        thread = threading.Thread(target=run, name=f"prefetch-{rec.series_key}", daemon=True)
        thread.start()
        return thread

    def __len__(self) -> int:
        return len(self._views)
