"""The privacy ledger: durable, exact books on how much epsilon each analyst and table has spent.

Why it is shaped like this:
- Every answer is charged *before* its query runs (DESIGN.md, "The ledger"): ``reserve`` locks
  the analyst's budget row and the tables' budget rows, checks, adds, inserts the charge row and
  commits, all in one transaction, and returns only once that commit is durable
  (``synchronous_commit = on`` on every ledger connection). The engine releases nothing before
  ``reserve`` has returned, so no answer can outlive a lost charge. The transaction is one call
  of the schema's ``reserve_charge`` function, so rows stay locked for the server's work plus
  the commit instead of several client round trips (measured with benchmarks/bench_ledger.py:
  0.5 ms p50 per reservation, against 0.9 ms for the same steps sent one by one).
- Once a query has started its charge stands, whatever happens (an error at run time can depend
  on the data): ``finish`` only records the outcome and never gives epsilon back.
- Several proxy processes may share one ledger. Row locks (``SELECT ... FOR UPDATE``) make
  concurrent reservations for one analyst or one population take turns, so none overspends;
  locks are always taken in one order (the analyst's row, then the populations' rows sorted by
  name, codepoint order, then the tables' rows, written only under their population's lock) so
  two reservations cannot deadlock. Different analysts on different populations share no row
  and do not wait for each other. (Every reservation on one population does take its row, so
  charges to it serialise across analysts; that is what enforcing a cap exactly costs.)
- Populations: tables naming the same population protect the same people, so their spending
  adds up against one cap (the smallest cap its tables declare); a table without an
  ``[individual]`` section is a population of its own. Each table's own ``spent`` is kept too,
  for the books.
- Epsilon is ``Decimal`` in Python and ``NUMERIC`` in PostgreSQL, never a float: 0.1 charged 30
  times is exactly 3.0. Sums, differences and comparisons happen in PostgreSQL (arbitrary
  precision); Python never does arithmetic on a budget.
- The schema is the program's own: created and migrated at start-up from the ordered list
  ``_MIGRATIONS``, in one transaction under an advisory lock, so proxies starting together do not
  race. A database whose schema is newer than this program knows is refused (``LedgerError``).
- A trigger refuses any update that raises ``spent`` above its budget or cap (SQLSTATE 23514):
  a last line of defence against a bug here or a hand-written update, not the normal path.

This module and ``proxy.backend`` are the only ones the engine reaches PostgreSQL through.
"""

from __future__ import annotations

import hashlib
import re
from collections.abc import Iterator
from contextlib import AbstractContextManager, contextmanager
from decimal import Decimal
from typing import TYPE_CHECKING, Any, NamedTuple

import psycopg
from psycopg import sql
from psycopg_pool import ConnectionPool, PoolTimeout

from proxy.errors import (
    BUDGET_EXHAUSTED,
    INSUFFICIENT_PRIVILEGE,
    INTERNAL_ERROR,
    INVALID_PARAMETER_VALUE,
    UNDEFINED_TABLE,
    HushError,
)

if TYPE_CHECKING:
    from proxy.policy import Policies

OUTCOMES = ("answered", "failed", "cancelled")
"""What ``finish`` may record; a charge starts as 'reserved'."""

_SCHEMA_NAME = re.compile(r"[a-z_][a-z0-9_]{0,62}")

