"""Helpers for the DICOM network tests: small MR instances, a Store SCP, result folders.

The instances start from ``MR_small.dcm``, the MR image pydicom ships in its test files
(64 x 64, 16-bit), given new UIDs and new pixel values. The Store SCP is pynetdicom's own (the
reference implementation of PS3.7/PS3.8 the tests check against), started on the loopback
address.
"""

from __future__ import annotations

import socket
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from pydicom import dcmread
from pydicom.data import get_testdata_file
from pydicom.dataset import Dataset
from pydicom.uid import generate_uid
from pynetdicom import AE, AllStoragePresentationContexts, evt

from flairwatch.ledger.store import Ledger


def mr_slices(n: int, *, rows: int = 64, cols: int = 64, seed: int = 0) -> list[Dataset]:
    """``n`` slices of one new MR series built from pydicom's ``MR_small.dcm``."""
    path = get_testdata_file("MR_small.dcm")
    assert path is not None
    rng = np.random.default_rng(seed)
    study, series = generate_uid(), generate_uid()
    out: list[Dataset] = []
    for i in range(n):
        ds = dcmread(path)
        ds.StudyInstanceUID, ds.SeriesInstanceUID = study, series
        ds.SOPInstanceUID = ds.file_meta.MediaStorageSOPInstanceUID = generate_uid()
        ds.InstanceNumber = i + 1
        ds.ImagePositionPatient = [-83.9063, -91.2, 6.6406 + 0.8 * i]
        ds.Rows, ds.Columns = rows, cols
        ds.PixelData = rng.integers(0, 4000, (rows, cols), dtype=np.uint16).tobytes()
        out.append(ds)
    return out


def free_port() -> int:
    """A TCP port nothing listens on now (bound and released; the OS does not reuse it at once)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class StoreNode:
    """A pynetdicom Store SCP on 127.0.0.1 that keeps what it received (SOP UID -> pixel bytes)."""

    ae_title: str = "TESTNODE"
    port: int = 0
    delay_s: float = 0.0  # per C-STORE: makes a transfer last long enough to interrupt
    received: dict[str, bytes] = field(default_factory=dict)
    counts: dict[str, int] = field(default_factory=dict)
    lock: threading.Lock = field(default_factory=threading.Lock)
    server: Any = None

    def _store(self, event: Any) -> int:
        ds = event.dataset
        if self.delay_s:
            time.sleep(self.delay_s)
        with self.lock:
            uid = str(ds.SOPInstanceUID)
            self.received[uid] = bytes(ds.PixelData)
            self.counts[uid] = self.counts.get(uid, 0) + 1
        return 0x0000

    def start(self) -> StoreNode:
        ae = AE(ae_title=self.ae_title)
        ae.supported_contexts = AllStoragePresentationContexts
        handlers: list[Any] = [(evt.EVT_C_STORE, self._store)]
        self.server = ae.start_server(("127.0.0.1", self.port), block=False, evt_handlers=handlers)
        self.port = int(self.server.server_address[1])
        return self

    def stop(self) -> None:
        if self.server is not None:
            self.server.shutdown()
            self.server = None

    def __enter__(self) -> StoreNode:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


def add_result(ledger: Ledger, folder: Path, now: float, *, current: int = 1) -> dict[str, str]:
    """A landed result: a ``results`` row and a folder with ``segmentation.dcm`` and
    ``measurements.dcm`` (stand-ins: MR instances); returns object -> SOP Instance UID."""
    folder.mkdir(parents=True)
    uids = {}
    for obj, ds in zip(
        ("segmentation", "measurements"),
        mr_slices(2, seed=abs(hash(str(folder))) % 2**31),
        strict=True,
    ):
        ds.save_as(folder / f"{obj}.dcm", enforce_file_format=True)
        uids[obj] = str(ds.SOPInstanceUID)
    with ledger.transaction() as db:
        series_id = db.execute(
            "INSERT INTO series (study_uid, series_uid, revision, first_seen, last_seen)"
            " VALUES (?, ?, 1, ?, ?)",
            (generate_uid(), generate_uid(), now, now),
        ).lastrowid
        db.execute(
            "INSERT INTO results (series_id, model_name, model_version, result_path, current,"
            " created) VALUES (?, 'tiny', '1.0.0', ?, ?, ?)",
            (series_id, str(folder), current, now),
        )
    return uids


def wait_for(condition: Any, timeout_s: float, step_s: float = 0.02) -> bool:
    """Poll ``condition()`` until it is true or ``timeout_s`` passed."""
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        if condition():
            return True
        time.sleep(step_s)
    return bool(condition())


def iter_files(root: Path) -> Iterator[Path]:
    yield from (p for p in sorted(root.rglob("*")) if p.is_file())
