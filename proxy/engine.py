"""The engine: one analyst, one statement -> one differentially private answer, charged.

The order of steps is the privacy argument, so it lives here and only here:
1. plan: analyse and rewrite (pure, cached by statement text; no data read). A refusal here
   charges nothing.
1b. lookup: the same analyst's same question (normalised statement, epsilon, policy) answered
   before is given its stored answer again, for nothing (post-processing of a released answer;
   the argument is in ``proxy.stored_answers``), unless the session asks for a fresh one.
2. reserve: the ledger charges epsilon in one committed transaction, or refuses (budget spent);
   the reservation also says what the analyst has left, which the answer reports.
3. run: the rewritten query on the backend. From here on the charge stands whatever happens,
   because whether a query fails can depend on the data.
   For tables with individuals whose bounds are chosen per query, the engine first draws the
   exact discrete Laplace noise of the bounds' noisy-max choice and hands it to the query in
   settings, so the choice happens inside the same backend scan (``proxy.sql.rewrite``).
4. noise: discrete Laplace noise of scale sensitivity / epsilon_measure on each measure of every
   cell (the cells of a GROUP BY are disjoint and share that epsilon), with sensitivities given
   by the bounds the query used; and on each bound's clipped-away total. The epsilon split
   (``epsilon_split``) is basic sequential composition: choices + clipped figures + measures
   add up to the query's epsilon.
5. release: post-processing on noisy values only (clamping counts at zero, AVG's division,
   HAVING, ORDER BY, LIMIT), then the answer.
6. finish: the charge's outcome (answered, failed, cancelled) is noted in the ledger. It is a
   note, not a charge, so its commit does not wait for the disk. An answer is queued to be
   stored under its question, its note written with the 'answered' outcome after release, off
   the answer's path (``proxy.answer_notes``: until written, the same question in this
   process finds it in the queue; a lost note loses only the reuse, the charge being durable
   already); failures and cancellations are noted before the error is raised.

Time. The backend query runs under the proxy's own timeout (access.toml ``[limits]
query_timeout_ms``), never one the analyst chose: a deadline of the analyst's choosing turns
"answered or cancelled" into a reading of how long the backend worked on the data. A query that
hits it is still charged (it started). A table may also declare a steady answer time
(``[timing] answer_after_ms``): its answers are released no earlier than that long after the
engine received the query, the backend query's timeout is what is left of that time, and a
query that needs longer ends with the same fixed error at that same moment; an error after the
query started is held back likewise. Then answers, errors and timeouts all come at one time, and
the time says nothing about the data (only a CancelRequest ends the wait early, at the moment
the analyst chose).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import logging
import math
import re
import threading
import time
from collections import OrderedDict
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timezone
from decimal import Decimal, InvalidOperation
from fractions import Fraction
from typing import Any, TypeVar

import sqlglot.expressions as exp

from proxy import faults, noise, selection, spread, stored_answers
from proxy.answer_notes import AnswerNotes, Note
from proxy.accounts import Accounts
from proxy.answer import Accuracy, Answer, ColumnType, OutputColumn, Value
from proxy.backend import Backend, QueryBackend, QueryControl
from proxy.errors import (INTERNAL_ERROR, INVALID_PARAMETER_VALUE, PROGRAM_LIMIT_EXCEEDED,
                          QUERY_CANCELED, HushError)
from proxy.ledger import Ledger, StoredAnswer
from proxy.policy import ColumnPolicy, Policies
from proxy.sql.analyse import analyse, output_type
from proxy.sql.domains import describe_key, key_label, key_values
from proxy.sql.limits import Limits
from proxy.sql.parameters import parameter_types
from proxy.sql.plan import PERCENTILE_KINDS, SPREAD_KINDS, GroupKey, Measure, Output, Plan
from proxy.sql.public import PublicRead, read_sql
from proxy.sql.vocabulary import column_types
from proxy.sql.postprocess import carried_accuracy, postprocess, written_expression
from proxy.sql import statement as slots
from proxy.sql.statement import BoundStatement
from proxy.spark_backend import SparkBackend, is_spark_dsn
from proxy.sql.rewrite import (BOUND_NOISE_SETTING, SCORE_SENSITIVITY, Rewritten, centres_averages,
                                countable_keys, loss_cap, rewrite, whole_step_columns)

__all__ = ["Engine", "Prepared", "QueryControl", "Statement", "paid_text", "parse_epsilon"]

# What the engine answers: a statement's text (plans cached by it), a parsed tree (long texts,
# not cached), or a parameterised statement with its values (plans cached per class of values).
Statement = str | exp.Expression | BoundStatement

log = logging.getLogger("hushql.engine")

# The 95% half-width of a discrete Laplace variable is about ln(20) / sqrt(2) = 2.118 standard
# deviations; a sum of independent such variables has lighter tails, so AVG's linearised error
# (a combination of two) uses this multiple of its standard deviation.
_AVG_SD_MULTIPLE = math.log(20) / math.sqrt(2)

# Shares of a query's epsilon when its contribution bounds are chosen per query: choosing the
# bounds, and the clipped-away figures that say how far an answer may be low. The rest is split
# evenly among the measures.
BOUND_SHARE = Decimal("0.1")
CLIP_SHARE = Decimal("0.05")
# A chosen bound aims at leaving about ABOVE_FACTOR * cells / epsilon_per_measure individuals
# above it: where the noise a higher bound adds to each cell (bound / epsilon) balances the bias
# it removes (about the individuals above it, per unit of bound, spread over the cells).
ABOVE_FACTOR = 2
PREFER_SMALLER = Fraction(1, 2)


@dataclass(frozen=True)
class EpsilonSplit:
    """How a query's epsilon is shared: each measure, each chosen bound's choice, each bound's
    clipped-away figure (0 when the bounds are declared)."""

    measure: Decimal
    bound: Decimal
    clip: Decimal


def epsilon_split(plan: Plan, rewritten: Rewritten, epsilon: Decimal) -> EpsilonSplit:
    """Basic sequential composition: the parts add up to ``epsilon`` exactly. A percentile
    plan reports no clipped-away figure (its answer is a rank, selected from a histogram that is
    never released), so its clip share goes to its measures."""
    measures = len(plan.measures)
    if not any(b.chosen for b in rewritten.bounds):
        return EpsilonSplit(measure=epsilon / measures, bound=Decimal(0), clip=Decimal(0))
    count = len(rewritten.bounds)
    clip_share = Decimal(0) if plan.ranked is not None else CLIP_SHARE
    return EpsilonSplit(measure=epsilon * (1 - BOUND_SHARE - clip_share) / measures,
                        bound=epsilon * BOUND_SHARE / count, clip=epsilon * clip_share / count)


@dataclass(frozen=True)
class Prepared:
    """A statement analysed and rewritten: everything but the data and the epsilon."""

    plan: Plan
    rewritten: Rewritten
    cells: list[tuple[Any, ...]]  # the key values of each cell, in the order the backend returns
    fingerprint: str
    statement: str = ""  # the normalised statement (proxy.stored_answers)
    policy: str = ""  # fingerprint of the table policies the plan was made under


@dataclass(frozen=True)
class _LatePlan:
    """A plan whose backend SQL has holes for late-bound values (``proxy.sql.statement``)."""

    prepared: Prepared  # planned with markers in the late slots
    template: slots.Template


def _fingerprint(sql: str) -> str:
    return hashlib.sha256(sql.encode()).hexdigest()[:16]


@dataclass(frozen=True)
class PreparedRead:
    """The rows of a public table to read as stored: no noise, nothing charged."""

    read: PublicRead
    sql: str

    @property
    def columns(self) -> list[OutputColumn]:
        return [OutputColumn(name, column_types(self.read.table.columns[column]).sql)  # type: ignore[arg-type]
                for name, column in self.read.columns]


# Digits an epsilon may have after the decimal point (so the smallest is 1e-12). Noise scales
# are exact fractions of epsilon and the 95% bound is computed in decimals as wide as the scale:
# an unbounded exponent (1e-999999999) would make them numbers of a billion digits.
MOST_EPSILON_PLACES = 12

# An epsilon as text: ASCII digits only (Python's Decimal would also read other scripts' digits,
# such as '١'), plain or exponent notation, and not absurdly long.
_EPSILON_TEXT = re.compile(r"\+?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d{1,4})?", re.ASCII)
_LONGEST_EPSILON_TEXT = 64


def parse_epsilon(value: str | Decimal | float, largest: Decimal,
                  smallest: Decimal = Decimal(0)) -> Decimal:
    """An analyst's epsilon as an exact Decimal in [smallest, largest], above 0, with at most
    ``MOST_EPSILON_PLACES`` digits after the point; raises HushError 22023 otherwise.

    ``smallest`` (access.toml ``smallest_epsilon_per_query``) makes a budget buy a bounded
    number of queries: at most budget / smallest.
    """
    epsilon = Decimal("NaN")
    if isinstance(value, Decimal):
        epsilon = value
    else:
        text = str(value).strip()
        if len(text) <= _LONGEST_EPSILON_TEXT and _EPSILON_TEXT.fullmatch(text):
            try:
                epsilon = Decimal(text)
            except (InvalidOperation, ValueError):
                pass
    if not epsilon.is_finite() or epsilon <= 0 or epsilon > largest \
            or _decimal_places(epsilon) > MOST_EPSILON_PLACES:
        shown = str(value)
        raise HushError(INVALID_PARAMETER_VALUE,
                        f"invalid epsilon {shown if len(shown) <= 40 else shown[:37] + '...'}",
                        hint=f"epsilon must be a decimal number above 0 and at most {largest}, "
                             f"with at most {MOST_EPSILON_PLACES} digits after the decimal point")
    if epsilon < smallest:
        raise HushError(INVALID_PARAMETER_VALUE,
                        f"epsilon {format(epsilon, 'f')} is below the smallest accepted per query",
                        hint=f"set hushql.epsilon to at least {smallest} (smallest_epsilon_per_query "
                             "in access.toml [defaults]): every query costs at least that much, so "
                             "a budget buys a bounded number of queries")
    return epsilon


def _decimal_places(value: Decimal) -> int:
    """Digits after the point of a finite Decimal, trailing zeros aside (0.2500 has 2); exact."""
    _, digits, exponent = value.as_tuple()
    assert isinstance(exponent, int)
    text = "".join(map(str, digits))
    trailing_zeros = len(text) - len(text.rstrip("0"))
    return max(0, -(exponent + trailing_zeros))


class Engine:
    """Answers analysts' statements from a backend, charging a ledger. Thread-safe."""

    def __init__(self, policies: Policies, backend: QueryBackend, ledger: Ledger, *,
                 plan_cache_size: int = 1024,
                 plan_cache_bytes: int = 64 * 1024 * 1024) -> None:
        self.policies = policies
        self.backend = backend
        self.ledger = ledger
        self._cache: OrderedDict[tuple[Any, ...], Prepared | _LatePlan] = OrderedDict()
        # Per (analyst, text, types) of a parameterised statement: the slots bound late.
        self._late: dict[tuple[str, str, tuple[int, ...]], frozenset[int]] = {}
        self._cache_size = plan_cache_size
        # Bounded in (estimated) memory too: EXPLAIN plans for free, and the largest plans the
        # limits accept hold about 2 MB each.
        self._cache_bytes = plan_cache_bytes
        self._cache_weight = 0
        self._cache_lock = threading.Lock()
        self._facts: dict[str, SourceFacts] = {}
        # One identical question (stored-answer key) at a time: key -> (lock, users).
        self._asking: dict[str, tuple[threading.Lock, int]] = {}
        self._asking_lock = threading.Lock()
        from proxy.safe_config import policy_source

        for line in ledger.sync_budgets(policies, source=policy_source(policies)):
            log.warning("budget below spending: %s", line)
        from proxy.renewal import RenewalSchedule

        self._renewals = RenewalSchedule(policies, ledger)
        self._renewals.apply_due()
        self._notes = AnswerNotes(ledger)

    @classmethod
    def connect(cls, policies: Policies, backend_dsn: str, ledger_dsn: str | None = None, *,
                pool_size: int = 16) -> Engine:
        """An engine with its own backend pool and ledger (default: schema hushql in the backend).

        A Spark Connect backend (``sc://``) needs ``ledger_dsn``: the ledger stays in PostgreSQL.
        """
        backend: QueryBackend
        if is_spark_dsn(backend_dsn):
            if not ledger_dsn:
                raise ValueError("a Spark backend needs a PostgreSQL ledger DSN")
            backend = SparkBackend(backend_dsn)
        else:
            backend = Backend(backend_dsn, pool_size=pool_size)
        # Each answer makes two ledger calls to one backend call: give the ledger as many.
        ledger = Ledger(ledger_dsn or backend_dsn, pool_size=max(2, pool_size))
        return cls(policies, backend, ledger)

    def reload(self, policies: Policies) -> None:
        """Serve ``policies`` from now on: budgets synced as audited events first, then the
        policies swapped and the plans of the old ones dropped. Queries already planned finish
        under the policies they were planned with."""
        from proxy.renewal import RenewalSchedule
        from proxy.safe_config import policy_source

        for line in self.ledger.sync_budgets(policies, source=policy_source(policies)):
            log.warning("budget below spending: %s", line)
        renewals = RenewalSchedule(policies, self.ledger)
        renewals.apply_due()
        with self._cache_lock:
            self.policies = policies
            self._renewals = renewals
            self._cache.clear()
            self._late.clear()
            self._facts.clear()

    def close(self) -> None:
        """Write the queued answer notes, then close the pools."""
        self._notes.close()
        self.backend.close()
        self.ledger.close()

    def flush_notes(self, timeout: float | None = None) -> bool:
        """Wait until every answer released so far is stored and noted in the ledger."""
        return self._notes.flush(timeout)

    # ---- planning (no data read, nothing charged) ------------------------------------------

    def prepare(self, analyst: str, statement: Statement) -> Prepared | PreparedRead:
        """Analyse and rewrite ``statement`` for ``analyst``; cached by statement text, and for
        a parameterised statement by text and class of values (``proxy.sql.statement``)."""
        found = self.planned(analyst, statement)
        if found is not None:
            return found
        if isinstance(statement, BoundStatement):
            return self._prepare_bound(analyst, statement)
        prepared = self._plan(analyst, statement)
        if isinstance(statement, str):
            self._keep((analyst, statement), prepared)
        return prepared

    def planned(self, analyst: str, statement: Statement) -> Prepared | PreparedRead | None:
        """The cached plan of ``statement``, or None when it would need analysis: dictionary
        look-ups and, for late-bound values, their checks (HushError as analysis raises)."""
        if isinstance(statement, str):
            return self._cached((analyst, statement))  # type: ignore[return-value]
        if not isinstance(statement, BoundStatement):
            return None
        late = self._late.get((analyst, statement.text, statement.types))
        if late is None:
            return None
        found = self._cached(self._bound_key(analyst, statement, late))
        if isinstance(found, _LatePlan):
            return self._filled(found, statement)
        return found

    def _cached(self, key: tuple[Any, ...]) -> Prepared | PreparedRead | _LatePlan | None:
        with self._cache_lock:
            cached = self._cache.get(key)
            if cached is not None:
                self._cache.move_to_end(key)
            return cached

    def _keep(self, key: tuple[Any, ...], entry: Prepared | PreparedRead | _LatePlan) -> None:
        """Caches ``entry``, dropping the least recently used beyond the count and byte bounds."""
        with self._cache_lock:
            if key not in self._cache:
                self._cache[key] = entry
                self._cache_weight += _plan_bytes(entry)
            while self._cache and (len(self._cache) > self._cache_size
                                   or self._cache_weight > self._cache_bytes):
                self._cache_weight -= _plan_bytes(self._cache.popitem(last=False)[1])

    def _plan(self, analyst: str, statement: str | exp.Expression) -> Prepared | PreparedRead:
        """Fresh analysis and rewrite, uncached."""
        plan = analyse(statement, self.policies, analyst)
        if isinstance(plan, PublicRead):
            read = PreparedRead(plan, read_sql(plan))
            self.backend.check(read.sql)
            return read
        rewritten = rewrite(plan, self._plan_exact_columns(plan), self._plan_unique_keys(plan),
                            self._plan_whole_steps(plan), wide_cells=self.backend.wide_cells)
        self.backend.check(rewritten.sql)  # a shape the backend cannot run exactly: before any charge
        return Prepared(plan=plan, rewritten=rewritten, cells=_cell_values(plan),
                        fingerprint=_fingerprint(rewritten.sql),
                        statement=stored_answers.normalised_statement(statement),
                        policy=stored_answers.policy_fingerprint(list(plan.tables)))

    @staticmethod
    def _bound_key(analyst: str, bound: BoundStatement, late: frozenset[int]
                   ) -> tuple[Any, ...]:
        """The cache key of a parameterised statement: late values by class, others as such."""
        classes: list[Any] = []
        for slot, value in enumerate(bound.values, 1):
            found = slots.value_class(value) if slot in late else None
            classes.append(("late", found) if found is not None
                           else ("value", slots.planned_key(value)))
        return (analyst, bound.text, bound.types, tuple(classes))

    def _prepare_bound(self, analyst: str, bound: BoundStatement) -> Prepared | PreparedRead:
        """Plans a class of values once: with markers in its late slots, checked once against
        a fresh analysis of the real values (a difference turns late binding off for the
        statement); without late slots, per value."""
        statement_key = (analyst, bound.text, bound.types)
        late = self._late.get(statement_key)
        if late is None:
            late = slots.late_slots(bound.tree, self.policies, self._narrowed_columns)
            with self._cache_lock:
                if len(self._late) >= 4 * self._cache_size:  # bounded like the plans
                    self._late.clear()
                self._late[statement_key] = late
        key = self._bound_key(analyst, bound, late)
        used = frozenset(slot for slot in late if key[3][slot - 1][0] == "late")
        fresh = self._plan(analyst, bound.substituted())  # the real refusal, if any
        if not used or isinstance(fresh, PreparedRead):  # public reads: planned per value
            self._keep(key, fresh)
            return fresh
        entry = self._late_plan(analyst, bound, used)
        if entry is not None:
            filled = self._filled(entry, bound)
            if _same_plan(filled, fresh):
                self._keep(key, entry)
                return filled
            log.warning("late binding differed from fresh analysis; planning per value")
        self._late[statement_key] = frozenset()
        self._keep(self._bound_key(analyst, bound, frozenset()), fresh)
        return fresh

    def _late_plan(self, analyst: str, bound: BoundStatement, used: frozenset[int]
                   ) -> _LatePlan | None:
        """The statement planned with a marker in each slot of ``used``, its backend SQL cut at
        the markers; None when the markers cannot be found exactly."""
        literals = list(bound.literals)
        markers: dict[int, str] = {}
        for slot in used:
            literals[slot - 1] = slots.marker(bound.values[slot - 1], slot)
        marked = dataclasses.replace(bound, literals=tuple(literals))
        try:
            for slot in used:
                markers[slot] = slots.rendering(literals[slot - 1], self.policies.limits)
            prepared = self._plan(analyst, marked.substituted())
        except HushError:
            return None
        if isinstance(prepared, PreparedRead):
            return None
        counts = slots.occurrences(bound.tree)
        cut = slots.template(prepared.rewritten.sql, markers, {s: counts[s] for s in used})
        return None if cut is None else _LatePlan(prepared, cut)

    def _filled(self, entry: _LatePlan, bound: BoundStatement) -> Prepared:
        """The late plan with this statement's values in its holes (each checked first)."""
        limits = self.policies.limits
        renderings = {slot: slots.rendering(bound.literals[slot - 1], limits)
                      for slot in set(entry.template.slots)}
        sql = entry.template.fill(renderings)
        prepared = entry.prepared
        # The stored-answer key's statement was normalised with the markers: the values join it.
        values = " ".join(f"${slot}={renderings[slot]}" for slot in sorted(renderings))
        return dataclasses.replace(prepared, rewritten=dataclasses.replace(prepared.rewritten, sql=sql),
                                   fingerprint=_fingerprint(sql),
                                   statement=f"{prepared.statement} /* late values: {values} */")

    def _plan_exact_columns(self, plan: Plan) -> frozenset[str]:
        """The plan's columns summed exactly: of its table, or of the joined tables under the
        names the plan gives them."""
        if not plan.joins:
            return self._source_facts(plan.table.table).exact_columns
        return frozenset(name for join in plan.joins for name, own in join.columns
                         if own in self._source_facts(join.table.table).exact_columns)

    def _plan_unique_keys(self, plan: Plan) -> frozenset[frozenset[str]]:
        """The unique keys the backend enforces in the plan's one table that may hold its
        individuals' rows (none for joins: the row query is for single tables,
        ``proxy.sql.rewrite`` notes 8)."""
        return frozenset() if plan.joins else self._source_facts(plan.table.table).unique_keys

    def _narrowed_columns(self, table: str) -> frozenset[str]:
        """The columns of ``table`` whose WHERE literals may decide whether an enforced unique
        key holds its individuals (``proxy.sql.rewrite`` notes 10): its keys' other columns."""
        individual = self.policies.tables[table].individual
        if individual is None:
            return frozenset()
        return frozenset(c for key in self._source_facts(table).unique_keys
                         for c in key) - {individual.column}

    def _plan_whole_steps(self, plan: Plan) -> frozenset[str]:
        """The plan's exact columns holding only whole steps (none for joins, as unique keys)."""
        return frozenset() if plan.joins else self._source_facts(plan.table.table).whole_steps

    def _source_facts(self, table: str) -> SourceFacts:
        """What the backend's catalog says about ``table``'s source; looked up once per table,
        and again after a reload. On any doubt, nothing: sums are then rounded to steps per row,
        and individuals are bounded by the per-individual query."""
        with self._cache_lock:
            known = self._facts.get(table)
        if known is None:
            policy = self.policies.tables[table]
            types = _looked_up(table, "column types", self.backend.column_types, policy.source, {})
            keys = _looked_up(table, "unique keys", self.backend.unique_keys, policy.source,
                              frozenset())
            known = SourceFacts(
                exact_columns=frozenset(name for name, kind in types.items()
                                        if kind.startswith("numeric")),
                unique_keys=countable_keys(policy, keys, types),
                whole_steps=whole_step_columns(policy, types))
            with self._cache_lock:
                self._facts[table] = known
        return known

    def describe(self, analyst: str, statement: Statement) -> list[OutputColumn]:
        """The columns an answer would have; plans only."""
        return _described(self.prepare(analyst, statement))

    def describe_planned(self, analyst: str, statement: Statement) -> list[OutputColumn] | None:
        """The columns of an already planned statement, None when it needs planning: cheap
        enough for an event loop (no analysis, no I/O)."""
        found = self.planned(analyst, statement)
        return None if found is None else _described(found)

    def parameter_types(self, analyst: str, tree: exp.Expression) -> list[str | None]:
        """Types of untyped ``$n`` parameters from the columns they are compared with."""
        return parameter_types(tree, self.policies)

    def epsilon_for(self, epsilon: Decimal | str | None) -> Decimal:
        """The epsilon a query runs with: the session's, else the policy default; validated."""
        defaults = self.policies.defaults
        chosen = defaults.epsilon_per_query if epsilon is None else epsilon
        return parse_epsilon(chosen, defaults.largest_epsilon_per_query,
                             defaults.smallest_epsilon_per_query)

    @property
    def limits(self) -> Limits:
        """The work limits of the policies served now."""
        return self.policies.limits

    @property
    def default_epsilon(self) -> Decimal:
        """The epsilon a query runs with when the analyst sets none."""
        return Decimal(self.policies.defaults.epsilon_per_query)

    @property
    def accounts(self) -> Accounts:
        """Account facts (login verifiers, administrators) of the policies served now."""
        return Accounts(self.policies)

    def remaining(self, analyst: str) -> Decimal:
        """Epsilon ``analyst`` may still spend, from the ledger; HushError 42501 if unknown."""
        return self.ledger.remaining(analyst)

    def explain(self, analyst: str, statement: Statement, *,
                epsilon: Decimal | None = None, form: str = "text",
                fresh: bool = False) -> Answer:
        """The plan, its sensitivities and noise, and whether a stored answer would be given
        (unless ``fresh``), charging nothing: a two-column table (``form`` "text"), or one JSON
        document with the same items (``form`` "json")."""
        prepared = self.prepare(analyst, statement)
        if isinstance(prepared, PreparedRead):
            return _explain_answer(
                [("table", prepared.read.table.table),
                 ("public", "rows as stored: no noise, nothing charged"),
                 ("backend sql", self.backend.sent_sql(prepared.sql))], form,
                remaining=self.ledger.remaining(analyst), table=prepared.read.table.table)
        eps = self.epsilon_for(epsilon)
        stored = self._stored_answer(analyst, _question(analyst, prepared, eps))
        plan, rewritten = prepared.plan, prepared.rewritten
        split = epsilon_split(plan, rewritten, eps)
        rows: list[tuple[Value, ...]] = [
            ("table", plan.table.table),
            ("protected unit", f"individual ({plan.table.individual.column}, population "
                               f"{plan.table.population})" if plan.table.individual else "row"),
            *([("joins", describe_joins(plan))] if plan.joins else []),
            ("cells", str(rewritten.cells)),
            *[(f"key {key_label(key)}", describe_key(plan.table.columns[key.column], key))
              for key in plan.keys],
            *[(f"counted {name}", f"{describe_key(plan.table.columns[name], GroupKey(name))} "
                                  "only: rows whose value is NULL or outside them are not counted "
                                  "(a declared bound and an enforced unique key)")
              for name in rewritten.kept_in_domains],
            ("epsilon", str(eps)),
            ("epsilon per measure", f"{split.measure:.6g}"),
        ]
        for bound in rewritten.bounds:
            unit = Decimal(1) if bound.subject == "rows" else plan.table.columns[bound.subject].unit
            what = "rows" if bound.subject == "rows" else f"total of {bound.subject}"
            if bound.chosen:
                rows.append((f"bound on {what} per individual",
                             f"chosen per query by a private quantile (noisy max over "
                             f"{len(bound.candidates)} candidates up to the ceiling "
                             f"{_show(bound.ceiling * unit)}), epsilon {split.bound:.6g}"
                             + (f"; clipped-away total reported with epsilon {split.clip:.6g}"
                                if split.clip else "")))
            else:
                held = (f"; held by the database, which keeps {_held_text(rewritten)}, "
                        "so nothing is scaled" if rewritten.held_by else "")
                rows.append((f"bound on {what} per individual",
                             f"declared: {_show(bound.ceiling * unit)} (the policy's most_rows)"
                             f"{held}"))
        chosen = any(b.chosen for b in rewritten.bounds)
        for measure, sensitivity in zip(plan.measures, rewritten.declared_sensitivities
                                        if rewritten.bounds else rewritten.sensitivities()):
            if plan.ranked is not None:  # a histogram: never released, selected from
                rows.append(_selection_line(plan, rewritten, measure, sensitivity, split, chosen))
                continue
            unit = _measure_unit(plan, measure)
            scale = Fraction(sensitivity) / Fraction(split.measure)
            at_most = "at most " if chosen else ""
            rows.append((f"measure {_measure_label(plan, measure)}",
                         f"sensitivity {at_most}{_show(sensitivity * unit)}, noise scale "
                         f"{at_most}{_show(scale * Fraction(unit))}, "
                         f"95% bound {at_most}±{_show(noise.bound95(scale) * unit)}"))
        for output in plan.visible_outputs:
            if output.expression is not None:
                rows.append((f"output {output.name}",
                             f"computed in the proxy on the noisy answer: "
                             f"{written_expression(plan, output.expression)}"))
        rows += _average_items(plan, split)
        rows.append(("stored answer", _stored_text(stored, fresh)))
        rows.append(("backend sql", self.backend.sent_sql(rewritten.sql)))
        return _explain_answer(rows, form, remaining=self.ledger.remaining(analyst),
                               table=plan.table.table)

    # ---- answering ---------------------------------------------------------------------------

    def answer(self, analyst: str, statement: Statement, *,
               epsilon: Decimal | None = None, control: QueryControl | None = None,
               fresh: bool = False) -> Answer:
        """Plan, look up a stored answer (unless ``fresh``), else reserve, run, noise, store
        and release one statement. Raises HushError."""
        arrived = time.monotonic()
        prepared = self.prepare(analyst, statement)
        if isinstance(prepared, PreparedRead):
            return self._read_public(analyst, prepared, control)
        self._renewals.apply_due()  # a clock comparison except at a period boundary
        eps = self.epsilon_for(epsilon)
        question = _question(analyst, prepared, eps)
        if fresh:  # paid for whatever is stored; identical fresh questions each pay
            return self._answer_anew(analyst, statement, prepared, eps, question, arrived,
                                     control)
        with self._one_at_a_time(question, control):
            stored = self._stored(analyst, question)
            if stored is not None:
                return stored
            return self._answer_anew(analyst, statement, prepared, eps, question, arrived,
                                     control)

    def _stored(self, analyst: str, question: str) -> Answer | None:
        """The stored answer to ``question``, marked reused, with the budget left now; None
        when there is none or it cannot be read back (then the question is answered, and paid
        for, anew)."""
        found = self._stored_answer(analyst, question)
        if found is None:
            return None
        try:
            answer = stored_answers.decode_answer(found.answer)
        except (KeyError, TypeError, ValueError):
            log.warning("stored answer of charge %s could not be read; answering anew",
                        found.charge_id)
            return None
        return dataclasses.replace(answer, reused_from=found.paid_at, remaining=found.remaining)

    def _stored_answer(self, analyst: str, question: str) -> StoredAnswer | None:
        """The newest answer to ``question``: one still queued to be written, else the
        ledger's (``proxy.answer_notes``)."""
        queued = self._notes.pending(analyst, question)
        if queued is not None:
            return queued._replace(remaining=self.ledger.remaining(analyst))
        return self.ledger.stored_answer(analyst, question)

    @contextmanager
    def _one_at_a_time(self, question: str, control: QueryControl | None) -> Iterator[None]:
        """Holds the lock of one stored-answer key: identical questions take turns, so the
        second finds the first's stored answer instead of paying again. A cancel ends the
        wait with 57014."""
        with self._asking_lock:
            lock, users = self._asking.get(question, (threading.Lock(), 0))
            self._asking[question] = (lock, users + 1)
        try:
            while not lock.acquire(timeout=0.05):
                if control is not None and control.cancelled:
                    raise HushError(QUERY_CANCELED, "canceling statement due to user request")
            try:
                yield
            finally:
                lock.release()
        finally:
            with self._asking_lock:
                lock, users = self._asking[question]
                if users == 1:
                    del self._asking[question]
                else:
                    self._asking[question] = (lock, users - 1)

    def _answer_anew(self, analyst: str, statement: Statement, prepared: Prepared,
                     eps: Decimal, question: str, arrived: float,
                     control: QueryControl | None) -> Answer:
        """Reserve, run, noise, store and release (the steps after the lookup)."""
        plan = prepared.plan
        text = statement if isinstance(statement, str) else statement.shown() \
            if isinstance(statement, BoundStatement) else statement.sql(dialect="postgres")
        charge, remaining, paid_at = self.ledger.reserve(analyst, _charged_tables(plan), eps,
                                                         text, prepared.fingerprint)
        outcome = "failed"
        steady = _steady_ms(plan)
        failure: HushError | None = None
        try:
            faults.pause("after-reserve")
            split = epsilon_split(plan, prepared.rewritten, eps)
            true_rows = self._run_in_time(prepared, control,
                                          _bound_settings(prepared.rewritten, split), arrived,
                                          steady)
            if len(true_rows) != len(prepared.cells) * prepared.rewritten.buckets:
                raise HushError(INTERNAL_ERROR, "the backend returned an unexpected result shape")
            release = self._release_ranked if plan.ranked is not None else self._release
            answer = release(prepared, eps, split, true_rows, charge)
            outcome = "answered"
            if self._note(analyst, question, prepared, answer, paid_at):
                outcome = "noted"  # the note records the outcome too
        except HushError as error:
            failure = error
            if error.sqlstate == QUERY_CANCELED:
                outcome = "cancelled"
        finally:
            if outcome != "noted":
                self._finish(charge, outcome)
        if steady is not None:  # answer or error, released at the steady time
            _hold_until(arrived + steady / 1000, control)
        if failure is not None:
            raise failure
        return dataclasses.replace(answer, remaining=remaining)

    def _read_public(self, analyst: str, prepared: PreparedRead,
                     control: QueryControl | None) -> Answer:
        """A public table's rows as stored; 54000 when there are more than ``most_cells``."""
        read = prepared.read
        rows = self.backend.run(prepared.sql, control, None,
                                timeout_ms=self.policies.limits.query_timeout_ms)
        if len(rows) > read.most_rows:
            raise HushError(PROGRAM_LIMIT_EXCEEDED,
                            f"public table {read.table.table} has more than {read.most_rows:,} "
                            "rows to answer (most_cells)",
                            "read fewer with WHERE or LIMIT, or page with LIMIT and OFFSET")
        return Answer(columns=prepared.columns, rows=[tuple(row) for row in rows],
                      epsilon=Decimal(0), remaining=self.ledger.remaining(analyst), accuracy=[],
                      tables=[read.table.table],
                      notes=[f"{read.table.table} is a public table: its rows as stored, no noise, "
                             "nothing charged"])

    def _run_in_time(self, prepared: Prepared, control: QueryControl | None,
                     settings: dict[str, str] | None, arrived: float,
                     steady: int | None) -> list[tuple[Any, ...]]:
        """The backend rows, under the proxy's timeout, or under what is left of a steady
        answer time (then a timeout is the table's fixed error)."""
        limit = self.policies.limits.query_timeout_ms
        if steady is None:
            return self.backend.run(prepared.rewritten.sql, control, settings, timeout_ms=limit)
        left = steady - int((time.monotonic() - arrived) * 1000)
        try:
            return self.backend.run(prepared.rewritten.sql, control, settings,
                                    timeout_ms=max(1, min(limit, left)))
        except HushError as error:
            if error.sqlstate != QUERY_CANCELED or (control is not None and control.cancelled):
                raise
            table = prepared.plan.table.table
            raise HushError(QUERY_CANCELED,
                            f"no answer: table {table} answers exactly {steady} ms after a "
                            "query arrives, and this query needed longer",
                            hint="its epsilon stays spent; ask for fewer cells or a simpler "
                                 "condition, or ask the data owner to lengthen "
                                 "[timing] answer_after_ms") from None

    def _note(self, analyst: str, question: str, prepared: Prepared, answer: Answer,
              paid_at: datetime) -> bool:
        """Queue an answer about to be released to be stored for the next asking and its
        charge noted 'answered' (``proxy.answer_notes``); True once queued. A failure loses
        only the reuse (the charge is durable already), so it is logged, not raised."""
        assert answer.charge_id is not None
        try:
            self._notes.add(Note(analyst, question, prepared.statement, answer.epsilon,
                                 answer.charge_id, stored_answers.encode_answer(answer),
                                 paid_at))
            return True
        except Exception:
            log.exception("could not store the answer of charge %s", answer.charge_id)
            return False

    def _finish(self, charge: int, outcome: str) -> None:
        """Record the outcome of a charge; a failure to record it loses only the note."""
        try:
            self.ledger.finish(charge, outcome)
        except Exception:
            log.exception("could not record the outcome of charge %s", charge)

    def _release(self, prepared: Prepared, epsilon: Decimal, split: EpsilonSplit,
                 true_rows: list[tuple[Any, ...]], charge: int) -> Answer:
        """Noise every measure of every cell and each bound's clipped-away total, then
        post-process; ``remaining`` is filled in by the caller from the reservation."""
        plan, rewritten = prepared.plan, prepared.rewritten
        key_count, measure_count, bound_count = len(plan.keys), len(plan.measures), len(rewritten.bounds)
        cells = len(true_rows)
        if any(len(row) != key_count + measure_count + 2 * bound_count for row in true_rows):
            raise HushError(INTERNAL_ERROR, "the backend returned an unexpected result shape")
        tail = true_rows[0][key_count + measure_count:]
        values = tuple(int(v) for v in tail[:bound_count])
        for bound, value in zip(rewritten.bounds, values):
            if value not in (bound.candidates or (bound.ceiling,)):
                raise HushError(INTERNAL_ERROR, "the backend returned an unexpected bound")
        scales = [Fraction(s) / Fraction(split.measure) for s in rewritten.sensitivities(values)]
        noisy: list[list[int]] = []
        for n, scale in enumerate(scales):
            draws = noise.sample_discrete_laplace(scale, cells)
            noisy.append([int(row[key_count + n]) + int(z) for row, z in zip(true_rows, draws)])
        clip_uppers = [_clip_upper(rewritten, j, values, int(lost), split.clip)
                       for j, lost in enumerate(tail[bound_count:])]
        bounds = [noise.bound95(s) for s in scales]
        rows: list[list[Value]] = []
        for c in range(cells):
            rows.append([_output_value(plan, o, prepared.cells[c], [m[c] for m in noisy])
                         for o in plan.outputs])
        clipping = [None if not rewritten.bounds else clip_uppers[rewritten.measure_bounds[n]]
                    for n in range(measure_count)]
        parts = {i: _accuracy(plan, o, split.measure, rewritten.sensitivities(values), scales,
                              bounds, noisy, clipping)
                 for i, o in enumerate(plan.outputs) if o.kind not in ("key", "expression")}
        accuracy = [parts[i] if o.kind != "expression" else carried_accuracy(plan, i, parts)
                    for i, o in enumerate(plan.outputs) if o.visible and o.kind != "key"]
        accuracy = [a for a in accuracy if a is not None]
        return Answer(columns=_answer_columns(plan),
                      rows=postprocess(plan, rows), epsilon=epsilon,
                      remaining=Decimal(0), accuracy=accuracy,
                      tables=_charged_tables(plan), charge_id=charge,
                      notes=_answer_notes(plan, rewritten, values))


    def _release_ranked(self, prepared: Prepared, epsilon: Decimal, split: EpsilonSplit,
                        true_rows: list[tuple[Any, ...]], charge: int) -> Answer:
        """A percentile plan's answer: per cell, each percentile chosen from the cell's
        histogram by the exact exponential mechanism (``proxy.selection``), the measures'
        epsilon split evenly among the percentiles; the histogram itself is never released."""
        plan, rewritten = prepared.plan, prepared.rewritten
        assert plan.ranked is not None
        key_count, bound_count, buckets = len(plan.keys) + 1, len(rewritten.bounds), rewritten.buckets
        if any(len(row) != key_count + 1 + 2 * bound_count for row in true_rows):
            raise HushError(INTERNAL_ERROR, "the backend returned an unexpected result shape")
        values = tuple(int(v) for v in true_rows[0][key_count + 1:key_count + 1 + bound_count]) \
            if true_rows else ()
        for bound, value in zip(rewritten.bounds, values):
            if value not in (bound.candidates or (bound.ceiling,)):
                raise HushError(INTERNAL_ERROR, "the backend returned an unexpected bound")
        sensitivity = rewritten.sensitivities(values)[0]
        chosen = [o for o in plan.outputs if o.kind in PERCENTILE_KINDS]
        share = Fraction(split.measure) / len(chosen)
        column = plan.table.columns[plan.ranked.column]
        candidates = key_values(column, plan.ranked)
        rows: list[list[Value]] = []
        for c, cell in enumerate(prepared.cells):
            histogram = [int(row[key_count]) for row in true_rows[c * buckets:(c + 1) * buckets]]
            rows.append([cell[o.key] if o.kind == "key"  # type: ignore[index]
                         else None if not buckets  # WHERE leaves the column no value to rank
                         else _percentile_value(column, o, candidates[selection.choose(
                             selection.distances(histogram, Fraction(o.fraction),  # type: ignore[arg-type]
                                                 o.kind == "percentile_disc"),
                             share, sensitivity)])
                         for o in plan.outputs])
        within = selection.rank_bound95(buckets, share, sensitivity)
        accuracy = [Accuracy(column=o.name, epsilon=Decimal(share.numerator) / share.denominator,
                             sensitivity=Decimal(sensitivity), scale=None, bound95=None,
                             note=f"exponential mechanism over {buckets} values (multiples of "
                                  f"{column.unit}): in 95% of answers the value returned is a "
                                  f"bucket holding a rank within ±{within} of the requested rank")
                    for o in plan.outputs if o.visible and o.kind in PERCENTILE_KINDS]
        return Answer(columns=_answer_columns(plan),
                      rows=postprocess(plan, rows), epsilon=epsilon,
                      remaining=Decimal(0), accuracy=accuracy,
                      tables=_charged_tables(plan), charge_id=charge,
                      notes=_answer_notes(plan, rewritten, values))


