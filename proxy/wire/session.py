"""One analyst's session: settings, prepared statements, portals, and the calls to the engine.

The server hands the session each message of the query phase; the session answers with the
backend messages to send. It knows nothing of sockets: blocking work (the engine, the catalog)
runs in an executor so one analyst's slow query never holds up the event loop, and a running
query can be cancelled from outside (CancelRequest, a vanished client). The analyst's
statement_timeout is not one of them: answers run under the proxy's own time limit (see
``settings.NOT_APPLIED``), since a deadline the analyst chooses turns answer times into answers.

What the engine sees: for a statement without parameters, its own text (the engine caches plans
by text) or, above ``statements.MAX_CACHED_TEXT``, its tree (so a long text is parsed once);
with parameters, a ``BoundStatement``: the tree parsed once at Parse, with each decoded value as
a literal node, which the engine plans once per class of values and binds late
(``proxy.sql.statement``). Parameter values are never pasted into SQL text they brought.
Describe of a statement the engine has planned already is answered on the event loop.

Refused work costs time: before a Query or Parse is read, the account's refusal allowance
(``guard.RefusalAllowance``) must be able to pay for the text; the cost comes back when the
statement succeeds. Texts longer than ``INLINE_PARSE_BYTES`` are read on one parse thread, so a
long statement never stops the event loop and long statements never compete with each other.
"""

from __future__ import annotations

import asyncio
import functools
import logging
import threading
import traceback
from concurrent.futures import Executor, ThreadPoolExecutor
from dataclasses import dataclass, field
from decimal import Decimal
from typing import Any, Callable, Sequence

from sqlglot import exp

from proxy.answer import Answer, margin_columns, with_margins
from proxy.engine import QueryControl, paid_text
from proxy.errors import (BUDGET_EXHAUSTED, DUPLICATE_CURSOR, DUPLICATE_PREPARED_STATEMENT, FEATURE_NOT_SUPPORTED,
                          IN_FAILED_SQL_TRANSACTION, INTERNAL_ERROR, INVALID_CURSOR_NAME,
                          INVALID_PARAMETER_VALUE, INVALID_SAVEPOINT, INVALID_SQL_STATEMENT_NAME,
                          NO_ACTIVE_SQL_TRANSACTION, PROGRAM_LIMIT_EXCEEDED, PROTOCOL_VIOLATION,
                          QUERY_CANCELED, SUCCESSFUL_COMPLETION, HushError)
from proxy.sql.limits import check_statement_text
from proxy.sql.statement import BoundStatement
from proxy.wire import codec, guard, settings, statements, types
from proxy.wire.boundary import Answering, CatalogQuestions
from proxy.wire.askable import names_my_tables
from proxy.wire.catalog_guard import looks_like_catalog
from proxy.wire.states import FAILED_BLOCK_HINT, TransactionMachine, TxEvent, TxStatus, TxStep
from proxy.wire.statements import (DeallocateStatement, DiscardStatement, EmptyStatement,
                                   ExplainStatement, NoopStatement, QueryStatement,
                                   RefusedStatement, ResetStatement, SetStatement,
                                   ShowStatement, Statement, TransactionStatement)

log = logging.getLogger("hushql.wire")

CATALOG_HINT = "hushql answers aggregate queries over the tables in your policy."

# Texts up to this size are split on the event loop (about 5 ms of sqlglot work at most:
# benchmarks/bench_flood.py); longer ones on the parse lane, one at a time for the process.
INLINE_PARSE_BYTES = 1024
_PARSE_LANE = ThreadPoolExecutor(max_workers=1, thread_name_prefix="hushql-parse")
# A statement the refusal allowance cannot pay for waits at most this long (reading nothing),
# then is refused with 53400 and the time still to wait.
LONGEST_REFUSAL_WAIT_SECONDS = 5.0

# --------------------------------------------------------------------------- results


@dataclass
class Outcome:
    """What running one statement produced, before it is framed for the client."""

    shape: types.ResultShape | None  # None: a command without rows
    rows: list[Sequence[Any]] = field(default_factory=list)
    tag: str = "SELECT"
    notices: list[codec.NoticeResponse] = field(default_factory=list)
    empty: bool = False  # an empty query string (EmptyQueryResponse)

    def complete(self, count: int) -> codec.CommandComplete:
        return codec.CommandComplete(f"SELECT {count}" if self.tag == "SELECT" else self.tag)


