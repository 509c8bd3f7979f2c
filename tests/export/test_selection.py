"""Level selection on a linear system whose levels are exact matrix-exponential flow maps
(scipy.linalg.expm), except a deliberately perturbed coarse one that must be dropped."""

from __future__ import annotations

import numpy as np
import pytest
from torch import nn

from stridecast.export.evaluation import prepare_held_out
from stridecast.export.selection import (
    ERROR_CAP,
    ERROR_FLOOR,
    Candidate,
    choose,
    horizon_in_steps,
    score,
    score_steps,
    select_levels,
)
from tests.systems import exact_level, held_out_list


def test_perturbed_coarse_level_is_dropped_exhaustively():
    # Exact flow maps for strides 1, 4 and 16 (expm), and stride 8 off by 3 %.
    levels = {1: exact_level(1), 4: exact_level(4), 8: exact_level(8, factor=1.03),
              16: exact_level(16)}
    data = prepare_held_out(held_out_list(steps=80))
    chosen = select_levels(levels, data, horizon_steps=79)
    assert chosen.kept == (1, 4, 16)
    assert chosen.method == "exhaustive"
    # Every subset holding the finest stride: 2^3 of them, each with its curve.
    tried = {c.strides for c in chosen.candidates}
    assert len(tried) == 8 and all(1 in strides for strides in tried)
    assert all(len(c.errors) == len(chosen.steps) for c in chosen.candidates)
    # Exact subsets tie at the float32 floor; the tie goes to the fewest evaluations.
    scores = {c.strides: c.score for c in chosen.candidates}
    assert scores[(1, 4, 16)] == pytest.approx(np.log(ERROR_FLOOR))
    assert scores[(1, 4, 8, 16)] > scores[(1, 4, 16)] + 1.0


def test_perturbed_level_is_dropped_by_backward_elimination():
    # Seven levels: beyond the exhaustive bound, so greedy backward elimination.
    strides = (1, 2, 4, 8, 16, 32, 64)
    levels = {s: exact_level(s, factor=1.05 if s == 32 else 1.0) for s in strides}
    data = prepare_held_out(held_out_list(steps=150))
    chosen = select_levels(levels, data, horizon_steps=149)
    assert chosen.method == "backward elimination"
    assert chosen.kept == (1, 2, 4, 8, 16, 64)
    # First round: all seven, then every single drop (6 subsets); second round: the six
    # kept with one more dropped (5 subsets), none better; then the finest level alone, the
    # reference of the eligibility rule.
    assert len(chosen.candidates) == 1 + 6 + 5 + 1
    assert chosen.reference.strides == (1,)


def test_diverging_level_is_dropped():
    exploding = nn.Linear(2, 2, bias=False)
    nn.init.constant_(exploding.weight, 1e30)  # overflows float32 after two steps
    levels = {1: exact_level(1), 4: exploding}
    data = prepare_held_out(held_out_list())
    chosen = select_levels(levels, data, horizon_steps=39)
    assert chosen.kept == (1,)
    worst = next(c for c in chosen.candidates if c.strides == (1, 4))
    assert np.isinf(worst.errors).any()
    assert worst.to_dict()["errors"].count(None) == int(np.isinf(worst.errors).sum())


def test_score_clips_and_averages_logs():
    errors = np.array([1e-7, 0.01, 0.5, 3.0, np.inf, np.nan])
    # Expected: the documented formula written out.
    clipped = [ERROR_FLOOR, 0.01, 0.5, ERROR_CAP, ERROR_CAP, ERROR_CAP]
    assert score(errors) == pytest.approx(np.mean(np.log(clipped)))


def test_score_steps_and_horizon():
    assert list(score_steps(8, 2)) == [2, 4, 6, 8]
    steps = score_steps(1000, 1)
    assert len(steps) == 32 and steps[-1] == 1000 and steps[0] == 31
    assert horizon_in_steps(None, base_step=0.1, finest=4, longest=39) == (36, False)
    # 0.3 / 0.1 is 2.9999999999999996 in floating point; it still means 3 base steps.
    assert horizon_in_steps(0.3, base_step=0.1, finest=1, longest=39) == (3, False)
    assert horizon_in_steps(100.0, base_step=0.1, finest=1, longest=39) == (39, True)


def _candidate(strides, score_value, median, evaluations_value=1.0):
    return Candidate(strides=tuple(strides), errors=np.zeros(1), score=score_value,
                     evaluations=evaluations_value, median_divergence=median)


def test_rms_best_subset_that_diverges_sooner_is_rejected():
    # Constructed from the two-scale Lorenz 96 failure: the subset with the lowest score
    # (RMS over states, dominated by the worst states) has a shorter median time to
    # divergence than the finest level alone, so it is not eligible.
    finest = _candidate((1,), -1.0, median=27.0, evaluations_value=100.0)
    rms_best = _candidate((1, 4, 16), -2.0, median=24.0, evaluations_value=10.0)
    lasting = _candidate((1, 4), -1.5, median=30.0, evaluations_value=30.0)
    assert choose([rms_best, lasting, finest], finest) is lasting
    # With no other eligible subset the finest level alone is kept.
    assert choose([rms_best, finest], finest) is finest
    # Equal medians are eligible ("at least"); the lower score then wins.
    level = _candidate((1, 4), -1.5, median=27.0)
    assert choose([level, finest], finest) is level