# Each migration is (description, statements); version n is _MIGRATIONS[n - 1]. Append only:
# a released step is never edited, a change is a new step. ``{schema}`` is the quoted schema.
_MIGRATIONS: list[tuple[str, tuple[str, ...]]] = [
    ("analyst budgets, table budgets, charges", (
        """
        CREATE TABLE {schema}.analyst_budgets (
            analyst     text PRIMARY KEY,
            budget      numeric NOT NULL CHECK (budget >= 0),
            spent       numeric NOT NULL DEFAULT 0 CHECK (spent >= 0),
            updated_at  timestamptz NOT NULL DEFAULT now()
        )
        """,
        """
        CREATE TABLE {schema}.table_budgets (
            table_name  text PRIMARY KEY,
            cap         numeric CHECK (cap > 0),
            spent       numeric NOT NULL DEFAULT 0 CHECK (spent >= 0),
            updated_at  timestamptz NOT NULL DEFAULT now()
        )
        """,
        "COMMENT ON COLUMN {schema}.table_budgets.cap IS "
        "'epsilon all analysts together may spend on the table; NULL: no cap'",
        """
        CREATE TABLE {schema}.charges (
            id           bigserial PRIMARY KEY,
            reserved_at  timestamptz NOT NULL DEFAULT now(),
            finished_at  timestamptz,
            analyst      text NOT NULL REFERENCES {schema}.analyst_budgets (analyst),
            tables       text[] NOT NULL,
            epsilon      numeric NOT NULL CHECK (epsilon > 0),
            statement    text NOT NULL,
            fingerprint  text NOT NULL,
            outcome      text NOT NULL DEFAULT 'reserved'
                         CHECK (outcome IN ('reserved', 'answered', 'failed', 'cancelled')),
            CHECK ((outcome = 'reserved') = (finished_at IS NULL))
        )
        """,
        "CREATE INDEX charges_by_analyst ON {schema}.charges (analyst, reserved_at)",
        "CREATE INDEX charges_by_time ON {schema}.charges (reserved_at)",
        # One function for both budget tables: the trigger argument names the limit column.
        """
        CREATE FUNCTION {schema}.refuse_overspending() RETURNS trigger
        LANGUAGE plpgsql AS $body$
        DECLARE
            allowed numeric := (to_jsonb(NEW) ->> TG_ARGV[0])::numeric;
        BEGIN
            IF NEW.spent > OLD.spent AND allowed IS NOT NULL AND NEW.spent > allowed THEN
                RAISE EXCEPTION 'hushql ledger: spent % would exceed % %',
                    NEW.spent, TG_ARGV[0], allowed
                    USING ERRCODE = 'check_violation';
            END IF;
            RETURN NEW;
        END
        $body$
        """,
        """
        CREATE TRIGGER spent_within_budget BEFORE UPDATE OF spent ON {schema}.analyst_budgets
        FOR EACH ROW EXECUTE FUNCTION {schema}.refuse_overspending('budget')
        """,
        """
        CREATE TRIGGER spent_within_cap BEFORE UPDATE OF spent ON {schema}.table_budgets
        FOR EACH ROW EXECUTE FUNCTION {schema}.refuse_overspending('cap')
        """,
        # The reservation, run in the server so the budget rows are locked for one statement
        # rather than across several round trips. Locks the analyst's row, then the tables' rows
        # in codepoint order; checks; adds; inserts the charge. A refusal changes nothing and is
        # returned as data (refusal, refused_name, refused_limit, refused_left); the caller words
        # the message.
        """
        CREATE FUNCTION {schema}.reserve_charge(
            analyst_name text, table_names text[], amount numeric,
            statement_text text, statement_fingerprint text,
            OUT charge_id bigint, OUT refusal text, OUT refused_name text,
            OUT refused_limit numeric, OUT refused_left numeric, OUT left_after numeric)
        LANGUAGE plpgsql AS $body$
        DECLARE
            found_row record;
            locked text[] := '{{}}';
        BEGIN
            SELECT b.budget, b.budget - b.spent AS headroom INTO found_row
              FROM {schema}.analyst_budgets b
             WHERE b.analyst = analyst_name
               FOR UPDATE;
            IF NOT FOUND THEN
                refusal := 'unknown analyst';
                refused_name := analyst_name;
                RETURN;
            END IF;
            IF amount > found_row.headroom THEN
                refusal := 'analyst budget';
                refused_name := analyst_name;
                refused_limit := found_row.budget;
                refused_left := found_row.headroom;
                RETURN;
            END IF;
            -- ORDER BY runs before the row locks, so rows are locked in this order.
            FOR found_row IN
                SELECT t.table_name, t.cap, t.cap - t.spent AS headroom
                  FROM {schema}.table_budgets t
                 WHERE t.table_name = ANY (table_names)
                 ORDER BY t.table_name COLLATE "C"
                   FOR UPDATE
            LOOP
                locked := locked || found_row.table_name;
                IF found_row.cap IS NOT NULL AND amount > found_row.headroom THEN
                    refusal := 'table cap';
                    refused_name := found_row.table_name;
                    refused_limit := found_row.cap;
                    refused_left := found_row.headroom;
                    RETURN;
                END IF;
            END LOOP;
            SELECT min(wanted COLLATE "C") INTO refused_name
              FROM unnest(table_names) AS wanted
             WHERE wanted <> ALL (locked);
            IF refused_name IS NOT NULL THEN
                refusal := 'unknown table';
                RETURN;
            END IF;
            UPDATE {schema}.analyst_budgets SET spent = spent + amount, updated_at = now()
             WHERE analyst = analyst_name
            RETURNING greatest(budget - spent, 0) INTO left_after;
            UPDATE {schema}.table_budgets SET spent = spent + amount, updated_at = now()
             WHERE table_name = ANY (table_names);
            INSERT INTO {schema}.charges (analyst, tables, epsilon, statement, fingerprint)
            VALUES (analyst_name, table_names, amount, statement_text, statement_fingerprint)
            RETURNING id INTO charge_id;
        END
        $body$
        """,
        # Recording an outcome needs no fsync wait (see Ledger.finish); the local setting lasts
        # to the end of the statement's own transaction, so it covers that commit only.
        """
        CREATE FUNCTION {schema}.finish_charge(finished_id bigint, final_outcome text)
        RETURNS boolean
        LANGUAGE plpgsql AS $body$
        BEGIN
            PERFORM set_config('synchronous_commit', 'off', true);
            UPDATE {schema}.charges SET outcome = final_outcome, finished_at = clock_timestamp()
             WHERE id = finished_id AND outcome = 'reserved';
            RETURN FOUND;
        END
        $body$
        """,
    )),
    ("population budgets: tables protecting the same people share one cap", (
        """
        CREATE TABLE {schema}.population_budgets (
            population  text PRIMARY KEY,
            cap         numeric CHECK (cap > 0),
            spent       numeric NOT NULL DEFAULT 0 CHECK (spent >= 0),
            updated_at  timestamptz NOT NULL DEFAULT now()
        )
        """,
        "COMMENT ON COLUMN {schema}.population_budgets.cap IS "
        "'epsilon all analysts together may spend on all tables of the population; NULL: no cap'",
        """
        CREATE TRIGGER spent_within_population_cap BEFORE UPDATE OF spent
        ON {schema}.population_budgets
        FOR EACH ROW EXECUTE FUNCTION {schema}.refuse_overspending('cap')
        """,
        # Tables known before this step are each their own population, spending carried over.
        "ALTER TABLE {schema}.table_budgets ADD COLUMN population text",
        "UPDATE {schema}.table_budgets SET population = table_name",
        """
        INSERT INTO {schema}.population_budgets (population, cap, spent)
        SELECT table_name, cap, spent FROM {schema}.table_budgets
        """,
        "ALTER TABLE {schema}.table_budgets ALTER COLUMN population SET NOT NULL",
        # The reservation now checks and charges the populations of the tables (their rows
        # locked after the analyst's, in codepoint order), and still adds to each table's spent
        # for the books (those rows are only written under their population's lock).
        """
        CREATE OR REPLACE FUNCTION {schema}.reserve_charge(
            analyst_name text, table_names text[], amount numeric,
            statement_text text, statement_fingerprint text,
            OUT charge_id bigint, OUT refusal text, OUT refused_name text,
            OUT refused_limit numeric, OUT refused_left numeric, OUT left_after numeric)
        LANGUAGE plpgsql AS $body$
        DECLARE
            found_row record;
            populations text[];
        BEGIN
            SELECT b.budget, b.budget - b.spent AS headroom INTO found_row
              FROM {schema}.analyst_budgets b
             WHERE b.analyst = analyst_name
               FOR UPDATE;
            IF NOT FOUND THEN
                refusal := 'unknown analyst';
                refused_name := analyst_name;
                RETURN;
            END IF;
            IF amount > found_row.headroom THEN
                refusal := 'analyst budget';
                refused_name := analyst_name;
                refused_limit := found_row.budget;
                refused_left := found_row.headroom;
                RETURN;
            END IF;
            SELECT min(wanted COLLATE "C") INTO refused_name
              FROM unnest(table_names) AS wanted
             WHERE NOT EXISTS (SELECT 1 FROM {schema}.table_budgets t WHERE t.table_name = wanted);
            IF refused_name IS NOT NULL THEN
                refusal := 'unknown table';
                RETURN;
            END IF;
            SELECT array_agg(DISTINCT t.population) INTO populations
              FROM {schema}.table_budgets t WHERE t.table_name = ANY (table_names);
            -- ORDER BY runs before the row locks, so rows are locked in this order.
            FOR found_row IN
                SELECT p.population, p.cap, p.cap - p.spent AS headroom
                  FROM {schema}.population_budgets p
                 WHERE p.population = ANY (populations)
                 ORDER BY p.population COLLATE "C"
                   FOR UPDATE
            LOOP
                IF found_row.cap IS NOT NULL AND amount > found_row.headroom THEN
                    -- A table that is its own population keeps the table's wording.
                    refusal := CASE WHEN found_row.population = ANY (table_names)
                                    THEN 'table cap' ELSE 'population cap' END;
                    refused_name := found_row.population;
                    refused_limit := found_row.cap;
                    refused_left := found_row.headroom;
                    RETURN;
                END IF;
            END LOOP;
            UPDATE {schema}.analyst_budgets SET spent = spent + amount, updated_at = now()
             WHERE analyst = analyst_name
            RETURNING greatest(budget - spent, 0) INTO left_after;
            UPDATE {schema}.population_budgets SET spent = spent + amount, updated_at = now()
             WHERE population = ANY (populations);
            UPDATE {schema}.table_budgets SET spent = spent + amount, updated_at = now()
             WHERE table_name = ANY (table_names);
            INSERT INTO {schema}.charges (analyst, tables, epsilon, statement, fingerprint)
            VALUES (analyst_name, table_names, amount, statement_text, statement_fingerprint)
            RETURNING id INTO charge_id;
        END
        $body$
        """,
    )),
]

