"""The thread policy: BLAS limits are scoped and restored, and split batches give the same answers.

Expected values: threadpoolctl's own report of the BLAS thread count (`threadpool_info`),
onnxruntime on the level files, and the unsplit computation of the runtime itself (the split
must not change a result; float64 products of the same rows give the same bits, and float32
may differ only by rounding).
"""

from __future__ import annotations

import itertools
import os
import threading
import time
import warnings

import numpy as np
import onnxruntime
import pytest
from threadpoolctl import threadpool_info, threadpool_limits

from stridecast.runtime import NonFiniteError, OptionError, ThreadPolicy, load
from stridecast.runtime.threads import (
    CHUNK_ALIGN,
    MIN_CHUNK_ROWS,
    SCOPE_MIN_BATCH,
    check_threads,
    single_threaded_blas,
)
from tests.builders import linear_bundle, tanh_bundle

LARGE = 4 * MIN_CHUNK_ROWS + 37  # splits into several chunks, the last one partial


def _blas_threads() -> list[int]:
    return [pool["num_threads"] for pool in threadpool_info() if pool["user_api"] == "blas"]


def _states(batch: int, dtype=np.float32) -> np.ndarray:
    return np.random.default_rng(5).normal(0.5, 1.0, (batch, 4)).astype(dtype)


@pytest.fixture(scope="module")
def bundle(tmp_path_factory):
    return tanh_bundle(tmp_path_factory.mktemp("threads") / "tanh.bundle", hidden=32)


def test_default_threads_are_the_usable_cpus():
    # Reference: the operating system's affinity mask (os.sched_getaffinity), where it exists.
    expected = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else \
        os.cpu_count()
    assert check_threads(None) == expected
    assert ThreadPolicy().threads == expected


@pytest.mark.parametrize("value", [0, -2, 1.5, "2", True, [2]])
def test_bad_threads_are_refused_with_a_clear_error(bundle, value):
    path, _ = bundle
    with pytest.raises(OptionError, match=r"`threads` is .*; expected .*\.$"):
        load(path, threads=value)


def test_blas_limit_is_restored_after_large_batches(bundle):
    # The caller's own setting (3 threads, set with threadpoolctl) must survive the call, and
    # inside the runtime's work BLAS must report one thread (threadpoolctl's threadpool_info).
    path, _ = bundle
    stepper = load(path, threads=2)
    with threadpool_limits(limits=3, user_api="blas"):
        before = _blas_threads()
        assert before and all(count == 3 for count in before)
        seen = []
        policy = stepper._kernels[1].policy

        def spy(states):
            seen.append(_blas_threads())
            return states

        policy.run(spy, _states(LARGE), splittable=True)
        assert seen and all(counts == [1] * len(before) for counts in seen)
        stepper.advance(_states(LARGE), 1.5)
        stepper.forecast(_states(1)[0], np.arange(1, 400) * 0.1)
        assert _blas_threads() == before


def test_concurrent_callers_leave_the_setting_restored(bundle):
    path, _ = bundle
    stepper = load(path, threads=2)
    with threadpool_limits(limits=3, user_api="blas"):
        before = _blas_threads()
        errors = []

        def call():
            try:
                for _ in range(5):
                    stepper.advance(_states(LARGE), 0.8)
            except Exception as error:  # reported below
                errors.append(error)

        workers = [threading.Thread(target=call) for _ in range(4)]
        for worker in workers:
            worker.start()
        for worker in workers:
            worker.join()
        assert not errors
        assert _blas_threads() == before


def test_nested_scopes_restore_once():
    with threadpool_limits(limits=3, user_api="blas"):
        with single_threaded_blas():
            with single_threaded_blas():
                assert set(_blas_threads()) == {1}
            assert set(_blas_threads()) == {1}
        assert set(_blas_threads()) == {3}


def test_small_batches_run_as_called(bundle):
    # Below the crossover the policy stays out of the way: BLAS keeps the caller's setting.
    path, _ = bundle
    stepper = load(path, threads=2)
    policy = stepper._kernels[1].policy
    assert not policy.applies(SCOPE_MIN_BATCH - 1)
    assert policy.applies(SCOPE_MIN_BATCH)


