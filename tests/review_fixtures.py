"""A small processed archive for the review commands: real DICOM, real results, a real ledger.

Series are written with :func:`tests.series_fixtures.write_series`, processed by the real
:class:`flairwatch.engine.pipeline.Engine` with the tiny ONNX model, and recorded through the ledger's
own API in the order the daemon uses (new revision -> queued -> claimed -> done).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import yaml
from pydicom.uid import generate_uid

from flairwatch import keys
from flairwatch.config import Config, load_config
from flairwatch.engine.pipeline import Engine, Outcome
from flairwatch.intake.assemble import group_series
from flairwatch.intake.discover import read_record
from flairwatch.ledger.store import FileRow, JobState, Ledger
from flairwatch.records import Series
from tests.series_fixtures import SeriesSpec, write_series

NOW = 1_780_000_000.0  # a fixed clock for ledger rows


@dataclass
class Entry:
    series_id: int
    result_id: int
    study_uid: str
    series_uid: str
    series_key: str
    outcome: Outcome


@dataclass
class Archive:
    root: Path
    config_file: Path
    cfg: Config
    secret: bytes
    engine: Engine
    entries: list[Entry] = field(default_factory=list)

    def ledger(self) -> Ledger:
        assert self.cfg.state is not None
        return Ledger.open(self.cfg.state, check_fs=False)

    def add(
        self,
        name: str,
        spec: SeriesSpec | None = None,
        *,
        study_uid: str | None = None,
        series_uid: str | None = None,
        engine: Engine | None = None,
    ) -> Entry:
        """Write, process and record one series (a new study unless ``study_uid`` is given)."""
        study_uid = study_uid or generate_uid()
        series_uid = series_uid or generate_uid()
        paths = write_series(
            self.root / "inbox" / name,
            spec or SeriesSpec(),
            study_uid=study_uid,
            series_uid=series_uid,
        )
        (series,), _ = group_series(read_record(p) for p in paths)
        return self.record(series, engine or self.engine)

    def record(self, series: Series, engine: Engine, revision: int = 1) -> Entry:
        assert self.cfg.results is not None
        out = engine.process(series, self.cfg.results, secret=self.secret, revision=revision)
        s = out.summary
        now = NOW + len(self.entries)
        with self.ledger() as ledger:
            row, job = ledger.new_revision(
                *series.key,
                lambda r: (s["subject_key"], s["study_key"], keys.series_key(series.key[1], r)),
                now,
            )
            files = [
                FileRow(str(f.path), f.size, f.mtime_ns, f.sop_uid, *series.key)
                for f in series.files
            ]
            ledger.record_scan(files, [], now)
            ledger.take_files(row.id, *series.key)
            ledger.move_job(job.id, [JobState.SETTLING], JobState.QUEUED, now)
            claimed = ledger.claim_next(now, engine.model_name, engine.model_version, os.getpid())
            assert claimed is not None and claimed.series_id == row.id
            ledger.finish_done(
                claimed.id, str(out.result_dir), s, adopted=out.adopted, seconds=0.5, now=now
            )
            (result_id,) = ledger.query("SELECT MAX(id) FROM results")[0]
        entry = Entry(row.id, result_id, series.key[0], series.key[1], s["series_key"], out)
        self.entries.append(entry)
        return entry


def rerun(archive: Archive, entry: Entry, engine: Engine) -> Entry:
    """Process a recorded series again with another model, as a low-priority re-run job."""
    assert archive.cfg.results is not None
    paths = sorted((archive.root / "inbox").rglob("img*"))
    records = [read_record(p) for p in paths]
    series = next(s for s in group_series(records)[0] if s.key[1] == entry.series_uid)
    out = engine.process(series, archive.cfg.results, secret=archive.secret)
    now = NOW + 1000 + len(archive.entries)
    with archive.ledger() as ledger:
        with ledger.transaction() as db:
            db.execute(
                "INSERT INTO jobs (series_id, state, priority, model_name, model_version, created,"
                " queued) VALUES (?,?,?,?,?,?,?)",
                (entry.series_id, JobState.QUEUED.value, -10, engine.model_name,
                 engine.model_version, now, now),
            )  # fmt: skip
        claimed = ledger.claim_next(now, engine.model_name, engine.model_version, os.getpid())
        assert claimed is not None and claimed.series_id == entry.series_id
        ledger.finish_done(
            claimed.id, str(out.result_dir), out.summary, adopted=False, seconds=0.5, now=now
        )
        (result_id,) = ledger.query("SELECT MAX(id) FROM results")[0]
    new = Entry(entry.series_id, result_id, entry.study_uid, entry.series_uid,
                entry.series_key, out)  # fmt: skip
    archive.entries.append(new)
    return new


def tiny_model_version(folder: Path, manifest: Path, version: str) -> Path:
    """A copy of the tiny model's manifest declaring another version (same ONNX file)."""
    folder.mkdir(parents=True, exist_ok=True)
    raw = yaml.safe_load(manifest.read_text(encoding="utf-8"))
    raw["version"] = version
    raw["file"] = str(manifest.parent / raw["file"])
    target = folder / "tiny.yaml"
    target.write_text(yaml.safe_dump(raw))
    return target


def make_archive(root: Path, manifest: Path, **config: object) -> Archive:
    """A config file (results, state, model) under ``root`` and an empty archive."""
    root.mkdir(parents=True, exist_ok=True)
    raw = {"results": "results", "state": "state", "model": str(manifest), "threads": 1}
    raw.update(config)
    config_file = root / "flairwatch.yaml"
    config_file.write_text(yaml.safe_dump(raw))
    cfg = load_config(config_file)
    assert cfg.state is not None
    secret = keys.load_or_create_secret(cfg.state)
    return Archive(root, config_file, cfg, secret, Engine(cfg))
