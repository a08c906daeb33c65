"""Who is asking: tokens from a TOML file, each naming a person and a role.

The file has one table per person::

    [dana]
    token = "a long random string"
    role = "write"            # read | write | admin

A request carries ``Authorization: Bearer <token>``. Tokens are compared in
constant time (:func:`hmac.compare_digest` on their SHA-256 digests, against
every known token, so neither the length nor the position of a match shows in
the timing), and never logged or echoed. The person's name becomes the owner
of what the request creates. Without a token file every request is let in as
an anonymous admin: the service then binds only to a loopback address.
"""

from __future__ import annotations

import hashlib
import hmac
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping

from warmstart.errors import WarmstartError

__all__ = ["ROLES", "Principal", "TokenError", "Tokens", "ANONYMOUS"]

#: roles, each allowed what the ones before it are
ROLES = ("read", "write", "admin")
MIN_TOKEN_LENGTH = 16  # shorter tokens are guessable (common practice: at least 128 bits of randomness)


class TokenError(WarmstartError, ValueError):
    """The token file cannot be used."""


@dataclass(frozen=True)
class Principal:
    """Who a request comes from.

    Attributes
    ----------
    name : str or None
        The token's name (None without tokens); the owner of what it creates.
    role : {"read", "write", "admin"}
    """

    name: str | None
    role: str

    def may(self, role: str) -> bool:
        """Whether this principal holds ``role`` or a stronger one."""
        return ROLES.index(self.role) >= ROLES.index(role)

    @property
    def key(self) -> str:
        """The name, or ``""`` when anonymous (for request-id bookkeeping)."""
        return self.name or ""


ANONYMOUS = Principal(None, "admin")


def _digest(token: str) -> bytes:
    return hashlib.sha256(token.encode("utf-8")).digest()


class Tokens:
    """The tokens of a team, loaded from a TOML file.

    Parameters
    ----------
    people : mapping of name -> (token, role)

    Raises
    ------
    TokenError
        A role is not one of ``read``, ``write``, ``admin``; a token is
        shorter than 16 characters; two names share a token.
    """

    def __init__(self, people: Mapping[str, tuple[str, str]], where: str = "tokens"):
        seen: dict[bytes, str] = {}
        self._entries: list[tuple[bytes, Principal]] = []
        for name, (token, role) in people.items():
            if role not in ROLES:
                raise TokenError(f"{where}: [{name}] role = {role!r} is not a role; use one of {', '.join(ROLES)}")
            if len(token) < MIN_TOKEN_LENGTH:
                raise TokenError(f"{where}: [{name}] token is {len(token)} characters long; use at least "
                                 f"{MIN_TOKEN_LENGTH} random characters (e.g. python -c \"import secrets; "
                                 "print(secrets.token_urlsafe(24))\")")
            digest = _digest(token)
            if digest in seen:
                raise TokenError(f"{where}: [{name}] and [{seen[digest]}] have the same token; give each its own")
            seen[digest] = name
            self._entries.append((digest, Principal(name, role)))
        if not self._entries:
            raise TokenError(f"{where}: no tokens; add a table per person, e.g. [dana] token = \"...\" role = \"write\"")

    @classmethod
    def load(cls, path: str | Path) -> "Tokens":
        """Read a token file (see the module docstring for its layout)."""
        where = str(path)
        try:
            text = Path(path).read_text(encoding="utf-8")
        except FileNotFoundError:
            raise TokenError(f"{where}: no such token file") from None
        except (OSError, UnicodeDecodeError) as exc:
            raise TokenError(f"{where}: cannot read the token file ({exc})") from None
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise TokenError(f"{where}: not valid TOML ({exc})") from None
        people = {}
        for name, table in data.items():
            if not isinstance(table, dict):
                raise TokenError(f"{where}: {name!r} must be a table [{name}] with token and role, "
                                 f"got a {type(table).__name__}")
            unknown = sorted(set(table) - {"token", "role"})
            if unknown:
                raise TokenError(f"{where}: [{name}] has unknown key(s) {unknown}; a person has token and role")
            token, role = table.get("token"), table.get("role")
            if not isinstance(token, str):
                raise TokenError(f"{where}: [{name}] needs token = \"...\" (a string)")
            if not isinstance(role, str):
                raise TokenError(f"{where}: [{name}] needs role = \"read\", \"write\" or \"admin\"")
            people[name] = (token, role)
        return cls(people, where=where)

    def __len__(self) -> int:
        return len(self._entries)

    def names(self) -> list[str]:
        """The names in the file, in order."""
        return [p.name for _, p in self._entries]

    def identify(self, token: str) -> Principal | None:
        """The principal holding ``token``, or None. Constant time in the token."""
        digest = _digest(token)
        found = None
        for known, principal in self._entries:  # no early exit
            if hmac.compare_digest(known, digest):
                found = principal
        return found
