"""Retention (``keep_versions``): which model versions' folders go, on real folders and a real ledger.

The rule under test is the one config.example.yaml documents: keep the last N model versions;
never prune the current result or a QC-accepted one (common practice for archives under review).
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from flairwatch.cli import main
from flairwatch.engine.manifest import load_manifest
from flairwatch.engine.pipeline import Engine
from flairwatch.ledger.queries import ResultRecord, results_of_series
from flairwatch.research.retention import plan_prune, prune_versions
from tests.review_fixtures import make_archive, rerun, tiny_model_version


def _rec(result_id: int, version: str, *, current: bool = False, mark: str | None = None) -> ResultRecord:  # fmt: skip
    return ResultRecord(
        result_id, 1, "1.2", "1.2.3", 1, "s", "t", "e", "m", version, f"/r/m-{version}",
        1.0, 1, current, float(result_id), mark, None, None,
    )  # fmt: skip


@pytest.mark.parametrize(
    ("records", "keep", "pruned"),
    [
        ([_rec(1, "1"), _rec(2, "2"), _rec(3, "3", current=True)], 2, [1]),
        ([_rec(1, "1"), _rec(2, "2"), _rec(3, "3", current=True)], 1, [1, 2]),
        ([_rec(1, "1", mark="accepted"), _rec(2, "2"), _rec(3, "3", current=True)], 1, [2]),
        ([_rec(1, "1", mark="rejected"), _rec(2, "2", current=True)], 1, [1]),
        # a rollback: the current result is of an older version than the newest one
        ([_rec(1, "1"), _rec(2, "2"), _rec(3, "1", current=True)], 1, [2]),
        ([_rec(1, "1"), _rec(2, "2", current=True)], 0, []),  # 0 keeps everything
    ],
)
def test_plan_prune(records: list[ResultRecord], keep: int, pruned: list[int]) -> None:
    assert [r.result_id for r in plan_prune(records, keep)] == pruned


def test_prune_keeps_current_accepted_and_corrections(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    arc = make_archive(tmp_path / "site", tiny_model_manifest, keep_versions=1)
    first = arc.add("one")
    cfg = str(arc.config_file)
    # a correction on the first result, and a second, unreviewed series result to prune
    img = nib.load(first.outcome.result_dir / "wmh_mask.nii.gz")
    edited = tmp_path / "edited.nii.gz"
    nib.save(nib.Nifti1Image(np.asarray(img.dataobj), img.affine), edited)  # type: ignore[attr-defined]
    assert main(["qc", "correct", "--config", cfg, first.series_key, "--mask", str(edited)]) == 0
    v2 = rerun(arc, first, Engine(arc.cfg, manifest=load_manifest(
        tiny_model_version(tmp_path / "v2", tiny_model_manifest, "0.0.2"))))  # fmt: skip
    assert main(["qc", "mark", "--config", cfg, first.series_key, "accepted"]) == 0  # on v2
    v3 = rerun(arc, first, Engine(arc.cfg, manifest=load_manifest(
        tiny_model_version(tmp_path / "v3", tiny_model_manifest, "0.0.3"))))  # fmt: skip
    series_dir = first.outcome.result_dir.parent
    assert sorted(p.name for p in series_dir.iterdir() if p.name.startswith("tiny")) == [
        "tiny-threshold-0.0.1", "tiny-threshold-0.0.2", "tiny-threshold-0.0.3",
    ]  # fmt: skip

    with arc.ledger() as ledger:
        removed = prune_versions(ledger, 1)
        records = results_of_series(ledger, first.series_id)
    assert removed == [first.outcome.result_dir]  # 0.0.1: not current, not accepted
    assert v2.outcome.result_dir.is_dir(), "QC-accepted results stay"
    assert v3.outcome.result_dir.is_dir(), "the current result stays"
    assert len(list((series_dir / "corrections").iterdir())) == 1, "corrections stay"
    assert not list(series_dir.glob(".pruning-*"))
    assert len(records) == 3, "ledger rows are kept"
    with arc.ledger() as ledger:
        assert prune_versions(ledger, 1) == [], "a second run finds nothing more"
