"""SCRAM-SHA-256 (RFC 5802, RFC 7677) for analysts and administrators, with scramp.

Verifiers use PostgreSQL's stored format, so ``hushql hash-password`` output can be compared
with what PostgreSQL itself stores:

    SCRAM-SHA-256$<iterations>:<salt, base64>$<StoredKey, base64>:<ServerKey, base64>

The server never sees a password. For an unknown account it runs the same exchange against a
made-up verifier derived from the name and a per-process secret (stable per name, different
between names, like a real account's), so an unknown user and a wrong password fail at the same
step after the same work, with the same error.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import secrets
from dataclasses import dataclass

import scramp
from scramp.utils import ScramException

from proxy.policy import LEAST_SCRAM_ITERATIONS, parse_scram_verifier

MECHANISM = "SCRAM-SHA-256"
# PostgreSQL's default scram_iterations, and RFC 7677's minimum for SCRAM-SHA-256.
DEFAULT_ITERATIONS = LEAST_SCRAM_ITERATIONS

_MECH = scramp.ScramMechanism(MECHANISM)
_DUMMY_SECRET = secrets.token_bytes(32)


class AuthenticationFailed(Exception):
    """The exchange failed (bad proof, unknown user, malformed message). Never says which."""


@dataclass(frozen=True)
class Verifier:
    """The parts of a stored SCRAM-SHA-256 verifier."""

    iterations: int
    salt: bytes
    stored_key: bytes
    server_key: bytes

    def __str__(self) -> str:
        b64 = lambda b: base64.b64encode(b).decode("ascii")  # noqa: E731
        return (f"{MECHANISM}${self.iterations}:{b64(self.salt)}"
                f"${b64(self.stored_key)}:{b64(self.server_key)}")


def make_verifier(password: str, *, iterations: int = DEFAULT_ITERATIONS,
                  salt: bytes | None = None) -> str:
    """A new verifier string for a password (random 16-byte salt unless one is given)."""
    salt = secrets.token_bytes(16) if salt is None else salt
    salt_b, stored_key, server_key, i = _MECH.make_auth_info(password, iterations, salt)
    return str(Verifier(i, salt_b, stored_key, server_key))


def parse_verifier(text: str) -> Verifier:
    """Splits a verifier string (policy's parser); raises ValueError when it is malformed."""
    return Verifier(*parse_scram_verifier(text))


def verify_password(password: str, verifier: str) -> bool:
    """Whether a password matches a verifier string (for tools and tests; constant time)."""
    v = parse_verifier(verifier)
    _, stored_key, server_key, _ = _MECH.make_auth_info(password, v.iterations, v.salt)
    return hmac.compare_digest(stored_key, v.stored_key) and \
        hmac.compare_digest(server_key, v.server_key)


def dummy_verifier(username: str) -> Verifier:
    """A verifier no password matches, stable for a name within this process."""
    def part(label: bytes) -> bytes:
        return hmac.new(_DUMMY_SECRET, label + username.encode("utf-8"), hashlib.sha256).digest()
    return Verifier(DEFAULT_ITERATIONS, part(b"salt")[:16], part(b"stored"), part(b"server"))


def _replace_username(client_first: str) -> tuple[str, str]:
    """(message for scramp, original bare part). PostgreSQL ignores the SCRAM user name (libpq
    sends it empty, which scramp refuses), so scramp sees a placeholder instead; the signed
    AuthMessage must still use the bare part exactly as the client sent it."""
    try:
        first = client_first.index(",")
        second = client_first.index(",", first + 1)
    except ValueError:
        raise AuthenticationFailed from None
    header, bare = client_first[:second + 1], client_first[second + 1:]
    if not bare.startswith("n="):
        raise AuthenticationFailed
    comma = bare.find(",")
    if comma < 0:
        raise AuthenticationFailed
    return header + "n=user" + bare[comma:], bare


class ScramExchange:
    """The server side of one SCRAM-SHA-256 exchange for the user named at startup.

    ``verifier`` is None for an unknown account; the exchange then runs against
    ``dummy_verifier(username)`` and fails at the proof, exactly like a wrong password.
    """

    def __init__(self, username: str, verifier: Verifier | None, *,
                 server_nonce: str | None = None) -> None:
        self.known = verifier is not None
        v = verifier if verifier is not None else dummy_verifier(username)
        self._server = _MECH.make_server(
            lambda _name: (v.salt, v.stored_key, v.server_key, v.iterations),
            s_nonce=server_nonce)

    def first(self, client_first: bytes) -> bytes:
        """server-first-message for client-first-message; raises AuthenticationFailed."""
        try:
            text = client_first.decode("utf-8")
            for_scramp, bare = _replace_username(text)
            self._server.set_client_first(for_scramp)
            # scramp signs what it was given; restore what the client really sent.
            self._server.client_first_bare = bare
            return self._server.get_server_first().encode("utf-8")
        except (ScramException, UnicodeDecodeError, AttributeError):
            raise AuthenticationFailed from None

    def final(self, client_final: bytes) -> bytes:
        """server-final-message; raises AuthenticationFailed on a bad proof or unknown user."""
        try:
            self._server.set_client_final(client_final.decode("utf-8"))
            server_final = self._server.get_server_final()
        except (ScramException, UnicodeDecodeError):
            raise AuthenticationFailed from None
        if not self.known:  # unreachable in practice: no proof matches a dummy verifier
            raise AuthenticationFailed
        return server_final.encode("utf-8")
