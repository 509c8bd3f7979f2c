"""Threads while training and exporting: torch's intra-op threads and NumPy's BLAS together.

The networks are small and the BLAS calls around them (the POD's SVD, decoding latent runs,
the envelope's distances) are mid-sized: extra threads mostly wait for each other, and on a
machine another process keeps busy they cost several times the single-threaded time. One
thread also makes results independent of the machine's core count (reduction order).
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator

import torch

from .arguments import positive_int


@contextlib.contextmanager
def compute_threads(threads: int | None, *, error: type[Exception] = ValueError
                    ) -> Iterator[None]:
    """Hold torch and NumPy's BLAS at `threads` threads, restoring both afterwards.

    Parameters
    ----------
    threads : int or None
        A positive count; None leaves both settings as they are.
    error : exception class
        Raised, naming `threads`, when it is not a positive integer.
    """
    if threads is None:
        yield
        return
    count = positive_int(threads, "threads", error=error)
    from threadpoolctl import threadpool_limits

    previous = torch.get_num_threads()
    torch.set_num_threads(count)
    try:
        with threadpool_limits(limits=count, user_api="blas"):
            yield
    finally:
        torch.set_num_threads(previous)
