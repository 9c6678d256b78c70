"""The privacy ledger: durable, exact books on how much epsilon each analyst and table has spent.

Why it is shaped like this:
- Every answer is charged *before* its query runs: ``reserve`` locks
  the analyst's budget row and the tables' budget rows, checks, adds, inserts the charge row and
  commits, all in one transaction, and returns only once that commit is durable
  (``synchronous_commit = on`` on every ledger connection). The engine releases nothing before
  ``reserve`` has returned, so no answer can outlive a lost charge. The transaction is one call
  of a schema function (``reserve_one`` since version 10; ``reserve_charge``'s checks in fewer
  statements), so rows stay locked for the server's work plus the commit instead of several
  client round trips (measured with benchmarks/bench_ledger.py: 0.5 ms p50 per reservation,
  against 0.9 ms for the same steps sent one by one).
- Group commit. Reservations that arrive while another is being committed wait, and the next
  of them to go takes every waiting reservation (up to ``batch_limit``) into one transaction,
  one call of the schema's ``reserve_batch`` (since version 8; ``reserve_charges`` in
  version 7; before, the same steps as pipelined statements): it first locks every budget row the batch touches, in the fixed order
  of ``reserve_charge`` (all analysts' rows sorted, then all their populations' rows sorted,
  then all tables' rows sorted: the same global order a lone reservation follows, so batches
  and lone reservations from any number of processes cannot deadlock); then runs
  ``reserve_charge`` for each reservation in arrival order; then commits once. Since version
  8 it first asks whether every reservation would pass ``reserve_charge``'s checks with all
  the ones before it charged (running totals per analyst and per capped population, against
  the locked rows); if so, charging them one after another would accept each, so it inserts
  the charges in arrival order and writes each budget row once with the batch's total, which
  ends in the same rows and the same books; otherwise it takes the one-after-another loop.
  (Measured: the reservation's server work fell by about half for a batch of one; a test
  checks random batches against the same reservations made one at a time.) Each caller
  waits for that commit before its query runs. The checks stay exact: inside the transaction
  each ``reserve_charge`` sees the spending of the ones before it, and no other transaction
  can touch the locked rows, so the batch charges exactly what the same reservations would
  charge one after another: a batch never overspends. A refusal is data, not an error: the
  refused reservation charges nothing and the others go on (one failing reservation aborts the
  statement, so a batch that fails as a whole fails every caller, closed: nothing is charged
  and nothing runs). Up to a quarter of the pool's connections (at least two) carry batches at
  once, so a batch waiting on a row held elsewhere does not hold up reservations for other
  rows; but batches committing at once in one process share no analyst and no table: a
  reservation for a row a committing batch holds waits for that batch (its row lock would
  make it wait in the database anyway) and goes in the next batch with the others that
  waited. (Before, batches formed as leaders came free, so reservations for one hot row were
  split among several small batches queued on its lock. Measured alternately, five rounds
  each, with bench_load.py, 32 clients of one analyst, 2 workers, quiet machine: 3.6 to 3.8
  reservations per commit before, 5.1 to 5.5 after; answers/s 847-1,037 before and 704-980
  after, no difference separable from the noise, since the proxy and the database are
  CPU-bound on two cores there.) The gain: a hot row (one analyst, one table cap) is locked,
  written and flushed to disk once per batch instead of once per answer, and the batch is one
  statement and one round trip. A new kind of budget adds its lock, in its place in the order,
  to both functions.
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
- Stored answers (schema version 6, ``proxy.stored_answers``): storing one takes no budget
  row lock. Since version 7 it is one statement (``store_answered``) that inserts the stored
  answer and records the charge 'answered', in one commit that, like ``finish``'s, does not
  wait for the disk (both are notes: a crash may lose them, never the durable charge). It
  locks only the charge row that paid (its foreign key's KEY SHARE, then the outcome's
  update), which no reservation touches and nothing else holds while the answer is being
  released, so storing joins no lock order and cannot deadlock with reservations.
  ``store_answers`` writes several such notes in one transaction: the engine queues them and a
  thread writes them after the answers are released (``proxy.answer_notes``).
- Epsilon is ``Decimal`` in Python and ``NUMERIC`` in PostgreSQL, never a float: 0.1 charged 30
  times is exactly 3.0. Sums, differences and comparisons happen in PostgreSQL (arbitrary
  precision); Python never does arithmetic on a budget.
- The schema is the program's own: created and migrated at start-up from the ordered list
  ``_MIGRATIONS``, in one transaction under an advisory lock, so proxies starting together do not
  race; ``sync_budgets`` takes the same lock, so their first imports of a policy do not either. A database whose schema is newer than this program knows is refused (``LedgerError``).
- A trigger refuses any update that raises ``spent`` above its budget or cap (SQLSTATE 23514):
  a last line of defence against a bug here or a hand-written update, not the normal path.
- A charge keeps a bounded excerpt of its statement (the first ``STATEMENT_EXCERPT``
  characters) and the SHA-256 of the whole text, never the whole text: refused-for-free and
  cheap queries must not be able to grow the ledger by megabytes each. The hash still lets an
  auditor match a charge with a statement kept elsewhere. (Rows written before schema version 4
  keep the full text they had; their hash was computed by the migration.)

This module and ``proxy.backend`` are the only ones the engine reaches PostgreSQL through.
"""

from __future__ import annotations

import collections
import datetime as dt
import getpass
import hashlib
import re
import threading
from collections.abc import Callable, Iterator, Sequence
from contextlib import AbstractContextManager, contextmanager
from decimal import Decimal
from typing import TYPE_CHECKING, Any, NamedTuple, Protocol

import psycopg
from psycopg import sql
from psycopg.types.json import Jsonb
from psycopg_pool import ConnectionPool, PoolTimeout

