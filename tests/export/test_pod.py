"""POD basis (export/pod.py) on a linear field whose modes and decay rates are known.

The field is 1-D heat conduction u_t = u_xx on (0, 1) with u = 0 at both ends, discretised by
second-order central differences on n interior points: x' = A x, A = tridiag(1, −2, 1) / h²,
h = 1/(n + 1). The closed form of the eigenpairs of this matrix (the discrete Laplacian with
Dirichlet ends, e.g. LeVeque, "Finite Difference Methods for Ordinary and Partial Differential
Equations", SIAM 2007, §2.10; cited from memory) is
    λ_k = −(4/h²) sin²(kπ / (2(n + 1))),  φ_k[j] = √(2/(n + 1)) sin(jkπ/(n + 1)),  j = 1 … n.
Trajectories are made with SciPy's matrix exponential of the full A; the expected subspaces
and energies come from the closed form alone.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import expm, subspace_angles

from stridecast.export import TrainingError, pod
from stridecast.export.pod import check_reduce, fit_pod, reconstruction_threshold
from stridecast.export.windows import Ragged, pooled_normalisation

N = 96
H = 1.0 / (N + 1)
# Amplitudes of the sine modes 1, 2, 3 in the initial states (standard deviations of the draw).
AMPLITUDES = np.array([1.0, 0.4, 0.15])
BASE_STEP = 2e-4
SAMPLES = 120


def laplacian() -> np.ndarray:
    return (np.diag(-2.0 * np.ones(N)) + np.diag(np.ones(N - 1), 1)
            + np.diag(np.ones(N - 1), -1)) / H**2


def closed_form_modes(count: int) -> tuple[np.ndarray, np.ndarray]:
    """λ_k (count,) and φ_k as columns (N, count), from the closed form above."""
    k = np.arange(1, count + 1)
    rates = -4.0 / H**2 * np.sin(k * np.pi / (2 * (N + 1))) ** 2
    j = np.arange(1, N + 1)
    return rates, np.sqrt(2.0 / (N + 1)) * np.sin(np.outer(j, k) * np.pi / (N + 1))


def heat_data(trajectories: int = 12, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Trajectories (M, SAMPLES, N) from scipy.linalg.expm of the full A, and the closed-form
    mode coefficients (M, SAMPLES, 3) of the same states, c_k(t) = a_k exp(λ_k t)."""
    rng = np.random.default_rng(seed)
    rates, modes = closed_form_modes(len(AMPLITUDES))
    step = expm(laplacian() * BASE_STEP)  # SciPy's matrix exponential: the exact flow map
    amplitudes = rng.normal(size=(trajectories, len(AMPLITUDES))) * AMPLITUDES
    states = np.empty((trajectories, SAMPLES, N))
    states[:, 0] = amplitudes @ modes.T
    for index in range(1, SAMPLES):
        states[:, index] = states[:, index - 1] @ step.T
    times = np.arange(SAMPLES) * BASE_STEP
    coefficients = amplitudes[:, None, :] * np.exp(rates[None, None, :] * times[None, :, None])
    return states, coefficients


def test_pod_recovers_the_sine_subspace_and_its_energies() -> None:
    states, coefficients = heat_data()
    snapshots = states.reshape(-1, N)
    centred = snapshots - snapshots.mean(axis=0)
    basis = fit_pod(centred, 3)
    _, modes = closed_form_modes(3)
    # SciPy's principal angles between the POD span and the closed-form sine modes: the data
    # lie in that span, so the angles are zero up to rounding (float64, about 1e-8 at most
    # for the weakest mode's direction).
    assert np.max(subspace_angles(basis.modes, modes)) < 1e-8
    np.testing.assert_allclose(basis.modes.T @ basis.modes, np.eye(3), atol=1e-12)
    # Energies: Z = C Φᵀ with Φ orthonormal, so Z's singular values are those of the centred
    # closed-form coefficient matrix C; their squares' shares are the energy fractions.
    flat = coefficients.reshape(-1, 3)
    expected = np.linalg.svd(flat - flat.mean(axis=0), compute_uv=False) ** 2
    expected /= expected.sum()
    np.testing.assert_allclose(basis.energy_fractions[:3], expected, rtol=1e-9, atol=1e-14)
    assert basis.energy_kept == pytest.approx(1.0, abs=1e-12)
    # Latent coordinates are standardised over the training states (unit variance).
    latent = basis.encode(centred)
    np.testing.assert_allclose(latent.std(axis=0), 1.0, rtol=1e-9)
    np.testing.assert_allclose(basis.decode(latent), centred, atol=1e-10)


@pytest.mark.parametrize("fraction", [0.5, 0.9, 0.99, 0.99999])
def test_energy_fraction_keeps_the_fewest_modes_reaching_it(fraction: float) -> None:
    states, coefficients = heat_data()
    centred = states.reshape(-1, N) - states.reshape(-1, N).mean(axis=0)
    flat = coefficients.reshape(-1, 3)
    energies = np.linalg.svd(flat - flat.mean(axis=0), compute_uv=False) ** 2
    # The closed-form coefficients give the expected count.
    expected = int(np.argmax(np.cumsum(energies) / energies.sum() >= fraction)) + 1
    basis = fit_pod(centred, fraction)
    assert basis.latent_dim == expected
    assert basis.energy_kept >= fraction
    summary = basis.summary()
    assert summary["energy_kept"] == basis.energy_kept
    assert summary["numerical_rank"] == 3


