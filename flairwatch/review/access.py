"""Who may use the review application, and which names it accepts: pure checks, no Flask.

The application is reached with a random token (:func:`new_token`) printed at start; the first
visit with ``?token=...`` leaves it in a cookie. With ``review.password`` set, a reviewer may log
in with the password instead. Either secret gives full access, so neither may cross a network in
clear text: off the loopback address the settings must name a TLS certificate and key
(:func:`check_serving`), or the application stays on 127.0.0.1 behind an SSH tunnel.

Series keys arrive in URLs; only the key shapes flairwatch itself makes pass
:func:`is_series_key`, so no URL text ever reaches a file path or a query unchecked.
"""

from __future__ import annotations

import hmac
import ipaddress
import re
import secrets

from flairwatch.config import ReviewSettings
from flairwatch.errors import ConfigInvalid

TOKEN_BYTES = 24  # 32 URL-safe characters, 192 bits
# series keys are "e" + 12 hex digits, "-rN" for a later revision (flairwatch.keys)
_SERIES_KEY = re.compile(r"e[0-9a-f]{12}(-r[0-9]{1,4})?")
MAX_NAME = 64
MAX_NOTE = 2000


def new_token() -> str:
    """A fresh random access token (URL-safe text) for one run of the application."""
    return secrets.token_urlsafe(TOKEN_BYTES)


def secret_matches(given: str | None, expected: str | None) -> bool:
    """Whether ``given`` equals ``expected``, compared in constant time; None never matches."""
    if not given or not expected:
        return False
    return hmac.compare_digest(given.encode("utf-8"), expected.encode("utf-8"))


def is_loopback(address: str) -> bool:
    """Whether ``address`` is this machine only (127.0.0.0/8, ::1 or 'localhost')."""
    if address == "localhost":
        return True
    try:
        return ipaddress.ip_address(address).is_loopback
    except ValueError:
        return False


def check_serving(settings: ReviewSettings) -> None:
    """Refuse settings that would send the token or password in clear text over a network.

    Raises ConfigInvalid with one line saying what to set. A password alone, or any address
    other than the loopback address, needs ``tls_cert`` and ``tls_key``.
    """
    tls = settings.tls_cert is not None and settings.tls_key is not None
    if tls:
        for path in (settings.tls_cert, settings.tls_key):
            assert path is not None
            if not path.is_file():
                raise ConfigInvalid(
                    f"review TLS file {path} not found; check review.tls_cert/tls_key"
                )
        return
    if not is_loopback(settings.address):
        what = "a password" if settings.password else "the access token"
        raise ConfigInvalid(
            f"review address {settings.address} is not loopback and {what} would travel in clear "
            "text: set review.tls_cert and review.tls_key, or keep 127.0.0.1 and use an SSH tunnel"
        )


def is_series_key(text: str) -> bool:
    """Whether ``text`` has the shape of a flairwatch series key (nothing else is looked up)."""
    return _SERIES_KEY.fullmatch(text) is not None


def clean_name(text: str | None) -> str | None:
    """A reviewer's name as typed, trimmed; None when empty, too long or not printable."""
    name = (text or "").strip()
    if not name or len(name) > MAX_NAME or not name.isprintable():
        return None
    return name


def clean_note(text: str | None) -> str | None:
    """A decision's note, trimmed ('' when none); None when too long to be a note."""
    note = (text or "").strip()
    if len(note) > MAX_NOTE:
        return None
    return "".join(ch if ch.isprintable() or ch in "\n\t" else " " for ch in note)
