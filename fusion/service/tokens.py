"""Access tokens of the service: named, scoped, stored only as salted hashes.

A token is printed once by ``magfuse token add NAME --scope SCOPE``; the store keeps
``service/tokens.json`` with, per name, the scope, a random salt and the scrypt hash of the token
(Percival & Josefsson 2016, RFC 7914; parameters n=2**14, r=8, p=1, one of the RFC's test-vector
settings and the usual choice for interactive logins: common practice, no source). The token starts
with a public id (``mfs_<id>.<secret>``) so that one hash is computed per request, whatever the
number of tokens. A presented token is compared with :func:`hmac.compare_digest`, so the time taken
does not depend on how many leading bytes match.

Scopes are ordered: ``admin`` includes ``submit``, which includes ``read``.

Verifying scrypt costs tens of milliseconds, so a verified token is remembered in memory (keyed by
its SHA-256) until ``tokens.json`` changes; revoking a token replaces the file and so forgets
every remembered token at the next request.
"""

from __future__ import annotations

import contextlib
import hashlib
import hmac
import json
import re
import secrets
from collections.abc import Callable
from contextlib import AbstractContextManager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from stations.errors import ConfigError, StoreCorruptError
from stations.store.atomic import write_bytes_atomic

__all__ = ["SCOPES", "TOKENS_FILE", "TokenBook", "TokenInfo", "scope_allows"]

#: Scopes from least to most powerful.
SCOPES: tuple[str, ...] = ("read", "submit", "admin")
#: Where the hashes live, relative to the store root.
TOKENS_FILE = Path("service") / "tokens.json"
#: Prefix of every token, so a leaked one is recognisable in logs and secret scanners.
TOKEN_PREFIX = "mfs_"
_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")
_SCRYPT = {"n": 2**14, "r": 8, "p": 1, "dklen": 32}


def scope_allows(granted: str, needed: str) -> bool:
    """Whether a token of scope ``granted`` may do what needs ``needed``."""
    return SCOPES.index(granted) >= SCOPES.index(needed)


def _hash(token: str, salt: bytes) -> bytes:
    return hashlib.scrypt(token.encode(), salt=salt, maxmem=64 * 2**20, **_SCRYPT)


@dataclass(frozen=True, slots=True)
class TokenInfo:
    """A token's public description (never the token itself)."""

    name: str
    scope: str
    created: str


class TokenBook:
    """The tokens of one store.

    Parameters
    ----------
    store_root : Path
        The store folder; the hashes live in ``store_root/service/tokens.json``.
    lock : callable returning a context manager, optional
        The store's write lock, held while the file is rewritten.
    """

    def __init__(
        self, store_root: Path, *, lock: Callable[[], AbstractContextManager[Any]] | None = None
    ) -> None:
        self.path = Path(store_root) / TOKENS_FILE
        self._lock = lock
        self._stamp: tuple[int, int, int] | None = None
        self._entries: dict[str, dict[str, str]] = {}
        self._verified: dict[str, TokenInfo] = {}

    # -- file ------------------------------------------------------------------------------
    def _load(self) -> dict[str, dict[str, str]]:
        try:
            st = self.path.stat()
        except FileNotFoundError:
            self._stamp, self._entries, self._verified = None, {}, {}
            return self._entries
        stamp = (st.st_ino, st.st_size, st.st_mtime_ns)
        if stamp != self._stamp:
            try:
                data = json.loads(self.path.read_text(encoding="utf-8"))
                entries = dict(data["tokens"])
            except (ValueError, KeyError, TypeError) as exc:
                raise StoreCorruptError(
                    f"{self.path}: unreadable token file ({exc}); restore it from a backup or "
                    "delete it and add the tokens again"
                ) from None
            self._stamp, self._entries, self._verified = stamp, entries, {}
        return self._entries

    def _save(self, entries: dict[str, dict[str, str]]) -> None:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        text = json.dumps({"tokens": entries}, indent=2, sort_keys=True)
        write_bytes_atomic(self.path, text.encode())
        self._stamp = None

    def _locked(self) -> AbstractContextManager[Any]:
        return self._lock() if self._lock is not None else contextlib.nullcontext()

    # -- commands --------------------------------------------------------------------------
    def add(self, name: str, scope: str) -> str:
        """Create a token; returns it (the only time it is ever shown).

        Raises
        ------
        ConfigError
            Bad name or scope, or a token of that name exists.
        """
        if not _NAME_RE.match(name):
            raise ConfigError(
                f"token name {name!r} is not allowed; use 1-64 letters, digits, '.', '_' or '-'"
            )
        if scope not in SCOPES:
            raise ConfigError(f"scope {scope!r} is unknown; choose one of {', '.join(SCOPES)}")
        token_id = secrets.token_hex(6)
        token = f"{TOKEN_PREFIX}{token_id}.{secrets.token_urlsafe(32)}"
        salt = secrets.token_bytes(16)
        with self._locked():
            entries = dict(self._load())
            if name in entries:
                raise ConfigError(
                    f"a token named {name!r} exists; revoke it first with "
                    f"'magfuse token revoke {name}' or choose another name"
                )
            entries[name] = {
                "id": token_id,
                "scope": scope,
                "salt": salt.hex(),
                "hash": _hash(token, salt).hex(),
                "created": datetime.now(UTC).isoformat(timespec="seconds"),
            }
            self._save(entries)
        return token

    def revoke(self, name: str) -> None:
        """Delete the token ``name``.

        Raises
        ------
        ConfigError
            If there is no such token.
        """
        with self._locked():
            entries = dict(self._load())
            if name not in entries:
                raise ConfigError(f"no token named {name!r}; list them with 'magfuse token list'")
            del entries[name]
            self._save(entries)

    def list(self) -> list[TokenInfo]:
        """Every token's name, scope and creation time, by name."""
        return [
            TokenInfo(n, e["scope"], e.get("created", "")) for n, e in sorted(self._load().items())
        ]

    def verify(self, token: str) -> TokenInfo | None:
        """The token's description if ``token`` is valid, else None (constant-time compare)."""
        entries = self._load()
        if not token.startswith(TOKEN_PREFIX) or len(token) > 200:
            return None
        key = hashlib.sha256(token.encode()).hexdigest()
        known = self._verified.get(key)
        if known is not None:
            return known
        token_id = token[len(TOKEN_PREFIX) :].partition(".")[0]
        for name, e in entries.items():
            if e.get("id") != token_id:
                continue
            digest = _hash(token, bytes.fromhex(e["salt"]))
            if hmac.compare_digest(digest, bytes.fromhex(e["hash"])):
                found = TokenInfo(name, e["scope"], e.get("created", ""))
                self._verified[key] = found
                return found
        return None
