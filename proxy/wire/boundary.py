"""What the wire front needs from the rest of hushql, as typed Protocols.

Rules: the session and the server reach the engine only through ``Answering`` and the catalog
only through ``CatalogQuestions``; neither probes for optional methods. The real
``proxy.engine.Engine``, ``proxy.wire.catalog.Catalog`` and
``proxy.wire.ledger_relations.LedgerRelations`` satisfy them, and so do the test fakes, which
is what lets the front be tested without a database. They are runtime-checkable so tests can
check that a stand-in offers every member; the signatures are checked by mypy.
"""

from __future__ import annotations

from decimal import Decimal
from typing import Any, Protocol, Sequence, runtime_checkable

from sqlglot import exp

from proxy.answer import Answer, OutputColumn
from proxy.backend import QueryControl
from proxy.sql.limits import Limits
from proxy.sql.statement import BoundStatement

# A catalog answer's columns: (name, type OID or PostgreSQL type name).
CatalogColumns = list[tuple[str, int | str]]
# What the engine answers: a statement's text, a parsed tree (texts too long to cache), or a
# parameterised statement with its values.
Statement = str | exp.Expression | BoundStatement


@runtime_checkable
class AccountFacts(Protocol):
    """Who may log in and how (proxy.accounts.Accounts)."""

    def is_analyst(self, user: str) -> bool: ...

    def is_admin(self, user: str) -> bool: ...

    def is_disabled(self, user: str) -> bool: ...

    def verifier(self, user: str) -> str | None:
        """The stored verifier text of an enabled account; None when unknown or disabled."""
        ...


@runtime_checkable
class Answering(Protocol):
    """The engine as the front sees it: planning, answering, budgets and the settings the
    session checks before anything is planned. Every call may raise HushError."""

    @property
    def limits(self) -> Limits:
        """The work limits (statement length is checked before parsing)."""
        ...

    @property
    def default_epsilon(self) -> Decimal:
        """The epsilon a query runs with when the session sets none."""
        ...

    @property
    def accounts(self) -> AccountFacts:
        """The accounts of the policies served now."""
        ...

    def epsilon_for(self, epsilon: Decimal | str | None) -> Decimal:
        """The epsilon a query would run with, validated against the policy's bounds."""
        ...

    def describe(self, analyst: str, statement: Statement) -> list[OutputColumn]: ...

    def describe_planned(self, analyst: str, statement: Statement) -> list[OutputColumn] | None:
        """The columns of a statement planned already, None when it needs planning; cheap and
        free of I/O, so it may run on the event loop."""
        ...

    def parameter_types(self, analyst: str, tree: exp.Expression) -> list[str | None]:
        """A type name (or None) for each untyped ``$n``, from what it is compared with."""
        ...

    def explain(self, analyst: str, statement: Statement, *,
                epsilon: Decimal | None = None, form: str = "text",
                fresh: bool = False) -> Answer: ...

    def answer(self, analyst: str, statement: Statement, *,
               epsilon: Decimal | None = None, control: QueryControl | None = None,
               fresh: bool = False) -> Answer:
        """The answer; a stored answer to the same question is given again for nothing
        unless ``fresh``."""
        ...

    def remaining(self, analyst: str) -> Decimal: ...

    def close(self) -> None: ...


@runtime_checkable
class CatalogQuestions(Protocol):
    """Catalog questions (pg_catalog, information_schema, the ledger's relations): which
    statements are one, and their answers. Every call but the claims may raise HushError."""

    def is_catalog_query(self, tree: exp.Expression) -> bool: ...

    def is_catalog_text(self, text: str) -> bool:
        """Claims a text sqlglot could not parse (PostgreSQL-only syntax in client queries)."""
        ...

    def run(self, analyst: str, sql_text: str, params: Sequence[Any] = (),
            remaining: Decimal | None = None
            ) -> tuple[CatalogColumns, list[tuple[Any, ...]]]:
        """Columns and rows; ``remaining`` (the analyst's budget left) fills
        hushql.my_tables."""
        ...

    def describe(self, analyst: str, sql_text: str) -> CatalogColumns: ...

    def parameter_types(self, analyst: str, sql_text: str) -> list[int]:
        """The type OID of each ``$n`` (0 where unknown); [] without parameters."""
        ...

    def close(self) -> None: ...
