"""Send result files to DICOM nodes from the ledger's outbox (C-STORE SCU, pynetdicom).

The sender is the only place where results leave the machine, and only to the nodes listed in
``send.nodes``. Each pass:

1. fills the outbox: a waiting row per (landed current result, node, object) for results created
   since the node first appeared in the config (:func:`node_since`, kept in the state folder's
   ``send-nodes.json``; a new node is not flooded with the archive);
2. per node with rows due, opens one association and C-STOREs each file, recording every
   response in the ledger before the next file goes: state changes only after the node's
   answer, so a crash or ``kill -9`` at any moment loses nothing (a row sent but not yet
   recorded is sent again; the node replaces the instance with the same SOP Instance UID);
3. a failure (node down, rejected, an error status) is tried again with exponential back-off
   (:mod:`flairwatch.network.plan`) and given up ``give_up_days`` after the row entered the
   outbox; a file the result folder lacks is given up at once (a landed folder never changes).

References: PS3.4 Annex B (Storage Service Class, C-STORE statuses in B.2.3), PS3.7 9.1.1
(C-STORE), PS3.8 (association establishment); pynetdicom as the implementation.
"""

from __future__ import annotations

import json
import logging
import threading
import time
from collections.abc import Callable, Generator, Iterator, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

from flairwatch.config import SendNode, SendSettings
from flairwatch.engine.results import write_atomic
from flairwatch.errors import ConfigInvalid, StageFailed
from flairwatch.ledger.store import Ledger, OutboxRow
from flairwatch.network.plan import Outcome, after_failure, status_text, store_outcome

if TYPE_CHECKING:
    from pydicom.dataset import Dataset

log = logging.getLogger(__name__)

# the files of a result folder that each object names (written by the engine's DICOM outputs)
OBJECT_FILES: dict[str, str] = {
    "segmentation": "segmentation.dcm",
    "measurements": "measurements.dcm",
}
NODES_FILE = "send-nodes.json"
DEFAULT_TIMEOUT_S = 30.0
DEFAULT_INTERVAL_S = 5.0
BATCH = 100  # rows per node and pass: one association each


def node_since(state_dir: Path, names: Sequence[str], now: float) -> dict[str, float]:
    """When each node first appeared in the config (seconds since the epoch).

    A node never seen before gets ``now``, written to ``state_dir/send-nodes.json`` atomically
    before anything is queued for it, so a restart keeps each node's starting point.
    """
    path = state_dir / NODES_FILE
    try:
        known = json.loads(path.read_text(encoding="utf-8")) if path.exists() else {}
        ok = isinstance(known, dict) and all(isinstance(v, int | float) for v in known.values())
    except (ValueError, UnicodeDecodeError):
        ok = False
    if not ok:
        raise ConfigInvalid(
            f"{path} is damaged; restore it from backup, or delete it (every node's outbox then "
            "starts from now)"
        )
    new = [n for n in names if n not in known]
    if new:
        known.update(dict.fromkeys(new, now))
        write_atomic(path, (json.dumps(known, indent=1, sort_keys=True) + "\n").encode("utf-8"))
        for n in new:
            log.info("node %s: results created from now on will be sent", n)
    return {n: float(known[n]) for n in names}


@dataclass(frozen=True)
class PassReport:
    """What one pass did: rows added to the outbox, sent, failed (to retry), given up."""

    added: int = 0
    sent: int = 0
    failed: int = 0
    given_up: int = 0


# (row, C-STORE status or None, error text when there was no answer)
Answer = tuple[OutboxRow, int | None, str | None]
Store = Callable[[SendNode, str, list[tuple[OutboxRow, "Dataset"]], float], Iterator[Answer]]


def c_store(
    node: SendNode, calling_ae: str, items: list[tuple[OutboxRow, Dataset]], timeout_s: float
) -> Generator[Answer, None, None]:
    """C-STORE each dataset to ``node`` over one association; yields each answer as it comes.

    The caller records an answer before asking for the next, so nothing is sent twice within a
    pass and nothing is marked sent before the node said so.
    """
    from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian
    from pynetdicom import AE, evt
    from pynetdicom.pdu import A_ASSOCIATE_RJ

    ae = AE(ae_title=calling_ae)
    ae.acse_timeout = ae.dimse_timeout = ae.network_timeout = timeout_s
    ae.connection_timeout = timeout_s
    contexts = {(str(ds.SOPClassUID), str(ds.file_meta.TransferSyntaxUID)) for _, ds in items}
    for sop_class, syntax in sorted(contexts):
        ae.add_requested_context(
            sop_class, list(dict.fromkeys([syntax, ExplicitVRLittleEndian, ImplicitVRLittleEndian]))
        )
    reasons: list[str] = []  # the node's A-ASSOCIATE-RJ reason (PS3.8 9.3.4), for the ledger

    def on_pdu(event: Any) -> None:
        if isinstance(event.pdu, A_ASSOCIATE_RJ):
            reasons.append(str(event.pdu.reason_str).lower())

    handlers: list[Any] = [(evt.EVT_PDU_RECV, on_pdu)]
    assoc = ae.associate(node.host, node.port, ae_title=node.ae_title, evt_handlers=handlers)
    if not assoc.is_established:
        where = f"node {node.ae_title} at {node.host}:{node.port}"
        if assoc.is_rejected:
            why = f"{where} rejected the association: {', '.join(reasons) or 'no reason given'}"
        else:  # pynetdicom reports a refused connection as an abort, too
            why = f"{where} could not be reached or aborted the association; is it running?"
        for row, _ds in items:
            yield row, None, why
        return
    try:
        for row, ds in items:
            if not assoc.is_established:
                yield row, None, "the association ended before this object was sent"
                continue
            try:
                answer = assoc.send_c_store(ds)
            except ValueError as exc:  # no accepted presentation context for this SOP class
                yield row, None, f"node {node.ae_title} does not take it: {exc}"
                continue
            status = int(answer.Status) if "Status" in answer else None
            yield row, status, None if status is not None else status_text(None)
    finally:
        if assoc.is_established:
            assoc.release()


