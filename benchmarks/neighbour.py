"""The busy-neighbour scenario: another process keeps one core busy while the runtime works.

On a shared machine (a CI runner, a small VM, a laptop with a browser open) a core is often
taken by someone else. Multi-threaded BLAS then stalls, each thread waiting for the others;
this scenario measures how much of its idle speed each competitor keeps.
"""

from __future__ import annotations

import contextlib
import subprocess
import sys
import time
from collections.abc import Iterator

# A pure-Python spin: one core at 100 %, no memory traffic, no threads of its own.
SPIN = "while True:\n    pass\n"
# Let the scheduler see the neighbour as a running task before measuring.
SETTLE_SECONDS = 0.5


@contextlib.contextmanager
def busy_neighbour() -> Iterator[subprocess.Popen]:
    """Run a process spinning on one core for the duration of the `with` block."""
    process = subprocess.Popen([sys.executable, "-c", SPIN], stdin=subprocess.DEVNULL,
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        time.sleep(SETTLE_SECONDS)
        yield process
    finally:
        process.terminate()
        try:
            process.wait(timeout=5)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()