SCHEMA_VERSION = len(_MIGRATIONS)
"""The ledger schema version this program creates and understands."""

_UNAVAILABLE_HINT = "try again shortly; if it persists, tell an administrator"


class Reservation(NamedTuple):
    """A durable charge: its id (for ``finish``) and the analyst's budget left after it."""

    charge_id: int
    remaining: Decimal


class LedgerError(Exception):
    """The ledger cannot be used at all (schema newer than this program, bad schema name)."""


class Ledger:
    """Budgets and charges in a PostgreSQL schema of the program's own, shared by all proxies.

    Thread-safe: each call borrows a connection from the pool for one transaction. Budget
    amounts and epsilon are Decimals, never floats (TypeError otherwise).
    """

    def __init__(self, dsn: str, *, schema: str = "hushql", pool_size: int = 4,
                 lock_timeout: float = 10.0) -> None:
        """Open a pool on ``dsn`` and bring the schema to ``SCHEMA_VERSION``.

        ``lock_timeout`` (seconds) bounds how long a reservation waits for a budget row held by
        someone else before it fails (closed) instead of hanging.
        Raises LedgerError for a bad schema name or a schema newer than this program.
        """
        if not _SCHEMA_NAME.fullmatch(schema):
            raise LedgerError(f"ledger schema name {schema!r} must be a lower-case SQL identifier")
        if pool_size < 1:
            raise ValueError("pool_size must be at least 1")
        self.schema = schema
        self._lock_timeout_ms = max(1, int(lock_timeout * 1000))
        self._sql = _Statements(schema)
        self._pool = ConnectionPool(
            dsn, min_size=1, max_size=pool_size, open=False, configure=self._configure,
            kwargs={"application_name": "hushql-ledger"}, name=f"hushql-ledger-{schema}")
        try:
            self._pool.open(wait=True, timeout=30)
            self._migrate()
        except BaseException:
            self._pool.close()
            raise

    def _configure(self, conn: psycopg.Connection[Any]) -> None:
        """Session settings of every ledger connection.

        Autocommit: a lone statement is its own transaction, and ``_transaction`` opens explicit
        ones. Durable commits. A bounded wait for row locks.
        """
        conn.autocommit = True
        # Overrides a database or role default of 'off': a charge must be on disk at COMMIT.
        conn.execute("SET synchronous_commit = on")
        conn.execute(f"SET lock_timeout = {self._lock_timeout_ms}")

    def _migrate(self) -> None:
        """Create or upgrade the schema; idempotent, and safe with several processes at once."""
        with self._pool.connection() as conn:
            if self._installed_version(conn) == SCHEMA_VERSION:
                return  # the common case: nothing to do, take no lock, need no CREATE privilege
            with conn.transaction():
                conn.execute("SELECT pg_advisory_xact_lock(%s)", [_advisory_key(self.schema)])
                ident = sql.Identifier(self.schema)
                conn.execute(sql.SQL("CREATE SCHEMA IF NOT EXISTS {}").format(ident))
                conn.execute(sql.SQL(
                    "CREATE TABLE IF NOT EXISTS {}.schema_version ("
                    " version integer PRIMARY KEY,"
                    " description text NOT NULL,"
                    " applied_at timestamptz NOT NULL DEFAULT now())").format(ident))
                current = self._installed_version(conn)
                for version in range(current + 1, SCHEMA_VERSION + 1):
                    description, steps = _MIGRATIONS[version - 1]
                    for step in steps:
                        conn.execute(sql.SQL(step).format(schema=ident))
                    conn.execute(sql.SQL(
                        "INSERT INTO {}.schema_version (version, description) VALUES (%s, %s)"
                    ).format(ident), [version, description])

    def _installed_version(self, conn: psycopg.Connection[Any]) -> int:
        """The schema's version in the database (0 when absent); refuses a newer one."""
        table = f"{sql.Identifier(self.schema).as_string(conn)}.schema_version"
        row = conn.execute("SELECT to_regclass(%s) IS NOT NULL", [table]).fetchone()
        if not row or not row[0]:
            return 0
        found = conn.execute(sql.SQL("SELECT coalesce(max(version), 0) FROM {}.schema_version")
                             .format(sql.Identifier(self.schema))).fetchone()
        version = int(found[0]) if found else 0
        if version > SCHEMA_VERSION:
            raise LedgerError(
                f"ledger schema {self.schema!r} is at version {version}, newer than this "
                f"program's {SCHEMA_VERSION}; upgrade hushql before using this ledger")
        return version

    def sync_budgets(self, policies: Policies) -> None:
        """Set each analyst's budget and each table's cap from ``policies``; spending is kept.

        Rows of analysts or tables no longer in the policy are kept (their charges refer to them).
        """
        analysts = sorted((name, a.budget) for name, a in policies.analysts.items())
        tables = sorted((name, t.budget.cap if t.budget is not None else None, t.population)
                        for name, t in policies.tables.items())
        # A population's cap is the smallest its tables declare (fail closed); none: no cap.
        caps: dict[str, list[Decimal]] = {}
        for _, cap, population in tables:
            caps.setdefault(population, []).extend([cap] if cap is not None else [])
        populations = sorted((name, min(found) if found else None) for name, found in caps.items())
        for value in [a[1] for a in analysts] + [t[1] for t in tables]:
            if value is not None:
                _check_decimal(value, "a budget")
        with self._transaction() as conn:
            # Sorted, like reserve's locks, so a sync never deadlocks with a reservation.
            with conn.cursor() as cur:
                if analysts:
                    cur.executemany(self._sql.upsert_analyst, analysts)
                # Populations before tables: the order reserve locks them in.
                if populations:
                    cur.executemany(self._sql.upsert_population, populations)
                if tables:
                    cur.executemany(self._sql.upsert_table, tables)

    def reserve(self, analyst: str, tables: list[str], epsilon: Decimal, statement: str,
                fingerprint: str) -> Reservation:
        """Charge ``epsilon`` to ``analyst`` and ``tables``; return the charge (its id and what
        the analyst has left after it) once durable.

        Raises HushError 53400 (nothing charged) when the analyst's budget or a table's cap
        would be exceeded, 42501 for an analyst with no budget, 42P01 for a table the ledger does
        not know, 22023 for an epsilon that is not a positive finite Decimal.
        """
        _check_decimal(epsilon, "epsilon")
        if not epsilon > 0:
            raise HushError(INVALID_PARAMETER_VALUE, f"epsilon must be positive, got {epsilon}",
                            "set hushql.epsilon to a positive number such as 0.1")
        names = sorted(set(tables))
        with self._connection() as conn:
            # One statement in autocommit mode is one transaction; execute returns only after
            # the server's ReadyForQuery, which follows the (synchronous) COMMIT.
            row = conn.execute(self._sql.reserve,
                               [analyst, names, epsilon, statement, fingerprint]).fetchone()
        assert row is not None
        charge_id, refusal, name, limit, left, left_after = row
        if refusal is not None:
            raise _refused(refusal, name, limit, left, epsilon)
        return Reservation(int(charge_id), left_after)

    def finish(self, charge_id: int, outcome: str) -> None:
        """Record how a reserved charge ended; its epsilon stays spent whatever the outcome.

        The outcome is a note, not a charge: if a crash loses it, the charge still stands and
        reads 'reserved' (started, outcome unknown), which is true; so its commit does not wait
        for the disk. Raises ValueError for an unknown outcome, or a charge that is unknown or
        already finished.
        """
        if outcome not in OUTCOMES:
            raise ValueError(f"outcome must be one of {', '.join(OUTCOMES)}, not {outcome!r}")
        with self._connection() as conn:
            row = conn.execute(self._sql.finish, [charge_id, outcome]).fetchone()
        if not row or not row[0]:
            raise ValueError(f"charge {charge_id} is unknown or already finished")

    def remaining(self, analyst: str) -> Decimal:
        """Epsilon the analyst may still spend (never negative); HushError 42501 if unknown."""
        return self._analyst_value(self._sql.remaining, analyst)

    def spent(self, analyst: str) -> Decimal:
        """Epsilon the analyst has spent so far; HushError 42501 if unknown."""
        return self._analyst_value(self._sql.spent, analyst)

    def table_remaining(self, table: str) -> Decimal | None:
        """Epsilon all analysts may still spend on ``table``; None when it has no cap.

        HushError 42P01 for a table the ledger does not know.
        """
        with self._connection() as conn:
            row = conn.execute(self._sql.table_remaining, [table]).fetchone()
        if row is None:
            raise _unknown_table(table)
        return row[0]

    def close(self) -> None:
        """Close the pool; the ledger cannot be used afterwards."""
        self._pool.close()

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _analyst_value(self, query: str, analyst: str) -> Decimal:
        with self._connection() as conn:
            row = conn.execute(query, [analyst]).fetchone()
        if row is None:
            raise _unknown_analyst(analyst)
        return row[0]

    def _connection(self) -> AbstractContextManager[psycopg.Connection[Any]]:
        return _borrow(self._pool, transaction=False)

    def _transaction(self) -> AbstractContextManager[psycopg.Connection[Any]]:
        return _borrow(self._pool, transaction=True)