from proxy.errors import (
    BUDGET_EXHAUSTED,
    CONNECTION_FAILURE,
    INSUFFICIENT_PRIVILEGE,
    INTERNAL_ERROR,
    INVALID_PARAMETER_VALUE,
    UNDEFINED_TABLE,
    HushError,
)
from proxy.pooling import RECONNECT_GIVE_UP_SECONDS, check_idle

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
    # Budgets become audited events, and every charge and event joins one hash chain (see the
    # "Budget events" and "Tamper evidence" notes in the module docstring).
    ("budget events; tamper-evident hash chain over charges and budget events", (
        """
        ALTER TABLE {schema}.analyst_budgets ADD COLUMN policy_budget numeric
        """,
        "UPDATE {schema}.analyst_budgets SET policy_budget = budget",
        "COMMENT ON COLUMN {schema}.analyst_budgets.policy_budget IS "
        "'the budget access.toml last set; budget = this + grants + renewals'",
        """
        CREATE TABLE {schema}.budget_events (
            id            bigserial PRIMARY KEY,
            at            timestamptz NOT NULL DEFAULT now(),
            kind          text NOT NULL CHECK (kind IN ('import', 'grant', 'change', 'renewal')),
            subject_kind  text NOT NULL CHECK (subject_kind IN ('analyst', 'table')),
            subject       text NOT NULL,
            previous      numeric,
            amount        numeric,
            reason        text NOT NULL,
            actor         text NOT NULL,
            chain_seq     bigint UNIQUE,
            prev_hash     text,
            row_hash      text
        )
        """,
        "COMMENT ON COLUMN {schema}.budget_events.amount IS "
        "'import, change: the new budget or cap (NULL: no cap); grant, renewal: epsilon added'",
        "CREATE INDEX budget_events_by_subject ON {schema}.budget_events (subject, at)",
        """
        CREATE TABLE {schema}.chain_head (
            only_row  boolean PRIMARY KEY DEFAULT true CHECK (only_row),
            seq       bigint NOT NULL,
            hash      text NOT NULL
        )
        """,
        "INSERT INTO {schema}.chain_head (seq, hash) VALUES (0, repeat('0', 64))",
        """
        ALTER TABLE {schema}.charges ADD COLUMN chain_seq bigint UNIQUE,
            ADD COLUMN prev_hash text, ADD COLUMN row_hash text
        """,
        # What each chained row's hash covers, as canonical text independent of session
        # settings (time as epoch seconds, numbers as numeric text, JSON escaping).
        """
        CREATE FUNCTION {schema}.charge_content(c {schema}.charges) RETURNS text
        LANGUAGE sql IMMUTABLE AS $body$
            SELECT jsonb_build_array('charge', c.id, extract(epoch FROM c.reserved_at),
                                     c.analyst, c.tables, c.epsilon, c.statement,
                                     c.fingerprint)::text
        $body$
        """,
        """
        CREATE FUNCTION {schema}.budget_event_content(e {schema}.budget_events) RETURNS text
        LANGUAGE sql IMMUTABLE AS $body$
            SELECT jsonb_build_array('budget event', e.id, extract(epoch FROM e.at), e.kind,
                                     e.subject_kind, e.subject, e.previous, e.amount,
                                     e.reason, e.actor)::text
        $body$
        """,
        # Takes the head's row lock last (after any budget rows), links, advances the head.
        """
        CREATE FUNCTION {schema}.chain_next(content text, OUT seq bigint, OUT prev text,
                                            OUT hash text)
        LANGUAGE plpgsql AS $body$
        BEGIN
            SELECT h.seq + 1, h.hash INTO seq, prev FROM {schema}.chain_head h FOR UPDATE;
            hash := encode(sha256(convert_to(prev || E'\n' || content, 'UTF8')), 'hex');
            UPDATE {schema}.chain_head SET seq = chain_next.seq, hash = chain_next.hash;
        END
        $body$
        """,
        """
        CREATE FUNCTION {schema}.chain_charge() RETURNS trigger
        LANGUAGE plpgsql AS $body$
        BEGIN
            SELECT n.seq, n.prev, n.hash INTO NEW.chain_seq, NEW.prev_hash, NEW.row_hash
              FROM {schema}.chain_next({schema}.charge_content(NEW)) n;
            RETURN NEW;
        END
        $body$
        """,
        """
        CREATE FUNCTION {schema}.chain_budget_event() RETURNS trigger
        LANGUAGE plpgsql AS $body$
        BEGIN
            SELECT n.seq, n.prev, n.hash INTO NEW.chain_seq, NEW.prev_hash, NEW.row_hash
              FROM {schema}.chain_next({schema}.budget_event_content(NEW)) n;
            RETURN NEW;
        END
        $body$
        """,
        # Charges made before this version join the chain in the order they were made.
        """
        DO $body$
        DECLARE
            old {schema}.charges;
        BEGIN
            FOR old IN SELECT * FROM {schema}.charges ORDER BY id LOOP
                UPDATE {schema}.charges c SET chain_seq = n.seq, prev_hash = n.prev,
                       row_hash = n.hash
                  FROM {schema}.chain_next({schema}.charge_content(old)) n
                 WHERE c.id = old.id;
            END LOOP;
        END
        $body$
        """,
        """
        CREATE TRIGGER chained BEFORE INSERT ON {schema}.charges
        FOR EACH ROW EXECUTE FUNCTION {schema}.chain_charge()
        """,
        """
        CREATE TRIGGER chained BEFORE INSERT ON {schema}.budget_events
        FOR EACH ROW EXECUTE FUNCTION {schema}.chain_budget_event()
        """,
        # A grant: locks the analyst's row, adds, records the event (chain head last).
        """
        CREATE FUNCTION {schema}.grant_budget(analyst_name text, amount numeric,
                                              why text, who text) RETURNS numeric
        LANGUAGE plpgsql AS $body$
        DECLARE
            before numeric;
            after numeric;
        BEGIN
            SELECT budget INTO before FROM {schema}.analyst_budgets
             WHERE analyst = analyst_name FOR UPDATE;
            IF NOT FOUND THEN
                RAISE EXCEPTION 'hushql ledger: no analyst %', analyst_name
                    USING ERRCODE = 'no_data_found';
            END IF;
            UPDATE {schema}.analyst_budgets SET budget = budget + amount, updated_at = now()
             WHERE analyst = analyst_name RETURNING budget INTO after;
            INSERT INTO {schema}.budget_events
                   (kind, subject_kind, subject, previous, amount, reason, actor)
            VALUES ('grant', 'analyst', analyst_name, before, amount, why, who);
            RETURN after;
        END
        $body$
        """,
    )),
    # What administrators read through the proxy (with hushql.charges itself); read-only
    # through a role that may select these and nothing else (proxy.wire.ledger_relations).
    ("administrators' relations: budgets, grants, populations", (
        """
        CREATE VIEW {schema}.budgets AS
        SELECT analyst, budget, spent, greatest(budget - spent, 0) AS remaining, updated_at
          FROM {schema}.analyst_budgets
        """,
        """
        CREATE VIEW {schema}.grants AS
        SELECT id, at, kind, subject_kind, subject, previous, amount, reason, actor
          FROM {schema}.budget_events
        """,
        """
        CREATE VIEW {schema}.populations AS
        SELECT table_name AS name, cap, spent, updated_at FROM {schema}.table_budgets
        """,
    )),
    ("statement excerpt and hash", (
        "ALTER TABLE {schema}.charges ADD COLUMN statement_sha256 text",
        "UPDATE {schema}.charges "
        "SET statement_sha256 = encode(sha256(convert_to(statement, 'UTF8')), 'hex')",
        "COMMENT ON COLUMN {schema}.charges.statement IS "
        "'the first characters of the statement (rows before schema version 4: all of it)'",
        "COMMENT ON COLUMN {schema}.charges.statement_sha256 IS "
        "'SHA-256 of the whole statement text in UTF-8, hex'",
        # reserve_charge and the hash in one statement, so in one transaction.
        """
        CREATE FUNCTION {schema}.reserve_charge_hashed(
            analyst_name text, table_names text[], amount numeric,
            statement_excerpt text, statement_hash text, statement_fingerprint text,
            OUT charge_id bigint, OUT refusal text, OUT refused_name text,
            OUT refused_limit numeric, OUT refused_left numeric, OUT left_after numeric)
        LANGUAGE plpgsql AS $body$
        BEGIN
            SELECT r.charge_id, r.refusal, r.refused_name, r.refused_limit, r.refused_left,
                   r.left_after
              INTO charge_id, refusal, refused_name, refused_limit, refused_left, left_after
              FROM {schema}.reserve_charge(analyst_name, table_names, amount, statement_excerpt,
                                           statement_fingerprint) AS r;
            IF charge_id IS NOT NULL THEN
                UPDATE {schema}.charges SET statement_sha256 = statement_hash WHERE id = charge_id;
            END IF;
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
        # Administrators' view of caps (migration 3) now reads the populations.
        """
        CREATE OR REPLACE VIEW {schema}.populations AS
        SELECT population AS name, cap, spent, updated_at FROM {schema}.population_budgets
        """,
    )),
    # Same question, same answer (proxy.stored_answers): each answered charge may store its
    # released answer, to be given again for nothing. Rows are only ever added (a fresh answer
    # is a new row; the newest is given). Not in the hash chain: storing spends nothing, and
    # each row names the chained charge that paid for it.
    ("stored answers: a released answer given again without a new charge", (
        """
        CREATE TABLE {schema}.stored_answers (
            id          bigserial PRIMARY KEY,
            stored_at   timestamptz NOT NULL DEFAULT now(),
            analyst     text NOT NULL,
            question    text NOT NULL,
            statement   text NOT NULL,
            epsilon     numeric NOT NULL CHECK (epsilon > 0),
            charge_id   bigint NOT NULL UNIQUE REFERENCES {schema}.charges (id),
            answer      jsonb NOT NULL
        )
        """,
        "COMMENT ON COLUMN {schema}.stored_answers.question IS "
        "'SHA-256 of the analyst, normalised statement, epsilon and policy (proxy.stored_answers)'",
        "COMMENT ON COLUMN {schema}.stored_answers.statement IS "
        "'the first characters of the normalised statement'",
        "CREATE INDEX stored_answers_by_question ON {schema}.stored_answers "
        "(analyst, question, id)",
    )),
    # A group commit's batch in one statement (see the module docstring); an answered
    # charge's two notes in one statement and one commit that does not wait for the disk (see
    # Ledger.store_answer): its stored answer and its outcome.
    ("a batch of reservations in one statement; stored answer and 'answered' outcome in one "
     "asynchronous commit", (
        """
        CREATE FUNCTION {schema}.reserve_charges(requests jsonb)
        RETURNS TABLE (charge_id bigint, refusal text, refused_name text, refused_limit numeric,
                       refused_left numeric, left_after numeric)
        LANGUAGE plpgsql AS $body$
        DECLARE
            analyst_names text[] := ARRAY(SELECT DISTINCT r ->> 'analyst'
                                            FROM jsonb_array_elements(requests) AS r);
            table_names text[] := ARRAY(SELECT DISTINCT t
                                          FROM jsonb_array_elements(requests) AS r,
                                               jsonb_array_elements_text(r -> 'tables') AS t);
            request jsonb;
        BEGIN
            -- The one lock order (as reserve_charge's): analysts, populations, tables, each
            -- sorted; ORDER BY runs before the row locks, so rows are locked in this order.
            PERFORM 1 FROM {schema}.analyst_budgets WHERE analyst = ANY (analyst_names)
              ORDER BY analyst COLLATE "C" FOR UPDATE;
            PERFORM 1 FROM {schema}.population_budgets
              WHERE population IN (SELECT t.population FROM {schema}.table_budgets t
                                    WHERE t.table_name = ANY (table_names))
              ORDER BY population COLLATE "C" FOR UPDATE;
            PERFORM 1 FROM {schema}.table_budgets WHERE table_name = ANY (table_names)
              ORDER BY table_name COLLATE "C" FOR UPDATE;
            FOR request IN SELECT r FROM jsonb_array_elements(requests) WITH ORDINALITY AS e (r, n)
                            ORDER BY n LOOP
                RETURN QUERY SELECT * FROM {schema}.reserve_charge_hashed(
                    request ->> 'analyst',
                    ARRAY(SELECT jsonb_array_elements_text(request -> 'tables')),
                    (request ->> 'epsilon')::numeric, request ->> 'statement',
                    request ->> 'statement_sha256', request ->> 'fingerprint');
            END LOOP;
        END
        $body$
        """,
        """
        CREATE FUNCTION {schema}.store_answered(
            analyst_name text, question_key text, statement_text text, amount numeric,
            paid_by bigint, answer_json jsonb)
        RETURNS boolean
        LANGUAGE plpgsql AS $body$
        BEGIN
            PERFORM set_config('synchronous_commit', 'off', true);
            INSERT INTO {schema}.stored_answers
                   (analyst, question, statement, epsilon, charge_id, answer)
            VALUES (analyst_name, question_key, statement_text, amount, paid_by, answer_json);
            UPDATE {schema}.charges SET outcome = 'answered', finished_at = clock_timestamp()
             WHERE id = paid_by AND outcome = 'reserved';
            RETURN FOUND;
        END
        $body$
        """,
    )),
    # A batch whose every reservation fits, even with all the ones before it charged, is
    # charged set-wise (see the module docstring, "Group commit"): each budget row is written
    # once per batch, not once per reservation. Any other batch takes version 7's loop.
    ("a batch of reservations that all fit is charged with one write per budget row", (
        # A batch's requests as rows, in arrival order, each table named once.
        """
        CREATE FUNCTION {schema}.batch_requests(requests jsonb)
        RETURNS TABLE (n bigint, analyst text, amount numeric, tables text[])
        LANGUAGE sql IMMUTABLE AS $body$
            SELECT e.n, e.r ->> 'analyst', (e.r ->> 'epsilon')::numeric,
                   ARRAY(SELECT DISTINCT jsonb_array_elements_text(e.r -> 'tables'))
              FROM jsonb_array_elements(requests) WITH ORDINALITY AS e (r, n)
        $body$
        """,
        # Several answers' notes (see Ledger.store_answers) in one statement and one commit
        # that does not wait for the disk; returns the charges noted 'answered'.
        """
        CREATE FUNCTION {schema}.store_answered_batch(notes jsonb) RETURNS SETOF bigint
        LANGUAGE plpgsql AS $body$
        BEGIN
            PERFORM set_config('synchronous_commit', 'off', true);
            INSERT INTO {schema}.stored_answers
                   (analyst, question, statement, epsilon, charge_id, answer)
            SELECT e.n ->> 'analyst', e.n ->> 'question', e.n ->> 'statement',
                   (e.n ->> 'epsilon')::numeric, (e.n ->> 'charge_id')::bigint,
                   (e.n ->> 'answer')::jsonb
              FROM jsonb_array_elements(notes) WITH ORDINALITY AS e (n, k) ORDER BY e.k;
            RETURN QUERY
            UPDATE {schema}.charges SET outcome = 'answered', finished_at = clock_timestamp()
             WHERE id IN (SELECT (n ->> 'charge_id')::bigint FROM jsonb_array_elements(notes) n)
               AND outcome = 'reserved'
            RETURNING id;
        END
        $body$
        """,
        """
        CREATE FUNCTION {schema}.reserve_batch(requests jsonb)
        RETURNS TABLE (charge_id bigint, refusal text, refused_name text, refused_limit numeric,
                       refused_left numeric, left_after numeric)
        LANGUAGE plpgsql AS $body$
        DECLARE
            analyst_names text[] := ARRAY(SELECT DISTINCT r.analyst
                                            FROM {schema}.batch_requests(requests) AS r);
            table_names text[] := ARRAY(SELECT DISTINCT t
                                          FROM {schema}.batch_requests(requests) AS r,
                                               unnest(r.tables) AS t);
            request jsonb;
            all_fit boolean;
            lefts numeric[];
            n integer := 0;
        BEGIN
            -- The one lock order (as reserve_charge's): analysts, populations, tables, each
            -- sorted; ORDER BY runs before the row locks, so rows are locked in this order.
            PERFORM 1 FROM {schema}.analyst_budgets WHERE analyst = ANY (analyst_names)
              ORDER BY analyst COLLATE "C" FOR UPDATE;
            PERFORM 1 FROM {schema}.population_budgets
              WHERE population IN (SELECT t.population FROM {schema}.table_budgets t
                                    WHERE t.table_name = ANY (table_names))
              ORDER BY population COLLATE "C" FOR UPDATE;
            PERFORM 1 FROM {schema}.table_budgets WHERE table_name = ANY (table_names)
              ORDER BY table_name COLLATE "C" FOR UPDATE;
            -- Does every reservation pass reserve_charge's checks with all before it charged?
            -- Known analyst, every table known, running total within the analyst's headroom
            -- and within each capped population's (a population counted once per request).
            WITH r AS (SELECT * FROM {schema}.batch_requests(requests)),
            by_analyst AS (
                SELECT r.n, b.analyst IS NOT NULL AS known,
                       b.budget - b.spent
                           - sum(r.amount) OVER (PARTITION BY r.analyst ORDER BY r.n)
                           AS left_after,
                       (SELECT count(*) FROM {schema}.table_budgets t
                         WHERE t.table_name = ANY (r.tables)) = cardinality(r.tables)
                           AS tables_known
                  FROM r LEFT JOIN {schema}.analyst_budgets b ON b.analyst = r.analyst),
            touched AS (
                SELECT DISTINCT r.n, r.amount, t.population
                  FROM r JOIN {schema}.table_budgets t ON t.table_name = ANY (r.tables)),
            by_population AS (
                SELECT bool_and(p.cap IS NULL
                                OR p.cap - p.spent - x.running >= 0) AS fits
                  FROM (SELECT touched.population,
                               sum(touched.amount) OVER (PARTITION BY touched.population
                                                         ORDER BY touched.n) AS running
                          FROM touched) x
                  JOIN {schema}.population_budgets p ON p.population = x.population)
            SELECT bool_and(a.known AND a.tables_known AND a.left_after >= 0)
                       AND coalesce((SELECT fits FROM by_population), true),
                   array_agg(a.left_after ORDER BY a.n)
              INTO all_fit, lefts
              FROM by_analyst a;
            IF NOT coalesce(all_fit, false) THEN
                -- Some reservation may be refused: one after another (version 7's function;
                -- the rows it locks are held already).
                RETURN QUERY SELECT * FROM {schema}.reserve_charges(requests);
                RETURN;
            END IF;
            -- All fit: the charges in arrival order (ids and the hash chain follow it), then
            -- each budget row once, by the batch's total on it.
            FOR request IN SELECT r FROM jsonb_array_elements(requests)
                             WITH ORDINALITY AS e (r, k) ORDER BY k LOOP
                n := n + 1;
                INSERT INTO {schema}.charges
                       (analyst, tables, epsilon, statement, fingerprint, statement_sha256)
                VALUES (request ->> 'analyst',
                        ARRAY(SELECT jsonb_array_elements_text(request -> 'tables')),
                        (request ->> 'epsilon')::numeric, request ->> 'statement',
                        request ->> 'fingerprint', request ->> 'statement_sha256')
                RETURNING id INTO charge_id;
                refusal := NULL;
                refused_name := NULL;
                refused_limit := NULL;
                refused_left := NULL;
                left_after := greatest(lefts[n], 0);
                RETURN NEXT;
            END LOOP;
            WITH r AS (SELECT * FROM {schema}.batch_requests(requests))
            UPDATE {schema}.analyst_budgets b SET spent = b.spent + s.total, updated_at = now()
              FROM (SELECT r.analyst, sum(r.amount) AS total FROM r GROUP BY r.analyst) s
             WHERE b.analyst = s.analyst;
            WITH r AS (SELECT * FROM {schema}.batch_requests(requests)),
            touched AS (
                SELECT DISTINCT r.n, r.amount, t.population
                  FROM r JOIN {schema}.table_budgets t ON t.table_name = ANY (r.tables))
            UPDATE {schema}.population_budgets p SET spent = p.spent + s.total,
                   updated_at = now()
              FROM (SELECT population, sum(amount) AS total FROM touched
                     GROUP BY population) s
             WHERE p.population = s.population;
            WITH r AS (SELECT * FROM {schema}.batch_requests(requests))
            UPDATE {schema}.table_budgets t SET spent = t.spent + s.total, updated_at = now()
              FROM (SELECT w.name, sum(r.amount) AS total
                      FROM r CROSS JOIN unnest(r.tables) AS w (name) GROUP BY w.name) s
             WHERE t.table_name = s.name;
        END
        $body$
        """,
    )),
    # Version 8's store_answered_batch found its charges with ``id IN (SELECT ... FROM
    # jsonb_array_elements(notes))``: PostgreSQL planned that as a hash join over a
    # sequential scan of every charge ever made (seen at 8,600 charges: 1,482 scans reading
    # 6.2M rows in 10 s of load), so each batch of notes cost more as the ledger grew. An
    # array of ids (``= ANY``) is looked up in the primary key's index, whatever the size.
    ("notes find their charges by the primary key's index, not by scanning all charges", (
        """
        CREATE OR REPLACE FUNCTION {schema}.store_answered_batch(notes jsonb)
        RETURNS SETOF bigint
        LANGUAGE plpgsql AS $body$
        BEGIN
            PERFORM set_config('synchronous_commit', 'off', true);
            INSERT INTO {schema}.stored_answers
                   (analyst, question, statement, epsilon, charge_id, answer)
            SELECT e.n ->> 'analyst', e.n ->> 'question', e.n ->> 'statement',
                   (e.n ->> 'epsilon')::numeric, (e.n ->> 'charge_id')::bigint,
                   (e.n ->> 'answer')::jsonb
              FROM jsonb_array_elements(notes) WITH ORDINALITY AS e (n, k) ORDER BY e.k;
            RETURN QUERY
            UPDATE {schema}.charges SET outcome = 'answered', finished_at = clock_timestamp()
             WHERE id = ANY (ARRAY(SELECT (n ->> 'charge_id')::bigint
                                     FROM jsonb_array_elements(notes) n))
               AND outcome = 'reserved'
            RETURNING id;
        END
        $body$
        """,
    )),
    # A lone reservation (a group commit's batch of one: every reservation when analysts
    # come one at a time) is the answer's one wait for the disk and the other statements in
    # its transaction; reserve_charge_hashed ran reserve_charge and then updated the new row
    # for its hash, and checked each table and each population in a statement of its own.
    # reserve_one makes the same checks, refusals and rows (the lock order and its reasons
    # are reserve_charge's), in fewer statements: the charge is inserted with its hash, the
    # tables are counted in the statement that finds their populations (the missing one is
    # looked for only when one is missing), and the populations are locked in order and the
    # first that cannot pay found in one statement. (Measured by the lead, lone reservations
    # alternated on one ledger: 0.69 ms against 0.78 ms median, of which about 0.37 ms is any
    # durable commit's floor.)
    ("a lone reservation in fewer statements", (
        """
        CREATE FUNCTION {schema}.reserve_one(
            analyst_name text, table_names text[], amount numeric,
            statement_excerpt text, statement_hash text, statement_fingerprint text,
            OUT charge_id bigint, OUT refusal text, OUT refused_name text,
            OUT refused_limit numeric, OUT refused_left numeric, OUT left_after numeric)
        LANGUAGE plpgsql AS $body$
        DECLARE
            budget_row record;
            populations text[];
            known integer;
            short record;
        BEGIN
            SELECT b.budget, b.budget - b.spent AS headroom INTO budget_row
              FROM {schema}.analyst_budgets b WHERE b.analyst = analyst_name FOR UPDATE;
            IF NOT FOUND THEN
                refusal := 'unknown analyst';
                refused_name := analyst_name;
                RETURN;
            END IF;
            IF amount > budget_row.headroom THEN
                refusal := 'analyst budget';
                refused_name := analyst_name;
                refused_limit := budget_row.budget;
                refused_left := budget_row.headroom;
                RETURN;
            END IF;
            SELECT array_agg(DISTINCT t.population), count(*) INTO populations, known
              FROM {schema}.table_budgets t WHERE t.table_name = ANY (table_names);
            IF known <> cardinality(table_names) THEN  -- one missing, or a name twice
                SELECT min(wanted COLLATE "C") INTO refused_name
                  FROM unnest(table_names) AS wanted
                 WHERE NOT EXISTS (SELECT 1 FROM {schema}.table_budgets t
                                    WHERE t.table_name = wanted);
                IF refused_name IS NOT NULL THEN
                    refusal := 'unknown table';
                    RETURN;
                END IF;
            END IF;
            -- The populations' rows locked in codepoint order (the LockRows step sits above
            -- the sort), then the first of them that cannot pay, as reserve_charge's loop.
            SELECT l.population, l.cap, l.headroom INTO short
              FROM (SELECT p.population, p.cap, p.cap - p.spent AS headroom
                      FROM {schema}.population_budgets p
                     WHERE p.population = ANY (populations)
                     ORDER BY p.population COLLATE "C"
                       FOR UPDATE) AS l
             WHERE l.cap IS NOT NULL AND amount > l.headroom
             ORDER BY l.population COLLATE "C"
             LIMIT 1;
            IF FOUND THEN
                -- A table that is its own population keeps the table's wording.
                refusal := CASE WHEN short.population = ANY (table_names)
                                THEN 'table cap' ELSE 'population cap' END;
                refused_name := short.population;
                refused_limit := short.cap;
                refused_left := short.headroom;
                RETURN;
            END IF;
            UPDATE {schema}.analyst_budgets SET spent = spent + amount, updated_at = now()
             WHERE analyst = analyst_name
            RETURNING greatest(budget - spent, 0) INTO left_after;
            UPDATE {schema}.population_budgets SET spent = spent + amount, updated_at = now()
             WHERE population = ANY (populations);
            UPDATE {schema}.table_budgets SET spent = spent + amount, updated_at = now()
             WHERE table_name = ANY (table_names);
            INSERT INTO {schema}.charges
                   (analyst, tables, epsilon, statement, fingerprint, statement_sha256)
            VALUES (analyst_name, table_names, amount, statement_excerpt, statement_fingerprint,
                    statement_hash)
            RETURNING id INTO charge_id;
        END
        $body$
        """,
    )),
]


STATEMENT_EXCERPT = 1000
"""Characters of a statement the ledger keeps (with the SHA-256 of all of it)."""

SCHEMA_VERSION = len(_MIGRATIONS)
"""The ledger schema version this program creates and understands."""

# How long a call waits for a pooled connection before failing closed (08006): as in
# proxy.backend, short enough that a database outage is reported within seconds.
BORROW_TIMEOUT_SECONDS = 10.0
_UNAVAILABLE_HINT = "try again shortly; if it persists, tell an administrator"


class _Request(NamedTuple):
    """One reservation, in ``reserve_one``'s argument order."""

    analyst: str
    tables: list[str]
    epsilon: Decimal
    statement: str  # the first STATEMENT_EXCERPT characters
    statement_sha256: str  # of the whole text
    fingerprint: str


class _Waiter:
    """A reservation waiting in a group commit: its request and the budget rows it touches,
    then its row or error (or, for the waiter that runs a batch, the batch)."""

    def __init__(self, request: _Request) -> None:
        self.request = request
        self.rows = frozenset([("analyst", request.analyst),
                               *(("table", t) for t in request.tables)])
        self.woken = threading.Event()
        self.batch: list[_Waiter] | None = None
        self.done = False
        self.row: tuple[Any, ...] | None = None
        self.error: BaseException | None = None


class _GroupCommit:
    """Batches concurrent reservations (module docstring, "Group commit").

    Everything that decides who is batched with whom lives here, under one lock:
    - a batch is formed when fewer than ``in_flight`` batches are committing: it takes, in
      arrival order and up to ``limit``, every waiting reservation that shares no analyst and
      no table with a batch already committing; its first reservation's thread runs it;
    - a reservation that shares a row with a committing batch waits for that batch to end
      (its row lock would make it wait in the database anyway) and then goes in the next
      batch with the others that waited, so a hot row is written once per batch;
    - when a batch ends, its rows are free again and batches are formed for what waits.
    """

    def __init__(self, run: Callable[[list[_Request]], list[tuple[Any, ...]]], limit: int,
                 in_flight: int) -> None:
        if limit < 1 or in_flight < 1:
            raise ValueError("batch_limit and batches in flight must be at least 1")
        self._run = run
        self._limit = limit
        self._in_flight = in_flight
        self._lock = threading.Lock()
        self._waiting: list[_Waiter] = []
        self._busy: collections.Counter[tuple[str, str]] = collections.Counter()
        self._committing = 0

    def submit(self, request: _Request) -> tuple[Any, ...]:
        """The request's ``reserve_charge`` row once its batch has committed; raises the
        batch's error."""
        me = _Waiter(request)
        with self._lock:
            self._waiting.append(me)
            self._form_batches()
        while not me.done:
            if me.batch is not None:
                self._commit(me.batch)
                continue
            me.woken.wait()  # for its batch's commit, or to run its batch
            me.woken.clear()
        if me.error is not None:
            raise _copy(me.error)
        assert me.row is not None
        return me.row

    def _form_batches(self) -> None:
        """Forms batches while slots are free and some waiting reservation's rows are free,
        and wakes each batch's runner. The caller holds ``_lock``."""
        while self._committing < self._in_flight and self._waiting:
            batch: list[_Waiter] = []
            rest: list[_Waiter] = []
            for waiter in self._waiting:
                if len(batch) < self._limit and not any(row in self._busy
                                                        for row in waiter.rows):
                    batch.append(waiter)
                else:
                    rest.append(waiter)
            if not batch:
                return
            self._waiting = rest
            self._committing += 1
            for waiter in batch:
                self._busy.update(waiter.rows)
            batch[0].batch = batch
            batch[0].woken.set()

    def _commit(self, batch: list[_Waiter]) -> None:
        """Runs one batch, gives each its row (or the batch's error), frees its rows and
        forms the next batches."""
        try:
            rows = self._run([w.request for w in batch])
            for waiter, row in zip(batch, rows, strict=True):
                waiter.row = row
        except BaseException as error:  # the whole batch fails closed
            for waiter in batch:
                waiter.error = error
        finally:
            batch[0].batch = None
            with self._lock:
                self._committing -= 1
                for waiter in batch:
                    self._busy.subtract(waiter.rows)
                self._busy = +self._busy  # drops the rows no batch holds
                self._form_batches()
            for waiter in batch:
                waiter.done = True
                waiter.woken.set()


def _copy(error: BaseException) -> BaseException:
    """A HushError of the caller's own (a batch's callers raise in their own threads)."""
    if isinstance(error, HushError):
        return HushError(error.sqlstate, error.message, error.hint, error.detail)
    return error


class Reservation(NamedTuple):
    """A durable charge: its id (for ``finish``), the analyst's budget left after it, and its
    time (the charge row's ``reserved_at``: when it was paid)."""

    charge_id: int
    remaining: Decimal
    reserved_at: dt.datetime


class StoredAnswer(NamedTuple):
    """An answer kept in the ledger: its JSON (as psycopg reads jsonb), when it was first paid
    for, the charge that paid, and what the analyst has left now (read in the same round
    trip)."""

    answer: Any
    paid_at: dt.datetime
    charge_id: int
    remaining: Decimal


class _AnswerNote(Protocol):
    """What ``store_answers`` reads of a note (``proxy.answer_notes.Note``)."""

    analyst: str
    question: str
    statement: str
    epsilon: Decimal
    charge_id: int
    answer: str


class LedgerError(Exception):
    """The ledger cannot be used at all (schema newer than this program, bad schema name)."""


class Ledger:
    """Budgets and charges in a PostgreSQL schema of the program's own, shared by all proxies.

    Thread-safe: each call borrows a connection from the pool for one transaction. Budget
    amounts and epsilon are Decimals, never floats (TypeError otherwise).
    """

    def __init__(self, dsn: str, *, schema: str = "hushql", pool_size: int = 4,
                 lock_timeout: float = 10.0, batch_limit: int = 64) -> None:
        """Open a pool on ``dsn`` and bring the schema to ``SCHEMA_VERSION``.

        ``lock_timeout`` (seconds) bounds how long a reservation waits for a budget row held by
        someone else before it fails (closed) instead of hanging. ``batch_limit`` caps the
        reservations committed together (1: each commits alone).
        Raises LedgerError for a bad schema name or a schema newer than this program.
        """
        if not _SCHEMA_NAME.fullmatch(schema):
            raise LedgerError(f"ledger schema name {schema!r} must be a lower-case SQL identifier")
        if pool_size < 1:
            raise ValueError("pool_size must be at least 1")
        self.schema = schema
        self._lock_timeout_ms = max(1, int(lock_timeout * 1000))
        self._sql = _Statements(schema)
        self._group = _GroupCommit(self._reserve_together, batch_limit,
                                   in_flight=max(2, pool_size // 4))
        self._pool = ConnectionPool(
            dsn, min_size=1, max_size=pool_size, open=False, configure=self._configure,
            check=check_idle, reconnect_timeout=RECONNECT_GIVE_UP_SECONDS,
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

    def sync_budgets(self, policies: Policies, *, source: str = "access.toml",
                     actor: str | None = None) -> list[str]:
        """Bring budgets and caps in line with ``policies`` through audited events; return one
        line per analyst or table whose budget is now below what it has already spent.

        A budget appears in the ledger as an 'import' event; a policy that later changes it
        adds a 'change' event that moves the budget by the policy's difference, so grants and
        renewals made in the ledger are kept. Nothing is written when nothing changed. Spending
        and history are never touched; rows no longer in the policy are kept. ``source`` names
        the policy (folder and digest) in each event's reason; ``actor`` defaults to the
        operating-system user.
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
        who = actor or os_user()
        with self._transaction() as conn, conn.cursor() as cur:
            # Proxies starting together (serve --workers N) each sync the same policy: the
            # schema's advisory lock makes them take turns, so the second finds the rows the
            # first inserted instead of failing on their keys. Reservations never take it, so
            # it adds nothing to their lock order.
            cur.execute("SELECT pg_advisory_xact_lock(%s)", [_advisory_key(self.schema)])
            # Every existing row is locked first, in reserve's order (analysts, populations,
            # then tables, codepoint order), so that the chain head, locked by the first event,
            # comes last.
            cur.execute(self._sql.lock_analysts, [[n for n, _ in analysts]])
            known_analysts = {row[0]: row[1:] for row in cur.fetchall()}
            cur.execute(self._sql.lock_populations, [[n for n, _ in populations]])
            known_populations = {row[0]: row[1] for row in cur.fetchall()}
            cur.execute(self._sql.lock_tables, [[n for n, _, _ in tables]])
            known_tables = {row[0]: row[1:] for row in cur.fetchall()}
            for name, budget in analysts:
                if name not in known_analysts:
                    cur.execute(self._sql.insert_analyst, [name, budget, budget])
                    cur.execute(self._sql.event, ["import", "analyst", name, None, budget,
                                                  f"imported from {source}", who])
                    continue
                old_policy, current = known_analysts[name]
                old_policy = current if old_policy is None else old_policy
                if old_policy != budget:
                    cur.execute(self._sql.change_analyst, [budget, old_policy, budget, name])
                    cur.execute(self._sql.event, ["change", "analyst", name, old_policy, budget,
                                                  f"changed by {source}", who])
            for name, cap in populations:
                if name not in known_populations:
                    cur.execute(self._sql.insert_population, [name, cap])
                elif known_populations[name] != cap:
                    cur.execute(self._sql.change_population, [cap, name])
            for name, cap, population in tables:
                if name not in known_tables:
                    cur.execute(self._sql.insert_table, [name, cap, population])
                    cur.execute(self._sql.event, ["import", "table", name, None, cap,
                                                  f"imported from {source}", who])
                    continue
                old_cap, old_population = known_tables[name]
                if old_cap != cap:
                    cur.execute(self._sql.change_table, [cap, name])
                    cur.execute(self._sql.event, ["change", "table", name, old_cap,
                                                  cap, f"changed by {source}", who])
                if old_population != population:
                    cur.execute(self._sql.move_table, [population, name])
        return self.overspent()

    def renew(self, analyst: str, budget: Decimal, period_start: dt.datetime,
              reason: str) -> bool:
        """Top ``analyst``'s remaining budget up to ``budget`` with a 'renewal' event, unless
        the analyst was imported since ``period_start`` or a renewal with this ``reason`` (which
        names the period) exists; True when renewed.

        Under the analyst's row lock, so concurrent proxies renew a period once. A renewal that
        adds nothing (the budget is still full) is recorded too: it marks the period as renewed.
        """
        _check_decimal(budget, "a budget")
        with self._transaction() as conn:
            row = conn.execute(self._sql.lock_analyst, [analyst]).fetchone()
            if row is None:
                return False
            current, spent = row
            done = conn.execute(self._sql.renewed_since,
                                [analyst, period_start, reason]).fetchone()
            if done is not None and done[0]:
                return False
            amount = max(budget - (current - spent), Decimal(0))
            conn.execute(self._sql.add_budget, [amount, analyst])
            conn.execute(self._sql.event, ["renewal", "analyst", analyst, current, amount,
                                           reason, os_user()])
        return True

    def overspent(self) -> list[str]:
        """One line per analyst or table whose budget or cap is below what it has spent (a
        policy lowered it); such an account or table answers no further queries."""
        with self._connection() as conn:
            rows = conn.execute(self._sql.overspent).fetchall()
        return [f"{kind} {name}: {'budget' if kind == 'analyst' else 'cap'} {_show(limit)} is "
                f"below the {_show(spent)} already spent; it answers no further queries until "
                f"{'more is granted' if kind == 'analyst' else 'the cap is raised'}"
                for kind, name, limit, spent in rows]

    def reserve(self, analyst: str, tables: list[str], epsilon: Decimal, statement: str,
                fingerprint: str) -> Reservation:
        """Charge ``epsilon`` to ``analyst`` and ``tables``; return the charge (its id and what
        the analyst has left after it) once durable. The charge keeps the first
        ``STATEMENT_EXCERPT`` characters of ``statement`` and the SHA-256 of all of it.

        Raises HushError 53400 (nothing charged) when the analyst's budget or a table's cap
        would be exceeded, 42501 for an analyst with no budget, 42P01 for a table the ledger does
        not know, 22023 for an epsilon that is not a positive finite Decimal.
        """
        _check_decimal(epsilon, "epsilon")
        if not epsilon > 0:
            raise HushError(INVALID_PARAMETER_VALUE, f"epsilon must be positive, got {epsilon}",
                            "set hushql.epsilon to a positive number such as 0.1")
        request = _Request(analyst, sorted(set(tables)), epsilon, statement[:STATEMENT_EXCERPT],
                           statement_hash(statement), fingerprint)
        charge_id, refusal, name, limit, left, left_after, at = self._group.submit(request)
        if refusal is not None:
            raise _refused(refusal, name, limit, left, epsilon)
        return Reservation(int(charge_id), left_after, at)

    def _reserve_together(self, requests: list[_Request]) -> list[tuple[Any, ...]]:
        """Runs ``reserve_charge`` for each request in one durable transaction (see the module
        docstring); returns its rows in order. Raises HushError for the whole batch."""
        if len(requests) == 1:
            with self._connection() as conn:
                # One statement in autocommit mode is one transaction; execute returns only
                # after the server's ReadyForQuery, which follows the (synchronous) COMMIT.
                row = conn.execute(self._sql.reserve, list(requests[0])).fetchone()
            assert row is not None
            return [row]
        batch = Jsonb([{"analyst": r.analyst, "tables": r.tables, "epsilon": str(r.epsilon),
                        "statement": r.statement, "statement_sha256": r.statement_sha256,
                        "fingerprint": r.fingerprint} for r in requests])
        with self._connection() as conn:
            # One statement in autocommit mode, so one transaction (as for a lone reservation).
            rows = conn.execute(self._sql.reserve_batch, [batch]).fetchall()
        return rows

    def store_answer(self, analyst: str, question: str, statement: str, epsilon: Decimal,
                     charge_id: int, answer: str) -> bool:
        """Keep the answer (JSON text) about to be released for ``charge_id`` under the key
        ``question`` and record the charge 'answered', in one statement; ``statement`` is kept
        as an excerpt. True when the outcome was recorded (False: the charge was unknown or
        already finished). A charge stores at most one answer (a second raises psycopg's
        UniqueViolation, and records nothing).

        Like ``finish``, its commit does not wait for the disk: both are notes, not charges. A
        crash may lose them; the charge itself was durable before the query ran, so what is
        lost is a reuse (the analyst pays again for the same question) and the outcome (the
        charge reads 'reserved'), never a charge.
        """
        with self._connection() as conn:
            row = conn.execute(self._sql.store_answered, [
                analyst, question, statement[:STATEMENT_EXCERPT], epsilon, charge_id,
                answer]).fetchone()
        return bool(row and row[0])

    def store_answers(self, notes: Sequence[_AnswerNote]) -> list[bool]:
        """``store_answer`` for each note, in one statement and one commit that does not wait
        for the disk; per note, whether its outcome was recorded. If the statement fails (say
        one note's charge already stored an answer), each note is stored alone instead, a
        failure counting as False."""
        if len(notes) == 1:
            note = notes[0]
            return [self.store_answer(note.analyst, note.question, note.statement,
                                      note.epsilon, note.charge_id, note.answer)]
        batch = Jsonb([{"analyst": n.analyst, "question": n.question,
                        "statement": n.statement[:STATEMENT_EXCERPT], "epsilon": str(n.epsilon),
                        "charge_id": n.charge_id, "answer": n.answer} for n in notes])
        try:
            with self._connection() as conn:
                noted = {row[0] for row in conn.execute(self._sql.store_answered_batch,
                                                        [batch]).fetchall()}
            return [n.charge_id in noted for n in notes]
        except Exception:
            pass
        recorded = []
        for n in notes:
            try:
                recorded.append(self.store_answer(n.analyst, n.question, n.statement, n.epsilon,
                                                  n.charge_id, n.answer))
            except Exception:  # the caller records the outcome alone, and logs if it cannot
                recorded.append(False)
        return recorded

    def stored_answer(self, analyst: str, question: str) -> StoredAnswer | None:
        """The newest answer stored for ``analyst`` under ``question``, or None."""
        with self._connection() as conn:
            row = conn.execute(self._sql.stored_answer, [analyst, question]).fetchone()
        return None if row is None else StoredAnswer(row[0], row[1], int(row[2]), row[3])

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

    An unreachable or broken ledger becomes HushError 08006 (connection failure: clients may
    retry), a locked-up one XX000, each with a plain message: failing closed, since no answer may go out without its charge. (A failure at COMMIT may still
    have recorded the charge; it then stands, which errs on the safe side.) HushErrors raised in
    the block roll the transaction back and pass through unchanged.
    """
    try:
        with pool.connection(timeout=BORROW_TIMEOUT_SECONDS) as conn:
            if transaction:
                with conn.transaction():
                    yield conn
            else:
                yield conn
    except psycopg.errors.LockNotAvailable as error:
        raise HushError(INTERNAL_ERROR, "the privacy ledger is busy; nothing was run",
                        _UNAVAILABLE_HINT) from error
    except PoolTimeout as error:
        raise _unavailable() from error
    except psycopg.OperationalError as error:
        # The server may have restarted under the pool: drop every idle connection it broke,
        # so the next call connects afresh instead of failing on another stale one.
        _discard_broken(pool)
        raise _unavailable() from error


def _discard_broken(pool: ConnectionPool) -> None:
    """Asks the pool to test its idle connections and replace the broken ones (in the
    pool's own worker threads); never raises."""
    try:
        pool.check()
    except Exception:
        pass


def _refused(refusal: str, name: str, limit: Decimal | None, left: Decimal | None,
             epsilon: Decimal) -> HushError:
    """The analyst's error for a refusal reported by reserve_charge."""
    if refusal == "unknown analyst":
        return _unknown_analyst(name)
    if refusal == "unknown table":
        return _unknown_table(name)
    assert limit is not None and left is not None
    if left < 0:
        # A policy lowered the budget or cap below what was already spent: no epsilon helps.
        what = f"analyst {name}'s budget" if refusal == "analyst budget" else f"table {name}'s cap"
        return HushError(
            BUDGET_EXHAUSTED,
            f"{what} of {_show(limit)} is below the {_show(limit - left)} already spent, "
            "after a policy change; no further queries are answered",
            "ask an administrator to grant more budget (hushql ledger grant) or to restore the "
            "policy's previous value")
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
    """Connection-failure class (08006): clients and pools treat it as "retry later"."""
    return HushError(CONNECTION_FAILURE, "the privacy ledger is unavailable; nothing was run",
                     _UNAVAILABLE_HINT)


class _Statements:
    """The ledger's SQL, composed once for one schema."""

    def __init__(self, schema: str) -> None:
        s = sql.Identifier(schema).as_string(None)
        # now(): the transaction's start, which is every charge row's reserved_at.
        self.reserve = (
            "SELECT charge_id, refusal, refused_name, refused_limit, refused_left, left_after, "
            f"now() FROM {s}.reserve_one(%s, %s::text[], %s, %s, %s, %s)")
        # Rows in the requests' order: the function returns them as it reserves them.
        self.reserve_batch = (
            "SELECT charge_id, refusal, refused_name, refused_limit, refused_left, left_after, "
            f"now() FROM {s}.reserve_batch(%s)")
        self.finish = f"SELECT {s}.finish_charge(%s, %s)"
        self.remaining = (
            f"SELECT greatest(budget - spent, 0) FROM {s}.analyst_budgets WHERE analyst = %s")
        self.store_answered = f"SELECT {s}.store_answered(%s, %s, %s, %s, %s, %s::jsonb)"
        self.store_answered_batch = f"SELECT * FROM {s}.store_answered_batch(%s)"
        # The charge's own time: when the answer was paid for.
        self.stored_answer = (
            f"SELECT a.answer, c.reserved_at, a.charge_id, greatest(b.budget - b.spent, 0) "
            f"FROM {s}.stored_answers a JOIN {s}.charges c ON c.id = a.charge_id "
            f"JOIN {s}.analyst_budgets b ON b.analyst = a.analyst "
            "WHERE a.analyst = %s AND a.question = %s ORDER BY a.id DESC LIMIT 1")
        self.spent = f"SELECT spent FROM {s}.analyst_budgets WHERE analyst = %s"
        self.table_remaining = (
            # GREATEST skips NULLs, so "no cap" must stay NULL explicitly.
            "SELECT CASE WHEN p.cap IS NOT NULL THEN greatest(p.cap - p.spent, 0) END "
            f"FROM {s}.table_budgets t JOIN {s}.population_budgets p USING (population) "
            "WHERE t.table_name = %s")
        self.lock_analysts = (
            f"SELECT analyst, policy_budget, budget FROM {s}.analyst_budgets "
            "WHERE analyst = ANY (%s::text[]) ORDER BY analyst COLLATE \"C\" FOR UPDATE")
        self.lock_tables = (
            f"SELECT table_name, cap, population FROM {s}.table_budgets "
            "WHERE table_name = ANY (%s::text[]) ORDER BY table_name COLLATE \"C\" FOR UPDATE")
        self.insert_analyst = (
            f"INSERT INTO {s}.analyst_budgets (analyst, budget, policy_budget) VALUES (%s, %s, %s)")
        # Moves the budget by the policy's difference (keeping grants), never below zero.
        self.change_analyst = (
            f"UPDATE {s}.analyst_budgets SET budget = greatest(budget + (%s - %s), 0), "
            "policy_budget = %s, updated_at = now() WHERE analyst = %s")
        self.lock_analyst = (
            f"SELECT budget, spent FROM {s}.analyst_budgets WHERE analyst = %s FOR UPDATE")
        # Renewed for a period: a renewal naming it (its reason), or an import during it.
        self.renewed_since = (
            f"SELECT EXISTS (SELECT 1 FROM {s}.budget_events WHERE subject_kind = 'analyst' "
            "AND subject = %s AND ((kind = 'import' AND at >= %s) "
            "OR (kind = 'renewal' AND reason = %s)))")
        self.add_budget = (
            f"UPDATE {s}.analyst_budgets SET budget = budget + %s, updated_at = now() "
            "WHERE analyst = %s")
        self.lock_populations = (
            f"SELECT population, cap FROM {s}.population_budgets "
            "WHERE population = ANY (%s::text[]) ORDER BY population COLLATE \"C\" FOR UPDATE")
        # A population's cap follows its tables' (the smallest): derived, so not an event.
        self.insert_population = (
            f"INSERT INTO {s}.population_budgets (population, cap) VALUES (%s, %s)")
        self.change_population = (
            f"UPDATE {s}.population_budgets SET cap = %s, updated_at = now() "
            "WHERE population = %s")
        self.insert_table = (
            f"INSERT INTO {s}.table_budgets (table_name, cap, population) VALUES (%s, %s, %s)")
        self.change_table = (
            f"UPDATE {s}.table_budgets SET cap = %s, updated_at = now() WHERE table_name = %s")
        self.move_table = (
            f"UPDATE {s}.table_budgets SET population = %s, updated_at = now() "
            "WHERE table_name = %s")
        self.event = (
            f"INSERT INTO {s}.budget_events "
            "(kind, subject_kind, subject, previous, amount, reason, actor) "
            "VALUES (%s, %s, %s, %s, %s, %s, %s)")
        self.overspent = (
            f"SELECT 'analyst', analyst, budget, spent FROM {s}.analyst_budgets "
            "WHERE spent > budget "
            f"UNION ALL SELECT 'table', table_name, cap, spent FROM {s}.table_budgets "
            "WHERE cap IS NOT NULL AND spent > cap "
            # A population that is one table of the same name is reported as that table.
            f"UNION ALL SELECT 'population', p.population, p.cap, p.spent "
            f"FROM {s}.population_budgets p WHERE p.cap IS NOT NULL AND p.spent > p.cap "
            f"AND NOT (SELECT count(*) = 1 AND bool_and(t.table_name = p.population) "
            f"FROM {s}.table_budgets t WHERE t.population = p.population) ORDER BY 1, 2")


def statement_hash(statement: str) -> str:
    """The SHA-256 of a statement's UTF-8 text, in hex: what a charge keeps of all of it."""
    return hashlib.sha256(statement.encode("utf-8", "surrogatepass")).hexdigest()


def _advisory_key(schema: str) -> int:
    """A stable signed 64-bit advisory-lock key for migrating ``schema``."""
    digest = hashlib.sha256(f"hushql ledger schema {schema}".encode()).digest()
    return int.from_bytes(digest[:8], "big", signed=True)


def os_user() -> str:
    """The operating-system account running this process, for the events it records."""
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "unknown"


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
