"""Pure decisions of the sender: when to try again, when to give up, what a C-STORE status means.

No I/O here: :mod:`flairwatch.network.send` asks these functions and does the network and
ledger work. Times are seconds since the epoch, delays seconds.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from enum import StrEnum

from flairwatch.ledger.store import NodeCounts

SECONDS_PER_DAY = 86400.0


class Outcome(StrEnum):
    SENT = "sent"  # success
    WARNING = "warning"  # stored, with a warning: counts as sent (PS3.4 B.2.3)
    FAILED = "failed"


@dataclass(frozen=True)
class Retry:
    """What to do after a failed attempt: give up for good, or try again at ``not_before``."""

    give_up: bool
    not_before: float


def retry_delay(attempts: int, first_s: float, max_s: float) -> float:
    """Seconds to wait after the ``attempts``-th failure in a row (1, 2, ...): exponential
    back-off, ``first_s`` doubled for each further failure, never more than ``max_s``."""
    if attempts < 1:
        return 0.0
    return min(max_s, first_s * 2.0 ** min(attempts - 1, 60))


def after_failure(
    *,
    attempts: int,
    created: float,
    now: float,
    first_s: float,
    max_s: float,
    give_up_days: float,
    permanent: bool = False,
) -> Retry:
    """The row's fate after its ``attempts``-th failure (counting this one).

    Given up when the failure is ``permanent`` (a file the result folder lacks: a landed
    folder never changes) or the row entered the outbox more than ``give_up_days`` ago.
    """
    if permanent or now - created >= give_up_days * SECONDS_PER_DAY:
        return Retry(True, now)
    return Retry(False, now + retry_delay(attempts, first_s, max_s))


def store_outcome(status: int | None) -> Outcome:
    """The meaning of a C-STORE response status (PS3.4 Annex B.2.3, PS3.7 Annex C).

    0x0000 success; 0xB000 (coercion of data elements), 0xB006 (elements discarded) and 0xB007
    (data set does not match SOP class) are warnings: the node stored the instance. Anything
    else (0xA7xx out of resources, 0xA9xx does not match SOP class, 0xCxxx cannot understand,
    0x01xx/0x02xx general failures) and no answer at all are failures.
    """
    if status == 0x0000:
        return Outcome.SENT
    if status in (0xB000, 0xB006, 0xB007):
        return Outcome.WARNING
    return Outcome.FAILED


def status_text(status: int | None) -> str:
    """A short text for a status in the ledger and the log."""
    if status is None:
        return "no C-STORE response (the association ended or timed out)"
    if status in (0xB000, 0xB006, 0xB007):
        return f"stored with warning 0x{status:04X}"
    names = {0xA7: "refused: out of resources", 0xA9: "error: data set does not match SOP class"}
    name = "error: cannot understand" if status >> 12 == 0xC else names.get(status >> 8, "failure")
    return f"status 0x{status:04X} ({name})"


def outbox_lines(counts: list[NodeCounts]) -> list[str]:
    """``status`` lines for the outbox: per node waiting, sent, given up, last error."""
    lines = []
    for c in counts:
        last = (
            time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(c.last_sent)) if c.last_sent else "-"
        )
        lines.append(
            f"sending to {c.node}: {c.waiting} waiting, {c.sent} sent (last {last}), "
            f"{c.given_up} given up" + (f"; last error: {c.last_error}" if c.last_error else "")
        )
    return lines
