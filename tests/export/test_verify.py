"""`export/verify.py`: torch, the runtime and onnxruntime must agree on every level.

References: onnx's ReferenceEvaluator runs the exported ONNX model as a stand-in runtime (a
second, independent implementation of the ONNX semantics); onnxruntime is called directly to
recompute the reported differences; IEEE 754 binary32's unit roundoff is 2^-24 (half of
`numpy.finfo(np.float32).eps`); the uniform draws are tested with SciPy's Kolmogorov–Smirnov
test (`scipy.stats.kstest`).
"""

from __future__ import annotations

import numpy as np
import onnxruntime
import pytest
import torch
from onnx.reference import ReferenceEvaluator
from scipy import stats
from torch import nn

from stridecast.export import Tolerance, VerificationError
from stridecast.export.arguments import build_spec
from stridecast.export.onnx_export import INPUT_NAME, export_level, prepare_level
from stridecast.export.verify import (
    DEFAULT_BOX_SCALES,
    FLOAT32_UNIT_ROUNDOFF,
    normalised_example,
    sample_states,
    verify_levels,
)
from stridecast.runtime import BundleError

MEAN, SCALE = (0.5, -1.0), (2.0, 0.25)


def _spec(envelope=None, update="increment"):
    return build_spec(strides=(1,), state_dim=2, base_step=0.1, mean=MEAN, scale=SCALE,
                      update=update, state_names=("x", "v"), units=None, time_unit="s",
                      name="probe", description="", envelope=envelope, validated_horizon=None)


class ReferenceStepper:
    """`step` as the runtime does it, computed by onnx's ReferenceEvaluator; `offset` and
    `single_offset` spoil the batch or the one-state answer on purpose."""

    def __init__(self, spec, model: bytes, *, offset=(0.0, 0.0), single_offset=(0.0, 0.0)):
        self.spec, self.session = spec, ReferenceEvaluator(model)
        self.offset, self.single_offset = np.asarray(offset), np.asarray(single_offset)

    def step(self, states, stride):
        states = np.asarray(states, np.float64)
        mean, scale = np.asarray(self.spec.mean), np.asarray(self.spec.scale)
        z = ((np.atleast_2d(states) - mean) / scale).astype(np.float32)
        network = self.session.run(None, {INPUT_NAME: z})[0].astype(np.float64)
        nxt = ((z + network) if self.spec.update == "increment" else network) * scale + mean
        nxt = nxt + self.offset * scale
        return nxt[0] + self.single_offset * scale if states.ndim == 1 else nxt


def _level(spec, sample, module):
    example = normalised_example(spec, sample, 8)
    prepared = prepare_level(1, module, 2, example)
    exported = export_level(prepared, state_dim=2, exporter="legacy", example=example)
    return prepared, exported


@pytest.fixture(scope="module")
def linear():
    torch.manual_seed(0)
    module = nn.Sequential(nn.Linear(2, 8), nn.Tanh(), nn.Linear(8, 2))
    spec = _spec(envelope=([-1.0, -2.0], [2.0, 0.0]))
    sample = sample_states(spec, samples=128)
    prepared, exported = _level(spec, sample, module)
    return spec, sample, prepared, exported


def test_unit_roundoff_is_half_the_float32_epsilon():
    assert np.finfo(np.float32).eps / 2 == FLOAT32_UNIT_ROUNDOFF


def test_tolerance_bound_is_the_documented_formula():
    tolerance = Tolerance(relative=1e-3, rounding_factor=4.0)
    reference = np.array([[0.5, -2.0]])
    states, next_states = np.array([[1.0, -3.0]]), np.array([[2.0, 0.5]])
    mean, scale = np.array([0.5, -1.0]), np.array([2.0, 0.25])
    # relative · (1 + |z'|) + factor · 2^-24 · (|x| + |x'| + |mean|) / scale, by hand:
    expected = [1e-3 * 1.5 + 4 * 2**-24 * (1 + 2 + 0.5) / 2,
                1e-3 * 3.0 + 4 * 2**-24 * (3 + 0.5 + 1) / 0.25]
    np.testing.assert_allclose(tolerance.bound(reference, states, next_states, mean, scale)[0],
                               expected, rtol=1e-15)
    with pytest.raises(BundleError, match=r"`Tolerance\.rounding_factor` is nan"):
        Tolerance(rounding_factor=float("nan"))


def test_states_are_uniform_in_the_envelope_box():
    spec = _spec(envelope=([-1.0, -2.0], [2.0, 0.0]))
    sample = sample_states(spec, samples=512, seed=3)
    assert sample.states.dtype == np.float32 and sample.states.shape == (512, 2)
    assert sample.source == "uniform in the envelope box"
    assert sample.box_min == (-1.0, -2.0) and sample.box_max == (2.0, 0.0)
    for column, (low, high) in enumerate([(-1.0, 2.0), (-2.0, 0.0)]):
        values = sample.states[:, column]
        assert low <= values.min() and values.max() <= high
        # Kolmogorov–Smirnov against U(low, high) (SciPy): a broken draw gives p ≪ 1e-3.
        assert stats.kstest(values, stats.uniform(low, high - low).cdf).pvalue > 1e-3


