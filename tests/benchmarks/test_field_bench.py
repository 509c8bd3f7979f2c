"""The field benchmark's parts, at tiny sizes; no timings (speed belongs in benchmarks/)."""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("scipy")

from stridecast.benchmarks import field_bench
from stridecast.demo import mooring
from stridecast.demo.field_evaluation import held_out_states


def test_the_solve_ivp_peer_integrates_the_same_field_as_the_reference():
    # Reference: SciPy's Fortran DOP853 (mooring.simulate) at rtol 1e-10; solve_ivp's DOP853
    # at 1e-8 on the same batch must agree to about that tolerance (common practice).
    states = held_out_states(2)
    times = np.array([0.05, 0.1])
    reference = mooring.simulate(states, times, rtol=1e-10, atol=1e-12)
    answer = field_bench.solve(states, times, "DOP853", 1e-8)
    assert answer.shape == (2, 2, 256)
    np.testing.assert_allclose(answer, reference, atol=1e-6)


def test_matched_stops_at_the_first_rung_that_is_accurate_enough():
    states = held_out_states(1)
    times = np.array([0.02, 0.04])
    truth = mooring.simulate(states, times, rtol=1e-10, atol=1e-12)
    scale = np.ones(256)
    loose = field_bench.matched(states, times, "RK45", 1.0, truth, scale)
    # RK45 at rtol 0.1 blows up on this stiff field (a failed rung is an error of None).
    assert loose["matched"] and loose["error"] <= 1.0
    assert loose["tried"][-1]["rtol"] == loose["rtol"]
    assert all(rung["error"] is None or rung["error"] > 1.0 for rung in loose["tried"][:-1])
    impossible = field_bench.matched(states, times, "RK45", 0.0, truth, scale)
    assert not impossible["matched"]
    assert [rung["rtol"] for rung in impossible["tried"]] == list(field_bench.RTOL_LADDER)


def test_the_table_lists_stridecast_and_both_peers():
    peer = {"method": "DOP853", "rtol": 1e-2, "seconds": 2.0, "error": 0.01, "matched": True,
            "tried": [{"rtol": 1e-2, "seconds": 2.0, "error": 0.01}]}
    text = field_bench.format_table([{
        "batch": 1, "times": 200, "until": 20.0,
        "stridecast": {"seconds": 0.01, "error": 0.04},
        "scipy": [peer, {**peer, "method": "RK45", "matched": False}]}])
    assert "stridecast forecast" in text and "solve_ivp DOP853" in text
    assert "solve_ivp RK45 (unmatched)" in text
    assert "200" in text  # 2 s / 10 ms
