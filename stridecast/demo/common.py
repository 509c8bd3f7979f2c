"""Helpers every demo scenario's stages share: the output check, dependencies, printing, timing.

Light: torch is imported inside `export_threads` only.
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
def export_threads() -> Iterator[None]:
    """Export (and verification) with torch and NumPy's BLAS at one thread, as training runs
    by default (`stridecast.export.threads.compute_threads`; imported here, when used)."""
    from stridecast.export.threads import compute_threads

    with compute_threads(1):
        yield
