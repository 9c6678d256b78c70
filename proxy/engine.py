"""The engine: one analyst, one statement -> one differentially private answer, charged.

The order of steps is the privacy argument, so it lives here and only here:
1. plan: analyse and rewrite (pure, cached by statement text; no data read). A refusal here
   charges nothing.
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
   note, not a charge, so for answered queries a background worker records it after the answer
   has gone; failures and cancellations are recorded before the error is raised.

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
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from decimal import Decimal, InvalidOperation
from fractions import Fraction
from typing import Any

import sqlglot
import sqlglot.errors
import sqlglot.expressions as exp

from proxy import faults, noise
from proxy.accounts import Accounts
from proxy.answer import Accuracy, Answer, ColumnType, OutputColumn, Value
from proxy.backend import Backend, QueryControl
from proxy.errors import INTERNAL_ERROR, INVALID_PARAMETER_VALUE, QUERY_CANCELED, HushError
from proxy.ledger import Ledger
from proxy.policy import ColumnPolicy, Policies
from proxy.sql.analyse import analyse
from proxy.sql.domains import describe_key, key_label, key_type, key_values
from proxy.sql.limits import Limits
from proxy.sql.parameters import parameter_types
from proxy.sql.plan import Measure, Output, Plan
from proxy.sql.postprocess import postprocess
from proxy.spark_backend import SparkBackend, is_spark_dsn
from proxy.sql.rewrite import (BOUND_NOISE_SETTING, SCORE_SENSITIVITY, Rewritten, centres_averages,
                                loss_cap, rewrite)

__all__ = ["Engine", "Prepared", "QueryControl", "parse_epsilon"]

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


def epsilon_split(rewritten: Rewritten, measures: int, epsilon: Decimal) -> EpsilonSplit:
    """Basic sequential composition: the parts add up to ``epsilon`` exactly."""
    if not any(b.chosen for b in rewritten.bounds):
        return EpsilonSplit(measure=epsilon / measures, bound=Decimal(0), clip=Decimal(0))
    count = len(rewritten.bounds)
    return EpsilonSplit(measure=epsilon * (1 - BOUND_SHARE - CLIP_SHARE) / measures,
                        bound=epsilon * BOUND_SHARE / count, clip=epsilon * CLIP_SHARE / count)


@dataclass(frozen=True)
class Prepared:
    """A statement analysed and rewritten: everything but the data and the epsilon."""

    plan: Plan
    rewritten: Rewritten
    cells: list[tuple[Any, ...]]  # the key values of each cell, in the order the backend returns
    fingerprint: str


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

    def __init__(self, policies: Policies, backend: Backend | SparkBackend, ledger: Ledger, *,
                 plan_cache_size: int = 1024,
                 plan_cache_bytes: int = 64 * 1024 * 1024) -> None:
        self.policies = policies
        self.backend = backend
        self.ledger = ledger
        self._cache: OrderedDict[tuple[str, str], Prepared] = OrderedDict()
        self._cache_size = plan_cache_size
        # Bounded in (estimated) memory too: EXPLAIN plans for free, and the largest plans the
        # limits accept hold about 2 MB each.
        self._cache_bytes = plan_cache_bytes
        self._cache_weight = 0
        self._cache_lock = threading.Lock()
        self._exact: dict[str, frozenset[str]] = {}
        # Records answered outcomes after the answer is released, in order, on one thread.
        self._notes = ThreadPoolExecutor(max_workers=1, thread_name_prefix="hushql-outcomes")
        self._answered: list[int] = []  # charges whose 'answered' note is not yet recorded
        self._answered_lock = threading.Lock()
        from proxy.safe_config import policy_source

        for line in ledger.sync_budgets(policies, source=policy_source(policies)):
            log.warning("budget below spending: %s", line)
        from proxy.renewal import RenewalSchedule

        self._renewals = RenewalSchedule(policies, ledger)
        self._renewals.apply_due()

    @classmethod
    def connect(cls, policies: Policies, backend_dsn: str, ledger_dsn: str | None = None, *,
                pool_size: int = 16) -> Engine:
        """An engine with its own backend pool and ledger (default: schema hushql in the backend).

        A Spark Connect backend (``sc://``) needs ``ledger_dsn``: the ledger stays in PostgreSQL.
        """
        backend: Backend | SparkBackend
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
            self._exact.clear()

    def close(self) -> None:
        """Record pending outcomes, then close the pools."""
        self._notes.shutdown(wait=True)
        self.backend.close()
        self.ledger.close()

    # ---- planning (no data read, nothing charged) ------------------------------------------

    def prepare(self, analyst: str, statement: str | exp.Expression) -> Prepared:
        """Analyse and rewrite ``statement`` for ``analyst``; cached by statement text."""
        key = (analyst, statement) if isinstance(statement, str) else None
        if key is not None:
            with self._cache_lock:
                cached = self._cache.get(key)
                if cached is not None:
                    self._cache.move_to_end(key)
                    return cached
        plan = analyse(statement, self.policies, analyst)
        rewritten = rewrite(plan, self._exact_columns(plan.table.table))
        self.backend.check(rewritten.sql)  # a shape the backend cannot run exactly: before any charge
        prepared = Prepared(plan=plan, rewritten=rewritten, cells=_cell_values(plan),
                            fingerprint=hashlib.sha256(rewritten.sql.encode()).hexdigest()[:16])
        if key is not None:
            with self._cache_lock:
                if key not in self._cache:
                    self._cache[key] = prepared
                    self._cache_weight += _plan_bytes(prepared)
                while self._cache and (len(self._cache) > self._cache_size
                                       or self._cache_weight > self._cache_bytes):
                    self._cache_weight -= _plan_bytes(self._cache.popitem(last=False)[1])
        return prepared

    def _exact_columns(self, table: str) -> frozenset[str]:
        """Number columns of ``table`` whose backend type is numeric (summed exactly); looked up
        once per table. On any doubt, none: sums are then rounded to steps per row."""
        with self._cache_lock:
            known = self._exact.get(table)
        if known is None:
            try:
                types = self.backend.column_types(self.policies.tables[table].source)
            except Exception:
                log.warning("could not read the column types of table %s", table)
                types = {}
            known = frozenset(name for name, kind in types.items() if kind.startswith("numeric"))
            with self._cache_lock:
                self._exact[table] = known
        return known

    def describe(self, analyst: str, statement: str | exp.Expression) -> list[OutputColumn]:
        """The columns an answer would have; plans only."""
        plan = self.prepare(analyst, statement).plan
        return [OutputColumn(o.name, _output_type(plan, o)) for o in plan.visible_outputs]

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

    def explain(self, analyst: str, statement: str | exp.Expression, *,
                epsilon: Decimal | None = None, form: str = "text") -> Answer:
        """The plan, its sensitivities and noise, charging nothing: a two-column table (``form``
        "text"), or one JSON document with the same items (``form`` "json")."""
        prepared = self.prepare(analyst, statement)
        eps = self.epsilon_for(epsilon)
        plan, rewritten = prepared.plan, prepared.rewritten
        split = epsilon_split(rewritten, len(plan.measures), eps)
        rows: list[tuple[Value, ...]] = [
            ("table", plan.table.table),
            ("protected unit", f"individual ({plan.table.individual.column}, population "
                               f"{plan.table.population})" if plan.table.individual else "row"),
            ("cells", str(rewritten.cells)),
            *[(f"key {key_label(key)}", describe_key(plan.table.columns[key.column], key))
              for key in plan.keys],
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
                             f"{_show(bound.ceiling * unit)}), epsilon {split.bound:.6g}; "
                             f"clipped-away total reported with epsilon {split.clip:.6g}"))
            else:
                rows.append((f"bound on {what} per individual",
                             f"declared: {_show(bound.ceiling * unit)} (the policy's most_rows)"))
        chosen = any(b.chosen for b in rewritten.bounds)
        for measure, sensitivity in zip(plan.measures, rewritten.declared_sensitivities
                                        if rewritten.bounds else rewritten.sensitivities()):
            unit = _measure_unit(plan, measure)
            scale = Fraction(sensitivity) / Fraction(split.measure)
            at_most = "at most " if chosen else ""
            rows.append((f"measure {_measure_label(plan, measure)}",
                         f"sensitivity {at_most}{_show(sensitivity * unit)}, noise scale "
                         f"{at_most}{_show(scale * Fraction(unit))}, "
                         f"95% bound {at_most}±{_show(noise.bound95(scale) * unit)}"))
        rows += _average_items(plan, split)
        rows.append(("backend sql", rewritten.sql))
        return _explain_answer(rows, form, remaining=self.ledger.remaining(analyst),
                               table=plan.table.table)

    # ---- answering ---------------------------------------------------------------------------

    def answer(self, analyst: str, statement: str | exp.Expression, *,
               epsilon: Decimal | None = None, control: QueryControl | None = None) -> Answer:
        """Plan, reserve, run, noise and release one statement. Raises HushError."""
        arrived = time.monotonic()
        prepared = self.prepare(analyst, statement)
        self._renewals.apply_due()  # a clock comparison except at a period boundary
        eps = self.epsilon_for(epsilon)
        plan = prepared.plan
        text = statement if isinstance(statement, str) else statement.sql(dialect="postgres")
        charge, remaining = self.ledger.reserve(analyst, [plan.table.table], eps, text,
                                                prepared.fingerprint)
        outcome = "failed"
        steady = _steady_ms(plan)
        failure: HushError | None = None
        try:
            faults.pause("after-reserve")
            split = epsilon_split(prepared.rewritten, len(plan.measures), eps)
            true_rows = self._run_in_time(prepared, control,
                                          _bound_settings(prepared.rewritten, split), arrived,
                                          steady)
            if len(true_rows) != len(prepared.cells):
                raise HushError(INTERNAL_ERROR, "the backend returned an unexpected result shape")
            answer = self._release(prepared, eps, split, true_rows, charge)
            outcome = "answered"
        except HushError as error:
            failure = error
            if error.sqlstate == QUERY_CANCELED:
                outcome = "cancelled"
        finally:
            if outcome == "answered":
                # A note, not a charge (the charge is durable already): off the answer's path.
                self._note_answered(charge)
            else:
                self._finish(charge, outcome)
        if steady is not None:  # answer or error, released at the steady time
            _hold_until(arrived + steady / 1000, control)
        if failure is not None:
            raise failure
        return dataclasses.replace(answer, remaining=remaining)

    def _note_answered(self, charge: int) -> None:
        """Queues an 'answered' note; the notes thread records all queued notes in one round
        trip, so under load the notes cost the ledger one transaction per batch of answers."""
        with self._answered_lock:
            self._answered.append(charge)
            first = len(self._answered) == 1
        if first:
            self._notes.submit(self._record_answered)

    def _record_answered(self) -> None:
        with self._answered_lock:
            charges, self._answered = self._answered, []
        try:
            recorded = self.ledger.finish_many(charges, "answered")
        except Exception:
            log.exception("could not record the outcome of %d charges", len(charges))
            return
        if recorded != len(charges):
            log.warning("%d of %d answered charges were unknown or already finished",
                        len(charges) - recorded, len(charges))

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
        accuracy = [_accuracy(plan, o, split.measure, rewritten.sensitivities(values), scales,
                              bounds, noisy, clipping)
                    for o in plan.outputs if o.visible and o.kind != "key"]
        return Answer(columns=[OutputColumn(o.name, _output_type(plan, o)) for o in plan.visible_outputs],
                      rows=postprocess(plan, rows), epsilon=epsilon,
                      remaining=Decimal(0), accuracy=accuracy,
                      tables=[plan.table.table], charge_id=charge,
                      notes=_answer_notes(plan, rewritten, values))


def _plan_bytes(prepared: Prepared) -> int:
    """An estimate of a cached plan's memory: about 600 bytes per condition node (measured with
    tracemalloc on the largest accepted shapes), plus the backend SQL and the cells."""
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
    """EXPLAIN's (item, value) pairs formatted for people: as a table whose backend SQL is
    pretty-printed one line per row, or (form "json") as one row and one json column named
    QUERY PLAN, as PostgreSQL answers EXPLAIN (FORMAT JSON), holding an object of the items."""
    pairs = [(str(item), "" if value is None else str(value)) for item, value in items]
    pretty = [(item, _pretty_sql(value) if item == "backend sql" else value)
              for item, value in pairs]
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


def _pretty_sql(text: str) -> str:
    """Backend SQL over several lines (sqlglot's pretty printer); as it was if it cannot."""
    try:
        return sqlglot.parse_one(text, read="postgres").sql(dialect="postgres", pretty=True)
    except sqlglot.errors.SqlglotError:
        return text


def _cell_values(plan: Plan) -> list[tuple[Any, ...]]:
    """Key values of every cell, in the backend's (domain) order."""
    cells: list[tuple[Any, ...]] = [()]
    for key in plan.keys:
        values = key_values(plan.table.columns[key.column], key)
        cells = [cell + (value,) for cell in cells for value in values]
    return cells


def _measure_unit(plan: Plan, measure: Measure) -> Decimal:
    """What one unit of a measure is worth: the column's step for sums, half of it for centred
    sums (``2 x - lo - hi`` in steps), 1 for counts."""
    if measure.kind == "sum":
        return plan.table.columns[measure.column].unit  # type: ignore[index]
    if measure.kind == "midpoint_sum":
        return plan.table.columns[measure.column].unit / 2  # type: ignore[index]
    return Decimal(1)


def _middle(column: ColumnPolicy) -> Decimal:
    """The middle of a summable column's declared range, where AVG's centred sum is centred."""
    low, high = (Decimal(v) for v in column.range)  # type: ignore[union-attr]
    return (low + high) / 2


def _measure_label(plan: Plan, measure: Measure) -> str:
    column = measure.column
    if measure.kind == "midpoint_sum":
        return f"sum({column} - {_middle(plan.table.columns[column])})"  # type: ignore[index]
    return {"count_rows": "count(*)", "count_values": f"count({column})", "sum": f"sum({column})",
            "count_individuals": "count(distinct individual)"}[measure.kind]


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
    if output.kind == "key":
        key = plan.keys[output.key]  # type: ignore[index]
        return key_type(plan.table.columns[key.column], key)
    if output.kind == "count":
        return "bigint"
    if output.kind == "sum":
        column = plan.table.columns[plan.measures[output.measures[0]].column]  # type: ignore[index]
        return "bigint" if column.kind == "integer" else "numeric"
    return "double precision"


def _output_value(plan: Plan, output: Output, cell: tuple[Any, ...], measures: list[int]) -> Value:
    """One output of one cell from its noisy measures (post-processing only)."""
    if output.kind == "key":
        return cell[output.key]  # type: ignore[index]
    first = measures[output.measures[0]]
    if output.kind == "count":
        return max(0, first)
    column = plan.table.columns[plan.measures[output.measures[0]].column]  # type: ignore[index]
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


def _bound_settings(rewritten: Rewritten, split: EpsilonSplit) -> dict[str, str] | None:
    """Settings for the bounds' noisy-max choice: per chosen bound, ``A,z_1,...,z_G`` with the
    target A (public: cells and epsilon) and exact discrete Laplace noise of scale
    2 * score_sensitivity / epsilon_bound per candidate (the proof is in proxy.sql.rewrite)."""
    settings: dict[str, str] = {}
    for j, bound in enumerate(rewritten.bounds):
        if not bound.chosen:
            continue
        target = math.ceil(Fraction(ABOVE_FACTOR * rewritten.cells) / Fraction(split.measure))
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
    ranged = sorted({m.column for m in plan.measures if m.kind in ("sum", "midpoint_sum")})  # type: ignore[type-var]
    for name in ranged:
        column = plan.table.columns[name]  # type: ignore[index]
        notes.append(f"values of {name} outside its declared range [{column.low}, {column.high}] "
                     f"are counted as the nearest end, NULLs not at all")
    if plan.keys:
        notes.append("rows whose group keys lie outside the declared values are not counted")
    if plan.table.individual is not None:
        notes.append(f"rows without a {plan.table.individual.column} are not counted")
        for bound, value in zip(rewritten.bounds, values):
            unit = Decimal(1) if bound.subject == "rows" else plan.table.columns[bound.subject].unit
            what = "rows" if bound.subject == "rows" else f"total {bound.subject}"
            how = "chosen privately for this query" if bound.chosen else "declared"
            notes.append(f"each individual's {what} over the whole answer is scaled down to at "
                         f"most {_show(value * unit)} ({how})")
    return notes


def _accuracy(plan: Plan, output: Output, share: Decimal, sensitivities: tuple[int, ...],
              scales: list[Fraction], bounds: list[int], noisy: list[list[int]],
              clipping: list[int | None]) -> Accuracy:
    """How noisy one aggregate output is, in the column's own units (``share`` is each
    measure's epsilon); with how far clipping may have lowered it."""
    first = output.measures[0]
    measure = plan.measures[first]
    unit = _measure_unit(plan, measure)
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
