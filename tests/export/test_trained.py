"""`TrainedLevels` (export/trained.py): the derived facts a bundle is written from.

References: `json` (the history is JSON-ready, keys in numeric stride order, which is not the
string order: "10" < "2"), `dataclasses` (frozen, fields left out of comparison), and NumPy's
SVD for the rank of a POD basis built by `fit_pod`.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
import torch

from stridecast.export import TrainedLevels
from stridecast.export.pod import fit_pod


def _levels(*strides: int) -> dict[int, torch.nn.Module]:
    return {stride: torch.nn.Linear(3, 3) for stride in strides}


def _trained(**changes) -> TrainedLevels:
    base = {"levels": _levels(10, 1, 2), "mean": (0.0, 1.0, 2.0), "scale": (1.0, 1.0, 2.0),
            "base_step": 0.1}
    return TrainedLevels(**{**base, **changes})


def test_strides_are_sorted_finest_first_and_the_dimension_is_that_of_the_mean():
    trained = _trained()
    assert trained.strides == (1, 2, 10)
    assert trained.state_dim == 3
    assert trained.update == "increment"


def test_history_json_has_string_keys_in_stride_order_and_round_trips():
    history = {10: {"loss": [0.5, 0.25]}, 2: {"loss": [0.4]}, 1: {"loss": [0.3]}}
    text = json.dumps(_trained(history=history).history_json())
    assert list(json.loads(text)) == ["1", "2", "10"]
    assert json.loads(text) == {str(key): value for key, value in history.items()}


def test_without_validation_or_reduction_the_derived_values_are_none():
    trained = _trained()
    assert (trained.validated_horizon, trained.reconstruction_threshold,
            trained.latent_dim) == (None, None, None)
    assert _trained(validation={}).validated_horizon is None
    assert _trained(validation={"validated_horizon": 3.5}).validated_horizon == 3.5
    reduction = {"reconstruction": {"threshold": 0.07}}
    assert _trained(reduction=reduction).reconstruction_threshold == 0.07


def test_a_basis_gives_the_latent_dimension_numpy_finds():
    rng = np.random.default_rng(1)
    # Snapshots of rank 2 in 5 dimensions (a random plane), centred.
    snapshots = rng.normal(size=(200, 2)) @ rng.normal(size=(2, 5))
    snapshots -= snapshots.mean(axis=0)
    rank = int(np.sum(np.linalg.svd(snapshots, compute_uv=False) > 1e-9))  # numpy reference
    basis = fit_pod(snapshots, rank)
    trained = _trained(mean=(0.0,) * 5, scale=(1.0,) * 5, basis=basis)
    assert trained.latent_dim == rank == 2 and trained.state_dim == 5


def test_frozen_and_arrays_left_out_of_comparison():
    levels = _levels(1, 4)
    one = _trained(levels=levels, envelope_samples=np.zeros((2, 3), np.float32))
    other = _trained(levels=levels, envelope_samples=np.ones((5, 3), np.float32))
    assert one == other  # the samples do not decide equality (no ambiguous array ==)
    assert one != _trained(levels=levels, envelope_radius=1.0)
    with pytest.raises(dataclasses.FrozenInstanceError):
        one.base_step = 0.2
