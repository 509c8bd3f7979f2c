"""Runtime under stress: levels that turn non-finite mid-plan, one stepper shared by 8 threads,
and batch invariance.

The "poisoned" bundle rotates the state by 0.1 rad per base step (x(t) = (cos t, sin t) from
(1, 0), the flow of the harmonic oscillator with ω = 1: a published formula) and adds
0 · f(x₀), where f is Sqrt, Log or 1/Relu: NaN exactly when a level's input has x₀ < 0 (x₀ ≤ 0
for Log and Div). So which step of a plan fails follows from the signs of cos, computed here.
"""

from __future__ import annotations

import itertools
import math
import random
import threading
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper

from stridecast.runtime import LevelEntry, Manifest, NonFiniteError, load, write_bundle
from stridecast.runtime.compile import SMALL_BATCH

# The Div poison makes NumPy warn "divide by zero" inside `advance`: a known issue, pinned by
# test_division_by_zero_in_a_level_raises_without_numpy_warnings below.
pytestmark = pytest.mark.filterwarnings("ignore:divide by zero encountered:RuntimeWarning")
THETA = 0.1  # rad per base step; base step 0.1 s, so the angular velocity is 1 rad/s
BASE_STEP = 0.1
STRIDES = (1, 4)
AREA_NONFINITE = "Runtime: non-finite values"


def rotation(angle: float) -> np.ndarray:
    return np.array([[math.cos(angle), -math.sin(angle)], [math.sin(angle), math.cos(angle)]])


def model_bytes(nodes, initializers, dtype) -> bytes:
    elem = TensorProto.DOUBLE if dtype == np.float64 else TensorProto.FLOAT
    graph = helper.make_graph(
        nodes, "level", [helper.make_tensor_value_info("state", elem, ["batch", 2])],
        [helper.make_tensor_value_info("next", elem, ["batch", 2])], initializer=initializers)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    return model.SerializeToString()


def poisoned_level(stride: int, poison: str, dtype=np.float32) -> bytes:
    """next = state @ R(stride θ)ᵀ + 0 · poison(state[:, :1])."""
    initializers = [
        numpy_helper.from_array(rotation(stride * THETA).T.astype(dtype), "weight"),
        numpy_helper.from_array(np.array([0], np.int64), "column"),
        numpy_helper.from_array(np.array(0.0, dtype), "zero"),
        numpy_helper.from_array(np.array(1.0, dtype), "one"),
    ]
    nodes = [helper.make_node("MatMul", ["state", "weight"], ["turned"]),
             helper.make_node("Gather", ["state", "column"], ["first"], axis=1)]
    if poison == "Div":
        nodes += [helper.make_node("Relu", ["first"], ["positive"]),
                  helper.make_node("Div", ["one", "positive"], ["poison"])]
    else:
        nodes.append(helper.make_node(poison, ["first"], ["poison"]))
    nodes += [helper.make_node("Mul", ["zero", "poison"], ["nothing"]),
              helper.make_node("Add", ["turned", "nothing"], ["next"])]
    return model_bytes(nodes, initializers, dtype)


def scaling_level(factor: float, dtype=np.float32) -> bytes:
    """next = state @ (factor · I): an affine chain, so it runs on the compiled fast path."""
    weight = numpy_helper.from_array((factor * np.eye(2)).astype(dtype), "weight")
    return model_bytes([helper.make_node("MatMul", ["state", "weight"], ["next"])], [weight],
                       dtype)


def two_state_manifest(strides) -> Manifest:
    return Manifest(state_names=("x0", "x1"), state_units=("", ""), base_step=BASE_STEP,
                    mean=(0.0, 0.0), scale=(1.0, 1.0), update="replace",
                    levels=tuple(LevelEntry(stride, file="", sha256="0" * 64)
                                 for stride in strides))


