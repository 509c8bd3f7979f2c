"""`export/networks.py`: the increment MLP of one level.

References: the published definitions of each activation (tanh; ReLU; leaky ReLU with slope
0.01, PyTorch's default; ELU, Clevert et al. 2016, α = 1; GELU, Hendrycks & Gimpel 2016,
x·Φ(x) = x/2·(1 + erf(x/√2)); SiLU, x·σ(x); Mish, Misra 2019, x·tanh(softplus(x)); softplus
log(1 + eˣ); sigmoid 1/(1 + e⁻ˣ)) evaluated with NumPy and SciPy (`scipy.special.erf`,
`expit`); torch.nn.Linear's documented initialisation U(−1/√fan_in, 1/√fan_in); the parameter
count of a dense layer, in·out + out.
"""

from __future__ import annotations

from itertools import pairwise

import numpy as np
import pytest
import torch
from scipy.special import erf, expit
from torch import nn

from stridecast.export.networks import ACTIVATIONS, OUTPUT_GAIN, increment_mlp, parameter_count

X = np.linspace(-4.0, 4.0, 81)
FORMULAS = {
    "tanh": np.tanh,
    "relu": lambda x: np.maximum(x, 0.0),
    "leaky_relu": lambda x: np.where(x > 0, x, 0.01 * x),
    "elu": lambda x: np.where(x > 0, x, np.expm1(x)),
    "gelu": lambda x: 0.5 * x * (1.0 + erf(x / np.sqrt(2.0))),
    "silu": lambda x: x * expit(x),
    "mish": lambda x: x * np.tanh(np.log1p(np.exp(x))),
    "softplus": lambda x: np.log1p(np.exp(x)),
    "sigmoid": expit,
}


def test_every_activation_has_its_published_formula():
    assert set(ACTIVATIONS) == set(FORMULAS)


@pytest.mark.parametrize("name", sorted(FORMULAS))
def test_activation_values(name):
    with torch.no_grad():
        values = ACTIVATIONS[name]()(torch.from_numpy(X)).numpy()
    np.testing.assert_allclose(values, FORMULAS[name](X), rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize(("hidden", "activation"),
                         [((8, 5), "tanh"), ((16,), "gelu"), ((), "relu")])
def test_layers_widths_and_activations(hidden, activation):
    torch.manual_seed(0)
    network = increment_mlp(3, hidden, activation)
    linears = [layer for layer in network if isinstance(layer, nn.Linear)]
    widths = [3, *hidden, 3]
    assert [(layer.in_features, layer.out_features) for layer in linears] == \
        list(pairwise(widths))
    between = [layer for layer in network if not isinstance(layer, nn.Linear)]
    assert len(between) == len(hidden)
    assert all(isinstance(layer, ACTIVATIONS[activation]) for layer in between)
    assert isinstance(network[-1], nn.Linear)
    # Dense layers: in·out weights plus out biases each.
    assert parameter_count(network) == sum(a * b + b for a, b in pairwise(widths))


def test_the_last_layer_starts_small_and_unbiased():
    torch.manual_seed(1)
    network = increment_mlp(4, (64, 64), "tanh")
    last = network[-1]
    assert torch.count_nonzero(last.bias) == 0
    # nn.Linear draws weights in ±1/√fan_in; the last layer is scaled by OUTPUT_GAIN.
    bound = OUTPUT_GAIN / np.sqrt(64)
    weights = last.weight.detach().numpy()
    assert np.abs(weights).max() <= bound
    assert np.abs(weights).max() > 0.8 * bound  # 256 uniform draws reach the edge
    # The first layer keeps torch's initialisation.
    assert np.abs(network[0].weight.detach().numpy()).max() > 0.8 / np.sqrt(4)


def test_the_initial_step_is_close_to_the_identity():
    torch.manual_seed(2)
    network = increment_mlp(4, (64, 64), "tanh")
    z = torch.randn(256, 4)
    with torch.no_grad():
        increment = network(z)
    # |N(z)_i| ≤ Σ_j |w_ij|·|h_j| ≤ 64 · (0.1/8) · 1 for tanh features: at most 0.8.
    assert increment.abs().max() <= 64 * OUTPUT_GAIN / 8
    assert increment.abs().mean() < 0.1 * z.abs().mean()
