"""stridecast.service: the HTTP service (FastAPI) answering advance and forecast requests.

`create_app(models, settings)` builds the app; `serve(paths, ...)` runs it with uvicorn.
"""

from __future__ import annotations

from .app import app_from_environment, create_app
from .errors import ApiError
from .server import serve
from .settings import Settings, get_settings

__all__ = ["ApiError", "Settings", "app_from_environment", "create_app", "get_settings", "serve"]