def answer_notice(answer: Answer) -> codec.NoticeResponse:
    """The NOTICE that goes with every answer: what it cost, what is left, how accurate it is.

    Its fields follow the protocol's "Error and Notice Message Fields" (PostgreSQL
    documentation, Frontend/Backend Protocol, protocol-error-fields.html): Message is "terse
    (typically one line)", Detail carries the rest and "might run to multiple lines", Hint is
    advice. Drivers keep
    different parts (the JDBC driver's warning text is the Message alone), so the Message is
    one line holding the essentials: the cost, the budget left and each column's 95% margin;
    the Detail says it all in full."""
    margins = ", ".join(f"{a.column} ±{a.bound95}" if a.bound95 is not None
                        else f"{a.column} unbounded" for a in answer.accuracy)
    if answer.reused_from is not None:
        cost = (f"this answer was given before and is reused: it spent nothing now (epsilon "
                f"{answer.epsilon} paid {paid_text(answer.reused_from)})")
    else:
        cost = f"this answer spent epsilon {answer.epsilon} of your privacy budget"
    message = f"{cost}; {answer.remaining} remains" + (f"; 95% margins: {margins}"
                                                        if margins else "")
    parts = []
    for a in answer.accuracy:
        if a.bound95 is None:
            parts.append(f"{a.column}: no finite 95% bound ({a.note})" if a.note
                         else f"{a.column}: no finite 95% bound")
        else:
            scale = "" if a.scale is None else f", noise scale {float(a.scale):.4g}"
            parts.append(f"{a.column}: within ±{a.bound95} of the exact value in 95% of "
                         f"answers{scale}{a.clipping_text}")
    if answer.reused_from is not None:
        parts.append("a stored answer describes the data as it was when first paid for")
    detail = ".\n".join(parts + answer.notes) + "." if parts or answer.notes else None
    hints = []
    if parts:
        hints.append("The figures carry deliberate random noise; SET hushql.epsilon changes "
                     "the trade between cost and accuracy, and SET hushql.accuracy_columns = "
                     "on adds each column's margin to the result.")
    hints.append("The same question at the same epsilon gets this answer again for nothing; "
                 "SET hushql.fresh = on pays for new noise over the data as it is now.")
    return codec.NoticeResponse.build("NOTICE", SUCCESSFUL_COMPLETION, message, detail=detail,
                                      hint=" ".join(hints))


def error_response(error: HushError, severity: str = "ERROR") -> codec.ErrorResponse:
    return codec.ErrorResponse.build(severity, error.sqlstate, error.message,
                                     detail=error.detail, hint=error.hint)


def internal_error() -> HushError:
    """The only thing a client learns about a bug: that there was one."""
    return HushError(INTERNAL_ERROR, "internal error",
                     hint="The server log has a record of this failure.")


def log_internal(where: str, exc: BaseException) -> None:
    """Logs an unexpected exception by type and code location, never by its text (it may
    hold values)."""
    frames = traceback.extract_tb(exc.__traceback__)
    trail = " <- ".join(f"{f.name}:{f.lineno}" for f in reversed(frames[-6:]))
    log.error("internal error in %s: %s at %s", where, type(exc).__name__, trail)


# --------------------------------------------------------------------------- extended query


@dataclass
class Prepared:
    """A Parse'd statement: its classification and parameter types."""

    statement: Statement
    param_types: tuple[int, ...]
    to_catalog: bool = False
    shape: types.ResultShape | None | bool = False  # False: not described yet
    folded: exp.Expression | None = None  # the tree values bind into (statements.fold_casts)


@dataclass
class Portal:
    """A Bind'ed statement: its values, its result formats, and its result once executed."""

    prepared: Prepared
    values: list[Any]
    bound: BoundStatement | None  # the statement with its values (None: use its text)
    result_formats: tuple[int, ...]
    outcome: Outcome | None = None
    sent: int = 0
    described: types.ResultShape | None | bool = False


# --------------------------------------------------------------------------- the session


