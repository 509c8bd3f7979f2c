"""The encoder and decoder of a reduced bundle: full state ↔ latent, normalisation folded in.

A reduced bundle's levels step a latent state of length r. The encoder maps the normalised
full state z = (x − mean) / scale, shape (B, d), to the latent (B, r); the decoder maps the
latent back to z, and x = z · scale + mean. Chains of affine layers and activations (a linear
basis is one MatMul or Gemm) run on the compiled fast path with the normalisation folded into
their first (encoder) or last (decoder) affine layer; other graphs run in the interpreter.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from .compile import Affine, ChainKernel, Stage, recognise_chain
from .errors import ModelFormatError, NonFiniteError, StateError
from .graph import Program, build_program
from .threads import ThreadPolicy

SIDES = ("encoder", "decoder")
Map = Callable[[np.ndarray], np.ndarray]


class GenericMap:
    """Runs an encoder or decoder graph in the interpreter, with the normalisation around it."""

    path = "interpreter"

    def __init__(self, program: Program, side: str, mean: np.ndarray, scale: np.ndarray,
                 policy: ThreadPolicy | None = None):
        self.program = program
        self.side = side
        self.mean = mean
        self.scale = scale
        self.policy = policy

    def __call__(self, states: np.ndarray) -> np.ndarray:
        policy = self.policy
        if policy is not None and policy.applies(states.shape[0]):
            return policy.run(self._run, states, splittable=False)
        return self._run(states)

    def _run(self, states: np.ndarray) -> np.ndarray:
        if self.side == "encoder":
            return np.asarray(self.program.run((states - self.mean) / self.scale))
        return np.asarray(self.program.run(states)) * self.scale + self.mean


def map_names(model) -> tuple[str, str]:
    """The one runtime input and the one output of an encoder or decoder graph (the manifest
    names neither: each has exactly one of both)."""
    graph = model.graph
    constants = {tensor.name for tensor in graph.initializers}
    inputs = [info.name for info in graph.inputs if info.name not in constants]
    outputs = [info.name for info in graph.outputs]
    if len(inputs) != 1 or len(outputs) != 1:
        raise ModelFormatError(
            f"the graph has runtime inputs {inputs} and outputs {outputs}; an encoder or "
            "decoder must have exactly one of each."
        )
    return inputs[0], outputs[0]


def map_form(model, *, max_nodes: int) -> str:
    """What an encoder or decoder graph computes, for descriptions: "linear" (affine layers
    only, e.g. a POD basis), "affine chain" (affine layers and activations: the compiled
    path) or "general graph" (the interpreter)."""
    names = map_names(model)
    program = build_program(model, input_name=names[0], output_name=names[1],
                            dtype=np.dtype(np.float64), max_nodes=max_nodes)
    stages = recognise_chain(program)
    if stages is None:
        return "general graph"
    return "linear" if all(isinstance(s, Affine) for s in stages) else "affine chain"


def make_map(program: Program, *, side: str, mean: Sequence[float], scale: Sequence[float],
             latent_dim: int, fast_path: bool = True, policy: ThreadPolicy | None = None
             ) -> ChainKernel | GenericMap:
    """Build the encoder (`side` "encoder": x (B, d) → latent (B, r)) or the decoder ("decoder":
    latent (B, r) → x (B, d)) of a reduced bundle, in physical units of the full state."""
    dtype = program.dtype
    mean_array = np.asarray(mean, dtype=dtype)
    scale_array = np.asarray(scale, dtype=dtype)
    dim = mean_array.size
    widths = (dim, latent_dim) if side == "encoder" else (latent_dim, dim)
    if fast_path:
        stages = recognise_chain(program)
        if stages is not None and _maps_widths(stages, *widths):
            return _folded(stages, side, mean_array, scale_array, dtype, policy)
    return GenericMap(program, side, mean_array, scale_array, policy)


def _maps_widths(stages: Sequence[Stage], width_in: int, width_out: int) -> bool:
    """Whether the affine layers map width_in → … → width_out; if not, the interpreter (and
    the loader's probe) reports it."""
    width = width_in
    for stage in stages:
        if isinstance(stage, Affine):
            if stage.weight.shape[0] != width:
                return False
            width = stage.weight.shape[1]
    return width == width_out


def _folded(stages: list[Stage], side: str, mean: np.ndarray, scale: np.ndarray,
            dtype: np.dtype, policy: ThreadPolicy | None) -> ChainKernel:
    """Fold z = (x − mean)/scale into the encoder's first affine layer, or x = z·scale + mean
    into the decoder's last; done in float64, as for the levels."""
    stages = list(stages)
    mean64, scale64 = mean.astype(np.float64), scale.astype(np.float64)
    input_shift = input_scale = None
    if side == "encoder":
        if isinstance(stages[0], Affine):
            first = stages[0]
            weight = first.weight.astype(np.float64)
            bias = (np.zeros(weight.shape[1]) if first.bias is None
                    else first.bias.astype(np.float64))
            stages[0] = Affine(weight / scale64[:, None], bias - (mean64 / scale64) @ weight)
        else:
            input_shift, input_scale = mean, scale
    elif isinstance(stages[-1], Affine):
        last = stages[-1]
        weight = last.weight.astype(np.float64)
        bias = np.zeros(weight.shape[1]) if last.bias is None else last.bias.astype(np.float64)
        stages[-1] = Affine(weight * scale64[None, :], bias * scale64 + mean64)
    else:
        stages.append(Affine(np.diag(scale64), mean64))  # an activation ends the chain
    stages = [
        Affine(np.ascontiguousarray(s.weight, dtype=dtype),
               None if s.bias is None else np.ascontiguousarray(s.bias, dtype=dtype))
        if isinstance(s, Affine) else s
        for s in stages
    ]
    return ChainKernel(stages, residual=False, input_shift=input_shift,
                       input_scale=input_scale, policy=policy)


def reconstruction_errors(states: np.ndarray, rebuilt: np.ndarray, scale: np.ndarray
                          ) -> tuple[np.ndarray, np.ndarray]:
    """How far decoder(encoder(x)) lies from x, per state (manifest metric "normalised_rms").

    Parameters
    ----------
    states, rebuilt : ndarray, shape (B, d)
        Full states x and their reconstructions x̂, physical units.
    scale : ndarray, shape (d,)
        The manifest's normalisation scale.

    Returns
    -------
    errors : ndarray, shape (B,)
        sqrt(mean_i ((x_i − x̂_i) / scale_i)²), in float64.
    worst : ndarray, shape (d,)
        (x − x̂) / scale of the state with the largest error (which components make it).
    """
    residual = (states.astype(np.float64) - rebuilt) / scale
    errors = np.sqrt(np.mean(residual * residual, axis=1))
    return errors, residual[int(np.argmax(errors))]


@dataclass(frozen=True)
class LatentMaps:
    """A loaded encoder/decoder pair.

    Attributes
    ----------
    latent_dim : int
        r, the length of the latent state the levels step.
    encoder : callable
        x (B, d) in physical units → latent (B, r).
    decoder : callable
        latent (B, r) → x (B, d) in physical units.
    """

    latent_dim: int
    encoder: Map
    decoder: Map

    @property
    def paths(self) -> dict[str, str]:
        """Which execution path each map uses ("affine-chain" or "interpreter")."""
        return {"encoder": getattr(self.encoder, "path", "custom"),
                "decoder": getattr(self.decoder, "path", "custom")}

    def encode(self, states: np.ndarray) -> np.ndarray:
        """Full states (B, d) → latent states (B, r), checked for shape and finiteness."""
        return self._checked("encoder", self.encoder, states, self.latent_dim)

    def decode(self, latent: np.ndarray, dim: int) -> np.ndarray:
        """Latent states (..., r) → full states (..., d), checked for shape and finiteness."""
        flat = latent.reshape(-1, self.latent_dim)
        return self._checked("decoder", self.decoder, flat, dim).reshape(*latent.shape[:-1], dim)

    @staticmethod
    def _checked(side: str, function: Map, states: np.ndarray, width: int) -> np.ndarray:
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            result = np.asarray(function(states))
        if result.shape != (states.shape[0], width):
            raise StateError(
                f"the {side} returned shape {result.shape} for input {states.shape}; expected "
                f"({states.shape[0]}, {width})."
            )
        if not np.isfinite(result).all():
            raise NonFiniteError(
                f"the {side} produced non-finite values; the forecast is stopped (the state "
                "may have left the region the networks were trained on)."
            )
        return result
