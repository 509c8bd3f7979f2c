"""Helpers more than one command needs: where the bundle is, the times asked for, and the
one-line instruction when an optional extra is missing."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

from stridecast import demo_bundle
from stridecast.runtime import BundleError, TimeError

# Which extra provides a module a command may miss (`pip install -e ".[extra]"`).
EXTRAS = {
    "torch": "export", "onnx": "export", "onnxscript": "export", "tqdm": "export",
    "fastapi": "service", "uvicorn": "service", "msgpack": "service",
    "prometheus_client": "service", "pydantic_settings": "service", "anyio": "service",
    "pydantic": "service",
    "scipy": "demo", "matplotlib": "plot", "onnxruntime": "dev",
}


def shipped_bundle() -> Path:
    """`stridecast.demo_bundle()`, its absence reported as a `BundleError`."""
    try:
        return demo_bundle()
    except FileNotFoundError as error:
        raise BundleError(str(error)) from error


def bundle_path(arguments: argparse.Namespace) -> Path:
    if getattr(arguments, "demo", False):
        if arguments.bundle:
            raise BundleError("give either a bundle path or --demo, not both.")
        return shipped_bundle()
    if not arguments.bundle:
        raise BundleError("a bundle path is required (or --demo for the shipped one).")
    return Path(arguments.bundle)


def read_times(arguments: argparse.Namespace) -> np.ndarray:
    if arguments.times:
        try:
            return np.asarray([float(part) for part in arguments.times.split(",")])
        except ValueError as error:
            raise TimeError(f"`--times` {arguments.times!r} is not a comma-separated list of "
                            "numbers.") from error
    if arguments.every is None or not arguments.every > 0:
        raise TimeError("`--until` needs `--every` with a positive spacing.")
    count = int(np.floor(arguments.until / arguments.every + 1e-9)) + 1
    if count < 1:
        raise TimeError(f"`--until` is {arguments.until!r}; expected a time ≥ 0.")
    return np.arange(count) * arguments.every


def needs_extra(extra_hint: str):
    """Turn a missing optional dependency into a one-line instruction."""

    class _Guard:
        def __enter__(self):
            return self

        def __exit__(self, kind, error, traceback):
            if kind is ModuleNotFoundError:
                package = (error.name or "").split(".")[0]
                extra = EXTRAS.get(package, extra_hint)
                # Not on any package index: the extra comes from the repository's clone.
                print(f"stridecast: this command needs the {extra!r} extra (missing module "
                      f"{package!r}); install it from the repository folder with "
                      f'pip install -e ".[{extra}]"', file=sys.stderr)
                raise SystemExit(1) from error
            return False

    return _Guard()