def _selection_line(plan: Plan, rewritten: Rewritten, measure: Measure, sensitivity: int,
                    split: EpsilonSplit, chosen: bool) -> tuple[Value, ...]:
    """EXPLAIN's line for a percentile plan's histogram: what is selected from it and how."""
    percentiles = sum(1 for o in plan.outputs if o.kind in PERCENTILE_KINDS)
    share = Fraction(split.measure) / percentiles
    at_most = "at most " if chosen else ""
    within = selection.rank_bound95(rewritten.buckets, share, sensitivity)
    return (f"histogram {_measure_label(plan, measure)}",
            f"{rewritten.buckets} values per cell, never released; sensitivity {at_most}"
            f"{sensitivity} (rows); each of {percentiles} percentile(s) chosen by the exponential "
            f"mechanism with epsilon {_show(share)}: 95% within ±{at_most}{within} ranks")


def _percentile_value(column: ColumnPolicy, output: Output, candidate: Any) -> Value:
    """A chosen bucket's lower edge as the percentile's value: percentile_cont answers double
    precision, percentile_disc the column's own type (as PostgreSQL types them)."""
    if output.kind == "percentile_cont":
        return float(candidate)
    return int(candidate) if column.kind == "integer" else Decimal(candidate)




def _described(prepared: Prepared | PreparedRead) -> list[OutputColumn]:
    """The columns a prepared statement's answer will have."""
    return prepared.columns if isinstance(prepared, PreparedRead) else _answer_columns(prepared.plan)


