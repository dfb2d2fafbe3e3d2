"""Receive scans over the network: a DICOM Store SCP that writes each instance into the inbox.

The daemon then treats a received instance like any file that arrives in the inbox. Rules:

- **Atomic arrival.** pynetdicom writes the incoming data set straight to a file (its chunked
  receive mode, so a 2 GiB instance never sits in memory) inside the inbox's hidden folder
  ``.receiving/`` (the watcher skips dot-folders). Only a complete instance is fsynced and
  renamed to ``<study-key>/<series-key>/<instance-key>.dcm``; keys are hashes of the UIDs
  (:mod:`flairwatch.keys`), never header text. A connection dropped mid-transfer leaves only a
  file in ``.receiving/``, removed when the association ends and at every start.
- **Who may send.** Only calling AE titles in ``receive.allow``, and only to our own AE title:
  others are rejected at association with A-ASSOCIATE-RJ, rejected-permanent, source "DICOM UL
  service-user", reason 3 "calling AE title not recognized" (7 for the called AE title),
  PS3.8 9.3.4. Beyond ``max_associations`` at once: rejected-transient, source "DICOM UL
  service-provider (presentation related)", reason 2 "local-limit-exceeded".
- **Size.** An instance over ``max_instance_mb`` is refused with C-STORE status 0xA700
  "Refused: Out of Resources" (PS3.4 Annex B.2.3) and never reaches the inbox; one without
  its Study, Series and SOP Instance UIDs with 0xC000 "Error: Cannot understand".
- **One log line per association**: calling AE title, peer address, instances stored and
  refused, bytes, how it ended.

Identical re-sends are accepted without touching the stored file; a changed instance with the
same SOP Instance UID replaces it (the daemon sees a changed file and makes a new revision).
"""

from __future__ import annotations

import filecmp
import logging
import os
import shutil
import tempfile
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pydicom import uid

from flairwatch.config import ReceiveSettings
from flairwatch.engine.results import fsync_path
from flairwatch.keys import uid_key

if TYPE_CHECKING:
    from pynetdicom.transport import ThreadedAssociationServer

log = logging.getLogger(__name__)

RECEIVING = ".receiving"  # inside the inbox: hidden, so the watcher never takes a half file
# what an MR scanner or archive sends of an MR study (PS3.4 Annex B.5, standard SOP classes)
STORAGE_CLASSES: tuple[str, ...] = (
    uid.MRImageStorage,
    uid.EnhancedMRImageStorage,
    uid.EnhancedMRColorImageStorage,
    uid.LegacyConvertedEnhancedMRImageStorage,
    uid.SecondaryCaptureImageStorage,
    uid.MultiFrameGrayscaleByteSecondaryCaptureImageStorage,
    uid.MultiFrameGrayscaleWordSecondaryCaptureImageStorage,
)
# the transfer syntaxes the inbox reader decodes (uncompressed, and the codecs that ship)
TRANSFER_SYNTAXES: tuple[str, ...] = (
    uid.ExplicitVRLittleEndian,
    uid.ImplicitVRLittleEndian,
    uid.DeflatedExplicitVRLittleEndian,
    uid.ExplicitVRBigEndian,
    uid.JPEGBaseline8Bit,
    uid.JPEGExtended12Bit,
    uid.JPEGLossless,
    uid.JPEGLosslessSV1,
    uid.JPEGLSLossless,
    uid.JPEGLSNearLossless,
    uid.JPEG2000Lossless,
    uid.JPEG2000,
    uid.RLELossless,
)
VERIFICATION = "1.2.840.10008.1.1"  # C-ECHO, so staff can test the connection (PS3.4 A)
SUCCESS, OUT_OF_RESOURCES, CANNOT_UNDERSTAND = 0x0000, 0xA700, 0xC000


def inbox_name(study_uid: str, series_uid: str, sop_uid: str) -> Path:
    """Where an instance goes below the inbox: hashed keys, never header text (pure)."""
    return Path(uid_key(study_uid, "t"), uid_key(series_uid, "e"), uid_key(sop_uid, "i") + ".dcm")


def _make_dirs(root: Path, rel: Path) -> Path:
    """Create ``root/rel`` folder by folder, fsyncing each parent that gained an entry."""
    here = root
    for part in rel.parts:
        nxt = here / part
        try:
            nxt.mkdir(mode=0o750)
            fsync_path(here)
        except FileExistsError:
            pass
        here = nxt
    return here


def deliver(received: Path, inbox: Path, rel: Path) -> bool:
    """Move a complete received file to ``inbox/rel`` atomically; False when an identical copy
    is there already (nothing changes). fsync the file, rename, fsync the folder."""
    target = inbox / rel
    if target.is_file() and filecmp.cmp(received, target, shallow=False):
        return False
    fsync_path(received)
    folder = _make_dirs(inbox, rel.parent)
    os.replace(received, target)
    fsync_path(folder)
    return True


def sweep(folder: Path) -> int:
    """Remove what a dropped connection or a crash left in the receiving folder."""
    removed = 0
    for entry in folder.iterdir() if folder.is_dir() else ():
        if entry.is_dir() and not entry.is_symlink():
            shutil.rmtree(entry, ignore_errors=True)
        else:
            entry.unlink(missing_ok=True)
        removed += 1
    return removed


@dataclass
class _Tally:
    calling: str
    peer: str
    stored: int = 0
    refused: int = 0
    bytes: int = 0


