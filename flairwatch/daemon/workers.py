"""Worker processes for the daemon: one Engine (one ONNX session) per process, reused.

Processes are started with the ``spawn`` method (no ledger connection or lock crosses a fork).
Each worker talks to the daemon over its own pipe, so the daemon always knows which job a worker
holds; a worker that dies mid-series (out of memory, a crash in a native library) is noticed by
its process sentinel and its job is retried. A worker retires after ``tasks_per_worker`` series
and is replaced, which keeps resident memory flat even if a native arena only grows.

Workers ignore SIGINT and SIGTERM: the daemon decides when they stop (the first signal lets the
running series finish). On Linux a worker also asks the kernel to kill it when the daemon dies,
so a ``kill -9`` of the daemon leaves no orphan writing results.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import logging
import multiprocessing
import os
import resource
import signal
import time
from dataclasses import dataclass, field, replace
from multiprocessing.connection import Connection, wait
from multiprocessing.process import BaseProcess
from pathlib import Path
from typing import Any

from flairwatch.config import Config
from flairwatch.daemon.deaths import death_message, memory_kill_count
from flairwatch.errors import FlairwatchError, InputRejected, StageFailed
from flairwatch.records import Series

log = logging.getLogger(__name__)

DEFAULT_TASKS_PER_WORKER = 50
MAX_START_FAILURES = 3  # in a row while the daemon starts: the model or settings are wrong
START_RETRY_MAX_SECONDS = 300.0
# errors worth another try later: disk full, quota, I/O error, a share gone away
TRANSIENT_ERRNOS = frozenset(
    {errno.ENOSPC, errno.EDQUOT, errno.EIO, errno.ESTALE, errno.ETIMEDOUT, errno.EHOSTDOWN,
     errno.EHOSTUNREACH, errno.ENETUNREACH, errno.ENOTCONN, errno.EAGAIN}
)  # fmt: skip
NO_SPACE_ERRNOS = frozenset({errno.ENOSPC, errno.EDQUOT})
_PR_SET_PDEATHSIG = 1
_THREAD_ENV = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


@dataclass(frozen=True)
class Task:
    job_id: int
    series: Series
    revision: int


@dataclass(frozen=True)
class Report:
    """A message from a worker: ready, init_failed, done, refused, failed, crashed.

    ``retiring`` on a job's report says the worker ends after it: the report and the retirement
    are one message, so the daemon never hands a new task to a worker that is about to exit.
    """

    kind: str
    job_id: int = 0
    message: str = ""
    transient: bool = False
    result_dir: str = ""
    summary: dict[str, Any] = field(default_factory=dict)
    adopted: bool = False
    seconds: float = 0.0
    rss_kb: int = 0
    retiring: bool = False
    no_space: bool = False  # the disk was full (ENOSPC, EDQUOT): not the series' fault


def current_rss_kb() -> int:
    """Resident set size of this process in KiB (Linux /proc; peak RSS elsewhere)."""
    try:
        pages = int(Path("/proc/self/statm").read_text(encoding="utf-8").split()[1])
        return pages * os.sysconf("SC_PAGE_SIZE") // 1024
    except (OSError, ValueError, IndexError):
        return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)


def _die_with_parent(parent_pid: int) -> None:
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
    except (OSError, AttributeError):
        pass  # not Linux: the pipe closing still ends the worker after its series
    if os.getppid() != parent_pid:  # the daemon died before prctl took effect
        os._exit(1)


def limit_memory(megabytes: int) -> None:
    """Cap this process's address space (RLIMIT_AS) at ``megabytes`` MiB; 0 = leave it.

    Past the cap an allocation fails with MemoryError in this process only, where a series
    that needs too much memory is reported as failed; without it the kernel's OOM killer may
    pick any process on the machine. A lower limit set from outside is kept.
    """
    if megabytes <= 0:
        return
    want = megabytes * 1024 * 1024
    soft, hard = resource.getrlimit(resource.RLIMIT_AS)
    if hard != resource.RLIM_INFINITY:
        want = min(want, hard)
    if soft == resource.RLIM_INFINITY or want < soft:
        resource.setrlimit(resource.RLIMIT_AS, (want, hard))


def classify(exc: BaseException, memory_mb: int = 0) -> Report:
    """Turn an exception from processing into a report (job_id filled in by the caller)."""
    if isinstance(exc, MemoryError):
        cap = f"worker_memory_mb ({memory_mb} MiB)" if memory_mb > 0 else "the memory available"
        return Report("failed", message=f"out of memory: the series needs more than {cap}; "
                      "raise worker_memory_mb or check the series' size")  # fmt: skip
    if isinstance(exc, InputRejected):
        return Report("refused", message=str(exc))
    if isinstance(exc, StageFailed):
        return Report("failed", message=str(exc), transient=exc.transient)
    if isinstance(exc, OSError):
        text = f"{exc.strerror or exc}" + (f": {exc.filename}" if exc.filename else "")
        return Report("failed", message=text, transient=exc.errno in TRANSIENT_ERRNOS,
                      no_space=exc.errno in NO_SPACE_ERRNOS)  # fmt: skip
    if isinstance(exc, FlairwatchError):
        return Report("failed", message=str(exc))
    return Report("failed", message=f"unexpected {type(exc).__name__}: {exc}")


def worker_main(
    cfg: Config,
    secret: bytes,
    conn: Connection,
    parent_pid: int,
    tasks: int,
    umask: int,
    log_level: int = logging.INFO,
) -> None:
    """Body of a worker process: build the Engine once, then process tasks until told to stop."""
    # same one-line format as the daemon, so journald shows worker lines alike
    logging.basicConfig(level=log_level, format="%(levelname)s %(name)s: %(message)s")
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    _die_with_parent(parent_pid)
    os.umask(umask)
    try:
        limit_memory(cfg.worker_memory_mb)
    except (OSError, ValueError) as exc:  # a platform without RLIMIT_AS: run without the cap
        log.warning("worker memory limit not set: %s", exc)
    from flairwatch.engine.pipeline import Engine  # heavy import (ONNX Runtime) only in workers

    try:
        engine = Engine(cfg)
    except Exception as exc:  # any start-up failure is reported, then the worker ends
        conn.send(Report("init_failed", message=str(exc) or type(exc).__name__))
        return
    model = {"name": engine.model_name, "version": engine.model_version}
    conn.send(Report("ready", summary=model))
    assert cfg.results is not None
    for n in range(1, tasks + 1):
        try:
            task = conn.recv()
        except EOFError:  # the daemon is gone
            return
        if task is None:
            return
        t0 = time.monotonic()
        starved = False
        try:
            out = engine.process(task.series, cfg.results, secret=secret, revision=task.revision)
            report = Report(
                "done",
                result_dir=str(out.result_dir),
                summary=dict(out.summary),
                adopted=out.adopted,
            )
        except Exception as exc:  # recorded per series; the worker carries on
            log.debug("job %d failed", task.job_id, exc_info=True)
            report = classify(exc, cfg.worker_memory_mb)
            # after a MemoryError a native library may be left half-initialised: start afresh
            starved = isinstance(exc, MemoryError)
        seconds, rss_kb = time.monotonic() - t0, current_rss_kb()
        conn.send(replace(report, job_id=task.job_id, seconds=seconds, rss_kb=rss_kb,
                          retiring=n == tasks or starved))  # fmt: skip
        if starved:
            return


@dataclass
class Slot:
    """One worker process and what it is doing."""

    index: int
    process: BaseProcess
    conn: Connection
    ready: bool = False
    job_id: int | None = None
    retiring: bool = False
    oom_mark: int | None = None  # the cgroup's OOM-kill count when the job was handed over


class WorkerPool:
    """A fixed number of worker processes fed one task at a time.

    Until :meth:`start` returns, a worker that cannot start is fatal (the daemon exits with a
    usage error: the model or the settings are wrong). After that, a replacement that cannot
    start is tried again with back-off (1 s, doubling, at most :data:`START_RETRY_MAX_SECONDS`),
    so a passing shortage of memory never stops the service.
    """

    def __init__(
        self,
        cfg: Config,
        secret: bytes,
        size: int,
        *,
        tasks_per_worker: int = DEFAULT_TASKS_PER_WORKER,
        umask: int = 0o027,
    ) -> None:
        # every worker gets an explicit thread count, so the ONNX sessions do not all take
        # every core (their default ignores affinity and cgroup limits)
        self._cfg = replace(cfg, threads=cfg.threads_per_worker())
        self._secret = secret
        self._size = size
        self._tasks = tasks_per_worker
        self._umask = umask
        self._ctx = multiprocessing.get_context("spawn")
        self._slots: list[Slot] = []
        self.model: dict[str, Any] = {}
        self.closing = False  # set while draining: retired or dead workers are not replaced
        self.started = False
        self._start_failures = 0  # workers that died before they were ready, in a row
        self._respawn: dict[int, float] = {}  # slot index -> monotonic time to try again

    def _spawn(self, index: int) -> Slot:
        ours, theirs = self._ctx.Pipe()
        for name in _THREAD_ENV:  # inherited by the spawned child only via the environment
            os.environ.setdefault(name, str(self._cfg.threads))
        proc = self._ctx.Process(
            target=worker_main,
            args=(
                self._cfg,
                self._secret,
                theirs,
                os.getpid(),
                self._tasks,
                self._umask,
                logging.getLogger().getEffectiveLevel(),
            ),
            name=f"flairwatch-worker-{index}",
            daemon=True,
        )
        proc.start()
        theirs.close()
        return Slot(index, proc, ours)

    def start(self, timeout: float = 120.0) -> dict[str, Any]:
        """Start the workers and wait until the first is ready; returns the model's name/version."""
        self._slots = [self._spawn(i) for i in range(self._size)]
        deadline = time.monotonic() + timeout
        while not any(s.ready for s in self._slots):
            left = deadline - time.monotonic()
            if left <= 0:
                raise StageFailed("workers did not start in time; check the model and memory")
            for _slot, report in self.poll(min(left, 1.0)):
                if report.kind == "init_failed":
                    raise StageFailed(f"worker could not start: {report.message}")
                if report.kind == "crashed":
                    raise StageFailed("a worker died while starting; see the log above")
        self.started = True
        return self.model

    def idle(self) -> list[Slot]:
        return [s for s in self._slots if s.ready and s.job_id is None and not s.retiring]

    def busy(self) -> list[Slot]:
        return [s for s in self._slots if s.job_id is not None]

    def submit(self, slot: Slot, task: Task) -> bool:
        """Hand a task over; False when the worker is gone (the caller puts the job back)."""
        try:
            slot.conn.send(task)
        except OSError:  # a broken pipe: the worker exited; poll() notices and replaces it
            slot.retiring = True
            return False
        slot.job_id, slot.oom_mark = task.job_id, memory_kill_count()
        return True

    def poll(self, timeout: float) -> list[tuple[Slot, Report]]:
        """Wait up to ``timeout`` s for messages or deaths; replace retired and dead workers."""
        self._respawn_due()
        waitables: list[Any] = [s.conn for s in self._slots] + [
            s.process.sentinel for s in self._slots
        ]
        if self._respawn:  # wake up in time for the next restart
            timeout = min(timeout, max(0.0, min(self._respawn.values()) - time.monotonic()))
        ready = set(wait(waitables, timeout)) if waitables else set()
        if not waitables:
            time.sleep(timeout)
        out: list[tuple[Slot, Report]] = []
        for slot in list(self._slots):
            dead = False
            if slot.conn in ready:
                try:
                    while slot.conn.poll():
                        out.append((slot, self._take(slot, slot.conn.recv())))
                except (EOFError, OSError):
                    dead = True
            if slot.process.sentinel in ready or dead or not slot.process.is_alive():
                slot.process.join(1.0)
                code = slot.process.exitcode
                if slot.job_id is not None:
                    message = death_message(code, slot.oom_mark, memory_kill_count())
                    out.append((slot, Report("crashed", slot.job_id, message)))
                    slot.job_id = None
                    log.warning("worker %d died mid-series: %s", slot.index, message)
                elif not slot.retiring and slot.ready:
                    log.warning("worker %d died (exit code %s)", slot.index, code)
                if not slot.ready:
                    self._start_failed(slot, code)
                else:
                    self._replace(slot)
        return out

    def _take(self, slot: Slot, report: Report) -> Report:
        if report.kind == "ready":
            slot.ready = True
            self._start_failures = 0
            self.model = report.summary
        elif report.kind in ("done", "refused", "failed"):
            slot.job_id = None
        if report.retiring:
            slot.retiring = True
        return report

    def _start_failed(self, slot: Slot, code: int | None) -> None:
        """A worker died before it was ready: fatal while starting, later retried with back-off."""
        self._start_failures += 1
        if not self.started and self._start_failures >= MAX_START_FAILURES:
            raise StageFailed(
                f"workers keep dying while starting (exit code {code}); check memory and the model"
            )
        if not self.started or self.closing:
            self._replace(slot)
            return
        delay = min(START_RETRY_MAX_SECONDS, 2.0 ** (self._start_failures - 1))
        log.error("worker %d could not start (exit code %s); trying again in %.0f s",
                  slot.index, code, delay)  # fmt: skip
        slot.conn.close()
        self._slots.remove(slot)
        self._respawn[slot.index] = time.monotonic() + delay

    def _respawn_due(self) -> None:
        now = time.monotonic()
        for index, when in list(self._respawn.items()):
            if self.closing:
                del self._respawn[index]
            elif when <= now:
                del self._respawn[index]
                try:
                    self._slots.append(self._spawn(index))
                except OSError as exc:  # no memory or no process slot for now: later again
                    log.error("worker %d could not be started: %s", index, exc)
                    self._respawn[index] = now + START_RETRY_MAX_SECONDS

    def _replace(self, slot: Slot) -> None:
        slot.conn.close()
        if self.closing:
            self._slots.remove(slot)
            return
        try:
            self._slots[self._slots.index(slot)] = self._spawn(slot.index)
        except OSError as exc:  # fork/exec failed (memory, process limit): retry with back-off
            log.error("worker %d could not be started: %s", slot.index, exc)
            self._slots.remove(slot)
            self._respawn[slot.index] = time.monotonic() + START_RETRY_MAX_SECONDS / 10

    def stop(self, *, at_once: bool, timeout: float = 10.0) -> None:
        """Stop every worker: politely (after its series) or at once (SIGKILL)."""
        slots, self._slots = self._slots, []
        self._respawn.clear()
        for slot in slots:
            if at_once:
                slot.process.kill()
            else:
                with contextlib.suppress(OSError):
                    slot.conn.send(None)
        for slot in slots:
            slot.process.join(timeout)
            if slot.process.is_alive():
                slot.process.kill()
                slot.process.join(timeout)
            slot.conn.close()