def _same_plan(a: Prepared, b: Prepared) -> bool:
    """Whether two plans make the same answer: backend SQL, noise, cells and outputs (the
    WHERE tree is compared through the SQL it became)."""
    return a.rewritten == b.rewritten and a.cells == b.cells and a.fingerprint == b.fingerprint \
        and dataclasses.replace(a.plan, where=None) == dataclasses.replace(b.plan, where=None)


def describe_joins(plan: Plan) -> str:
    """The tables a plan reads and how they meet, for EXPLAIN."""
    parts = []
    for join in plan.joins:
        name = join.table.table + (" (public)" if join.table.public else "")
        if join.to is None:
            parts.append(name)
        else:
            other = plan.joins[join.to[0]].table.table
            verb = "semi-join" if join.kind == "semi" else "join"
            parts.append(f"{verb} {name} on {join.table.table}.{join.column} = {other}.{join.to[1]}")
    return "; ".join(parts) + " (rows bounded per individual over the joined rows)"


def _charged_tables(plan: Plan) -> list[str]:
    """The tables a query's charge names: every table it reads but public ones (they protect
    nobody); the ledger charges their populations once each."""
    return list(dict.fromkeys(t.table for t in plan.tables if not t.public))


def _answer_columns(plan: Plan) -> list[OutputColumn]:
    """The columns of an answer to ``plan``: its visible outputs, aggregates marked noisy."""
    return [OutputColumn(o.name, _output_type(plan, o), noisy=o.kind != "key")
            for o in plan.visible_outputs]


