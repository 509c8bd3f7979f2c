"""The exception hierarchy (runtime/errors.py): one root, bad input also a `ValueError`.

What is checked is Python's own class machinery (`issubclass`, `except` clauses, the method
resolution order) against the contract the module's docstrings state; a class that lost a base
would let callers' `except ValueError` or `except StridecastError` miss it.
"""

from __future__ import annotations

import inspect
import pickle
import warnings

import pytest

import stridecast.runtime as runtime_package
from stridecast.runtime import errors

ERRORS = [value for _, value in inspect.getmembers(errors, inspect.isclass)
          if value.__module__ == errors.__name__ and issubclass(value, Exception)
          and not issubclass(value, Warning)]
# Everything caused by bad input (all but the root): documented as also being ValueError.
INPUT_ERRORS = [error for error in ERRORS if error is not errors.StridecastError]


def test_the_module_defines_the_documented_classes():
    assert {error.__name__ for error in ERRORS} == {
        "StridecastError", "BundleError", "ModelFormatError", "UnsupportedOperatorError",
        "StateError", "TimeError", "OptionError", "NonFiniteError", "ExtrapolationError"}


@pytest.mark.parametrize("error", ERRORS, ids=lambda error: error.__name__)
def test_every_error_is_a_stridecast_error(error):
    assert issubclass(error, errors.StridecastError)
    with pytest.raises(errors.StridecastError, match=r"^`x` is 3; expected 4\.$"):
        raise error("`x` is 3; expected 4.")


@pytest.mark.parametrize("error", INPUT_ERRORS, ids=lambda error: error.__name__)
def test_input_errors_are_caught_by_except_value_error(error):
    try:
        raise error("bad")
    except ValueError as caught:  # what callers that predate the hierarchy write
        assert type(caught) is error and str(caught) == "bad"


def test_the_root_is_a_plain_exception_not_a_value_error():
    assert not issubclass(errors.StridecastError, ValueError)
    assert errors.StridecastError.__bases__ == (Exception,)


@pytest.mark.parametrize(("child", "parent"), [
    (errors.UnsupportedOperatorError, errors.ModelFormatError),
    (errors.NonFiniteError, errors.StateError),
])
def test_refinements_are_caught_by_their_parent(child, parent):
    with pytest.raises(parent):
        raise child("x")


@pytest.mark.parametrize(("one", "other"), [
    (errors.TimeError, errors.OptionError), (errors.StateError, errors.TimeError),
    (errors.BundleError, errors.ModelFormatError), (errors.OptionError, errors.StateError),
])
def test_siblings_are_distinct(one, other):
    # A time fault is not an option fault (issue 15): neither catches the other.
    assert not issubclass(one, other) and not issubclass(other, one)


def test_chained_causes_are_kept():
    with pytest.raises(errors.BundleError) as caught:
        try:
            raise OSError("disk")
        except OSError as cause:
            raise errors.BundleError("`manifest.json` could not be read.") from cause
    assert isinstance(caught.value.__cause__, OSError)


@pytest.mark.parametrize("error", ERRORS, ids=lambda error: error.__name__)
def test_errors_survive_pickling_with_their_message(error):
    # Process pools (the ensemble's workers) send exceptions back pickled.
    copy = pickle.loads(pickle.dumps(error("`t` is -1; expected t ≥ 0.")))
    assert type(copy) is error and str(copy) == "`t` is -1; expected t ≥ 0."


def test_the_extrapolation_warning_is_a_user_warning_not_an_error():
    assert issubclass(errors.ExtrapolationWarning, UserWarning)
    assert not issubclass(errors.ExtrapolationWarning, errors.StridecastError)
    with warnings.catch_warnings():
        warnings.simplefilter("error", errors.ExtrapolationWarning)
        with pytest.raises(errors.ExtrapolationWarning, match="beyond"):
            warnings.warn("t = 9 s is beyond the validated horizon.",
                          errors.ExtrapolationWarning, stacklevel=1)


def test_the_package_exports_the_same_classes():
    for error in [*ERRORS, errors.ExtrapolationWarning]:
        assert getattr(runtime_package, error.__name__) is error
        assert error.__name__ in runtime_package.__all__