class Session:
    """The state of one authenticated connection and the handling of its queries.

    ``engine`` answers (boundary.Answering); ``catalog`` is optional (boundary.CatalogQuestions;
    None: catalog queries are refused); ``executor`` runs blocking calls (None: the loop's
    default).
    """

    def __init__(self, engine: Answering, analyst: str, *, catalog: CatalogQuestions | None = None,
                 executor: Executor | None = None, database: str = "",
                 refusals: guard.RefusalAllowance | None = None) -> None:
        self.engine = engine
        self.refusals = refusals
        self.analyst = analyst
        self.database = database or analyst
        self.catalog = catalog
        self.executor = executor
        self.tx = TransactionMachine()
        self.values: dict[str, str] = {k: s.default for k, s in settings.SETTINGS.items()}
        self.values["session_authorization"] = analyst
        self.defaults: dict[str, str] = dict(self.values)
        self._block_start: dict[str, str] | None = None  # settings when BEGIN ran
        self._implicit_start: dict[str, str] | None = None  # when this message/batch began
        self._local_undo: dict[str, str] = {}
        self._savepoints: list[tuple[str, dict[str, str]]] = []
        self._reported: dict[str, str] = {k: v for k, v in self.values.items()
                                          if settings.SETTINGS[k].reported}
        self.statements: dict[str, Prepared] = {}
        self.portals: dict[str, Portal] = {}
        self._running: QueryControl | None = None
        self._cancel_reason: str | None = None

    # ---- startup --------------------------------------------------------------------------

    def apply_startup(self, params: dict[str, str]) -> None:
        """Applies startup parameters (client_encoding, DateStyle, options='-c x=y', ...) as
        session defaults; raises HushError for a bad value. Unknown names are ignored."""
        pairs = [(k, v) for k, v in params.items()
                 if k not in ("user", "database", "options", "replication")]
        pairs += _options_pairs(params.get("options", ""))
        if params.get("replication", "false").lower() not in ("false", "off", "0", "no"):
            raise HushError(FEATURE_NOT_SUPPORTED, "replication connections are not supported")
        for name, value in pairs:
            key = name.lower()
            if key not in settings.SETTINGS:
                log.info("ignoring unknown startup parameter %s", name[:64])
                continue
            self._assign(key, value)
        self.defaults = dict(self.values)
        self._reported = {k: v for k, v in self.values.items() if settings.SETTINGS[k].reported}

    def parameter_statuses(self) -> list[codec.ParameterStatus]:
        """ParameterStatus for every reported setting (sent once after authentication)."""
        return [codec.ParameterStatus(settings.SETTINGS[k].name, v)
                for k, v in self._reported.items()]

    # ---- dispatch -------------------------------------------------------------------------

    async def handle(self, message: Any) -> tuple[list[Any], bool]:
        """Backend messages answering one query-phase message, and whether it failed (an
        extended-query failure makes the server skip to Sync)."""
        if self._implicit_start is None and self.tx.status is TxStatus.IDLE:
            self._implicit_start = dict(self.values)
        try:
            if isinstance(message, codec.Query):
                return await self.simple_query(message.sql), False
            if isinstance(message, (codec.Parse, codec.Describe, codec.Execute)):
                # Work that may end in a refusal: admitted, then given back if it succeeds.
                cost = await self._admit(self._text_of(message))
                if isinstance(message, codec.Parse):
                    replies = await self.parse(message)
                elif isinstance(message, codec.Describe):
                    replies = await self.describe(message)
                else:
                    replies = await self.execute(message)
                self._give_back(cost)
                return replies, False
            if isinstance(message, codec.Bind):
                return self.bind(message), False
            if isinstance(message, codec.Close):
                return self.close(message), False
            if isinstance(message, codec.Sync):
                return self.sync(), False
            if isinstance(message, codec.FunctionCall):
                err = HushError(FEATURE_NOT_SUPPORTED, "function calls are not supported")
                self._statement_failed()
                self._implicit_start = None
                return [error_response(err)] + self.ready(), False
        except HushError as err:
            self._statement_failed()
            return [error_response(err)], True
        except Exception as exc:  # a bug: say nothing about it to the client
            log_internal(type(message).__name__, exc)
            self._statement_failed()
            return [error_response(internal_error())], True
        raise TypeError(f"not a query-phase message: {type(message).__name__}")

    def fail(self, error: HushError, *, simple: bool) -> list[Any]:
        """The reply to a message that could not even be read (e.g. text not in UTF-8)."""
        self._statement_failed()
        return [error_response(error)] + (self.ready() if simple else [])

    def ready(self) -> list[Any]:
        """Pending ParameterStatus changes, then ReadyForQuery with the transaction status."""
        out: list[Any] = []
        for key, setting in settings.SETTINGS.items():
            if setting.reported and self._reported.get(key) != self.values[key]:
                self._reported[key] = self.values[key]
                out.append(codec.ParameterStatus(setting.name, self.values[key]))
        out.append(codec.ReadyForQuery(self.tx.status.value))
        return out

    # ---- simple query ---------------------------------------------------------------------

    async def simple_query(self, sql: str) -> list[Any]:
        """All statements of one Query message; the first error ends the message."""
        out: list[Any] = []
        try:
            cost = await self._admit(sql)
            check_statement_text(sql, self.engine.limits)  # before any parsing
            parsed = await self._split(sql)
            if not parsed:
                self._give_back(cost)
                return [codec.EmptyQueryResponse()] + self.ready()
            # Like PostgreSQL, a syntax error anywhere means nothing in the message runs.
            routes = [self._route(st) for st in parsed]
            for st, to_catalog in zip(parsed, routes):
                outcome = await self._run(st, None, [], to_catalog)
                out += self._frame_all(outcome)
            self._give_back(cost)
        except HushError as err:
            self._statement_failed()
            out.append(error_response(err))
        except Exception as exc:
            log_internal("simple query", exc)
            self._statement_failed()
            out.append(error_response(internal_error()))
        if self.tx.status is TxStatus.IDLE:
            self.portals.clear()
        self._implicit_start = None
        return out + self.ready()

    def _frame_all(self, outcome: Outcome) -> list[Any]:
        """A whole outcome for the simple protocol: notices, description, rows, completion."""
        if outcome.empty:
            return [codec.EmptyQueryResponse()]
        out: list[Any] = list(outcome.notices)
        if outcome.shape is None:
            return out + [outcome.complete(0)]
        formats = outcome.shape.formats(())
        encoder = outcome.shape.encoder(formats)
        rows = [encoder.encode(r) for r in outcome.rows]  # all or nothing: encode first
        return out + [outcome.shape.description(formats)] + rows + [outcome.complete(len(rows))]

    # ---- extended query -------------------------------------------------------------------

    async def parse(self, msg: codec.Parse) -> list[Any]:
        if msg.name and msg.name in self.statements:
            raise HushError(DUPLICATE_PREPARED_STATEMENT,
                            f'prepared statement "{msg.name}" already exists',
                            hint="Close or DEALLOCATE it first, or use another name.")
        check_statement_text(msg.sql, self.engine.limits)  # before any parsing
        st = statements.only_statement(await self._split(msg.sql))
        self._check_block(st)
        to_catalog = self._route(st)
        tree = statements.statement_tree(st)
        for i, oid in enumerate(msg.param_oids):
            types.check_parameter_oid(oid, i + 1)
        count = max(len(msg.param_oids), statements.parameter_count(tree))
        if count > statements.MAX_PARAMETERS:
            raise HushError(PROGRAM_LIMIT_EXCEEDED, "too many parameters")
        if to_catalog:  # the mirror's own reading: it also counts $n in text sqlglot cannot parse
            suggested = await self._catalog_parameter_types(st)
            count = max(count, len(suggested))
        else:
            suggested = await self._suggested_types(tree, msg.param_oids, count, to_catalog)
        param_types = statements.infer_parameter_types(tree, msg.param_oids, count, suggested)
        folded = statements.fold_casts(tree, param_types) \
            if tree is not None and param_types and not to_catalog else None
        self.statements[msg.name] = Prepared(st, param_types, to_catalog, folded=folded)
        return [codec.ParseComplete()]

    # ---- refused work ---------------------------------------------------------------------

    async def _admit(self, text: str) -> int:
        """Waits (reading nothing) until the account's refusal allowance can pay for ``text``,
        then takes its cost; returns the cost, given back when the statement succeeds. Raises
        53400 when the wait would be longer than LONGEST_REFUSAL_WAIT_SECONDS."""
        if self.refusals is None:
            return 0
        wait = self.refusals.wait(self.analyst, text)
        if wait > 0:
            await asyncio.sleep(min(wait, LONGEST_REFUSAL_WAIT_SECONDS))
            wait = self.refusals.wait(self.analyst, text)
            if wait > 0:
                log.info("statement refused analyst=%s outcome=refusal allowance spent",
                         self.analyst)
                raise HushError(
                    BUDGET_EXHAUSTED, "too many refused statements from this account",
                    hint=f"Refused statements cost no epsilon but cost time: wait "
                         f"{guard.ceil_seconds(wait)} seconds. Shorter statements cost less; "
                         "EXPLAIN shows whether one is accepted.")
        return self.refusals.take(self.analyst, text)

    def _text_of(self, message: codec.Parse | codec.Describe | codec.Execute) -> str:
        """The statement text a message works on ("" when it names nothing known)."""
        if isinstance(message, codec.Parse):
            return message.sql
        prepared: Prepared | None = None
        if isinstance(message, codec.Describe) and message.kind == "S":
            prepared = self.statements.get(message.name)
        else:
            name = message.name if isinstance(message, codec.Describe) else message.portal
            portal = self.portals.get(name)
            prepared = portal.prepared if portal is not None else None
        st = prepared.statement if prepared is not None else None
        return st.text if isinstance(st, (QueryStatement, ExplainStatement)) else ""

    def _give_back(self, cost: int) -> None:
        if self.refusals is not None and cost:
            self.refusals.give_back(self.analyst, cost)

    async def _split(self, text: str) -> tuple[Statement, ...]:
        """``statements.split``, on the parse lane when the text is long."""
        if len(text) <= INLINE_PARSE_BYTES:
            return statements.split(text)
        loop = asyncio.get_running_loop()
        try:
            return await loop.run_in_executor(_PARSE_LANE, statements.split, text)
        except RecursionError:
            raise HushError(PROGRAM_LIMIT_EXCEEDED, "the statement is nested too deeply",
                            hint="Write a flatter statement.") from None

    async def _suggested_types(self, tree: exp.Expression | None, declared: Sequence[int],
                               count: int, to_catalog: bool) -> list[int | None]:
        """Types the engine infers for untyped parameters (a type name or None per $n). A
        planning error here is left for Describe or Execute to report."""
        untyped = any((declared[i] if i < len(declared) else 0) in (0, types.UNKNOWN_LITERAL)
                      for i in range(count))
        if tree is None or to_catalog or not untyped:
            return []
        try:
            names = await self._blocking(self.engine.parameter_types, self.analyst, tree.copy())
        except HushError:
            return []
        return [types.oid_of(n) if n else None for n in list(names)[:count]]

    async def _catalog_parameter_types(self, st: Statement) -> list[int | None]:
        """Parameter types of a catalog statement as the mirror infers them; types hushql
        does not accept are left to the default (text). A refusal here is left for Describe
        or Execute."""
        if self.catalog is None or not isinstance(st, QueryStatement):
            return []
        try:
            oids = await self._blocking(self.catalog.parameter_types, self.analyst, st.text)
        except HushError:
            return []
        return [oid if oid in types.PARAMETER_OIDS and oid else None for oid in oids]

    def bind(self, msg: codec.Bind) -> list[Any]:
        prepared = self._statement(msg.statement)
        self._check_block(prepared.statement)
        if msg.portal and msg.portal in self.portals:
            raise HushError(DUPLICATE_CURSOR, f'cursor "{msg.portal}" already exists')
        n = len(prepared.param_types)
        if len(msg.params) != n:
            raise HushError(PROTOCOL_VIOLATION, f"bind message supplies {len(msg.params)} "
                            f"parameters, but prepared statement \"{msg.statement}\" requires {n}")
        formats = msg.param_formats
        if len(formats) not in (0, 1, n):
            raise HushError(PROTOCOL_VIOLATION, f"bind message has {len(formats)} parameter "
                                                f"formats but {n} parameters")
        per_param = formats if len(formats) == n else (formats[0] if formats else 0,) * n
        values = [types.decode_parameter(data, oid, fmt, i + 1) for i, (data, oid, fmt)
                  in enumerate(zip(msg.params, prepared.param_types, per_param))]
        self.portals[msg.portal] = Portal(prepared, values, _bound(prepared, values),
                                          msg.result_formats)
        return [codec.BindComplete()]

    async def describe(self, msg: codec.Describe) -> list[Any]:
        if msg.kind == "S":
            prepared = self._statement(msg.name)
            self._check_block(prepared.statement)
            if prepared.shape is False:
                prepared.shape = await self._describe_statement(prepared)
            out: list[Any] = [codec.ParameterDescription(prepared.param_types)]
            shape = prepared.shape
            assert shape is not False
            out.append(codec.NoData() if shape is None else shape.description(shape.formats(())))
            return out
        portal = self._portal(msg.name)
        self._check_block(portal.prepared.statement)
        if portal.described is False:
            portal.described = await self._describe_portal(portal)
        shape = portal.described
        assert shape is not False
        if shape is None:
            return [codec.NoData()]
        return [shape.description(shape.formats(portal.result_formats))]

    async def execute(self, msg: codec.Execute) -> list[Any]:
        portal = self._portal(msg.portal)
        out: list[Any] = []
        if portal.outcome is None:
            prepared = portal.prepared
            self._check_block(prepared.statement)
            portal.outcome = await self._run(prepared.statement, portal.bound, portal.values,
                                             prepared.to_catalog)
            out += portal.outcome.notices
        outcome = portal.outcome
        if outcome.empty:
            return out + [codec.EmptyQueryResponse()]
        if outcome.shape is None:
            return out + [outcome.complete(0)]
        told = portal.described if portal.described is not False else portal.prepared.shape
        if told not in (False, None) and told != outcome.shape:
            raise RuntimeError("the answer's columns differ from its description")
        formats = outcome.shape.formats(portal.result_formats)
        encoder = outcome.shape.encoder(formats)
        end = len(outcome.rows) if msg.max_rows <= 0 else min(len(outcome.rows),
                                                               portal.sent + msg.max_rows)
        batch = [encoder.encode(r) for r in outcome.rows[portal.sent:end]]
        portal.sent = end
        out += batch
        if end < len(outcome.rows):
            return out + [codec.PortalSuspended()]
        return out + [outcome.complete(len(batch))]

    def close(self, msg: codec.Close) -> list[Any]:
        # Closing what does not exist is not an error (protocol documentation, "Close").
        if msg.kind == "S":
            prepared = self.statements.pop(msg.name, None)
            if prepared is not None:
                for name in [n for n, p in self.portals.items() if p.prepared is prepared]:
                    del self.portals[name]
        else:
            self.portals.pop(msg.name, None)
        return [codec.CloseComplete()]

    def sync(self) -> list[Any]:
        if self.tx.status is TxStatus.IDLE:  # the implicit transaction ends: portals go
            self.portals.clear()
        self._implicit_start = None
        return self.ready()

    def _statement(self, name: str) -> Prepared:
        prepared = self.statements.get(name)
        if prepared is None:
            what = f'prepared statement "{name}"' if name else "unnamed prepared statement"
            raise HushError(INVALID_SQL_STATEMENT_NAME, f"{what} does not exist")
        return prepared

    def _portal(self, name: str) -> Portal:
        portal = self.portals.get(name)
        if portal is None:
            what = f'portal "{name}"' if name else "unnamed portal"
            raise HushError(INVALID_CURSOR_NAME, f"{what} does not exist")
        return portal

    async def _describe_statement(self, prepared: Prepared) -> types.ResultShape | None:
        """Columns of a statement before its parameters are known."""
        st = prepared.statement
        if prepared.folded is None:
            return await self._shape(st, None, [None] * len(prepared.param_types),
                                     prepared.to_catalog)
        # Plan with stand-in values: the columns of an answer do not depend on them.
        stand_ins = statements.stand_in_values(prepared.folded, prepared.param_types)
        return await self._shape(st, _bound(prepared, stand_ins), stand_ins, False)

    async def _describe_portal(self, portal: Portal) -> types.ResultShape | None:
        if portal.outcome is not None:
            return portal.outcome.shape
        st = portal.prepared.statement
        if isinstance(st, ExplainStatement) or portal.prepared.to_catalog:
            # Data-free and uncharged: run it now and keep the result for Execute.
            portal.outcome = await self._run(st, portal.bound, portal.values,
                                             portal.prepared.to_catalog)
            return portal.outcome.shape
        return await self._shape(st, portal.bound, portal.values, False)

    async def _shape(self, st: Statement, bound: BoundStatement | None, values: list[Any],
                     to_catalog: bool) -> types.ResultShape | None:
        """The result columns of a statement without running it (where that is possible)."""
        if isinstance(st, ShowStatement):
            return _show_shape(st)
        if isinstance(st, ExplainStatement):
            return types.ResultShape.of((await self._explain(st, bound)).columns)
        if isinstance(st, QueryStatement):
            if to_catalog:
                columns = await self._blocking(self._catalog_questions().describe,
                                               self.analyst, st.text)
                return types.ResultShape.of(columns)
            target = bound if bound is not None else st.text
            # A statement planned already is described here, without a thread hand-off.
            columns = self.engine.describe_planned(self.analyst, target)
            if columns is None:
                columns = await self._blocking(self.engine.describe, self.analyst, target)
            if self._on(settings.ACCURACY_COLUMNS):
                columns = margin_columns(columns)
            return types.ResultShape.of(columns)
        return None

    # ---- running statements ---------------------------------------------------------------

    def _route(self, st: Statement) -> bool:
        """True when a query goes to the catalog; raises its syntax error when nobody can take
        it, and 0A000 for catalog queries when no catalog is plugged in."""
        if not isinstance(st, QueryStatement):
            if isinstance(st, ExplainStatement) and st.query.error is not None:
                raise st.query.error
            return False
        if st.tree is None:
            if self.catalog is not None and self.catalog.is_catalog_text(st.text):
                return True
            assert st.error is not None
            raise st.error
        if self.catalog is not None:
            return bool(self.catalog.is_catalog_query(st.tree))
        if looks_like_catalog(st.tree):
            raise HushError(FEATURE_NOT_SUPPORTED, "catalog queries are not available on this "
                            "server", hint=CATALOG_HINT)
        return False

    def _check_block(self, st: Statement) -> None:
        """Raises 25P02 when a failed transaction block refuses this statement."""
        event = _tx_event(st)
        if self.tx.status is TxStatus.FAILED and self.tx.peek(event).refuse is not None:
            raise HushError(*self.tx.peek(event).refuse, hint=FAILED_BLOCK_HINT)

    async def _run(self, st: Statement, bound: BoundStatement | None, values: list[Any],
                   to_catalog: bool) -> Outcome:
        """Runs one statement; raises HushError."""
        if isinstance(st, TransactionStatement):
            return self._transaction(st)
        step = self.tx.step(TxEvent.OUTSIDE_BLOCK_ONLY if isinstance(st, DiscardStatement)
                            and st.all else TxEvent.STATEMENT)
        if step.refuse is not None:
            raise HushError(*step.refuse, hint=FAILED_BLOCK_HINT if step.next is TxStatus.FAILED
                            and step.refuse[0] == IN_FAILED_SQL_TRANSACTION else None)
        if isinstance(st, EmptyStatement):
            return Outcome(None, empty=True)
        if isinstance(st, RefusedStatement):
            raise st.error
        if isinstance(st, QueryStatement):
            if to_catalog:
                return await self._catalog(st, values)
            return await self._answer(bound if bound is not None else _target(st))
        if isinstance(st, ExplainStatement):
            answer = await self._explain(st, bound)
            return Outcome(types.ResultShape.of(answer.columns), list(answer.rows), "EXPLAIN")
        if isinstance(st, SetStatement):
            return self._set(st)
        if isinstance(st, ShowStatement):
            return await self._show(st)
        if isinstance(st, ResetStatement):
            if st.name is None:
                self._reset_all()
            else:
                self._set(SetStatement(st.name, None))
            return Outcome(None, tag="RESET")
        if isinstance(st, DiscardStatement):
            if st.all:
                self._reset_all()
                self.statements.clear()
                self.portals.clear()
            return Outcome(None, tag=st.tag)
        if isinstance(st, DeallocateStatement):
            if st.name is None:
                self.statements = {k: v for k, v in self.statements.items() if k == ""}
                return Outcome(None, tag="DEALLOCATE ALL")
            if st.name not in self.statements:
                raise HushError(INVALID_SQL_STATEMENT_NAME,
                                f'prepared statement "{st.name}" does not exist')
            del self.statements[st.name]
            return Outcome(None, tag="DEALLOCATE")
        if isinstance(st, NoopStatement):
            return Outcome(None, tag=st.tag)
        raise TypeError(f"unhandled statement {type(st).__name__}")

    async def _explain(self, st: ExplainStatement, bound: BoundStatement | None) -> Answer:
        """The engine's EXPLAIN of ``st`` (with its values when given); plans and charges
        nothing."""
        target = bound if bound is not None else _target(st.query)
        return await self._blocking(self.engine.explain, self.analyst, target,
                                    epsilon=self._epsilon(), form=st.format,
                                    fresh=self._on(settings.FRESH))

    async def _answer(self, target: str | exp.Expression | BoundStatement) -> Outcome:
        epsilon = self._epsilon()
        try:
            answer = await self._controlled(self.engine.answer, self.analyst, target,
                                            epsilon=epsilon, fresh=self._on(settings.FRESH))
        except HushError as err:
            log.info("answer analyst=%s epsilon=%s outcome=%s", self.analyst,
                     epsilon if epsilon is not None else "default", err.sqlstate)
            raise
        log.info("answer analyst=%s epsilon=%s outcome=ok%s", self.analyst, answer.epsilon,
                 " stored=reused" if answer.reused_from is not None else "")
        columns, rows = (with_margins(answer) if self._on(settings.ACCURACY_COLUMNS)
                         else (answer.columns, answer.rows))
        return Outcome(types.ResultShape.of(columns), list(rows), "SELECT",
                       [answer_notice(answer)])

    async def _catalog(self, st: QueryStatement, values: list[Any]) -> Outcome:
        remaining = None
        if names_my_tables(st.text):  # the relation shows the budget left
            remaining = await self._blocking(self.engine.remaining, self.analyst)
        columns, rows = await self._blocking(self._catalog_questions().run, self.analyst,
                                             st.text, values, remaining)
        return Outcome(types.ResultShape.of(columns), list(rows), "SELECT")

    def _catalog_questions(self) -> CatalogQuestions:
        """The catalog, for a statement routed to it (routing needs one to route there)."""
        if self.catalog is None:
            raise HushError(FEATURE_NOT_SUPPORTED, "catalog queries are not available on this "
                            "server", hint=CATALOG_HINT)
        return self.catalog

    def _on(self, key: str) -> bool:
        """Whether a boolean session setting is on."""
        return self.values[key] == "on"

    def _epsilon(self) -> Decimal | None:
        value = self.values[settings.EPSILON]
        return Decimal(value) if value else None

    async def _blocking(self, fn: Callable[..., Any], *args: Any, **kwargs: Any) -> Any:
        """Runs a blocking call in the executor; its HushErrors pass, anything else becomes
        an internal error (logged without its text)."""
        loop = asyncio.get_running_loop()
        try:
            return await loop.run_in_executor(self.executor,
                                               functools.partial(fn, *args, **kwargs))
        except HushError:
            raise
        except Exception as exc:
            log_internal(getattr(fn, "__name__", "call"), exc)
            raise internal_error() from None

    async def _controlled(self, fn: Callable[..., Any], *args: Any, **kwargs: Any) -> Any:
        """Like _blocking, with a QueryControl the session can cancel (CancelRequest, a vanished
        client)."""
        control = QueryControl()
        self._running, self._cancel_reason = control, None
        try:
            return await self._blocking(fn, *args, control=control, **kwargs)
        except HushError as err:  # after our own cancel, say why it was cancelled
            if self._cancel_reason is not None and err.sqlstate in (INTERNAL_ERROR,
                                                                    QUERY_CANCELED):
                raise self._cancelled() from None
            raise
        except asyncio.CancelledError:  # the connection is going away; stop the backend work too
            self._cancel_reason = "vanished"
            threading.Thread(target=control.cancel, name="hushql-cancel", daemon=True).start()
            raise
        finally:
            self._running = None

    def _cancelled(self) -> HushError:
        return HushError(QUERY_CANCELED, "canceling statement due to user request")

    def cancel(self, reason: str = "user") -> None:
        """Cancels the running query, if any. QueryControl.cancel() may block on the backend,
        so it runs on a thread of its own rather than the event loop or the busy executor."""
        control = self._running
        if control is not None:
            self._cancel_reason = reason
            threading.Thread(target=control.cancel, name="hushql-cancel", daemon=True).start()

    # ---- transactions ---------------------------------------------------------------------

    def _statement_failed(self) -> None:
        """An error: fails an explicit block, or undoes the settings changed by the implicit
        transaction (the message or batch so far), as PostgreSQL rolls it back."""
        self.tx.step(TxEvent.STATEMENT_FAILED)
        if self.tx.status is TxStatus.IDLE and self._implicit_start is not None:
            self.values = dict(self._implicit_start)
            self._local_undo = {}

    def _transaction(self, st: TransactionStatement) -> Outcome:
        before = self.tx.status
        step = self.tx.step(st.event)
        if step.refuse is not None:
            raise HushError(*step.refuse)
        notices = [codec.NoticeResponse.build("WARNING", *step.warn)] if step.warn else []
        if st.event is TxEvent.BEGIN and before is TxStatus.IDLE:
            self._block_start = dict(self.values)
            self._savepoints = []
        elif st.event is TxEvent.SAVEPOINT:
            assert st.savepoint is not None
            self._savepoints.append((st.savepoint, dict(self.values)))
        elif st.event in (TxEvent.RELEASE, TxEvent.ROLLBACK_TO):
            names = [n for n, _ in self._savepoints]
            if st.savepoint not in names:
                raise HushError(INVALID_SAVEPOINT, f'savepoint "{st.savepoint}" does not exist')
            at = len(names) - 1 - names[::-1].index(st.savepoint)
            if st.event is TxEvent.RELEASE:
                del self._savepoints[at:]
            else:
                self.values = dict(self._savepoints[at][1])
                del self._savepoints[at + 1:]
        self._end_block(step)
        if st.chain and step.ends_block:
            self.tx.step(TxEvent.BEGIN)
            self._block_start = dict(self.values)
        return Outcome(None, tag=step.tag or st.tag, notices=notices)

    def _end_block(self, step: TxStep) -> None:
        if not step.ends_block:
            return
        if step.rolls_back and self._block_start is not None:
            self.values = dict(self._block_start)
        else:
            self.values.update(self._local_undo)
        self._block_start, self._local_undo, self._savepoints = None, {}, []
        self._implicit_start = dict(self.values)  # what follows starts a new implicit one
        self.portals = {}

    # ---- settings -------------------------------------------------------------------------

    def _assign(self, key: str, value: str | None) -> None:
        """Checks and stores one setting (None: its session default); raises HushError."""
        if key == settings.EPSILON:
            if value is None or value == "":
                self.values[key] = self.defaults.get(key, "")
                return
            self.values[key] = format(self.engine.epsilon_for(value), "f")
            return
        if value is None:
            settings.normalise(key, self.defaults[key])  # still refuses read-only names
            self.values[key] = self.defaults[key]
            return
        self.values[key] = settings.normalise(key, value, self.values.get(key))

    def _set(self, st: SetStatement) -> Outcome:
        key = settings.lookup(st.name).name.lower()
        notices = []
        if st.local:
            if self.tx.status is TxStatus.IDLE:
                notices.append(codec.NoticeResponse.build(
                    "WARNING", NO_ACTIVE_SQL_TRANSACTION,
                    "SET LOCAL can only be used in transaction blocks"))
                self._assign_checked_only(key, st.value)
                return Outcome(None, tag="SET", notices=notices)
            self._local_undo.setdefault(key, self.values[key])
        else:
            self._local_undo.pop(key, None)
        self._assign(key, st.value)
        if key in settings.NOT_APPLIED and st.value is not None:
            notices.append(codec.NoticeResponse.build(
                "NOTICE", SUCCESSFUL_COMPLETION, f"{settings.SETTINGS[key].name} is accepted but "
                "not applied", hint=settings.NOT_APPLIED_HINT))
        return Outcome(None, tag="SET", notices=notices)

    def _assign_checked_only(self, key: str, value: str | None) -> None:
        saved = dict(self.values)
        try:
            self._assign(key, value)
        finally:
            self.values = saved

    def _reset_all(self) -> None:
        for key, setting in settings.SETTINGS.items():
            if setting.check is not None or key == settings.EPSILON:
                self.values[key] = self.defaults[key]

    async def _show(self, st: ShowStatement) -> Outcome:
        if st.name == "all":
            rows = []
            for key, setting in settings.SETTINGS.items():
                rows.append((setting.name, await self._setting_value(key), setting.description))
            return Outcome(_show_shape(st), rows, "SHOW")
        setting = settings.lookup(st.name)
        value = await self._setting_value(setting.name.lower())
        return Outcome(_show_shape(st), [(value,)], "SHOW")

    async def _setting_value(self, key: str) -> str:
        if key == settings.REMAINING:
            remaining = await self._blocking(self.engine.remaining, self.analyst)
            return format(remaining, "f")
        if key == settings.EPSILON and not self.values[key]:
            return format(self.engine.default_epsilon, "f")
        return self.values[key]


