"""Matrix products: Gemm (the affine layer PyTorch exports for nn.Linear) and MatMul."""

from __future__ import annotations

import numpy as np

from ..errors import ModelFormatError
from ._common import like
from .registry import register


@register("Gemm", 7)
def Gemm(a, b, c=None, *, alpha=1.0, beta=1.0, transA=0, transB=0):
    """Gemm (opset 7): alpha·A′·B′ + beta·C, A′ and B′ optionally transposed.

    C is optional (from opset 11) and broadcasts unidirectionally to the (M, N) product.

    Parameters
    ----------
    a : ndarray, shape (M, K), or (K, M) if `transA`
    b : ndarray, shape (K, N), or (N, K) if `transB`
    c : ndarray or None
        Broadcastable to (M, N).
    alpha, beta : float
        Scale factors, applied in the inputs' dtype.
    transA, transB : int
        Nonzero to transpose A or B first.

    Returns
    -------
    ndarray, shape (M, N)
    """
    if a.ndim != 2 or b.ndim != 2:
        raise ModelFormatError(
            f"Gemm inputs have shapes {a.shape} and {b.shape}; expected two matrices (rank 2)."
        )
    product = np.matmul(a.T if transA else a, b.T if transB else b)
    # `product` is a fresh array, so scaling and adding in place touch nothing else.
    if alpha != 1:
        product *= like(alpha, product)
    if c is not None and beta != 0:
        # In-place addition refuses a C that would enlarge the product: unidirectional broadcast.
        product += c if beta == 1 else c * like(beta, c)
    return product


@register("MatMul", 1)
def MatMul(a, b):
    """MatMul (opset 1): matrix product with NumPy's (and ONNX's) batching of leading dimensions."""
    return np.matmul(a, b)
