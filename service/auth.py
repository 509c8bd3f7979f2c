"""Optional bearer-token check for the POST routes, compared in constant time."""

from __future__ import annotations

import hmac
from typing import Annotated

from fastapi import Depends
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

from .errors import ApiError
from .settings import Settings, get_settings

# auto_error=False: the scheme documents the header in OpenAPI; the check below decides.
_bearer = HTTPBearer(auto_error=False, description="Needed only when the service has a token.")


def require_token(
    settings: Annotated[Settings, Depends(get_settings)],
    credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)],
) -> None:
    """FastAPI dependency: 401 unless the request carries the configured bearer token."""
    expected = settings.bearer_token()
    if expected is None:
        return
    challenge = {"WWW-Authenticate": 'Bearer realm="stridecast"'}
    if credentials is None:
        raise ApiError(401, "this route needs an `Authorization: Bearer <token>` header.",
                       headers=challenge)
    # compare_digest takes the same time wherever the strings differ.
    if not hmac.compare_digest(credentials.credentials.encode("utf-8"),
                               expected.encode("utf-8")):
        raise ApiError(401, "the bearer token is not valid.", headers=challenge)
