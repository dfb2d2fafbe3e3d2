"""The ledger's ``files`` table: every file found in the inbox and the revision that took it."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

from flairwatch.ledger.core import LedgerCore


@dataclass(frozen=True)
class FileRow:
    path: str
    size: int
    mtime_ns: int
    sop_uid: str | None = None
    study_uid: str | None = None
    series_uid: str | None = None
    series_id: int | None = None
    reason: str | None = None


class FileTables(LedgerCore):
    """Reads and writes of the ``files`` table."""

    def known_files(self) -> dict[str, FileRow]:
        """Every file present at the last scan, by path."""
        rows = self.query(
            "SELECT path, size, mtime_ns, sop_uid, study_uid, series_uid, series_id, reason"
            " FROM files WHERE gone = 0"
        )
        return {r[0]: FileRow(*r) for r in rows}

    def known_sops(self, study_uid: str, series_uid: str) -> set[str]:
        """SOP Instance UIDs already taken into a revision of this series (present or not)."""
        rows = self.query(
            "SELECT sop_uid FROM files WHERE study_uid = ? AND series_uid = ?"
            " AND series_id IS NOT NULL AND sop_uid IS NOT NULL",
            (study_uid, series_uid),
        )
        return {r[0] for r in rows}

    def record_scan(self, present: Iterable[FileRow], gone: Iterable[str], now: float) -> None:
        """Upsert what a scan found; mark paths it no longer found as gone."""
        with self.transaction() as db:
            for f in present:
                db.execute(
                    """INSERT INTO files (path, size, mtime_ns, sop_uid, study_uid, series_uid,
                        reason, first_seen, last_seen) VALUES (?,?,?,?,?,?,?,?,?)
                    ON CONFLICT (path) DO UPDATE SET size=excluded.size,
                        mtime_ns=excluded.mtime_ns, sop_uid=excluded.sop_uid,
                        study_uid=excluded.study_uid, series_uid=excluded.series_uid,
                        reason=excluded.reason, last_seen=excluded.last_seen, gone=0,
                        series_id=CASE WHEN files.sop_uid IS excluded.sop_uid
                            THEN files.series_id ELSE NULL END""",
                    (f.path, f.size, f.mtime_ns, f.sop_uid, f.study_uid, f.series_uid, f.reason,
                     now, now),
                )  # fmt: skip
            for path in gone:
                db.execute("UPDATE files SET gone = 1, last_seen = ? WHERE path = ?", (now, path))

    def take_files(self, series_id: int, study_uid: str, series_uid: str) -> int:
        """Attach the present files of a series not yet in any revision to ``series_id``."""
        with self.transaction() as db:
            cur = db.execute(
                """UPDATE files SET series_id = ? WHERE study_uid = ? AND series_uid = ?
                   AND series_id IS NULL AND gone = 0 AND sop_uid IS NOT NULL""",
                (series_id, study_uid, series_uid),
            )
            return cur.rowcount

    def revision_files(self, series_id: int) -> list[FileRow]:
        """Present files that belong to this revision: taken by it or by an earlier one."""
        rows = self.query(
            """SELECT f.path, f.size, f.mtime_ns, f.sop_uid, f.study_uid, f.series_uid,
                      f.series_id, f.reason
               FROM files f JOIN series s ON s.id = ? JOIN series t ON t.id = f.series_id
               WHERE f.gone = 0 AND t.study_uid = s.study_uid AND t.series_uid = s.series_uid
                 AND t.revision <= s.revision ORDER BY f.path""",
            (series_id,),
        )
        return [FileRow(*r) for r in rows]

    def pending_files(self) -> set[str]:
        """Present files of series still waiting for a result (settling, queued or running)."""
        rows = self.query(
            """SELECT f.path FROM files f
               JOIN series s ON s.study_uid = f.study_uid AND s.series_uid = f.series_uid
               JOIN jobs j ON j.id = (SELECT MAX(k.id) FROM jobs k WHERE k.series_id = s.id)
               WHERE f.gone = 0 AND j.state IN ('settling', 'queued', 'running')
                 AND s.revision = (SELECT MAX(t.revision) FROM series t
                                   WHERE t.study_uid = s.study_uid AND t.series_uid = s.series_uid)"""
        )
        return {r[0] for r in rows}
