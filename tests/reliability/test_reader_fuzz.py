"""A fuzzing run of the ONNX reader in CI: thousands of mutated real models through the check
of the atheris harness (fuzz/fuzz_onnx_reader.py), with a per-case deadline and a memory bound.

Seeds are a small MLP exported by torch.onnx.export with both exporters (TorchScript and
dynamo). Mutations: bit flips, inserted and deleted bytes, huge varints (2^64 − 1, ~2^62),
splices from the other seed, and truncation.
"""

from __future__ import annotations

import importlib.util
import time
import tracemalloc
from collections import Counter
from datetime import timedelta
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.builders import SMALL, mutate

EXAMPLES = 2_000
DEADLINE = timedelta(seconds=1)
HARNESS_PATH = Path(__file__).resolve().parents[2] / "fuzz" / "fuzz_onnx_reader.py"


def load_harness():
    spec = importlib.util.spec_from_file_location("fuzz_onnx_reader", HARNESS_PATH)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


harness = load_harness()

@pytest.fixture(scope="module")
def seeds() -> list[bytes]:
    exported = harness.seed_models()
    return [*exported.values(), SMALL]


def test_seeds_read_load_and_run(seeds):
    # The unmutated seeds must pass all the way, or the fuzz run would test only refusals.
    assert [harness.check_input(seed)[0] for seed in seeds] == ["ran"] * len(seeds)


EDIT = st.tuples(st.sampled_from(["flip", "insert", "delete", "huge"]),
                 st.integers(min_value=0, max_value=2**20), st.binary(min_size=1, max_size=8))
CASE = st.tuples(st.integers(min_value=0, max_value=2), st.lists(EDIT, min_size=1, max_size=6),
                 st.one_of(st.none(), st.integers(min_value=0, max_value=2**20)),
                 st.one_of(st.none(), st.tuples(st.integers(min_value=0, max_value=2**20),
                                                st.integers(min_value=1, max_value=64))))


def mutant(seeds: list[bytes], case) -> bytes:
    index, edits, cut, splice = case
    data = mutate(seeds[index], edits)
    if splice is not None:
        # Paste a slice of another seed: well-formed fields in the wrong place.
        donor = seeds[(index + 1) % len(seeds)]
        start, length = splice
        start %= len(donor)
        position = start % (len(data) + 1)
        data = data[:position] + donor[start:start + length] + data[position:]
    if cut is not None:
        data = data[:cut % (len(data) + 1)]
    return data


@pytest.mark.slow
def test_mutated_exports_are_refused_or_run(seeds, reliability):
    outcomes: Counter[str] = Counter()
    slowest = [0.0]

    @given(CASE)
    # Derandomized: CI runs the same cases every time, so a failure reproduces; exploring
    # further is the atheris harness's job.
    @settings(max_examples=EXAMPLES, deadline=DEADLINE, database=None, derandomize=True,
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
    def run(case) -> None:
        data = mutant(seeds, case)
        started = time.perf_counter()
        try:
            outcome, _ = harness.check_input(data)  # raises on anything unexpected
        except Exception as error:
            outcome = harness.known_issue(error)
            if outcome is None:
                raise
        slowest[0] = max(slowest[0], time.perf_counter() - started)
        outcomes[outcome] += 1

    tracemalloc.start()  # once for the run rather than once per case (see traced_read)
    try:
        run()
    finally:
        tracemalloc.stop()
    total = sum(outcomes.values())
    assert total >= EXAMPLES
    refused = outcomes["read-refused"] + outcomes["load-refused"]
    known = "".join(f"; {outcomes[name]:,} hit the known issue of xfail test `{test}`"
                    for name, (_, _, _, test) in harness.KNOWN_ISSUES.items()
                    if outcomes[name])
    reliability.record(
        "Model files: fuzzing",
        f"{EXAMPLES:,} mutated torch.onnx.export MLPs (TorchScript and dynamo exporters) and a "
        "hand-built model: bit flips, inserts, deletes, 2^64 − 1 and ~2^62 varints, splices, "
        "truncation; each read, loaded as a bundle's level, then advanced and forecast "
        "(batches of 1, 2 and 20)",
        total,
        f"{refused:,} refused with ModelFormatError ({outcomes['read-refused']:,} by the "
        f"reader, {outcomes['load-refused']:,} by load), {outcomes['run-refused']:,} stopped "
        f"with another StridecastError, {outcomes['ran']:,} ran{known}; 0 other exceptions; "
        "slowest case "
        f"{slowest[0] * 1000:.0f} ms (deadline {DEADLINE.total_seconds():.0f} s); reader "
        f"peak ≤ {harness.MEMORY_FACTOR} × size + {harness.MEMORY_CONSTANT // 1024} KiB",
        summary=f"{total:,} fuzzed model files: 0 unexpected exceptions" + (
            " besides known issues marked xfail" if known else ""),
    )
