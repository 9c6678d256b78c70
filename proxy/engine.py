"""The engine: one analyst, one statement -> one differentially private answer, charged.

The order of steps is the privacy argument, so it lives here and only here:
1. plan: analyse and rewrite (pure, cached by statement text; no data read). A refusal here
   charges nothing.
2. reserve: the ledger charges epsilon in one committed transaction, or refuses (budget spent);
   the reservation also says what the analyst has left, which the answer reports.
3. run: the rewritten query on the backend. From here on the charge stands whatever happens,
   because whether a query fails can depend on the data.
4. noise: discrete Laplace noise of scale sensitivity / (epsilon / k) on each of the k measures
   of every cell (the cells of a GROUP BY are disjoint and share that epsilon).
5. release: post-processing on noisy values only (clamping counts at zero, AVG's division,
   HAVING, ORDER BY, LIMIT), then the answer.
6. finish: the charge's outcome (answered, failed, cancelled) is noted in the ledger. It is a
   note, not a charge, so for answered queries a background worker records it after the answer
   has gone; failures and cancellations are recorded before the error is raised.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import logging
import secrets
import threading
from collections import OrderedDict
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from decimal import Decimal, InvalidOperation
from fractions import Fraction
from typing import Any

import sqlglot
import sqlglot.errors
import sqlglot.expressions as exp

from proxy import noise
from proxy.answer import Accuracy, Answer, ColumnType, OutputColumn, Value
from proxy.backend import Backend, QueryControl
from proxy.errors import INTERNAL_ERROR, INVALID_PARAMETER_VALUE, QUERY_CANCELED, HushError
from proxy.ledger import Ledger
from proxy.policy import ColumnPolicy, Policies
from proxy.sql.analyse import analyse
from proxy.sql.domains import domain_values
from proxy.sql.parameters import parameter_types
from proxy.sql.plan import Measure, Output, Plan
from proxy.sql.postprocess import postprocess
from proxy.spark_backend import SparkBackend, is_spark_dsn
from proxy.sql.rewrite import PICK_SALT_SETTING, Rewritten, rewrite

__all__ = ["Engine", "Prepared", "QueryControl", "parse_epsilon"]

log = logging.getLogger("hushql.engine")

# AVG's bound combines the sum's and the count's bounds at this confidence each, so that by the
# union bound both hold together with probability at least 0.95.
_PART_CONFIDENCE = 0.975


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


def parse_epsilon(value: str | Decimal | float, largest: Decimal) -> Decimal:
    """An analyst's epsilon as an exact Decimal in (0, largest] with at most
    ``MOST_EPSILON_PLACES`` digits after the point; raises HushError 22023 otherwise."""
    try:
        epsilon = value if isinstance(value, Decimal) else Decimal(str(value).strip())
    except (InvalidOperation, ValueError):
        epsilon = Decimal("NaN")
    if not epsilon.is_finite() or epsilon <= 0 or epsilon > largest \
            or _decimal_places(epsilon) > MOST_EPSILON_PLACES:
        shown = str(value)
        raise HushError(INVALID_PARAMETER_VALUE,
                        f"invalid epsilon {shown if len(shown) <= 40 else shown[:37] + '...'}",
                        hint=f"epsilon must be a decimal number above 0 and at most {largest}, "
                             f"with at most {MOST_EPSILON_PLACES} digits after the decimal point")
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
                 plan_cache_size: int = 1024) -> None:
        self.policies = policies
        self.backend = backend
        self.ledger = ledger
        self._cache: OrderedDict[tuple[str, str], Prepared] = OrderedDict()
        self._cache_size = plan_cache_size
        self._cache_lock = threading.Lock()
        self._exact: dict[str, frozenset[str]] = {}
        # Records answered outcomes after the answer is released, in order, on one thread.
        self._notes = ThreadPoolExecutor(max_workers=1, thread_name_prefix="hushql-outcomes")
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
        prepared = Prepared(plan=plan, rewritten=rewritten, cells=_cell_values(plan),
                            fingerprint=hashlib.sha256(rewritten.sql.encode()).hexdigest()[:16])
        if key is not None:
            with self._cache_lock:
                self._cache[key] = prepared
                if len(self._cache) > self._cache_size:
                    self._cache.popitem(last=False)
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
        return parse_epsilon(chosen, defaults.largest_epsilon_per_query)

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
        share = eps / len(plan.measures)
        rows: list[tuple[Value, ...]] = [
            ("table", plan.table.table),
            ("protected unit", f"individual ({plan.table.individual.column})"
             if plan.table.individual else "row"),
            ("cells", str(rewritten.cells)),
            ("epsilon", str(eps)),
            ("epsilon per measure", f"{share:.6g}"),
        ]
        if rewritten.groups_kept is not None:
            rows.append(("groups kept per individual", str(rewritten.groups_kept)))
        for measure, sensitivity, scale in zip(plan.measures, rewritten.sensitivities,
                                               self._scales(prepared, eps)):
            unit = _measure_unit(plan, measure)
            rows.append((f"measure {_measure_label(measure.kind, measure.column)}",
                         f"sensitivity {_show(sensitivity * unit)}, noise scale "
                         f"{_show(scale * Fraction(unit))}, "
                         f"95% bound ±{_show(noise.bound95(scale) * unit)}"))
        rows.append(("backend sql", rewritten.sql))
        return _explain_answer(rows, form, remaining=self.ledger.remaining(analyst),
                               table=plan.table.table)

    # ---- answering ---------------------------------------------------------------------------

    def answer(self, analyst: str, statement: str | exp.Expression, *,
               epsilon: Decimal | None = None, control: QueryControl | None = None) -> Answer:
        """Plan, reserve, run, noise and release one statement. Raises HushError."""
        prepared = self.prepare(analyst, statement)
        self._renewals.apply_due()  # a clock comparison except at a period boundary
        eps = self.epsilon_for(epsilon)
        plan = prepared.plan
        text = statement if isinstance(statement, str) else statement.sql(dialect="postgres")
        charge, remaining = self.ledger.reserve(analyst, [plan.table.table], eps, text,
                                                prepared.fingerprint)
        outcome = "failed"
        try:
            settings = ({PICK_SALT_SETTING: secrets.token_hex(16)}
                        if prepared.rewritten.needs_salt else None)
            true_rows = self.backend.run(prepared.rewritten.sql, control, settings)
            if len(true_rows) != len(prepared.cells):
                raise HushError(INTERNAL_ERROR, "the backend returned an unexpected result shape")
            answer = self._release(prepared, eps, true_rows, charge)
            outcome = "answered"
        except HushError as error:
            if error.sqlstate == QUERY_CANCELED:
                outcome = "cancelled"
            raise
        finally:
            if outcome == "answered":
                # A note, not a charge (the charge is durable already): off the answer's path.
                self._notes.submit(self._finish, charge, outcome)
            else:
                self._finish(charge, outcome)
        return dataclasses.replace(answer, remaining=remaining)

    def _finish(self, charge: int, outcome: str) -> None:
        """Record the outcome of a charge; a failure to record it loses only the note."""
        try:
            self.ledger.finish(charge, outcome)
        except Exception:
            log.exception("could not record the outcome of charge %s", charge)

    def _scales(self, prepared: Prepared, epsilon: Decimal) -> list[Fraction]:
        """Noise scale of each measure in measure units: sensitivity * k / epsilon, exactly."""
        k = len(prepared.plan.measures)
        return [Fraction(s) * k / Fraction(epsilon) for s in prepared.rewritten.sensitivities]

    def _release(self, prepared: Prepared, epsilon: Decimal, true_rows: list[tuple[Any, ...]],
                 charge: int) -> Answer:
        """Noise every measure of every cell, then post-process; ``remaining`` is filled in by
        the caller from the reservation."""
        plan = prepared.plan
        key_count = len(plan.keys)
        cells = len(true_rows)
        scales = self._scales(prepared, epsilon)
        noisy: list[list[int]] = []
        for n, scale in enumerate(scales):
            draws = noise.sample_discrete_laplace(scale, cells)
            noisy.append([int(row[key_count + n]) + int(z) for row, z in zip(true_rows, draws)])
        bounds = [noise.bound95(s) for s in scales]
        rows: list[list[Value]] = []
        for c in range(cells):
            rows.append([_output_value(plan, o, prepared.cells[c], [m[c] for m in noisy])
                         for o in plan.outputs])
        accuracy = [_accuracy(plan, o, epsilon, prepared.rewritten.sensitivities, scales, bounds,
                              noisy) for o in plan.outputs if o.visible and o.kind != "key"]
        return Answer(columns=[OutputColumn(o.name, _output_type(plan, o)) for o in plan.visible_outputs],
                      rows=postprocess(plan, rows), epsilon=epsilon,
                      remaining=Decimal(0), accuracy=accuracy,
                      tables=[plan.table.table], charge_id=charge)


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
        values = domain_values(plan.table.columns[key.column], key.bucket)
        cells = [cell + (value,) for cell in cells for value in values]
    return cells


def _measure_unit(plan: Plan, measure: Measure) -> Decimal:
    """What one unit of a measure is worth: the column's step for sums, 1 for counts."""
    return plan.table.columns[measure.column].unit if measure.kind == "sum" else Decimal(1)  # type: ignore[index]


