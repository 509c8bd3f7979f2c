"""Running the service with uvicorn: what `stridecast serve PATH...` calls."""

from __future__ import annotations

import errno
import json
import logging
import os
import socket
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import uvicorn

from stridecast.runtime.errors import BundleError, StridecastError

from .app import create_app
from .registry import Registry, load_registry, named_sources
from .settings import Settings

logger = logging.getLogger("stridecast.service")

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


class ServeError(StridecastError):
    """`serve` cannot start: nothing to serve, clashing names, or the port is taken."""


def check_models(settings: Settings) -> Registry:
    """Load every model once before the server starts; refuse when none loads or names clash.

    Returns the registry (each model loaded, or failed with its reason): a single-process
    server serves it as is; worker processes load their own copies.
    """
    sources = named_sources(settings.models)
    by_name: dict[str, list[str]] = {}
    for name, description, _ in sources:
        by_name.setdefault(name, []).append(description)
    clashes = {name: places for name, places in by_name.items() if len(places) > 1}
    if clashes:
        lines = "; ".join(f"{name!r} from {' and '.join(places)}"
                          for name, places in clashes.items())
        raise ServeError(f"two bundles would be served under one name: {lines}. A model is "
                         "named after its folder less `.bundle`; rename one folder (e.g. "
                         "`mv crane-demo.bundle my-crane.bundle`).")
    registry = load_registry(sources, dtype=settings.dtype, threads=settings.threads)
    if not registry.served:
        reasons = "; ".join(f"{entry.source}: {entry.error}" for entry in registry.entries)
        raise BundleError(f"no bundle could be loaded, so there is nothing to serve "
                          f"({reasons or 'no bundle given'}).")
    for entry in registry.entries:
        if entry.ready:
            logger.info("serving model %r from %s", entry.name, entry.source)
        else:
            logger.warning("not serving %r from %s: %s", entry.name, entry.source, entry.error)
    return registry


def check_port(host: str, port: int) -> None:
    """Bind `host:port` once, so a port in use fails here with a clear message, not later
    inside the ASGI server with the app half started."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    with socket.socket(family, socket.SOCK_STREAM) as probe:
        # As uvicorn does: a port left in TIME_WAIT by a previous run is free to reuse.
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            probe.bind((host, port))
        except OSError as error:
            if error.errno == errno.EADDRINUSE:
                raise ServeError(f"`port` {port} on {host} is already in use; stop what "
                                 "listens there or choose another with --port.") from error
            raise ServeError(f"cannot listen on {host}:{port}: {error.strerror}.") from error


def serve(paths: Sequence[str | os.PathLike[str]], *, host: str = "127.0.0.1", port: int = 8000,
          workers: int = 1, token_file: str | os.PathLike[str] | None = None,
          log_level: str = "info", settings: Settings | None = None,
          on_ready: Callable[[], None] | None = None, **overrides: Any) -> None:
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
    on_ready : callable, optional
        Called once the checks have passed, just before the server starts (the CLI prints
        its caution there, never on a failed start).

    Raises
    ------
    ServeError
        If the port is in use or two bundles would share a name.
    BundleError
        If no bundle loads (the message gives each one's reason).
    """
    if workers < 1:
        raise ValueError(f"`workers` is {workers}; expected at least 1.")
    final = effective_settings(paths, token_file=token_file, settings=settings, **overrides)
    check_port(host, port)
    if final.grpc_port is not None:
        check_port(final.grpc_host or host, final.grpc_port)
    registry = check_models(final)
    if on_ready is not None:
        on_ready()
    # Let running requests finish (their budget) before a shutdown stops waiting for them.
    grace = int(final.request_timeout) + 5
    common = dict(host=host, port=port, log_level=log_level, timeout_graceful_shutdown=grace)
    if workers == 1:
        # One process: the models checked above are the ones served (loaded once).
        uvicorn.run(create_app(final.models, final, preloaded=registry), **common)
        return
    os.environ.update(environment_for(final))
    uvicorn.run(FACTORY, factory=True, workers=workers, **common)