@contextmanager
def _borrow(pool: ConnectionPool, *, transaction: bool) -> Iterator[psycopg.Connection[Any]]:
    """A pooled connection, optionally inside one transaction that commits when the block ends.

    An unreachable, broken or locked-up ledger becomes HushError XX000 with a plain message:
    failing closed, since no answer may go out without its charge. (A failure at COMMIT may still
    have recorded the charge; it then stands, which errs on the safe side.) HushErrors raised in
    the block roll the transaction back and pass through unchanged.
    """
    try:
        with pool.connection(timeout=30) as conn:
            if transaction:
                with conn.transaction():
                    yield conn
            else:
                yield conn
    except psycopg.errors.LockNotAvailable as error:
        raise HushError(INTERNAL_ERROR, "the privacy ledger is busy; nothing was run",
                        _UNAVAILABLE_HINT) from error
    except (PoolTimeout, psycopg.OperationalError) as error:
        raise _unavailable() from error


def _refused(refusal: str, name: str, limit: Decimal | None, left: Decimal | None,
             epsilon: Decimal) -> HushError:
    """The analyst's error for a refusal reported by reserve_charge."""
    if refusal == "unknown analyst":
        return _unknown_analyst(name)
    if refusal == "unknown table":
        return _unknown_table(name)
    assert limit is not None and left is not None
    if refusal == "analyst budget":
        return HushError(
            BUDGET_EXHAUSTED,
            f"privacy budget exhausted: {_show(left)} of {_show(limit)} left for analyst "
            f"{name}, this query needs {_show(epsilon)}",
            "lower hushql.epsilon or ask an administrator for more budget")
    if refusal == "population cap":
        return HushError(
            BUDGET_EXHAUSTED,
            f"population budget exhausted: {_show(left)} of {_show(limit)} left for the "
            f"individuals of population {name} (all analysts, all its tables together), this "
            f"query needs {_show(epsilon)}",
            "lower hushql.epsilon or ask the data owners to raise the tables' cap")
    if refusal == "table cap":
        return HushError(
            BUDGET_EXHAUSTED,
            f"table budget exhausted: {_show(left)} of {_show(limit)} left for table {name} "
            f"(all analysts together), this query needs {_show(epsilon)}",
            "lower hushql.epsilon or ask the table's data owner to raise its cap")
    raise AssertionError(f"unknown refusal {refusal!r} from the ledger")


