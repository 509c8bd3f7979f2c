"""Smoke tests of the benchmark suite: tiny sizes, table structure, equal answers; no timings.

Speed is never asserted here (DEVELOPERS.md: speed belongs in `benchmarks/`); what is checked
is that every competitor computes the same thing as stridecast, so the timings compare equal
work, and that the report keeps its shape.
"""

from __future__ import annotations

import copy
import json
import os

import numpy as np
import pytest

pytest.importorskip("onnxruntime")
pytest.importorskip("torch")
pytest.importorskip("scipy")
pytest.importorskip("matplotlib")

from stridecast.benchmarks import (
    bundle_bench,
    environment,
    neighbour,
    plot,
    report,
    solver_bench,
    system_bench,
    threads_bench,
)
from stridecast.benchmarks.cli import document, main
from stridecast.benchmarks.competitors import (
    OnnxRuntimeLoop,
    TorchEagerLoop,
    plan_steps,
)
from stridecast.benchmarks.reference import (
    build_reference,
    finest_only_bundle,
    torch_twins,
)
from stridecast.benchmarks.timing import Budget, interleaved, summary
from stridecast.demo import crane
from stridecast.runtime import load

TINY_STRIDES = (1, 2, 4, 8)
TINY_HIDDEN = (16, 16)
# One round after one warm-up call: enough to exercise the code, no timing meaning.
TINY_BUDGET = Budget(seconds=0.0, min_rounds=2, max_rounds=2, warmup=1)
TINY_BUDGETS = dict.fromkeys(("latency", "naive", "batch", "dense"), TINY_BUDGET)
# float32 rounding of the same network evaluated by different libraries, a few steps deep, on
# states of size ~24 (the reference mean): a few ulps of 24 (ulp ≈ 1.9e-6) per step
# (common practice for float32 cross-library comparisons).
FLOAT32_AGREEMENT = 1e-4


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    directory = tmp_path_factory.mktemp("bench")
    return build_reference(directory, strides=TINY_STRIDES, hidden=TINY_HIDDEN)


@pytest.fixture(scope="module")
def bench_result(reference, tmp_path_factory):
    return bundle_bench.run(reference.path, torch_modules=reference.modules, horizons=(4, 12),
                            batches=(1, 3), batch_base_steps=12, dense_points=40,
                            naive_target_steps=20, budgets=TINY_BUDGETS,
                            work_dir=tmp_path_factory.mktemp("work"))


@pytest.fixture(scope="module")
def solver_result(reference):
    return solver_bench.run(load(reference.path), (4, 20), trained_on_crane=False,
                            target_steps=20, budget=TINY_BUDGET)


def test_onnxruntime_loop_matches_stridecast(reference):
    stepper = load(reference.path)
    states = bundle_bench.example_states(stepper, 5)
    steps = plan_steps(stepper, 27)
    # Expected: the runtime's own answer; onnxruntime runs the same ONNX files on the same plan.
    expected = stepper.advance(states, 27 * stepper.base_step)
    answer = OnnxRuntimeLoop(stepper, reference.path).advance(states, steps)
    np.testing.assert_allclose(answer, expected, rtol=0, atol=FLOAT32_AGREEMENT)


def test_torch_loop_matches_stridecast_with_originals_and_twins(reference):
    stepper = load(reference.path)
    states = bundle_bench.example_states(stepper, 5)
    steps = plan_steps(stepper, 27)
    expected = stepper.advance(states, 27 * stepper.base_step)
    # Expected: the runtime's answer; torch runs the modules the ONNX files were written from.
    original = TorchEagerLoop(stepper, reference.modules).advance(states, steps)
    np.testing.assert_allclose(original, expected, rtol=0, atol=FLOAT32_AGREEMENT)
    twins = torch_twins(reference.path)
    assert sorted(twins) == list(TINY_STRIDES)
    rebuilt = TorchEagerLoop(stepper, twins).advance(states, steps)
    np.testing.assert_allclose(rebuilt, original, rtol=0, atol=1e-6)


