"""Findings: what makes an answer untrustworthy, worded in ONE place for Python, CLI and HTTP.

A `Finding` names its kind, the batch rows and components concerned, when, and by how much;
`warn_or_raise` turns the findings of one call into one `ExtrapolationWarning` (or an error).
"""

from __future__ import annotations

import math
import os
import sys
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .envelope import Assessment
from .errors import ExtrapolationError, ExtrapolationWarning

KINDS = ("outside_box", "far_from_data", "off_subspace", "beyond_horizon", "no_validation")
WARNING_KINDS = ("outside_box", "far_from_data", "off_subspace", "beyond_horizon")
"""Kinds that trigger `on_extrapolation`; "no_validation" is reported but never warns."""
POLICIES = ("warn", "error", "ignore")
_RUNTIME_DIR = os.path.dirname(os.path.abspath(__file__)) + os.sep
_LISTED = 3  # components named in a message before "and N more"


@dataclass(frozen=True)
class Finding:
    """One reason not to trust an answer.

    Attributes
    ----------
    kind : str
        "outside_box" (a component outside the envelope's min/max), "far_from_data" (the
        nearest training sample is farther than the radius), "off_subspace" (a reduced
        bundle's encoder and decoder do not reproduce the given state: its reconstruction
        error exceeds the bundle's threshold), "beyond_horizon" (t past the validated
        horizon) or "no_validation" (the bundle records no validated horizon).
    message : str
        The sentence to show a user (CLI and HTTP print it as is).
    states : tuple of int
        Batch rows affected (empty for time findings).
    components : tuple of str
        State components concerned, worst first.
    t : float or None
        When: the earliest visited time at which the state was outside (None for the initial
        state alone), or the latest requested time beyond the horizon.
    amount : float or None
        How far: box widths beyond the box, distance / radius, reconstruction error /
        threshold, or t / horizon.
    """

    kind: str
    message: str
    states: tuple[int, ...] = ()
    components: tuple[str, ...] = ()
    t: float | None = None
    amount: float | None = None

    def to_dict(self) -> dict[str, Any]:
        amount = self.amount
        return {"kind": self.kind, "message": self.message, "states": list(self.states),
                "components": list(self.components), "t": self.t,
                "amount": amount if amount is None or math.isfinite(amount) else None}


def check_policy(on_extrapolation: str) -> str:
    if on_extrapolation not in POLICIES:
        raise ValueError(
            f"`on_extrapolation` is {on_extrapolation!r}; expected one of {list(POLICIES)}."
        )
    return on_extrapolation


# ---------------------------------------------------------------------------------- wording
def _time(value: float, unit: str) -> str:
    return f"{value:.4g} {unit}".rstrip()


def _rows(rows: np.ndarray, batch: int, noun: str = "state") -> str:
    if batch == 1:
        return f"the {noun}"
    return f"{rows.size} of {batch} {noun}s"


def _verb(rows: np.ndarray, batch: int, singular: str, plural: str) -> str:
    return singular if batch == 1 or rows.size == 1 else plural


def _names(components: Sequence[str]) -> str:
    shown = ", ".join(components[:_LISTED])
    extra = len(components) - _LISTED
    return shown if extra <= 0 else f"{shown} and {extra} more"


