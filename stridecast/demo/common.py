"""Helpers every demo scenario's stages share: the output check, dependencies, printing, timing.

Light: torch is imported inside `torch_threads` only.
"""

from __future__ import annotations

import importlib.util
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import TextIO

from stridecast.runtime import StridecastError
from stridecast.runtime.bundle import check_target

# Imported by the demo's stages; checked up front so a missing one fails in a second, not
# after minutes of training.
NEEDED_MODULES = ("torch", "onnx", "scipy", "matplotlib", "tqdm")


def check_out(out: Path, overwrite: bool) -> None:
    """Refuse an existing `out` before minutes of work, not after."""
    check_target(out, overwrite=overwrite, where="--out",
                 hint="pass --overwrite to replace it, or choose another folder")


def check_dependencies() -> None:
    missing = [name for name in NEEDED_MODULES if importlib.util.find_spec(name) is None]
    if missing:
        raise StridecastError(
            f"the demo needs {', '.join(missing)}, which is not installed; install the extras "
            "with `pip install \"stridecast[export,demo]\"`."
        )


def printer(stream: TextIO) -> Callable[[str], None]:
    def say(text: str = "") -> None:
        stream.write(text + "\n")
        stream.flush()
    return say


@contextmanager
def timed(seconds: dict[str, float], name: str) -> Iterator[None]:
    started = time.perf_counter()
    yield
    seconds[name] = time.perf_counter() - started


@contextmanager
def torch_threads(count: int) -> Iterator[None]:
    """Run torch on `count` threads, restoring the previous setting afterwards.

    Networks this small gain nothing from intra-op threads, whose synchronisation costs more
    than their arithmetic; on a busy 2-core machine it made training about 50 times slower.
    """
    import torch

    previous = torch.get_num_threads()
    torch.set_num_threads(count)
    try:
        yield
    finally:
        torch.set_num_threads(previous)


@contextmanager
def blas_threads(count: int) -> Iterator[None]:
    """Hold NumPy's BLAS at `count` threads (threadpoolctl), restoring it afterwards.

    The POD's SVD and the decoding of long latent runs are BLAS calls; on a shared 2-core
    machine OpenBLAS's second thread mostly waits for the first (the SVD of the mooring
    scenario's 22,000 × 256 snapshots took 12 s with 2 threads under load, 0.8 s with one).
    """
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=count, user_api="blas"):
        yield