def test_naive_rollout_is_the_finest_level_repeated(reference, tmp_path):
    stepper = load(reference.path)
    naive = load(finest_only_bundle(reference.path, tmp_path / "finest.bundle"))
    assert naive.strides == (1,)
    state = bundle_bench.example_states(stepper, 1)[0]
    # Expected: the full bundle's finest level applied 7 times by hand.
    expected = state
    for _ in range(7):
        expected = stepper.step(expected, 1)
    np.testing.assert_allclose(naive.advance(state, 7 * stepper.base_step), expected,
                               rtol=0, atol=1e-6)
    assert naive.plan(7 * stepper.base_step).evaluations == 7


def test_solver_matches_the_crane_ground_truth():
    state = solver_bench.initial_state()
    # Expected: stridecast.demo.crane.simulate, SciPy DOP853 at rtol = atol = 1e-10.
    truth = crane.simulate(state, np.array([0.5]))[0]
    tight = solver_bench.solve(state, 0.5, "DOP853", {"rtol": 1e-10, "atol": 1e-10})
    np.testing.assert_allclose(tight, truth, rtol=0, atol=1e-7)
    loose = solver_bench.solve(state, 0.5, "RK45", solver_bench.RK45_DEFAULT)
    np.testing.assert_allclose(loose, truth, rtol=0, atol=1e-2)


def test_bundle_run_structure_and_agreement(bench_result):
    assert set(bench_result) >= {"bundle", "environment", "settings", "latency", "batch",
                                 "dense", "agreement"}
    assert bench_result["settings"]["peers"] == ["onnxruntime", "torch"]
    assert [row["base_steps"] for row in bench_result["latency"]] == [4, 12, 20]
    for row in bench_result["latency"]:
        assert set(row["times"]) >= {"stridecast", "onnxruntime", "torch", "naive"}
        assert row["evaluations"] == sum(count for _, count in row["steps"])
        assert {"p50", "p99", "mean", "rounds"} <= set(row["times"]["stridecast"])
    assert [row["batch"] for row in bench_result["batch"]] == [1, 3]
    dense = bench_result["dense"]
    # Powers of two: every target 1..40 is a node of the shared-prefix tree (a plan's prefix
    # sums are themselves targets), so the tree has exactly 40 non-root nodes.
    assert dense["points"] == 40 and dense["evaluations"] == 40
    assert set(bench_result["agreement"]) == {"onnxruntime", "torch"}
    assert max(bench_result["agreement"].values()) <= FLOAT32_AGREEMENT
    json.dumps(bench_result)  # JSON-ready as written to bench-results.json


def test_solver_run_structure(solver_result):
    assert solver_result["trained_on_crane"] is False
    assert solver_result["tolerance_matched"] is False
    assert [row["base_steps"] for row in solver_result["rows"]] == [4, 20]
    assert set(solver_result["rows"][0]["times"]) == {"stridecast", "rk45", "dop853"}
    assert solver_bench.speedup_at(solver_result, 20, "rk45") > 0


def _table_rows(text: str) -> list[list[str]]:
    return [[cell.strip() for cell in line.strip("|").split("|")]
            for line in text.splitlines() if line.startswith("|")]


def _assert_rectangular(text: str) -> list[list[str]]:
    rows = _table_rows(text)
    assert len({len(row) for row in rows}) == 1, text
    assert set(rows[1][0]) == {"-"}  # the Markdown header rule
    return rows


def test_target_table_lists_every_target_with_status(bench_result, solver_result):
    measured = report.measure_targets(bench_result, solver_result)
    assert set(measured) == {target.key for target in report.TARGETS}
    assert measured["import"] is None  # no start-up measurement given
    rows = _assert_rectangular(report.target_table({"default": measured}))
    assert len(rows) == 2 + len(report.TARGETS)
    assert {row[3] for row in rows[2:]} <= {"PASS", "MISS", "n/a"}


