"""The demo scenario: a harbour crane's load on an elastic steel cable (invented, NumPy only).

The load is a point mass hanging from the cable's fixed upper end, modelled as a planar elastic
pendulum: a linear spring in gravity, with optional light damping along the cable. It bobs
vertically at a few hertz (the cable stretching) while it swings with a period of about ten
seconds, a ratio of about 25 between the two time scales.

Coordinates: the cable's upper end is the origin, x points horizontally and z upwards, so the
load hangs at z ≈ -24.2 m. The state is ``(x, z, vx, vz)`` in metres and metres per second.
Everything here is invented for the demo; no real crane, site or data set is described.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

STATE_NAMES = ("x", "z", "vx", "vz")
STATE_UNITS = ("m", "m", "m/s", "m/s")


@dataclass(frozen=True)
class CraneParameters:
    """Physical parameters of the crane load (SI units).

    Attributes
    ----------
    mass : float
        Mass of the load and hook, kg. Default 2000 kg (a 2 t container of spare parts).
    rest_length : float
        Unstretched cable length from the trolley sheave to the hook, m. Default 24.15 m.
    stiffness : float
        Axial stiffness of the cable, N/m. Default 5e5 N/m: under the 2 t load the cable
        stretches by m g / k ≈ 3.9 cm, and the load bobs at √(k/m) ≈ 15.8 rad/s (0.40 s).
    gravity : float
        Gravitational acceleration, m/s². Default 9.81 m/s².
    damping : float
        Viscous damping along the cable, N·s/m (acts on the stretch rate only). Default 0:
        the demo's ground truth conserves energy, which the tests check.
    """

    mass: float = 2000.0
    rest_length: float = 24.15
    stiffness: float = 5.0e5
    gravity: float = 9.81
    damping: float = 0.0

    def __post_init__(self) -> None:
        for name in ("mass", "rest_length", "stiffness", "gravity"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise ValueError(f"`{name}` is {value!r}; expected a finite number > 0.")
        if not (math.isfinite(self.damping) and self.damping >= 0):
            raise ValueError(f"`damping` is {self.damping!r}; expected a finite number ≥ 0.")

    @property
    def static_stretch(self) -> float:
        """Cable stretch under the load at rest, m g / k (m)."""
        return self.mass * self.gravity / self.stiffness

    @property
    def equilibrium_length(self) -> float:
        """Cable length with the load hanging at rest, L_eq = L0 + m g / k (m)."""
        return self.rest_length + self.static_stretch

    @property
    def bob_angular_frequency(self) -> float:
        """Linearised vertical (bob) angular frequency √(k/m), rad/s."""
        return math.sqrt(self.stiffness / self.mass)

    @property
    def swing_angular_frequency(self) -> float:
        """Linearised pendulum (swing) angular frequency √(g / L_eq), rad/s."""
        return math.sqrt(self.gravity / self.equilibrium_length)

    @property
    def bob_period(self) -> float:
        """Linearised bob period 2π √(m/k), s (≈ 0.40 s by default)."""
        return 2.0 * math.pi / self.bob_angular_frequency

    @property
    def swing_period(self) -> float:
        """Linearised swing period 2π √(L_eq / g), s (≈ 9.87 s by default)."""
        return 2.0 * math.pi / self.swing_angular_frequency


DEFAULT_PARAMETERS = CraneParameters()


def _as_states(states: np.ndarray) -> np.ndarray:
    array = np.asarray(states, dtype=np.float64)
    if array.shape[-1:] != (4,):
        raise ValueError(
            f"`states` has shape {array.shape}; expected (4,) or (batch, 4) holding x, z, vx, vz."
        )
    return array


def vector_field(states: np.ndarray,
                 parameters: CraneParameters = DEFAULT_PARAMETERS) -> np.ndarray:
    """Time derivative of the state: d/dt (x, z, vx, vz).

    Parameters
    ----------
    states : array_like, shape (4,) or (B, 4)
        Positions (m) and velocities (m/s) of the load.
    parameters : CraneParameters
        The crane; defaults to the demo crane.

    Returns
    -------
    ndarray, same shape as `states`
        (vx, vz, ax, az) with the spring force −k (r − L0) r̂, gravity −m g ẑ and damping
        −c ṙ r̂, divided by the mass.

    This is the callable the runtime's hybrid and integrate modes take
    (``stepper.advance(state, t, vector_field=vector_field, hybrid_below=...)``).
    """
    array = _as_states(states)
    x, z, vx, vz = array[..., 0], array[..., 1], array[..., 2], array[..., 3]
    length = np.hypot(x, z)
    stretch_rate = (x * vx + z * vz) / length
    # Force per unit mass along the cable, divided by the length once so it multiplies x, z.
    axial = (parameters.stiffness * (length - parameters.rest_length)
             + parameters.damping * stretch_rate) / (parameters.mass * length)
    derivatives = np.empty_like(array)
    derivatives[..., 0] = vx
    derivatives[..., 1] = vz
    derivatives[..., 2] = -axial * x
    derivatives[..., 3] = -axial * z - parameters.gravity
    return derivatives


def energy(states: np.ndarray, parameters: CraneParameters = DEFAULT_PARAMETERS) -> np.ndarray:
    """Mechanical energy E = ½ m |v|² + ½ k (r − L0)² + m g z, J; shape `states.shape[:-1]`.

    Conserved when `parameters.damping` is 0 (the forces are conservative).
    """
    array = _as_states(states)
    x, z, vx, vz = array[..., 0], array[..., 1], array[..., 2], array[..., 3]
    stretch = np.hypot(x, z) - parameters.rest_length
    return (0.5 * parameters.mass * (vx * vx + vz * vz)
            + 0.5 * parameters.stiffness * stretch * stretch
            + parameters.mass * parameters.gravity * z)


def equilibrium_state(parameters: CraneParameters = DEFAULT_PARAMETERS) -> np.ndarray:
    """The load hanging at rest: (0, −L_eq, 0, 0)."""
    return np.array([0.0, -parameters.equilibrium_length, 0.0, 0.0])


def state_from_modes(swing_angle: np.ndarray, swing_rate: np.ndarray, stretch: np.ndarray,
                     stretch_rate: np.ndarray,
                     parameters: CraneParameters = DEFAULT_PARAMETERS) -> np.ndarray:
    """Cartesian states from the pendulum's polar description.

    Parameters
    ----------
    swing_angle, swing_rate : array_like
        Cable angle from the vertical θ (rad, positive towards +x) and its rate θ̇ (rad/s).
    stretch, stretch_rate : array_like
        Cable length minus the equilibrium length, r − L_eq (m), and its rate ṙ (m/s).

    Returns
    -------
    ndarray, shape (*broadcast shape, 4)
        (x, z, vx, vz) with x = r sin θ, z = −r cos θ.
    """
    angle, angle_rate, extra, extra_rate = np.broadcast_arrays(
        *(np.asarray(value, dtype=np.float64) for value in
          (swing_angle, swing_rate, stretch, stretch_rate)))
    length = parameters.equilibrium_length + extra
    sine, cosine = np.sin(angle), np.cos(angle)
    return np.stack([
        length * sine,
        -length * cosine,
        extra_rate * sine + length * angle_rate * cosine,
        -extra_rate * cosine + length * angle_rate * sine,
    ], axis=-1)


@dataclass(frozen=True)
class InitialRange:
    """The range of initial conditions the demo trains on (its training envelope).

    Attributes
    ----------
    max_swing : float
        Largest swing amplitude, rad (default 0.2 rad ≈ 11°: about ±4.8 m at the hook).
    max_bob : float
        Largest bob (stretch) amplitude, m (default 3 cm, below the 3.9 cm static stretch, so
        the cable never goes slack and the linear spring stays a fair model).
    """

    max_swing: float = 0.2
    max_bob: float = 0.03


def sample_initial_states(count: int, rng: np.random.Generator, *,
                          initial_range: InitialRange = InitialRange(),
                          parameters: CraneParameters = DEFAULT_PARAMETERS) -> np.ndarray:
    """Random initial states: a swing and a bob of random amplitude and phase each.

    Each mode is drawn uniformly over a disc of its linearised phase plane (θ = A cos φ,
    θ̇ = −A ω_swing sin φ with A = max √u, u and φ uniform; likewise for the stretch), so the
    states cover the envelope evenly rather than starting every swing at rest.

    Returns
    -------
    ndarray, shape (count, 4)
    """
    if count < 1:
        raise ValueError(f"`count` is {count!r}; expected at least 1.")
    swing = initial_range.max_swing * np.sqrt(rng.uniform(0.0, 1.0, count))
    bob = initial_range.max_bob * np.sqrt(rng.uniform(0.0, 1.0, count))
    swing_phase = rng.uniform(0.0, 2.0 * np.pi, count)
    bob_phase = rng.uniform(0.0, 2.0 * np.pi, count)
    return state_from_modes(
        swing * np.cos(swing_phase),
        -swing * parameters.swing_angular_frequency * np.sin(swing_phase),
        bob * np.cos(bob_phase),
        -bob * parameters.bob_angular_frequency * np.sin(bob_phase),
        parameters,
    )


def simulate(states: np.ndarray, times: np.ndarray, *,
             parameters: CraneParameters = DEFAULT_PARAMETERS, rtol: float = 1e-10,
             atol: float = 1e-10) -> np.ndarray:
    """Ground truth: integrate a batch of states with SciPy's DOP853 at tight tolerances.

    Parameters
    ----------
    states : array_like, shape (4,) or (B, 4)
        Initial states at t = 0.
    times : array_like, shape (T,)
        Increasing times ≥ 0 at which to report the state.
    rtol, atol : float
        Tolerances each trajectory is held to (see below).

    Returns
    -------
    ndarray, shape (T, 4) or (T, B, 4)

    The batch is integrated as one system, which is many times faster than one `solve_ivp`
    call per state. SciPy judges the local error by the root mean square over all 4 B
    components, which lets one trajectory's error grow by up to √B; the tolerances are divided
    by √B so each trajectory is still held to `rtol` and `atol` (at 8th order that costs only
    B^(1/16) more steps). SciPy is imported here so the module itself needs only NumPy.
    """
    from scipy.integrate import solve_ivp

    initial = _as_states(states)
    single = initial.ndim == 1
    initial = initial.reshape(-1, 4)
    grid = np.asarray(times, dtype=np.float64)
    if grid.ndim != 1 or grid.size == 0 or grid[0] < 0 or np.any(np.diff(grid) <= 0):
        raise ValueError("`times` must be a non-empty, strictly increasing list of times ≥ 0.")
    count = initial.shape[0]

    def field(_time: float, flat: np.ndarray) -> np.ndarray:
        return vector_field(flat.reshape(count, 4), parameters).reshape(-1)

    shrink = math.sqrt(count)
    solution = solve_ivp(field, (0.0, float(grid[-1])), initial.reshape(-1), method="DOP853",
                         t_eval=grid, rtol=rtol / shrink, atol=atol / shrink)
    if not solution.success:
        raise RuntimeError(f"the reference integration failed: {solution.message}")
    result = solution.y.T.reshape(grid.size, count, 4)
    return result[:, 0, :] if single else result
