"""Service settings: limits, concurrency and the optional bearer token.

Read from environment variables with the prefix `STRIDECAST_` (e.g. `STRIDECAST_MAX_BATCH`),
or passed explicitly to `create_app`; handlers receive them through the `get_settings` dependency.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Literal

from fastapi import Request
from pydantic import Field, PrivateAttr, SecretStr, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

from stridecast.runtime.validation import DTYPES

# design.md §6.
DEFAULT_MAX_BODY_BYTES = 4 * 1024 * 1024
DEFAULT_MAX_BATCH = 4096
DEFAULT_MAX_FORECAST_POINTS = 100_000
DEFAULT_REQUEST_TIMEOUT = 10.0
# Not in design.md: times x batch x d numbers in one forecast answer (about 40 MB of JSON).
DEFAULT_MAX_FORECAST_VALUES = 2_000_000
# A token longer than this is surely a wrong file, not a secret.
MAX_TOKEN_BYTES = 4096


def _cpu_count() -> int:
    # Prefer the CPUs this process may run on (containers, taskset) over the machine's.
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


class Settings(BaseSettings):
    """Everything the HTTP service lets an operator tune.

    Attributes
    ----------
    models : list of str
        Bundle paths (or folders of bundles) for `app_from_environment`; `create_app` takes
        its models as an argument instead.
    dtype : {"float32", "float64"}
        Arithmetic of the steppers loaded from paths.
    max_body_bytes, max_batch, max_forecast_points, max_forecast_values : int
        Request limits; larger requests get 413 (body) or 422. `max_forecast_values` bounds
        the numbers in one forecast answer (times x batch x d).
    max_abs_value : float, optional
        Largest magnitude of a state component (422 beyond). None: whatever the model's dtype
        holds. A bound keeps a model's arithmetic from overflowing (an overflowing answer is a
        422 the OpenAPI document cannot foresee); the document states the bound.
    max_coarse_steps : int, optional
        Evaluations of a model's coarsest level one answer may take; sets each model's longest
        accepted time (this x largest stride x base step; 422 beyond). None: a quarter of the
        runtime's per-query budget (250,000). Lower it so that the longest time fits in
        `request_timeout`.
    request_timeout : float
        Wall-time budget of one request in seconds, queueing included; 504 when exceeded.
    max_concurrency : int
        Computations running at once (default: the CPUs available to the process).
    threads : int
        Threads one computation splits a large batch over (`stridecast.runtime.load`'s
        `threads`), per worker process. Default 1: concurrent requests already use the cores;
        BLAS runs single-threaded around large batches either way.
    max_waiting : int
        Requests allowed to queue for a computation slot; one more gets 503 at once.
    max_depth : int
        Deepest nesting of arrays and objects accepted in a request body.
    token, token_file :
        Bearer token required on every POST route and on gRPC ModelInfer (`STRIDECAST_TOKEN`,
        or the first line of the file). None of both: no authentication.
    grpc_port : int, optional
        Also serve the open inference protocol over gRPC on this port (needs the `grpc`
        extra); 0 picks a free port. None: no gRPC.
    grpc_host : str
        Where the gRPC server listens.
    """

    model_config = SettingsConfigDict(env_prefix="STRIDECAST_", frozen=True, extra="forbid")

    models: list[str] = Field(default_factory=list)
    dtype: Literal[DTYPES] = "float32"  # the runtime's list, unpacked by Literal
    max_body_bytes: int = Field(DEFAULT_MAX_BODY_BYTES, ge=64)
    max_batch: int = Field(DEFAULT_MAX_BATCH, ge=1)
    max_forecast_points: int = Field(DEFAULT_MAX_FORECAST_POINTS, ge=1)
    max_forecast_values: int = Field(DEFAULT_MAX_FORECAST_VALUES, ge=1)
    max_abs_value: float | None = Field(None, gt=0, allow_inf_nan=False)
    max_coarse_steps: int | None = Field(None, ge=1)
    request_timeout: float = Field(DEFAULT_REQUEST_TIMEOUT, gt=0, allow_inf_nan=False)
    max_concurrency: int = Field(default_factory=_cpu_count, ge=1)
    max_waiting: int = Field(64, ge=0)
    max_depth: int = Field(32, ge=2, le=256)
    threads: int = Field(1, ge=1)
    token: SecretStr | None = None
    token_file: Path | None = None
    grpc_port: int | None = Field(None, ge=0, le=65535)
    grpc_host: str = "127.0.0.1"

    _file_token: SecretStr | None = PrivateAttr(default=None)

    @model_validator(mode="after")
    def _read_token_file(self) -> Settings:
        # Read once, here, so a missing or empty token file stops the service at start.
        if self.token_file is not None:
            self._file_token = SecretStr(read_token_file(self.token_file))
        return self

    def bearer_token(self) -> str | None:
        """The token POST requests must carry, or None when authentication is off."""
        if self._file_token is not None:
            return self._file_token.get_secret_value()
        if self.token is not None and self.token.get_secret_value():
            return self.token.get_secret_value()
        return None


def read_token_file(path: Path) -> str:
    """Return the first line of `path`, stripped; raise `ValueError` if there is none."""
    try:
        with open(path, "rb") as handle:
            data = handle.read(MAX_TOKEN_BYTES + 1)
    except OSError as error:
        raise ValueError(f"`token_file` {str(path)!r} cannot be read: {error}.") from error
    if len(data) > MAX_TOKEN_BYTES:
        raise ValueError(
            f"`token_file` {str(path)!r} is larger than {MAX_TOKEN_BYTES} bytes; expected a "
            "file holding one token."
        )
    try:
        lines = data.decode("utf-8").strip().splitlines()
    except UnicodeDecodeError as error:
        raise ValueError(f"`token_file` {str(path)!r} is not UTF-8 text.") from error
    token = lines[0].strip() if lines else ""
    if not token:
        raise ValueError(f"`token_file` {str(path)!r} is empty; expected a token.")
    return token


def get_settings(request: Request) -> Settings:
    """FastAPI dependency: the settings of the app serving `request` (override in tests)."""
    return request.app.state.settings
