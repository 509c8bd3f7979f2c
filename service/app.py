"""The app factory: routers, error handlers, metrics, and a lifespan that loads the models."""

from __future__ import annotations

import logging
from collections.abc import AsyncIterator, Iterable, Mapping
from contextlib import asynccontextmanager
from functools import partial

import anyio
from fastapi import FastAPI

from stridecast import __version__

from . import routes_health, routes_v1, routes_v2
from .errors import install_error_handlers
from .execution import Gate
from .metrics import Metrics, MetricsMiddleware
from .openapi import install_openapi
from .registry import ModelSource, Registry, load_registry, named_sources
from .settings import Settings

logger = logging.getLogger("stridecast.service")

DESCRIPTION = """Learned multi-scale flow-map time-steppers over HTTP.

Bodies are JSON or MessagePack (`Content-Type`); answers follow `Accept` (JSON by default).
POST routes need `Authorization: Bearer <token>` when the service has a token.
See docs/http-api.md."""


def create_app(models: Mapping[str, ModelSource] | Iterable[ModelSource] = (),
               settings: Settings | None = None, *, preloaded: Registry | None = None
               ) -> FastAPI:
    """Build the HTTP app serving `models`.

    Parameters
    ----------
    models : mapping of name to source, or iterable of sources
        A source is a bundle directory, a folder of bundle directories (iterable form; each
        model is named after its folder), or an already-loaded `stridecast.runtime.Stepper`
        (named by the mapping key, else by its manifest name).
    settings : Settings, optional
        Limits and token; by default read from `STRIDECAST_*` environment variables.
    preloaded : Registry, optional
        The models already loaded from these sources (`serve` loads them once to check them
        before starting); the lifespan then serves it instead of loading every bundle again.

    Returns
    -------
    FastAPI
        Its lifespan loads and verifies every bundle once before the app serves requests;
        bundles that fail are reported by `/v1/models` and not served.
    """
    settings = settings if settings is not None else Settings()
    sources = named_sources(models)
    metrics = Metrics()

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        registry = preloaded
        if registry is None:
            registry = await anyio.to_thread.run_sync(
                partial(load_registry, sources, dtype=settings.dtype, threads=settings.threads))
        app.state.registry = registry
        metrics.models_loaded.labels("served").set(len(registry.served))
        metrics.models_loaded.labels("failed").set(len(registry.entries) - len(registry.served))
        logger.info("serving %d of %d models", len(registry.served), len(registry.entries))
        async with anyio.create_task_group() as task_group:
            app.state.gate = Gate(task_group, max_running=settings.max_concurrency,
                                  max_waiting=settings.max_waiting)
            grpc_server = await _start_grpc(app, settings)
            try:
                yield
            finally:
                if grpc_server is not None:
                    await grpc_server.stop(grace=settings.request_timeout)
                app.state.gate = None
                task_group.cancel_scope.cancel()

    app = FastAPI(title="stridecast", version=__version__, description=DESCRIPTION,
                  lifespan=lifespan)
    app.state.settings = settings
    app.state.registry = Registry()  # not loaded until the lifespan runs
    app.state.metrics = metrics
    app.state.gate = None
    install_error_handlers(app)
    app.include_router(routes_health.router)
    app.include_router(routes_v1.router)
    app.include_router(routes_v2.router)
    app.add_middleware(MetricsMiddleware, metrics=metrics,
                       known_model=lambda name: app.state.registry.get(name) is not None)
    install_openapi(app)
    return app


async def _start_grpc(app: FastAPI, settings: Settings):
    """Start the gRPC server when `settings.grpc_port` asks for one; its port goes to
    `app.state.grpc_port`."""
    app.state.grpc_port = None
    if settings.grpc_port is None:
        return None
    try:
        from .grpc_server import build_server
    except ImportError as error:
        raise RuntimeError("`grpc_port` is set but gRPC is not installed; install it with "
                           "`pip install 'stridecast[grpc]'`.") from error
    server, port = build_server(app, host=settings.grpc_host, port=settings.grpc_port)
    await server.start()
    app.state.grpc_port = port
    logger.info("open inference protocol over gRPC on %s:%d", settings.grpc_host, port)
    return server


def app_from_environment() -> FastAPI:
    """App factory for `uvicorn --factory`: models and settings from `STRIDECAST_*` variables."""
    settings = Settings()
    return create_app(settings.models, settings)