def test_bundle_tables_are_rectangular(bench_result, solver_result):
    for table in (report.latency_table(bench_result),
                  report.batch_table({"default": bench_result}),
                  report.dense_table({"default": bench_result}),
                  report.solver_table(solver_result)):
        rows = _assert_rectangular(table)
        assert len(rows) > 2
    assert "Bundle `" in bundle_bench.to_markdown(bench_result)


@pytest.fixture(scope="module")
def results(bench_result, solver_result):
    system = {"imports": {"numpy": {"seconds": 0.1, "wall": 0.2, "ratio_to_numpy": 1.0,
                                    "repeats": 1},
                          "stridecast.runtime": {"seconds": 0.12, "wall": 0.22,
                                                 "ratio_to_numpy": 1.2, "repeats": 1}},
              "import_and_load": {"seconds": 0.15, "wall": 0.25, "ratio_to_numpy": 1.5,
                                  "repeats": 1},
              "peak_rss_kib": {"numpy": 1000.0, "stridecast": 1100.0}}
    passes = {"default": {"environment": bench_result["environment"], "bench": bench_result,
                          "solvers": solver_result, "system": system}}
    return {"command": "python -m stridecast.benchmarks --quick", "quick": True, "passes": passes,
            "targets": {"default": report.measure_targets(bench_result, solver_result, system)}}


