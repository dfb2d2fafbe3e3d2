"""Malformed inbox files for scripts/bench_junk.py and tests/test_junk.py.

Every junk group is a few slices of a good FLAIR series (new UIDs, so each group is its own
series) spoiled one way; the ways follow the DICOM standard's encoding (PS3.5: explicit VR
little endian element layout, section 7.1.2; encapsulation, section A.4) and the attributes of
the image pixel module (PS3.3 C.7.6.3). Plain junk and non-image objects are added, and
symbolic links that a walk must not follow.
"""

from __future__ import annotations

import io
import random
import struct
import warnings
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import pydicom
from pydicom.dataset import Dataset
from pydicom.encaps import encapsulate
from pydicom.uid import JPEG2000Lossless, JPEGBaseline8Bit, RLELossless, generate_uid

PYDICOM_FILES = Path(pydicom.__file__).parent / "data" / "test_files"
NON_IMAGES = (  # files that pydicom ships: a media directory, a report, a dose grid
    "dicomdirtests/DICOMDIR",
    "dicomdirtests/DICOMDIR-implicit",
    "test-SR.dcm",
    "rtdose_rle_1frame.dcm",
    "rtplan.dcm",
)
GROUP = 3  # slices per junk series


@dataclass(frozen=True)
class Junk:
    kind: str
    paths: tuple[Path, ...]


def _fresh(template: list[Path], n: int = GROUP) -> list[Dataset]:
    """``n`` slices of the template series under new Study, Series and SOP Instance UIDs."""
    study, series = generate_uid(), generate_uid()
    out: list[Dataset] = []
    for path in template[:n]:
        ds = pydicom.dcmread(path)
        ds.StudyInstanceUID, ds.SeriesInstanceUID = study, series
        ds.SOPInstanceUID = ds.file_meta.MediaStorageSOPInstanceUID = generate_uid()
        out.append(ds)
    return out


def _bytes(ds: Dataset) -> bytes:
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # invalid values on purpose
        ds.save_as(buf, enforce_file_format=True)
    return buf.getvalue()


