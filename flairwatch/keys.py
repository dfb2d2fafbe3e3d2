"""Short, filesystem-safe keys for result paths; never raw header text.

``subject_key`` is a keyed hash (HMAC-SHA256) of the Patient ID with a per-installation secret,
so the same participant maps to the same folder on one installation but cannot be looked up by
someone who lacks the secret. Study and series keys are plain short hashes of the UIDs.
"""

from __future__ import annotations

import hashlib
import hmac
import os
import secrets
from pathlib import Path

SECRET_FILE = "installation.key"
_KEY_HEX = 12


def load_or_create_secret(state_dir: Path) -> bytes:
    """Read the installation secret from ``state_dir``, creating it (mode 0600) on first use."""
    state_dir.mkdir(parents=True, exist_ok=True)
    path = state_dir / SECRET_FILE
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        data = path.read_bytes()
        if len(data) < 32:
            raise OSError(
                f"installation secret {path} is damaged; restore it from backup"
            ) from None
        return data
    data = secrets.token_bytes(32)
    with os.fdopen(fd, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    return data


def subject_key(patient_id: str | None, secret: bytes) -> str:
    """``s`` + 12 hex digits of HMAC-SHA256(secret, Patient ID); a missing ID hashes as ''."""
    mac = hmac.new(secret, (patient_id or "").encode("utf-8"), hashlib.sha256)
    return "s" + mac.hexdigest()[:_KEY_HEX]


def uid_key(uid: str, prefix: str) -> str:
    """``prefix`` + 12 hex digits of SHA-256 of a UID (or of a file's content hash)."""
    return prefix + hashlib.sha256(uid.encode("utf-8")).hexdigest()[:_KEY_HEX]


def study_key(study_uid: str) -> str:
    return uid_key(study_uid, "t")


def series_key(series_uid: str, revision: int = 1) -> str:
    """Series key; a revision after the first (a late instance) gets ``-r2``, ``-r3``..."""
    base = uid_key(series_uid, "e")
    return base if revision <= 1 else f"{base}-r{revision}"
