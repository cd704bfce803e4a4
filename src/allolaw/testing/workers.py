"""Worker processes for the long studies in ``benchmarks/`` (SBC, coverage, misspecification).

A study fits many small models; each batch of fits runs in a fresh Python process (one long
process compiling a JAX sampler per fit ran out of JIT code memory after ~30 fits), and up to
``jobs`` processes run at once (the fits are single-threaded, so two jobs use the two cores).
The standard library has process pools, but not one that runs whole command lines, keeps
each command's stderr and names the failing command with its last lines, so this is written
out here.
"""

from __future__ import annotations

import subprocess
import tempfile
import time
from collections.abc import Callable, Sequence
from pathlib import Path

__all__ = ["run_commands"]


def run_commands(commands: Sequence[Sequence[str]], *, jobs: int = 1,
                 on_done: Callable[[int], None] | None = None, poll_seconds: float = 0.5
                 ) -> None:
    """Run ``commands`` with at most ``jobs`` at a time, in the order given.

    ``on_done(i)`` is called in the calling process when command ``i`` has exited with
    status 0 (in the order the commands finish). A command that fails stops the run: the
    ones still running are terminated and a ``RuntimeError`` gives the failing command, its
    exit status and the last 40 lines of its stderr.
    """
    queue = list(enumerate(commands))
    running: list[tuple[int, subprocess.Popen, Path]] = []
    with tempfile.TemporaryDirectory() as tmp:
        try:
            while queue or running:
                while queue and len(running) < max(1, jobs):
                    i, cmd = queue.pop(0)
                    log_path = Path(tmp) / f"{i}.log"
                    with log_path.open("w", encoding="utf-8") as log:
                        running.append((i, subprocess.Popen(list(cmd), stderr=log), log_path))
                time.sleep(poll_seconds)
                for item in list(running):
                    i, proc, log_path = item
                    if proc.poll() is None:
                        continue
                    running.remove(item)
                    if proc.returncode != 0:
                        tail = log_path.read_text(encoding="utf-8", errors="replace")
                        raise RuntimeError(
                            f"worker {i} ({' '.join(map(str, commands[i]))}) failed with exit "
                            f"code {proc.returncode}; its last lines of stderr:\n"
                            + "\n".join(tail.splitlines()[-40:]))
                    if on_done is not None:
                        on_done(i)
        finally:
            for _, proc, _ in running:
                proc.terminate()
                proc.wait()
