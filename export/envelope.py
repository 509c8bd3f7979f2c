"""The data envelope: a few thousand normalised training states and a distance radius.

At run time a state is "far from the data" when its Euclidean distance (normalised units) to
the nearest kept state exceeds the radius. States are kept by greedy farthest-point sampling,
the radius comes from the data (docs/export.md, "Envelope").
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

# States kept in the bundle: the runtime compares every visited state with all of them, so
# this bounds its cost (2048 · d multiply-adds per state, about one small network layer).
ENVELOPE_SAMPLES = 2048
# Farthest-point sampling runs on at most this many candidate states (evenly spaced in time:
# neighbouring samples of a trajectory are nearly equal, so little is lost).
CANDIDATE_LIMIT = 20_000
# The radius is RADIUS_MARGIN times the RADIUS_QUANTILE of the held-out states' distances to
# the nearest kept state (or of the kept states' leave-one-out distances), and never below
# the cover radius of the training states.
RADIUS_QUANTILE = 0.99
RADIUS_MARGIN = 1.5
# Distances are computed in blocks of this many query states (memory: block · samples).
_BLOCK = 1024


def spaced_rows(states: np.ndarray, limit: int) -> np.ndarray:
    """Up to `limit` rows of `states`, evenly spaced (deterministic)."""
    if len(states) <= limit:
        return states
    return states[np.unique(np.linspace(0, len(states) - 1, limit).round().astype(np.int64))]


def farthest_points(states: np.ndarray, count: int) -> tuple[np.ndarray, float]:
    """Greedy farthest-point sample of `count` rows of `states` (n, d).

    Starts from the state nearest the centroid, then repeatedly adds the state farthest from
    those kept. Returns the kept rows (count, d) and the cover radius: the largest distance of
    any row of `states` to its nearest kept row (0 when all are kept).
    """
    states = np.asarray(states, dtype=np.float64)
    if len(states) <= count:
        return states, 0.0
    first = int(np.argmin(np.sum((states - states.mean(axis=0)) ** 2, axis=1)))
    chosen = [first]
    nearest = np.sum((states - states[first]) ** 2, axis=1)
    for _ in range(count - 1):
        index = int(np.argmax(nearest))
        chosen.append(index)
        np.minimum(nearest, np.sum((states - states[index]) ** 2, axis=1), out=nearest)
    return states[chosen], float(np.sqrt(nearest.max()))


def nearest_distances(queries: np.ndarray, samples: np.ndarray, *,
                      exclude_self: bool = False) -> np.ndarray:
    """Euclidean distance of each query (m, d) to its nearest sample (n, d), shape (m,).

    With `exclude_self` (queries are the samples) each row's distance to itself is skipped.
    """
    queries = np.asarray(queries, dtype=np.float64)
    samples = np.asarray(samples, dtype=np.float64)
    squared_samples = np.sum(samples**2, axis=1)
    result = np.empty(len(queries))
    for first in range(0, len(queries), _BLOCK):
        block = queries[first:first + _BLOCK]
        squared = (np.sum(block**2, axis=1)[:, None] - 2.0 * block @ samples.T
                   + squared_samples[None, :])
        if exclude_self:
            rows = np.arange(len(block))
            squared[rows, first + rows] = np.inf
        result[first:first + len(block)] = np.sqrt(np.maximum(squared.min(axis=1), 0.0))
    return result


def data_envelope(train: Sequence[np.ndarray], held_out: Sequence[np.ndarray] | None = None, *,
                  count: int = ENVELOPE_SAMPLES) -> tuple[np.ndarray, float]:
    """Kept states (float32, (k, d), k ≤ count) and the radius, from normalised trajectories.

    Parameters
    ----------
    train : sequence of ndarray, each (T_i, d)
        Normalised training trajectories.
    held_out : sequence of ndarray, each (T_i, d), optional
        Normalised held-out trajectories: their distances to the kept states set the radius.
        Without them, the kept states' distances to their nearest other kept state do.
    """
    pool = spaced_rows(np.concatenate([np.asarray(t, dtype=np.float64) for t in train]),
                       CANDIDATE_LIMIT)
    samples, cover = farthest_points(pool, count)
    if held_out:
        queries = spaced_rows(np.concatenate([np.asarray(t, dtype=np.float64)
                                              for t in held_out]), CANDIDATE_LIMIT)
        distances = nearest_distances(queries, samples)
    elif len(samples) > 1:
        distances = nearest_distances(samples, samples, exclude_self=True)
    else:
        distances = np.zeros(1)
    typical = float(np.quantile(distances, RADIUS_QUANTILE))
    radius = RADIUS_MARGIN * max(cover, typical)
    if not radius > 0:
        # Every state equal (a constant system): any move away from it is far from the data.
        radius = float(np.finfo(np.float32).eps)
    return samples.astype(np.float32), radius
