"""`python -m stridecast.benchmarks`: run the suite, print the report, write JSON and the plot."""

from __future__ import annotations

import argparse
import json
import logging
import os
import sys
from pathlib import Path
from typing import Any

from . import report
from .plot import plot_horizon
from .suite import BUSY_LABEL, run_suite

RESULTS_NAME = "bench-results.json"
PLOT_NAME = "bench-horizon.png"
# OpenBLAS reads OPENBLAS_CORETYPE and OPENBLAS_L2_SIZE when NumPy loads it; a shell that sets
# them (to work around a VM's CPU detection) would change the BLAS kernel measured, so the
# documented command clears them and the report names the kernel threadpoolctl found.
COMMAND = ("env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE "
           "python -m stridecast.benchmarks --out-dir docs --markdown docs/benchmarks.md")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="python -m stridecast.benchmarks",
        description="Benchmark the stridecast runtime against onnxruntime, torch eager, the "
                    "naive finest-level rollout and SciPy's solve_ivp.",
        epilog=f"example:\n  {COMMAND}", formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true",
                        help="short budgets and fewer horizons (about a minute)")
    parser.add_argument("--bundle", type=Path,
                        help="benchmark this bundle instead of the built-in reference model")
    parser.add_argument("--crane-bundle", type=Path,
                        help="a bundle trained on the crane scenario, for the solve_ivp "
                             "comparison (default: the shipped crane-demo.bundle, if any)")
    parser.add_argument("--out-dir", type=Path, default=Path("."),
                        help=f"where to write {RESULTS_NAME} and {PLOT_NAME} (default: .)")
    parser.add_argument("--markdown", type=Path, metavar="FILE",
                        help="also write the Markdown report to FILE")
    parser.add_argument("--no-busy-neighbour", action="store_true",
                        help="skip the second pass, run while another process keeps one core "
                             "busy")
    parser.add_argument("--via-export", action="store_true",
                        help="write the reference bundle with stridecast.export.export_bundle "
                             "(slow: runs torch's exporter and verifies each level)")
    parser.add_argument("--quiet", action="store_true", help="no progress on stderr")
    parser.add_argument("--render", type=Path, metavar="RESULTS.json",
                        help=f"measure nothing: redraw the plot beside an earlier "
                             f"{RESULTS_NAME} and print (with --markdown, write) its report")
    return parser


def main(argv: list[str] | None = None) -> int:
    arguments = build_parser().parse_args(argv)
    logging.basicConfig(level=logging.WARNING if arguments.quiet else logging.INFO,
                        format="bench: %(message)s", stream=sys.stderr)
    if arguments.render is not None:
        results = json.loads(arguments.render.read_text(encoding="utf-8"))
        default = results["passes"]["default"]
        plot = plot_horizon(default["bench"], default.get("solvers"),
                            arguments.render.parent / PLOT_NAME)
        _print_and_write(results, plot, arguments.markdown)
        return 0
    results = run_suite(arguments.out_dir, quick=arguments.quick, bundle=arguments.bundle,
                        crane_bundle=arguments.crane_bundle,
                        busy=not arguments.no_busy_neighbour,
                        via_export=arguments.via_export)
    results["command"] = _command(arguments)
    results["quick"] = arguments.quick
    default = results["passes"]["default"]
    plot = plot_horizon(default["bench"], default.get("solvers"),
                        arguments.out_dir / PLOT_NAME)
    busy = results["passes"].get(BUSY_LABEL)
    results["targets"] = {"default": report.measure_targets(
        default.get("bench"), default.get("solvers"), default.get("system"),
        busy=None if busy is None else busy["bench"])}
    (arguments.out_dir / RESULTS_NAME).write_text(json.dumps(results, indent=1) + "\n",
                                                  encoding="utf-8")
    _print_and_write(results, plot, arguments.markdown)
    return 0


def _print_and_write(results: dict[str, Any], plot: Path, markdown: Path | None) -> None:
    print(document(results, plot_name=plot.name))
    if markdown is not None:
        # The image link is relative to the Markdown file, wherever the plot was written.
        link = os.path.relpath(plot.resolve(), markdown.resolve().parent)
        markdown.write_text(document(results, plot_name=Path(link).as_posix()),
                            encoding="utf-8")


def _command(arguments: argparse.Namespace) -> str:
    parts = ["env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE python -m stridecast.benchmarks"]
    if arguments.quick:
        parts.append("--quick")
    out_dir = None if arguments.out_dir == Path(".") else arguments.out_dir
    for flag, value in (("--bundle", arguments.bundle), ("--crane-bundle", arguments.crane_bundle),
                        ("--out-dir", out_dir), ("--markdown", arguments.markdown)):
        if value is not None:
            parts.append(f"{flag} {value}")
    if arguments.no_busy_neighbour:
        parts.append("--no-busy-neighbour")
    if arguments.via_export:
        parts.append("--via-export")
    return " ".join(parts)


