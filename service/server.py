"""Running the service with uvicorn: what `stridecast serve PATH...` calls."""

from __future__ import annotations

import json
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import uvicorn

from .app import create_app
from .settings import Settings

FACTORY = "stridecast.service.app:app_from_environment"


def effective_settings(paths: Sequence[str | os.PathLike[str]], *,
                       token_file: str | os.PathLike[str] | None = None,
                       settings: Settings | None = None, **overrides: Any) -> Settings:
    """Settings for `serve`: `settings` (default: from the environment) with the given paths,
    token file and overrides; validated anew, so a token file is read here."""
    values = (settings if settings is not None else Settings()).model_dump()
    values.update(overrides)
    values["models"] = [str(path) for path in paths]
    if token_file is not None:
        values["token_file"] = Path(token_file)
    return Settings(**values)


def environment_for(settings: Settings) -> dict[str, str]:
    """`STRIDECAST_*` variables from which worker processes rebuild `settings`.

    The token itself is not copied: it is either in the environment already
    (`STRIDECAST_TOKEN`) or read by each worker from `token_file`.
    """
    variables = {}
    for name, value in settings.model_dump(exclude={"token"}).items():
        if value is None:
            continue
        text = json.dumps(value) if isinstance(value, list) else str(value)
        variables[f"STRIDECAST_{name.upper()}"] = text
    return variables


def serve(paths: Sequence[str | os.PathLike[str]], *, host: str = "127.0.0.1", port: int = 8000,
          workers: int = 1, token_file: str | os.PathLike[str] | None = None,
          log_level: str = "info", settings: Settings | None = None, **overrides: Any) -> None:
    """Serve the bundles at `paths` over HTTP until interrupted.

    Parameters
    ----------
    paths : sequence of paths
        Bundles, or folders of bundles; each model is named after its bundle folder.
    host, port : str, int
        Where to listen (loopback by default).
    workers : int
        Worker processes; each loads every bundle. With more than one, the settings travel
        to the workers as `STRIDECAST_*` environment variables.
    token_file : path, optional
        File whose first line is the bearer token POST routes require (else
        `STRIDECAST_TOKEN`, else no authentication).
    log_level : str
        uvicorn's log level.
    settings : Settings, optional
        Base settings (default: from the environment); `overrides` are field values on top,
        e.g. ``max_batch=256``.
    """
    if workers < 1:
        raise ValueError(f"`workers` is {workers}; expected at least 1.")
    final = effective_settings(paths, token_file=token_file, settings=settings, **overrides)
    # Let running requests finish (their budget) before a shutdown stops waiting for them.
    grace = int(final.request_timeout) + 5
    common = dict(host=host, port=port, log_level=log_level, timeout_graceful_shutdown=grace)
    if workers == 1:
        uvicorn.run(create_app(final.models, final), **common)
        return
    os.environ.update(environment_for(final))
    uvicorn.run(FACTORY, factory=True, workers=workers, **common)
