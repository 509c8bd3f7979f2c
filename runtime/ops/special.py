"""The error function and its complement in NumPy alone (Erf and exact Gelu need them).

Vectorised float64 evaluation of the piecewise rational approximations of fdlibm's ``s_erf.c``.

Method and accuracy source. fdlibm 5.3 (Sun Microsystems, 1993), the libm behind FreeBSD, musl
and Go, approximates erf and erfc on four intervals of ``a = |x|``:

* ``[0, 0.84375)``: ``erf(a) = a + a·P(a²)/Q(a²)``, rational error ≤ 2⁻⁵⁷·⁹;
* ``[0.84375, 1.25)``: ``erf(a) = c + P1(s)/Q1(s)`` with ``s = a − 1`` and ``c`` = erf(1)
  rounded to 24 bits, rational error ≤ 2⁻⁵⁹·⁰⁶;
* ``[1.25, 28)``: ``erfc(a) = exp(−a² − 0.5625 + R(1/a²)/S(1/a²)) / a``, with one rational
  fit below ``1/0.35`` and another above, errors ≤ 2⁻⁶²·⁵⁷ and 2⁻⁶¹·⁵²; ``−a²`` is split as
  ``−z² + (z − a)(z + a)`` with ``z`` = ``a`` truncated to 32 significant bits so that the
  large exponent is exact;
* ``[28, ∞)``: erf = 1, erfc = 0 (erfc underflows).

fdlibm documents the result as accurate to less than 1 ulp; our tests measure the vectorised
version against SciPy and ``math.erf`` (float64: within 2 ulp; float32, computed in float64
and rounded once: within 1 ulp).

The coefficients below are taken from fdlibm, whose notice we preserve as its licence asks:
  Copyright (C) 1993 by Sun Microsystems, Inc. All rights reserved.
  Developed at SunPro, a Sun Microsystems, Inc. business.
  Permission to use, copy, modify, and distribute this software is freely granted, provided
  that this notice is preserved.
"""

from __future__ import annotations

import numpy as np

# erf(1) rounded to float32: erf on [0.84375, 1.25) is c + (a small correction), exactly.
_ERF_ONE_ROUNDED = 8.45062911510467529297e-01

# Coefficients in ascending powers. Numerators and denominators of erf(a)/a − 1 on [0, 0.84375).
_SMALL_P = (
    1.28379167095512558561e-01, -3.25042107247001499370e-01, -2.84817495755985104766e-02,
    -5.77027029648944159157e-03, -2.37630166566501626084e-05,
)
_SMALL_Q = (
    1.0, 3.97917223959155352819e-01, 6.50222499887672944485e-02, 5.08130628187576562776e-03,
    1.32494738004321644526e-04, -3.96022827877536812320e-06,
)
# erf(1 + s) − c on [0.84375, 1.25), in s = a − 1.
_MIDDLE_P = (
    -2.36211856075265944077e-03, 4.14856118683748331666e-01, -3.72207876035701323847e-01,
    3.18346619901161753674e-01, -1.10894694282396677476e-01, 3.54783043256182359371e-02,
    -2.16637559486879084300e-03,
)
_MIDDLE_Q = (
    1.0, 1.06420880400844228286e-01, 5.40397917702171048937e-01, 7.18286544141962662868e-02,
    1.26171219808761642112e-01, 1.36370839120290507362e-02, 1.19844998467991074170e-02,
)
# log(a·erfc(a)) + a² + 0.5625 on [1.25, 1/0.35), in t = 1/a².
_NEAR_TAIL_R = (
    -9.86494403484714822705e-03, -6.93858572707181764372e-01, -1.05586262253232909814e01,
    -6.23753324503260060396e01, -1.62396669462573470355e02, -1.84605092906711035994e02,
    -8.12874355063065934246e01, -9.81432934416914548592e00,
)
_NEAR_TAIL_S = (
    1.0, 1.96512716674392571292e01, 1.37657754143519042600e02, 4.34565877475229228821e02,
    6.45387271733267880336e02, 4.29008140027567833386e02, 1.08635005541779435134e02,
    6.57024977031928170135e00, -6.04244152148580987438e-02,
)
# The same function on [1/0.35, 28).
_FAR_TAIL_R = (
    -9.86494292470009928597e-03, -7.99283237680523006574e-01, -1.77579549177547519889e01,
    -1.60636384855821916062e02, -6.37566443368389627722e02, -1.02509513161107724954e03,
    -4.83519191608651397019e02,
)
_FAR_TAIL_S = (
    1.0, 3.03380607434824582924e01, 3.25792512996573918826e02, 1.53672958608443695994e03,
    3.19985821950859553908e03, 2.55305040643316442583e03, 4.74528541206955367215e02,
    -2.24409524465858183362e01,
)
_SMALL_END, _MIDDLE_END, _FAR_TAIL_START = 0.84375, 1.25, 1 / 0.35
# Beyond these, erf(a) rounds to 1 and erfc(a) underflows to 0 in float64.
_ERF_SATURATES, _ERFC_UNDERFLOWS = 6.0, 28.0
# Keeps the high 32 bits of a float64 (sign, exponent, 20 mantissa bits): z² is then exact.
_HIGH_WORD = np.uint64(0xFFFF_FFFF_0000_0000)
# 512 KiB of float64 per block: large enough to amortise call overhead, small enough for L2.
_BLOCK_ELEMENTS = 65_536


