"""Helpers more than one command needs: where the bundle is, the times and states asked for
(every rule for reading `--state`/`--state-file` and writing `--out` lives here), and the
one-line instruction when an optional extra is missing."""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
from pathlib import Path

import numpy as np

from stridecast import demo_bundle
from stridecast.runtime import BundleError, StateError, TimeError

STATE_FILE_KINDS = (".npy", ".csv", ".txt", ".json")
OUT_KINDS = (".csv", ".npy")
WIDE_STATE = 12
"""States with more components than this are summarised, not printed, without --out/--json."""

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


def read_states(arguments: argparse.Namespace, dim: int) -> np.ndarray:
    """The initial state(s) of `--state` (repeatable) or `--state-file`, shape (d,) or (B, d).

    `--state-file` reads .npy (NumPy, no pickles), .csv (commas) or .txt (whitespace or
    commas) with one state per row (a first row of names is skipped), or .json (a list of d
    numbers or a list of such lists). `dim` is the bundle's state dimension d.
    """
    if arguments.state_file:
        states = _state_file(Path(arguments.state_file))
        where = f"`--state-file` {arguments.state_file!r}"
    else:
        rows = []
        for text in arguments.state:
            try:
                rows.append([float(part) for part in text.split(",")])
            except ValueError as error:
                raise StateError(f"`--state` {text!r} is not a comma-separated list of "
                                 "numbers.") from error
        if len({len(row) for row in rows}) != 1:
            raise StateError("every `--state` must have the same number of components.")
        states = np.asarray(rows[0] if len(rows) == 1 else rows, dtype=np.float64)
        where = "`--state`"
    if states.ndim not in (1, 2) or states.shape[-1] != dim or states.size == 0:
        raise StateError(
            f"{where} holds shape {states.shape}; this bundle's state has {dim} components, "
            f"so expected ({dim},) or (batch, {dim}) (one state per row)."
        )
    return states


def _state_file(path: Path) -> np.ndarray:
    kind = path.suffix.lower()
    if kind not in STATE_FILE_KINDS:
        raise StateError(f"`--state-file` {str(path)!r} must end in one of "
                         f"{list(STATE_FILE_KINDS)}.")
    try:
        if kind == ".npy":
            array = np.load(path, allow_pickle=False)
        elif kind == ".json":
            array = np.asarray(json.loads(path.read_text(encoding="utf-8")), dtype=np.float64)
        else:
            array = _table(path.read_text(encoding="utf-8"), comma=kind == ".csv")
    except (OSError, ValueError, TypeError, UnicodeDecodeError) as error:
        raise StateError(f"`--state-file` {str(path)!r} could not be read as {kind}: "
                         f"{error}.") from error
    if array.dtype.kind not in "fiu":
        raise StateError(f"`--state-file` {str(path)!r} holds {array.dtype} values; expected "
                         "numbers.")
    return array


def _table(text: str, *, comma: bool) -> np.ndarray:
    """Rows of numbers; one row is one state, returned as (d,); a header row is skipped."""
    lines = [line for line in text.splitlines() if line.strip() and not line.startswith("#")]
    rows = []
    for number, line in enumerate(lines):
        parts = line.split(",") if comma or "," in line else line.split()
        try:
            rows.append([float(part) for part in parts])
        except ValueError:
            if number == 0:
                continue  # column names
            raise ValueError(f"row {number + 1} is not a list of numbers") from None
    if not rows:
        raise ValueError("no rows of numbers")
    if len({len(row) for row in rows}) != 1:
        raise ValueError(f"rows have different lengths {sorted({len(row) for row in rows})}")
    array = np.asarray(rows, dtype=np.float64)
    return array[0] if len(rows) == 1 else array


def write_atomically(path: Path, write) -> None:
    """Call `write(handle)` on a temporary file beside `path`, then rename it into place."""
    path.parent.mkdir(parents=True, exist_ok=True)
    descriptor, temporary = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(descriptor, "wb") as handle:
            write(handle)
        os.replace(temporary, path)
    except BaseException:
        if os.path.exists(temporary):
            os.unlink(temporary)
        raise


def check_out(path: str) -> Path:
    """`--out` must name a .csv or .npy file (checked before any work)."""
    target = Path(path)
    if target.suffix not in OUT_KINDS:
        raise StateError(f"`--out` {path!r} must end in .csv or .npy.")
    return target


def write_states(path: Path, states: np.ndarray, names) -> None:
    """`advance --out`: .npy holds the answer as returned ((d,) or (B, d)); .csv has a row of
    names, then one state per row (both read back by `--state-file`)."""
    def write(handle):
        if path.suffix == ".npy":
            np.save(handle, states)
        else:
            np.savetxt(handle, np.atleast_2d(states), delimiter=",", header=",".join(names),
                       comments="", fmt="%.9g")

    write_atomically(path, write)


def summary(state: np.ndarray) -> str:
    """A wide state's short description (one state, shape (d,)): min, max and RMS."""
    row = np.asarray(state, dtype=np.float64)
    return f"min {row.min():.7g}, max {row.max():.7g}, RMS {np.sqrt(np.mean(row**2)):.7g}"
