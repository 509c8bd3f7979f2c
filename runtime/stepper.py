"""`Stepper`: the loaded bundle, answering `advance`, `forecast` and `plan`.

A stepper is immutable after loading and safe to call from many threads: kernels keep their
scratch buffers per thread and planners guard their lazily built tables with locks.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from .anchors import (
    grid_positions,
    interpolation_anchors,
    interpolation_rows,
    walk_to_reachable,
)
from .curve import expected_errors
from .envelope import Envelope
from .errors import BundleError, NonFiniteError, OptionError, StateError, TimeError
from .findings import (
    POLICIES,
    Finding,
    envelope_findings,
    horizon_findings,
    reconstruction_findings,
    warn_or_raise,
)
from .integrate import integrate
from .interpolate import interpolate_states
from .limits import DEFAULT_LIMITS, Limits
from .manifest import Manifest
from .plan import Plan
from .planner import StridePlanner
from .reduction import LatentMaps, reconstruction_errors
from .validation import (
    check_off_grid,
    check_state,
    check_strides,
    check_time,
    check_times,
)
from .waves import build_schedule, node_base_steps, run_schedule

_PLAN_CACHE_SIZE = 4096
# Visited states up to this many values are copied into one array and checked at once (fewer
# NumPy calls); larger paths without samples are checked in place first.
_COPY_VALUES = 1 << 16
VectorField = Callable[[np.ndarray], np.ndarray]
Kernel = Callable[[np.ndarray], np.ndarray]


@dataclass(frozen=True)
class _Resolution:
    """How one requested time is answered: which grid anchors, and what to do with them."""

    t: float
    method: str
    anchors: tuple[int, ...]
    remainder: float = 0.0
    hybrid_below: int | None = None


@dataclass(frozen=True)
class ForecastInfo:
    """What a forecast cost (network evaluations, waves, sequential depth) and how far to
    trust it: `expected_error` per requested time (request order; nan when the bundle has no
    validation curve) and the `findings` of the call."""

    evaluations: int
    network_calls: int
    depth: int
    integrator_evaluations: int
    methods: tuple[str, ...]
    expected_error: np.ndarray = field(default_factory=lambda: np.zeros(0))
    findings: tuple[Finding, ...] = ()


class Stepper:
    """A loaded bundle: one kernel per stride plus the planner over those strides.

    Use `stridecast.runtime.load` to build one.
    """

    def __init__(self, manifest: Manifest, kernels: Mapping[int, Kernel], *,
                 dtype: np.dtype | str = "float32", limits: Limits = DEFAULT_LIMITS,
                 source: str = "", envelope_samples: np.ndarray | None = None,
                 on_extrapolation: str = "warn", reduction: LatentMaps | None = None):
        if on_extrapolation not in POLICIES:
            raise BundleError(
                f"`on_extrapolation` is {on_extrapolation!r}; expected one of {list(POLICIES)}."
            )
        self._policy = on_extrapolation
        self._manifest = manifest
        self._kernels = dict(kernels)
        self._dtype = np.dtype(dtype)
        self._limits = limits
        self._source = source
        self._samples = envelope_samples
        # A reduced bundle: `_states` encodes every full state it checks and `_full` decodes
        # the answers; everything between (plans, waves, interpolation, the envelope) runs on
        # latent states. Given full states are also checked against the reconstruction
        # threshold (`_off_subspace`), when the bundle records one.
        self._reduction = reduction
        self._threshold = None if reduction is None else (
            manifest.reduction.reconstruction_threshold)
        space = manifest.level_dim
        level_mean, level_scale = ((manifest.mean, manifest.scale) if reduction is None
                                   else ((0.0,) * space, (1.0,) * space))
        self._planner = StridePlanner(self._kernels, max_steps=limits.max_steps_per_query)
        self._hybrid_planners: dict[int, StridePlanner] = {}
        self._lock = threading.Lock()
        # Plans depend only on the time and options; dict reads/writes are atomic.
        self._plan_cache: dict[tuple, tuple[_Resolution, Plan, object, np.ndarray]] = {}
        lower = manifest.envelope_min
        self._envelope = None if lower is None else (
            np.asarray(lower, dtype=np.float64), np.asarray(manifest.envelope_max, np.float64))
        entry = manifest.envelope_samples
        self._data_envelope = Envelope(
            lower, manifest.envelope_max, mean=level_mean, scale=level_scale,
            samples=envelope_samples if entry is not None else None,
            radius=entry.radius if entry is not None else 1.0,
            max_work=limits.max_envelope_work)

    # ----------------------------------------------------------------- descriptive attributes
    @property
    def manifest(self) -> Manifest:
        return self._manifest

    @property
    def base_step(self) -> float:
        return self._manifest.base_step

    @property
    def strides(self) -> tuple[int, ...]:
        """Strides in base steps, finest first."""
        return tuple(sorted(self._kernels))

    @property
    def state_dim(self) -> int:
        return self._manifest.state_dim

    @property
    def latent_dim(self) -> int | None:
        """r, the length of the latent state a reduced bundle's levels step; None otherwise."""
        return None if self._reduction is None else self._reduction.latent_dim

    @property
    def reduction_paths(self) -> dict[str, str]:
        """Which execution path the encoder and decoder use (empty without reduction)."""
        return {} if self._reduction is None else self._reduction.paths

    @property
    def state_names(self) -> tuple[str, ...]:
        return self._manifest.state_names

    @property
    def state_units(self) -> tuple[str, ...]:
        return self._manifest.state_units

    @property
    def dtype(self) -> np.dtype:
        return self._dtype

    @property
    def limits(self) -> Limits:
        return self._limits

    @property
    def on_extrapolation(self) -> str:
        """What `advance`/`forecast` do with findings: "warn", "error" or "ignore"."""
        return self._policy

    @property
    def kernel_paths(self) -> dict[int, str]:
        """Which execution path each level uses ("affine-chain" or "interpreter")."""
        return {stride: getattr(kernel, "path", "custom")
                for stride, kernel in sorted(self._kernels.items())}

    def __reduce__(self):
        # A stepper travels (pickle, Dask, multiprocessing) as its bundle path, load options
        # and level checksums, never as weights or code: the receiver loads and verifies the
        # bundle itself, and refuses a bundle that changed since.
        arguments = getattr(self, "_load_arguments", None)
        if arguments is None:
            raise TypeError("only a Stepper made by `stridecast.runtime.load` (or its "
                            "`with_levels`) can be pickled.")
        subset = getattr(self, "_subset_of", None)
        if subset is None:
            return _load_again, (*arguments, _checksums(self._manifest))
        # A `with_levels` subset travels as its whole bundle and the strides chosen.
        full_checksums, strides = subset
        return _load_again, (*arguments, full_checksums, strides)

    def __repr__(self) -> str:
        return (f"Stepper(name={self._manifest.name!r}, state_dim={self.state_dim}, "
                f"base_step={self.base_step}, strides={self.strides}, dtype={self._dtype})")

    # ----------------------------------------------------------------------------- public API
    def plan(self, t: float, *, off_grid: str = "interpolate",
             vector_field: VectorField | None = None, hybrid_below: int | None = None) -> Plan:
        """Describe how `advance` reaches time `t`, without running a network."""
        return self._planned(t, off_grid, vector_field, hybrid_below)[1]

    def _planned(self, t: float, off_grid: str, vector_field: VectorField | None,
                 hybrid_below: int | None) -> tuple[_Resolution, Plan, object, np.ndarray]:
        """Resolution, plan, (for several anchors) schedule, and the time of every state the
        plan visits (the initial state first; node order for a schedule), memoised."""
        time = check_time(t, unit=self._manifest.time_unit)
        key = (time, off_grid, hybrid_below, vector_field is None)
        cached = self._plan_cache.get(key)
        if cached is None:
            resolution = self._resolve(t, off_grid, vector_field, hybrid_below)
            schedule = None
            if len(resolution.anchors) > 1:
                schedule = self._schedule(self._planner_for(resolution), resolution.anchors)
            plan = self._describe(resolution, integrator_evaluations=0, evaluations=(
                None if schedule is None else schedule.evaluations))
            if schedule is None:
                strides = [stride for stride, count in plan.steps for _ in range(count)]
                visited = np.cumsum([0, *strides]) * self.base_step
            else:
                visited = node_base_steps(schedule) * self.base_step
            cached = (resolution, plan, schedule, visited)
            if len(self._plan_cache) >= _PLAN_CACHE_SIZE:
                self._plan_cache.clear()
            self._plan_cache[key] = cached
        return cached

    def step(self, state: np.ndarray, stride: int) -> np.ndarray:
        """Apply the network of one level once (one stride) to `state`."""
        states, single, _ = self._states(state)
        if stride not in self._kernels:
            raise OptionError(f"`stride` is {stride!r}; this bundle has strides {self.strides}.")
        result = self._full(self._apply(stride, states, depth=0))
        return result[0] if single else result

    def advance(self, state: np.ndarray, t: float, *, off_grid: str = "interpolate",
                vector_field: VectorField | None = None, hybrid_below: int | None = None
                ) -> np.ndarray:
        """Forecast the state at time `t` (in the bundle's time unit) from time 0.

        Parameters
        ----------
        state : array_like, shape (d,) or (B, d)
            Initial state(s) in physical units.
        t : float
            Time to reach, ≥ 0.
        off_grid : {"interpolate", "nearest", "error"}
            What to do when `t` is not a reachable grid time and no `vector_field` is given.
        vector_field : callable, optional
            ``f(states (B, d)) -> derivatives (B, d)`` of the autonomous system; off-grid
            remainders are then integrated with Runge–Kutta from the last grid state.
        hybrid_below : int, optional
            With `vector_field`, levels with a stride below this are not used; the integrator
            covers what the coarser levels leave.

        Returns
        -------
        ndarray, same shape as `state`
        """
        return self.advance_with_plan(state, t, off_grid=off_grid, vector_field=vector_field,
                                      hybrid_below=hybrid_below)[0]

    def advance_with_plan(self, state: np.ndarray, t: float, *, off_grid: str = "interpolate",
                          vector_field: VectorField | None = None,
                          hybrid_below: int | None = None) -> tuple[np.ndarray, Plan]:
        """`advance`, also returning the `Plan` that says how the answer was produced and
        the findings of this call (every visited state checked against the envelope, `t`
        against the validated horizon); warns, raises or not as `on_extrapolation` says."""
        states, single, full = self._states(state)
        resolution, plan, schedule, visited = self._planned(t, off_grid, vector_field,
                                                            hybrid_below)
        # States are kept for the envelope check only when the bundle has an envelope.
        visits = [] if self._data_envelope.active else None
        if schedule is None:
            anchor_states = self._run_sequential(states, plan.steps, visits)[None]
        else:
            anchor_states = self._run_schedule(schedule, states, visits)
        result, rk_evaluations = self._finish(resolution, resolution.anchors, anchor_states,
                                              vector_field)
        # An integrated answer is a full state already (`_finish` decodes before integrating).
        integrated = resolution.method in ("integrate", "hybrid") and resolution.remainder > 0
        if rk_evaluations:
            plan = replace(plan, integrator_evaluations=rk_evaluations)
        answer = result if integrated else self._full(result)
        times = np.array([resolution.t])
        found = ()
        if visits is not None:
            off_path = resolution.method not in ("grid", "nearest")
            level_answer = result[None] if off_path and (
                self._reduction is None or not integrated) else None
            found = self._path_findings(states, visits, visited, level_answer, times)
        found += self._off_subspace(full, states)
        if found:
            plan = replace(plan, findings=found + plan.findings)
        warn_or_raise(plan.findings, self._policy)
        return (answer[0] if single else answer), plan

    def forecast(self, state: np.ndarray, times: Sequence[float], *,
                 off_grid: str = "interpolate", vector_field: VectorField | None = None,
                 hybrid_below: int | None = None) -> np.ndarray:
        """Forecast the state at many times at once, sharing coarse steps between them.

        Times may come in any order and repeat; each distinct time is computed once and the
        result follows the order given. Returns shape ``(len(times), *state.shape)``.
        """
        return self.forecast_with_info(state, times, off_grid=off_grid,
                                       vector_field=vector_field, hybrid_below=hybrid_below)[0]

    def forecast_with_info(self, state: np.ndarray, times: Sequence[float], *,
                           off_grid: str = "interpolate", vector_field: VectorField | None = None,
                           hybrid_below: int | None = None) -> tuple[np.ndarray, ForecastInfo]:
        """`forecast`, also returning what it cost, the expected error at each requested time
        and the findings of the call (every visited state checked against the envelope, the
        times against the validated horizon); warns, raises or not as `on_extrapolation`
        says."""
        states, single, full = self._states(state)
        requested = check_times(times, max_points=self._limits.max_forecast_points)
        distinct, inverse = np.unique(requested, return_inverse=True)
        # Both return full states, each distinct time decoded once.
        if vector_field is None and hybrid_below is None:
            output, info = self._forecast_on_grid(states, distinct, off_grid)
        else:
            output, info = self._forecast_integrated(states, distinct, off_grid, vector_field,
                                                     hybrid_below)
        found = self._off_subspace(full, states)
        output = output[inverse.reshape(-1)]
        findings = found + info.findings + self._horizon_findings(distinct)
        info = replace(info, findings=findings,
                       expected_error=expected_errors(self._manifest.validation, requested))
        warn_or_raise(findings, self._policy)
        return (output[:, 0, :] if single else output), info

    def _forecast_integrated(self, states: np.ndarray, distinct: np.ndarray, off_grid: str,
                             vector_field: VectorField | None, hybrid_below: int | None
                             ) -> tuple[np.ndarray, ForecastInfo]:
        """`forecast` for distinct sorted times when a vector field finishes or replaces the
        finest levels."""
        resolutions = [self._resolve(float(t), off_grid, vector_field, hybrid_below)
                       for t in distinct]
        anchors = sorted({a for r in resolutions for a in r.anchors})
        planner = self._planner_for(resolutions[0]) if resolutions else self._planner
        schedule = self._schedule(planner, anchors)
        visits = [] if self._data_envelope.active else None
        anchor_states = self._run_schedule(schedule, states, visits)
        position = {anchor: index for index, anchor in enumerate(anchors)}
        level_results = np.empty((len(distinct), *states.shape), dtype=self._dtype)
        jobs = []  # (result index, anchor row, remainder) of the times the integrator finishes
        on_levels = []  # result indices the levels (and interpolation) answer alone
        for index, resolution in enumerate(resolutions):
            if resolution.method in ("integrate", "hybrid") and resolution.remainder > 0:
                jobs.append((index, position[resolution.anchors[0]], resolution.remainder))
                continue
            on_levels.append(index)
            rows = anchor_states[[position[a] for a in resolution.anchors]]
            level_results[index], _ = self._finish(resolution, resolution.anchors, rows,
                                                   vector_field)
        if self._reduction is None:
            results = level_results
        else:  # decode what the levels answered; the integrator answers in full space
            results = np.empty((len(distinct), states.shape[0], self.state_dim), self._dtype)
            if on_levels:
                results[on_levels] = self._full(level_results[on_levels])
        rk_total = self._integrate_jobs(jobs, anchor_states, vector_field, results)
        findings = ()
        if visits is not None:
            answered = results if self._reduction is None else level_results[on_levels]
            findings = self._path_findings(states, visits,
                                           node_base_steps(schedule) * self.base_step,
                                           answered, distinct[on_levels] if self._reduction
                                           is not None else distinct)
        info = ForecastInfo(
            evaluations=schedule.evaluations,
            network_calls=schedule.calls,
            depth=schedule.depth,
            integrator_evaluations=rk_total,
            methods=tuple(sorted({r.method for r in resolutions})),
            findings=findings,
        )
        return results, info

    def _forecast_on_grid(self, states: np.ndarray, times: np.ndarray, off_grid: str
                          ) -> tuple[np.ndarray, ForecastInfo]:
        """Vectorised `forecast` for the network-only methods (grid, nearest, interpolate)."""
        check_off_grid(off_grid)
        planner = self._planner
        positions, nearest, on_grid = grid_positions(times, self.base_step)
        exact = on_grid & planner.reachable_mask(nearest)
        anchors = nearest[:, None]
        weights = None
        methods = {"grid"} if exact.any() else set()
        off = ~exact
        if off.any():
            if off_grid == "error":
                self._resolve(float(times[off][0]), "error", None, None)  # raises
            floor = np.where(on_grid, nearest, np.floor(positions).astype(np.int64))[off]
            below = walk_to_reachable(planner, floor, -1)
            above = walk_to_reachable(planner, floor + 1, +1)
            if off_grid == "nearest":
                position = positions[off]
                anchors = anchors.copy()
                anchors[off, 0] = np.where(position - below <= above - position, below, above)
                methods.add("nearest")
            else:
                anchors, weights = interpolation_rows(planner, positions, nearest, off, below,
                                                      above)
                methods.add("interpolate")
        distinct = np.unique(anchors)
        schedule = self._schedule(planner, distinct)
        visits = [] if self._data_envelope.active else None
        anchor_states = self._run_schedule(schedule, states, visits)
        rows = np.searchsorted(distinct, anchors)
        if weights is None:
            results = anchor_states[rows[:, 0]]
        else:
            gathered = anchor_states[rows].astype(np.float64)  # (T, 4, B, d)
            results = np.einsum("tk,tkbd->tbd", weights, gathered).astype(self._dtype)
        findings = ()
        if visits is not None:
            # Grid and nearest answers are visited nodes already; interpolated ones are not.
            findings = self._path_findings(states, visits,
                                           node_base_steps(schedule) * self.base_step,
                                           None if weights is None else results, times)
        info = ForecastInfo(
            evaluations=schedule.evaluations,
            network_calls=schedule.calls,
            depth=schedule.depth,
            integrator_evaluations=0,
            methods=tuple(sorted(methods)),
            findings=findings,
        )
        return self._full(results), info

    def _states(self, state) -> tuple[np.ndarray, bool, np.ndarray]:
        """Check full states; return them as (B, ·) in the space the levels step (the states
        themselves, or their latent coordinates for a reduced bundle: encoded once per
        call), whether one state was given, and the full states (B, d)."""
        full, single = check_state(state, names=self.state_names, dtype=self._dtype,
                                   max_batch=self._limits.max_batch)
        states = full if self._reduction is None else self._reduction.encode(full)
        return states, single, full

    def _full(self, states: np.ndarray) -> np.ndarray:
        """The inverse side of `_states`: decode latent answers (..., r) to full (..., d)."""
        if self._reduction is None:
            return states
        return self._reduction.decode(states, self.state_dim)

    def _space_labels(self) -> tuple[tuple[str, ...], tuple[str, ...]]:
        """Component names and units of the states the levels step (for findings)."""
        if self._reduction is None:
            return self._manifest.state_names, self._manifest.state_units
        count = self._reduction.latent_dim
        return tuple(f"latent[{i}]" for i in range(count)), ("",) * count

    def outside_envelope(self, state: np.ndarray) -> np.ndarray:
        """Per state, whether any component lies outside the training envelope."""
        states, single, _ = self._states(state)
        if self._envelope is None:
            flags = np.zeros(states.shape[0], dtype=bool)
        else:
            lower, upper = self._envelope
            flags = ((states < lower) | (states > upper)).any(axis=1)
        return flags[0] if single else flags

    # ---------------------------------------------------------------------------------- trust
    def expected_error(self, t: float | Sequence[float] | np.ndarray) -> float | np.ndarray:
        """The held-out error of this bundle's forecasts at time `t` (normalised RMS).

        Linear interpolation of the manifest's validation curve (from 0 at t = 0 up to its
        first point); `inf` past the last point or after a diverged point; `nan` when the
        bundle has no validation curve (also for a true subset from `with_levels`).

        Parameters
        ----------
        t : float or array_like of float, shape (T,)

        Returns
        -------
        float, or ndarray of shape (T,) for an array of times
        """
        if np.ndim(t) == 0:
            values = expected_errors(self._manifest.validation,
                                     np.array([check_time(t, unit=self._manifest.time_unit)]))
            return float(values[0])
        times = check_times(t, max_points=self._limits.max_forecast_points)
        return expected_errors(self._manifest.validation, times)

    def check(self, states: np.ndarray, t: float | Sequence[float] | None = None
              ) -> tuple[Finding, ...]:
        """Findings for `states` against the envelope and, if given, times `t` against the
        validated horizon; issues no warning (what the CLI and HTTP use for initial states).

        Parameters
        ----------
        states : array_like, shape (d,) or (B, d)
        t : float or sequence of float, optional

        Returns
        -------
        tuple of Finding
        """
        batch, _, full = self._states(states)
        findings = self._envelope_findings(batch[None], np.zeros(1), path=False)
        findings += self._off_subspace(full, batch)
        if t is not None:
            times = (np.array([check_time(t, unit=self._manifest.time_unit)]) if np.ndim(t) == 0
                     else check_times(t, max_points=self._limits.max_forecast_points))
            findings += self._horizon_findings(times)
        return findings

    def with_levels(self, strides: Sequence[int]) -> Stepper:
        """A stepper over a subset of this one's levels, sharing the loaded kernels.

        The planner is rebuilt for the subset. The validation curve and validated horizon
        were measured for the full set of levels, so a true subset has neither
        (`expected_error` is nan; findings say "no_validation").

        Parameters
        ----------
        strides : sequence of int
            Non-empty, distinct, each one of `self.strides`.
        """
        chosen = check_strides(strides, error=OptionError)
        unknown = [stride for stride in chosen if stride not in self._kernels]
        if unknown:
            raise OptionError(
                f"`strides` is {list(strides)!r}; {unknown} are not strides of this bundle, "
                f"{list(self.strides)}."
            )
        manifest = replace(self._manifest,
                           levels=tuple(self._manifest.level(s) for s in chosen))
        if tuple(chosen) != self.strides:
            manifest = replace(manifest, validation=None, validated_horizon=None)
        subset = Stepper(manifest, {s: self._kernels[s] for s in chosen}, dtype=self._dtype,
                         limits=self._limits, source=self._source,
                         on_extrapolation=self._policy, reduction=self._reduction)
        subset._data_envelope = self._data_envelope  # immutable; share its precomputed norms
        arguments = getattr(self, "_load_arguments", None)
        if arguments is not None:
            subset._load_arguments = arguments
            parent = getattr(self, "_subset_of", None)
            full_checksums = _checksums(self._manifest) if parent is None else parent[0]
            subset._subset_of = (full_checksums, tuple(chosen))
        return subset

    def _horizon_findings(self, times: np.ndarray) -> tuple[Finding, ...]:
        curve = self._manifest.validation
        return horizon_findings(times, horizon=self._manifest.validated_horizon,
                                errors=expected_errors(curve, times),
                                tolerance=None if curve is None else curve.tolerance,
                                unit=self._manifest.time_unit)

    def _envelope_findings(self, visits: np.ndarray, times: np.ndarray, *, path: bool
                           ) -> tuple[Finding, ...]:
        envelope = self._data_envelope
        if not envelope.active or (envelope.index is None and envelope.inside_box(visits)):
            return ()  # the common case without samples costs three array operations
        manifest = self._manifest
        entry = manifest.envelope_samples
        names, units = self._space_labels()
        return envelope_findings(
            envelope.assess(visits, times), names=names,
            units=units, lower=envelope.lower, upper=envelope.upper,
            radius=None if entry is None else entry.radius, visit_times=path,
            unit=manifest.time_unit)

    def _path_findings(self, states: np.ndarray, visits: list[np.ndarray],
                       visit_times: np.ndarray, answers: np.ndarray | None,
                       answer_times: np.ndarray) -> tuple[Finding, ...]:
        """Envelope findings over a call's path: the initial states, every network output
        (`visits`, in the order of `visit_times` after the initial state) and, if given,
        answers not on the path (interpolated or integrated), all in one batched check."""
        batch, dim = states.shape
        parts = [states[None], *(visit.reshape(-1, batch, dim) for visit in visits)]
        times = visit_times
        if answers is not None:
            parts.append(answers.reshape(-1, batch, dim))
            times = np.concatenate((visit_times, answer_times))
        envelope = self._data_envelope
        large = sum(part.size for part in parts) > _COPY_VALUES
        if large and envelope.index is None and all(map(envelope.inside_box, parts)):
            return ()  # nothing to report: spare the copy of every visited state
        return self._envelope_findings(np.concatenate(parts), times, path=True)

    def _off_subspace(self, full: np.ndarray, states: np.ndarray) -> tuple[Finding, ...]:
        """A reduced bundle's full-space check of the given states `full` (B, d), latent
        codes `states` (B, r): the reconstruction error against the bundle's threshold (none
        recorded, or no reduction: nothing to check). Intermediate states are latent and
        meet the envelope on the path instead."""
        if self._threshold is None:
            return ()
        # One decoder call over the given states: the whole cost of the check.
        rebuilt = self._reduction.decode(states, self.state_dim)
        errors, worst = reconstruction_errors(full, rebuilt.astype(np.float64),
                                              np.asarray(self._manifest.scale))
        return reconstruction_findings(errors, worst, threshold=self._threshold,
                                       names=self._manifest.state_names)

    # ------------------------------------------------------------------------------ internals
    def _resolve(self, t: float, off_grid: str, vector_field: VectorField | None,
                 hybrid_below: int | None) -> _Resolution:
        t = check_time(t, unit=self._manifest.time_unit)
        check_off_grid(off_grid)
        if vector_field is not None and not callable(vector_field):
            raise OptionError("`vector_field` must be a callable f(states) -> derivatives.")
        positions, nearests, on_grids = grid_positions(np.array([t]), self.base_step)
        position, nearest, on_grid = float(positions[0]), int(nearests[0]), bool(on_grids[0])
        if hybrid_below is not None:
            return self._resolve_hybrid(t, position, nearest if on_grid else None,
                                        vector_field, hybrid_below)
        planner = self._planner
        if on_grid and planner.is_reachable(nearest):
            return _Resolution(t, "grid", (nearest,))
        floor = nearest if on_grid else math.floor(position)
        below = planner.floor_reachable(floor)
        above = planner.nearest_reachable(floor if on_grid else floor + 1)[1]
        if vector_field is not None:
            return _Resolution(t, "integrate", (below,), remainder=t - below * self.base_step)
        if off_grid == "error":
            raise TimeError(
                f"`t` = {t!r} is not a reachable grid time (base step {self.base_step} "
                f"{self._manifest.time_unit}, strides {list(self.strides)}); the nearest reachable "
                f"times are {below * self.base_step!r} and {above * self.base_step!r}. Use "
                "off_grid='interpolate' or 'nearest', or pass a vector_field."
            )
        if off_grid == "nearest":
            choice = below if position - below <= above - position else above
            return _Resolution(t, "nearest", (choice,), remainder=t - choice * self.base_step)
        return _Resolution(t, "interpolate", self._interpolation_anchors(below, above),
                           remainder=t - below * self.base_step)

    def _interpolation_anchors(self, below: int, above: int) -> tuple[int, ...]:
        # The same choice `forecast` makes for many times at once.
        chosen = interpolation_anchors(self._planner, np.array([below]), np.array([above]))
        return tuple(int(anchor) for anchor in chosen[0])

    def _resolve_hybrid(self, t: float, position: float, grid: int | None,
                        vector_field: VectorField | None, hybrid_below: int) -> _Resolution:
        if vector_field is None:
            raise OptionError("`hybrid_below` needs a `vector_field` to replace the finest levels.")
        planner = self._hybrid_planner(hybrid_below)
        floor = grid if grid is not None else math.floor(position)
        anchor = planner.floor_reachable(floor)
        return _Resolution(t, "hybrid", (anchor,), remainder=t - anchor * self.base_step,
                           hybrid_below=hybrid_below)

    def _hybrid_planner(self, hybrid_below: int) -> StridePlanner:
        if isinstance(hybrid_below, bool) or not isinstance(hybrid_below, int | np.integer):
            raise OptionError(f"`hybrid_below` is {hybrid_below!r}; expected a stride (integer).")
        kept = tuple(s for s in self.strides if s >= hybrid_below)
        if not kept:
            raise OptionError(
                f"`hybrid_below` = {hybrid_below} leaves no level (strides {list(self.strides)})."
            )
        with self._lock:
            planner = self._hybrid_planners.get(kept[0])
            if planner is None:
                planner = StridePlanner(kept, max_steps=self._limits.max_steps_per_query)
                self._hybrid_planners[kept[0]] = planner
        return planner

    def _planner_for(self, resolution: _Resolution) -> StridePlanner:
        if resolution.hybrid_below is not None:
            return self._hybrid_planner(resolution.hybrid_below)
        return self._planner

    def _schedule(self, planner: StridePlanner, anchors: Sequence[int]):
        schedule = build_schedule(list(anchors), planner)
        if schedule.evaluations > self._limits.max_steps_per_query:
            raise TimeError(
                f"the forecast needs {schedule.evaluations} network evaluations; the limit is "
                f"{self._limits.max_steps_per_query} per query."
            )
        return schedule

    def _apply(self, stride: int, states: np.ndarray, *, depth: int) -> np.ndarray:
        # Overflow shows up as inf below and is reported with the step and level.
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            result = self._kernels[stride](states)
        if result.shape != states.shape or not np.isfinite(result).all():
            self._report_bad_step(stride, result, states.shape, depth)
        return result

    def _run_sequential(self, states: np.ndarray, steps: tuple[tuple[int, int], ...],
                        visits: list[np.ndarray] | None = None) -> np.ndarray:
        # The hot path of `advance`. Under the increment update x' = x + f(x) a non-finite
        # state never becomes finite again (NaN propagates; ±inf plus anything is ±inf or NaN),
        # so one check after the whole plan finds every failure; the plan is then replayed
        # with a check after each step, only to name the failing step and level.
        # `visits`, when given, receives every network output (the envelope check's input).
        if self._manifest.update != "increment":
            return self._run_checked(states, steps, visits)
        shape = states.shape
        result = states
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            for stride, count in steps:
                kernel = self._kernels[stride]
                for _ in range(count):
                    result = kernel(result)
                    if result.shape != shape:
                        return self._run_checked(states, steps, visits)
                    if visits is not None:
                        visits.append(result)
        if not np.isfinite(result).all():
            return self._run_checked(states, steps, visits)
        return result

    def _run_checked(self, states: np.ndarray, steps: tuple[tuple[int, int], ...],
                     visits: list[np.ndarray] | None = None) -> np.ndarray:
        """Run a plan with a shape and finiteness check after every step."""
        if visits is not None:
            visits.clear()  # a replay after the fast path: start the record again
        depth = 0
        shape = states.shape
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            for stride, count in steps:
                kernel = self._kernels[stride]
                for _ in range(count):
                    states = kernel(states)
                    if states.shape != shape or not np.isfinite(states).all():
                        self._report_bad_step(stride, states, shape, depth)
                    if visits is not None:
                        visits.append(states)
                    depth += 1
        return states

    def _report_bad_step(self, stride: int, result: np.ndarray, shape: tuple[int, ...],
                         depth: int) -> None:
        if result.shape != shape:
            raise StateError(
                f"the level with stride {stride} returned shape {result.shape} for input "
                f"{shape}; expected the same shape."
            )
        raise NonFiniteError(
            f"the level with stride {stride} produced non-finite values at step "
            f"{depth + 1} of the plan; the forecast is stopped (the state may have left the "
            "region the network was trained on)."
        )

    def _run_schedule(self, schedule, states: np.ndarray,
                      visits: list[np.ndarray] | None = None) -> np.ndarray:
        """Run a schedule; `visits`, when given, receives every wave's outputs in call order,
        which is node order (nodes are numbered by depth, then stride, like the calls)."""
        record = None if visits is None else (lambda depth, stride, outputs:
                                              visits.append(outputs))
        return run_schedule(schedule, states,
                            lambda stride, batch, depth: self._apply(stride, batch, depth=depth),
                            record)

    def _integrate_jobs(self, jobs: list[tuple[int, int, float]], anchor_states: np.ndarray,
                        vector_field: VectorField | None, results: np.ndarray) -> int:
        """Finish many times with one Runge–Kutta sweep over all the anchors they start from.

        All anchor states are integrated together through the sorted remainders, and each time
        takes its anchor's row when the sweep passes its remainder: the cost is one integration
        over the longest remainder instead of one per requested time.
        """
        if not jobs:
            return 0
        indices = np.asarray([job[0] for job in jobs])
        rows = np.asarray([job[1] for job in jobs])
        remainders = np.asarray([job[2] for job in jobs])
        used, local = np.unique(rows, return_inverse=True)
        # (anchors, B, d): a reduced bundle's latent anchors are decoded, and the vector
        # field then integrates full states.
        current = self._full(anchor_states[used]).astype(np.float64)
        shape = current.shape
        elapsed, evaluations = 0.0, 0
        order = np.argsort(remainders, kind="stable")
        distinct, starts = np.unique(remainders[order], return_index=True)
        ends = np.append(starts[1:], order.size)
        for remainder, start, end in zip(distinct, starts, ends, strict=True):
            if remainder > elapsed:
                flat, spent = integrate(vector_field, current.reshape(-1, shape[-1]),
                                        float(remainder - elapsed))
                current = np.asarray(flat).reshape(shape)
                evaluations += int(spent)
                elapsed = float(remainder)
            chosen = order[start:end]
            results[indices[chosen]] = current[local[chosen]].astype(self._dtype)
        if not np.isfinite(current).all():
            raise NonFiniteError("the Runge–Kutta finish produced non-finite values.")
        return evaluations

    def _finish(self, resolution: _Resolution, anchors: Sequence[int], anchor_states: np.ndarray,
                vector_field: VectorField | None) -> tuple[np.ndarray, int]:
        """Turn the grid states of the anchors into the answer at `resolution.t`."""
        if resolution.method == "interpolate":
            nodes = np.asarray(anchors, dtype=np.float64) * self.base_step
            value = interpolate_states(nodes, anchor_states.astype(np.float64), resolution.t)
            return value.astype(self._dtype), 0
        state = anchor_states[0]
        if resolution.method in ("integrate", "hybrid") and resolution.remainder > 0:
            # A reduced bundle's vector field acts on full states: decode, then integrate.
            final, evaluations = integrate(vector_field, self._full(state).astype(np.float64),
                                           resolution.remainder)
            final = np.asarray(final)
            if not np.isfinite(final).all():
                raise NonFiniteError("the Runge–Kutta finish produced non-finite values.")
            return final.astype(self._dtype), int(evaluations)
        return state.copy(), 0

    def _describe(self, resolution: _Resolution, *, integrator_evaluations: int,
                  evaluations: int | None = None) -> Plan:
        planner = self._planner_for(resolution)
        anchor = resolution.anchors[0] if resolution.method != "interpolate" else max(
            a for a in resolution.anchors if a * self.base_step <= resolution.t + 1e-12)
        if evaluations is None:
            if len(resolution.anchors) == 1:
                evaluations = planner.step_count(resolution.anchors[0])
            else:
                evaluations = build_schedule(list(resolution.anchors), planner).evaluations
        return Plan(
            t=resolution.t,
            base_steps=anchor,
            steps=planner.steps(anchor),
            evaluations=evaluations,
            remainder=resolution.t - anchor * self.base_step,
            method=resolution.method,
            integrator_evaluations=integrator_evaluations,
            anchors=resolution.anchors,
            expected_error=float(expected_errors(self._manifest.validation,
                                                 np.array([resolution.t]))[0]),
            findings=self._horizon_findings(np.array([resolution.t])),
        )


def _load_again(path: str, options: dict, checksums: tuple[tuple[int, str], ...],
                strides: tuple[int, ...] | None = None) -> Stepper:
    """Unpickle a `Stepper`: load the bundle at `path` again, check it is the same one, and
    take the subset of `strides` when the pickled stepper was a `with_levels` subset."""
    from .errors import BundleError
    from .loader import load

    stepper = load(path, **options)
    if _checksums(stepper.manifest) != checksums:
        raise BundleError(f"the bundle at {path!r} changed since the stepper was pickled "
                          "(its levels or checksums differ); refusing to use it.")
    return stepper if strides is None else stepper.with_levels(strides)


def _checksums(manifest: Manifest) -> tuple[tuple[int | str, str], ...]:
    """What identifies a bundle's networks: each level's stride and checksum, then the
    encoder's and decoder's checksums for a reduced bundle."""
    found = tuple((entry.stride, entry.sha256) for entry in manifest.levels)
    if manifest.reduction is not None:
        found += (("encoder", manifest.reduction.encoder.sha256),
                  ("decoder", manifest.reduction.decoder.sha256))
    return found
