"""stridecast.ensemble: forecast many initial states on a Dask cluster into labelled arrays.

Needs the `ensemble` extra (dask[distributed], xarray, zarr, h5netcdf); `import stridecast`
never imports this package, and the runtime stays NumPy-only.
"""

from __future__ import annotations

from .outputs import OutputError
from .run import forecast_ensemble

__all__ = ["OutputError", "forecast_ensemble"]
