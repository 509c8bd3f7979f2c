"""Thread policy: the runtime runs its own BLAS work single-threaded and splits large batches.

Multi-threaded BLAS (OpenBLAS's default: one thread per core) loses badly on small products
and on a machine where another process keeps a core busy: its threads wait for each other at
every product. So around its own large products the runtime sets every BLAS library NumPy uses
to one thread and restores the caller's setting afterwards, and when a batch is large enough it
splits the rows over a small pool of threads itself (NumPy releases the GIL in products and
ufuncs, so the chunks run on separate cores, tanh included, which BLAS threading never covers).

Batches below `SCOPE_MIN_BATCH` rows are left alone: there multi-threaded BLAS did no harm even
with a core taken, while changing the setting costs 5–8 µs, 10–15 % of a call (the crossover
measured in docs/benchmarks.md, "Thread policy"). `threadpoolctl` is imported only when a
large batch first needs it.

The BLAS thread count is a process-wide setting, so the limit is reference-counted: while any
thread is inside the runtime's large-batch work, BLAS calls elsewhere in the process also run
single-threaded, and the caller's value comes back when the last one leaves.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable
from typing import TYPE_CHECKING

import numpy as np

from .errors import OptionError

if TYPE_CHECKING:
    from concurrent.futures import ThreadPoolExecutor

# Below this batch the scope would cost more than it saves (measured: at 17 states it added
# 10-50 % to a call of the reference model; from 64 on, unmanaged OpenBLAS threads lost up to
# 100x with a core taken).
SCOPE_MIN_BATCH = 32
# Rows per chunk at least. Measured on a shared 2-core VM with no core to spare (load average
# above 2): splitting 256-1,024 states cost 20-70 % (a pool thread that loses its core
# mid-chunk holds up the caller), 4,096 states broke even idle and gained 10 % with a busy
# neighbour; on a machine with free cores, smaller chunks would pay. Shared machines first.
MIN_CHUNK_ROWS = 1024
# Chunk boundaries fall on multiples of this many rows, so each chunk's rows sit in the same
# positions of the BLAS row tiles as in the unsplit batch (and give the same bits); chunks are
# far above compile.SMALL_BATCH, so they take the same arithmetic path as the whole batch.
CHUNK_ALIGN = 64
# Guided chunks: each takes this fraction of the rows left divided by the threads, so the
# first chunks are large (little overhead) and the last small, and a thread that loses its
# core mid-chunk (a busy neighbour, an overloaded machine) holds up the others less; a free
# core meanwhile takes over the chunks a busy one would have had.
GUIDED_SHARE = 2

Rows = Callable[[np.ndarray], np.ndarray]


def usable_cpus() -> int:
    """The CPUs this process may run on (affinity mask where the OS has one, else all)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def check_threads(threads) -> int:
    """Return the thread count `threads` asks for: None → `usable_cpus()`, else an int ≥ 1."""
    if threads is None:
        return usable_cpus()
    if isinstance(threads, bool) or not isinstance(threads, int | np.integer):
        raise OptionError(
            f"`threads` is {threads!r}; expected None (the CPUs this process may use) or a "
            "positive integer."
        )
    if threads < 1:
        raise OptionError(f"`threads` is {threads}; expected at least 1.")
    return int(threads)


class _SingleThreadedBlas:
    """Process-wide, reference-counted 'BLAS at one thread' scope.

    The first thread to enter saves every BLAS library's thread count and sets it to 1; the
    last to leave puts the saved counts back. The libraries are found once (threadpoolctl's
    scan of loaded libraries costs about 0.3 ms; setting a count directly costs about 1 µs).
    """

    def __init__(self):
        self._lock = threading.Lock()
        self._depth = 0
        self._saved: list[tuple[object, int]] = []
        self._libraries: tuple | None = None

    def libraries(self) -> tuple:
        """threadpoolctl's controllers of the loaded BLAS libraries (empty without it)."""
        if self._libraries is None:
            try:
                from threadpoolctl import ThreadpoolController
            except ImportError:  # declared dependency; without it the policy only splits
                self._libraries = ()
            else:
                controller = ThreadpoolController().select(user_api="blas")
                self._libraries = tuple(controller.lib_controllers)
        return self._libraries

    def __enter__(self) -> None:
        with self._lock:
            if self._depth == 0:
                saved = []
                for library in self.libraries():
                    count = library.get_num_threads()
                    if count is not None and count != 1:
                        library.set_num_threads(1)
                        saved.append((library, count))
                self._saved = saved
            self._depth += 1

    def __exit__(self, *exc_info) -> None:
        with self._lock:
            self._depth -= 1
            if self._depth == 0:
                for library, count in self._saved:
                    library.set_num_threads(count)
                self._saved = []


_SINGLE_THREADED_BLAS = _SingleThreadedBlas()


