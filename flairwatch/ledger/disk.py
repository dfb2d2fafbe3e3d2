"""Whether a folder is on a local disk: the ledger's WAL mode needs one (sqlite.org/wal.html)."""

from __future__ import annotations

from pathlib import Path

from flairwatch.errors import ConfigInvalid

# WAL needs a shared-memory index that these cannot give (sqlite.org/wal.html, howtocorrupt.html)
NETWORK_FS_TYPES = frozenset(
    {"nfs", "nfs4", "cifs", "smb", "smb2", "smb3", "smbfs", "afs", "9p", "ceph", "glusterfs",
     "lustre", "gpfs", "fuse.sshfs", "fuse.glusterfs", "fuse.cephfs", "davfs", "fuse.davfs2"}
)  # fmt: skip


def mount_fstype(path: Path, mountinfo: str) -> str:
    """File-system type of the mount holding ``path`` (already resolved), from mountinfo text.

    Format per proc(5): field 5 is the mount point (octal escapes for blanks), then optional
    fields up to ``-``, then the file-system type. The longest matching mount point wins.
    """
    best, best_type = "", "unknown"
    target = str(path)
    for line in mountinfo.splitlines():
        parts = line.split()
        if len(parts) < 7 or "-" not in parts[6:]:
            continue
        point = parts[4].encode().decode("unicode_escape")
        fstype = parts[parts.index("-", 6) + 1]
        inside = target == point or target.startswith(point.rstrip("/") + "/")
        if inside and len(point) >= len(best):
            best, best_type = point, fstype
    return best_type


def check_local_disk(folder: Path, mountinfo: str | None = None) -> None:
    """Refuse a state folder on a network file system (raises ConfigInvalid)."""
    if mountinfo is None:
        try:
            mountinfo = Path("/proc/self/mountinfo").read_text(encoding="utf-8")
        except OSError:
            return  # not Linux: nothing to check against
    fstype = mount_fstype(folder.resolve(), mountinfo)
    if fstype in NETWORK_FS_TYPES or fstype.startswith("nfs"):
        raise ConfigInvalid(
            f"state folder {folder} is on a network file system ({fstype}); "
            "put 'state' on a local disk (the ledger's WAL mode needs one)"
        )
