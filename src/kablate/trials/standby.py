"""Worker processes started early, while the runner still prepares the run.

A worker process spends seconds importing torch, costing the sweep and preparing its data. The
runner starts its workers once it has measured the variants' latencies (a latency timed while
other processes import torch on the same cores would be inflated, and it is a figure of the
card), so that they do this while it records the sweep and calibrates. Each then stands by,
blocked on its end of a pipe, until the runner releases it with what only that preparation
tells (`Release`); from then on it claims trials like any worker (`pool.worker_main`).

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
from collections.abc import Callable
from dataclasses import dataclass, field
from multiprocessing.connection import Connection
from multiprocessing.process import BaseProcess

log = logging.getLogger("kablate")


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
    """In a worker standing by: block until the runner releases it. None when the runner
    dismissed it, or died (its end of the pipe closed): the worker then exits."""
    try:
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
        for _ in range(n_workers):
            reader, writer = mp.get_context("spawn").Pipe(duplex=False)
            proc = spawn(target, setup, None, reader)
            reader.close()  # the child has its own copy; the runner keeps only the writer
            self.waiting.append((proc, writer))

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
