"""Bearer-token authentication: every /v1 route needs ``Authorization: Bearer TOKEN``."""

from __future__ import annotations

from flask import g, request

from ..context import services
from ..errors import ApiError


def require_token() -> None:
    header = request.headers.get("Authorization")
    if not header:
        raise ApiError(401, "unauthorized",
                       "an API token is needed: send the header 'Authorization: Bearer TOKEN' "
                       "(make one with: samesource token create --tenant NAME)", "Authorization")
    scheme, _, token = header.strip().partition(" ")
    token = token.strip()
    if scheme.lower() != "bearer" or not token:
        raise ApiError(401, "unauthorized",
                       "the Authorization header must read 'Bearer TOKEN'", "Authorization")
    tenant = services().store.tenant_for_token(token)
    if tenant is None:
        raise ApiError(401, "bad_token", "the API token is not valid (unknown, mistyped or "
                       "revoked); make a new one with: samesource token create --tenant NAME",
                       "Authorization")
    g.tenant = tenant


def tenant_id() -> str:
    return g.tenant["id"]