def single_threaded_blas() -> _SingleThreadedBlas:
    """The context manager that holds every BLAS library at one thread while inside it."""
    return _SINGLE_THREADED_BLAS


class ThreadPolicy:
    """How one stepper uses threads: single-threaded BLAS, and up to `threads` row chunks.

    Parameters
    ----------
    threads : int or None
        Threads a large batch is split over (None: the CPUs this process may use). 1 never
        splits but still holds BLAS at one thread around large batches.
    """

    def __init__(self, threads: int | None = None):
        self.threads = check_threads(threads)
        self._lock = threading.Lock()
        self._pool: ThreadPoolExecutor | None = None

    def __repr__(self) -> str:
        return f"ThreadPolicy(threads={self.threads})"

    def applies(self, batch: int) -> bool:
        """Whether a batch of this many rows runs under the policy (else: as called)."""
        return batch >= SCOPE_MIN_BATCH

    def run(self, function: Rows, states: np.ndarray, *, splittable: bool) -> np.ndarray:
        """`function(states)` with BLAS at one thread, split by rows when it pays.

        Parameters
        ----------
        function : callable
            Maps states (B, d) to results (B, d); with `splittable`, row i of the result may
            depend only on row i of the input.
        states : ndarray, shape (B, d)
            C-contiguous.
        splittable : bool
            Whether `function` may be run on row chunks.
        """
        with _SINGLE_THREADED_BLAS:
            bounds = self.chunks(states.shape[0]) if splittable else ()
            if len(bounds) < 2:
                return function(states)
            return self._split(function, states, bounds)

    def chunks(self, batch: int) -> tuple[tuple[int, int], ...]:
        """Row ranges (start, stop) a batch is split into, large ones first; one range when it
        is not split. Every chunk has at least `MIN_CHUNK_ROWS` rows and starts on a multiple
        of `CHUNK_ALIGN`."""
        if self.threads < 2 or batch < 2 * MIN_CHUNK_ROWS:
            return ((0, batch),)
        bounds = []
        start = 0
        while start < batch:
            size = max(MIN_CHUNK_ROWS, -(-(batch - start) // (self.threads * GUIDED_SHARE)))
            stop = min(batch, start + -(-size // CHUNK_ALIGN) * CHUNK_ALIGN)
            if batch - stop < MIN_CHUNK_ROWS:
                stop = batch  # no chunk below the minimum at the end
            bounds.append((start, stop))
            start = stop
        return tuple(bounds)

    def _split(self, function: Rows, states: np.ndarray,
               bounds: tuple[tuple[int, int], ...]) -> np.ndarray:
        """Run the chunks on this thread and up to `threads - 1` pool threads, whoever is free
        taking the next chunk, and gather the results in order."""
        results: list[np.ndarray | None] = [None] * len(bounds)
        state = _Chunks(len(bounds))
        # NumPy's floating-point error handling is per thread: pool threads take the caller's,
        # so a split batch warns (or not) exactly as the unsplit one would.
        errors = np.geterr()

        def work() -> None:
            with np.errstate(**errors):
                while (index := state.take()) is not None:
                    start, stop = bounds[index]
                    try:
                        results[index] = function(states[start:stop])
                    except BaseException as error:  # handed to the caller below
                        state.fail(error)
                    finally:
                        state.finish()

        pool = self._executor()
        for _ in range(min(self.threads, len(bounds)) - 1):
            pool.submit(work)
        work()
        state.wait()
        if state.error is not None:
            raise state.error
        first = results[0]
        output = np.empty((states.shape[0], *first.shape[1:]), dtype=first.dtype)
        for (start, stop), result in zip(bounds, results, strict=True):
            output[start:stop] = result
        return output

    def _executor(self) -> ThreadPoolExecutor:
        # Imported here: concurrent.futures brings logging and queue, which single-state
        # users never need (import time and memory are targets too).
        from concurrent.futures import ThreadPoolExecutor

        with self._lock:
            if self._pool is None:
                # Idle pool threads exit when the policy (and so the executor) is collected.
                self._pool = ThreadPoolExecutor(max_workers=self.threads - 1,
                                                thread_name_prefix="stridecast")
            return self._pool


class _Chunks:
    """Which chunk is next, how many are done, and the first error; shared by the workers."""

    def __init__(self, count: int):
        self._lock = threading.Lock()
        self._next = 0
        self._count = count
        self._left = count
        self._done = threading.Event()
        self.error: BaseException | None = None

    def take(self) -> int | None:
        with self._lock:
            if self._next >= self._count:
                return None
            self._next += 1
            return self._next - 1

    def fail(self, error: BaseException) -> None:
        with self._lock:
            if self.error is None:
                self.error = error

    def finish(self) -> None:
        with self._lock:
            self._left -= 1
            if self._left == 0:
                self._done.set()

    def wait(self) -> None:
        self._done.wait()
