"""Account facts the front needs at login: who is an analyst or an administrator, who is
disabled, and which stored password verifier an account logs in with.

Rules: analysts are looked up before administrators (a name in both logs in as the analyst);
a disabled or unknown account has no verifier, so its login fails exactly like a wrong password.
One ``Accounts`` reads one set of policies; after a reload the engine hands out a new one.
"""

from __future__ import annotations

from proxy.policy import AdminPolicy, AnalystPolicy, Policies


class Accounts:
    """Read-only account facts of one set of policies."""

    def __init__(self, policies: Policies) -> None:
        self._policies = policies

    def _account(self, user: str) -> AnalystPolicy | AdminPolicy | None:
        return self._policies.analysts.get(user) or self._policies.admins.get(user)

    def is_analyst(self, user: str) -> bool:
        return user in self._policies.analysts

    def is_admin(self, user: str) -> bool:
        return user in self._policies.admins

    def is_disabled(self, user: str) -> bool:
        """True for a known account marked disabled (unknown accounts are not disabled)."""
        account = self._account(user)
        return account is not None and account.disabled

    def verifier(self, user: str) -> str | None:
        """The stored verifier text ``user`` logs in with (analysts first); None when the
        account is unknown or disabled. The text is not checked here (the front parses it)."""
        account = self._account(user)
        if account is None or account.disabled:
            return None
        return account.password
