"""train_levels: argument checks, determinism, history and validation records, and a linear
system learned to its matrix-exponential flow map."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.linalg import expm

from stridecast.export import TrainingError, export_bundle, train_levels
from stridecast.export.training import window_loss
from stridecast.export.windows import Ragged, gather_windows, window_starts
from stridecast.runtime import BundleError, StateError, load
from tests.systems import DAMPED_OSCILLATOR, linear_trajectories

BASE_STEP = 0.1
TINY = {"hidden": (8,), "epochs": 2, "rollout": 2, "progress": False}


@pytest.fixture(scope="module")
def data() -> np.ndarray:
    return linear_trajectories(DAMPED_OSCILLATOR, base_step=BASE_STEP, count=16, steps=40,
                               seed=1)


def test_deterministic_for_a_seed_and_leaves_global_state(data):
    torch.manual_seed(123)
    rng_state, threads = torch.get_rng_state(), torch.get_num_threads()
    first = train_levels(data, base_step=BASE_STEP, strides=(1, 4), seed=7, **TINY)
    second = train_levels(data, base_step=BASE_STEP, strides=(4, 1), seed=7, **TINY)
    assert torch.equal(torch.get_rng_state(), rng_state)
    assert torch.get_num_threads() == threads
    for stride in (1, 4):
        for (name, a), (_, b) in zip(first.levels[stride].state_dict().items(),
                                     second.levels[stride].state_dict().items(), strict=True):
            assert torch.equal(a, b), name
        assert first.history[stride]["train_loss"] == second.history[stride]["train_loss"]
    third = train_levels(data, base_step=BASE_STEP, strides=(1, 4), seed=8, **TINY)
    assert not torch.equal(third.levels[1][0].weight, first.levels[1][0].weight)


def test_level_does_not_depend_on_other_strides(data):
    alone = train_levels(data, base_step=BASE_STEP, strides=(4,), **TINY)
    together = train_levels(data, base_step=BASE_STEP, strides=(1, 4), **TINY)
    assert torch.equal(alone.levels[4][0].weight, together.levels[4][0].weight)


def test_records(data):
    trained = train_levels(data, base_step=BASE_STEP, strides=(1, 2, 4), keep_all_levels=True,
                           state_names=["q", "p"], **TINY)
    assert trained.update == "increment" and trained.base_step == BASE_STEP
    assert trained.state_names == ("q", "p")
    # Normalisation and envelope come from the training split only (split by trajectory).
    held_out = trained.validation["split"]["held_out_trajectories"]
    train = np.delete(data, held_out, axis=0)
    np.testing.assert_allclose(trained.mean, train.reshape(-1, 2).mean(axis=0))
    np.testing.assert_allclose(trained.scale, train.reshape(-1, 2).std(axis=0))
    np.testing.assert_allclose(trained.envelope_min, train.min(axis=(0, 1)))
    assert len(held_out) == 2  # round(0.1 * 16)
    for stride in (1, 2, 4):
        entry = trained.history[stride]
        assert len(entry["train_loss"]) == len(entry["validation_loss"]) == 2
        assert entry["windows"] == 14 * (40 - 2 * stride)
        assert entry["train_one_step_mse"] > 0
    validation = trained.validation
    assert validation["strides"] == list(trained.strides) == [1, 2, 4]
    assert validation["selection"] is None
    assert [row["stride"] for row in validation["one_step"]] == [1, 2, 4]
    horizons = [row["base_steps"] for row in validation["horizons"]]
    assert horizons == sorted(horizons) and horizons[-1] == 39
    # The validity contract: the curve's reference is the training split's spread, and the
    # validated horizon is the first crossing of the tolerance on it.
    curve = trained.validation_curve
    assert curve["metric"] == "normalised_rms" and curve["tolerance"] == 0.1
    np.testing.assert_allclose(curve["reference_std"], train.reshape(-1, 2).std(axis=0))
    assert curve["times"] == pytest.approx(list(np.arange(1, 40) * BASE_STEP))
    errors = np.array([np.inf if e is None else e for e in curve["errors"]])
    within = np.flatnonzero(np.cumprod(errors <= 0.1))
    expected = 0.0 if len(within) == 0 else curve["times"][within[-1]]
    assert trained.validated_horizon == validation["validated_horizon"] == expected
    # Envelope samples: normalised training states (all kept: fewer than 2048).
    assert trained.envelope_samples.shape == (14 * 40, 2)
    z = (train.reshape(-1, 2) - trained.mean) / trained.scale
    np.testing.assert_allclose(np.sort(trained.envelope_samples, axis=0), np.sort(z, axis=0),
                               atol=1e-6)
    assert trained.envelope_radius > 0


def test_selection_is_the_default(data):
    trained = train_levels(data, base_step=BASE_STEP, strides=(1, 2, 4), horizon=2.0, **TINY)
    selection = trained.validation["selection"]
    assert selection["method"] == "exhaustive" and len(selection["candidates"]) == 4
    assert selection["kept"] == list(trained.strides) == trained.validation["strides"]
    assert selection["times"][-1] == pytest.approx(2.0)
    assert trained.validation["horizon_requested"] == 2.0
    assert set(trained.history) == {1, 2, 4}
    summary = trained.validation["summary"]
    assert summary["kept"] == list(trained.strides)
    assert summary["validated_horizon"] == trained.validated_horizon


def test_progress_bar_on_stderr_only(data, capsys):
    train_levels(data, base_step=BASE_STEP, strides=(1,), **{**TINY, "progress": True})
    captured = capsys.readouterr()
    assert captured.out == "" and "stride 1" in captured.err
    train_levels(data, base_step=BASE_STEP, strides=(1,), **TINY)
    assert capsys.readouterr().err == ""


def test_single_trajectory_is_split_in_time(data):
    trained = train_levels(data[0], base_step=BASE_STEP, strides=(1, 2),
                           validation_fraction=0.25, **TINY)
    assert trained.validation["split"] == {"method": "time", "train_samples": 30,
                                           "held_out_samples": 10}


def test_without_validation(data):
    trained = train_levels(data, base_step=BASE_STEP, strides=(1,), validation_fraction=0.0,
                           **TINY)
    assert trained.validation is None and trained.validated_horizon is None
    assert trained.history[1]["validation_loss"] is None


@pytest.mark.parametrize(("change", "error", "message"), [
    ({"trajectories": np.zeros(5)}, StateError,
     r"`trajectories` has shape \(5,\); expected \(N, T, d\)"),
    ({"trajectories": np.zeros((2, 10, 2))}, StateError,
     r"have at most 10 samples per trajectory; the largest stride 4 with rollout 3 needs at "
     r"least 13\.$"),
    ({"strides": []}, BundleError, r"`strides` is \[\]; expected a non-empty list"),
    ({"strides": [1, 1]}, BundleError, r"`strides` repeats a stride: \[1, 1\]; strides must be "
     r"distinct\."),
    ({"strides": [0, 1]}, BundleError, r"stride 0 must be a positive number of base steps\."),
    ({"base_step": -1.0}, BundleError, r"`base_step` is -1\.0; expected a finite number > 0\."),
    ({"hidden": []}, TrainingError, r"`hidden` is \[\]; expected a non-empty list of widths\."),
    ({"hidden": [16, 0]}, TrainingError, r"`hidden` is \[16, 0\]; expected positive integer"),
    ({"activation": "swish"}, TrainingError, r"`activation` is 'swish'; expected one of"),
    ({"epochs": 0}, TrainingError, r"`epochs` is 0; expected a positive integer\."),
    ({"batch_size": 2.5}, TrainingError, r"`batch_size` is 2\.5; expected a positive integer\."),
    ({"rollout": 0}, TrainingError, r"`rollout` is 0; expected a positive integer\."),
    ({"learning_rate": 0.0}, TrainingError,
     r"`learning_rate` is 0\.0; expected a finite number > 0\."),
    ({"validation_fraction": 1.0}, TrainingError,
     r"`validation_fraction` is 1\.0; expected a number in \[0, 1\)\."),
    ({"seed": -1}, TrainingError, r"`seed` is -1; expected a non-negative integer\."),
    ({"threads": 0}, TrainingError, r"`threads` is 0; expected a positive integer\."),
    ({"state_names": ["a"]}, BundleError, r"`state_names` is \['a'\]; expected a list of 2"),
    ({"patience": 0}, TrainingError, r"`patience` is 0; expected a positive integer\."),
    ({"keep_all_levels": "yes"}, TrainingError,
     r"`keep_all_levels` is 'yes'; expected True or False\."),
    ({"trajectories": [np.zeros((20, 2)), np.zeros((20, 3))]}, StateError,
     r"`trajectories` mixes state sizes: trajectory 0 has 2 components, trajectory 1 has 3;"),
    # (d, T) = (2, 400) passed as (T, d): too short, and more components than samples.
    ({"trajectories": np.zeros((3, 2, 400))}, StateError,
     r"have at most 2 samples per trajectory; .* needs at least 13\. The states have 400 "
     r"components but only 2 samples: the data look like \(d, T\); transpose them"),
    ({"trajectories": np.zeros((2, 400)), "state_names": ["a", "b"]}, StateError,
     r"has shape \(2, 400\) per trajectory but 2 state names, matching its first axis"),
    ({"tolerance": 0.0}, TrainingError, r"`tolerance` is 0\.0; expected a finite number > 0\."),
    ({"horizon": float("inf")}, TrainingError,
     r"`horizon` is inf; expected a finite number > 0\."),
    ({"horizon": 0.05}, TrainingError,
     r"`horizon` is 0\.05; expected at least the finest stride's time, 0\.1\."),
])
def test_refuses_bad_arguments(data, change, error, message):
    arguments = {"trajectories": data, "base_step": BASE_STEP, "strides": [1, 4],
                 **TINY, "rollout": 3}
    arguments.update(change)
    with pytest.raises(error, match=message):
        train_levels(arguments.pop("trajectories"), **arguments)


def test_ragged_trajectories(data):
    # Lengths 40, 25, 13, 9 (the last too short for stride 4 with rollout 2: it trains only
    # the finer stride), plus whole equal-length ones.
    ragged = [data[0], data[1, :25], data[2, :13], data[3, :9], *data[4:]]
    trained = train_levels(ragged, base_step=BASE_STEP, strides=(1, 4), seed=2, **TINY)
    held_out = trained.validation["split"]["held_out_trajectories"]
    train = Ragged.from_arrays([ragged[i] for i in range(len(ragged)) if i not in held_out])
    # The training windows are exactly those that fit inside each training trajectory.
    expected = {stride: int(np.maximum(train.lengths - 2 * stride, 0).sum()) for stride in (1, 4)}
    assert {stride: trained.history[stride]["windows"] for stride in (1, 4)} == expected
    np.testing.assert_allclose(trained.mean, train.values.mean(axis=0))


def test_float32_base_step_is_kept_as_intended(data):
    trained = train_levels(data, base_step=np.float32(0.1), strides=(1,), **TINY)
    # float32(0.1) = 0.10000000149...; the shortest decimal rounding to it is 0.1.
    assert trained.base_step == 0.1


def test_early_stopping_restores_the_best_epoch(data):
    # A high learning rate makes the held-out loss stall; patience 3 stops the level.
    trained = train_levels(data, base_step=BASE_STEP, strides=(1,), hidden=(8,), epochs=30,
                           rollout=2, learning_rate=0.1, patience=3, batch_size=64,
                           validation_fraction=0.25, progress=False)
    entry = trained.history[1]
    losses = entry["validation_loss"]
    assert entry["stop_reason"] == "patience" and entry["epochs_run"] < 30
    assert len(losses) == len(entry["train_loss"]) == entry["epochs_run"]
    assert entry["best_epoch"] == int(np.argmin(losses)) + 1 < entry["epochs_run"]
    assert entry["epochs_run"] - entry["best_epoch"] == 3
    assert entry["best_validation_loss"] == min(losses)
    # The restored weights give the recorded best loss: recompute it from the returned
    # network on every held-out window (all of them fit under the evaluation cap).
    held_out = trained.validation["split"]["held_out_trajectories"]
    normalised = Ragged.from_arrays(
        [((data[i] - trained.mean) / trained.scale).astype(np.float32) for i in held_out])
    starts = torch.from_numpy(window_starts(normalised, 1, 2))
    windows = gather_windows(torch.from_numpy(normalised.values), starts, 1, 2)
    with torch.no_grad():
        recomputed = float(window_loss(trained.levels[1], windows)[0])
    assert recomputed == pytest.approx(entry["best_validation_loss"], rel=1e-5)
    assert recomputed < losses[-1]


def test_refuses_non_finite_data(data):
    broken = data.copy()
    broken[0, 3, 1] = np.nan
    with pytest.raises(StateError, match=r"holds NaN or infinity \(1 values\), first at "
                                         r"trajectory 0, step 3, component 1\."):
        train_levels(broken, base_step=BASE_STEP, strides=[1], **TINY)


@pytest.mark.slow
def test_linear_system_reaches_matrix_exponential(tmp_path):
    trajectories = linear_trajectories(DAMPED_OSCILLATOR, base_step=BASE_STEP, count=64,
                                       steps=60, seed=3)
    # Every level is checked below, so none may be dropped by level selection.
    trained = train_levels(trajectories, base_step=BASE_STEP, strides=(1, 4), hidden=(32, 32),
                           epochs=30, learning_rate=1e-2, rollout=2, progress=False,
                           keep_all_levels=True)
    stepper = load(export_bundle(trained, tmp_path / "linear.bundle", exporter="legacy"))
    fresh = linear_trajectories(DAMPED_OSCILLATOR, base_step=BASE_STEP, count=16, steps=60,
                                seed=4)
    scale = np.asarray(trained.scale)
    for stride in (1, 4):
        mse = trained.history[stride]["train_one_step_mse"]
        assert mse < 1e-4  # training converged; otherwise the check below says little
        states = fresh[:, :-stride].reshape(-1, 2)
        # Expected: the exact flow map over stride·Δt, expm(A k Δt) (scipy.linalg.expm).
        exact = states @ expm(DAMPED_OSCILLATOR * stride * BASE_STEP).T
        learned = stepper.step(states.astype(np.float32), stride).astype(np.float64)
        rmse = np.sqrt(np.mean(((learned - exact) / scale) ** 2))
        # The data are exact, so the one-step training MSE is the mean squared deviation of
        # the learned map from expm on the training distribution; fresh trajectories come
        # from the same distribution. Allow 3x its root (generalisation, common practice)
        # plus the float32 export tolerance 1e-4 (1 + |z'|) with |z'| ≲ 3 (docs/export.md).
        tolerance = 3.0 * np.sqrt(mse) + 4e-4
        assert rmse <= tolerance, (stride, rmse, tolerance)
