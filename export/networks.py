"""The network of one level: an MLP that outputs the increment N(z) (update "increment").

The step is z' = z + N(z); starting near the identity (a small last layer) keeps early rollout
losses bounded, since every level begins as "nothing changes".
"""

from __future__ import annotations

from collections.abc import Sequence

import torch
from torch import nn

ACTIVATIONS: dict[str, type[nn.Module]] = {
    "tanh": nn.Tanh,
    "relu": nn.ReLU,
    "leaky_relu": nn.LeakyReLU,
    "elu": nn.ELU,
    "gelu": nn.GELU,
    "silu": nn.SiLU,
    "mish": nn.Mish,
    "softplus": nn.Softplus,
    "sigmoid": nn.Sigmoid,
}
# Scale of the last layer's initial weights: the first increments are ~10 % of a typical state
# change, so a multi-step rollout cannot blow up before training has begun.
OUTPUT_GAIN = 0.1


def increment_mlp(state_dim: int, hidden: Sequence[int], activation: str) -> nn.Sequential:
    """An MLP d → hidden... → d with `activation` between layers, last layer scaled down.

    Parameters
    ----------
    state_dim : int
        d, input and output width.
    hidden : sequence of int
        Widths of the hidden layers.
    activation : str
        A key of `ACTIVATIONS`.
    """
    layers: list[nn.Module] = []
    width = state_dim
    for size in hidden:
        layers += [nn.Linear(width, size), ACTIVATIONS[activation]()]
        width = size
    last = nn.Linear(width, state_dim)
    with torch.no_grad():
        last.weight.mul_(OUTPUT_GAIN)
        last.bias.zero_()
    layers.append(last)
    return nn.Sequential(*layers)


def parameter_count(module: nn.Module) -> int:
    return sum(parameter.numel() for parameter in module.parameters())