def _bound(prepared: Prepared, values: Sequence[Any]) -> BoundStatement | None:
    """The statement with its values for the engine, or None when it takes its text (no
    parameters, or a catalog statement, which binds its values itself)."""
    if prepared.folded is None:
        return None
    st = prepared.statement
    query = st.query if isinstance(st, ExplainStatement) else st
    assert isinstance(query, QueryStatement)
    return statements.bound(query.text, prepared.folded, values, prepared.param_types)


def _target(st: QueryStatement) -> str | exp.Expression:
    """What the engine gets for a statement without parameters: its text, which the engine's
    plan cache is keyed by, or, for a text too long to cache, the tree already parsed."""
    if st.tree is not None and len(st.text) > statements.MAX_CACHED_TEXT:
        return st.tree
    return st.text


def _show_shape(st: ShowStatement) -> types.ResultShape:
    if st.name == "all":
        return types.ResultShape.of([("name", "text"), ("setting", "text"),
                                     ("description", "text")])
    name = settings.SETTINGS.get(settings.ALIASES.get(st.name, st.name))
    return types.ResultShape.of([(name.name if name else st.name, "text")])


def _tx_event(st: Statement) -> TxEvent:
    if isinstance(st, TransactionStatement):
        return st.event
    if isinstance(st, DiscardStatement) and st.all:
        return TxEvent.OUTSIDE_BLOCK_ONLY
    return TxEvent.STATEMENT


def _options_pairs(options: str) -> list[tuple[str, str]]:
    """(name, value) pairs from a startup 'options' string: '-c name=value' or '--name=value',
    separated by spaces, with backslash escaping a space (libpq's convention)."""
    words, current, escaped = [], [], False
    for ch in options:
        if escaped:
            current.append(ch)
            escaped = False
        elif ch == "\\":
            escaped = True
        elif ch.isspace():
            if current:
                words.append("".join(current))
                current = []
        else:
            current.append(ch)
    if current:
        words.append("".join(current))
    pairs, i = [], 0
    while i < len(words):
        w = words[i]
        if w == "-c" and i + 1 < len(words):
            w, i = words[i + 1], i + 1
        elif w.startswith("--"):
            w = w[2:]
        elif w.startswith("-c"):
            w = w[2:]
        else:
            raise HushError(FEATURE_NOT_SUPPORTED, "startup options other than -c name=value "
                            "are not supported")
        if "=" not in w:
            raise HushError(INVALID_PARAMETER_VALUE, "startup option needs the form name=value")
        name, value = w.split("=", 1)
        pairs.append((name.replace("-", "_"), value))
        i += 1
    return pairs
