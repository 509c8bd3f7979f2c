"""`runtime/samples.py`: the envelope samples `.npy` file, written and read without pickle.

The reference is NumPy's own implementation of its file format (`np.save`, `np.load`,
`numpy.lib.format.write_array`; the format is specified in NEP 1, "A simple file format for
NumPy arrays": magic string, version, header dict with `descr`, `fortran_order`, `shape`).
"""

from __future__ import annotations

import io

import numpy as np
import pytest
from numpy.lib import format as npy

from stridecast.runtime import BundleError
from stridecast.runtime.samples import decode_samples, encode_samples

WHERE = "envelope.samples.file"


def _saved(array: np.ndarray, *, version=None, **options) -> bytes:
    buffer = io.BytesIO()
    if version is None:
        np.save(buffer, array, **options)
    else:
        npy.write_array(buffer, array, version=version)
    return buffer.getvalue()


@pytest.mark.parametrize(("dtype", "stored"), [
    ("<f4", "<f4"), ("<f8", "<f8"), (">f8", "<f8"), ("<i8", "<f8"), ("<i2", "<f4"),
    ("u1", "<f4"),
])
def test_encoded_samples_read_back_with_numpy(dtype, stored):
    values = np.arange(12).reshape(4, 3).astype(dtype)
    loaded = np.load(io.BytesIO(encode_samples(values)), allow_pickle=False)
    assert loaded.dtype.str == stored
    np.testing.assert_array_equal(loaded, values.astype(np.float64))


@pytest.mark.parametrize(("samples", "pattern"), [
    (np.ones((3, 2), bool), "dtype bool"),
    (np.array([["a", "b"]]), "expected real numbers"),
    (np.ones(5), r"shape \(5,\)"),
    (np.ones((0, 2)), r"shape \(0, 2\)"),
    (np.ones((2, 0)), r"shape \(2, 0\)"),
    (np.array([[1.0, np.nan]]), "non-finite"),
    (np.array([[1.0, np.inf]], np.float32), "non-finite"),
])
def test_encode_refuses_what_is_not_a_finite_sample_table(samples, pattern):
    with pytest.raises(BundleError, match=pattern):
        encode_samples(samples)


@pytest.mark.parametrize("dtype", ["<f4", "<f8"])
@pytest.mark.parametrize("version", [None, (1, 0), (2, 0)])
def test_decode_reads_what_numpy_writes(dtype, version):
    values = np.random.default_rng(0).normal(size=(5, 3)).astype(dtype)
    decoded = decode_samples(_saved(values, version=version), count=5, dim=3, where=WHERE)
    assert decoded.dtype.str == dtype
    np.testing.assert_array_equal(decoded, values)
    assert not decoded.flags.writeable  # a view of the file's bytes, never changed in place


def test_decode_round_trips_encode():
    values = np.linspace(-1.0, 1.0, 8).reshape(4, 2)
    decoded = decode_samples(encode_samples(values), count=4, dim=2, where=WHERE)
    np.testing.assert_array_equal(decoded, values)


GOOD = np.arange(6, dtype="<f8").reshape(3, 2)


@pytest.mark.parametrize(("data", "pattern"), [
    (b"not a numpy file at all", "not a readable .npy file"),
    (_saved(GOOD)[:6], "not a readable .npy file"),
    # An object array would need pickle to read: its dtype is refused from the header alone.
    (_saved(np.array([[None, 1]], dtype=object).repeat(3, axis=0), allow_pickle=True),
     "dtype '|O'"),
    (_saved(GOOD.astype(">f8")), "dtype '>f8'"),
    (_saved(GOOD.astype("<i8")), "dtype '<i8'"),
    (_saved(np.asfortranarray(GOOD)), "Fortran order"),
    (_saved(GOOD.T.copy()), r"shape \(2, 3\); the manifest promises \(3, 2\)"),
    (_saved(GOOD)[:-8], "holds 40 bytes of data; shape \\(3, 2\\) of <f8 needs 48"),
    (_saved(GOOD) + b"\x00" * 8, "holds 56 bytes"),
    (_saved(np.where(GOOD == 4.0, np.nan, GOOD)), "non-finite"),
])
def test_decode_refuses_with_the_field_named(data, pattern):
    with pytest.raises(BundleError, match=pattern) as caught:
        decode_samples(data, count=3, dim=2, where=WHERE)
    assert f"`{WHERE}`" in str(caught.value)
