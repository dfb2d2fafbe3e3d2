"""Hostile inputs and a hostile inbox: size caps before allocation, no links followed, files
swapped between scan and use, the per-worker memory cap (issue 10 item 7).

Everything runs on real files; DICOM objects are built with pydicom (a general-purpose
reference library) following the DICOM standard, PS3.5 (encapsulation, section A.4) and PS3.3
(Rows/Columns/Number of Frames, C.7.6.3 and C.7.6.6).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
import pydicom
import pytest
from pydicom.encaps import encapsulate
from pydicom.uid import RLELossless

from flairwatch.config import config_from_mapping
from flairwatch.daemon.inbox import InboxScanner
from flairwatch.daemon.workers import classify
from flairwatch.errors import InputRejected
from flairwatch.intake.discover import read_record
from flairwatch.intake.fsafe import (
    FileChanged,
    Seen,
    move_if_same,
    open_file,
    still_same,
    unlink_if_same,
)
from flairwatch.intake.limits import MAX_SIDE
from flairwatch.intake.load import load_series, volume_from_datasets
from flairwatch.records import Series
from tests.dicom_fixtures import slice_dataset
from tests.series_fixtures import write_series

REPO = Path(__file__).resolve().parent.parent


def _write(ds: pydicom.Dataset, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    ds.save_as(path, enforce_file_format=True)
    return path


def _huge_header(path: Path, rows: int, cols: int, frames: int) -> Path:
    """A valid small image whose header then declares rows x cols x frames (pixels left small)."""
    ds = slice_dataset((0.0, 0.0, 0.0), rows=4, columns=5)
    ds.Rows, ds.Columns = rows, cols
    ds.NumberOfFrames = frames
    return _write(ds, path)


def test_symlink_loop_and_links_outside_are_not_followed(tmp_path: Path) -> None:
    inbox, outside = tmp_path / "inbox", tmp_path / "outside"
    inside = write_series(inbox / "a")
    stranger = write_series(outside / "b")  # a series the inbox does not own
    (inbox / "loop").symlink_to(inbox, target_is_directory=True)  # a loop back to the root
    (inbox / "a" / "self").symlink_to(inbox / "a", target_is_directory=True)
    (inbox / "elsewhere").symlink_to(outside, target_is_directory=True)
    (inbox / "one_file").symlink_to(stranger[0])
    scan = InboxScanner(inbox).scan()
    assert sorted(scan.records) == sorted(str(p) for p in inside)
    assert len(scan.series) == 1 and not scan.unusable


def test_folder_swapped_for_a_link_is_not_entered(tmp_path: Path) -> None:
    inbox, outside = tmp_path / "inbox", tmp_path / "outside"
    path = write_series(inbox / "sub")[0]
    seen = Seen.of(path, os.stat(path))
    # after the scan, the folder is replaced by a link to a copy of it somewhere else
    (outside).mkdir()
    os.rename(inbox / "sub", outside / "sub")
    (inbox / "sub").symlink_to(outside / "sub", target_is_directory=True)
    with pytest.raises(OSError):  # ELOOP/ENOTDIR from O_NOFOLLOW on the folder
        os.close(open_file(path, root=inbox))
    assert not still_same(inbox, path, seen.size, seen.mtime_ns, (seen.dev, seen.ino))
    assert not unlink_if_same(inbox, path, seen.size, seen.mtime_ns, None)
    assert (outside / "sub" / path.name).exists()  # never deleted through the link


def test_file_swapped_between_scan_and_read_is_not_read_or_deleted(tmp_path: Path) -> None:
    inbox = tmp_path / "inbox"
    path = write_series(inbox / "a")[0]
    seen = Seen.of(path, os.stat(path))
    # another program replaces the file with one of the same size and mtime (rename over it)
    data = path.read_bytes()
    spare = inbox / ".incoming"
    spare.write_bytes(data)
    os.utime(spare, ns=(seen.mtime_ns, seen.mtime_ns))
    os.replace(spare, path)
    with pytest.raises(FileChanged):
        open_file(path, root=inbox, expect=seen)
    record = read_record(path, root=inbox, expect=seen)
    assert record.header is None and record.reason is not None
    assert record.reason.startswith("cannot read: changed while being read")
    # same size and mtime, another inode: not the file that was scanned, so not deleted
    assert not unlink_if_same(inbox, path, seen.size, seen.mtime_ns, (seen.dev, seen.ino))
    assert path.exists()
    st = os.stat(path)
    assert unlink_if_same(inbox, path, st.st_size, st.st_mtime_ns, (st.st_dev, st.st_ino))
    assert not path.exists()


def test_file_rewritten_after_scan_is_refused_at_load(tmp_path: Path) -> None:
    paths = write_series(tmp_path / "a")
    records = [read_record(p) for p in paths]
    assert all(r.header is not None for r in records)
    with open(paths[3], "ab") as fh:  # a sender appends after the series settled
        fh.write(b"\0" * 16)
    header = records[0].header
    assert header is not None
    with pytest.raises(InputRejected, match="changed since it was scanned"):
        load_series(Series(header, tuple(records)))


@pytest.mark.parametrize(
    ("rows", "cols", "frames", "words"),
    [
        (60000, 60000, 1000, "60000x60000 is over"),
        (512, 512, 100000, "100000 frames in one file"),
        (0, 64, 1, "zero rows or columns"),
        (MAX_SIDE, MAX_SIDE, 4000, "GiB decoded"),
    ],
)
def test_huge_or_zero_declared_sizes_refused_without_allocating(
    tmp_path: Path, rows: int, cols: int, frames: int, words: str
) -> None:
    path = _huge_header(tmp_path / "big.dcm", rows, cols, frames)
    record = read_record(path)
    assert record.header is None and record.reason is not None and words in record.reason
    ds = pydicom.dcmread(path, force=True)
    tracemalloc.start()
    t0 = time.perf_counter()
    try:
        with pytest.raises(InputRejected, match=words):
            volume_from_datasets([ds], "series x")
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    # 60000 x 60000 x 1000 x 2 bytes would be 7.2 TB; the refusal takes a few kB
    assert peak < 1_000_000, peak
    assert time.perf_counter() - t0 < 1.0


def _rle_dataset(frames_declared: int, fragments: list[bytes], rows: int = 512) -> pydicom.Dataset:
    ds = slice_dataset((0.0, 0.0, 0.0), rows=4, columns=5)
    ds.Rows = ds.Columns = rows
    ds.NumberOfFrames = frames_declared
    ds.file_meta.TransferSyntaxUID = RLELossless
    ds.PixelData = encapsulate(fragments)
    ds["PixelData"].VR = "OB"
    return ds


def test_compressed_frames_checked_before_decoding(tmp_path: Path) -> None:
    # 1000 frames of 512 x 512 declared (500 MB decoded, under the caps), two tiny fragments
    ds = _rle_dataset(1000, [b"\x00" * 64, b"\x00" * 64])
    path = _write(ds, tmp_path / "rle.dcm")
    loaded = pydicom.dcmread(path, force=True)
    tracemalloc.start()
    try:
        with pytest.raises(InputRejected, match="indexes 2 frames, the header 1000"):
            volume_from_datasets([loaded], "series x")
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 5_000_000, peak
    # without a Basic Offset Table: counted by fragments
    bare = _rle_dataset(1000, [b"\x00" * 64, b"\x00" * 64])
    bare.PixelData = encapsulate([b"\x00" * 64, b"\x00" * 64], has_bot=False)
    with pytest.raises(InputRejected, match="2 fragments for 1000 frames"):
        volume_from_datasets([bare], "series x")
    # a fragment's item tag overwritten (PS3.5 A.4: each fragment starts with (FFFE,E000))
    cut = _rle_dataset(1, [b"\x00" * 64])
    cut.PixelData = cut.PixelData[:12] + b"\x12\x34\x56\x78" + cut.PixelData[16:]
    with pytest.raises(InputRejected, match="compressed pixel data is damaged"):
        volume_from_datasets([cut], "series x")


def test_damaged_bits_allocated_refused_on_the_header(tmp_path: Path) -> None:
    ds = slice_dataset((0.0, 0.0, 0.0), rows=4, columns=5)
    ds.BitsAllocated = 0  # PS3.3 C.7.6.3.1.1: 1 or a multiple of 8
    record = read_record(_write(ds, tmp_path / "bits.dcm"))
    assert record.reason == "Bits Allocated is 0 (the header is damaged)"


def test_header_smaller_than_its_pixels_is_refused(tmp_path: Path) -> None:
    # Rows/Columns rewritten to 1 x 1 over a 64 x 64 image: PS3.5 8.1.1 says the value holds
    # Rows x Columns x Frames x Bits Allocated / 8 bytes (padded to even); a little more is let
    # pass (pydicom's MR_small_padded.dcm), 4096 times more is a damaged header
    paths = write_series(tmp_path / "a")
    for path in paths:
        ds = pydicom.dcmread(path)
        ds.Rows = ds.Columns = 1
        ds.save_as(path)
    records = [read_record(p) for p in paths]
    header = records[0].header
    assert header is not None
    with pytest.raises(InputRejected, match="8192 bytes, 2 expected for 1x1x1 at 16 bits"):
        load_series(Series(header, tuple(records)))


def test_worker_memory_limit_turns_a_big_allocation_into_a_clear_failure() -> None:
    code = (
        "import numpy as np\n"
        "from flairwatch.daemon.workers import classify, limit_memory\n"
        "limit_memory(1024)\n"
        "try:\n"
        "    np.ones((2048, 1024, 1024), dtype=np.uint8)\n"  # 2 GiB, over the 1 GiB cap
        "except MemoryError as exc:\n"
        "    print(classify(exc, 1024).message)\n"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], cwd=REPO, capture_output=True, text=True, timeout=120
    )
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip().startswith("out of memory: the series needs more than")
    assert "worker_memory_mb (1024 MiB)" in out.stdout
    report = classify(MemoryError())
    assert report.kind == "failed" and not report.transient


def test_worker_memory_setting() -> None:
    assert config_from_mapping({}).worker_memory_mb == 4096
    assert config_from_mapping({"worker_memory_mb": 0}).worker_memory_mb == 0
    with pytest.raises(Exception, match="worker_memory_mb"):
        config_from_mapping({"worker_memory_mb": -1})
    example = (REPO / "config.example.yaml").read_text(encoding="utf-8")
    assert "\nworker_memory_mb: 4096\n" in example


def test_oversized_file_refused_before_reading(tmp_path: Path) -> None:
    path = tmp_path / "sparse.dcm"
    with open(path, "wb") as fh:  # a sparse 3 GiB file: no disk used, nothing read
        fh.write(b"\0" * 128 + b"DICM")
        fh.truncate(3 * 1024**3)
    record = read_record(path)
    assert record.reason is not None and "over the 2 GiB limit" in record.reason
    assert np.isclose(record.size, 3 * 1024**3)


def test_damaged_value_length_reads_only_what_is_there(tmp_path: Path) -> None:
    # PS3.5 7.1.2: OW values carry a 4-byte length; 0xFFFFFFF0 declares almost 4 GiB
    paths = write_series(tmp_path / "a")
    data = paths[0].read_bytes()
    at = data.find(b"\xe0\x7f\x10\x00OW")
    assert at > 0
    paths[0].write_bytes(data[: at + 8] + b"\xf0\xff\xff\xff" + data[at + 12 :])
    records = [read_record(p) for p in paths]
    header = records[0].header
    assert header is not None  # the header before the pixels is intact
    tracemalloc.start()
    try:
        # the pixel data is the last element, so what is there is the whole image: it loads,
        # and the declared 4 GiB are never allocated
        volume = load_series(Series(header, tuple(records)))
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert volume.data.shape == (64, 64, 12)
    assert peak < 20_000_000, peak  # the series itself is about 100 kB
    # cut 100 bytes short as well: refused with the sizes
    paths[1].write_bytes(paths[0].read_bytes()[:-100])
    records = [read_record(p) for p in paths]
    with pytest.raises(InputRejected, match=r"pixel data is \d+ bytes, 8192 expected"):
        load_series(Series(header, tuple(r for r in records if r.header is not None)))


@pytest.mark.parametrize("across", [False, True])
def test_quarantine_move_only_of_the_file_scanned(tmp_path: Path, across: bool) -> None:
    inbox = tmp_path / "inbox"
    a, b = write_series(inbox / "s")[:2]
    if across:  # another file system (tmpfs), where a rename cannot work and a copy is made
        shm = Path("/dev/shm")
        if not shm.is_dir() or os.stat(shm).st_dev == os.stat(tmp_path).st_dev:
            pytest.skip("no second file system to move across")
        target = Path(tempfile.mkdtemp(dir=shm))
    else:
        target = tmp_path / "quarantine"
        target.mkdir()
    try:
        sa, sb = os.stat(a), os.stat(b)
        original = a.read_bytes()
        assert move_if_same(inbox, a, target / "a", sa.st_size, sa.st_mtime_ns,
                            (sa.st_dev, sa.st_ino))  # fmt: skip
        assert not a.exists() and (target / "a").read_bytes() == original
        assert os.stat(target / "a").st_mtime_ns == sa.st_mtime_ns
        b.write_bytes(b.read_bytes() + b"\0")  # rewritten after the scan: left where it is
        assert not move_if_same(inbox, b, target / "b", sb.st_size, sb.st_mtime_ns, None)
        assert b.exists() and not (target / "b").exists()
    finally:
        if across:
            shutil.rmtree(target)
