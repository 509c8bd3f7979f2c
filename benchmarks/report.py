"""Targets and Markdown tables from benchmark results.

Ratio conventions, used everywhere: *time ratio* = stridecast's time / the peer's time (below 1
means stridecast is faster); *speedup* = the slow method's time / stridecast's time; *throughput
ratio* = stridecast's states·steps per second / the peer's.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from stridecast.runtime.threads import SCOPE_MIN_BATCH

from .timing import format_rate, format_seconds

TARGET_STEPS_ORT = 1_000
TARGET_STEPS_NAIVE = 3_000
TARGET_BATCH = 4_096


@dataclass(frozen=True)
class Target:
    """One requirement: a measured number against a limit, in one direction."""

    key: str
    description: str
    limit: float
    at_most: bool  # True: measured ≤ limit passes; False: measured ≥ limit passes
    unit: str  # "×" or "s"

    def required(self) -> str:
        return f"{'≤' if self.at_most else '≥'} {self.limit:g}{' ' if self.unit == 's' else ''}" \
               f"{self.unit}"

    def check(self, measured: float | None) -> bool | None:
        if measured is None:
            return None
        return measured <= self.limit if self.at_most else measured >= self.limit


TARGETS = (
    Target("ort_batch1", f"batch-1 `advance` time ratio vs onnxruntime loop, same plan "
           f"({TARGET_STEPS_ORT:,} base steps)", 0.75, True, "×"),
    Target("naive", f"speedup over naive finest-level rollout ({TARGET_STEPS_NAIVE:,} base steps)",
           100.0, False, "×"),
    Target("rk45", f"speedup over solve_ivp RK45, crane scenario, same time "
           f"({TARGET_STEPS_NAIVE:,} base steps)", 20.0, False, "×"),
    Target("ort_batch4096", f"batch-{TARGET_BATCH:,} throughput ratio vs onnxruntime "
           "(1 thread)", 1.0, False, "×"),
    Target("ort_batch4096_busy", f"batch-{TARGET_BATCH:,} throughput ratio vs onnxruntime "
           "(1 thread), one core kept busy by a neighbour process", 0.6, False, "×"),
    Target("dense", "dense forecast of 10,000 points vs one network call at batch 10,000", 2.0,
           True, "×"),
    Target("import", "`import stridecast.runtime` time ratio vs `import numpy`", 1.3, True, "×"),
    Target("import_load", "import + load of the bundle", 0.2, True, "s"),
    Target("rss", "peak RSS ratio (import, load, advance) vs `import numpy` alone", 1.25, True,
           "×"),
)


def _row(rows: Sequence[Mapping[str, Any]], key: str, value: int) -> Mapping[str, Any] | None:
    return next((row for row in rows if row.get(key) == value), None)


def _time_ratio(row: Mapping[str, Any] | None, peer: str) -> float | None:
    if row is None or peer not in row["times"]:
        return None
    return row["times"]["stridecast"]["p50"] / row["times"][peer]["p50"]


def _batch_ratio(bench: Mapping[str, Any]) -> float | None:
    row = _row(bench["batch"], "batch", TARGET_BATCH)
    if row is None or "onnxruntime" not in row["times"]:
        return None
    times = row["times"]
    return times["stridecast"]["throughput"] / times["onnxruntime"]["throughput"]


def measure_targets(bench: Mapping[str, Any] | None, solvers: Mapping[str, Any] | None = None,
                    system: Mapping[str, Any] | None = None, *,
                    busy: Mapping[str, Any] | None = None) -> dict[str, float | None]:
    """The measured value of every target available in these results (None where absent).

    `busy` is the bundle run of the busy-neighbour pass; the other arguments are of the pass
    on the machine as found.
    """
    measured: dict[str, float | None] = {target.key: None for target in TARGETS}
    if busy is not None:
        measured["ort_batch4096_busy"] = _batch_ratio(busy)
    if bench is not None:
        latency = bench["latency"]
        measured["ort_batch1"] = _time_ratio(_row(latency, "base_steps", TARGET_STEPS_ORT),
                                             "onnxruntime")
        naive_row = _row(latency, "base_steps", TARGET_STEPS_NAIVE)
        if naive_row is not None and "naive" in naive_row["times"]:
            measured["naive"] = 1.0 / _time_ratio(naive_row, "naive")
        measured["ort_batch4096"] = _batch_ratio(bench)
        measured["dense"] = bench["dense"]["ratio"]
    if solvers is not None:
        row = _row(solvers["rows"], "base_steps", solvers["target_steps"])
        measured["rk45"] = None if row is None else 1.0 / _time_ratio(row, "rk45")
    if system is not None:
        measured["import"] = system["imports"]["stridecast.runtime"].get("ratio_to_numpy")
        measured["import_load"] = system["import_and_load"]["seconds"]
        rss = system["peak_rss_kib"]
        if rss.get("numpy") and rss.get("stridecast"):
            measured["rss"] = rss["stridecast"] / rss["numpy"]
    return measured


def _show(target: Target, value: float | None) -> str:
    if value is None:
        return "—"
    return format_seconds(value) if target.unit == "s" else f"{value:.3g}×"


def _status(passed: bool | None) -> str:
    return {True: "PASS", False: "MISS", None: "n/a"}[passed]


def target_table(passes: Mapping[str, Mapping[str, float | None]]) -> str:
    """Markdown table of every target with one measured and one status column per pass."""
    header = "| Target | Required | " + " | ".join(
        f"{label} | Status" for label in passes) + " |"
    lines = [header, "|" + "---|" * (2 + 2 * len(passes))]
    for target in TARGETS:
        cells = []
        for values in passes.values():
            value = values.get(target.key)
            cells += [_show(target, value), _status(target.check(value))]
        lines.append(f"| {target.description} | {target.required()} | " + " | ".join(cells) + " |")
    return "\n".join(lines)


def _with_speedup(time: float, own: float) -> str:
    """A peer's time and how many times faster stridecast (`own`) was."""
    return f"{format_seconds(time)} ({time / own:.3g}× faster)"


