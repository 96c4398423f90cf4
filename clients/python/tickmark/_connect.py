"""Channels and tokens shared by the client classes (not part of the API)."""

from __future__ import annotations

import ipaddress
import os
from typing import Optional

import grpc

TOKEN_ENV = "TICKMARK_TOKEN"


def read_token(token: Optional[str] = None, token_file: Optional[str] = None) -> str:
    """The token from `token`, else `token_file`, else $TICKMARK_TOKEN."""
    if token:
        return token.strip()
    if token_file:
        with open(token_file, encoding="utf-8") as f:
            value = f.read().strip()
        if not value or "\n" in value:
            raise ValueError(f"{token_file}: expected one token on one line")
        return value
    value = os.environ.get(TOKEN_ENV, "").strip()
    if not value:
        raise ValueError(f"no token: pass token= or token_file=, or set ${TOKEN_ENV}")
    return value


def _is_loopback(target: str) -> bool:
    host = target
    if host.startswith("dns:///"):
        host = host[len("dns:///"):]
    if host.startswith("unix:"):
        return True
    if host.startswith("["):
        host = host[1:host.index("]")]
    elif host.count(":") == 1:
        host = host.rsplit(":", 1)[0]
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def open_channel(target: str, ca_file: Optional[str] = None, insecure: bool = False) -> grpc.Channel:
    """Plaintext on loopback (or when insecure); TLS otherwise (docs/architecture.md §7)."""
    if ca_file:
        with open(ca_file, "rb") as f:
            creds = grpc.ssl_channel_credentials(root_certificates=f.read())
        return grpc.secure_channel(target, creds)
    if insecure or _is_loopback(target):
        return grpc.insecure_channel(target)
    return grpc.secure_channel(target, grpc.ssl_channel_credentials())


# Several server instances on one database (docs/architecture.md, "More than
# one machine"): a stream refused or ended UNAVAILABLE because another
# instance owns the session names the owner's host:port in this trailing
# metadata key; clients send the session id in SESSION_METADATA once known,
# so a load balancer can route by it.
OWNER_METADATA = "tickmark-owner"
SESSION_METADATA = "tickmark-session"


def owner_of(error) -> Optional[str]:
    """The owner address an RpcError's trailing metadata names, if any."""
    try:
        trailers = error.trailing_metadata() or ()
    except Exception:  # not a call error
        return None
    for key, value in trailers:
        if key == OWNER_METADATA and value:
            return value.decode() if isinstance(value, bytes) else value
    return None