def _question(analyst: str, prepared: Prepared, epsilon: Decimal) -> str:
    """The stored-answer key of a planned statement at an epsilon (proxy.stored_answers)."""
    return stored_answers.question_key(analyst, prepared.statement, epsilon, prepared.policy,
                                       prepared.fingerprint)


def _stored_text(stored: StoredAnswer | None, fresh: bool) -> str:
    """EXPLAIN's line on the stored answer."""
    if stored is None:
        return "none: this question is answered anew and charged, and its answer stored"
    when = f"first paid {paid_text(stored.paid_at)} (charge {stored.charge_id})"
    if fresh:
        return f"stored, {when}, but hushql.fresh is on: a new answer is charged and stored"
    return (f"stored, {when}: it is given again and charges nothing (SET hushql.fresh = on "
            "pays for a new one)")


def paid_text(paid_at: datetime) -> str:
    """When an answer was paid for, as notices and EXPLAIN say it (UTC, to the second)."""
    return f"{paid_at.astimezone(timezone.utc):%Y-%m-%d %H:%M:%S} UTC"


@dataclass(frozen=True)
class SourceFacts:
    """Facts of a table's backend source from the catalog (never its rows) that the rewrite
    uses: numeric columns (summed exactly), and the unique keys an enforced constraint keeps
    that may hold the individuals' rows (``proxy.sql.rewrite.countable_keys``)."""

    exact_columns: frozenset[str]
    unique_keys: frozenset[frozenset[str]]
    whole_steps: frozenset[str] = frozenset()  # numeric columns of whole steps (rewrite, 9)