def latency_table(bench: Mapping[str, Any]) -> str:
    """Single-state `advance`: stridecast p50/p99 beside each peer (time ratio or speedup)."""
    peers = [name for name in ("onnxruntime", "torch") if name in bench["settings"]["peers"]]
    naive = any("naive" in row["times"] for row in bench["latency"])
    header = ["Base steps", "Evaluations", "stridecast p50 / p99"]
    header += [f"{name} p50 (stridecast ÷ {name})" for name in peers]
    if naive:
        header.append("naive rollout p50 (speedup)")
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    for row in bench["latency"]:
        own = row["times"]["stridecast"]
        cells = [f"{row['base_steps']:,}", str(row["evaluations"]),
                 f"{format_seconds(own['p50'])} / {format_seconds(own['p99'])}"]
        for name in peers:
            theirs = row["times"][name]["p50"]
            cells.append(f"{format_seconds(theirs)} ({own['p50'] / theirs:.3g}×)")
        if naive:
            theirs = row["times"].get("naive")
            cells.append("—" if theirs is None else _with_speedup(theirs["p50"], own["p50"]))
        lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines)


def batch_table(passes: Mapping[str, Mapping[str, Any]]) -> str:
    """Per-call latency and throughput at each batch size, for every pass."""
    lines = ["| Scenario | Batch | stridecast per call | stridecast states·steps/s | "
             "onnxruntime per call (throughput ratio) | torch per call (throughput ratio) |",
             "|---|---|---|---|---|---|"]
    for label, bench in passes.items():
        for row in bench["batch"]:
            own = row["times"]["stridecast"]
            cells = [label, f"{row['batch']:,}", format_seconds(own["p50"]),
                     format_rate(own["throughput"])]
            for name in ("onnxruntime", "torch"):
                theirs = row["times"].get(name)
                cells.append("—" if theirs is None else
                             f"{format_seconds(theirs['p50'])} "
                             f"({own['throughput'] / theirs['throughput']:.3g}×)")
            lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines)


def busy_notes(passes: Mapping[str, Mapping[str, Any]]) -> list[str]:
    """How much of its batch throughput each competitor kept with a busy neighbour."""
    busy = next((bench for label, bench in passes.items() if label != "default"), None)
    if "default" not in passes or busy is None:
        return []
    kept = []
    for row in passes["default"]["batch"]:
        other = _row(busy["batch"], "batch", row["batch"])
        if other is None:
            continue
        shares = [f"{name} {other['times'][name]['throughput'] / times['throughput']:.0%}"
                  for name, times in row["times"].items() if name in other["times"]]
        kept.append(f"batch {row['batch']:,}: " + ", ".join(shares))
    return ["Share of the idle throughput kept with one core busy (busy ÷ default): "
            + "; ".join(kept) + f". The runtime holds BLAS at one thread around batches of "
            f"{SCOPE_MIN_BATCH} states or more and splits large batches over its own threads, "
            "whoever is free taking the next chunk; onnxruntime and torch run with one "
            "intra-op thread."]


