"""Proper orthogonal decomposition (POD): the linear basis of a reduced bundle, fitted on the
normalised training states, with its encoder, decoder and reconstruction-error threshold.

The basis is the leading right singular vectors of the snapshot matrix Z (n states × d
components) of normalised states z = (x − mean) / scale. The trainer's `mean` is the training
split's mean, so Z is centred by construction: the decomposition is of the fluctuations about
the mean field, and encoder and decoder are purely linear (no bias). The latent coordinates are
standardised like the full-state components are: y_k = (z · v_k) / s_k with s_k = σ_k / √n the
standard deviation of mode k's coefficient over the training states.
"""

from __future__ import annotations

import logging
import math
import operator
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch

from .envelope import RADIUS_MARGIN, RADIUS_QUANTILE
from .errors import TrainingError

logger = logging.getLogger(__name__)
# The snapshot matrix is decomposed by a thin SVD up to this many entries (256 MiB float64);
# beyond, through its Gram matrix ZᵀZ (d × d, accumulated in row blocks) when d is at most
# GRAM_MAX_DIM, otherwise by a thin SVD of evenly spaced rows. The Gram path squares the
# singular values: those below about 1e-8 σ_1 are lost, but they carry less than 1e-16 of
# the energy.
SVD_VALUES = 1 << 25
GRAM_MAX_DIM = 4096
# A singular value counts (numerical rank) above σ_1 · max(n, d) · ε (float64), the rule of
# numpy.linalg.matrix_rank (common practice).
_EPSILON = float(np.finfo(np.float64).eps)
# The reconstruction threshold is never below this share of the validation tolerance: a part
# of the state the basis cannot hold that is smaller than a tenth of the tolerated error
# cannot by itself bring a forecast near the tolerance, even when the data never had it.
RECONSTRUCTION_TOLERANCE_SHARE = 0.1
# The spectrum summary lists at most this many leading singular values.
SPECTRUM_POINTS = 64


@dataclass(frozen=True)
class PODBasis:
    """A fitted POD basis in normalised coordinates.

    Attributes
    ----------
    modes : ndarray, shape (d, r), float64
        Orthonormal columns v_1 … v_r, most energetic first.
    latent_scale : ndarray, shape (r,), float64
        s_k = σ_k / √n: the latent coordinate y_k = (z · v_k) / s_k has unit variance over the
        training states.
    singular_values : ndarray, shape (min(n, d),), float64
        The whole spectrum σ_1 ≥ σ_2 ≥ … of the snapshot matrix.
    snapshots : int
        n, the training states decomposed.
    requested : int or float
        What `reduce` asked for: a mode count or an energy fraction.
    method : str
        How the spectrum was computed.
    """

    modes: np.ndarray
    latent_scale: np.ndarray
    singular_values: np.ndarray
    snapshots: int
    requested: int | float
    method: str

    @property
    def latent_dim(self) -> int:
        return int(self.modes.shape[1])

    @property
    def state_dim(self) -> int:
        return int(self.modes.shape[0])

    @property
    def energy_fractions(self) -> np.ndarray:
        """Share of the total energy Σσ² in each mode, shape (min(n, d),)."""
        energy = self.singular_values**2
        total = energy.sum()
        return energy / total if total > 0 else energy

    @property
    def energy_kept(self) -> float:
        """Share of the energy the r kept modes hold."""
        return float(self.energy_fractions[:self.latent_dim].sum())

    def encode(self, z: np.ndarray) -> np.ndarray:
        """Normalised full states (..., d) → latent states (..., r), float64."""
        return (np.asarray(z, dtype=np.float64) @ self.modes) / self.latent_scale

    def decode(self, latent: np.ndarray) -> np.ndarray:
        """Latent states (..., r) → normalised full states (..., d), float64."""
        return (np.asarray(latent, dtype=np.float64) * self.latent_scale) @ self.modes.T

    def reconstruction_errors(self, z: np.ndarray) -> np.ndarray:
        """Normalised RMS over components of z − decode(encode(z)) per state, (B, d) → (B,).

        The part of a state the basis cannot hold; it is lost from every forecast.
        """
        z = np.asarray(z, dtype=np.float64)
        residual = z - (z @ self.modes) @ self.modes.T
        return np.sqrt(np.mean(residual**2, axis=-1))

    def encoder_module(self) -> torch.nn.Module:
        """The encoder as one bias-free linear layer (exports as a single MatMul/Gemm)."""
        return _linear((self.modes / self.latent_scale).T)

    def decoder_module(self) -> torch.nn.Module:
        """The decoder as one bias-free linear layer."""
        return _linear(self.modes * self.latent_scale)

    def summary(self) -> dict[str, Any]:
        """JSON-ready description for report.json."""
        fractions = self.energy_fractions
        cumulative = np.cumsum(fractions)
        shown = min(SPECTRUM_POINTS, len(self.singular_values))
        return {
            "method": "POD (centred: normalised training states about their mean)",
            "decomposition": self.method,
            "requested": self.requested,
            "latent_dim": self.latent_dim,
            "state_dim": self.state_dim,
            "snapshots": self.snapshots,
            "energy_kept": self.energy_kept,
            "numerical_rank": numerical_rank(self.singular_values, self.snapshots,
                                             self.state_dim),
            "spectrum": {
                "singular_values": [float(v) for v in self.singular_values[:shown]],
                "energy_fractions": [float(v) for v in fractions[:shown]],
                "cumulative_energy": [float(v) for v in cumulative[:shown]],
                "modes_listed": shown,
                "modes_total": len(self.singular_values),
                "modes_for_energy": {str(level): modes_for_energy(fractions, level)
                                     for level in (0.9, 0.99, 0.999, 0.9999)},
            },
        }