_Fact = TypeVar("_Fact")


def _looked_up(table: str, what: str, lookup: Callable[[str], _Fact], source: str,
               none: _Fact) -> _Fact:
    """``lookup(source)``, or ``none`` (logged) when the backend cannot answer."""
    try:
        return lookup(source)
    except Exception:
        log.warning("could not read the %s of table %s", what, table)
        return none


def _plan_bytes(entry: Prepared | PreparedRead | _LatePlan) -> int:
    """An estimate of a cached plan's memory: about 600 bytes per condition node (measured with
    tracemalloc on the largest accepted shapes), plus the backend SQL and the cells."""
    prepared = entry.prepared if isinstance(entry, _LatePlan) else entry
    if isinstance(prepared, PreparedRead):
        return 2_000 + 2 * len(prepared.sql)
    plan = prepared.plan
    nodes = sum(1 for clause in (plan.where, plan.having) if clause is not None
                for _ in clause.walk())
    return 2_000 + 600 * nodes + 2 * len(prepared.rewritten.sql) + 200 * len(prepared.cells)


# ---- steady answer time ----------------------------------------------------------------------

def _steady_ms(plan: Plan) -> int | None:
    """The table's declared answer time in milliseconds, or None when it declares none."""
    timing = plan.table.timing
    return timing.answer_after_ms if timing is not None else None