def document(results: dict[str, Any], *, plot_name: str = PLOT_NAME) -> str:
    """The full Markdown report: targets, environment, then every table with notes."""
    passes = results["passes"]
    default = passes["default"]
    bench = default["bench"]
    benches = {label: p["bench"] for label, p in passes.items()}
    info = bench["bundle"]
    model = results.get("reference")
    if model is not None:
        model_text = (f"Reference model: d = {model['state_dim']}, hidden {model['hidden']} "
                      f"{model['activation']}, increment levels at strides {model['strides']}, "
                      f"random weights (output layer × {model['output_gain']:g}), float32, "
                      f"base step {model['base_step']:g} s; ONNX written with "
                      f"{model['onnx_writer']}.")
    else:
        model_text = (f"Bundle `{info['name']}` ({info['path']}): strides {info['strides']}, "
                      f"d = {info['state_dim']}, base step {info['base_step']:g} "
                      f"{info['time_unit']}.")
    crane_text = ""
    if "--crane-bundle" in results["command"]:
        crane_text = (" `--crane-bundle` names a bundle trained on the crane scenario (made "
                      "with `stridecast demo --quick --out PATH`); without it the bundle shipped "
                      "in the package (`stridecast.demo_bundle()`) is used when present.")
    sections = [
        "# Benchmarks",
        f"Regenerate with `{results['command']}` from the repository root ("
        f"{'about a minute' if results.get('quick') else 'a few minutes'}); it also "
        f"writes `{RESULTS_NAME}` and `{Path(plot_name).name}` (in `--out-dir`, default `.`)."
        + crane_text,
        "All numbers below come from one run on one machine; ratios are measured in the same "
        "run, competitors interleaved round by round so that load from elsewhere on the machine "
        "touches them alike. The Targets table is the summary to quote.",
        model_text,
        environment_section(passes),
        "## Targets",
        "Time ratio = stridecast's time ÷ the peer's (below 1: stridecast faster); speedup = "
        "the slower method's time ÷ stridecast's; throughput ratio = stridecast's states·steps "
        "per second ÷ the peer's. p50 of interleaved rounds.",
        report.target_table(results["targets"]),
        "## Single-state `advance` latency",
        "stridecast gets a state of shape (d,) and plans itself; onnxruntime (one session call "
        "per step) and torch eager (`inference_mode`) follow the same plan with the "
        "normalisation applied once in NumPy before and after the loop; the naive rollout is "
        "the runtime with the finest level only.",
        report.latency_table(bench),
        f"## Batches: `advance` to {bench['settings']['batch_base_steps']:,} base steps",
        report.batch_table(benches),
        *report.busy_notes(benches),
        "## Dense forecast",
        report.dense_table(benches),
    ]
    threads = {label: p["threads"] for label, p in passes.items() if "threads" in p}
    if threads:
        sections += ["## Thread policy: where it starts to pay",
                     report.threads_note(threads.get("default", next(iter(threads.values())))),
                     report.threads_table(threads)]
    if "solvers" in default:
        sections += ["## Against SciPy `solve_ivp` (crane scenario)",
                     report.solver_note(default["solvers"]),
                     report.solver_table(default["solvers"]),
                     f"![advance cost against horizon]({plot_name})"]
    if "system" in default:
        sections += ["## Start-up and memory (fresh processes, medians)",
                     "Import time is measured inside each child around the import statement "
                     "alone; bytecode is compiled once into a private cache before timing, as "
                     "an installed package would have it. Peak RSS is the child's VmHWM after "
                     "importing, loading the bundle and running `advance` (numpy: after "
                     "`import numpy` only).",
                     report.system_table(default["system"])]
    agreement = {label: p["bench"]["agreement"] for label, p in passes.items()}
    sections += ["## Agreement",
                 "Largest absolute difference of each peer's answer from stridecast's (same "
                 "plan, float32): " + "; ".join(
                     f"{label}: " + ", ".join(f"{name} {value:.2g}" for name, value in
                                              values.items())
                     for label, values in agreement.items()) + "."]
    sections += [OTHER_REPORTS]
    return "\n\n".join(sections) + "\n"


# Reports the suite does not regenerate: each has its own command (given on its page).
OTHER_REPORTS = """## Other benchmark reports

Measured by their own commands, each page giving its command, machine and load:
[service-benchmark.md](service-benchmark.md) (HTTP and gRPC against onnxruntime in process),
[field-benchmark.md](field-benchmark.md) (a reduced field bundle against SciPy on the full
field), [published-systems.md](published-systems.md) (training and trust on published systems)."""


def environment_section(passes: dict[str, Any]) -> str:
    return "## Machine and threads\n\n" + report.environment_lines(
        {label: p["environment"] for label, p in passes.items()})
