"""State files and `--out` of the CLI (stridecast/cli/common.py): every format reads back the
same numbers NumPy wrote (numpy.save / numpy.savetxt / json are the references)."""

from __future__ import annotations

import argparse
import json

import numpy as np
import pytest

from stridecast.cli.common import check_out, read_states, write_states
from stridecast.runtime import StateError

STATES = np.random.default_rng(3).normal(size=(3, 5))


def _arguments(path=None, state=None) -> argparse.Namespace:
    return argparse.Namespace(state_file=None if path is None else str(path), state=state)


@pytest.mark.parametrize("kind", [".npy", ".csv", ".txt", ".json"])
@pytest.mark.parametrize("rows", [1, 3])
def test_state_files_read_back_what_numpy_wrote(tmp_path, kind, rows):
    expected = STATES[0] if rows == 1 else STATES
    path = tmp_path / f"states{kind}"
    if kind == ".npy":
        np.save(path, expected)
    elif kind == ".json":
        path.write_text(json.dumps(expected.tolist()))
    else:
        np.savetxt(path, np.atleast_2d(expected), delimiter="," if kind == ".csv" else " ",
                   fmt="%.17g")
    result = read_states(_arguments(path), 5)
    assert result.shape == expected.shape
    np.testing.assert_array_equal(result, expected)  # %.17g round-trips float64 exactly


@pytest.mark.parametrize("kind", [".csv", ".npy"])
def test_advance_out_files_are_state_files(tmp_path, kind):
    path = tmp_path / f"answer{kind}"
    write_states(path, STATES, [f"u{i}" for i in range(5)])
    if kind == ".csv":
        assert path.read_text().splitlines()[0] == "u0,u1,u2,u3,u4"
    # %.9g in CSV: nine significant digits (float32 precision and more).
    np.testing.assert_allclose(read_states(_arguments(path), 5), STATES, rtol=1e-8)
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary left


@pytest.mark.parametrize(("content", "kind", "message"), [
    (np.zeros((2, 4)), ".npy", r"shape \(2, 4\).*5 components.*\(5,\) or \(batch, 5\)"),
    (np.zeros((2, 3, 5)), ".npy", r"shape \(2, 3, 5\)"),
    ([[1, 2, 3, 4, 5], [1, 2]], ".json", r"could not be read as \.json"),
    ({"state": [1, 2, 3, 4, 5]}, ".json", r"could not be read as \.json|holds"),
    ([1, 2, 3], ".json", r"shape \(3,\)"),
    ("1,2,3,4,5\n1,2,x,4,5\n", ".csv", "row 2 is not a list of numbers"),
    ("1,2,3,4,5\n1,2,3\n", ".csv", "rows have different lengths"),
    ("", ".txt", "no rows of numbers"),
    ("1 2 3 4 5", ".dat", "must end in one of"),
])
def test_bad_state_files_are_named(tmp_path, content, kind, message):
    path = tmp_path / f"states{kind}"
    if kind == ".npy":
        np.save(path, content)
    elif kind == ".json":
        path.write_text(json.dumps(content))
    else:
        path.write_text(content)
    with pytest.raises(StateError, match=message):
        read_states(_arguments(path), 5)


def test_missing_file_and_bad_out_suffix(tmp_path):
    with pytest.raises(StateError, match=r"could not be read as \.npy"):
        read_states(_arguments(tmp_path / "absent.npy"), 5)
    with pytest.raises(StateError, match=r"`--out` 'a.txt' must end in \.csv or \.npy\."):
        check_out("a.txt")


def test_state_option_shape_is_checked_against_the_bundle():
    assert read_states(_arguments(state=["1,2,3,4,5"]), 5).shape == (5,)
    with pytest.raises(StateError, match=r"`--state` holds shape \(2, 3\)"):
        read_states(_arguments(state=["1,2,3", "4,5,6"]), 5)