def _hold_until(deadline: float, control: QueryControl | None) -> None:
    """Wait until ``deadline`` (time.monotonic); a cancel ends the wait with 57014."""
    left = deadline - time.monotonic()
    if left <= 0:
        return
    if control is None:
        time.sleep(left)
    elif control.wait(left):
        raise HushError(QUERY_CANCELED, "canceling statement due to user request")


# ---- pure helpers ----------------------------------------------------------------------------

def _explain_answer(items: list[tuple[Value, ...]], form: str, *, remaining: Decimal,
                    table: str) -> Answer:
    """EXPLAIN's (item, value) pairs formatted for people: as a table with one line of each
    value per row (the backend SQL comes laid out over lines), or (form "json") as one row and one json column named
    QUERY PLAN, as PostgreSQL answers EXPLAIN (FORMAT JSON), holding an object of the items."""
    pretty = [(str(item), "" if value is None else str(value)) for item, value in items]
    if form == "json":
        document = json.dumps(dict(pretty), indent=2)
        return Answer(columns=[OutputColumn("QUERY PLAN", "json")], rows=[(document,)],
                      epsilon=Decimal(0), remaining=remaining, accuracy=[], tables=[table])
    if form != "text":
        raise HushError(INVALID_PARAMETER_VALUE, f"EXPLAIN format {form[:20]} is not supported",
                        hint="use text or json")
    rows: list[tuple[Value, ...]] = []
    for item, value in pretty:
        lines = value.splitlines() or [""]
        rows += [(item, lines[0])] + [("", line) for line in lines[1:]]
    return Answer(columns=[OutputColumn("item", "text"), OutputColumn("value", "text")],
                  rows=rows, epsilon=Decimal(0), remaining=remaining, accuracy=[],
                  tables=[table])


