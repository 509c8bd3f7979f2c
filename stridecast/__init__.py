"""stridecast: deploy learned multi-scale flow-map time-steppers.

The umbrella imports nothing heavy; `stridecast.runtime` needs only NumPy, while
`stridecast.export` (torch, onnx) and `stridecast.service` (FastAPI) are imported on demand.
"""

from __future__ import annotations

from pathlib import Path

__version__ = "0.1.0"

__all__ = ["__version__", "demo_bundle"]

# The one place that knows where the shipped crane bundle lies (package data).
_DEMO_BUNDLE = Path(__file__).resolve().parent / "data" / "crane-shipped.bundle"


def demo_bundle(*, must_exist: bool = True) -> Path:
    """The path of the small pre-trained crane bundle shipped inside the package.

    Light to call: it imports nothing beyond the standard library. Pass the path to
    `stridecast.runtime.load`, `stridecast serve` or any command taking a bundle.

    Parameters
    ----------
    must_exist : bool
        Check that the bundle's ``manifest.json`` is present (default); False returns the
        location even when absent (``python -m stridecast.demo --ship`` writes it there).

    Raises
    ------
    FileNotFoundError
        If `must_exist` and the installation lacks the bundle.
    """
    if must_exist and not (_DEMO_BUNDLE / "manifest.json").is_file():
        raise FileNotFoundError(
            f"the shipped demo bundle is missing at {_DEMO_BUNDLE}; expected it in the "
            "installed package (regenerate it with `python -m stridecast.demo --ship`)."
        )
    return _DEMO_BUNDLE