def check_reduce(reduce: Any, dim: int) -> int | float:
    """`reduce` as a mode count 1 ≤ r < d (int) or an energy fraction in (0, 1) (float)."""
    expected = (f"expected a number of modes 1 ≤ r < {dim} (the state dimension) or an "
                "energy fraction in (0, 1)")
    if isinstance(reduce, bool):
        raise TrainingError(f"`reduce` is {reduce!r}; {expected}.")
    if isinstance(reduce, float | np.floating):
        fraction = float(reduce)
        if not 0.0 < fraction < 1.0:
            raise TrainingError(f"`reduce` is {reduce!r}; {expected}.")
        return fraction
    try:
        modes = operator.index(reduce)
    except TypeError as error:
        raise TrainingError(f"`reduce` is {reduce!r}; {expected}.") from error
    if not 1 <= modes < dim:
        raise TrainingError(f"`reduce` is {reduce!r}; {expected}.")
    return modes


def numerical_rank(singular_values: np.ndarray, snapshots: int, dim: int) -> int:
    """Singular values above σ_1 · max(n, d) · ε (numpy.linalg.matrix_rank's rule)."""
    if len(singular_values) == 0 or singular_values[0] <= 0:
        return 0
    cutoff = singular_values[0] * max(snapshots, dim) * _EPSILON
    return int(np.sum(singular_values > cutoff))


def modes_for_energy(fractions: np.ndarray, level: float) -> int | None:
    """The fewest leading modes whose energy share reaches `level`; None if none do."""
    reached = np.flatnonzero(np.cumsum(fractions) >= level * (1 - 1e-12))
    return int(reached[0]) + 1 if len(reached) else None


