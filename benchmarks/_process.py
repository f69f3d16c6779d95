"""Time a command as a whole process: wall seconds, CPU seconds and peak resident memory.

Shared by the benchmark scripts. CPU seconds are user + system time of the process and of
the children it waited for (worker processes included once they have exited), from
``os.wait4``; peak memory is that process's own ``ru_maxrss`` (workers are not added).
"""

from __future__ import annotations

import contextlib
import os
import subprocess
import sys
import time
from dataclasses import dataclass

__all__ = ["Measured", "busy_process", "run_measured"]


@dataclass(frozen=True)
class Measured:
    """One timed process."""

    wall: float
    cpu: float
    peak_mib: float


def run_measured(command: list[str], env: dict | None = None) -> Measured:
    """Run ``command`` to its end; raise SystemExit with its error output if it fails."""
    start = time.perf_counter()
    proc = subprocess.Popen(
        [str(part) for part in command],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        env=None if env is None else {**os.environ, **env},
    )
    stderr = proc.stderr.read()
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - start
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode not in (0, 1):  # 1: the checks found problems, which is a result
        raise SystemExit(f"{' '.join(map(str, command))} failed:\n{stderr.decode()[-3000:]}")
    return Measured(wall, usage.ru_utime + usage.ru_stime, usage.ru_maxrss / 1024)


@contextlib.contextmanager
def busy_process():
    """Run one competing process that keeps a core busy, for as long as the block lasts."""
    proc = subprocess.Popen([sys.executable, "-c", "while True: pass"])
    try:
        yield proc
    finally:
        proc.kill()
        proc.wait()
