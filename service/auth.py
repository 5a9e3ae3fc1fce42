"""API keys with scopes, stored only as salted HMAC-SHA256 digests.

A key reads ``msk.<id>.<secret>``: the id finds the entry, the secret is checked
in constant time against ``HMAC(salt, secret)``. Keys are random 256-bit tokens,
so a fast keyed hash is the right primitive (a slow password KDF would only add
latency to every request). The keys file is JSON::

    {"keys": [{"id": "pipeline", "salt": "<hex>", "digest": "<hex>",
               "scopes": ["score", "fit"]}]}

Scopes: ``score`` (read and score), ``fit`` (import versions, fit jobs, datasets),
``metrics`` (read /metrics when MIXSCORE_METRICS_ACCESS is ``key``), ``admin`` (promote,
delete; implies the others).
"""

from __future__ import annotations

import hashlib
import hmac
import json
import logging
import os
import secrets
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .errors import Forbidden, Unauthorized
from .settings import Settings, SettingsError

log = logging.getLogger("mixscore.auth")
SCOPES = ("score", "fit", "metrics", "admin")
TOKEN_PREFIX = "msk"


@dataclass(frozen=True)
class ApiKey:
    id: str
    salt: bytes
    digest: bytes
    scopes: frozenset[str]

    def allows(self, scope: str) -> bool:
        return scope in self.scopes or "admin" in self.scopes

    def to_json(self) -> dict[str, Any]:
        return {"id": self.id, "salt": self.salt.hex(), "digest": self.digest.hex(),
                "scopes": sorted(self.scopes)}


def _digest(salt: bytes, secret: str) -> bytes:
    return hmac.new(salt, secret.encode(), hashlib.sha256).digest()


def new_key(key_id: str, scopes: list[str]) -> tuple[str, ApiKey]:
    """A fresh token (shown once) and the entry to store for it."""
    unknown = set(scopes) - set(SCOPES)
    if unknown or not scopes:
        raise ValueError(f"scopes must be among {', '.join(SCOPES)}; got {scopes}")
    if not key_id.replace("-", "").replace("_", "").isalnum():
        raise ValueError(f"key id must be letters, digits, '-' and '_'; got {key_id!r}")
    secret = secrets.token_urlsafe(32)
    salt = secrets.token_bytes(16)
    return f"{TOKEN_PREFIX}.{key_id}.{secret}", ApiKey(key_id, salt, _digest(salt, secret),
                                                        frozenset(scopes))


class KeyRing:
    """The configured keys. A ring that starts empty leaves the service open (and
    loopback-only) until keys are added; one read from a file follows the file: a change
    is picked up within ``RELOAD_CHECK_S``, so keys rotate without a restart. A file that
    cannot be read or parsed (missing, truncated, half written) leaves the keys in force;
    a valid file with no keys, once keys were in force, shuts everyone out rather than
    opening the service."""

    RELOAD_CHECK_S = 1.0

    def __init__(self, keys: list[ApiKey], source: Path | None = None) -> None:
        self._keys = {key.id: key for key in keys}
        self._open = not keys
        self._source = source
        self._stamp = _stamp(source) if source else None
        self._next_check = time.monotonic() + self.RELOAD_CHECK_S

    @property
    def empty(self) -> bool:
        return not self._keys

    @classmethod
    def from_settings(cls, settings: Settings) -> KeyRing:
        if settings.api_keys:
            return cls(_parse(settings.api_keys, "MIXSCORE_API_KEYS"))
        if settings.api_keys_file:
            path = Path(settings.api_keys_file)
            try:
                text = path.read_text()
            except OSError as error:
                raise SettingsError(
                    f"MIXSCORE_API_KEYS_FILE: cannot read {path}: {error}") from None
            return cls(_parse(text, "MIXSCORE_API_KEYS_FILE"), path)
        return cls([])

    def check(self, authorization: str | None, scope: str) -> ApiKey | None:
        """The caller's key (None while the service is open); 401 for a missing or
        unknown key, 403 for a key without the scope."""
        if self._source is not None and time.monotonic() >= self._next_check:
            self._reload()
        if not self._keys and self._open:
            return None
        if not authorization or not authorization.startswith("Bearer "):
            raise Unauthorized("send an API key as 'Authorization: Bearer <key>'")
        parts = authorization[7:].strip().split(".", 2)
        key = self._keys.get(parts[1]) if len(parts) == 3 and parts[0] == TOKEN_PREFIX else None
        if key is None or not hmac.compare_digest(key.digest, _digest(key.salt, parts[2])):
            raise Unauthorized("the API key is not valid")
        if not key.allows(scope):
            raise Forbidden(f"the API key {key.id!r} lacks the {scope!r} scope")
        return key

    def _reload(self) -> None:
        """Read the file again if it changed; a file that cannot be read or parsed
        leaves the keys as they were, and says so in the log."""
        assert self._source is not None
        self._next_check = time.monotonic() + self.RELOAD_CHECK_S
        stamp = _stamp(self._source)
        if stamp == self._stamp:
            return
        try:
            keys = _parse(self._source.read_text(), str(self._source))
        except (OSError, SettingsError) as error:
            log.error("API keys not reloaded, the previous ones stay: %s", error)
            return
        self._stamp = stamp
        self._keys = {key.id: key for key in keys}
        if keys:  # once keys were in force, a file emptied of them shuts everyone out
            self._open = False
        log.info("API keys reloaded from %s: %d key(s)", self._source, len(keys))


def _stamp(path: Path) -> tuple[int, int] | None:
    """What changes when the file is rewritten or replaced: modification time and inode."""
    try:
        status = path.stat()
    except OSError:
        return None
    return status.st_mtime_ns, status.st_ino


def read_keys_file(path: Path) -> list[ApiKey]:
    """The keys of a file; a missing file has none."""
    try:
        return _parse(path.read_text(), str(path))
    except FileNotFoundError:
        return []


def write_keys_file(path: Path, keys: list[ApiKey]) -> None:
    """Replace the file at once (write aside, rename), readable by its owner only."""
    path.parent.mkdir(parents=True, exist_ok=True)
    aside = path.with_name(f".{path.name}.{os.getpid()}")
    with open(os.open(aside, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600), "w") as file:
        json.dump({"keys": [key.to_json() for key in keys]}, file, indent=2)
        file.write("\n")
    aside.replace(path)


def _parse(text: str, source: str) -> list[ApiKey]:
    try:
        entries = json.loads(text)["keys"]
        return [ApiKey(e["id"], bytes.fromhex(e["salt"]), bytes.fromhex(e["digest"]),
                       frozenset(e["scopes"])) for e in entries]
    except (ValueError, KeyError, TypeError) as error:
        raise SettingsError(f"{source}: not a valid keys document ({error})") from None