@pytest.fixture(scope="module", params=["Sqrt", "Log", "Div"])
def poisoned(request, tmp_path_factory):
    """(poison name, float32 stepper, float64 stepper) of the poisoned rotation bundle."""
    steppers = {}
    for dtype in (np.float32, np.float64):
        out = tmp_path_factory.mktemp(f"poison-{request.param}") / "bundle"
        files = {stride: poisoned_level(stride, request.param, dtype) for stride in STRIDES}
        write_bundle(out, two_state_manifest(STRIDES), files)
        # load() probes each level once at the mean state (0, 0), where the poison is NaN
        # (Log, Div) by design; NumPy's warnings about that probe are expected here.
        with np.errstate(divide="ignore", invalid="ignore"):
            steppers[dtype] = load(out, dtype=np.dtype(dtype).name)
    return request.param, steppers[np.float32], steppers[np.float64]


def first_failing_step(base_steps: int, start_angle: float = 0.0) -> tuple[int, int] | None:
    """(step number, stride) of the first plan step whose input has x₀ < 0, coarse first."""
    plan = [4] * (base_steps // 4) + [1] * (base_steps % 4)
    position = 0
    for number, stride in enumerate(plan, start=1):
        if math.cos(start_angle + position * THETA) < 0:
            return number, stride
        position += stride
    return None


@pytest.mark.parametrize("dtype", [np.float32, np.float64], ids=["float32", "float64"])
@pytest.mark.parametrize("base_steps", [15, 16, 17, 30, 40])
def test_advance_stops_at_the_step_and_level_that_turned_non_finite(poisoned, reliability,
                                                                     dtype, base_steps):
    _, stepper32, stepper64 = poisoned
    stepper = stepper32 if dtype == np.float32 else stepper64
    t = base_steps * BASE_STEP
    failing = first_failing_step(base_steps)
    for state in (np.array([1.0, 0.0]), np.array([[1.0, 0.0]] * 3)):
        if failing is None:
            # Expected: the rotation x(t) = (cos t, sin t), a published formula.
            result = stepper.advance(state, t)
            expected = np.broadcast_to([math.cos(t), math.sin(t)], result.shape)
            np.testing.assert_allclose(result, expected, rtol=0, atol=1e-5)
        else:
            number, stride = failing
            with pytest.raises(NonFiniteError, match=rf"^the level with stride {stride} "
                               rf"produced non-finite values at step {number} of the plan"):
                stepper.advance(state, t)
    reliability.record(
        AREA_NONFINITE, "a level outputs NaN for some inputs (Sqrt, Log of a negative, 1/0): "
        "`advance`, single and batch, float32 and float64, before and after the bad region",
        2, "every call that reaches the bad region raises NonFiniteError naming the step and "
        "the stride (as predicted from cos t); every other call matches (cos t, sin t)")


def test_one_bad_row_stops_the_whole_batch(poisoned, reliability):
    _, stepper, _ = poisoned
    # Row 2 starts at angle 1.0 rad: its level input at base step 8 has cos(1.8) < 0.
    angles = [0.0, 0.2, 1.0, -0.5]
    states = np.array([[math.cos(a), math.sin(a)] for a in angles])
    assert first_failing_step(12, 1.0) == (3, 4) and first_failing_step(12, 0.2) is None
    with pytest.raises(NonFiniteError, match=r"stride 4 produced non-finite values at step 3"):
        stepper.advance(states, 1.2)
    with pytest.raises(NonFiniteError, match=r"stride 4 produced non-finite values"):
        stepper.forecast(states, [0.4, 1.2])
    reliability.record(AREA_NONFINITE, "one poisoned row in a batch of healthy rows "
                       "(advance and forecast)", 2,
                       "the whole call raises NonFiniteError; no partial result with NaN")


@pytest.mark.parametrize(("times", "fails"), [
    ([0.5, 1.0, 1.5], False), ([1.5, 0.3, 1.5], False), ([0.5, 3.0, 1.0], True),
    ([4.0], True), ([1.45], False), ([1.55], True),
], ids=["before", "unordered-duplicates", "past", "single-past", "interpolated-before",
        "interpolated-anchor-past"])
def test_forecast_stops_or_returns_finite(poisoned, reliability, times, fails):
    _, stepper, _ = poisoned
    for state in (np.array([1.0, 0.0]), np.array([[1.0, 0.0], [math.cos(0.1), math.sin(0.1)]])):
        if fails:
            with pytest.raises(NonFiniteError, match=r"^the level with stride [14] produced "
                               r"non-finite values at step \d+ of the plan"):
                stepper.forecast(state, times)
        else:
            result = stepper.forecast(state, times)
            assert np.isfinite(result).all()
            # Expected: (cos t, sin t) of the first row; cubic interpolation between grid
            # states (off-grid 1.45) is within 1e-4 of the rotation at this step size.
            first = result[:, 0] if result.ndim == 3 else result
            expected = np.array([[math.cos(t), math.sin(t)] for t in times])
            np.testing.assert_allclose(first, expected, rtol=0, atol=1e-4)
    reliability.record(
        AREA_NONFINITE, "`forecast` over the same levels: times before/after the bad region, "
        "unordered, duplicated, off-grid (interpolation anchors past the region)", 2,
        "NonFiniteError naming step and stride, or a finite answer matching (cos t, sin t)")


# Regression (found by this suite, fixed): Stepper._run_sequential and Stepper._apply wrap the
# kernels in np.errstate(over='ignore', invalid='ignore') but not divide='ignore': a level dividing
# by zero emits NumPy's RuntimeWarning on every call, on top of the NonFiniteError that already
# reports it.
def test_division_by_zero_in_a_level_raises_without_numpy_warnings(tmp_path):
    out = write_bundle(tmp_path / "div", two_state_manifest(STRIDES),
                       {stride: poisoned_level(stride, "Div") for stride in STRIDES})
    with np.errstate(divide="ignore", invalid="ignore"):
        stepper = load(out)  # the load-time probe at (0, 0) divides by zero by design
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with pytest.raises(NonFiniteError):
            stepper.advance(np.array([1.0, 0.0]), 3.0)
    assert [str(w.message) for w in caught if w.category is RuntimeWarning] == []


@given(st.floats(0, 2 * math.pi), st.floats(0, 6), st.integers(1, 20),
       st.sampled_from(["advance", "forecast"]))
@settings(max_examples=150, deadline=None, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
def test_no_nan_is_ever_returned(poisoned, angle, t, batch, call):
    _, stepper, _ = poisoned
    angles = angle + np.linspace(0, 1, batch)
    states = np.stack([np.cos(angles), np.sin(angles)], axis=1)
    try:
        result = (stepper.advance(states, t) if call == "advance"
                  else stepper.forecast(states, [t / 2, t]))
    except NonFiniteError:
        return
    assert np.isfinite(result).all()


def test_no_nan_is_ever_returned_records_its_row(reliability):
    # The property above runs 150 random cases per poison (three poisons).
    reliability.record(AREA_NONFINITE, "random start angles, times and batch sizes 1–20 "
                       "(hypothesis), advance and forecast", 450,
                       "every result finite or NonFiniteError; no NaN returned")


@pytest.mark.parametrize(("dtype", "step"), [
    # IEEE 754 binary32 max ≈ 3.4e38: 1e20² overflows at step 2; binary64 max ≈ 1.8e308:
    # 1e20¹⁶ = 1e320 overflows at step 16 (published limits of the formats).
    ("float32", 2), ("float64", 16)])
def test_overflow_on_the_fast_path_is_reported_with_step_and_level(tmp_path, reliability,
                                                                   dtype, step):
    out = write_bundle(tmp_path / "exploding", two_state_manifest((1,)),
                       {1: scaling_level(1e20, np.dtype(dtype).type)})
    stepper = load(out, dtype=dtype)
    assert stepper.kernel_paths == {1: "affine-chain"}
    for state in (np.ones(2), np.ones((3, 2)), np.ones((SMALL_BATCH + 3, 2))):
        with pytest.raises(NonFiniteError, match=rf"stride 1 produced non-finite values at step "
                           rf"{step} of the plan"):
            stepper.advance(state, 20 * BASE_STEP)
        with pytest.raises(NonFiniteError, match=r"stride 1 produced non-finite values"):
            stepper.forecast(state, [0.1, 2.0])
        assert np.isfinite(stepper.advance(state, (step - 1) * BASE_STEP)).all()
    reliability.record(
        "Runtime: overflow", "a fast-path (affine-chain) level multiplying by 1e20 per step, "
        "float32 and float64, batches of 1, 3 and 19", 1,
        "NonFiniteError at the step where the format overflows (2 for float32, 16 for float64); "
        "earlier times finite")


# --- threads and batches -------------------------------------------------------------------

def mlp_level(rng: np.random.Generator, dim: int, hidden: int, dtype=np.float32) -> bytes:
    """Gemm → Tanh → Gemm → Tanh → Gemm with small random weights (increment form)."""
    sizes = [dim, hidden, hidden, dim]
    initializers, nodes, current = [], [], "state"
    for index, (fan_in, fan_out) in enumerate(itertools.pairwise(sizes)):
        weight = rng.normal(0, 0.5 / math.sqrt(fan_in), (fan_out, fan_in)).astype(dtype)
        bias = rng.normal(0, 0.05, fan_out).astype(dtype)
        initializers += [numpy_helper.from_array(weight, f"w{index}"),
                         numpy_helper.from_array(bias, f"b{index}")]
        output = "next" if index == len(sizes) - 2 else f"h{index}"
        nodes.append(helper.make_node("Gemm", [current, f"w{index}", f"b{index}"], [output],
                                      transB=1))
        if output != "next":
            nodes.append(helper.make_node("Tanh", [output], [f"a{index}"]))
            output = f"a{index}"
        current = output
    graph = helper.make_graph(
        nodes, "mlp", [helper.make_tensor_value_info("state", TensorProto.FLOAT, ["b", dim])],
        [helper.make_tensor_value_info("next", TensorProto.FLOAT, ["b", dim])],
        initializer=initializers)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    return model.SerializeToString()


MLP_DIM = 4
MLP_STRIDES = (1, 3, 8)


@pytest.fixture(scope="module")
def mlp_bundle(tmp_path_factory) -> Path:
    rng = np.random.default_rng(7)
    manifest = Manifest(state_names=tuple(f"x{i}" for i in range(MLP_DIM)),
                        state_units=("",) * MLP_DIM, base_step=0.01,
                        mean=(0.5, -0.2, 0.1, 0.0), scale=(2.0, 1.0, 0.5, 1.5),
                        update="increment",
                        levels=tuple(LevelEntry(s, file="", sha256="0" * 64)
                                     for s in MLP_STRIDES))
    files = {stride: mlp_level(rng, MLP_DIM, 32) for stride in MLP_STRIDES}
    return write_bundle(tmp_path_factory.mktemp("mlp") / "bundle", manifest, files)


BATCHES = (None, 1, 5, SMALL_BATCH, SMALL_BATCH + 1, 64)  # None: a single state of shape (d,)
THREADS = 8
ROUNDS = 3


def make_jobs(rng: np.random.Generator, thread: int) -> list[tuple]:
    jobs = []
    for batch in BATCHES:
        shape = (MLP_DIM,) if batch is None else (batch, MLP_DIM)
        state = rng.normal(0, 1, shape).astype(np.float32)
        jobs.append(("advance", state, float(rng.integers(1, 60)) * 0.01 + 0.003 * thread))
        jobs.append(("forecast", state, sorted(rng.uniform(0, 0.6, 7).round(2).tolist())))
    return jobs


def run_job(stepper, job) -> np.ndarray:
    kind, state, when = job
    return stepper.advance(state, when) if kind == "advance" else stepper.forecast(state, when)


@pytest.mark.parametrize("fast_path", [True, False], ids=["affine-chain", "interpreter"])
def test_eight_threads_match_sequential_calls_bitwise(mlp_bundle, reliability, fast_path):
    stepper = load(mlp_bundle, fast_path=fast_path)
    expected_path = "affine-chain" if fast_path else "interpreter"
    assert set(stepper.kernel_paths.values()) == {expected_path}
    rng = np.random.default_rng(11)
    jobs = [make_jobs(rng, thread) for thread in range(THREADS)]
    # Expected: the same stepper called sequentially in this thread, before any other thread.
    reference = [[run_job(stepper, job) for job in thread_jobs] for thread_jobs in jobs]
    fresh = load(mlp_bundle, fast_path=fast_path)  # no plan or buffer cached yet
    barrier = threading.Barrier(THREADS)
    mismatches: list[str] = []
    errors: list[BaseException] = []

    def worker(thread: int) -> None:
        try:
            order = list(range(len(jobs[thread])))
            random.Random(thread).shuffle(order)
            barrier.wait(timeout=30)
            for _ in range(ROUNDS):
                for index in order:
                    result = run_job(fresh, jobs[thread][index])
                    if result.tobytes() != reference[thread][index].tobytes():
                        mismatches.append(f"thread {thread} job {index}")
        except BaseException as error:  # reported below, with the others
            errors.append(error)

    threads = [threading.Thread(target=worker, args=(i,)) for i in range(THREADS)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=120)
    assert not any(thread.is_alive() for thread in threads), "a worker did not finish"
    assert errors == [] and mismatches == []
    calls = THREADS * ROUNDS * len(jobs[0])
    reliability.record(
        "Runtime: threads", f"one Stepper shared by {THREADS} threads: advance and forecast, "
        f"single states and batches of 1, 5, 16, 17 and 64 (both kernel paths), "
        f"{ROUNDS} rounds in shuffled order, fresh plan and buffer caches",
        calls, "all results bitwise equal to sequential calls; 0 errors")


@pytest.mark.parametrize("dtype", ["float32", "float64"])
@pytest.mark.parametrize("fast_path", [True, False], ids=["affine-chain", "interpreter"])
def test_batch_rows_match_single_state_results(mlp_bundle, reliability, dtype, fast_path):
    stepper = load(mlp_bundle, dtype=dtype, fast_path=fast_path)
    states = np.random.default_rng(5).normal(0, 1, (40, MLP_DIM))
    # A few float32 ulps: BLAS picks different kernels (and summation orders) for a (1, k)
    # and a (B, k) product, so rows may differ in the last bits; 1e-6 relative is about
    # 8 float32 ulps (2^-23 ≈ 1.2e-7), 1e-13 about 450 float64 ulps (common practice).
    rtol = 1e-6 if dtype == "float32" else 1e-13
    bitwise = total = 0
    worst = 0.0
    for t in (0.01, 0.17, 0.5):
        for batch in (SMALL_BATCH, len(states)):
            rows = stepper.advance(states[:batch], t)
            for index in range(batch):
                single = stepper.advance(states[index], t)
                np.testing.assert_allclose(rows[index], single, rtol=rtol,
                                           atol=rtol * np.abs(single).max())
                bitwise += rows[index].tobytes() == single.tobytes()
                worst = max(worst, float(np.abs(rows[index] - single).max()
                                         / np.abs(single).max()))
                total += 1
    path = "affine-chain" if fast_path else "interpreter"
    reliability.record(
        "Runtime: batch invariance", f"row i of a batched `advance` (batches of 16 and 40) vs "
        f"the single state, {dtype}, {path} path", total,
        f"all within {rtol:g} relative (largest {worst:.1e}); {bitwise} of {total} bitwise "
        "equal")
