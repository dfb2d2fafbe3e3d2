"""Settings: loaded once from YAML into a frozen dataclass, validated, overridden by flags.

Every key is documented in ``config.example.yaml``. Errors name the key and say what to do.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any

import yaml

from flairwatch.errors import ConfigInvalid
from flairwatch.intake.select import SelectRules, rules_from_mapping

IDENTIFIER_FIELDS = ("patient_id", "patient_name", "dates")
IDENTIFIER_ACTIONS = ("keep", "pseudonymise", "drop")

DEFAULT_SETTLE_SECONDS = 30.0
DEFAULT_RESCAN_SECONDS = 300.0
DEFAULT_MIN_LESION_MM3 = 10.0
DEFAULT_CONNECTIVITY = 26
# lesion voxels this near the ventricles count as periventricular (common practice: 10 mm)
DEFAULT_PERIVENTRICULAR_MM = 10.0
DEFAULT_RETRY_SECONDS = 30.0
DEFAULT_OVERDUE_SECONDS = 600.0
DEFAULT_OVERDUE_FACTOR = 5.0
DEFAULT_WORKER_MEMORY_MB = 4096


def is_model_name(ref: str | Path) -> bool:
    """True for a bare model name (no folder part, no ``.yaml``/``.yml`` suffix), else a path.

    Names are looked up in the model search path (:mod:`flairwatch.engine.models`).
    """
    text = str(ref)
    return (
        text not in ("", ".", "..")
        and "/" not in text
        and os.sep not in text
        and not text.lower().endswith((".yaml", ".yml"))
    )


def model_reference(text: str, base_dir: Path | None) -> Path:
    """The ``model`` setting as a path: a name stays a bare name, a relative manifest path is
    taken relative to ``base_dir`` (the config file's folder)."""
    p = Path(text).expanduser()
    if is_model_name(text) or base_dir is None or p.is_absolute():
        return p
    return base_dir / p


def cpus_available() -> int:
    """CPUs this process may use: affinity mask, further limited by a cgroup v2 CPU quota."""
    n = len(os.sched_getaffinity(0))
    try:
        quota, period = Path("/sys/fs/cgroup/cpu.max").read_text(encoding="utf-8").split()[:2]
        if quota != "max":
            n = min(n, max(1, int(float(quota) / float(period))))
    except (OSError, ValueError):
        pass
    return max(1, n)


@dataclass(frozen=True)
class CanarySettings:
    """``canary:``: the daily self-check (:mod:`flairwatch.research.canary`).

    ``time`` is the local wall-clock time "HH:MM" of the daily run; ``min_dice`` the lowest
    Dice with the expected mask that passes; ``max_volume_change_percent`` the largest change
    of the WMH volume from the expected one, in % of the expected volume, that passes.
    """

    enabled: bool = True
    time: str = "03:00"
    min_dice: float = 0.999
    max_volume_change_percent: float = 0.5


@dataclass(frozen=True)
class LongitudinalSettings:
    """``longitudinal:``: ``export --longitudinal`` flags a later scan whose WMH volume drops
    by more than ``drop_percent`` % of the previous scan's and by more than ``drop_ml`` mL."""

    drop_percent: float = 20.0
    drop_ml: float = 1.0


@dataclass(frozen=True)
class Identifiers:
    """What summaries and exports do with each identifier: keep, pseudonymise or drop."""

    patient_id: str = "pseudonymise"
    patient_name: str = "drop"
    dates: str = "keep"


@dataclass(frozen=True)
class OutputSettings:
    """``outputs:``: DICOM SEG / SR per result; ``identifiers``: ``copy`` the scan's patient
    data into them (archives file them with the scan) or ``follow`` the ``identifiers`` key."""

    segmentation: bool = True
    measurements: bool = True  # the SR references the SEG, so it needs segmentation
    identifiers: str = "copy"


@dataclass(frozen=True)
class ReviewSettings:
    """``review:``: where ``flairwatch review`` listens (README, "Reviewing results in the browser").

    ``port`` 0 takes a free port at start. Off the loopback address, TLS (``tls_cert`` and
    ``tls_key``, PEM files) is required; ``password`` lets reviewers log in without the token.
    """

    address: str = "127.0.0.1"
    port: int = 0
    password: str | None = None
    tls_cert: Path | None = None
    tls_key: Path | None = None


REVIEW_KEYS = ("address", "port", "password", "tls_cert", "tls_key")

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


@dataclass(frozen=True)
class Config:
    inbox: Path | None = None
    results: Path | None = None
    state: Path | None = None
    quarantine: Path | None = None
    settle_seconds: float = DEFAULT_SETTLE_SECONDS
    rescan_seconds: float = DEFAULT_RESCAN_SECONDS
    polling: bool = False
    workers: int = 1
    threads: int = 0  # 0 = the CPUs this process may use, divided among workers
    model: Path | None = None  # manifest path or model name; None = the default model
    threshold: float | None = None  # None = the manifest's
    min_lesion_mm3: float = DEFAULT_MIN_LESION_MM3
    connectivity: int = DEFAULT_CONNECTIVITY
    periventricular_mm: float = DEFAULT_PERIVENTRICULAR_MM
    select: SelectRules = field(default_factory=lambda: rules_from_mapping(None))
    identifiers: Identifiers = field(default_factory=Identifiers)
    outputs: OutputSettings = field(default_factory=OutputSettings)
    delete_inbox_files: bool = False
    keep_versions: int = 0  # 0 = keep every model version's results
    retry_seconds: float = DEFAULT_RETRY_SECONDS  # first retry after a failure; then doubled
    overdue_seconds: float = DEFAULT_OVERDUE_SECONDS  # status: a job running longer than
    overdue_factor: float = DEFAULT_OVERDUE_FACTOR  # max(these s, factor x median) is a problem
    worker_memory_mb: int = DEFAULT_WORKER_MEMORY_MB  # address-space cap per worker; 0 = none
    canary: CanarySettings = field(default_factory=CanarySettings)
    longitudinal: LongitudinalSettings = field(default_factory=LongitudinalSettings)
    review: ReviewSettings = field(default_factory=ReviewSettings)
    send: SendSettings | None = None  # None: results go nowhere
    receive: ReceiveSettings | None = None  # None: no Store SCP

    def threads_per_worker(self) -> int:
        if self.threads > 0:
            return self.threads
        return max(1, cpus_available() // max(1, self.workers))


_PATH_KEYS = ("inbox", "results", "state", "quarantine")


def _number(key: str, value: Any, *, lo: float, hi: float | None = None) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ConfigInvalid(f"config key '{key}' must be a number, got {value!r}")
    if value < lo or (hi is not None and value > hi):
        rng = f">= {lo}" if hi is None else f"between {lo} and {hi}"
        raise ConfigInvalid(f"config key '{key}' must be {rng}, got {value!r}")
    return float(value)


def _flag(key: str, value: Any) -> bool:
    if not isinstance(value, bool):
        raise ConfigInvalid(f"config key '{key}' must be true or false, got {value!r}")
    return value


def _identifiers(raw: Any) -> Identifiers:
    if raw is None:
        return Identifiers()
    if not isinstance(raw, Mapping):
        raise ConfigInvalid("config key 'identifiers' must be a mapping like {patient_id: drop}")
    unknown = set(raw) - set(IDENTIFIER_FIELDS)
    if unknown:
        raise ConfigInvalid(
            f"config key 'identifiers' has unknown entries {sorted(unknown)}; "
            f"use {', '.join(IDENTIFIER_FIELDS)}"
        )
    for k, v in raw.items():
        if v not in IDENTIFIER_ACTIONS:
            raise ConfigInvalid(
                f"config key 'identifiers.{k}' must be one of {', '.join(IDENTIFIER_ACTIONS)}, got {v!r}"
            )
    return Identifiers(**dict(raw))


def _outputs(raw: Any) -> OutputSettings:
    keys = ("segmentation", "measurements", "identifiers")
    if raw is None:
        return OutputSettings()
    if not isinstance(raw, Mapping) or set(raw) - set(keys):
        raise ConfigInvalid(f"config key 'outputs' must be a mapping of {', '.join(keys)}")
    out = OutputSettings(**{k: _flag(f"outputs.{k}", raw[k]) for k in keys[:2] if k in raw},
                         identifiers=raw.get("identifiers", "copy"))  # fmt: skip
    if out.identifiers not in ("copy", "follow"):
        raise ConfigInvalid(f"config key 'outputs.identifiers' must be copy or follow, got "
                            f"{out.identifiers!r}")  # fmt: skip
    if out.measurements and not out.segmentation:
        raise ConfigInvalid("config key 'outputs.measurements' needs 'outputs.segmentation' "
                            "(the SR references the SEG); turn both off or keep segmentation")  # fmt: skip
    return out


def _review(raw: Any, base_dir: Path | None) -> ReviewSettings:
    if raw is None:
        return ReviewSettings()
    if not isinstance(raw, Mapping):
        raise ConfigInvalid("config key 'review' must be a mapping like {address: 127.0.0.1}")
    unknown = set(raw) - set(REVIEW_KEYS)
    if unknown:
        raise ConfigInvalid(
            f"config key 'review' has unknown entries {sorted(unknown)}; use {', '.join(REVIEW_KEYS)}"
        )
    values: dict[str, Any] = {}
    for key in ("address", "password"):
        v = raw.get(key)
        if v in (None, ""):
            continue
        if not isinstance(v, str):
            raise ConfigInvalid(f"config key 'review.{key}' must be text, got a {type(v).__name__}")
        values[key] = v
    port = raw.get("port")
    if port not in (None, ""):
        if isinstance(port, bool) or not isinstance(port, int) or not 0 <= port <= 65535:
            raise ConfigInvalid(f"config key 'review.port' must be 0 to 65535, got {port!r}")
        values["port"] = port
    for key in ("tls_cert", "tls_key"):
        v = raw.get(key)
        if v in (None, ""):
            continue
        if not isinstance(v, str):
            raise ConfigInvalid(f"config key 'review.{key}' must be a path, got {v!r}")
        p = Path(v).expanduser()
        values[key] = base_dir / p if base_dir is not None and not p.is_absolute() else p
    if ("tls_cert" in values) != ("tls_key" in values):
        raise ConfigInvalid(
            "config keys 'review.tls_cert' and 'review.tls_key' go together; set both"
        )
    return ReviewSettings(**values)


def _section(key: str, raw: Any, names: tuple[str, ...]) -> Mapping[str, Any]:
    if raw is None:
        return {}
    if not isinstance(raw, Mapping):
        raise ConfigInvalid(f"config key '{key}' must be a mapping like {{{names[0]}: ...}}")
    unknown = set(raw) - set(names)
    if unknown:
        raise ConfigInvalid(
            f"config key '{key}' has unknown entries {sorted(unknown)}; use {', '.join(names)}"
        )
    return raw


def _canary(raw: Any) -> CanarySettings:
    given = _section("canary", raw, ("enabled", "time", "min_dice", "max_volume_change_percent"))
    values: dict[str, Any] = {}
    if "enabled" in given:
        values["enabled"] = _flag("canary.enabled", given["enabled"])
    if "time" in given:
        hh, sep, mm = str(given["time"]).partition(":")
        if not (sep and hh.isdigit() and mm.isdigit() and int(hh) < 24 and int(mm) < 60):
            raise ConfigInvalid(
                "config key 'canary.time' must be a local time HH:MM in quotes, such as "
                f'"03:00", got {given["time"]!r}'
            )
        values["time"] = f"{int(hh):02d}:{int(mm):02d}"
    if "min_dice" in given:
        values["min_dice"] = _number("canary.min_dice", given["min_dice"], lo=0.0, hi=1.0)
    if "max_volume_change_percent" in given:
        values["max_volume_change_percent"] = _number(
            "canary.max_volume_change_percent", given["max_volume_change_percent"], lo=0.0
        )
    return CanarySettings(**values)


def _longitudinal(raw: Any) -> LongitudinalSettings:
    given = _section("longitudinal", raw, ("drop_percent", "drop_ml"))
    return LongitudinalSettings(
        **{k: _number(f"longitudinal.{k}", v, lo=0.0) for k, v in given.items()}
    )


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
    given = _section(key, raw, ("name", "ae_title", "host", "port", "objects"))
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


def _send(raw: Any) -> SendSettings:
    names = ("nodes", "ae_title", "retry_seconds", "retry_max_seconds", "give_up_days")
    given = _section("send", raw, names)
    if not isinstance(given.get("nodes"), list) or not given["nodes"]:
        raise ConfigInvalid(
            "config key 'send.nodes' must list nodes like "
            "[{name: archive, ae_title: ARCHIVE, host: 192.0.2.10, port: 104}]"
        )
    nodes = tuple(_send_node(f"send.nodes[{i}]", n) for i, n in enumerate(given["nodes"]))
    if len({n.name for n in nodes}) < len(nodes):
        raise ConfigInvalid("config key 'send.nodes' names a node twice; give each its own name")
    values: dict[str, Any] = {
        k: _number(f"send.{k}", given[k], lo=0) for k in names[2:] if k in given
    }
    if "ae_title" in given:
        values["ae_title"] = _text("send.ae_title", given["ae_title"], ae=True)
    return SendSettings(nodes, **values)


def _receive(raw: Any) -> ReceiveSettings:
    names = ("ae_title", "port", "allow", "address", "max_associations", "max_instance_mb")
    given = _section("receive", raw, names)
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


def config_from_mapping(raw: Mapping[str, Any], *, base_dir: Path | None = None) -> Config:
    """Validate a parsed YAML mapping; relative paths are taken relative to ``base_dir``."""
    known = {f.name for f in fields(Config)}
    unknown = set(raw) - known
    if unknown:
        raise ConfigInvalid(
            f"unknown config key(s) {', '.join(sorted(unknown))}; see config.example.yaml"
        )
    values: dict[str, Any] = {}
    for key in _PATH_KEYS:
        v = raw.get(key)
        if v in (None, ""):
            continue
        if not isinstance(v, str):
            raise ConfigInvalid(f"config key '{key}' must be a path, got {v!r}")
        p = Path(v).expanduser()
        if base_dir is not None and not p.is_absolute():
            p = base_dir / p
        values[key] = p
    if raw.get("model") not in (None, ""):
        if not isinstance(raw["model"], str):
            raise ConfigInvalid(
                f"config key 'model' must be a manifest path or a model name, got {raw['model']!r}"
            )
        values["model"] = model_reference(raw["model"], base_dir)
    if "settle_seconds" in raw:
        values["settle_seconds"] = _number("settle_seconds", raw["settle_seconds"], lo=0)
    if "rescan_seconds" in raw:
        values["rescan_seconds"] = _number("rescan_seconds", raw["rescan_seconds"], lo=1)
    for key, lo in (("retry_seconds", 0.0), ("overdue_seconds", 1.0), ("overdue_factor", 1.0)):
        if key in raw:
            values[key] = _number(key, raw[key], lo=lo)
    for key in ("polling", "delete_inbox_files"):
        if key in raw:
            values[key] = _flag(key, raw[key])
    for key, lo in (("workers", 1), ("threads", 0), ("keep_versions", 0), ("worker_memory_mb", 0)):
        if key in raw:
            v = raw[key]
            if isinstance(v, bool) or not isinstance(v, int) or v < lo:
                raise ConfigInvalid(f"config key '{key}' must be a whole number >= {lo}, got {v!r}")
            values[key] = v
    if raw.get("threshold") not in (None, ""):
        values["threshold"] = _number("threshold", raw["threshold"], lo=0.0, hi=1.0)
    if "min_lesion_mm3" in raw:
        values["min_lesion_mm3"] = _number("min_lesion_mm3", raw["min_lesion_mm3"], lo=0)
    if "periventricular_mm" in raw:
        values["periventricular_mm"] = _number(
            "periventricular_mm", raw["periventricular_mm"], lo=0
        )
    if "connectivity" in raw:
        if raw["connectivity"] not in (6, 18, 26):
            raise ConfigInvalid(
                f"config key 'connectivity' must be 6, 18 or 26, got {raw['connectivity']!r}"
            )
        values["connectivity"] = int(raw["connectivity"])
    if "select" in raw:
        values["select"] = rules_from_mapping(raw["select"])
    if "identifiers" in raw:
        values["identifiers"] = _identifiers(raw["identifiers"])
    if "outputs" in raw:
        values["outputs"] = _outputs(raw["outputs"])
    if "review" in raw:
        values["review"] = _review(raw["review"], base_dir)
    if "canary" in raw:
        values["canary"] = _canary(raw["canary"])
    if "longitudinal" in raw:
        values["longitudinal"] = _longitudinal(raw["longitudinal"])
    if raw.get("send") is not None:
        values["send"] = _send(raw["send"])
    if raw.get("receive") is not None:
        values["receive"] = _receive(raw["receive"])
    return Config(**values)


def load_config(path: Path | None) -> Config:
    """Read a YAML config file (None = all defaults)."""
    if path is None:
        return Config()
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigInvalid(f"cannot read config file {path}: {exc.strerror}") from None
    try:
        raw = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise ConfigInvalid(f"config file {path} is not valid YAML: {exc}") from None
    if raw is None:
        raw = {}
    if not isinstance(raw, Mapping):
        raise ConfigInvalid(f"config file {path} must hold a mapping of keys to values")
    return config_from_mapping(raw, base_dir=Path(path).resolve().parent)


def with_overrides(cfg: Config, **flags: Any) -> Config:
    """Command-line flags beat the file: every flag that is not None replaces its key."""
    given = {k: v for k, v in flags.items() if v is not None}
    if not given:
        return cfg
    merged = config_from_mapping(
        {k: (str(v) if isinstance(v, Path) else v) for k, v in given.items()}
    )
    return replace(cfg, **{k: getattr(merged, k) for k in given})
