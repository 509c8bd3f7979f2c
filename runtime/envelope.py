"""Where the training data were: the min/max box and the nearest-sample distance (NumPy only).

`Envelope.assess` measures many visited states at once: how far each leaves the box, and how
far (in normalised units) it lies from the nearest kept training sample, with bounded work.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .nearest import SampleIndex

# Visits per block of the box check: block × batch × d stays near this many float64 values.
_CHUNK_VALUES = 1 << 20


@dataclass(frozen=True)
class Assessment:
    """What `Envelope.assess` found, per batch row (B states followed through K visits).

    Attributes
    ----------
    box_excess : ndarray, shape (B, d)
        Largest distance beyond the box over the visits, per component, in box widths
        (0 inside; a component whose box has zero width counts a step outside as 1 width per
        unit of its normalisation scale).
    box_time : ndarray, shape (B,)
        Earliest visit time outside the box, `inf` if never.
    distance_ratio : ndarray, shape (B,)
        Largest nearest-sample distance / radius over the checked visits (nan without
        samples).
    far_time : ndarray, shape (B,)
        Earliest checked visit time with distance > radius, `inf` if never.
    worst_offset : ndarray, shape (B, d)
        For the visit of largest ratio, normalised state minus its nearest sample (which
        components make the distance); zeros without samples.
    checked, visited : int
        States whose distance was computed, and states visited (K · B): fewer are checked
        when the work cap (`max_work`) binds.
    """

    box_excess: np.ndarray
    box_time: np.ndarray
    distance_ratio: np.ndarray
    far_time: np.ndarray
    worst_offset: np.ndarray
    checked: int
    visited: int


class Envelope:
    """The training envelope of a bundle.

    Parameters
    ----------
    lower, upper : array_like, shape (d,) or None
        The box (min/max of the training data, physical units). With samples, the box is
        widened by `radius` · scale in each component: a state outside the widened box is
        farther than `radius` from every sample, so box findings never contradict the
        data-based check (a state just past the min/max but near the data is not reported).
    mean, scale : array_like, shape (d,)
        The normalisation z = (x − mean) / scale the samples are expressed in.
    samples : ndarray, shape (N, d), optional
        Normalised training states.
    radius : float
        Distance to the nearest sample beyond which a state is far from the data.
    max_work : int
        At most (visited states × samples) this large per `assess` call: the worst case of
        the search (brute force) for each measured state; beyond it, an evenly spaced subset
        of the visited states is measured (the box is always checked on all).
    """

    def __init__(self, lower, upper, *, mean, scale, samples: np.ndarray | None = None,
                 radius: float = 1.0, max_work: int = 1 << 24):
        self.mean = np.asarray(mean, dtype=np.float64)
        self.scale = np.asarray(scale, dtype=np.float64)
        self.radius = float(radius)
        self.max_work = int(max_work)
        self.index = None if samples is None else SampleIndex(samples, radius=self.radius)
        margin = 0.0 if samples is None else self.radius * self.scale
        self.lower = None if lower is None else np.asarray(lower, dtype=np.float64) - margin
        self.upper = None if upper is None else np.asarray(upper, dtype=np.float64) + margin
        if self.lower is not None:
            width = self.upper - self.lower
            self._width = np.where(width > 0, width, self.scale)

    @property
    def active(self) -> bool:
        """Whether there is anything to check (a box or samples)."""
        return self.lower is not None or self.index is not None

    def inside_box(self, visits: np.ndarray) -> bool:
        """Whether every state of `visits` (any shape ending in d) lies inside the box."""
        if self.lower is None:
            return True
        return not ((visits < self.lower) | (visits > self.upper)).any()

    def assess(self, visits: np.ndarray, times: np.ndarray) -> Assessment:
        """Measure every visited state.

        Parameters
        ----------
        visits : ndarray, shape (K, B, d)
            Physical states: K visits (any order) of B batch rows.
        times : ndarray, shape (K,)
            The time of each visit.

        Returns
        -------
        Assessment
        """
        visit_count, batch, dim = visits.shape
        box_excess = np.zeros((batch, dim))
        box_time = np.full(batch, np.inf)
        far_time = np.full(batch, np.inf)
        offset = np.zeros((batch, dim))
        if self.index is None:
            # Without samples, the common case (every state inside) costs three array
            # operations.
            if not self.inside_box(visits):
                self._box(visits, np.asarray(times, dtype=np.float64), box_excess, box_time)
            return Assessment(box_excess=box_excess, box_time=box_time,
                              distance_ratio=np.full(batch, np.nan), far_time=far_time,
                              worst_offset=offset, checked=0, visited=visit_count * batch)
        flat = visits.reshape(-1, dim)
        total = flat.shape[0]
        budget = max(1, self.max_work // self.index.samples.shape[0])
        if total <= budget:
            rows = None
            normalised = (flat - self.mean) / self.scale
        else:  # evenly spaced, with up to half the budget on the last visit (the answers)
            last = min(batch, budget // 2)
            rows = np.unique(np.concatenate((
                np.linspace(0, total - last - 1, budget - last).astype(np.int64),
                np.arange(total - last, total))))
            normalised = (flat[rows] - self.mean) / self.scale
        distance, index = self.index.nearest(normalised)
        ratios = distance / self.radius
        if rows is None:
            ratio = ratios.reshape(visit_count, batch).max(axis=0)
        else:
            ratio = np.full(batch, np.nan)
            np.fmax.at(ratio, rows % batch, ratios)
        far = ratios > 1.0
        # The common case (every state near the data) ends here. With samples, a state
        # outside the widened box is also far from every (training) sample, so the box is
        # looked at only when some state is far.
        if far.any():
            times = np.asarray(times, dtype=np.float64)
            if not self.inside_box(visits):
                self._box(visits, times, box_excess, box_time)
            if rows is None:
                rows = np.arange(total)
            row_visit, row_batch = np.divmod(rows, batch)
            np.minimum.at(far_time, row_batch[far], times[row_visit[far]])
            # Offset from the nearest sample at each row's worst visit.
            order = np.lexsort((ratios, row_batch))
            last = np.flatnonzero(np.append(np.diff(row_batch[order]) != 0, True))
            worst = order[last]
            offset[row_batch[worst]] = normalised[worst] - self.index.samples[index[worst]]
        return Assessment(box_excess=box_excess, box_time=box_time, distance_ratio=ratio,
                          far_time=far_time, worst_offset=offset, checked=distance.size,
                          visited=visit_count * batch)

    def _box(self, visits: np.ndarray, times: np.ndarray, box_excess: np.ndarray,
             box_time: np.ndarray) -> None:
        """Fill `box_excess` (B, d) and `box_time` (B,) for visits (K, B, d) at `times`."""
        batch, dim = box_excess.shape
        # In blocks of visits, so the temporaries stay small for large forecasts.
        step = max(1, _CHUNK_VALUES // max(1, batch * dim))
        for start in range(0, visits.shape[0], step):
            block = visits[start:start + step]
            excess = np.maximum(self.lower - block, block - self.upper)
            np.maximum(excess, 0.0, out=excess)
            excess /= self._width  # (k, B, d)
            np.maximum(box_excess, excess.max(axis=0), out=box_excess)
            outside = (excess > 0).any(axis=2)  # (k, B)
            when = np.where(outside, times[start:start + step, None], np.inf).min(axis=0)
            np.minimum(box_time, when, out=box_time)
