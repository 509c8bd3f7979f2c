"""Explicit Runge–Kutta integration of autonomous vector fields, in NumPy.

Used to finish off-grid remainders and for hybrid stepping; methods are Butcher tables (data).

Two methods: classic RK4 with a fixed step, and Dormand–Prince 5(4) with adaptive step-size
control (Hairer, Nørsett & Wanner, *Solving ODEs I*, §II.4–II.5). The whole batch of states
shares one step size, chosen for the hardest state (the error norm is an RMS over all states
and components), so a batch integrates in a single vectorised sweep.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from .errors import NonFiniteError, OptionError, StateError, TimeError

VectorField = Callable[[np.ndarray], np.ndarray]
"""`vector_field(states) -> derivatives`, both of shape (B, d)."""

# Step-size controller constants (common practice; the values SciPy's rk.py also uses).
SAFETY = 0.9
MIN_FACTOR = 0.2
MAX_FACTOR = 10.0
# Relative tolerances below this are lost in float64 round-off.
MIN_RTOL = 100 * np.finfo(np.float64).eps


class RungeKutta:
    """An explicit Runge–Kutta method given by its Butcher table.

    Attributes
    ----------
    C : ndarray, shape (n_stages,)
        Stage times as fractions of the step.
    A : ndarray, shape (n_stages, n_stages)
        Stage coefficients (strictly lower triangular).
    B : ndarray, shape (n_stages,)
        Weights of the propagated solution.
    E : ndarray, shape (n_stages + 1,) or None
        Weights of the error estimate; the last one multiplies the derivative at the new
        state (first same as last), so adaptive methods need no extra evaluation.
    order : int
        Order of the propagated solution.
    error_estimator_order : int or None
        Order of the embedded solution used for the error estimate.
    """

    name: str
    C: np.ndarray
    A: np.ndarray
    B: np.ndarray
    E: np.ndarray | None = None
    order: int
    error_estimator_order: int | None = None

    @property
    def n_stages(self) -> int:
        return len(self.C)

    @property
    def adaptive(self) -> bool:
        return self.E is not None

    def stages(
        self,
        evaluate: Callable[[np.ndarray, float], np.ndarray],
        y: np.ndarray,
        f0: np.ndarray,
        h: float,
    ) -> tuple[np.ndarray, np.ndarray]:
        """One step of size h from y (with f0 = f(y)): the new state and the stage derivatives.

        `evaluate(states, stage_fraction)` computes the vector field; the returned stage array
        has room for one more row, which adaptive methods fill with f(y_new).
        """
        derivatives = np.empty((self.n_stages + 1, *y.shape))
        derivatives[0] = f0
        for stage in range(1, self.n_stages):
            increment = np.tensordot(self.A[stage, :stage], derivatives[:stage], axes=1)
            derivatives[stage] = evaluate(y + h * increment, self.C[stage])
        y_new = y + h * np.tensordot(self.B, derivatives[: self.n_stages], axes=1)
        return y_new, derivatives


class ClassicRK4(RungeKutta):
    """The classic fourth-order Runge–Kutta method (Kutta, 1901), fixed step."""

    name = "rk4"
    order = 4
    C = np.array([0.0, 1 / 2, 1 / 2, 1.0])
    A = np.array(
        [
            [0.0, 0.0, 0.0, 0.0],
            [1 / 2, 0.0, 0.0, 0.0],
            [0.0, 1 / 2, 0.0, 0.0],
            [0.0, 0.0, 1.0, 0.0],
        ]
    )
    B = np.array([1 / 6, 1 / 3, 1 / 3, 1 / 6])


class DormandPrince54(RungeKutta):
    """Dormand–Prince 5(4) (Dormand & Prince, 1980; Hairer et al. I, Table II.5.2)."""

    name = "dopri5"
    order = 5
    error_estimator_order = 4
    C = np.array([0.0, 1 / 5, 3 / 10, 4 / 5, 8 / 9, 1.0])
    A = np.array(
        [
            [0.0, 0.0, 0.0, 0.0, 0.0, 0.0],
            [1 / 5, 0.0, 0.0, 0.0, 0.0, 0.0],
            [3 / 40, 9 / 40, 0.0, 0.0, 0.0, 0.0],
            [44 / 45, -56 / 15, 32 / 9, 0.0, 0.0, 0.0],
            [19372 / 6561, -25360 / 2187, 64448 / 6561, -212 / 729, 0.0, 0.0],
            [9017 / 3168, -355 / 33, 46732 / 5247, 49 / 176, -5103 / 18656, 0.0],
        ]
    )
    B = np.array([35 / 384, 0.0, 500 / 1113, 125 / 192, -2187 / 6784, 11 / 84])
    # Fifth-order weights minus the embedded fourth-order ones (the 7th stage is f(y_new)).
    E = np.array([71 / 57600, 0.0, -71 / 16695, 71 / 1920, -17253 / 339200, 22 / 525, -1 / 40])


METHODS: dict[str, type[RungeKutta]] = {"rk4": ClassicRK4, "dopri5": DormandPrince54}


def _rms(values: np.ndarray) -> float:
    return float(np.sqrt(np.mean(np.square(values)))) if values.size else 0.0


class _Counter:
    """Calls the vector field, counting evaluations and checking shape and finiteness."""

    def __init__(self, vector_field: VectorField, shape: tuple[int, ...], limit: int) -> None:
        self.vector_field = vector_field
        self.shape = shape
        self.limit = limit
        self.evaluations = 0
        self.time = 0.0  # time reached so far, for messages
        self.step = 0.0  # current step size, to name the stage time

    def reserve(self, count: int) -> None:
        if self.evaluations + count > self.limit:
            raise TimeError(
                f"integration needs more than {self.limit} vector-field evaluations "
                f"(`max_evaluations`); it had reached t = {self.time:.6g}."
            )

    def __call__(self, states: np.ndarray, stage_fraction: float = 0.0) -> np.ndarray:
        self.evaluations += 1
        derivatives = np.asarray(self.vector_field(states), dtype=np.float64)
        if derivatives.shape != self.shape:
            raise StateError(
                f"`vector_field` must return shape {self.shape}; got {derivatives.shape}."
            )
        if not np.isfinite(derivatives).all():
            stage_time = self.time + stage_fraction * self.step
            raise NonFiniteError(
                f"`vector_field` returned a non-finite derivative at t = {stage_time:.6g}; "
                f"integration had reached t = {self.time:.6g}."
            )
        return derivatives


def _positive_or_none(name: str, value: float | None) -> float | None:
    if value is None:
        return None
    value = float(value)
    if not (math.isfinite(value) and value > 0):
        raise OptionError(f"`{name}` must be a finite positive number; got {value!r}.")
    return value


def _initial_step(
    method: RungeKutta,
    evaluate: _Counter,
    y: np.ndarray,
    f0: np.ndarray,
    duration: float,
    rtol: float,
    atol: float,
) -> float:
    """Hairer, Nørsett & Wanner I, §II.4 starting-step heuristic (also SciPy's)."""
    scale = atol + np.abs(y) * rtol
    d0, d1 = _rms(y / scale), _rms(f0 / scale)
    h0 = 1e-6 if d0 < 1e-5 or d1 < 1e-5 else 0.01 * d0 / d1
    h0 = min(h0, duration)
    evaluate.reserve(1)
    f1 = evaluate(y + h0 * f0, 0.0)
    d2 = _rms((f1 - f0) / scale) / h0
    if d1 <= 1e-15 and d2 <= 1e-15:
        h1 = max(1e-6, h0 * 1e-3)
    else:
        h1 = (0.01 / max(d1, d2)) ** (1 / (method.error_estimator_order + 1))
    return min(100 * h0, h1, duration)


def _fixed(
    method: RungeKutta, evaluate: _Counter, y: np.ndarray, duration: float, step: float
) -> np.ndarray:
    steps = max(1, math.ceil(duration / step - 1e-12))
    h = duration / steps
    evaluate.reserve(steps * method.n_stages)
    evaluate.step = h
    for index in range(steps):
        evaluate.time = index * h
        y, _ = method.stages(evaluate, y, evaluate(y), h)
    evaluate.time = duration
    return y


def _adaptive(
    method: RungeKutta,
    evaluate: _Counter,
    y: np.ndarray,
    duration: float,
    max_step: float,
    first_step: float | None,
    rtol: float,
    atol: float,
) -> np.ndarray:
    exponent = -1.0 / (method.error_estimator_order + 1)
    evaluate.reserve(1)
    f = evaluate(y)
    if first_step is None:
        h = _initial_step(method, evaluate, y, f, duration, rtol, atol)
    else:
        h = first_step
    t = 0.0
    while t < duration:
        min_step = 10 * abs(np.nextafter(t, np.inf) - t)
        h = min(h, max_step)
        rejected = False
        while True:
            if h < min_step:
                raise TimeError(
                    f"step size fell below {min_step:.3g} at t = {t:.6g}; the vector field "
                    f"is too stiff or singular for `rtol`={rtol:g}, `atol`={atol:g}."
                )
            last = t + h >= duration
            h_try = duration - t if last else h
            evaluate.reserve(method.n_stages)
            evaluate.step = h_try
            y_new, derivatives = method.stages(evaluate, y, f, h_try)
            derivatives[-1] = evaluate(y_new, 1.0)
            error = h_try * np.tensordot(method.E, derivatives, axes=1)
            scale = atol + np.maximum(np.abs(y), np.abs(y_new)) * rtol
            error_norm = _rms(error / scale)
            if error_norm < 1:
                factor = MAX_FACTOR if error_norm == 0 else SAFETY * error_norm**exponent
                factor = min(MAX_FACTOR, factor)
                if rejected:
                    factor = min(1.0, factor)
                h = h_try * factor
                break
            h = h_try * max(MIN_FACTOR, SAFETY * error_norm**exponent)
            rejected = True
        t = duration if last else t + h_try
        evaluate.time = t
        y, f = y_new, derivatives[-1]
    return y


def integrate(
    vector_field: VectorField,
    state: np.ndarray,
    duration: float,
    *,
    method: str = "dopri5",
    max_step: float | None = None,
    rtol: float = 1e-8,
    atol: float = 1e-10,
    first_step: float | None = None,
    max_evaluations: int = 1_000_000,
) -> tuple[np.ndarray, int]:
    """Integrate the autonomous system x' = vector_field(x) over `duration`.

    Parameters
    ----------
    vector_field : callable
        `vector_field(states)` with states of shape (B, d) returns derivatives, shape (B, d).
    state : array_like, shape (B, d)
        Initial states.
    duration : float
        Time to integrate over (≥ 0); 0 returns a copy of `state`.
    method : {"dopri5", "rk4"}, optional
        Adaptive Dormand–Prince 5(4), or classic RK4 with equal steps of at most `max_step`
        (`first_step` is accepted in its place).
    max_step : float, optional
        Largest step; required for "rk4", unbounded by default for "dopri5".
    rtol, atol : float, optional
        Relative and absolute tolerances of "dopri5" (error per step, RMS over all values).
    first_step : float, optional
        Initial step of "dopri5"; chosen automatically by default.
    max_evaluations : int, optional
        Budget of vector-field calls.

    Returns
    -------
    final_state : ndarray, shape (B, d)
        In the dtype of `state` if floating, else float64 (arithmetic is float64).
    evaluations : int
        Number of vector-field calls made.

    Raises
    ------
    StateError
        If `state` is not a finite (B, d) array or `vector_field` returns the wrong shape.
    NonFiniteError
        If `vector_field` returns NaN or infinity; the message names the time reached.
    OptionError
        If `method`, a step or tolerance setting, or `max_evaluations` is invalid.
    TimeError
        If `duration` is invalid, the budget of evaluations is exceeded, or the adaptive step
        size collapses.
    """
    if method not in METHODS:
        raise OptionError(f"`method` must be one of {sorted(METHODS)}; got {method!r}.")
    scheme = METHODS[method]()
    y0 = np.asarray(state)
    if y0.ndim != 2:
        raise StateError(f"`state` must have shape (B, d); got an array of shape {y0.shape}.")
    out_dtype = y0.dtype if np.issubdtype(y0.dtype, np.floating) else np.dtype(np.float64)
    y = y0.astype(np.float64)
    if not np.isfinite(y).all():
        raise StateError("`state` must be finite; got NaN or infinity.")
    duration = float(duration)
    if not (math.isfinite(duration) and duration >= 0):
        raise TimeError(f"`duration` must be finite and non-negative; got {duration!r}.")
    max_step = _positive_or_none("max_step", max_step)
    first_step = _positive_or_none("first_step", first_step)
    if not (rtol >= MIN_RTOL and atol > 0):
        raise OptionError(
            f"`rtol` must be at least {MIN_RTOL:.3g} and `atol` positive; got "
            f"rtol={rtol!r}, atol={atol!r}."
        )
    if int(max_evaluations) < 1:
        raise OptionError(f"`max_evaluations` must be at least 1; got {max_evaluations!r}.")
    if duration == 0:
        return y0.astype(out_dtype, copy=True), 0
    evaluate = _Counter(vector_field, y.shape, int(max_evaluations))
    if scheme.adaptive:
        final = _adaptive(
            scheme, evaluate, y, duration, max_step or math.inf, first_step, rtol, atol
        )
    else:
        step = max_step or first_step
        if step is None:
            raise OptionError("`max_step` is required for method 'rk4'; got None.")
        final = _fixed(scheme, evaluate, y, duration, step)
    return final.astype(out_dtype, copy=False), evaluate.evaluations
