"""Lyapunov exponents by the Benettin/QR method on the variational equations.

The tangent vectors Q (d, m) follow Q' = J(x) Q along the orbit x' = f(x); every
`renormalise` time units Q is re-orthonormalised by a QR factorisation and the logarithms of
|diag R| are accumulated (Benettin, Galgani, Giorgilli & Strelcyn 1980, Meccanica 15; Shimada
& Nagashima 1979, Prog. Theor. Phys. 61). J(x) comes from complex-step differentiation,
J e_i = Im f(x + i h e_i) / h, exact to rounding for analytic f (Squire & Trapp 1998, SIAM
Review 40).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.integrate import solve_ivp

from .systems import PublishedSystem, attractor_states

COMPLEX_STEP = 1e-30


def jacobian(system: PublishedSystem, state: np.ndarray) -> np.ndarray:
    """J(x), shape (d, d), by complex-step differentiation of the vector field."""
    dim = system.dim
    probes = np.asarray(state, dtype=np.complex128)[None, :] + 1j * COMPLEX_STEP * np.eye(dim)
    return system.vector_field(probes).imag.T / COMPLEX_STEP


def lyapunov_exponents(system: PublishedSystem, *, count: int = 1, duration: float,
                       renormalise: float = 1.0, seed: int = 0, rtol: float = 1e-9
                       ) -> np.ndarray:
    """The `count` largest Lyapunov exponents (per time unit), largest first.

    Parameters
    ----------
    count : int
        Tangent vectors followed (1 gives the largest exponent only).
    duration : float
        Time averaged over, after the system's transient.
    renormalise : float
        Time between QR re-orthonormalisations.
    seed : int
        Chooses the orbit (see `attractor_states`) and the initial tangent vectors.
    """
    dim = system.dim
    state = attractor_states(system, 1, spacing=1.0, seed=seed)[0]
    rng = np.random.default_rng(seed)
    tangent, _ = np.linalg.qr(rng.standard_normal((dim, count)))

    def rate(_, flat: np.ndarray) -> np.ndarray:
        x = flat[:dim]
        vectors = flat[dim:].reshape(dim, count)
        return np.concatenate([system.vector_field(x), (jacobian(system, x) @ vectors).ravel()])

    sums = np.zeros(count)
    segments = max(1, math.ceil(duration / renormalise))
    for _ in range(segments):
        solution = solve_ivp(rate, (0.0, renormalise), np.concatenate([state, tangent.ravel()]),
                             method="DOP853", rtol=rtol, atol=rtol)
        end = solution.y[:, -1]
        state = end[:dim]
        tangent, triangle = np.linalg.qr(end[dim:].reshape(dim, count))
        sums += np.log(np.abs(np.diag(triangle)))
    return sums / (segments * renormalise)
