"""Result folders: atomic build, adoption, no overwrite, crash leftovers, keys."""

from __future__ import annotations

import hashlib
import hmac
import os
import stat
from pathlib import Path

import pytest

from flairwatch import keys
from flairwatch.engine import results


def _fill(tmp: Path) -> dict[str, object]:
    (tmp / "a.txt").write_text("a")
    return {"lesion_volume_ml": 1.5}


def test_folder_appears_complete_and_is_adopted_not_rebuilt(tmp_path: Path) -> None:
    final = tmp_path / "s1" / "t1" / "e1" / "m-1.0.0"
    folder, summary, adopted = results.build_version_folder(final, _fill)
    assert folder == final and not adopted
    assert results.is_complete(final) and summary["lesion_volume_ml"] == 1.5
    assert sorted(p.name for p in final.iterdir()) == ["a.txt", "summary.json"]
    mode = stat.S_IMODE(os.stat(final / "a.txt").st_mode)
    assert mode & 0o007 == 0, "results must not be world-readable"

    def boom(tmp: Path) -> dict[str, object]:
        raise AssertionError("a complete folder must not be rebuilt")

    _, again, adopted = results.build_version_folder(final, boom)
    assert adopted and again == summary


def test_a_failure_leaves_no_folder_behind(tmp_path: Path) -> None:
    final = tmp_path / "s1" / "t1" / "e1" / "m-1.0.0"

    def fail(tmp: Path) -> dict[str, object]:
        (tmp / "half.nii.gz").write_bytes(b"12")
        raise OSError(28, "No space left on device")

    with pytest.raises(OSError):
        results.build_version_folder(final, fail)
    assert not final.exists()
    assert list(final.parent.iterdir()) == []


def test_crash_leftovers_are_removed(tmp_path: Path) -> None:
    leftover = tmp_path / "s1" / "t1" / "e1" / f"{results.TEMP_PREFIX}m-1.0.0-abcd"
    leftover.mkdir(parents=True)
    (leftover / "wmh_mask.nii.gz").write_bytes(b"partial")
    keep = tmp_path / "s1" / "t1" / "e1" / "m-1.0.0"
    results.build_version_folder(keep, _fill)
    assert results.remove_incomplete(tmp_path) == [leftover]
    assert not leftover.exists() and results.is_complete(keep)


def test_current_pointer_round_trip(tmp_path: Path) -> None:
    assert results.current_version(tmp_path) is None
    results.set_current(tmp_path, "m-1.0.0")
    results.set_current(tmp_path, "m-1.1.0")
    assert results.current_version(tmp_path) == "m-1.1.0"


def test_keys_are_keyed_hashes_and_never_header_text(tmp_path: Path) -> None:
    secret = keys.load_or_create_secret(tmp_path)
    assert keys.load_or_create_secret(tmp_path) == secret
    assert stat.S_IMODE(os.stat(tmp_path / keys.SECRET_FILE).st_mode) == 0o600
    hostile = "../../etc/passwd\x00\n"
    k = keys.subject_key(hostile, secret)
    # RFC 2104 HMAC via Python's hmac module as the reference
    expected = hmac.new(secret, hostile.encode(), hashlib.sha256).hexdigest()[:12]
    assert k == "s" + expected
    assert keys.subject_key(hostile, b"x" * 32) != k
    for key in (k, keys.study_key(hostile), keys.series_key(hostile, 3)):
        assert key.replace("-", "").isalnum() and "/" not in key
    assert keys.series_key("1.2.3", 1) + "-r2" == keys.series_key("1.2.3", 2)
