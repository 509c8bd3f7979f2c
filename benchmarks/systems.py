"""Published dynamical systems with literature parameters, and trajectories on their attractors.

Each `PublishedSystem` names its source and parameter set beside the code. Vector fields act on
NumPy arrays of states (..., d) and use only complex-analytic operations, so the Jacobian comes
exactly from complex-step differentiation (see `lyapunov.py`). Reference data come from SciPy's
`solve_ivp` (DOP853) at tight tolerance. Used by tests and by `benchmarks/published.py`; not part
of the runtime.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp

VectorField = Callable[[np.ndarray], np.ndarray]

# Relative tolerance of every reference trajectory (DOP853). The batch shares one error norm
# (RMS over all components), so `trajectories` divides it by √(batch) to keep each member's
# share of the error at this level.
REFERENCE_RTOL = 1e-10


@dataclass(frozen=True)
class PublishedSystem:
    """An autonomous ODE x' = f(x) from the literature, with its sampling for learning.

    Attributes
    ----------
    name : str
        Short identifier (also the bundle name in benchmarks).
    source : str
        The publication the equations and parameters come from.
    parameters : mapping of str to float
        The parameter set, as published.
    vector_field : callable
        f(states (..., d)) -> derivatives (..., d); complex-analytic (complex-step Jacobians).
    initial_state : tuple of float
        Where the transient starts (any point in the basin of the attractor).
    transient : float
        Time discarded before states count as on the attractor.
    base_step : float
        Sampling interval of the learning data.
    strides : tuple of int
        Strides (base steps) the hierarchy is trained with.
    state_names : tuple of str
    literature_lyapunov : float or None
        Largest Lyapunov exponent from the literature, when one is known for this parameter set.
    literature_note : str
        Where `literature_lyapunov` comes from (and whether it is quoted from memory).
    time_scales : str
        The separation of time scales, in words (empty for single-scale systems).
    """

    name: str
    source: str
    parameters: Mapping[str, float]
    vector_field: VectorField
    initial_state: tuple[float, ...]
    transient: float
    base_step: float
    strides: tuple[int, ...]
    state_names: tuple[str, ...]
    literature_lyapunov: float | None = None
    literature_note: str = ""
    time_scales: str = ""

    @property
    def dim(self) -> int:
        return len(self.initial_state)


def lorenz63(sigma: float = 10.0, rho: float = 28.0, beta: float = 8.0 / 3.0) -> PublishedSystem:
    """Lorenz (1963), "Deterministic nonperiodic flow", J. Atmos. Sci. 20, 130–141.

    x' = σ (y − x), y' = x (ρ − z) − y, z' = x y − β z with the paper's σ = 10, ρ = 28,
    β = 8/3. Largest Lyapunov exponent 0.9056 (Sprott, "Chaos and Time-Series Analysis",
    Oxford 2003, Appendix A; quoted from memory; the exponents sum to −(σ + 1 + β), the
    constant trace of the Jacobian).
    """
    def vector_field(states: np.ndarray) -> np.ndarray:
        x, y, z = states[..., 0], states[..., 1], states[..., 2]
        return np.stack([sigma * (y - x), x * (rho - z) - y, x * y - beta * z], axis=-1)

    return PublishedSystem(
        name="lorenz63",
        source='E. N. Lorenz (1963), "Deterministic nonperiodic flow", J. Atmos. Sci. 20, 130-141',
        parameters={"sigma": sigma, "rho": rho, "beta": beta},
        vector_field=vector_field, initial_state=(1.0, 1.0, 1.0), transient=50.0,
        base_step=0.01, strides=(1, 4, 16, 64), state_names=("x", "y", "z"),
        literature_lyapunov=0.9056 if (sigma, rho, beta) == (10.0, 28.0, 8.0 / 3.0) else None,
        literature_note="Sprott (2003), Chaos and Time-Series Analysis, Appendix A "
                        "(quoted from memory)",
    )


def hindmarsh_rose(current: float = 3.25, r: float = 0.006) -> PublishedSystem:
    """Hindmarsh & Rose (1984), "A model of neuronal bursting using three coupled first order
    differential equations", Proc. R. Soc. Lond. B 221, 87–102.

    x' = y − a x³ + b x² − z + I, y' = c − d x² − y, z' = r (s (x − x_R) − z) with the
    commonly used a = 1, b = 3, c = 1, d = 5, s = 4, x_R = −1.6, r = 0.006, I = 3.25 (the set
    widely used for irregular, chaotic bursting; quoted from memory). The slow variable z
    evolves on the time scale 1/r ≈ 170 against spikes about one time unit long.
    """
    a, b, c, d, s, x_rest = 1.0, 3.0, 1.0, 5.0, 4.0, -1.6

    def vector_field(states: np.ndarray) -> np.ndarray:
        x, y, z = states[..., 0], states[..., 1], states[..., 2]
        return np.stack([y - a * x**3 + b * x**2 - z + current,
                         c - d * x**2 - y,
                         r * (s * (x - x_rest) - z)], axis=-1)

    return PublishedSystem(
        name="hindmarsh_rose",
        source="J. L. Hindmarsh and R. M. Rose (1984), Proc. R. Soc. Lond. B 221, 87-102",
        parameters={"a": a, "b": b, "c": c, "d": d, "s": s, "x_R": x_rest, "r": r,
                    "I": current},
        vector_field=vector_field, initial_state=(-1.0, -5.0, 3.0), transient=2000.0,
        base_step=0.05, strides=(1, 4, 16, 64), state_names=("x", "y", "z"),
        time_scales=f"spikes of about 1 time unit; slow adaptation z on 1/r = {1 / r:.0f}",
    )


def lorenz96_two_scale(slow: int = 5, fast_per_slow: int = 4, forcing: float = 10.0,
                       coupling: float = 1.0, time_ratio: float = 10.0,
                       amplitude_ratio: float = 10.0) -> PublishedSystem:
    """Two-scale Lorenz (1996) model in a small configuration.

    Lorenz (1996), "Predictability – a problem partly solved", Proc. ECMWF Seminar on
    Predictability, Vol. I, 1–18:
    X_k' = −X_{k−1}(X_{k−2} − X_{k+1}) − X_k + F − (h c / b) Σ_j Y_{j,k},
    Y_i' = −c b Y_{i+1}(Y_{i+2} − Y_{i−1}) − c Y_i + (h c / b) X_{k(i)},
    with the Y on one ring of K·J sites (Y_{j,k} coupled to X_k). The paper's parameters
    F = 10, h = 1, c = 10 (fast variables ten times faster), b = 10 (ten times smaller);
    quoted from memory. The paper uses K = 36, J = 10; here K = 5, J = 4 keeps d = 25 small
    enough for CPU training while the fast variables stay chaotic (with K = 4, J = 4 they are
    slaved to X and the orbit is nearly periodic: largest exponent about 0.03 against about 6
    here, both measured with `lyapunov.py`).
    """
    fast = slow * fast_per_slow
    factor = coupling * time_ratio / amplitude_ratio

    def vector_field(states: np.ndarray) -> np.ndarray:
        big, small = states[..., :slow], states[..., slow:]
        grouped = small.reshape(*small.shape[:-1], slow, fast_per_slow)
        big_rate = (np.roll(big, 1, axis=-1) * (np.roll(big, -1, axis=-1)
                                                  - np.roll(big, 2, axis=-1))
                    - big + forcing - factor * grouped.sum(axis=-1))
        small_rate = (-time_ratio * amplitude_ratio * np.roll(small, -1, axis=-1)
                      * (np.roll(small, -2, axis=-1) - np.roll(small, 1, axis=-1))
                      - time_ratio * small
                      + factor * np.repeat(big, fast_per_slow, axis=-1))
        return np.concatenate([big_rate, small_rate], axis=-1)

    # A deterministic, non-symmetric start (a symmetric one stays on an invariant subspace).
    start = tuple([forcing + 0.5 * math.sin(k + 1.0) for k in range(slow)]
                  + [0.1 * math.cos(3.0 * i + 1.0) for i in range(fast)])
    names = tuple(f"X{k + 1}" for k in range(slow)) + tuple(
        f"Y{j + 1}_{k + 1}" for k in range(slow) for j in range(fast_per_slow))
    return PublishedSystem(
        name="lorenz96_two_scale",
        source='E. N. Lorenz (1996), "Predictability - a problem partly solved", '
               "Proc. ECMWF Seminar on Predictability, 1-18",
        parameters={"K": slow, "J": fast_per_slow, "F": forcing, "h": coupling,
                    "c": time_ratio, "b": amplitude_ratio},
        vector_field=vector_field, initial_state=start, transient=50.0,
        base_step=0.005, strides=(1, 4, 16, 64), state_names=names,
        time_scales=f"fast Y {time_ratio:g} times faster and {amplitude_ratio:g} times "
                    "smaller than slow X",
    )


def published_systems() -> tuple[PublishedSystem, ...]:
    """The three systems the benchmarks and tests use, with their published parameters."""
    return (lorenz63(), hindmarsh_rose(), lorenz96_two_scale())


def trajectories(system: PublishedSystem, initial: np.ndarray, samples: int) -> np.ndarray:
    """Reference trajectories from many initial states at once.

    Parameters
    ----------
    initial : ndarray, shape (N, d)
    samples : int
        Samples per trajectory, every `system.base_step`, the first being `initial`.

    Returns
    -------
    ndarray, shape (N, samples, d)
    """
    initial = np.asarray(initial, dtype=np.float64)
    count = initial.shape[0]
    times = np.arange(samples) * system.base_step
    solution = _solve(system, initial, times[-1], times)
    return solution.reshape(count, system.dim, samples).transpose(0, 2, 1)


def attractor_states(system: PublishedSystem, count: int, *, spacing: float,
                     seed: int) -> np.ndarray:
    """`count` states along one orbit on the attractor, `spacing` time units apart.

    The orbit starts at `system.initial_state` plus a seeded perturbation of size 1e-3 and
    runs for `system.transient` first; different seeds give independent orbits once chaos
    has amplified the perturbation (the transients are many Lyapunov times long).
    """
    rng = np.random.default_rng(seed)
    start = np.asarray(system.initial_state) + 1e-3 * rng.standard_normal(system.dim)
    settled = _solve(system, start[None], system.transient, None)[:, -1]
    if count == 1:
        return settled[None]
    times = np.arange(count) * spacing
    return _solve(system, settled[None], times[-1], times).T.copy()


def _solve(system: PublishedSystem, initial: np.ndarray, end: float,
           times: np.ndarray | None) -> np.ndarray:
    """solve_ivp (DOP853) of a batch (N, d) flattened; returns y (N·d, len(times) or steps)."""
    count, dim = initial.shape

    def rate(_, flat: np.ndarray) -> np.ndarray:
        return system.vector_field(flat.reshape(count, dim)).reshape(-1)

    rtol = max(REFERENCE_RTOL / math.sqrt(count), 1e-13)
    solution = solve_ivp(rate, (0.0, float(end)), initial.reshape(-1), method="DOP853",
                         rtol=rtol, atol=rtol, t_eval=times)
    if solution.status != 0:
        raise RuntimeError(f"solve_ivp failed on {system.name}: {solution.message}")
    return solution.y
