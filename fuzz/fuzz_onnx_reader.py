"""Fuzz the NumPy-only ONNX reader, and `load` and the stepper behind it, with atheris.

CI runs the same check (`check_input`) through hypothesis on a few thousand mutated models
(tests/reliability/test_reader_fuzz.py); this harness is for runs of hours. Each input is read,
then loaded as the level of a one-level bundle and stepped. It passes when it is refused with
`ModelFormatError` (or `UnsupportedOperatorError`), a call stops with `StridecastError`, or it runs;
any other exception (but the `KNOWN_ISSUES`, bugs already reported), or a traced peak above
`MEMORY_FACTOR` × size + `MEMORY_CONSTANT` during `read_model`, stops the fuzzer with the input
saved (libFuzzer's crash-* file; reproduce it by passing that file instead of the corpus).

Usage::

    pip install atheris                                   # not needed for CI
    python fuzz/fuzz_onnx_reader.py --write-seeds fuzz/corpus
    python fuzz/fuzz_onnx_reader.py fuzz/corpus -max_total_time=3600 -rss_limit_mb=2048

`--write-seeds` exports a small MLP with both torch exporters (TorchScript and dynamo); the other
arguments go to libFuzzer (see `-help=1`). Run from the repository root.
"""

from __future__ import annotations

import io
import re
import sys
import tempfile
import traceback
import tracemalloc
import warnings
from pathlib import Path

import numpy as np

from stridecast.runtime import (
    LevelEntry,
    Manifest,
    ModelFormatError,
    StridecastError,
    load,
    write_bundle,
)
from stridecast.runtime.onnx_reader import read_model

# Common practice for a reader that never allocates from an unchecked size: a few copies of the
# input plus the fixed cost of the Python records.
MEMORY_FACTOR = 4
MEMORY_CONSTANT = 256 * 1024
OUTCOMES = ("read-refused", "load-refused", "run-refused", "ran")


# Bugs already reported by strict xfail tests in tests/reliability/: the fuzzers count them
# instead of stopping at them. Each entry is name: (exception type, message pattern, a frame
# (file name, function) the exception passes through, the xfail test); remove it once fixed.
# Empty: the four found so far (a KeyError for outputs no node produces, and a TypeError and
# two ValueErrors escaping the fast path) are fixed and pinned by regression tests.
KNOWN_ISSUES: dict[str, tuple[type[BaseException], str, tuple[str, str], str]] = {}


def known_issue(error: BaseException) -> str | None:
    """The name of the known issue `error` is an instance of, or None."""
    frames = {(Path(frame.f_code.co_filename).name, frame.f_code.co_name)
              for frame, _ in traceback.walk_tb(error.__traceback__)}
    for name, (kind, pattern, frame, _) in KNOWN_ISSUES.items():
        if type(error) is kind and re.search(pattern, str(error)) and frame in frames:
            return name
    return None


class MemoryBoundExceeded(AssertionError):
    """`read_model` allocated more than the bound allows for an input of this size."""


def traced_read(data: bytes):
    """`read_model(data)` and the tracemalloc peak of that call (the model, or the error).

    Starts and stops tracemalloc unless it is already tracing; callers that check many inputs
    should start it once, because each start/stop cycle leaves some memory behind (measured:
    about 4 KB per cycle on CPython 3.11).
    """
    tracing = tracemalloc.is_tracing()
    if not tracing:
        tracemalloc.start()
    # The peak is absolute: measure it from what was already traced before the call.
    before = tracemalloc.get_traced_memory()[0]
    tracemalloc.reset_peak()
    try:
        result = read_model(data)
    except ModelFormatError as error:
        result = error
    finally:
        peak = tracemalloc.get_traced_memory()[1] - before
        if not tracing:
            tracemalloc.stop()
    return result, peak


