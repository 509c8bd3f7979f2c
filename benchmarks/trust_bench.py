"""What the envelope check costs: `advance`/`forecast` with and without it, and the
nearest-sample search against SciPy's k-d tree.

Run: ``python -m stridecast.benchmarks.trust_bench [--quick]``. The same crane bundle is
written three times (no envelope, the min/max box only, box plus N normalised training
samples), and the three steppers are timed in interleaved rounds so load from elsewhere
hits them alike.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from stridecast import demo_bundle
from stridecast.demo import crane
from stridecast.runtime import SAMPLES_FILE, EnvelopeSamples, encode_samples, load, write_bundle
from stridecast.runtime.bundle import read_levels, read_manifest
from stridecast.runtime.nearest import SampleIndex

from .timing import Budget, format_seconds, interleaved, summary

CRANE = demo_bundle()
SAMPLE_COUNTS = (1024, 4096)


def crane_states(count: int, seed: int = 0) -> np.ndarray:
    """Physical crane states along simulated trajectories (the demo's own physics)."""
    rng = np.random.default_rng(seed)
    paths = crane.simulate(crane.sample_initial_states(64, rng), np.linspace(0.0, 60.0, 64))
    rows = paths.reshape(-1, 4)  # (T, 64, 4) -> rows
    return rows[rng.permutation(len(rows))[:count]]


def variants(folder: Path, samples: np.ndarray) -> dict[str, Path]:
    """The crane bundle without an envelope, with the box, and with box plus samples."""
    # The shipped bundle's own samples are set aside: the variants differ only in the envelope.
    manifest = replace(read_manifest(CRANE), envelope_samples=None)
    levels = read_levels(CRANE, manifest)
    mean, scale = np.asarray(manifest.mean), np.asarray(manifest.scale)
    normalised = (samples - mean) / scale
    out = {
        "no envelope": write_bundle(folder / "none", replace(
            manifest, envelope_min=None, envelope_max=None), levels),
        "box": write_bundle(folder / "box", manifest, levels),
        f"box + {len(samples)} samples": write_bundle(
            folder / "samples", replace(manifest, envelope_samples=EnvelopeSamples(
                file=SAMPLES_FILE, sha256="0" * 64, count=len(samples), radius=0.5)),
            levels, extra_files={SAMPLES_FILE: encode_samples(normalised.astype(np.float32))}),
    }
    return out


def time_calls(steppers: dict[str, Any], state: np.ndarray, budget: Budget
               ) -> dict[str, dict[str, float]]:
    results = {}
    far = state[0] + np.array([0.0, 0.0, 0.0, 0.4], dtype=state.dtype)  # vz off the data
    cases = {
        "advance B=1 t=4 (grid)": lambda s: s.advance(state[0], 4.0),
        "advance B=1 t=4, far from data": lambda s: s.advance(far, 4.0),
        "advance B=1 t=37.02 (interpolate)": lambda s: s.advance(state[0], 37.02),
        "advance B=64 t=37": lambda s: s.advance(state, 37.0),
        "forecast B=1, 1000 times": lambda s: s.forecast(state[0], np.linspace(0, 100, 1000)),
    }
    for case, call in cases.items():
        samples = interleaved({name: (lambda s=stepper, c=call: c(s))
                               for name, stepper in steppers.items()}, budget)
        results[case] = {name: summary(values)["p50"] for name, values in samples.items()}
    return results


def nearest_costs(quick: bool) -> dict[str, dict[str, float]]:
    """SampleIndex.nearest, brute force and with the fixed-radius grid (radius 0.5, as the
    variants' bundle), against scipy's cKDTree, for queries near the data (samples plus 1 %
    noise; the common case)."""
    from scipy.spatial import cKDTree

    rng = np.random.default_rng(1)
    results = {}
    for count in SAMPLE_COUNTS:
        data = rng.standard_normal((count, 4))
        index = SampleIndex(data)
        grid = SampleIndex(data, radius=0.5)
        tree = cKDTree(data)
        for rows in (1, 64, 4096):
            queries = data[rng.integers(0, count, rows)] + 0.01 * rng.standard_normal((rows, 4))
            samples = interleaved({
                "stridecast": lambda q=queries, i=index: i.nearest(q),
                "stridecast (grid)": lambda q=queries, i=grid: i.nearest(q),
                "cKDTree (build + query)": lambda q=queries, d=data: cKDTree(d).query(q),
                "cKDTree (query)": lambda q=queries, t=tree: t.query(q),
            }, Budget(seconds=0.2 if quick else 1.0))
            results[f"N={count} M={rows}"] = {name: summary(values)["p50"]
                                              for name, values in samples.items()}
    return results


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m stridecast.benchmarks.trust_bench",
                                     description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short budgets")
    parser.add_argument("--json", action="store_true", help="print JSON instead of tables")
    arguments = parser.parse_args(argv)
    budget = Budget(seconds=0.5 if arguments.quick else 2.0, max_rounds=5000)
    state = crane_states(64, seed=3).astype(np.float32)
    with tempfile.TemporaryDirectory() as folder:
        paths = variants(Path(folder), crane_states(4096))
        steppers = {name: load(path, on_extrapolation="ignore") for name, path in paths.items()}
        calls = time_calls(steppers, state, budget)
    nearest = nearest_costs(arguments.quick)
    if arguments.json:
        print(json.dumps({"calls": calls, "nearest": nearest}, indent=2))
        return 0
    for title, table in (("p50 per call", calls), ("nearest-sample search, p50", nearest)):
        names = list(next(iter(table.values())))
        print(f"\n{title}\n{'case':<36}" + "".join(f"{name:>24}" for name in names))
        for case, row in table.items():
            base = row[names[0]]
            print(f"{case:<36}" + "".join(
                f"{format_seconds(row[name]) + f' ({row[name] / base:.2f}×)':>24}"
                for name in names))
    return 0


if __name__ == "__main__":
    sys.exit(main())