def envelope_findings(assessment: Assessment, *, names: Sequence[str],
                      units: Sequence[str], lower: Sequence[float] | None,
                      upper: Sequence[float] | None, radius: float | None,
                      visit_times: bool, unit: str) -> tuple[Finding, ...]:
    """Word what `Envelope.assess` found.

    Parameters
    ----------
    assessment : Assessment
        From `Envelope.assess` over visits of shape (K, B, d).
    names, units : sequence of str, length d
        State component names and units.
    lower, upper : sequence of float or None
        The box as checked (`Envelope.lower`/`upper`: widened by the radius with samples).
    radius : float or None
        The samples' radius (None without samples), for the message.
    visit_times : bool
        Whether the visits were along a path (times are then named); False for initial
        states alone.
    unit : str
        The time unit.
    """
    # The common case, nothing outside and nothing far, in two array operations.
    if not np.isfinite(assessment.box_time).any() and not np.isfinite(
            assessment.far_time).any():
        return ()
    findings = []
    batch = assessment.box_time.shape[0]

    def when(first: np.ndarray) -> tuple[float | None, str]:
        if not visit_times:
            return None, ""
        earliest = float(first.min())
        if earliest == 0:
            return 0.0, " from the start (t = 0)"
        return earliest, f", first at t = {_time(earliest, unit)}"

    rows = np.flatnonzero(np.isfinite(assessment.box_time))
    if rows.size:
        worst = assessment.box_excess[rows].max(axis=0)  # (d,)
        order = [int(i) for i in np.argsort(-worst, kind="stable") if worst[i] > 0]
        t, at = when(assessment.box_time[rows])
        parts = [f"{names[i]} by up to {worst[i]:.3g} range widths beyond "
                 f"[{lower[i]:.4g}, {upper[i]:.4g}]{' ' + units[i] if units[i] else ''}"
                 for i in order[:_LISTED]]
        if len(order) > _LISTED:
            more = len(order) - _LISTED
            parts.append(f"and {more} more component{'s' if more > 1 else ''}")
        verb = _verb(rows, batch, "leaves", "leave")
        widened = "" if radius is None else ", widened by the radius"
        findings.append(Finding(
            kind="outside_box",
            message=(f"{_rows(rows, batch).capitalize()} {verb} the training range (the "
                     f"min/max of the training data{widened}){at}: {'; '.join(parts)}."),
            states=tuple(int(r) for r in rows),
            components=tuple(names[i] for i in order),
            t=t, amount=float(worst.max()),
        ))

    rows = np.flatnonzero(np.isfinite(assessment.far_time))
    if rows.size:
        ratio = float(np.nanmax(assessment.distance_ratio[rows]))
        worst_row = int(rows[np.nanargmax(assessment.distance_ratio[rows])])
        share = assessment.worst_offset[worst_row] ** 2
        order = [int(i) for i in np.argsort(-share, kind="stable")]
        # The components that make up most (80 %) of the squared distance, worst first.
        cumulative = np.cumsum(share[order]) / max(float(share.sum()), 1e-300)
        keep = order[: int(np.searchsorted(cumulative, 0.8)) + 1]
        t, at = when(assessment.far_time[rows])
        verb = _verb(rows, batch, "is", "are")
        sampled = ("" if assessment.checked >= assessment.visited else
                   f" ({assessment.checked} of {assessment.visited} visited states measured)")
        findings.append(Finding(
            kind="far_from_data",
            message=(f"{_rows(rows, batch).capitalize()} {verb} far from the training "
                     f"data{at}: the nearest training state is {ratio:.3g}× the radius away "
                     f"({ratio * radius:.3g} vs {radius:.3g} in normalised units), mostly in "
                     f"{_names([names[i] for i in keep])}{sampled}."),
            states=tuple(int(r) for r in rows),
            components=tuple(names[i] for i in keep),
            t=t, amount=ratio,
        ))
    return tuple(findings)


def reconstruction_findings(errors: np.ndarray, residual: np.ndarray, *, threshold: float,
                            names: Sequence[str]) -> tuple[Finding, ...]:
    """The finding for given full states that a reduced bundle's basis does not represent.

    Parameters
    ----------
    errors : ndarray, shape (B,)
        Normalised RMS of x − decoder(encoder(x)) per state (`reduction.reconstruction_errors`).
    residual : ndarray, shape (d,)
        (x − x̂) / scale of the worst state, to name the components that make its error.
    threshold : float
        The bundle's `reduction.reconstruction.threshold`.
    names : sequence of str, length d
        State component names.
    """
    rows = np.flatnonzero(errors > threshold)
    if not rows.size:
        return ()
    batch = errors.shape[0]
    worst = float(errors[rows].max())
    share = np.asarray(residual, dtype=np.float64) ** 2
    order = np.argsort(-share, kind="stable")
    # The components that make up most (80 %) of the squared error, worst first.
    cumulative = np.cumsum(share[order]) / max(float(share.sum()), 1e-300)
    keep = [int(i) for i in order[: int(np.searchsorted(cumulative, 0.8)) + 1]]
    verb = _verb(rows, batch, "is", "are")
    return (Finding(
        kind="off_subspace",
        message=(f"{_rows(rows, batch).capitalize()} {verb} not well represented by the "
                 f"bundle's reduced basis: reconstruction error {worst:.3g} vs {threshold:.3g} "
                 "from the training data (normalised RMS of the state minus decoder(encoder("
                 f"state))), mostly in {_names([names[i] for i in keep])}."),
        states=tuple(int(r) for r in rows),
        components=tuple(names[i] for i in keep),
        t=None, amount=worst / threshold,
    ),)


