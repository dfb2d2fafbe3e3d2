"""Why a worker died mid-series: the kernel's out-of-memory evidence, or the signal that ended it.

A worker killed while the daemon lives counts against its series (it may be the series that
needs too much memory); the job's error says what happened, so a person can act on it.
"""

from __future__ import annotations

import signal
from pathlib import Path


def oom_kill_count(text: str) -> int | None:
    """The ``oom_kill`` counter of a cgroup memory file, or None when it has none.

    Both cgroup v2 ``memory.events`` and cgroup v1 ``memory.oom_control`` are ``key value``
    lines with an ``oom_kill`` key: how many processes of the group the kernel's out-of-memory
    killer has killed (Linux admin guide, cgroup-v2 "memory.events" and cgroup-v1 memory).
    """
    for line in text.splitlines():
        key, _, value = line.partition(" ")
        if key == "oom_kill" and value.strip().isdigit():
            return int(value)
    return None


def memory_kill_count() -> int | None:
    """OOM kills so far in this process's memory cgroup (None: no cgroup memory accounting)."""
    candidates = []
    try:
        for line in Path("/proc/self/cgroup").read_text(encoding="utf-8").splitlines():
            _, controllers, path = line.split(":", 2)
            if controllers == "":
                candidates.append(f"/sys/fs/cgroup{path.rstrip('/')}/memory.events")
            elif "memory" in controllers.split(","):
                candidates.append(f"/sys/fs/cgroup/memory{path.rstrip('/')}/memory.oom_control")
    except (OSError, ValueError):
        pass
    # inside a container the group's own files sit at the root of the mount
    candidates += ["/sys/fs/cgroup/memory.events", "/sys/fs/cgroup/memory/memory.oom_control"]
    for name in candidates:
        try:
            count = oom_kill_count(Path(name).read_text(encoding="utf-8"))
        except OSError:
            continue
        if count is not None:
            return count
    return None


def death_message(exitcode: int | None, oom_before: int | None, oom_after: int | None) -> str:
    """Why a worker died mid-series, for the log and the job's error (pure).

    A rise of the cgroup's OOM-kill counter while the worker ran is the kernel's own evidence;
    without it a SIGKILL that the daemon did not send is most often the OOM killer too.
    """
    if oom_before is not None and oom_after is not None and oom_after > oom_before:
        return (f"worker killed by the out-of-memory killer (exit code {exitcode}; cgroup "
                f"oom_kill {oom_before} -> {oom_after}); give it more memory or fewer workers")  # fmt: skip
    if exitcode == -signal.SIGKILL:
        return f"worker killed (exit code {exitcode}, SIGKILL): out of memory?"
    if exitcode is not None and exitcode < 0:
        try:
            name = signal.Signals(-exitcode).name
        except ValueError:
            name = f"number {-exitcode}"
        return f"worker killed by signal {name} (exit code {exitcode})"
    return f"worker exit code {exitcode}"
