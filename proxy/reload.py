"""Reloading the policies of a running ``hushql serve`` on SIGHUP.

Rules of this module:
- The new set must pass everything a start must pass (the policy checks, no published demo
  passwords, every table answerable by the backend); otherwise each problem is logged as
  ``check`` prints it and the old set stays in force.
- A valid set takes effect for new queries: the ledger records its budget changes as events, the
  engine swaps its policies and drops its plans, the catalog mirrors are rebuilt for the new
  grants and administrators change with it. Both outcomes are logged.
- The reload runs on a thread of its own, one at a time, so the server keeps answering.
"""

from __future__ import annotations

import logging
import threading
from pathlib import Path
from typing import Any, Callable

from proxy.engine import Engine
from proxy.errors import HushError
from proxy.policy import PolicyError, load_policies
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
            log.info("reloading policies from %s", self._directory)
            try:
                policies = load_policies(self._directory)
                refuse_unsafe_serving(policies, self._backend,
                                      allow_demo_accounts=self._allow_demo)
            except PolicyError as error:
                return self._refused(error.problems)
            except HushError as error:
                return self._refused(error.message.splitlines()[1:] or [error.message])
            try:
                catalog = self._build_catalog(policies)
                self._engine.reload(policies)
            except Exception as error:  # the old set stays; nothing about data in the log
                return self._refused([f"could not apply the policies ({type(error).__name__})"])
            old = self._relations.replace(policies, catalog)
            if old is not None:
                old.close()
            log.info("policies reloaded: %s", policy_source(policies))
            return True

    def reload_in_background(self, *_: object) -> None:
        """A signal handler: reload on a thread of its own."""
        threading.Thread(target=self.reload, name="hushql-reload", daemon=True).start()

    @staticmethod
    def _refused(problems: list[str]) -> bool:
        for line in problems:
            log.error("policy reload refused: %s", line)
        log.error("policy reload refused; the previous policies stay in force")
        return False