def _patch_length(data: bytes, tag_vr: bytes, new: int) -> bytes:
    """Overwrite the value length of the first element starting with ``tag_vr`` (PS3.5 7.1.2)."""
    at = data.find(tag_vr)
    if at < 0:
        return data[: len(data) // 3]
    if tag_vr[4:6] in (b"OB", b"OW", b"OF", b"SQ", b"UT", b"UN"):
        return data[: at + 8] + struct.pack("<I", new & 0xFFFFFFFF) + data[at + 12 :]
    return data[: at + 6] + struct.pack("<H", new & 0xFFFF) + data[at + 8 :]


ROWS, PIXELS, DESCR, IPP = (
    b"\x28\x00\x10\x00US",
    b"\xe0\x7f\x10\x00OW",
    b"\x08\x00\x3e\x10LO",
    b"\x20\x00\x32\x00DS",
)
LENGTHS: tuple[tuple[bytes, Callable[[int], int]], ...] = (
    (ROWS, lambda n: 4),
    (ROWS, lambda n: 0xFFFF),
    (PIXELS, lambda n: 0xFFFFFFF0),  # and the file cut short (below): 4 GiB declared, less there
    (PIXELS, lambda n: n // 2),
    (PIXELS, lambda n: 8192 - 7),  # 7 bytes short of a 64 x 64 x 16-bit image, odd
    (DESCR, lambda n: 0xFFF0),
    (IPP, lambda n: 3),
)


def _dims(ds: Dataset, variant: int) -> None:
    v = variant % 7
    if v == 0:
        ds.Rows = ds.Columns = 60000
    elif v == 1:
        ds.Rows = 0
    elif v == 2:
        ds.Columns = 0
    elif v == 3:
        ds.NumberOfFrames = 100000
    elif v == 4:
        ds.Rows, ds.Columns, ds.NumberOfFrames = 4096, 4096, 1000
    elif v == 5:
        ds.BitsAllocated = 0
    else:
        ds.Rows, ds.Columns = 1, 1


def _spacing(group: list[Dataset], variant: int) -> None:
    v = variant % 6
    for n, ds in enumerate(group):
        if v == 0:
            ds.PixelSpacing = ["nan", "nan"]
        elif v == 1:
            ds.PixelSpacing = [0, 0]
        elif v == 2:
            ds.PixelSpacing = [-1, 1]
        elif v == 3:
            ds.ImagePositionPatient = ["nan", "0", str(n)]
        elif v == 4:
            ds.ImagePositionPatient = [0, 0, 0]  # every slice in one place
        else:
            ds.ImageOrientationPatient = [0, 0, 0, 0, 0, 0]


def _compressed(ds: Dataset, variant: int, rng: random.Random) -> None:
    v = variant % 5
    garbage = bytes(rng.getrandbits(8) for _ in range(256))
    ds.file_meta.TransferSyntaxUID = (RLELossless, RLELossless, RLELossless, JPEGBaseline8Bit,
                                      JPEG2000Lossless)[v]  # fmt: skip
    if v == 1:  # two frames declared, one fragment
        ds.NumberOfFrames = 2
        ds.PixelData = encapsulate([garbage], has_bot=False)
    elif v == 2:  # an item tag overwritten
        data = encapsulate([garbage])
        ds.PixelData = data[:12] + b"\x12\x34\x56\x78" + data[16:]
    else:  # well-formed items holding garbage (an RLE header pointing past the end, too)
        payload = struct.pack("<16I", 1, 0xFFFFFF00, *([0] * 14)) + garbage if v == 0 else garbage
        ds.PixelData = encapsulate([payload])
    ds["PixelData"].VR = "OB"


def _plain(rng: random.Random, n: int) -> tuple[str, bytes]:
    v = n % 6
    if v == 0:
        return f"empty{n}", b""
    if v == 1:
        return f"noise{n}.dcm", bytes(rng.getrandbits(8) for _ in range(4096))
    if v == 2:
        return f"notes{n}.txt", b"scan notes\n" * 50
    if v == 3:
        return f"brain{n}.nii.gz", b"\x1f\x8b" + bytes(rng.getrandbits(8) for _ in range(300))
    if v == 4:  # a preamble and magic, then nothing usable
        return f"magic{n}", b"\0" * 128 + b"DICM" + b"\x02\x00\x10\x00UI\xff\xff"
    return f"archive{n}.zip", b"PK\x03\x04" + bytes(rng.getrandbits(8) for _ in range(200))


def _groups(
    template: list[Path], rng: random.Random, cuts: int
) -> Iterator[tuple[str, list[tuple[str, bytes]]]]:
    """Junk groups, round robin over the kinds, forever."""
    n = 0
    while True:
        n += 1
        files: list[tuple[str, bytes]] = []
        group = _fresh(template)
        kind = ("cut", "cut", "length", "dimensions", "spacing", "compressed", "plain",
                "non-image")[n % 8]  # fmt: skip
        if kind == "cut":
            for k, ds in enumerate(group):
                data = _bytes(ds)
                frac = ((n * GROUP + k) * 0.6180339887) % 1.0  # spread over the whole file
                files.append((f"cut{n}_{k}.dcm", data[: int(frac * len(data))]))
        elif kind == "length":
            tag_vr, length = LENGTHS[n % len(LENGTHS)]
            for k, ds in enumerate(group):
                data = _bytes(ds)
                bad = _patch_length(data, tag_vr, length(len(data)))
                if length(0) == 0xFFFFFFF0:
                    bad = bad[:-1000]
                files.append((f"len{n}_{k}.dcm", bad))
        elif kind == "dimensions":
            for k, ds in enumerate(group):
                _dims(ds, n // 8)
                files.append((f"dim{n}_{k}.dcm", _bytes(ds)))
        elif kind == "spacing":
            _spacing(group, n // 8)
            files = [(f"spc{n}_{k}.dcm", _bytes(ds)) for k, ds in enumerate(group)]
        elif kind == "compressed":
            for k, ds in enumerate(group):
                _compressed(ds, n // 8, rng)
                files.append((f"rle{n}_{k}.dcm", _bytes(ds)))
        elif kind == "plain":
            files = [_plain(rng, n * GROUP + k) for k in range(GROUP)]
        else:
            name = NON_IMAGES[(n // 8) % len(NON_IMAGES)]
            files = [(f"{Path(name).name}_{n}", (PYDICOM_FILES / name).read_bytes())]
        yield kind, files


def make_junk(
    folder: Path, template: list[Path], n_files: int, *, outside: Path, seed: int = 1
) -> tuple[list[Junk], list[Path]]:
    """Write about ``n_files`` junk files under ``folder`` (plus links); returns the groups
    and the files a caller should keep rewriting while the daemon reads ("changing")."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # pydicom warns about the invalid values set on purpose
        return _make_junk(folder, template, n_files, outside, seed)


def _make_junk(
    folder: Path, template: list[Path], n_files: int, outside: Path, seed: int
) -> tuple[list[Junk], list[Path]]:
    rng = random.Random(seed)
    junk: list[Junk] = []
    written = 0
    groups = _groups(template, rng, n_files)
    changing: list[Path] = []
    while written < n_files:
        kind, files = next(groups)
        if written % 50 == 0:  # some good-looking series that keep changing, then end cut
            kind, files = "changing", [(f"chg{written}_{k}.dcm", _bytes(ds))
                                       for k, ds in enumerate(_fresh(template))]  # fmt: skip
        sub = folder / f"g{len(junk):04d}"
        sub.mkdir(parents=True, exist_ok=True)
        paths = []
        for name, data in files[: n_files - written]:
            (sub / name).write_bytes(data)
            paths.append(sub / name)
        if kind == "changing":
            changing.extend(paths)
        junk.append(Junk(kind, tuple(paths)))
        written += len(paths)
    # links a walk must not follow: loops, a folder and a file outside the inbox
    outside.mkdir(parents=True, exist_ok=True)
    stranger = _fresh(template, 2)
    for k, ds in enumerate(stranger):
        (outside / f"stranger{k}.dcm").write_bytes(_bytes(ds))
    inbox = folder.parent
    (folder / "loop_to_inbox").symlink_to(inbox, target_is_directory=True)
    (folder / "loop_to_self").symlink_to(folder, target_is_directory=True)
    (folder / "to_outside").symlink_to(outside, target_is_directory=True)
    (folder / "file_outside.dcm").symlink_to(outside / "stranger0.dcm")
    (folder / "dangling.dcm").symlink_to(outside / "missing.dcm")
    return junk, changing
