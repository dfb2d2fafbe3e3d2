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


def test_compression_level_changes_only_the_gzip_stream(tmp_path: Path) -> None:
    # Oracle: Python's gzip module (RFC 1952) and nibabel's reader. The probability map is written
    # at level 1 instead of 6 for speed: the NIfTI bytes inside must be the very same, and the
    # mask (still level 6) the very same file as before.
    import gzip

    import nibabel as nib
    import numpy as np

    from flairwatch.engine import outputs
    from flairwatch.volume import Volume

    rng = np.random.default_rng(0)
    affine = np.diag([0.9, 0.9, 3.0, 1.0])
    affine[:3, 3] = [-100.0, -110.0, -60.0]
    volume = Volume(rng.random((40, 36, 8)).astype(np.float32), affine)
    prob = rng.random(volume.shape).astype(np.float32)
    mask = (prob > 0.9).astype(np.uint8)
    fast = outputs.nifti_bytes(prob, volume, level=outputs.PROBABILITY_GZIP_LEVEL)
    slow = outputs.nifti_bytes(prob, volume, level=6)
    assert outputs.PROBABILITY_GZIP_LEVEL == 1 and fast != slow
    assert gzip.decompress(fast) == gzip.decompress(slow)
    assert outputs.nifti_bytes(mask, volume) == outputs.nifti_bytes(mask, volume, level=6)
    path = tmp_path / "p.nii.gz"
    path.write_bytes(fast)
    img = nib.load(path)
    np.testing.assert_array_equal(np.asarray(img.dataobj), prob)
    np.testing.assert_allclose(img.affine[:3, :3], np.diag([-0.9, -0.9, 3.0]))  # LPS -> RAS


def test_probability_map_compressed_in_pieces_reads_back_everywhere(tmp_path: Path) -> None:
    # A gzip file of several members is one stream (RFC 1952, section 2.2). Oracles: Python's
    # gzip module, nibabel, and SimpleITK's NIfTI reader (ITK, built on zlib).
    import gzip

    import nibabel as nib
    import numpy as np
    import SimpleITK as sitk

    from flairwatch.engine import outputs
    from flairwatch.volume import Volume

    rng = np.random.default_rng(1)
    affine = np.diag([0.9, 0.9, 3.0, 1.0])
    volume = Volume(np.zeros((128, 128, 80), dtype=np.float32), affine)  # 5.2 MB of float32
    prob = rng.random(volume.shape).astype(np.float32)
    pieces = outputs.nifti_bytes(prob, volume, level=1, threads=2)
    whole = outputs.nifti_bytes(prob, volume, level=1)
    assert pieces != whole  # two members, not one
    assert gzip.decompress(pieces) == gzip.decompress(whole)
    path = tmp_path / "p.nii.gz"
    path.write_bytes(pieces)
    np.testing.assert_array_equal(np.asarray(nib.load(path).dataobj), prob)
    itk = sitk.GetArrayFromImage(sitk.ReadImage(str(path)))  # (k, j, i)
    np.testing.assert_array_equal(itk.transpose(2, 1, 0), prob)