def test_chunks_cover_the_batch_on_aligned_boundaries():
    policy = ThreadPolicy(4)
    for batch in (MIN_CHUNK_ROWS * 2, LARGE, 4096, 65536):
        chunks = policy.chunks(batch)
        assert chunks[0][0] == 0 and chunks[-1][1] == batch
        assert all(a[1] == b[0] for a, b in itertools.pairwise(chunks))
        assert all(start % CHUNK_ALIGN == 0 for start, _ in chunks)
        assert all(stop - start >= MIN_CHUNK_ROWS for start, stop in chunks)
        sizes = [stop - start for start, stop in chunks]
        assert len(sizes) >= 2
    assert policy.chunks(MIN_CHUNK_ROWS * 2 - 1) == ((0, MIN_CHUNK_ROWS * 2 - 1),)
    assert ThreadPolicy(1).chunks(65536) == ((0, 65536),)


def test_split_float64_is_bit_identical_to_unsplit(bundle):
    path, _ = bundle
    split = load(path, dtype="float64", threads=2)
    whole = load(path, dtype="float64", threads=1)
    states = _states(LARGE, np.float64)
    # Reference: the unsplit run; each row's products are the same in either.
    np.testing.assert_array_equal(split.advance(states, 2.3), whole.advance(states, 2.3))
    times = [0.3, 1.1, 2.5, 0.8]  # every wave carries all the states: split too
    np.testing.assert_array_equal(split.forecast(states, times), whole.forecast(states, times))


def test_split_float32_matches_unsplit_and_onnxruntime(bundle):
    path, files = bundle
    split = load(path, threads=3)
    whole = load(path, threads=1)
    states = _states(LARGE)
    once = split.step(states, 1)
    # Reference: the unsplit run (float32 rounding only) ...
    np.testing.assert_allclose(once, whole.step(states, 1), rtol=0, atol=2e-6)
    # ... and onnxruntime on the level file, with the normalisation (mean 0.5, scale 2) and the
    # increment update applied by hand: x' = x + scale * N((x - mean) / scale).
    session = onnxruntime.InferenceSession(files[1], providers=["CPUExecutionProvider"])
    z = ((states - 0.5) / 2.0).astype(np.float32)
    expected = states + 2.0 * session.run(["next"], {"state": z})[0]
    np.testing.assert_allclose(once, expected, rtol=0, atol=1e-5)


def test_one_thread_never_starts_a_pool(bundle):
    path, _ = bundle
    stepper = load(path, threads=1)
    reference = load(path, threads=2).advance(_states(LARGE, np.float32), 1.2)
    answer = stepper.advance(_states(LARGE, np.float32), 1.2)
    np.testing.assert_allclose(answer, reference, rtol=0, atol=2e-6)
    assert stepper._kernels[1].policy._pool is None


def test_errors_in_a_chunk_reach_the_caller():
    policy = ThreadPolicy(2)
    states = np.zeros((LARGE, 2))
    states[-1] = 1.0  # marks the last chunk
    assert len(policy.chunks(LARGE)) > 1

    def failing(rows):
        if rows[-1, 0] == 1.0:  # only the last chunk fails
            raise ValueError("boom")
        return rows

    with pytest.raises(ValueError, match="boom"):
        policy.run(failing, states, splittable=True)


def test_pool_threads_take_the_callers_floating_point_settings():
    # NumPy's error handling (np.errstate) is per thread; every chunk must see the caller's.
    policy = ThreadPolicy(2)
    seen = []

    def record(rows):
        seen.append((threading.get_ident(), np.geterr()))
        time.sleep(0.02)  # long enough that the pool thread takes chunks too
        return rows

    with np.errstate(over="ignore", invalid="raise", divide="warn", under="ignore"):
        expected = np.geterr()
        policy.run(record, np.zeros((LARGE, 2)), splittable=True)
    assert len({ident for ident, _ in seen}) == 2
    assert all(settings == expected for _, settings in seen)


def test_non_finite_in_a_split_batch_is_reported_like_unsplit(tmp_path):
    # x' = 5x: exact flow maps exp(5 k Δt) (tests/builders.py, matrix exponential). Rows of 1
    # stay finite to t = 5; the last row, 1e30, overflows float32 on the way, in the last chunk.
    path = linear_bundle(tmp_path / "growth.bundle", 5.0 * np.eye(2), base_step=0.25,
                         strides=(1, 2, 4), dtype=np.float32)
    states = np.ones((LARGE, 2), dtype=np.float32)
    states[-1] = 1e30
    messages = []
    for threads in (1, 2):
        # The overflow itself is silent (the stepper ignores it and names the step instead),
        # in the pool's threads as in the caller's.
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            with pytest.raises(NonFiniteError) as caught:
                load(path, threads=threads).advance(states, 5.0)
        messages.append(str(caught.value))
    assert messages[0] == messages[1]