def level_bundle(folder: Path, data: bytes, model) -> Path:
    """A one-level bundle around `data`, named after the model's first input and output."""
    initializers = {tensor.name for tensor in model.graph.initializers}
    inputs = [info for info in model.graph.inputs if info.name not in initializers]
    shape = inputs[0].shape if inputs else None
    width = shape[-1] if shape and isinstance(shape[-1], int) and 0 < shape[-1] <= 64 else 3
    entry = LevelEntry(1, file="", sha256="0" * 64,
                       input=inputs[0].name if inputs else "state",
                       output=model.graph.outputs[0].name if model.graph.outputs else "next")
    manifest = Manifest(state_names=tuple(f"x{i}" for i in range(width)),
                        state_units=("",) * width, base_step=1.0, mean=(0.0,) * width,
                        scale=(1.0,) * width, update="replace", levels=(entry,))
    return write_bundle(folder / "bundle", manifest, {1: data})


def check_input(data: bytes) -> tuple[str, int]:
    """Run one input through `read_model`, then as a bundle's level through `load` and calls.

    Returns
    -------
    outcome : str
        One of `OUTCOMES`: refused by the reader, refused by `load`, refused by a call
        (`StridecastError`, e.g. NonFiniteError), or ran.
    peak : int
        tracemalloc peak of `read_model` in bytes.

    Raises
    ------
    MemoryBoundExceeded
        The reader's peak exceeded the bound.
    Exception
        Anything other than the documented errors escaping the reader, `load` or a call.
    """
    model, peak = traced_read(data)
    if peak > MEMORY_FACTOR * len(data) + MEMORY_CONSTANT:
        raise MemoryBoundExceeded(f"read_model peaked at {peak} bytes on {len(data)} bytes.")
    if isinstance(model, ModelFormatError):
        return "read-refused", peak
    with tempfile.TemporaryDirectory(prefix="fuzz-level-") as folder:
        try:
            stepper = load(level_bundle(Path(folder), data, model))
        except ModelFormatError:
            return "load-refused", peak
    try:
        # A single state, a small batch and one past the fast path's small-batch branch.
        for shape in ((stepper.state_dim,), (2, stepper.state_dim), (20, stepper.state_dim)):
            stepper.advance(np.full(shape, 0.5), 3.0)
            stepper.forecast(np.full(shape, 0.5), [1.0, 2.5])
    except StridecastError:
        return "run-refused", peak
    return "ran", peak


def seed_models() -> dict[str, bytes]:
    """A small MLP exported with both torch exporters: real models to mutate."""
    import torch  # only for seeds; the harness itself needs stridecast and numpy

    torch.manual_seed(0)
    mlp = torch.nn.Sequential(torch.nn.Linear(3, 16), torch.nn.Tanh(), torch.nn.Linear(16, 16),
                              torch.nn.GELU(), torch.nn.Linear(16, 3)).eval()
    example = (torch.zeros(4, 3),)
    seeds = {}
    with warnings.catch_warnings():
        # Deprecation notes and "torchvision is not installed" are irrelevant to seeds.
        warnings.simplefilter("ignore")
        buffer = io.BytesIO()
        torch.onnx.export(mlp, example, buffer, dynamo=False, input_names=["state"],
                          output_names=["next"],
                          dynamic_axes={"state": {0: "batch"}, "next": {0: "batch"}})
        seeds["mlp-torchscript.onnx"] = buffer.getvalue()
        program = torch.onnx.export(mlp, example, dynamo=True, verbose=False)
        seeds["mlp-dynamo.onnx"] = program.model_proto.SerializeToString()
    return seeds


def _test_one_input(data: bytes) -> None:
    try:
        check_input(data)
    except Exception as error:
        if known_issue(error) is None:
            raise


def main(argv: list[str]) -> int:
    if len(argv) >= 3 and argv[1] == "--write-seeds":
        folder = Path(argv[2])
        folder.mkdir(parents=True, exist_ok=True)
        for name, data in seed_models().items():
            (folder / name).write_bytes(data)
        return 0
    import atheris  # optional: only this long-running mode needs it

    atheris.instrument_all()
    tracemalloc.start()  # once for the whole run; see traced_read
    atheris.Setup(argv, _test_one_input)
    atheris.Fuzz()
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