class Receiver:
    """The Store SCP of ``flairwatch receive``: :meth:`start` listens, :meth:`stop` ends.

    pynetdicom's chunked receive is a module setting and its temporary files go to
    :func:`tempfile.gettempdir`, so the receiver sets both for its process while it runs (and
    restores them on stop): run one receiver per process.
    """

    def __init__(self, settings: ReceiveSettings, inbox: Path) -> None:
        self.settings = settings
        self.inbox = inbox
        self.receiving = inbox / RECEIVING
        self.limit_bytes = settings.max_instance_mb * 1024 * 1024
        self._tallies: dict[int, _Tally] = {}
        self._lock = threading.Lock()
        self._server: ThreadedAssociationServer | None = None
        self._old: tuple[bool, str | None] = (False, None)  # pynetdicom's setting, temp folder

    @property
    def port(self) -> int:
        assert self._server is not None
        return int(self._server.server_address[1])

    def start(self) -> None:
        from pynetdicom import AE, _config, evt

        self.inbox.mkdir(parents=True, exist_ok=True)
        self.receiving.mkdir(mode=0o750, exist_ok=True)
        if n := sweep(self.receiving):
            log.info("removed %d incomplete file(s) left in %s", n, self.receiving)
        self._old = (_config.STORE_RECV_CHUNKED_DATASET, tempfile.tempdir)
        _config.STORE_RECV_CHUNKED_DATASET, tempfile.tempdir = True, str(self.receiving)
        s = self.settings
        ae = AE(ae_title=s.ae_title)
        ae.require_calling_aet = list(s.allow)
        ae.require_called_aet = True
        ae.maximum_associations = s.max_associations
        for sop_class in STORAGE_CLASSES:
            ae.add_supported_context(sop_class, list(TRANSFER_SYNTAXES))
        ae.add_supported_context(VERIFICATION)
        handlers: list[Any] = [
            (evt.EVT_ACCEPTED, self._accepted),
            (evt.EVT_REJECTED, self._rejected),
            (evt.EVT_C_STORE, self._store),
            (evt.EVT_RELEASED, self._ended),
            (evt.EVT_ABORTED, self._ended),
            (evt.EVT_CONN_CLOSE, self._ended),
        ]
        self._server = ae.start_server((s.address, s.port), block=False, evt_handlers=handlers)
        log.info("receiving as %s on %s:%d from %s (at most %d associations, %d MiB each)",
                 s.ae_title, s.address, self.port, ", ".join(s.allow), s.max_associations,
                 s.max_instance_mb)  # fmt: skip

    def stop(self) -> None:
        from pynetdicom import _config

        if self._server is not None:
            self._server.shutdown()
            self._server = None
            _config.STORE_RECV_CHUNKED_DATASET, tempfile.tempdir = self._old
            sweep(self.receiving)

    def _accepted(self, event: Any) -> None:
        req = event.assoc.requestor
        with self._lock:
            self._tallies[id(event.assoc)] = _Tally(req.ae_title, f"{req.address}:{req.port}")

    def _rejected(self, event: Any) -> None:
        req = event.assoc.requestor
        if req.ae_title not in self.settings.allow:
            why = "calling AE title not on receive.allow"
        elif event.assoc.acceptor.ae_title != req.primitive.called_ae_title:
            why = f"called AE title {req.primitive.called_ae_title!r} is not ours"
        else:
            why = f"{self.settings.max_associations} associations at once already"
        log.warning("rejected association from %r at %s:%s: %s", req.ae_title, req.address,
                    req.port, why)  # fmt: skip

    def _store(self, event: Any) -> int:
        from pydicom import dcmread
        from pydicom.errors import InvalidDicomError

        path = Path(event.dataset_path)
        with self._lock:
            tally = self._tallies.get(id(event.assoc)) or _Tally("?", "?")
        size = path.stat().st_size
        if size > self.limit_bytes:
            tally.refused += 1
            log.warning("refused an instance of %d MiB from %s: over receive.max_instance_mb",
                        size >> 20, tally.calling)  # fmt: skip
            return OUT_OF_RESOURCES
        try:
            ds = dcmread(path, stop_before_pixels=True)
            uids = [str(ds.get(k, "")) for k in ("StudyInstanceUID", "SeriesInstanceUID")]
            uids.append(str(ds.get("SOPInstanceUID", "")))
        except (InvalidDicomError, ValueError, OSError, EOFError) as exc:
            uids = [""]
            log.warning("refused an unreadable instance from %s: %s", tally.calling, exc)
        if not all(uids):
            tally.refused += 1
            return CANNOT_UNDERSTAND
        try:
            deliver(path, self.inbox, inbox_name(*uids))
        except OSError as exc:  # disk full, permissions: the sender may try again later
            tally.refused += 1
            log.error("cannot write a received instance into %s: %s", self.inbox, exc)
            return OUT_OF_RESOURCES
        tally.stored += 1
        tally.bytes += size
        return SUCCESS

    def _ended(self, event: Any) -> None:
        """Release, abort or closed connection: drop a half-received file, log the tally once."""
        message = getattr(getattr(event.assoc, "dimse", None), "message", None)
        partial = getattr(message, "_data_set_file", None)
        if partial is not None:  # pynetdicom's file of a C-STORE cut off mid-transfer
            partial.close()
            Path(partial.name).unlink(missing_ok=True)
        with self._lock:
            tally = self._tallies.pop(id(event.assoc), None)
        if tally is not None:
            how = {"EVT_RELEASED": "released", "EVT_ABORTED": "aborted"}.get(
                event.event.name, "connection closed"
            )
            log.info("association from %r at %s %s: %d instance(s) stored, %d refused, %d bytes",
                     tally.calling, tally.peer, how, tally.stored, tally.refused,
                     tally.bytes)  # fmt: skip
