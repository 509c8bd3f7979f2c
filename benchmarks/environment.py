"""What the benchmark ran on: machine, versions and the BLAS thread setting.

Timings mean little without the thread setting beside them, so every result file carries one of
these records. Nothing here changes the environment; it only reads it.
"""

from __future__ import annotations

import ctypes
import os
import platform
import sys
from typing import Any

from stridecast.runtime.threads import usable_cpus

# Thread counts, and OpenBLAS's kernel choice (OPENBLAS_CORETYPE, OPENBLAS_L2_SIZE).
THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS",
                    "OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")
# Symbol names of OpenBLAS's thread query in the builds NumPy ships (scipy-openblas, 64-bit
# integers) and in plain system builds.
_OPENBLAS_THREAD_SYMBOLS = (
    "scipy_openblas_get_num_threads64_",
    "scipy_openblas_get_num_threads",
    "openblas_get_num_threads64_",
    "openblas_get_num_threads",
)


def thread_variables() -> dict[str, str | None]:
    """The BLAS/OpenMP thread environment variables as set (None when unset)."""
    return {name: os.environ.get(name) for name in THREAD_VARIABLES}


def numpy_blas_threads() -> dict[str, Any]:
    """How many threads NumPy's BLAS uses, from threadpoolctl if installed, else OpenBLAS itself.

    Returns a dict with `source` ("threadpoolctl", "openblas" or "unknown"), `threads` (int or
    None), `library` (name or path of the BLAS library) and `kernel` (the CPU kernel OpenBLAS
    chose, e.g. "Haswell", from threadpoolctl; else None).
    """
    import numpy  # noqa: F401  (the BLAS library must be loaded before it can be asked)

    try:
        from threadpoolctl import threadpool_info
    except ImportError:
        threadpool_info = None
    if threadpool_info is not None:
        pools = [pool for pool in threadpool_info() if pool.get("user_api") == "blas"]
        if pools:
            return {"source": "threadpoolctl", "threads": pools[0].get("num_threads"),
                    "library": pools[0].get("internal_api", pools[0].get("prefix")),
                    "kernel": pools[0].get("architecture")}
    for path in _loaded_libraries("openblas"):
        try:
            library = ctypes.CDLL(path)
        except OSError:
            continue
        for symbol in _OPENBLAS_THREAD_SYMBOLS:
            function = getattr(library, symbol, None)
            if function is not None:
                function.restype = ctypes.c_int
                return {"source": "openblas", "threads": int(function()),
                        "library": os.path.basename(path), "kernel": None}
    return {"source": "unknown", "threads": None, "library": None, "kernel": None}


def _loaded_libraries(fragment: str) -> list[str]:
    """Paths of shared libraries mapped into this process whose name contains `fragment`."""
    try:
        with open("/proc/self/maps", encoding="utf-8") as maps:
            lines = maps.read().splitlines()
    except OSError:
        return []
    paths = {line.split()[-1] for line in lines if fragment in line.rsplit("/", 1)[-1].lower()}
    return sorted(path for path in paths if path.startswith("/"))


def cpu_model() -> str:
    """The CPU model name from /proc/cpuinfo, or the platform's processor string."""
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as info:
            for line in info:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def describe() -> dict[str, Any]:
    """A JSON-ready record of the machine, versions and thread settings of this process."""
    import numpy

    record: dict[str, Any] = {
        "python": sys.version.split()[0],
        "platform": platform.platform(),
        "cpu": cpu_model(),
        "cpu_count": os.cpu_count(),
        "cpus_usable": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else None,
        "load_average": list(os.getloadavg()) if hasattr(os, "getloadavg") else None,
        "numpy": numpy.__version__,
        "thread_variables": thread_variables(),
        "numpy_blas": numpy_blas_threads(),
        "stridecast_threads": usable_cpus(),
    }
    for name in ("onnxruntime", "torch", "scipy"):
        module = sys.modules.get(name)
        record[name] = getattr(module, "__version__", None) if module else None
    torch = sys.modules.get("torch")
    record["torch_threads"] = torch.get_num_threads() if torch is not None else None
    return record