def threads_table(passes: Mapping[str, Mapping[str, Any]]) -> str:
    """One network call per batch size: no policy, BLAS at one thread, and split."""
    names = ("as called", "1 thread", "split")
    lines = ["| Scenario | Batch | " + " | ".join(f"{name} p50" for name in names)
             + " | split ÷ as called |", "|---|---|" + "---|" * (len(names) + 1)]
    for label, record in passes.items():
        for row in record["rows"]:
            times = row["times"]
            cells = [format_seconds(times[name]["p50"]) for name in names]
            ratio = times["split"]["p50"] / times["as called"]["p50"]
            lines.append(f"| {label} | {row['batch']:,} | " + " | ".join(cells)
                         + f" | {ratio:.3g}× |")
    return "\n".join(lines)


def threads_note(record: Mapping[str, Any]) -> str:
    """What the crossover table compares, with the cost of the scope itself."""
    scope = record["scope"]
    return (f"One call of the finest level. \"as called\": no policy (BLAS as the process "
            f"has it); \"1 thread\": `load(..., threads=1)`; \"split\": `load(...)`, "
            f"{record['threads']} threads. Batches below {record['scope_min_batch']} run as "
            f"called in every stepper (same code path). Entering and leaving the runtime's "
            f"BLAS scope costs {format_seconds(scope['runtime'])}; threadpoolctl's "
            f"`threadpool_limits`, which rescans the loaded libraries each time, "
            f"{format_seconds(scope['threadpool_limits'])}.")


def dense_table(passes: Mapping[str, Mapping[str, Any]]) -> str:
    """Dense forecast against one network call at the same batch."""
    lines = ["| Scenario | Points | Evaluations / calls / depth | forecast | per point | "
             "one call at batch = points | ratio | onnxruntime one call |",
             "|---|---|---|---|---|---|---|---|"]
    for label, bench in passes.items():
        dense = bench["dense"]
        ort = dense.get("onnxruntime_single_call")
        lines.append(
            f"| {label} | {dense['points']:,} | {dense['evaluations']:,} / "
            f"{dense['network_calls']} / {dense['depth']} | "
            f"{format_seconds(dense['forecast']['p50'])} | "
            f"{format_seconds(dense['per_point_forecast'])} | "
            f"{format_seconds(dense['single_call']['p50'])} | {dense['ratio']:.3g}× | "
            f"{'—' if ort is None else format_seconds(ort['p50'])} |")
    return "\n".join(lines)


def solver_table(solvers: Mapping[str, Any]) -> str:
    """stridecast `advance` against solve_ivp at each horizon (speedups)."""
    tolerance = solvers["dop853_tolerance"]
    dop = f"DOP853 rtol={tolerance['rtol']:g} atol={tolerance['atol']:g}"
    lines = [f"| Base steps | t | stridecast | RK45 default (speedup) | {dop} (speedup) |",
             "|---|---|---|---|---|"]
    for row in solvers["rows"]:
        own = row["times"]["stridecast"]["p50"]
        lines.append(
            f"| {row['base_steps']:,} | {row['t']:g} | {format_seconds(own)} | "
            f"{_with_speedup(row['times']['rk45']['p50'], own)} | "
            f"{_with_speedup(row['times']['dop853']['p50'], own)} |")
    return "\n".join(lines)