def test_without_an_envelope_states_fill_mean_plus_minus_three_scales():
    sample = sample_states(_spec(), samples=512, seed=4)
    low = np.subtract(MEAN, np.multiply(DEFAULT_BOX_SCALES, SCALE))
    high = np.add(MEAN, np.multiply(DEFAULT_BOX_SCALES, SCALE))
    np.testing.assert_allclose(sample.box_min, low)
    np.testing.assert_allclose(sample.box_max, high)
    for column in range(2):
        uniform = stats.uniform(low[column], high[column] - low[column])
        assert stats.kstest(sample.states[:, column], uniform.cdf).pvalue > 1e-3


def test_given_states_are_subsampled_in_order():
    given = np.column_stack([np.arange(100.0), -np.arange(100.0)])
    sample = sample_states(_spec(), samples=10, states=given)
    assert sample.source == "given states" and sample.states.shape == (10, 2)
    rows = sample.states[:, 0].astype(int)
    assert np.all(np.diff(rows) > 0) and set(rows) <= set(range(100))
    np.testing.assert_array_equal(sample.states[:, 1], -sample.states[:, 0])
    # The box is that of the states used.
    assert sample.box_min == tuple(sample.states.min(axis=0))
    assert sample.box_max == tuple(sample.states.max(axis=0))


def test_normalised_example_repeats_the_sample_in_normalised_units():
    spec = _spec()
    sample = sample_states(spec, samples=3, states=[[0.5, -1.0], [2.5, -0.75], [-1.5, -1.5]])
    example = normalised_example(spec, sample, 5).numpy()
    np.testing.assert_allclose(example, [[0, 0], [1, 1], [-1, -2], [0, 0], [1, 1]])


def test_agreeing_implementations_pass_with_the_differences_reported(linear):
    spec, sample, prepared, exported = linear
    stepper = ReferenceStepper(spec, exported.onnx_bytes)
    report = verify_levels(stepper, {1: prepared}, {1: exported}, spec, sample, Tolerance())
    assert report["passed"] and report["samples"] == 128
    assert report["onnxruntime"] == onnxruntime.__version__
    [level] = report["levels"]
    assert level["stride"] == 1 and level["exporter"] == "legacy"
    assert 0.0 <= level["max_difference_over_tolerance"] <= 1.0
    # Recomputed here: torch against onnxruntime called directly, in normalised units.
    z = ((sample.states.astype(np.float64) - MEAN) / SCALE).astype(np.float32)
    with torch.no_grad():
        torch_out = prepared.call(torch.from_numpy(z)).numpy().astype(np.float64)
    session = onnxruntime.InferenceSession(exported.onnx_bytes,
                                           providers=["CPUExecutionProvider"])
    ort_out = session.run(None, {INPUT_NAME: z})[0].astype(np.float64)
    assert level["max_abs_difference"]["torch_vs_onnxruntime"] == pytest.approx(
        float(np.max(np.abs(torch_out - ort_out))), abs=1e-12)


def test_a_runtime_that_differs_is_refused_naming_the_component(linear):
    spec, sample, prepared, exported = linear
    stepper = ReferenceStepper(spec, exported.onnx_bytes, offset=(0.0, 0.01))
    with pytest.raises(VerificationError,
                       match=r"level stride 1: torch and runtime differ by 0\.01 .* component "
                             r"'v'.*The export was refused\."):
        verify_levels(stepper, {1: prepared}, {1: exported}, spec, sample, Tolerance())


def test_a_runtime_whose_single_state_answer_differs_is_refused(linear):
    spec, sample, prepared, exported = linear
    stepper = ReferenceStepper(spec, exported.onnx_bytes, single_offset=(0.01, 0.0))
    with pytest.raises(VerificationError, match=r"runtime and runtime \(one state\) differ .* "
                                                r"component 'x'"):
        verify_levels(stepper, {1: prepared}, {1: exported}, spec, sample, Tolerance())


def test_a_difference_just_inside_the_tolerance_passes(linear):
    spec, sample, prepared, exported = linear
    # 1e-5 normalised is a tenth of the default relative tolerance 1e-4.
    stepper = ReferenceStepper(spec, exported.onnx_bytes, offset=(1e-5, 0.0))
    report = verify_levels(stepper, {1: prepared}, {1: exported}, spec, sample, Tolerance())
    ratio = report["levels"][0]["max_difference_over_tolerance"]
    assert 0.05 < ratio < 0.2
