"""Polynomial interpolation of states between grid times, for off-grid requests.

The intended use is a cubic through the four grid states nearest to the requested time.
"""

from __future__ import annotations

import math

import numpy as np

from .errors import StateError, TimeError


def lagrange_weights(nodes: np.ndarray, t: float) -> np.ndarray:
    """Weights w with p(t) = Σ w_j·y_j for the polynomial p through (nodes_j, y_j).

    Parameters
    ----------
    nodes : array_like, shape (m,)
        Distinct finite times, not necessarily uniform or sorted.
    t : float
        Where to evaluate; outside the nodes this extrapolates.

    Returns
    -------
    ndarray of float64, shape (m,)
        Lagrange basis values L_j(t); they sum to 1, and at a node they are exactly the unit
        vector of that node.

    Raises
    ------
    TimeError
        If `nodes` is empty, not 1-D, non-finite or repeats a time, or `t` is not finite.

    Notes
    -----
    The product form L_j(t) = Π_{k≠j} (t − x_k)/(x_j − x_k) costs O(m²), which is nothing
    for the four nodes of a cubic, and works on differences, so it stays accurate for nodes
    at large times close together.
    """
    x = np.asarray(nodes, dtype=np.float64)
    if x.ndim != 1 or x.size == 0:
        raise TimeError(f"`nodes` must be a non-empty 1-D array of times; got shape {x.shape}.")
    if not np.isfinite(x).all():
        raise TimeError(f"`nodes` must be finite; got {x.tolist()}.")
    if np.unique(x).size != x.size:
        raise TimeError(f"`nodes` must be distinct; got {x.tolist()}.")
    t = float(t)
    if not math.isfinite(t):
        raise TimeError(f"`t` must be finite; got {t!r}.")
    gaps = x[:, np.newaxis] - x[np.newaxis, :]  # x_j − x_k
    offsets = t - x  # t − x_k
    others = ~np.eye(x.size, dtype=bool)
    numerators = np.where(others, offsets[np.newaxis, :], 1.0)
    denominators = np.where(others, gaps, 1.0)
    return np.prod(numerators / denominators, axis=1)


def interpolate_states(nodes: np.ndarray, states: np.ndarray, t: float) -> np.ndarray:
    """Evaluate the polynomial through `states` at `nodes` at time t.

    Parameters
    ----------
    nodes : array_like, shape (m,)
        Distinct times of the states.
    states : ndarray, shape (m, ...)
        The state (e.g. of shape (B, d)) at each node.
    t : float
        Where to evaluate.

    Returns
    -------
    ndarray, shape states.shape[1:]
        In the dtype of `states` if floating, else float64.

    Raises
    ------
    TimeError
        As `lagrange_weights`.
    StateError
        If `states` does not hold one state per node.
    """
    states = np.asarray(states)
    weights = lagrange_weights(nodes, t)
    if states.ndim < 1 or states.shape[0] != weights.size:
        raise StateError(
            f"`states` must hold one state per node ({weights.size}); got shape {states.shape}."
        )
    dtype = states.dtype if np.issubdtype(states.dtype, np.floating) else np.dtype(np.float64)
    # Combine in float64 so that float32 states lose nothing beyond their own rounding.
    combined = np.tensordot(weights, states.astype(np.float64, copy=False), axes=1)
    return combined.astype(dtype, copy=False)
