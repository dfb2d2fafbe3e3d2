"""Config sections of DICOM network transfer: ``send:`` (results to DICOM nodes) and ``receive:``.

Read by :mod:`flairwatch.network`; AE titles follow DICOM PS3.5 section 6.2.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from flairwatch.config.checks import number, section
from flairwatch.errors import ConfigInvalid

SEND_OBJECTS = ("segmentation", "measurements")  # segmentation.dcm, measurements.dcm


@dataclass(frozen=True)
class SendNode:
    """A DICOM node in ``send.nodes``: C-STORE to ``ae_title`` at ``host``:``port`` of ``objects``."""

    name: str
    ae_title: str
    host: str
    port: int
    objects: tuple[str, ...] = SEND_OBJECTS


@dataclass(frozen=True)
class SendSettings:
    """``send:`` (:mod:`flairwatch.network.send`): ``ae_title`` is our calling AE title; a failed
    send is tried again after ``retry_seconds``, then twice as long each time up to
    ``retry_max_seconds``, and given up ``give_up_days`` after it entered the outbox."""

    nodes: tuple[SendNode, ...]
    ae_title: str = "FLAIRWATCH"
    retry_seconds: float = 60.0
    retry_max_seconds: float = 3600.0
    give_up_days: float = 7.0


@dataclass(frozen=True)
class ReceiveSettings:
    """``receive:`` (:mod:`flairwatch.network.receive`): the Store SCP answers as ``ae_title`` on
    ``address``:``port``, only to calling AE titles in ``allow``, at most ``max_associations`` at
    once and ``max_instance_mb`` MiB per instance."""

    ae_title: str
    port: int
    allow: tuple[str, ...]
    address: str = "127.0.0.1"
    max_associations: int = 4
    max_instance_mb: int = 2048


def _text(key: str, value: Any, *, ae: bool = False) -> str:
    """Non-empty text; ``ae``: an AE title (PS3.5 6.2: at most 16 characters, no backslash)."""
    text = value.strip() if isinstance(value, str) else ""
    if not text or (ae and (len(text) > 16 or "\\" in text or not text.isprintable())):
        what = "an AE title of 1 to 16 characters, no backslash" if ae else "non-empty text"
        raise ConfigInvalid(f"config key '{key}' must be {what}, got {value!r}")
    return text


def _whole(key: str, value: Any, lo: int, hi: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not lo <= value <= hi:
        raise ConfigInvalid(f"config key '{key}' must be a whole number {lo}-{hi}, got {value!r}")
    return value


def _needs(key: str, given: Mapping[str, Any], names: tuple[str, ...]) -> None:
    if missing := [n for n in names if given.get(n) in (None, "")]:
        raise ConfigInvalid(f"config key '{key}' lacks {', '.join(missing)}; add them")


def _send_node(key: str, raw: Any) -> SendNode:
    given = section(key, raw, ("name", "ae_title", "host", "port", "objects"))
    _needs(key, given, ("name", "ae_title", "host", "port"))
    name = _text(f"{key}.name", given["name"])
    if not name.replace("-", "").replace("_", "").replace(".", "").isalnum() or len(name) > 64:
        raise ConfigInvalid(f"config key '{key}.name' must be letters, digits, -_. , got {name!r}")
    objects = given.get("objects", list(SEND_OBJECTS))
    if not isinstance(objects, list) or not objects or not set(objects) <= set(SEND_OBJECTS):
        raise ConfigInvalid(
            f"config key '{key}.objects' must list some of {', '.join(SEND_OBJECTS)}, got {objects!r}"
        )
    return SendNode(
        name, _text(f"{key}.ae_title", given["ae_title"], ae=True), _text(f"{key}.host", given["host"]),
        _whole(f"{key}.port", given["port"], 1, 65535), tuple(dict.fromkeys(objects)),
    )  # fmt: skip


def send_section(raw: Any) -> SendSettings:
    names = ("nodes", "ae_title", "retry_seconds", "retry_max_seconds", "give_up_days")
    given = section("send", raw, names)
    if not isinstance(given.get("nodes"), list) or not given["nodes"]:
        raise ConfigInvalid(
            "config key 'send.nodes' must list nodes like "
            "[{name: archive, ae_title: ARCHIVE, host: 192.0.2.10, port: 104}]"
        )
    nodes = tuple(_send_node(f"send.nodes[{i}]", n) for i, n in enumerate(given["nodes"]))
    if len({n.name for n in nodes}) < len(nodes):
        raise ConfigInvalid("config key 'send.nodes' names a node twice; give each its own name")
    values: dict[str, Any] = {
        k: number(f"send.{k}", given[k], lo=0) for k in names[2:] if k in given
    }
    if "ae_title" in given:
        values["ae_title"] = _text("send.ae_title", given["ae_title"], ae=True)
    return SendSettings(nodes, **values)


def receive_section(raw: Any) -> ReceiveSettings:
    names = ("ae_title", "port", "allow", "address", "max_associations", "max_instance_mb")
    given = section("receive", raw, names)
    _needs("receive", given, names[:3])
    allow = given["allow"]
    if not isinstance(allow, list) or not allow:
        raise ConfigInvalid(f"config key 'receive.allow' must list calling AE titles: {allow!r}")
    values: dict[str, Any] = {
        k: _whole(f"receive.{k}", given[k], 1, 1 << 20) for k in names[4:] if k in given
    }
    if "address" in given:
        values["address"] = _text("receive.address", given["address"])
    return ReceiveSettings(
        _text("receive.ae_title", given["ae_title"], ae=True),
        _whole("receive.port", given["port"], 1, 65535),
        tuple(_text(f"receive.allow[{i}]", a, ae=True) for i, a in enumerate(allow)),
        **values,
    )
