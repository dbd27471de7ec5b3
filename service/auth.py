"""Bearer tokens with scopes. Only SHA-256 hashes of tokens are ever configured.

Configuration: SORBRANK_TOKENS_FILE (path to JSON) or SORBRANK_TOKENS (the JSON
itself), a list of {"name": ..., "sha256": <hex of the token>, "scopes": [...]}.
Scopes: submit (POST batches), read (GET results), admin (everything).
A batch's own status and results are readable by the token that submitted it
(by name, so names are unique), with or without the read scope: a rig that
may only submit can follow its own batches (``sorbrank submit --wait``), and
reading other batches or rankings still takes the read scope.
"""
from __future__ import annotations

import hashlib
import hmac
import json
from dataclasses import dataclass
from functools import wraps
from pathlib import Path
from typing import Callable, Mapping

from flask import current_app, g, request

from .problems import Problem

SCOPES = ("submit", "read", "admin")


@dataclass(frozen=True)
class Token:
    name: str
    sha256: str
    scopes: frozenset[str]


def hash_token(secret: str) -> str:
    return hashlib.sha256(secret.encode()).hexdigest()


def parse_tokens(text: str, origin: str) -> list[Token]:
    try:
        entries = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ValueError(f"{origin}: not JSON ({exc})") from None
    if not isinstance(entries, list):
        raise ValueError(f"{origin}: expected a JSON list of tokens")
    tokens = []
    seen: set[str] = set()
    for i, entry in enumerate(entries):
        where = f"{origin}[{i}]"
        if not isinstance(entry, dict):
            raise ValueError(f"{where}: expected an object with name, sha256, scopes")
        name, digest, scopes = entry.get("name"), entry.get("sha256"), entry.get("scopes")
        if not isinstance(name, str) or not name:
            raise ValueError(f"{where}.name: a non-empty string is required")
        if not isinstance(digest, str) or len(digest) != 64 or any(
                c not in "0123456789abcdef" for c in digest.lower()):
            raise ValueError(f"{where}.sha256: 64 hex digits (the SHA-256 of the token) required")
        if not isinstance(scopes, list) or not scopes or any(s not in SCOPES for s in scopes):
            raise ValueError(f"{where}.scopes: a non-empty list drawn from {', '.join(SCOPES)}")
        if name in seen:  # a name identifies a client: its batches, its idempotency keys
            raise ValueError(f"{where}.name: {name!r} is already the name of another token")
        seen.add(name)
        tokens.append(Token(name, digest.lower(), frozenset(scopes)))
    return tokens


def load_tokens(env: Mapping[str, str]) -> list[Token]:
    path, inline = env.get("SORBRANK_TOKENS_FILE"), env.get("SORBRANK_TOKENS")
    if path and inline:
        raise ValueError("set SORBRANK_TOKENS_FILE or SORBRANK_TOKENS, not both")
    if path:
        try:
            return parse_tokens(Path(path).read_text(), f"SORBRANK_TOKENS_FILE {path}")
        except OSError as exc:
            raise ValueError(f"SORBRANK_TOKENS_FILE {path}: {exc.strerror}") from None
    if inline:
        return parse_tokens(inline, "SORBRANK_TOKENS")
    return []


class Authenticator:
    def __init__(self, tokens: list[Token]):
        self.tokens = list(tokens)

    @property
    def open(self) -> bool:
        return not self.tokens

    def identify(self, authorization: str | None) -> Token | None:
        scheme, _, secret = (authorization or "").partition(" ")
        if scheme.lower() != "bearer" or not secret.strip():
            return None
        digest = hash_token(secret.strip())
        found = None
        for token in self.tokens:  # compare with every entry: no early exit to time
            if hmac.compare_digest(digest, token.sha256):
                found = token
        return found


def require(scope: str, owner: Callable[..., str | None] | None = None) -> Callable:
    """View decorator: 401 without a valid bearer token, 403 without ``scope``.

    ``owner(**view_kwargs)``, when given, names the client that owns the
    resource (None if unknown): that client needs no ``scope``."""
    def decorate(view):
        @wraps(view)
        def guarded(*args, **kwargs):
            auth: Authenticator = current_app.extensions["sorbrank"].auth
            if auth.open:
                g.client = "open"
                return view(*args, **kwargs)
            token = auth.identify(request.headers.get("Authorization"))
            if token is None:
                raise Problem(401, "Unauthorized", "a valid bearer token is required "
                              "(header 'Authorization: Bearer <token>')", slug="unauthorized",
                              headers={"WWW-Authenticate": 'Bearer realm="sorbrank"'})
            if scope not in token.scopes and "admin" not in token.scopes and (
                    owner is None or owner(**kwargs) != token.name):
                detail = f"token {token.name!r} lacks the {scope!r} scope"
                if owner is not None:
                    detail += " (without it, only the token that submitted a batch may read it)"
                raise Problem(403, "Forbidden", detail, slug="missing-scope",
                              required_scope=scope)
            g.client = token.name
            return view(*args, **kwargs)
        # read by service/api/params.py: a request refused here hears 401 before any 400
        guarded.required_scope = scope
        return guarded
    return decorate