def _cell_values(plan: Plan) -> list[tuple[Any, ...]]:
    """Key values of every cell, in the backend's (domain) order."""
    cells: list[tuple[Any, ...]] = [()]
    for key in plan.keys:
        values = key_values(plan.table.columns[key.column], key)
        cells = [cell + (value,) for cell in cells for value in values]
    return cells


def _measure_unit(plan: Plan, measure: Measure) -> Decimal:
    """What one unit of a measure is worth: the column's step for sums and spread's centred
    sums, half of it for AVG's midpoint sums (``2 x - lo - hi`` in steps), its square for
    centred sums of squares, 1 for counts."""
    if measure.kind == "centred_squares":
        return plan.table.columns[measure.column].unit ** 2  # type: ignore[index]
    if measure.kind in ("sum", "centred_sum"):
        return plan.table.columns[measure.column].unit  # type: ignore[index]
    if measure.kind == "midpoint_sum":
        return plan.table.columns[measure.column].unit / 2  # type: ignore[index]
    return Decimal(1)


def _middle(column: ColumnPolicy) -> Decimal:
    """The middle of a summable column's declared range, where AVG's midpoint sum is centred."""
    low, high = (Decimal(v) for v in column.range)  # type: ignore[union-attr]
    return (low + high) / 2


def _measure_label(plan: Plan, measure: Measure) -> str:
    """A measure as EXPLAIN names it (a derived column's name says its value or FILTER)."""
    if measure.kind in ("count_rows", "count_individuals") and measure.where is not None:
        what = "*" if measure.kind == "count_rows" else "distinct individual"
        return f"count({what}) FILTER (WHERE {measure.where.sql(dialect='postgres')})"
    column = measure.column
    if measure.kind == "midpoint_sum":
        return f"sum({column} - {_middle(plan.table.columns[column])})"  # type: ignore[index]
    return {"count_rows": "count(*)", "count_values": f"count({column})", "sum": f"sum({column})",
            "count_individuals": "count(distinct individual)",
            "centred_sum": f"sum({column} - centre)",
            "centred_squares": f"sum(({column} - centre)^2)"}[measure.kind]


def _average_items(plan: Plan, split: EpsilonSplit) -> list[tuple[Value, ...]]:
    """EXPLAIN's account of each average: centred or not, and its epsilon split."""
    items: list[tuple[Value, ...]] = []
    for output in plan.outputs:
        if output.kind != "avg":
            continue
        sum_measure = plan.measures[output.measures[0]]
        column = plan.table.columns[sum_measure.column]  # type: ignore[index]
        if sum_measure.kind == "midpoint_sum":
            middle = _middle(column)
            low, high = (Decimal(v) for v in column.range)  # type: ignore[union-attr]
            how = (f"centred: {middle} + noisy sum({output.column} - {middle}) / noisy "
                   f"count({output.column}), {middle} the middle of the declared range "
                   f"[{column.low}, {column.high}]: one value moves that sum by at most "
                   f"{_show((high - low) / 2)}, the plain sum by {_show(max(abs(low), abs(high)))}")
        elif not centres_averages(plan.table):
            how = (f"noisy sum({output.column}) / noisy count({output.column}), not centred: the "
                   "bounds are chosen from the individuals' totals, which centring would widen")
        else:
            how = (f"noisy sum({output.column}) / noisy count({output.column}), not centred: "
                   f"it shares the plain sum SUM({output.column}) needs, one measure fewer")
        items.append((f"average {output.name}",
                      f"{how}; epsilon {split.measure:.6g} for the sum and {split.measure:.6g} "
                      "for the count (equal: the split minimising the largest error, since "
                      "|average - centre| is bounded only by the range)"))
    return items


def _show(value: Fraction | Decimal | int) -> str:
    """A readable exact-ish rendering of a scale or bound."""
    if isinstance(value, Fraction):
        value = Decimal(value.numerator) / Decimal(value.denominator)
    return f"{value:.6g}" if isinstance(value, Decimal) and value != value.to_integral_value() \
        else str(value)


def _output_type(plan: Plan, output: Output) -> ColumnType:
    return output_type(plan.table, plan.keys, plan.measures, output)  # type: ignore[return-value]


def _output_value(plan: Plan, output: Output, cell: tuple[Any, ...], measures: list[int]) -> Value:
    """One output of one cell from its noisy measures (post-processing only); expressions are
    computed from the other outputs by ``postprocess``."""
    if output.kind == "expression":
        return None
    if output.kind == "key":
        return cell[output.key]  # type: ignore[index]
    first = measures[output.measures[0]]
    if output.kind == "count":
        return max(0, first)
    column = plan.table.columns[plan.measures[output.measures[0]].column]  # type: ignore[index]
    if output.kind in SPREAD_KINDS:
        return _spread_value(column, output, measures)
    if output.kind == "sum":
        return first if column.kind == "integer" else Decimal(first) * column.unit
    count = measures[output.measures[1]]
    if count <= 0:
        return None
    low, high = (float(v) for v in column.range)  # type: ignore[union-attr]
    measure = plan.measures[output.measures[0]]
    centre = float(_middle(column)) if measure.kind == "midpoint_sum" else 0.0
    average = centre + float(Decimal(first) * _measure_unit(plan, measure)) / count
    # Rounded for display only; the noise is far larger than the sixth decimal.
    return round(min(high, max(low, average)), 6)


def _spread_value(column: ColumnPolicy, output: Output, measures: list[int]) -> Value:
    """A variance or standard deviation from its noisy count, centred sum and centred squares
    (``proxy.spread``), in the column's units; None when the count leaves no divisor."""
    count, total, squares = (measures[i] for i in output.measures)
    low, high = (int(v / column.unit) for v in column.range)  # type: ignore[union-attr]
    estimate = spread.variance(count, total, squares, output.kind.endswith("_samp"),
                               spread.largest_variance(low, high))
    if estimate is None:
        return None
    unit = float(column.unit)
    if output.kind.startswith("stddev"):
        return round(math.sqrt(estimate) * unit, 6)
    return round(float(estimate) * unit * unit, 6)


def _spread_accuracy(plan: Plan, output: Output, share: Decimal, scales: list[Fraction],
                     noisy: list[list[int]]) -> Accuracy:
    """A variance's or standard deviation's 95% bound: the widest over cells of the interval
    propagation in ``proxy.spread`` (the whole clamped range where the count is too small)."""
    column = plan.table.columns[output.column]  # type: ignore[index]
    low, high = (int(v / column.unit) for v in column.range)  # type: ignore[union-attr]
    cap = spread.largest_variance(low, high)
    sample, root = output.kind.endswith("_samp"), output.kind.startswith("stddev")
    parts = spread.widths(tuple(scales[i] for i in output.measures))  # type: ignore[arg-type]
    widest = 0.0
    for count, total, squares in zip(*(noisy[i] for i in output.measures)):
        estimate = spread.variance(count, total, squares, sample, cap)
        if estimate is None:  # no divisor: anything in the clamped range
            estimate, span = cap / 2, (Fraction(0), cap)
        else:
            span = spread.variance_range(count, total, squares, parts, sample, cap)
        widest = max(widest, spread.half_width(estimate, span, root))
    unit = float(column.unit)
    return Accuracy(column=output.name, epsilon=share * 3, sensitivity=None, scale=None,
                    bound95=Decimal(repr(round(widest * (unit if root else unit * unit), 6))),
                    note="from a noisy count, centred sum and centred sum of squares, each "
                         "bounded at 98.3% and propagated by interval arithmetic")


