"""Model mistakes the operators detect: each raises a stridecast error whose message names the
operator, the parameter, the value received and what was expected.
"""

from __future__ import annotations

import numpy as np
import pytest

from stridecast.runtime.errors import ModelFormatError, UnsupportedOperatorError
from stridecast.runtime.ops import resolve

X = np.zeros((2, 3, 4), np.float32)


def _i64(*values):
    return np.array(values, dtype=np.int64)


MISTAKES = [
    ("Slice", 13, (X, _i64(0), _i64(1), _i64(0), _i64(0)), {},
     r"Slice `steps` \(0,\) contain 0; expected nonzero steps\."),
    ("Slice", 13, (X, _i64(0, 0), _i64(1)), {},
     r"Slice got 2 starts, 1 ends, 2 axes and 2 steps; expected as many of each\."),
    ("Slice", 13, (X, _i64(0), _i64(1), _i64(3)), {},
     r"Slice `axes` 3 is out of range for an input of rank 3; expected an integer in "
     r"\[-3, 2\]\."),
    ("Slice", 1, (X,), {"starts": (0, 0), "ends": (1, 1), "axes": (1, -2)},
     r"Slice `axes` \(1, -2\) names an axis more than once; expected distinct axes\."),
    ("Reshape", 14, (X, _i64(-1, -1)), {},
     r"Reshape `shape` \(-1, -1\) is invalid; expected sizes ≥ 0 and at most one −1\."),
    ("Reshape", 14, (X, _i64(5, -1)), {},
     r"Reshape cannot give an input of shape \(2, 3, 4\) \(24 elements\) the shape "
     r"\(5, -1\); expected the same number of elements\."),
    ("Reshape", 5, (X, _i64(2, 3, 4, 0)), {},
     r"Reshape `shape` \(2, 3, 4, 0\) copies dimension 3 \(a 0 entry\) from an input of "
     r"rank 3; expected a position < 3\."),
    ("Transpose", 1, (X,), {"perm": (0, 0, 1)},
     r"Transpose `perm` \(0, 0, 1\) is not a permutation of the 3 dimensions of an input "
     r"of shape \(2, 3, 4\)\."),
    ("Squeeze", 13, (X, _i64(1)), {},
     r"Squeeze `axes` \(1,\) include dimension 1 of size 3 in an input of shape "
     r"\(2, 3, 4\); expected size 1\."),
    ("Unsqueeze", 13, (X, _i64(0, -5)), {},
     r"Unsqueeze `axes` \(0, -5\) names an axis more than once; expected distinct axes\."),
    ("Flatten", 1, (X,), {"axis": 4},
     r"Flatten `axis` 4 is out of range for an input of rank 3; expected an integer in "
     r"\[-3, 3\]\."),
    ("Softmax", 13, (X,), {"axis": -4},
     r"Softmax `axis` -4 is out of range for an input of rank 3; expected an integer in "
     r"\[-3, 2\]\."),
    ("Gather", 13, (X, _i64(0, 3)), {"axis": 1},
     r"Gather `indices` range over \[0, 3\] on an axis of size 3; expected values in "
     r"\[-3, 2\]\."),
    ("Expand", 13, (X, _i64(5, 4)), {},
     r"Expand cannot broadcast an input of shape \(2, 3, 4\) with the shape \(5, 4\); "
     r"expected compatible dimensions"),
    ("Cast", 13, (X,), {"to": 8},
     r"Cast `to` 8 \(STRING\) is not supported; expected one of 1 \(FLOAT\), .*11 "
     r"\(DOUBLE\)\."),
    ("Constant", 13, (), {},
     r"Constant has 0 value attributes \[\]; expected exactly one of \["),
    ("Constant", 13, (), {"value_int": 1, "value_float": 2.0},
     r"Constant has 2 value attributes \['value_float', 'value_int'\]; expected exactly "
     r"one of"),
    ("Constant", 13, (), {"value_string": "text"},
     r"Constant `value_string` is not supported; the runtime holds numeric tensors only"),
    ("ConstantOfShape", 9, (_i64(2),), {"value": np.zeros(2, np.float32)},
     r"ConstantOfShape `value` has 2 elements; expected exactly one\."),
    ("ConstantOfShape", 9, (_i64(2, -1),), {},
     r"ConstantOfShape output shape \(2, -1\) has a negative dimension; expected sizes "
     r"≥ 0\."),
    ("ConstantOfShape", 9, (_i64(2**20, 2**20),), {},
     r"ConstantOfShape output shape \(1048576, 1048576\) has 1099511627776 elements; "
     r"expected at most 268435456\."),
    ("Range", 11, (np.array(0), np.array(5), np.array(0)), {},
     r"Range got start 0, limit 5, delta 0; expected finite values and a nonzero delta\."),
    ("Range", 11, (np.array(0.0), np.array(np.inf), np.array(1.0)), {},
     r"Range got start 0.0, limit inf, delta 1.0; expected finite values"),
    ("Gelu", 20, (X,), {"approximate": "erf"},
     r"Gelu `approximate` 'erf' is not supported; expected 'none' or 'tanh'\."),
    ("LayerNormalization", 17, (X, np.ones(4, np.float32)), {"stash_type": 16},
     r"LayerNormalization `stash_type` 16 is not supported; expected 1 \(float32\)\."),
    ("Gemm", 13, (X, X), {},
     r"Gemm inputs have shapes \(2, 3, 4\) and \(2, 3, 4\); expected two matrices "
     r"\(rank 2\)\."),
    ("ReduceSum", 13, (X, _i64(3)), {},
     r"ReduceSum `axes` 3 is out of range for an input of rank 3"),
]


@pytest.mark.parametrize(("op_type", "opset", "inputs", "attributes", "message"), MISTAKES,
                         ids=[f"{mistake[0]}-{index}" for index, mistake in enumerate(MISTAKES)])
def test_model_mistakes_raise_model_format_error(op_type, opset, inputs, attributes, message):
    # Expected messages: the house style (name the thing, the value, what was expected).
    with pytest.raises(ModelFormatError, match=message):
        resolve(op_type, opset)(*inputs, **attributes)


def test_batch_normalization_refuses_training_mode():
    ones = np.ones(3, np.float32)
    with pytest.raises(UnsupportedOperatorError,
                       match=r"BatchNormalization with `training_mode` 1 is not supported; "
                             r"the runtime runs inference only \(expected 0\)\."):
        resolve("BatchNormalization", 15)(X, ones, ones, ones, ones, training_mode=1)


def test_dropout_refuses_training_mode():
    with pytest.raises(UnsupportedOperatorError,
                       match=r"Dropout with `training_mode` true is not supported"):
        resolve("Dropout", 13)(X, np.array(0.5, np.float32), np.array(True))


def test_dropout_training_mode_with_zero_ratio_is_the_identity():
    # The spec: with ratio 0 nothing is dropped, even in training mode.
    output, mask = resolve("Dropout", 13)(X, np.array(0.0, np.float32), np.array(True))
    assert output is X and mask.all()