def erf(x: np.ndarray) -> np.ndarray:
    """The error function, elementwise, in float64.

    Parameters
    ----------
    x : array_like
        Any real values; converted to float64.

    Returns
    -------
    ndarray of float64, same shape as `x`
        erf(x); ±1 for ±inf, NaN for NaN, and the sign of zero kept.
    """
    return _blockwise(x, _erf_block)


def erfc(x: np.ndarray) -> np.ndarray:
    """The complementary error function 1 − erf(x), elementwise, in float64, without cancellation.

    Parameters
    ----------
    x : array_like
        Any real values; converted to float64.

    Returns
    -------
    ndarray of float64, same shape as `x`
        erfc(x): 2 for −inf, 0 for +inf, NaN for NaN.
    """
    return _blockwise(x, _erfc_block)


def _blockwise(x: np.ndarray, block_function) -> np.ndarray:
    """Apply `block_function` to float64 `x` in blocks that keep the temporaries in cache.

    The piecewise evaluation makes some twenty passes over its data; on blocks of a few
    hundred KiB these run several times faster than on arrays too large for the caches.
    """
    x = np.asarray(x, dtype=np.float64)
    flat = x.reshape(-1)
    result = np.empty_like(flat)
    for start in range(0, flat.size, _BLOCK_ELEMENTS):
        stop = start + _BLOCK_ELEMENTS
        result[start:stop] = block_function(flat[start:stop])
    return result.reshape(x.shape)


def _erf_block(x: np.ndarray) -> np.ndarray:
    return np.copysign(_erf_of_magnitude(np.abs(x), complement=False), x)


def _erfc_block(x: np.ndarray) -> np.ndarray:
    upper_tail = _erf_of_magnitude(np.abs(x), complement=True)
    # erfc(−a) = 2 − erfc(a), and erfc(a) ≤ 1 there, so no digits are lost.
    return np.where(x < 0, 2.0 - upper_tail, upper_tail)


def _erf_of_magnitude(magnitude: np.ndarray, *, complement: bool) -> np.ndarray:
    """erf(a), or erfc(a) if `complement`, for a 1-D float64 block of a ≥ 0 (or NaN).

    Each element is evaluated only on the interval it falls in, so the cost is one rational
    function (and two exponentials in the tail) per element. Integer indices, not boolean
    masks, select the elements: NumPy gathers and scatters with them several times faster.
    """
    end = _ERFC_UNDERFLOWS if complement else _ERF_SATURATES
    result = np.where(np.isnan(magnitude), magnitude, 0.0 if complement else 1.0)

    small = np.flatnonzero(magnitude < _SMALL_END)
    if small.size:
        a = magnitude[small]
        squared = a * a
        ratio = _polynomial(squared, _SMALL_P) / _polynomial(squared, _SMALL_Q)
        if complement:
            # From a = 1/4 on, 0.5 − (a·ratio + (a − 0.5)) keeps the digits 1 − erf(a) loses.
            result[small] = np.where(
                a < 0.25, 1.0 - (a + a * ratio), 0.5 - (a * ratio + (a - 0.5))
            )
        else:
            result[small] = a + a * ratio

    middle = np.flatnonzero((magnitude >= _SMALL_END) & (magnitude < _MIDDLE_END))
    if middle.size:
        shifted = magnitude[middle] - 1.0
        ratio = _polynomial(shifted, _MIDDLE_P) / _polynomial(shifted, _MIDDLE_Q)
        if complement:
            result[middle] = (1.0 - _ERF_ONE_ROUNDED) - ratio
        else:
            result[middle] = _ERF_ONE_ROUNDED + ratio

    tail = np.flatnonzero((magnitude >= _MIDDLE_END) & (magnitude < end))
    if tail.size:
        upper_tail = _erfc_tail(magnitude[tail])
        result[tail] = upper_tail if complement else 1.0 - upper_tail
    return result


def _erfc_tail(a: np.ndarray) -> np.ndarray:
    """erfc(a) for a 1-D contiguous float64 array of a in [1.25, 28)."""
    inverse_square = 1.0 / (a * a)
    correction = np.empty_like(a)
    near = a < _FAR_TAIL_START
    for indices, numerator, denominator in (
        (np.flatnonzero(near), _NEAR_TAIL_R, _NEAR_TAIL_S),
        (np.flatnonzero(~near), _FAR_TAIL_R, _FAR_TAIL_S),
    ):
        if indices.size:
            t = inverse_square[indices]
            correction[indices] = _polynomial(t, numerator) / _polynomial(t, denominator)
    truncated = (a.view(np.uint64) & _HIGH_WORD).view(np.float64)
    # exp(−a²) = exp(−z²)·exp((z − a)(z + a)); the first factor has an exact argument.
    return (
        np.exp(-truncated * truncated - 0.5625)
        * np.exp((truncated - a) * (truncated + a) + correction)
        / a
    )


def _polynomial(t: np.ndarray, coefficients: tuple[float, ...]) -> np.ndarray:
    """Horner evaluation of Σ coefficients[k]·t^k."""
    result = np.full_like(t, coefficients[-1])
    for coefficient in reversed(coefficients[:-1]):
        result *= t
        result += coefficient
    return result
