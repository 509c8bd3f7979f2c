"""The exporter's errors (export/errors.py) join the runtime's hierarchy.

Checked with Python's class machinery, and through `check_reduce`, a small public function
that raises `TrainingError` for an out-of-range setting.
"""

from __future__ import annotations

import pytest

from stridecast.export import TrainingError, VerificationError, errors
from stridecast.export.pod import check_reduce
from stridecast.runtime import StridecastError


def test_both_errors_are_stridecast_errors():
    for error in (TrainingError, VerificationError):
        assert issubclass(error, StridecastError)
        with pytest.raises(StridecastError):
            raise error("x")
    assert errors.TrainingError is TrainingError and errors.VerificationError is VerificationError


def test_a_bad_setting_is_a_value_error_and_a_verification_failure_is_not():
    # A training setting is bad input (also ValueError); a mismatch after export is not.
    assert issubclass(TrainingError, ValueError)
    assert not issubclass(VerificationError, ValueError)


@pytest.mark.parametrize("reduce", [0, 4, 1.0, 0.0, True, "2"])
def test_training_errors_name_the_setting_and_what_was_expected(reduce):
    with pytest.raises(TrainingError, match=rf"^`reduce` is {reduce!r}; expected a number of "
                                            r"modes 1 ≤ r < 4 .*energy fraction in \(0, 1\)\.$"):
        check_reduce(reduce, 4)
    with pytest.raises(ValueError):  # callers that catch ValueError still do
        check_reduce(reduce, 4)