def _measure_label(kind: str, column: str | None) -> str:
    return {"count_rows": "count(*)", "count_values": f"count({column})", "sum": f"sum({column})",
            "count_individuals": "count(distinct individual)"}[kind]


def _show(value: Fraction | Decimal | int) -> str:
    """A readable exact-ish rendering of a scale or bound."""
    if isinstance(value, Fraction):
        value = Decimal(value.numerator) / Decimal(value.denominator)
    return f"{value:.6g}" if isinstance(value, Decimal) and value != value.to_integral_value() \
        else str(value)


def _output_type(plan: Plan, output: Output) -> ColumnType:
    if output.kind == "key":
        key = plan.keys[output.key]  # type: ignore[index]
        kind = plan.table.columns[key.column].kind
        return {"category": "text", "integer": "integer", "boolean": "boolean",
                "date": "date"}[kind]  # type: ignore[return-value]
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
    # Rounded for display only; the noise is far larger than the sixth decimal.
    return round(min(high, max(low, float(Decimal(first) * column.unit) / count)), 6)


def _accuracy(plan: Plan, output: Output, epsilon: Decimal, sensitivities: tuple[int, ...],
              scales: list[Fraction], bounds: list[int], noisy: list[list[int]]) -> Accuracy:
    """How noisy one aggregate output is, in the column's own units (epsilon is the query's)."""
    share = epsilon / len(plan.measures)
    first = output.measures[0]
    unit = _measure_unit(plan, plan.measures[first])
    if output.kind in ("count", "sum"):
        return Accuracy(column=output.name, epsilon=share, sensitivity=Decimal(sensitivities[first]) * unit,
                        scale=scales[first] * Fraction(unit), bound95=Decimal(bounds[first]) * unit,
                        note="discrete Laplace")
    column = plan.table.columns[plan.measures[first].column]  # type: ignore[index]
    return _average_accuracy(output, column, share * 2, scales, noisy)


def _average_accuracy(output: Output, column: ColumnPolicy, epsilon: Decimal,
                      scales: list[Fraction], noisy: list[list[int]]) -> Accuracy:
    """AVG's 95% bound: the widest half-width, over cells, of the set of averages consistent
    with the sum and the count each within its 97.5% bound (union bound), capped by the range."""
    s, c = output.measures
    ts = noise.bound(scales[s], _PART_CONFIDENCE)
    tc = noise.bound(scales[c], _PART_CONFIDENCE)
    unit = float(column.unit)
    low, high = (float(v) for v in column.range)  # type: ignore[union-attr]
    widest = 0.0
    for total, count in zip(noisy[s], noisy[c]):
        if count - tc <= 0:
            widest = high - low
            break
        estimate = min(high, max(low, total * unit / count))
        corners = [min(high, max(low, (total + ds) * unit / (count + dc)))
                   for ds in (-ts, ts) for dc in (-tc, tc)]
        widest = max(widest, *(abs(x - estimate) for x in corners))
    return Accuracy(column=output.name, epsilon=epsilon,
                    sensitivity=None, scale=None, bound95=Decimal(repr(round(widest, 6))),
                    note="average of a noisy sum and a noisy count (97.5% bound on each)")