def test_gram_and_subsampled_paths_agree_with_the_thin_svd(monkeypatch) -> None:
    states, _ = heat_data()
    centred = states.reshape(-1, N) - states.reshape(-1, N).mean(axis=0)
    direct = fit_pod(centred, 3)
    gram = fit_pod(centred, 3, svd_values=N * 100)
    assert "Gram" in gram.method
    # Squaring loses relative precision √ε ≈ 1e-8 in the singular values (common practice).
    np.testing.assert_allclose(gram.singular_values[:3], direct.singular_values[:3], rtol=1e-7)
    assert np.max(subspace_angles(gram.modes, direct.modes)) < 1e-6
    monkeypatch.setattr(pod, "GRAM_MAX_DIM", 4)
    spaced = fit_pod(centred, 3, svd_values=N * 200)
    assert "evenly spaced" in spaced.method
    _, modes = closed_form_modes(3)
    # A subsample of states still spans the same 3 modes (SciPy's principal angles).
    assert np.max(subspace_angles(spaced.modes, modes)) < 1e-8


@pytest.mark.parametrize(("reduce", "message"), [
    (0, r"`reduce` is 0; expected a number of modes 1 ≤ r < 96"),
    (96, r"`reduce` is 96; expected a number of modes 1 ≤ r < 96"),
    (-2, r"`reduce` is -2; expected"),
    (True, r"`reduce` is True; expected"),
    (1.0, r"`reduce` is 1.0; expected .* or an energy fraction in \(0, 1\)\."),
    (0.0, r"`reduce` is 0.0; expected"),
    ("3", r"`reduce` is '3'; expected"),
])
def test_bad_reduce_is_refused(reduce, message) -> None:
    with pytest.raises(TrainingError, match=message):
        check_reduce(reduce, N)


def test_more_modes_than_states_or_rank_are_refused() -> None:
    states, _ = heat_data(trajectories=2)
    centred = states.reshape(-1, N) - states.reshape(-1, N).mean(axis=0)
    with pytest.raises(TrainingError, match=r"`reduce` is 5 but the training split has only 4 "
                                            r"states; expected more states than modes"):
        fit_pod(centred[:4], 5)
    with pytest.raises(TrainingError, match=r"asks for 4 modes but the training states span "
                                            r"only 3 dimensions \(numerically\)"):
        fit_pod(centred, 4)
    # Full-rank noise: keeping 0.999999 of its energy needs every mode.
    noise = np.random.default_rng(1).normal(size=(400, 8))
    with pytest.raises(TrainingError, match=r"needs all 8 modes"):
        fit_pod(noise - noise.mean(axis=0), 0.999999)
    with pytest.raises(TrainingError, match=r"NaN or infinity"):
        fit_pod(np.full((10, 4), np.nan), 2)


def test_reconstruction_error_measures_the_part_outside_the_basis() -> None:
    states, _ = heat_data()
    centred = states.reshape(-1, N) - states.reshape(-1, N).mean(axis=0)
    basis = fit_pod(centred, 3)
    _, modes = closed_form_modes(5)
    # Mode 5 is orthogonal to the kept span (closed form), so all of it is lost: its RMS over
    # components is |a| · ‖φ_5‖ / √N = |a| / √N.
    lost = 0.3 * modes[:, 4]
    errors = basis.reconstruction_errors(np.stack([centred[7] + lost, centred[7]]))
    assert errors[0] == pytest.approx(0.3 / np.sqrt(N), rel=1e-9)
    assert errors[1] < 1e-12
    # The threshold: 1.5 × the 0.99 quantile, floored at a tenth of the tolerance.
    assert reconstruction_threshold(np.full(100, 0.2), 0.1) == pytest.approx(0.3)
    assert reconstruction_threshold(np.zeros(100), 0.1) == pytest.approx(0.01)


def test_pooled_normalisation_keeps_each_groups_total_variance() -> None:
    rng = np.random.default_rng(3)
    values = rng.normal(size=(500, 5)) * np.array([1.0, 3.0, 0.01, 20.0, 40.0])
    values[:, 2] += 7.0
    mean, scale = pooled_normalisation(Ragged.from_arrays([values]),
                                       ["K", "K", "K", "m/s", "m/s"])
    z = (values - mean) / scale
    # Common practice for fields: one scale per quantity, so each group's variances sum to
    # the group size while the ratios between its points are kept.
    assert np.sum(z[:, :3].var(axis=0)) == pytest.approx(3.0)
    assert np.sum(z[:, 3:].var(axis=0)) == pytest.approx(2.0)
    assert scale[0] == scale[1] == scale[2] and scale[3] == scale[4]
    np.testing.assert_allclose(mean, values.mean(axis=0))