def fit_pod(snapshots: np.ndarray, reduce: int | float, *,
            svd_values: int = SVD_VALUES) -> PODBasis:
    """Fit a POD basis to normalised snapshots.

    Parameters
    ----------
    snapshots : ndarray, shape (n, d)
        Normalised states, decomposed as given (centre them first for a centred POD; the
        trainer's are centred by construction).
    reduce : int or float
        Modes to keep (1 ≤ r < d), or the energy fraction in (0, 1) to keep: the fewest
        leading modes whose share of Σσ² reaches it.
    svd_values : int
        Largest n · d decomposed by a direct thin SVD (see `SVD_VALUES`).

    Raises
    ------
    TrainingError
        `reduce` out of range, fewer states than modes, or more modes than the states span.
    """
    snapshots = np.asarray(snapshots, dtype=np.float64)
    if snapshots.ndim != 2 or snapshots.shape[0] < 1 or snapshots.shape[1] < 1:
        raise TrainingError(f"the snapshots have shape {snapshots.shape}; expected (n, d).")
    count, dim = snapshots.shape
    reduce = check_reduce(reduce, dim)
    if isinstance(reduce, int) and count <= reduce:
        raise TrainingError(
            f"`reduce` is {reduce} but the training split has only {count} states; expected "
            f"more states than modes (at least {reduce + 1}, the mean takes one)."
        )
    if not np.isfinite(snapshots).all():
        raise TrainingError("the snapshots contain NaN or infinity; expected finite states.")
    singular_values, vectors, method = _spectrum(snapshots, svd_values)
    fractions = (singular_values**2 / np.sum(singular_values**2)
                 if singular_values[0] > 0 else np.zeros_like(singular_values))
    rank = numerical_rank(singular_values, count, dim)
    if isinstance(reduce, float):
        modes = modes_for_energy(fractions, reduce)
        if modes is None or modes >= dim:
            raise TrainingError(
                f"`reduce` is {reduce!r} but keeping that energy fraction needs all {dim} "
                "modes; expected a smaller fraction or a number of modes below the state "
                "dimension."
            )
    else:
        modes = reduce
    if modes > rank:
        raise TrainingError(
            f"`reduce` asks for {modes} modes but the training states span only {rank} "
            f"dimensions (numerically); expected at most {rank} modes."
        )
    latent_scale = singular_values[:modes] / math.sqrt(count)
    logger.info("POD: %d of %d modes keep %.6g of the energy (%s)", modes, dim,
                float(fractions[:modes].sum()), method)
    return PODBasis(modes=_signed(vectors[:, :modes]), latent_scale=latent_scale,
                    singular_values=singular_values, snapshots=count, requested=reduce,
                    method=method)


def reconstruction_threshold(errors: np.ndarray, tolerance: float) -> float:
    """The reconstruction error (normalised RMS) above which a state is unlike the data.

    RADIUS_MARGIN times the RADIUS_QUANTILE of `errors` (per-state reconstruction errors of
    held-out states, else training states), the rule of the envelope radius, and never below
    `RECONSTRUCTION_TOLERANCE_SHARE` · `tolerance`.
    """
    errors = np.asarray(errors, dtype=np.float64)
    typical = float(np.quantile(errors, RADIUS_QUANTILE)) if errors.size else 0.0
    return max(RADIUS_MARGIN * typical, RECONSTRUCTION_TOLERANCE_SHARE * tolerance)


def _spectrum(snapshots: np.ndarray, svd_values: int) -> tuple[np.ndarray, np.ndarray, str]:
    """Singular values (k,) descending and right singular vectors (d, k) of `snapshots`."""
    count, dim = snapshots.shape
    if count * dim <= svd_values:
        _, values, rows = np.linalg.svd(snapshots, full_matrices=False)
        return values, rows.T, "thin SVD of the snapshot matrix"
    if dim <= GRAM_MAX_DIM:
        gram = np.zeros((dim, dim))
        block = max(1, svd_values // dim)
        for first in range(0, count, block):
            part = snapshots[first:first + block]
            gram += part.T @ part
        energies, vectors = np.linalg.eigh(gram)
        order = np.argsort(energies)[::-1][:min(count, dim)]
        values = np.sqrt(np.maximum(energies[order], 0.0))
        return values, vectors[:, order], "eigendecomposition of the Gram matrix ZᵀZ"
    rows = np.unique(np.linspace(0, count - 1, max(dim, svd_values // dim)).round()
                     .astype(np.int64))
    _, values, vectors = np.linalg.svd(snapshots[rows], full_matrices=False)
    # Rescale so the energies stand for all n states (each kept row stands for n / m).
    values = values * math.sqrt(count / len(rows))
    return values, vectors.T, f"thin SVD of {len(rows)} evenly spaced states"


def _signed(modes: np.ndarray) -> np.ndarray:
    """Fix each mode's sign (its largest entry positive) so fits are reproducible."""
    largest = np.argmax(np.abs(modes), axis=0)
    signs = np.sign(modes[largest, np.arange(modes.shape[1])])
    return np.ascontiguousarray(modes * np.where(signs == 0, 1.0, signs))


def _linear(weight: np.ndarray) -> torch.nn.Module:
    """A bias-free float32 linear layer computing states @ weight.T."""
    layer = torch.nn.Linear(weight.shape[1], weight.shape[0], bias=False)
    with torch.no_grad():
        layer.weight.copy_(torch.from_numpy(np.ascontiguousarray(weight, dtype=np.float32)))
    return layer.eval()