def _bound_settings(rewritten: Rewritten, split: EpsilonSplit) -> dict[str, str] | None:
    """Settings for the bounds' noisy-max choice: per chosen bound, ``A,z_1,...,z_G`` with the
    target A (public: cells and epsilon) and exact discrete Laplace noise of scale
    2 * score_sensitivity / epsilon_bound per candidate (the proof is in proxy.sql.rewrite)."""
    settings: dict[str, str] = {}
    for j, bound in enumerate(rewritten.bounds):
        if not bound.chosen:
            continue
        cells = rewritten.cells // rewritten.buckets  # a percentile's histogram: its cells
        target = math.ceil(Fraction(ABOVE_FACTOR * cells) / Fraction(split.measure))
        scale = Fraction(2 * SCORE_SENSITIVITY) / Fraction(split.bound)
        draws = noise.sample_discrete_laplace(scale, len(bound.candidates))
        # A public preference for smaller candidates, PREFER_SMALLER noise scales per step up:
        # among candidates that leave about as many individuals above them, the smallest adds
        # the least noise. It depends on nothing but the candidate's position.
        step = int(scale * PREFER_SMALLER)
        settings[BOUND_NOISE_SETTING.format(j)] = ",".join(
            [str(target)] + [str(int(z) - step * k) for k, z in enumerate(draws)])
    return settings or None


def _clip_upper(rewritten: Rewritten, j: int, values: tuple[int, ...], lost: int,
                epsilon: Decimal) -> int | None:
    """An upper bound (95%) on one bound's clipped-away total, in measure units: the noisy
    total plus its one-sided 95% margin (the two-sided 90% bound), at least 0. None when the
    bound is declared (nothing spent on it: only data breaking most_rows is clipped)."""
    if not rewritten.bounds[j].chosen:
        return None
    scale = Fraction(loss_cap(rewritten.bounds, j, values)) / Fraction(epsilon)
    noisy = lost + int(noise.sample_discrete_laplace(scale, 1)[0])
    return max(0, noisy + noise.bound(scale, 0.90))


def _answer_notes(plan: Plan, rewritten: Rewritten, values: tuple[int, ...]) -> list[str]:
    """Facts about how the answer was computed, true of any data (no data-dependent count)."""
    notes = []
    ranged = sorted({m.column for m in plan.measures  # type: ignore[type-var]
                     if m.kind in ("sum", "midpoint_sum", "centred_sum")})
    for name in ranged:
        column = plan.table.columns[name]  # type: ignore[index]
        notes.append(f"values of {name} outside its declared range [{column.low}, {column.high}] "
                     f"are counted as the nearest end, NULLs not at all")
    if plan.keys:
        notes.append("rows whose group keys lie outside the declared values are not counted")
    if plan.ranked is not None:
        column = plan.table.columns[plan.ranked.column]
        notes.append(f"percentiles of {plan.ranked.column} rank its values in buckets of "
                     f"{column.unit} inside its declared range [{column.low}, {column.high}] "
                     "(values outside it, and NULLs, are not ranked) and answer a bucket's "
                     "lower edge")
    if plan.table.individual is not None:
        notes.append(f"rows without a {plan.table.individual.column} are not counted")
        for name in rewritten.kept_in_domains:  # (proxy.sql.rewrite, 10)
            notes.append(f"rows whose {name} is NULL or outside its declared values are not "
                         "counted")
        if rewritten.held_by:  # the bounds hold of themselves (proxy.sql.rewrite, 8)
            notes.append(f"each individual has at most {_rows_text(rewritten.held_rows)} "
                         f"here (the database keeps {_held_text(rewritten)}), so nothing is "
                         "scaled down")
            return notes
        for bound, value in zip(rewritten.bounds, values):
            unit = Decimal(1) if bound.subject == "rows" else plan.table.columns[bound.subject].unit
            what = "rows" if bound.subject == "rows" else f"total {bound.subject}"
            how = "chosen privately for this query" if bound.chosen else "declared"
            notes.append(f"each individual's {what} over the whole answer is scaled down to at "
                         f"most {_show(value * unit)} ({how})")
    return notes


def _rows_text(count: int) -> str:
    return "one row" if count == 1 else f"{count} rows"


def _held_text(rewritten: Rewritten) -> str:
    """How the database holds each individual's rows (``Rewritten.held_by``), in words."""
    columns = rewritten.held_by
    if len(columns) == 1:
        return f"{columns[0]} unique (one row per individual)"
    others = columns[1] if len(columns) == 2 else f"({', '.join(columns[1:])})"
    return (f"({', '.join(columns)}) unique and the query counts at most "
            f"{rewritten.held_rows} values of {others}")


def _accuracy(plan: Plan, output: Output, share: Decimal, sensitivities: tuple[int, ...],
              scales: list[Fraction], bounds: list[int], noisy: list[list[int]],
              clipping: list[int | None]) -> Accuracy:
    """How noisy one aggregate output is, in the column's own units (``share`` is each
    measure's epsilon); with how far clipping may have lowered it."""
    first = output.measures[0]
    measure = plan.measures[first]
    unit = _measure_unit(plan, measure)
    if output.kind in SPREAD_KINDS:
        return _spread_accuracy(plan, output, share, scales, noisy)
    if output.kind in ("count", "sum"):
        low_by = high_by = None
        if clipping[first] is not None and measure.kind != "count_individuals":
            low_by = Decimal(clipping[first]) * unit  # type: ignore[arg-type]
            signed = measure.kind == "sum" and Decimal(plan.table.columns[measure.column].low) < 0  # type: ignore[index]
            high_by = low_by if signed else Decimal(0)
        return Accuracy(column=output.name, epsilon=share, sensitivity=Decimal(sensitivities[first]) * unit,
                        scale=scales[first] * Fraction(unit), bound95=Decimal(bounds[first]) * unit,
                        note="discrete Laplace", low_by=low_by, high_by=high_by)
    column = plan.table.columns[measure.column]  # type: ignore[index]
    centre = _middle(column) if measure.kind == "midpoint_sum" else Decimal(0)
    return _average_accuracy(output, column, share * 2, unit, centre, scales, noisy, clipping)


def _average_accuracy(output: Output, column: ColumnPolicy, epsilon: Decimal, unit: Decimal,
                      centre: Decimal, scales: list[Fraction], noisy: list[list[int]],
                      clipping: list[int | None]) -> Accuracy:
    """AVG's 95% bound, the widest over cells of its linearised error: the average
    ``a = c + S u / C`` of a noisy sum S (centred on c, or c = 0) and count C, u the sum's
    unit, moves by about ``(u Z_s - (a - c) Z_c) / C``, whose standard deviation is
    ``sqrt(u^2 Var_s + (a - c)^2 Var_c) / C``; the bound is ``_AVG_SD_MULTIPLE`` of it, capped
    by the range's width. Where the count is too small for the linearisation (within three
    standard deviations of 0) the bound is the range's width.
    Clipping (sum and count both scaled down by one factor per individual) may move the average
    either way, by at most the clipped-away share of the count times the distance to the far end
    of the range: ``low_by`` and ``high_by``."""
    s, c = output.measures
    step, middle = float(unit), float(centre)
    low, high = (float(v) for v in column.range)  # type: ignore[union-attr]
    var_s, var_c = noise.variance(scales[s]), noise.variance(scales[c])
    widest = widest_clip = 0.0
    for total, count in zip(noisy[s], noisy[c]):
        if count <= 3 * math.sqrt(var_c):
            widest = widest_clip = high - low
            break
        estimate = min(high, max(low, middle + total * step / count))
        offset = estimate - middle
        spread = _AVG_SD_MULTIPLE * math.sqrt(step * step * var_s + offset * offset * var_c) / count
        widest = max(widest, min(high - low, spread))
        if clipping[c] is not None:
            # The plain average mixes the kept one with the clipped-away rows' average (inside
            # the range, as both are scaled by one factor per individual), weighted by the
            # clipped-away share of the count.
            share = min(1.0, clipping[c] / count)  # type: ignore[operator]
            widest_clip = max(widest_clip, share * max(estimate - low, high - estimate))
    clipped = None if clipping[c] is None else Decimal(repr(round(widest_clip, 6)))
    return Accuracy(column=output.name, epsilon=epsilon,
                    sensitivity=None, scale=None, bound95=Decimal(repr(round(widest, 6))),
                    note="average of a noisy sum and a noisy count (linearised)",
                    low_by=clipped, high_by=clipped)
