"""Shared fixtures: small exact bundles and one real local Dask cluster of worker processes."""

from __future__ import annotations

import pytest

from stridecast.runtime import load
from tests.builders import linear_bundle, oscillator_matrix

pytest.importorskip("distributed", reason="needs the ensemble extra (dask[distributed])")


@pytest.fixture(scope="module")
def oscillator_path(tmp_path_factory):
    """A two-component oscillator bundle whose levels are exact flow maps (expm)."""
    return linear_bundle(tmp_path_factory.mktemp("bundles") / "osc.bundle", oscillator_matrix(),
                         base_step=0.1, strides=[1, 4, 16])


@pytest.fixture(scope="module")
def oscillator(oscillator_path):
    return load(oscillator_path, dtype="float64")


@pytest.fixture(scope="module")
def cluster_client():
    """Two single-threaded worker processes, as `stridecast ensemble --workers 2` starts."""
    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster, Client(cluster) as client:
        client.cluster_for_tests = cluster
        yield client
