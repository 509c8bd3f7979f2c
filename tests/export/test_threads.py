"""export/threads.py: torch and NumPy's BLAS held at a thread count, restored afterwards.

Thread counts are read back through threadpoolctl and torch's own getter (the libraries'
public APIs), not through anything of ours.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from threadpoolctl import threadpool_info, threadpool_limits

from stridecast.export import train_levels
from stridecast.export import training as training_module
from stridecast.export.errors import TrainingError
from stridecast.export.threads import compute_threads
from tests.systems import DAMPED_OSCILLATOR, linear_trajectories


def _blas_threads() -> set[int]:
    return {pool["num_threads"] for pool in threadpool_info() if pool["user_api"] == "blas"}


def test_both_settings_held_and_restored():
    with threadpool_limits(limits=2, user_api="blas"):
        torch_before = torch.get_num_threads()
        blas_before = _blas_threads()
        with compute_threads(1):
            assert torch.get_num_threads() == 1 and _blas_threads() == {1}
        assert torch.get_num_threads() == torch_before and _blas_threads() == blas_before
        with compute_threads(None):
            assert torch.get_num_threads() == torch_before and _blas_threads() == blas_before


@pytest.mark.parametrize("bad", [0, -1, 1.5, True, "2"])
def test_bad_counts_name_the_option(bad):
    with (pytest.raises(TrainingError, match=r"`threads` is .*; expected a positive integer\."),
          compute_threads(bad, error=TrainingError)):
        pass


def test_training_fits_its_pod_under_the_thread_count(monkeypatch):
    # The POD's SVD is BLAS work outside torch: with threads=1 it must run single-threaded.
    seen = []
    fit = training_module.fit_pod

    def recording(*arguments, **options):
        seen.append(_blas_threads())
        return fit(*arguments, **options)

    monkeypatch.setattr(training_module, "fit_pod", recording)
    trajectories = linear_trajectories(DAMPED_OSCILLATOR, base_step=0.1, count=12, steps=40,
                                       seed=3)
    with threadpool_limits(limits=2, user_api="blas"):
        before = _blas_threads()
        train_levels(np.asarray(trajectories), base_step=0.1, strides=(1, 2), hidden=(8,),
                     epochs=1, reduce=1, progress=False, threads=1, patience=None)
        assert _blas_threads() == before  # the caller's setting is back
    assert seen == [{1}]