def _read(path: str) -> tuple[Dataset | None, str, bool]:
    """The dataset of one result file, or (None, error, permanent)."""
    from pydicom import dcmread
    from pydicom.errors import InvalidDicomError

    try:
        return dcmread(path), "", False
    except FileNotFoundError:
        return None, f"{Path(path).name} is missing from the result folder", True
    except InvalidDicomError as exc:
        return None, f"{Path(path).name} is not a DICOM file: {exc}", True
    except OSError as exc:
        return None, f"cannot read {path}: {exc.strerror}", False


class Sender:
    """Works through the outbox of every configured node (one process, one thread)."""

    def __init__(
        self,
        ledger: Ledger,
        settings: SendSettings,
        since: dict[str, float],
        *,
        store: Store | None = None,
        timeout_s: float = DEFAULT_TIMEOUT_S,
    ) -> None:
        self.ledger = ledger
        self.settings = settings
        self.since = since
        self.store: Store = store or c_store
        self.timeout_s = timeout_s

    def fill(self, now: float) -> int:
        added = 0
        for node in self.settings.nodes:
            files = {obj: OBJECT_FILES[obj] for obj in node.objects}
            added += self.ledger.outbox_fill(node.name, files, self.since[node.name], now)
        return added

    def _failed(self, row: OutboxRow, error: str, now: float, *, permanent: bool) -> bool:
        s = self.settings
        retry = after_failure(
            attempts=row.attempts + 1, created=row.created, now=now, first_s=s.retry_seconds,
            max_s=s.retry_max_seconds, give_up_days=s.give_up_days, permanent=permanent,
        )  # fmt: skip
        self.ledger.outbox_failed(
            row.id, error, not_before=retry.not_before, give_up=retry.give_up, sop_uid=row.sop_uid
        )
        if retry.give_up:
            log.error("gave up sending %s of result %d to %s: %s", row.object, row.result_id,
                      row.node, error)  # fmt: skip
        else:
            log.warning("sending %s of result %d to %s failed (try %d, next in %.0f s): %s",
                        row.object, row.result_id, row.node, row.attempts + 1,
                        retry.not_before - now, error)  # fmt: skip
        return retry.give_up

    def pass_once(self, now: float, clock: Callable[[], float] | None = None) -> PassReport:
        """Fill the outbox, then send every due row of every node once; ``clock`` times each
        answer (default: ``now`` throughout)."""
        clock = clock or (lambda: now)
        added = self.fill(now)
        sent = failed = given_up = 0
        for node in self.settings.nodes:
            items: list[tuple[OutboxRow, Dataset]] = []
            for row in self.ledger.outbox_due(node.name, now, BATCH):
                ds, error, permanent = _read(row.path)
                if ds is None:
                    gave_up = self._failed(row, error, clock(), permanent=permanent)
                    given_up, failed = given_up + gave_up, failed + (not gave_up)
                else:
                    items.append((row, ds))
            if not items:
                continue
            uids = {row.id: str(ds.SOPInstanceUID) for row, ds in items}
            answers = self.store(node, self.settings.ae_title, items, self.timeout_s)
            for row, status, no_answer in answers:
                at = clock()
                outcome = store_outcome(status)
                if outcome is not Outcome.FAILED:
                    note = status_text(status) if outcome is Outcome.WARNING else None
                    self.ledger.outbox_sent(row.id, uids[row.id], at, note)
                    log.info("sent %s of result %d to %s", row.object, row.result_id, node.name)
                    sent += 1
                    continue
                why = no_answer or status_text(status)
                gave_up = self._failed(replace(row, sop_uid=uids[row.id]), why, at, permanent=False)
                given_up, failed = given_up + gave_up, failed + (not gave_up)
        return PassReport(added, sent, failed, given_up)


def run_sender(
    state_dir: Path,
    settings: SendSettings,
    stop: threading.Event,
    *,
    interval_s: float = DEFAULT_INTERVAL_S,
    timeout_s: float = DEFAULT_TIMEOUT_S,
    clock: Callable[[], float] = time.time,
) -> None:
    """Send until ``stop`` is set: a pass, then a wait until the next row is due (at most
    ``interval_s``, so new results are picked up). Opens its own ledger connection."""
    with Ledger.open(state_dir) as ledger:
        since = node_since(state_dir, [n.name for n in settings.nodes], clock())
        sender = Sender(ledger, settings, since, timeout_s=timeout_s)
        while not stop.is_set():
            try:
                sender.pass_once(clock(), clock)
            except StageFailed as exc:  # the ledger stayed locked: the next pass tries again
                log.warning("sender: %s", exc)
            due = ledger.outbox_next_try()
            wait = interval_s if due is None else min(interval_s, max(0.05, due - clock()))
            stop.wait(wait)