def _unknown_analyst(name: str) -> HushError:
    return HushError(INSUFFICIENT_PRIVILEGE, f"analyst {name} has no privacy budget in the ledger",
                     "ask an administrator to give the analyst a budget in access.toml")


def _unknown_table(name: str) -> HushError:
    return HushError(UNDEFINED_TABLE, f"table {name} has no budget row in the privacy ledger",
                     "restart the proxy so that it records the table policies")


def _unavailable() -> HushError:
    return HushError(INTERNAL_ERROR, "the privacy ledger is unavailable; nothing was run",
                     _UNAVAILABLE_HINT)


class _Statements:
    """The ledger's SQL, composed once for one schema."""

    def __init__(self, schema: str) -> None:
        s = sql.Identifier(schema).as_string(None)
        self.reserve = (
            "SELECT charge_id, refusal, refused_name, refused_limit, refused_left, left_after "
            f"FROM {s}.reserve_charge(%s, %s::text[], %s, %s, %s)")
        self.finish = f"SELECT {s}.finish_charge(%s, %s)"
        self.remaining = (
            f"SELECT greatest(budget - spent, 0) FROM {s}.analyst_budgets WHERE analyst = %s")
        self.spent = f"SELECT spent FROM {s}.analyst_budgets WHERE analyst = %s"
        self.table_remaining = (
            # GREATEST skips NULLs, so "no cap" must stay NULL explicitly.
            "SELECT CASE WHEN p.cap IS NOT NULL THEN greatest(p.cap - p.spent, 0) END "
            f"FROM {s}.table_budgets t JOIN {s}.population_budgets p USING (population) "
            "WHERE t.table_name = %s")
        self.upsert_analyst = (
            f"INSERT INTO {s}.analyst_budgets AS a (analyst, budget) VALUES (%s, %s) "
            "ON CONFLICT (analyst) DO UPDATE SET budget = EXCLUDED.budget, updated_at = now() "
            "WHERE a.budget IS DISTINCT FROM EXCLUDED.budget")
        self.upsert_population = (
            f"INSERT INTO {s}.population_budgets AS p (population, cap) VALUES (%s, %s) "
            "ON CONFLICT (population) DO UPDATE SET cap = EXCLUDED.cap, updated_at = now() "
            "WHERE p.cap IS DISTINCT FROM EXCLUDED.cap")
        self.upsert_table = (
            f"INSERT INTO {s}.table_budgets AS t (table_name, cap, population) VALUES (%s, %s, %s) "
            "ON CONFLICT (table_name) DO UPDATE SET cap = EXCLUDED.cap, "
            "population = EXCLUDED.population, updated_at = now() "
            "WHERE (t.cap, t.population) IS DISTINCT FROM (EXCLUDED.cap, EXCLUDED.population)")


def _advisory_key(schema: str) -> int:
    """A stable signed 64-bit advisory-lock key for migrating ``schema``."""
    digest = hashlib.sha256(f"hushql ledger schema {schema}".encode()).digest()
    return int.from_bytes(digest[:8], "big", signed=True)


def _check_decimal(value: object, what: str) -> None:
    """Refuse floats and other non-Decimals (TypeError) and NaN or infinity (HushError 22023)."""
    if not isinstance(value, Decimal):
        raise TypeError(f"{what} must be a Decimal, not {type(value).__name__}")
    if not value.is_finite():
        raise HushError(INVALID_PARAMETER_VALUE, f"{what} must be a finite number, got {value}",
                        "use a positive decimal number such as 0.1")


def _show(value: Decimal) -> str:
    """A Decimal for a message: plain notation, never an exponent, never below zero."""
    return format(max(value, Decimal(0)), "f")
