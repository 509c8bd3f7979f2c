"""The envelope samples file (`.npy`, NumPy's own format): encode, and decode with checks.

Decoding reads the header first and checks dtype, shape and byte count against the manifest
before any array is built; nothing is ever unpickled.
"""

from __future__ import annotations

import io

import numpy as np

from .errors import BundleError

SAMPLE_DTYPES = ("<f4", "<f8")


def encode_samples(samples: np.ndarray) -> bytes:
    """The `.npy` bytes of normalised training states, for `write_bundle(extra_files=...)`.

    Parameters
    ----------
    samples : array_like, shape (count, d)
        Finite float32 or float64 values (other real dtypes are converted to float64).

    Returns
    -------
    bytes
    """
    array = np.asarray(samples)
    if array.dtype.kind not in "fiu" or array.dtype == np.bool_:
        raise BundleError(f"`samples` has dtype {array.dtype}; expected real numbers.")
    if array.ndim != 2 or array.shape[0] == 0 or array.shape[1] == 0:
        raise BundleError(f"`samples` has shape {array.shape}; expected (count, d), count ≥ 1.")
    if array.dtype.str not in SAMPLE_DTYPES:
        array = array.astype("<f8" if array.dtype.itemsize > 4 else "<f4")
    if not np.isfinite(array).all():
        raise BundleError("`samples` holds non-finite values; expected finite numbers.")
    buffer = io.BytesIO()
    np.save(buffer, np.ascontiguousarray(array), allow_pickle=False)
    return buffer.getvalue()


def decode_samples(data: bytes, *, count: int, dim: int, where: str) -> np.ndarray:
    """Parse `.npy` bytes into a read-only (count, dim) array, checking the header first.

    Parameters
    ----------
    data : bytes
        The file's content.
    count, dim : int
        The shape the manifest promises.
    where : str
        The manifest field naming the file, for messages.

    Raises
    ------
    BundleError
        If the file is not a `.npy` file, its dtype is not little-endian float32/float64, it
        is in Fortran order, its shape is not (count, dim), its size does not match, or it
        holds non-finite values.
    """
    from numpy.lib import format as npy  # only readers of bundles with samples need it

    handle = io.BytesIO(data)
    try:
        version = npy.read_magic(handle)
        if version == (1, 0):
            shape, fortran_order, dtype = npy.read_array_header_1_0(handle)
        elif version == (2, 0):
            shape, fortran_order, dtype = npy.read_array_header_2_0(handle)
        else:
            raise ValueError(f"format version {version} is not 1.0 or 2.0")
    except (ValueError, SyntaxError, TypeError) as error:
        raise BundleError(f"`{where}` is not a readable .npy file: {error}.") from error
    if dtype.str not in SAMPLE_DTYPES:
        raise BundleError(
            f"`{where}` holds dtype {dtype.str!r}; expected one of {list(SAMPLE_DTYPES)}."
        )
    if fortran_order:
        raise BundleError(f"`{where}` is stored in Fortran order; expected C order.")
    if tuple(shape) != (count, dim):
        raise BundleError(
            f"`{where}` has shape {tuple(shape)}; the manifest promises ({count}, {dim}) "
            "(`envelope.samples.count` rows of the state's components)."
        )
    offset = handle.tell()
    expected = count * dim * dtype.itemsize
    if len(data) - offset != expected:
        raise BundleError(
            f"`{where}` holds {len(data) - offset} bytes of data; shape ({count}, {dim}) of "
            f"{dtype.str} needs {expected}."
        )
    array = np.frombuffer(data, dtype=dtype, count=count * dim, offset=offset)
    if not np.isfinite(array).all():
        raise BundleError(f"`{where}` holds non-finite values; expected finite states.")
    return array.reshape(count, dim)
