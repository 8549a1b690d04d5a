"""Worker processes started early, while the runner still prepares the run.

A worker process spends seconds importing torch, costing the sweep and preparing its data. The
runner starts its workers as soon as it has read the sweep, so that they do this while it
prepares the data and runs the preflight. Each worker then reports that it is ready and stands
by, blocked on its end of a pipe, until the runner releases it with what only the preparation
tells (`Release`); from then on it claims trials like any worker (`pool.worker_main`).

The runner times the variants' latencies (a figure of the card) and their training steps (the
estimate, the order and ``--budget``) only once every worker is ready (`Standby.wait_until_idle`):
a time taken while other processes import torch on the same cores would be inflated.

- The preparation fails, or finds nothing to train: `Standby.close` kills the workers that
  were never released, and the run ends as it would have without them.
- The runner dies: its end of the pipe closes, and a worker standing by reads end-of-file and
  exits at once (`wait_for_release`).
- A worker that dies before its release is replaced like any other (`pool.supervise`).
"""

from __future__ import annotations

import logging
import multiprocessing as mp
import signal
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from multiprocessing.connection import Connection
from multiprocessing.connection import wait as wait_any
from multiprocessing.process import BaseProcess

log = logging.getLogger("kablate")

READY = "ready"  # what a worker sends once it has prepared, before it waits for its release
READY_TIMEOUT = 300.0  # seconds the runner waits for its workers to prepare, at most


@dataclass(frozen=True)
class WorkerSetup:
    """What a worker process needs from the start: the sweep, where it runs, and how."""

    sweep_path: str
    results_root: str
    url: str | None  # the storage; None: the results folder's journal file
    threads: int
    device: str
    checkpoint_seconds: float


@dataclass(frozen=True)
class Release:
    """What the runner's preparation adds before a worker may claim trials."""

    deadline: float  # time.time() by which every started trial should end; 0: none
    estimates: dict[str, float] = field(default_factory=dict)  # variant id → predicted seconds


def spawn(target: Callable, *args) -> BaseProcess:
    """Start ``target(*args)`` in a fresh (spawned) process.

    The child inherits an ignored SIGINT (Python keeps it ignored at start-up), so a Ctrl-C
    while it imports cannot print a traceback; the worker then installs its own handler.
    """
    proc = mp.get_context("spawn").Process(target=target, args=args, daemon=False)
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        proc.start()
    finally:
        signal.signal(signal.SIGINT, previous)
    return proc


def wait_for_release(conn: Connection) -> Release | None:
    """In a worker standing by, prepared: report that it is ready, then block until the runner
    releases it. None when the runner dismissed it, or died (its end of the pipe closed): the
    worker then exits."""
    try:
        conn.send(READY)
        release = conn.recv()
    except (EOFError, OSError):
        return None
    finally:
        conn.close()
    return release if isinstance(release, Release) else None


class Standby:
    """Worker processes that prepare while the runner does, then wait for `release`."""

    def __init__(self, target: Callable, setup: WorkerSetup, n_workers: int) -> None:
        """Start ``n_workers`` processes running ``target(setup, None, conn)``, where ``conn``
        is the worker's end of its pipe (for `wait_for_release`)."""
        self.waiting: list[tuple[BaseProcess, Connection]] = []
        self.ready: set[int] = set()  # pids of the workers that reported READY
        for _ in range(n_workers):
            ours, theirs = mp.get_context("spawn").Pipe()
            proc = spawn(target, setup, None, theirs)
            theirs.close()  # the child has its own copy
            self.waiting.append((proc, ours))

    def wait_until_idle(self, timeout: float = READY_TIMEOUT) -> list[BaseProcess]:
        """Block until every worker standing by has prepared (it reported READY and now only
        waits) or has died. Returns the workers still preparing after ``timeout`` seconds."""
        preparing = {conn: proc for proc, conn in self.waiting if proc.pid not in self.ready}
        deadline = time.monotonic() + timeout
        while preparing and (left := deadline - time.monotonic()) > 0:
            by_sentinel = {proc.sentinel: conn for conn, proc in preparing.items()}
            for ended in wait_any([*preparing, *by_sentinel], timeout=left):
                conn = by_sentinel.get(ended, ended)
                proc = preparing.pop(conn, None)
                if proc is None:  # its pipe and its sentinel both answered
                    continue
                try:
                    if conn.recv() == READY:
                        self.ready.add(proc.pid)
                except (EOFError, OSError):  # it died while preparing
                    pass
        return list(preparing.values())

    def release(self, release: Release) -> list[BaseProcess]:
        """Let every waiting worker claim trials; the processes, now the caller's to follow.
        A worker that already died is returned too: the caller sees its exit code."""
        procs = []
        for proc, conn in self.waiting:
            try:
                conn.send(release)
            except (BrokenPipeError, OSError):
                log.warning("worker %d ended before it was released", proc.pid)
            conn.close()
            procs.append(proc)
        self.waiting = []
        return procs

    def close(self) -> None:
        """Kill the workers never released (a failed or empty preparation) and reap them."""
        for proc, conn in self.waiting:
            conn.close()
            if proc.is_alive():
                proc.kill()
            proc.join()
        self.waiting = []
