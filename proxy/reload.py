"""Reloading the policies of a running ``hushql serve`` on SIGHUP.

Rules of this module:
- The new set must pass everything a start must pass (the policy checks, no published demo
  passwords, every table answerable by the backend); otherwise each problem is logged as
  ``check`` prints it and the old set stays in force.
- A valid set takes effect for new queries: the ledger records its budget changes as events, the
  engine swaps its policies and drops its plans, the catalog mirrors are rebuilt for the new
  grants and administrators change with it. Both outcomes are logged.
- The reload runs on a thread of its own, one at a time, so the server keeps answering.
- With several workers (``serve --workers N``) the supervisor checks the new set the same way
  (``load_checked``) and, when it passes, replaces every worker in turn: each old worker stops
  accepting and finishes its sessions while its successor, started with the new set, accepts.
"""

from __future__ import annotations

import logging
import threading
from pathlib import Path
from typing import Any, Callable

from proxy.engine import Engine
from proxy.errors import HushError
from proxy.policy import Policies, PolicyError, load_policies
from proxy.safe_config import policy_source, refuse_unsafe_serving
from proxy.wire.ledger_relations import LedgerRelations

log = logging.getLogger("hushql.reload")


class PolicyReloader:
    """Reloads ``directory`` into a serving engine and its ledger relations / catalog."""

    def __init__(self, directory: str | Path, backend_dsn: str, engine: Engine,
                 relations: LedgerRelations, build_catalog: Callable[[Any], Any], *,
                 allow_demo_accounts: bool = False) -> None:
        self._directory = Path(directory)
        self._backend = backend_dsn
        self._engine = engine
        self._relations = relations
        self._build_catalog = build_catalog
        self._allow_demo = allow_demo_accounts
        self._lock = threading.Lock()

    def reload(self) -> bool:
        """Load, check and apply the policy folder; False (old set kept) on any problem."""
        with self._lock:
            policies = load_checked(self._directory, self._backend, self._allow_demo)
            if policies is None:
                return False
            try:
                catalog = self._build_catalog(policies)
                self._engine.reload(policies)
            except Exception as error:  # the old set stays; nothing about data in the log
                return self._refused([f"could not apply the policies ({type(error).__name__})"])
            old = self._relations.replace(policies, catalog)
            if old is not None:
                old.close()
            log_reloaded(policies)
            return True

    def reload_in_background(self, *_: object) -> None:
        """A signal handler: reload on a thread of its own."""
        threading.Thread(target=self.reload, name="hushql-reload", daemon=True).start()

    @staticmethod
    def _refused(problems: list[str]) -> bool:
        _log_refusal(problems)
        return False


def load_checked(directory: str | Path, backend_dsn: str, allow_demo_accounts: bool = False
                 ) -> Policies | None:
    """The policy folder if it passes every start-up check; else None, each problem logged."""
    log.info("reloading policies from %s", directory)
    try:
        policies = load_policies(directory)
        refuse_unsafe_serving(policies, backend_dsn, allow_demo_accounts=allow_demo_accounts)
    except PolicyError as error:
        _log_refusal(error.problems)
        return None
    except HushError as error:
        _log_refusal(error.message.splitlines()[1:] or [error.message])
        return None
    return policies


def log_reloaded(policies: Policies) -> None:
    """The log line that says a new set is in force, naming its folder and digest."""
    log.info("policies reloaded: %s", policy_source(policies))


def _log_refusal(problems: list[str]) -> None:
    for line in problems:
        log.error("policy reload refused: %s", line)
    log.error("policy reload refused; the previous policies stay in force")
