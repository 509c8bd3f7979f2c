"""stridecast: deploy learned multi-scale flow-map time-steppers.

The umbrella imports nothing heavy; `stridecast.runtime` needs only NumPy, while
`stridecast.export` (torch, onnx) and `stridecast.service` (FastAPI) are imported on demand.
"""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__"]
