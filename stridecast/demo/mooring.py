"""The field scenario: a taut mooring line from a quay bollard to a swaying workboat (invented).

A synthetic-fibre line of length L runs from a bollard on the quay (x = 0, fixed) to the bow
of a small workboat (x = L). The line vibrates transversely like a taut string, its
fundamental about 1.8 Hz; the boat, free to sway sideways and held only by the line's
tension, carries the line's end with it, a slow mode with a period of about 20 s. Light
damping (mass-proportional: water and air drag) lets every mode decay in about 50 s, and the
line's tension grows with its stretch (a Kirchhoff-type line), a mild nonlinearity that shifts
the frequencies with the amplitude and couples the modes.

Discretisation: `nodes` equal segments, nodes 1 … N at x_j = j L / N (node N is the boat; the
bollard node 0 is fixed at u = 0). The state is the transverse displacement u_1 … u_N (m)
followed by the velocities v_1 … v_N (m/s): 2 N components (256 for the default 128 nodes).
Everything here is invented for the demo; no real line, vessel, quay or data set is described.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np


@dataclass(frozen=True)
class MooringParameters:
    """Physical and discretisation parameters of the mooring line (SI units).

    Attributes
    ----------
    length : float
        Line length from bollard to bow, m. Default 40 m.
    line_mass : float
        Mass per unit length μ, kg/m. Default 1.5 kg/m (a wet synthetic line with fittings).
    pretension : float
        Tension T0 of the line at rest, N. Default 30 kN: the transverse wave speed
        √(T0/μ) is 141 m/s and the line's first string mode 1.77 Hz.
    axial_stiffness : float
        EA, N: the tension is T0 + EA (ℓ − L)/L for a line of current length ℓ. Default 0.4 MN
        (a soft synthetic line): the largest motions the demo trains on add about 0.5 % to the
        tension and shift the frequencies by up to about 0.25 %, so that over a 5 s stride the
        phase of the fastest excited mode (27 cycles) depends on the amplitude by up to about
        0.07 cycle — mild enough to learn, not linear. 0 gives the linear limit of constant
        tension.
    boat_mass : float
        Mass of the workboat in sway (including added water mass), kg. Default 7600 kg: held
        only by the line's tension, it sways with a period of about 20 s.
    damping_rate : float
        Decay rate γ of every mode's amplitude, 1/s (mass-proportional viscous damping: each
        node feels −2 γ m v). Default 0.02 /s, a decay time of 50 s.
    nodes : int
        Number of moving nodes N (the last is the boat); the state has 2 N components.
    """

    length: float = 40.0
    line_mass: float = 1.5
    pretension: float = 30.0e3
    axial_stiffness: float = 4.0e5
    boat_mass: float = 7600.0
    damping_rate: float = 0.02
    nodes: int = 128

    def __post_init__(self) -> None:
        for name in ("length", "line_mass", "pretension", "boat_mass"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise ValueError(f"`{name}` is {value!r}; expected a finite number > 0.")
        for name in ("axial_stiffness", "damping_rate"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise ValueError(f"`{name}` is {value!r}; expected a finite number ≥ 0.")
        if not (isinstance(self.nodes, int) and self.nodes >= 4):
            raise ValueError(f"`nodes` is {self.nodes!r}; expected an integer ≥ 4.")

    @property
    def state_dim(self) -> int:
        """2 N: displacements then velocities."""
        return 2 * self.nodes

    @property
    def spacing(self) -> float:
        """Node spacing h = L / N, m."""
        return self.length / self.nodes

    @property
    def wave_speed(self) -> float:
        """Transverse wave speed √(T0/μ), m/s."""
        return math.sqrt(self.pretension / self.line_mass)

    @property
    def positions(self) -> np.ndarray:
        """x of the moving nodes, m; shape (N,)."""
        return self.spacing * np.arange(1, self.nodes + 1)

    @property
    def masses(self) -> np.ndarray:
        """Lumped node masses, kg; shape (N,): μ h inside, M + μ h / 2 at the boat."""
        masses = np.full(self.nodes, self.line_mass * self.spacing)
        masses[-1] = self.boat_mass + 0.5 * self.line_mass * self.spacing
        return masses

    @property
    def mass_ratio(self) -> float:
        """μ L / M, the line's mass over the boat's."""
        return self.line_mass * self.length / self.boat_mass


DEFAULT_PARAMETERS = MooringParameters()


def state_names(parameters: MooringParameters = DEFAULT_PARAMETERS) -> tuple[str, ...]:
    """"u001" … "uN" (displacements) then "v001" … "vN" (velocities)."""
    width = max(3, len(str(parameters.nodes)))
    return (tuple(f"u{j:0{width}d}" for j in range(1, parameters.nodes + 1))
            + tuple(f"v{j:0{width}d}" for j in range(1, parameters.nodes + 1)))


def state_units(parameters: MooringParameters = DEFAULT_PARAMETERS) -> tuple[str, ...]:
    return ("m",) * parameters.nodes + ("m/s",) * parameters.nodes


def _as_states(states: np.ndarray, parameters: MooringParameters) -> np.ndarray:
    array = np.asarray(states, dtype=np.float64)
    if array.shape[-1:] != (parameters.state_dim,):
        raise ValueError(
            f"`states` has shape {array.shape}; expected ({parameters.state_dim},) or (batch, "
            f"{parameters.state_dim}) holding {parameters.nodes} displacements then "
            f"{parameters.nodes} velocities."
        )
    return array


def _segments(displacements: np.ndarray, spacing: float) -> tuple[np.ndarray, np.ndarray]:
    """Differences u_j − u_{j−1} (u_0 = 0 at the bollard) and segment lengths, (…, N) each."""
    # By hand: np.diff with `prepend` concatenates and costs several times more, and the
    # vector field is called about 10^5 times per ground-truth trajectory.
    differences = np.empty_like(displacements)
    differences[..., 0] = displacements[..., 0]
    np.subtract(displacements[..., 1:], displacements[..., :-1], out=differences[..., 1:])
    return differences, np.sqrt(spacing * spacing + differences * differences)


def tension(states: np.ndarray,
            parameters: MooringParameters = DEFAULT_PARAMETERS) -> np.ndarray:
    """Line tension T0 + EA (ℓ − L)/L, N; shape `states.shape[:-1]`."""
    array = _as_states(states, parameters)
    _, lengths = _segments(array[..., :parameters.nodes], parameters.spacing)
    stretch = lengths.sum(axis=-1) - parameters.length
    return parameters.pretension + parameters.axial_stiffness * stretch / parameters.length


def vector_field(states: np.ndarray,
                 parameters: MooringParameters = DEFAULT_PARAMETERS) -> np.ndarray:
    """Time derivative of the state: d/dt (u, v).

    Parameters
    ----------
    states : array_like, shape (2N,) or (B, 2N)
        Displacements (m) then velocities (m/s) of the moving nodes.
    parameters : MooringParameters
        The line; defaults to the demo's.

    Returns
    -------
    ndarray, same shape as `states`
        (v, a) with a_j = −T ∂ℓ/∂u_j / m_j − 2 γ v_j: the uniform tension T (it grows with the
        line's length ℓ) pulls each node along both its segments, exact in geometry.

    This is the callable the runtime's hybrid and integrate modes take.
    """
    array = _as_states(states, parameters)
    count = parameters.nodes
    displacements, velocities = array[..., :count], array[..., count:]
    differences, lengths = _segments(displacements, parameters.spacing)
    stretch = lengths.sum(axis=-1, keepdims=True) - parameters.length
    tension_now = parameters.pretension + parameters.axial_stiffness * stretch / parameters.length
    # Sine of each segment's angle; node j is pulled back along segment j and forward along j+1.
    slopes = differences / lengths
    forces = -slopes
    forces[..., :-1] += slopes[..., 1:]
    derivatives = np.empty_like(array)
    derivatives[..., :count] = velocities
    derivatives[..., count:] = (tension_now * forces * _inverse_masses(parameters)
                                - 2.0 * parameters.damping_rate * velocities)
    return derivatives


@lru_cache(maxsize=8)
def _inverse_masses(parameters: MooringParameters) -> np.ndarray:
    inverse = 1.0 / parameters.masses
    inverse.flags.writeable = False  # shared by every call
    return inverse


def energy(states: np.ndarray, parameters: MooringParameters = DEFAULT_PARAMETERS) -> np.ndarray:
    """Kinetic plus elastic energy ½ Σ m v² + T0 (ℓ − L) + EA (ℓ − L)² / (2 L), J.

    Conserved when `parameters.damping_rate` is 0 (the tension derives from this potential).
    """
    array = _as_states(states, parameters)
    count = parameters.nodes
    _, lengths = _segments(array[..., :count], parameters.spacing)
    stretch = lengths.sum(axis=-1) - parameters.length
    kinetic = 0.5 * np.sum(parameters.masses * array[..., count:] ** 2, axis=-1)
    return (kinetic + parameters.pretension * stretch
            + 0.5 * parameters.axial_stiffness * stretch * stretch / parameters.length)


@lru_cache(maxsize=8)
def _linear_modes(parameters: MooringParameters) -> tuple[np.ndarray, np.ndarray]:
    """Angular frequencies (N,) and mode shapes (N, N) of the undamped linear limit.

    The linear limit is m ü = −(T0/h) K u with K the tridiagonal second-difference matrix
    (fixed at the bollard, free at the boat). Shapes are columns scaled to a peak of 1 and
    sign so that the boat's displacement is ≥ 0.
    """
    count, spacing = parameters.nodes, parameters.spacing
    stiffness = 2.0 * np.eye(count) - np.eye(count, k=1) - np.eye(count, k=-1)
    stiffness[-1, -1] = 1.0  # the boat has a segment on one side only
    stiffness *= parameters.pretension / spacing
    root = 1.0 / np.sqrt(parameters.masses)
    values, vectors = np.linalg.eigh(root[:, None] * stiffness * root[None, :])
    shapes = root[:, None] * vectors
    shapes /= np.abs(shapes).max(axis=0)
    shapes *= np.where(shapes[-1] < 0, -1.0, 1.0)
    return np.sqrt(np.clip(values, 0.0, None)), shapes


def linear_frequencies(parameters: MooringParameters = DEFAULT_PARAMETERS) -> np.ndarray:
    """Undamped angular frequencies of the discretised line's linear limit, rad/s; (N,)."""
    return _linear_modes(parameters)[0].copy()


def mode_shape(index: int, parameters: MooringParameters = DEFAULT_PARAMETERS) -> np.ndarray:
    """Shape of linear mode `index` (0: the boat's sway), peak 1; shape (N,)."""
    return _linear_modes(parameters)[1][:, index].copy()


@dataclass(frozen=True)
class InitialRange:
    """The range of initial conditions the demo trains on (its training envelope).

    Attributes
    ----------
    amplitudes : tuple of float
        Largest peak displacement of each excited linear mode, m: the boat's sway first
        (default 1 m), then the line's first three string modes (15, 8 and 5 cm).
    """

    amplitudes: tuple[float, ...] = (1.0, 0.15, 0.08, 0.05)


def state_from_modes(amplitudes: np.ndarray, phases: np.ndarray,
                     parameters: MooringParameters = DEFAULT_PARAMETERS) -> np.ndarray:
    """States made of linear modes with given amplitudes and phases.

    Parameters
    ----------
    amplitudes, phases : array_like, shape (K,) or (B, K)
        Peak displacement (m) and phase φ (rad) of the first K linear modes: mode k contributes
        A cos φ · shape_k to the displacement and −A ω_k sin φ · shape_k to the velocity.

    Returns
    -------
    ndarray, shape (2N,) or (B, 2N)
    """
    amplitude = np.asarray(amplitudes, dtype=np.float64)
    phase = np.asarray(phases, dtype=np.float64)
    if amplitude.shape != phase.shape or amplitude.ndim not in (1, 2):
        raise ValueError(f"`amplitudes` {amplitude.shape} and `phases` {phase.shape} must have "
                         "the same shape, (K,) or (B, K).")
    frequencies, shapes = _linear_modes(parameters)
    modes = amplitude.shape[-1]
    if modes > parameters.nodes:
        raise ValueError(f"{modes} modes asked for; the line has {parameters.nodes}.")
    displacement = (amplitude * np.cos(phase)) @ shapes[:, :modes].T
    velocity = (-amplitude * frequencies[:modes] * np.sin(phase)) @ shapes[:, :modes].T
    return np.concatenate([displacement, velocity], axis=-1)


def sample_initial_states(count: int, rng: np.random.Generator, *,
                          initial_range: InitialRange = InitialRange(),
                          parameters: MooringParameters = DEFAULT_PARAMETERS) -> np.ndarray:
    """Random initial states: each excited mode with a random amplitude and phase.

    Each mode is drawn uniformly over a disc of its linear phase plane (amplitude A_max √u with
    u uniform, phase uniform), so the states cover the envelope evenly.

    Returns
    -------
    ndarray, shape (count, 2N)
    """
    if count < 1:
        raise ValueError(f"`count` is {count!r}; expected at least 1.")
    limits = np.asarray(initial_range.amplitudes, dtype=np.float64)
    amplitudes = limits * np.sqrt(rng.uniform(0.0, 1.0, (count, limits.size)))
    phases = rng.uniform(0.0, 2.0 * np.pi, (count, limits.size))
    return state_from_modes(amplitudes, phases, parameters)


def simulate(states: np.ndarray, times: np.ndarray, *,
             parameters: MooringParameters = DEFAULT_PARAMETERS, rtol: float = 1e-8,
             atol: float = 1e-10) -> np.ndarray:
    """Ground truth: integrate a batch of states with SciPy's DOP853 (Hairer's Fortran code).

    Parameters
    ----------
    states : array_like, shape (2N,) or (B, 2N)
        Initial states at t = 0.
    times : array_like, shape (T,)
        Increasing times ≥ 0 at which to report the state.
    rtol, atol : float
        Tolerances each trajectory is held to (divided by √B, as `crane.simulate` explains).

    Returns
    -------
    ndarray, shape (T, 2N) or (T, B, 2N)

    The line's shortest discrete mode (period 2π h / (2 c) ≈ 7 ms) bounds an explicit
    integrator's step whatever the tolerance, so a trajectory takes about 200 steps per second.
    `scipy.integrate.ode`'s DOP853 runs the steps in Fortran, about twice as fast here as
    `solve_ivp`'s Python loop with the same method (the benchmark times `solve_ivp`). The whole
    batch is integrated as one system. SciPy is imported here so the module needs only NumPy.
    """
    from scipy.integrate import ode

    initial = _as_states(states, parameters)
    single = initial.ndim == 1
    dim = parameters.state_dim
    initial = initial.reshape(-1, dim)
    grid = np.asarray(times, dtype=np.float64)
    if grid.ndim != 1 or grid.size == 0 or grid[0] < 0 or np.any(np.diff(grid) <= 0):
        raise ValueError("`times` must be a non-empty, strictly increasing list of times ≥ 0.")
    count = initial.shape[0]

    def field(_time: float, flat: np.ndarray) -> np.ndarray:
        return vector_field(flat.reshape(count, dim), parameters).reshape(-1)

    shrink = math.sqrt(count)
    solver = ode(field).set_integrator("dop853", rtol=rtol / shrink, atol=atol / shrink,
                                       nsteps=10**7)
    solver.set_initial_value(initial.reshape(-1), 0.0)
    result = np.empty((grid.size, count * dim))
    for index, time in enumerate(grid):
        result[index] = solver.integrate(time) if time > solver.t else solver.y
        if not solver.successful():
            raise RuntimeError(f"the reference integration failed at t = {time:g} "
                               f"(DOP853 status {solver.get_return_code()}).")
    result = result.reshape(grid.size, count, dim)
    return result[:, 0, :] if single else result