def solver_note(solvers: Mapping[str, Any]) -> str:
    """One paragraph on what the solver comparison timed and how DOP853's tolerance was set."""
    if solvers["trained_on_crane"]:
        match = solvers["match"]
        text = (f"Stepper: `{solvers['stepper']}` ({solvers['stepper_source']}), trained on "
                f"the crane; timed from a 0.15 rad swing with a 2 cm bob. At t = {match['t']:g} "
                f"its RMS error against the DOP853 ground truth is {match['stepper_error']:.3g}; "
                f"RK45 at default tolerances: {match['rk45_error']:.3g}.")
        if solvers["tolerance_matched"]:
            loosest = match["dop853_tolerance"]["rtol"] == max(solvers["candidate_rtols"])
            text += (f" DOP853 at rtol = atol = {match['dop853_tolerance']['rtol']:g} has error "
                     f"{match['dop853_error']:.3g}" + (
                         ": even the loosest tolerance tried is at least as accurate as the "
                         "stepper." if loosest else
                         ", the loosest tolerance tried that is at least as accurate."))
        else:
            text += " No DOP853 tolerance tried was as loose as the stepper's error allows."
        return text
    return ("No bundle trained on the crane was available (no `--crane-bundle`, no shipped "
            "bundle at `stridecast.demo_bundle()`): the stepper timed is the untrained reference "
            "model, whose cost per step equals any network of its size, and DOP853 runs at a "
            "fixed tolerance, **not matched** to a stepper error.")


def system_table(system: Mapping[str, Any]) -> str:
    """Import times, import + load, and peak RSS."""
    lines = ["| Import | in-process (median) | ratio to numpy (median of rounds) | "
             "whole process wall |", "|---|---|---|---|"]
    rows = [(f"`import {name}`", record) for name, record in system["imports"].items()]
    rows.append(("`import stridecast.runtime` + `load(bundle)`", system["import_and_load"]))
    for label, record in rows:
        ratio = record.get("ratio_to_numpy")
        lines.append(f"| {label} | {format_seconds(record['seconds'])} | "
                     f"{'—' if ratio is None else f'{ratio:.3g}×'} | "
                     f"{format_seconds(record['wall'])} |")
    rss = system["peak_rss_kib"]
    base = rss.get("numpy")
    lines += ["", "| Process | peak RSS | ratio to `import numpy` |", "|---|---|---|"]
    for name, kib in rss.items():
        ratio = f"{kib / base:.3g}×" if kib and base else "—"
        shown = "—" if kib is None else f"{kib / 1024:.1f} MiB"
        lines.append(f"| {name} | {shown} | {ratio} |")
    return "\n".join(lines)


def environment_lines(passes: Mapping[str, Mapping[str, Any]]) -> str:
    """Machine, versions and per-pass thread settings, as a bullet list."""
    first = next(iter(passes.values()))
    lines = [f"- CPU: {first['cpu']} ({first['cpus_usable']} usable of {first['cpu_count']}); "
             f"Python {first['python']}; numpy {first['numpy']}; onnxruntime "
             f"{first['onnxruntime']}; torch {first['torch']}; scipy {first['scipy']}"]
    for label, record in passes.items():
        blas = record["numpy_blas"]
        variables = ", ".join(f"{k}={v}" for k, v in record["thread_variables"].items()
                              if v is not None) or "none set"
        start, end = record.get("load_average_start"), record.get("load_average")
        if start is not None and end is not None:
            load_text = f"; 1-min load average {start[0]:.2f} at start, {end[0]:.2f} at end"
        else:
            load_text = "" if end is None else f"; 1-min load average {end[0]:.2f}"
        kernel = f", kernel {blas['kernel']}" if blas.get("kernel") else ""
        lines.append(f"- {label}: environment variables {variables}; numpy BLAS threads "
                     f"{blas['threads']} ({blas['source']}, {blas['library']}{kernel}); "
                     f"stridecast threads {record.get('stridecast_threads', '—')}; torch "
                     f"threads {record['torch_threads']}; onnxruntime intra/inter-op 1/1, no "
                     f"spinning{load_text}")
    return "\n".join(lines)


def bundle_tables(bench: Mapping[str, Any]) -> str:
    """The tables of one bundle run (what `stridecast bench BUNDLE` prints)."""
    label = "default"
    info = bench["bundle"]
    return "\n\n".join([
        f"Bundle `{info['name']}`: strides {info['strides']}, d = {info['state_dim']}, "
        f"base step {info['base_step']:g} {info['time_unit']}, {info['dtype']}.",
        environment_lines({label: bench["environment"]}),
        "Single-state `advance` (state shape (d,)); peers run the same plan:",
        latency_table(bench),
        batch_table({label: bench}),
        dense_table({label: bench}),
        target_table({label: measure_targets(bench)}),
    ])
