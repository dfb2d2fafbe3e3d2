"""The ledger's ``outbox`` table: result files waiting for, sent to, or given up for DICOM nodes.

One row per (result, node, object). A row enters as ``waiting`` and changes state only after
the node answered (or the attempt failed), so a crash of the sender at any moment leaves the
row ``waiting`` and it is sent again: a duplicate C-STORE (the node replaces the instance with
the same SOP Instance UID) instead of a loss.

Which results a node gets (:meth:`OutboxTables.outbox_fill`): every result folder that has
landed (a ``results`` row with ``current = 1``, written only after the folder was renamed into
place) and was created at or after ``since``, the time the sender first saw that node in the
config. A node added later is not flooded with the whole archive.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum
from typing import Any

from flairwatch.ledger.core import LedgerCore


class OutboxState(StrEnum):
    WAITING = "waiting"  # not sent yet; the next try is not before ``not_before``
    SENT = "sent"  # the node answered the C-STORE with success (or a warning)
    GIVEN_UP = "given_up"  # failed for too long, or the file is missing: sent never


@dataclass(frozen=True)
class OutboxRow:
    id: int
    result_id: int
    node: str
    object: str
    path: str
    sop_uid: str | None
    state: OutboxState
    attempts: int
    not_before: float
    last_error: str | None
    created: float
    sent: float | None


@dataclass(frozen=True)
class NodeCounts:
    """One node's outbox for ``status``: rows per state, the newest error, the last send."""

    node: str
    waiting: int
    sent: int
    given_up: int
    last_error: str | None
    last_sent: float | None


_SELECT = """SELECT id, result_id, node, object, path, sop_uid, state, attempts, not_before,
    last_error, created, sent FROM outbox"""


def _row(r: tuple[Any, ...]) -> OutboxRow:
    i, result_id, node, obj, path, sop_uid, state, attempts, not_before, error, created, sent = r
    return OutboxRow(i, result_id, node, obj, path, sop_uid, OutboxState(state), attempts,
                     not_before, error, created, sent)  # fmt: skip


class OutboxTables(LedgerCore):
    """Reads and writes of the ``outbox`` table (times in seconds since the epoch)."""

    def outbox_fill(self, node: str, files: dict[str, str], since: float, now: float) -> int:
        """Add a waiting row per object (``files``: object -> file name in the result folder)
        for each landed current result created at or after ``since``; returns rows added.

        A read first, so a pass with nothing new takes no write lock from the daemon.
        """
        missing = """FROM results r WHERE r.current = 1 AND r.created >= ? AND NOT EXISTS
            (SELECT 1 FROM outbox o WHERE o.result_id = r.id AND o.node = ? AND o.object = ?)"""
        todo = [
            (obj, name)
            for obj, name in files.items()
            if self.query(f"SELECT COUNT(*) {missing}", (since, node, obj))[0][0]
        ]
        added = 0
        for obj, name in todo:
            with self.transaction() as db:
                cur = db.execute(
                    f"""INSERT OR IGNORE INTO outbox (result_id, node, object, path, created)
                        SELECT r.id, ?, ?, r.result_path || '/' || ?, ? {missing}""",
                    (node, obj, name, now, since, node, obj),
                )
                added += cur.rowcount
        return added

    def outbox_due(self, node: str, now: float, limit: int = 100) -> list[OutboxRow]:
        """Waiting rows of ``node`` whose next try is due, oldest first."""
        rows = self.query(
            _SELECT + " WHERE node = ? AND state = ? AND not_before <= ? ORDER BY id LIMIT ?",
            (node, OutboxState.WAITING.value, now, limit),
        )
        return [_row(r) for r in rows]

    def outbox_next_try(self) -> float | None:
        """The earliest ``not_before`` of any waiting row (None when nothing waits)."""
        (t,) = self.query(
            "SELECT MIN(not_before) FROM outbox WHERE state = ?", (OutboxState.WAITING.value,)
        )[0]
        return None if t is None else float(t)

    def outbox_rows(self, node: str | None = None) -> list[OutboxRow]:
        where, args = (" WHERE node = ?", (node,)) if node is not None else ("", ())
        return [_row(r) for r in self.query(_SELECT + where + " ORDER BY id", args)]

    def outbox_sent(self, row_id: int, sop_uid: str, now: float, note: str | None = None) -> None:
        """The node answered success (``note``: its warning, if it gave one)."""
        with self.transaction() as db:
            db.execute(
                """UPDATE outbox SET state = ?, sop_uid = ?, sent = ?, attempts = attempts + 1,
                   last_error = ? WHERE id = ? AND state = ?""",
                (OutboxState.SENT.value, sop_uid, now, note, row_id, OutboxState.WAITING.value),
            )

    def outbox_failed(
        self, row_id: int, error: str, *, not_before: float, give_up: bool, sop_uid: str | None
    ) -> None:
        """One failed attempt: wait until ``not_before``, or give up for good."""
        state = OutboxState.GIVEN_UP if give_up else OutboxState.WAITING
        with self.transaction() as db:
            db.execute(
                """UPDATE outbox SET state = ?, attempts = attempts + 1, not_before = ?,
                   last_error = ?, sop_uid = COALESCE(?, sop_uid) WHERE id = ? AND state = ?""",
                (state.value, not_before, error, sop_uid, row_id, OutboxState.WAITING.value),
            )

    def outbox_counts(self) -> list[NodeCounts]:
        """Per node: waiting, sent and given-up rows, the newest error and the last send."""
        out = []
        for node, waiting, sent, given_up, last_sent in self.query(
            """SELECT node, SUM(state = 'waiting'), SUM(state = 'sent'), SUM(state = 'given_up'),
               MAX(sent) FROM outbox GROUP BY node ORDER BY node"""
        ):
            errors = self.query(
                """SELECT last_error FROM outbox WHERE node = ? AND last_error IS NOT NULL
                   AND state != 'sent' ORDER BY id DESC LIMIT 1""",
                (node,),
            )
            out.append(
                NodeCounts(
                    node, waiting, sent, given_up, errors[0][0] if errors else None, last_sent
                )
            )
        return out