def test_document_and_plot(results, bench_result, solver_result, tmp_path):
    assert results["targets"]["default"]["import"] == pytest.approx(1.2)
    text = document(results)
    for heading in ("## Targets", "## Single-state", "## Batches", "## Dense forecast",
                    "## Against SciPy", "## Start-up and memory", "## Agreement"):
        assert heading in text
    assert "`python -m stridecast.benchmarks --quick`" in text
    path = plot.plot_horizon(bench_result, solver_result, tmp_path / "horizon.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    labels = plot.horizon_series(bench_result, solver_result)
    assert "naive finest-level rollout" in labels and "solve_ivp RK45 (default tol.)" in labels


def test_child_process_reports_import_time_and_peak_memory(tmp_path):
    before = dict(os.environ)
    env = system_bench.child_environment(str(tmp_path / "pycache"))
    assert "PYTHONDONTWRITEBYTECODE" not in env
    assert env["PYTHONPYCACHEPREFIX"] == str(tmp_path / "pycache")
    record = system_bench._run_child(system_bench.import_scripts()["numpy"], str(tmp_path),
                                     env)
    assert record["seconds"] > 0 and record["wall"] >= record["seconds"]
    assert record["maxrss_kib"] > 0
    assert dict(os.environ) == before  # only the child's environment differs


def test_interleaved_timing_and_summary():
    calls = []
    samples = interleaved({"a": lambda: calls.append("a"), "b": lambda: calls.append("b")},
                          Budget(seconds=0.0, min_rounds=3, max_rounds=3, warmup=1))
    # One warm-up call each, then three rounds taken in turn.
    assert calls == ["a", "b", "a", "b", "a", "b", "a", "b"]
    assert {name: len(values) for name, values in samples.items()} == {"a": 3, "b": 3}
    assert summary(np.array([1.0, 2.0, 3.0]))["p50"] == 2.0  # median (common practice)


def test_environment_record_names_thread_settings():
    record = environment.describe()
    assert set(record["thread_variables"]) == set(environment.THREAD_VARIABLES)
    blas = record["numpy_blas"]
    assert blas["source"] in {"threadpoolctl", "openblas", "unknown"}
    assert blas["threads"] is None or blas["threads"] >= 1
    json.dumps(record)


def test_busy_note_gives_the_share_of_throughput_kept(bench_result):
    busy = copy.deepcopy(bench_result)
    for row in busy["batch"]:
        for times in row["times"].values():
            times["throughput"] /= 4
    notes = report.busy_notes({"default": bench_result, "busy neighbour": busy})
    # Expected: a quarter of each throughput, printed as a percentage.
    assert len(notes) == 1 and "stridecast 25%" in notes[0] and "onnxruntime 25%" in notes[0]
    assert report.busy_notes({"default": bench_result}) == []


def test_busy_target_comes_from_the_busy_pass(bench_result):
    busy = copy.deepcopy(bench_result)
    row = busy["batch"][-1]
    row["batch"] = report.TARGET_BATCH
    row["times"]["stridecast"]["throughput"] = 3.0
    row["times"]["onnxruntime"]["throughput"] = 4.0
    measured = report.measure_targets(bench_result, busy=busy)
    assert measured["ort_batch4096_busy"] == 0.75
    assert measured["ort_batch4096"] is None  # the tiny idle run has no batch 4,096


def test_busy_neighbour_keeps_a_core_busy_and_stops():
    import time

    with neighbour.busy_neighbour() as process:
        assert process.poll() is None
        begin = time.process_time()
        time.sleep(0.2)
        assert time.process_time() - begin < 0.1  # the spinning is not in this process
    assert process.poll() is not None


class _TruthPlusOffset:
    """A stand-in stepper: the crane ground truth plus a fixed error on every component."""

    def __init__(self, offset: float):
        self.offset = offset

    def advance(self, states, t):
        return crane.simulate(states, np.array([t]))[0] + self.offset


def test_matched_tolerance_is_no_more_accurate_than_needed():
    # Expected: the stand-in's RMS error is offset·√4 (4 components, every state alike).
    match = solver_bench.matched_tolerance(_TruthPlusOffset(1e-4), 0.5)
    assert match["stepper_error"] == pytest.approx(2e-4, rel=1e-3)
    assert match["dop853_error"] <= match["stepper_error"]
    chosen = match["dop853_tolerance"]["rtol"]
    index = solver_bench.CANDIDATE_RTOLS.index(chosen)
    assert index > 0  # 1e-2 is far less accurate than 2e-4 over half a second
    # The next looser tolerance, on the same states, is less accurate than the stepper.
    looser = solver_bench.CANDIDATE_RTOLS[index - 1]
    states = crane.sample_initial_states(solver_bench.ERROR_STATES, np.random.default_rng(0))
    truth = crane.simulate(states, np.array([0.5]))[0]
    answers = np.stack([solver_bench.solve(s, 0.5, "DOP853", {"rtol": looser, "atol": looser})
                        for s in states])
    assert np.sqrt(np.mean(np.sum((answers - truth) ** 2, axis=-1))) > match["stepper_error"]


def test_render_redraws_plot_and_writes_markdown_from_json(results, tmp_path, capsys):
    saved = tmp_path / "out" / "bench-results.json"
    saved.parent.mkdir()
    saved.write_text(json.dumps(results), encoding="utf-8")
    markdown = tmp_path / "docs" / "benchmarks.md"
    markdown.parent.mkdir()
    assert main(["--render", str(saved), "--markdown", str(markdown), "--quiet"]) == 0
    assert (saved.parent / "bench-horizon.png").is_file()
    # The image link is relative to the Markdown file.
    assert "](../out/bench-horizon.png)" in markdown.read_text(encoding="utf-8")
    assert "## Targets" in capsys.readouterr().out


def test_thread_crossover_run_and_table(reference):
    record = threads_bench.run(reference.path, batches=(1, 40), budget=TINY_BUDGET)
    assert [row["batch"] for row in record["rows"]] == [1, 40]
    assert set(record["rows"][0]["times"]) == {"as called", "1 thread", "split"}
    assert record["scope"]["runtime"] > 0 and record["scope"]["threadpool_limits"] > 0
    rows = _assert_rectangular(report.threads_table({"default": record}))
    assert len(rows) == 4
    assert "threadpool_limits" in report.threads_note(record)
