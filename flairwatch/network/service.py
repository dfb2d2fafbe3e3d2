"""One process for all DICOM network traffic: the Store SCP and the sender loop together.

``flairwatch receive`` runs this, so one systemd unit (``deploy/flairwatch-network.service``)
holds every network connection and the daemon keeps none. The receiver answers in pynetdicom's
threads; the sender runs in a thread of its own with its own ledger connection.
"""

from __future__ import annotations

import logging
import threading
from pathlib import Path

from flairwatch.config import Config
from flairwatch.errors import ConfigInvalid
from flairwatch.network.receive import Receiver
from flairwatch.network.send import DEFAULT_INTERVAL_S, DEFAULT_TIMEOUT_S, run_sender

log = logging.getLogger(__name__)


def check(cfg: Config) -> None:
    """Refuse a config that gives this process nothing to do, or lacks its folders."""
    if cfg.receive is None and cfg.send is None:
        raise ConfigInvalid("the config has neither 'receive' nor 'send'; add one of them")
    if cfg.receive is not None and cfg.inbox is None:
        raise ConfigInvalid("'receive' needs the 'inbox' key: received scans are written there")
    if cfg.send is not None and cfg.state is None:
        raise ConfigInvalid("'send' needs the 'state' key: the outbox is in the ledger there")


def serve(
    cfg: Config,
    stop: threading.Event,
    *,
    interval_s: float = DEFAULT_INTERVAL_S,
    timeout_s: float = DEFAULT_TIMEOUT_S,
) -> int:
    """Receive and send until ``stop`` is set; returns 0, or 1 when the sender died (so a
    service manager restarts the process)."""
    check(cfg)
    receiver = None if cfg.receive is None else Receiver(cfg.receive, Path(str(cfg.inbox)))
    failure: list[Exception] = []

    def send() -> None:
        assert cfg.send is not None and cfg.state is not None
        try:
            run_sender(cfg.state, cfg.send, stop, interval_s=interval_s, timeout_s=timeout_s)
        except Exception as exc:  # reported by serve(), which then exits 1
            failure.append(exc)
            stop.set()

    sender = None if cfg.send is None else threading.Thread(target=send, name="sender")
    try:
        if receiver is not None:
            receiver.start()
        if sender is not None and cfg.send is not None:
            sender.start()
            log.info("sending to %s", ", ".join(n.name for n in cfg.send.nodes))
        stop.wait()
    finally:
        stop.set()
        if receiver is not None:
            receiver.stop()
        if sender is not None:
            sender.join()
    if failure:
        log.error("the sender stopped: %s", failure[0])
        if isinstance(failure[0], ConfigInvalid):
            raise failure[0]
        return 1
    return 0