def horizon_findings(times: np.ndarray, *, horizon: float | None, errors: np.ndarray,
                     tolerance: float | None, unit: str) -> tuple[Finding, ...]:
    """Findings for requested times against the validated horizon.

    Parameters
    ----------
    times : ndarray, shape (T,)
        Requested times.
    horizon : float or None
        The bundle's validated horizon.
    errors : ndarray, shape (T,)
        Expected error at each time (nan when unknown, inf past the curve).
    tolerance : float or None
        The tolerance the horizon was judged against.
    unit : str
        The time unit.
    """
    times = np.asarray(times, dtype=np.float64)
    if times.size == 0:
        return ()
    if horizon is None:
        return (Finding(
            kind="no_validation",
            message=("This bundle records no validated horizon: no held-out check says how "
                     "far ahead its forecasts can be trusted."),
            t=float(times.max()),
        ),)
    beyond = times > horizon
    if not beyond.any():
        return ()
    latest = float(times[beyond].max())
    amount = latest / horizon if horizon > 0 else math.inf
    if times.size == 1:
        subject = f"t = {_time(latest, unit)} is"
    elif beyond.sum() == 1:
        subject = f"1 of {times.size} requested times (t = {_time(latest, unit)}) is"
    else:
        count, earliest = int(beyond.sum()), float(times[beyond].min())
        subject = (f"{count} of {times.size} requested times (from {_time(earliest, unit)} to "
                   f"{_time(latest, unit)}) are")
    ratio = f"{amount:.3g}×" if math.isfinite(amount) else "any time past 0"
    known = np.asarray(errors, dtype=np.float64)[beyond]
    error = math.nan if np.isnan(known).all() else float(np.nanmax(known))
    if math.isnan(error):
        expected = ""
    elif math.isinf(error):
        expected = ("; held-out forecasts there diverged or were not measured, so the expected "
                    "error is unbounded")
    else:
        expected = f"; expected error there up to {error:.3g} normalised RMS"
    if tolerance is not None and not math.isnan(error):
        expected += f" (tolerance {tolerance:.3g})"
    return (Finding(
        kind="beyond_horizon",
        message=(f"{subject} beyond the validated horizon of {_time(horizon, unit)} "
                 f"({ratio}){expected}."),
        t=latest, amount=amount,
    ),)


# --------------------------------------------------------------------------------- warnings
def _caller_stacklevel() -> int:
    """The `stacklevel` that points `warnings.warn` (called here) at the first frame outside
    the runtime package: the user's call of `advance` or `forecast`."""
    frame = sys._getframe(1)
    level = 1
    while frame is not None and frame.f_code.co_filename.startswith(_RUNTIME_DIR):
        frame = frame.f_back
        level += 1
    return level


def warn_or_raise(findings: Sequence[Finding], on_extrapolation: str) -> None:
    """Act on one call's findings: one `ExtrapolationWarning` joining them, an
    `ExtrapolationError`, or nothing ("ignore", or no finding of a warning kind)."""
    if on_extrapolation == "ignore":
        return
    serious = [finding for finding in findings if finding.kind in WARNING_KINDS]
    if not serious:
        return
    message = " ".join(finding.message for finding in serious)
    if on_extrapolation == "error":
        raise ExtrapolationError(message + " (on_extrapolation='error')")
    warnings.warn(message, ExtrapolationWarning, stacklevel=_caller_stacklevel())
