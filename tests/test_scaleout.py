"""Re-runs on a local Dask cluster of worker processes give the same result folders as one machine.

Oracle: the single-machine :class:`flairwatch.engine.pipeline.Engine` run of the same series with the
same model into a separate results folder; files are compared byte for byte (the summary
without its timings). The ledger is read back with its own query API.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from flairwatch.cli import main
from flairwatch.engine.manifest import load_manifest
from flairwatch.engine.pipeline import Engine
from flairwatch.intake.assemble import group_series
from flairwatch.intake.discover import read_record
from tests.model_fixtures import make_tiny_model
from tests.review_fixtures import Archive, make_archive

pytest.importorskip("distributed", reason="needs the 'cluster' extra (dask[distributed])")


def _files(folder: Path) -> dict[str, bytes | dict[str, object]]:
    out: dict[str, bytes | dict[str, object]] = {}
    for p in sorted(folder.iterdir()):
        if p.name == "summary.json":
            summary = json.loads(p.read_text(encoding="utf-8"))
            summary.pop("timings_s")
            out[p.name] = summary
        else:
            out[p.name] = p.read_bytes()
    return out


@pytest.fixture
def archive(tmp_path: Path, tiny_model_manifest: Path) -> Archive:
    arc = make_archive(tmp_path / "site", tiny_model_manifest)
    arc.add("one")
    arc.add("two")
    arc.add("three")
    return arc


def test_cluster_rerun_matches_single_machine(
    archive: Archive, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    v2 = make_tiny_model(
        tmp_path / "v2", grid_shape=(40, 40), spacing_mm=(1.6, 1.6), version="0.0.2"
    )
    # the single-machine reference, into its own results folder
    engine = Engine(archive.cfg, manifest=load_manifest(v2))
    reference = tmp_path / "reference"
    paths = sorted((archive.root / "inbox").rglob("img*"))
    series, _ = group_series(read_record(p) for p in paths)
    expected = {
        s.key[1]: engine.process(s, reference, secret=archive.secret).result_dir for s in series
    }

    rc = main(["reprocess", "--config", str(archive.config_file), "--model", str(v2),
               "--cluster", "local:2"])  # fmt: skip
    assert rc == 0, capsys.readouterr().err
    assert "reprocess 3/3" in capsys.readouterr().err

    assert archive.cfg.results is not None
    with archive.ledger() as ledger:
        rows = ledger.query(
            "SELECT s.series_uid, r.result_path FROM results r JOIN series s ON s.id = r.series_id"
            " WHERE r.current = 1 AND r.model_version = '0.0.2'"
        )
        states = ledger.query("SELECT state, COUNT(*) FROM jobs WHERE priority < 0 GROUP BY state")
    assert states == [("done", 3)]
    assert len(rows) == 3
    for series_uid, result_path in rows:
        got = Path(result_path)
        assert got.is_relative_to(archive.cfg.results)
        assert got.relative_to(archive.cfg.results) == expected[series_uid].relative_to(reference)
        assert _files(got) == _files(expected[series_uid])
        assert (got.parent / "current_version.txt").read_text(encoding="utf-8").strip() == got.name
    reports = list((archive.cfg.results / "reports").iterdir())
    assert len(reports) == 1 and (reports[0] / "changes.csv").is_file()
