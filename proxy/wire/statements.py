"""A query string split into statements, each recognised as a session command or a query.

Splitting needs PostgreSQL's lexical rules (quotes, dollar quotes, E'' escapes, nested
comments), so a ';' inside a string never splits; the small lexer here follows the
documentation's "Lexical Structure" chapter. Session commands (SET, SHOW, RESET, transaction
control, DISCARD, DEALLOCATE, EXPLAIN) are read from its tokens by a small grammar, because the
session answers them itself. Everything else is parsed with sqlglot and goes on, as a tree, to
the engine or the catalog. Pure functions; no I/O and no session state.
"""

from __future__ import annotations

import datetime as dt
import re
from dataclasses import dataclass
from decimal import Decimal
from typing import Any, Sequence, Union

import sqlglot
from sqlglot import exp
from sqlglot.errors import ParseError, TokenError

from proxy.errors import FEATURE_NOT_SUPPORTED, SYNTAX_ERROR, HushError
from proxy.sql.filters import mark_written_names
from proxy.sql.statement import BoundStatement
from proxy.sql.statement import slot_index as _index
from proxy.wire import types
from proxy.wire.cache import SizedCache
from proxy.wire.states import TxEvent

MAX_PARAMETERS = 65535  # the protocol counts parameters in an Int16 (PostgreSQL's own limit)

# The split cache: statements repeated by clients and pools are read once. Texts above
# MAX_CACHED_TEXT are never kept (their trees weigh about 50 times the text: measured with
# tracemalloc on sqlglot 30, some 470 bytes per node), and the whole cache holds about
# SPLIT_CACHE_BYTES of trees.
MAX_CACHED_TEXT = 16 * 1024
SPLIT_CACHE_BYTES = 32 * 1024 * 1024
BYTES_PER_NODE = 512

# --------------------------------------------------------------------------- lexer


@dataclass(frozen=True, slots=True)
class Token:
    kind: str  # word, ident (quoted), string, number, param, op, semicolon
    value: str  # words upper-cased; identifiers and strings unquoted; others as written
    start: int
    end: int  # exclusive


_WORD = re.compile(r"[A-Za-z_\x80-\U0010ffff][A-Za-z0-9_$\x80-\U0010ffff]*")
_NUMBER = re.compile(r"(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?")
_PARAM = re.compile(r"\$(\d+)")
_DOLLAR_TAG = re.compile(r"\$([A-Za-z_\x80-\U0010ffff][A-Za-z0-9_\x80-\U0010ffff]*)?\$")


def _syntax(message: str) -> HushError:
    return HushError(SYNTAX_ERROR, message, hint="Check the statement's quotes and comments.")


def _quoted(sql: str, i: int, quote: str, backslash: bool) -> tuple[str, int]:
    """Reads a quoted string or identifier starting at the opening quote; returns (body, end)."""
    out = []
    j = i + 1
    n = len(sql)
    while j < n:
        c = sql[j]
        if backslash and c == "\\" and j + 1 < n:
            out.append(sql[j:j + 2])
            j += 2
            continue
        if c == quote:
            if j + 1 < n and sql[j + 1] == quote:
                out.append(quote)
                j += 2
                continue
            return "".join(out), j + 1
        out.append(c)
        j += 1
    raise _syntax("unterminated quoted string" if quote == "'" else
                  "unterminated quoted identifier")


def tokenize(sql: str) -> list[Token]:
    """PostgreSQL tokens of a query string (comments dropped); raises HushError 42601."""
    tokens: list[Token] = []
    i, n = 0, len(sql)
    while i < n:
        c = sql[i]
        if c.isspace():
            i += 1
        elif sql.startswith("--", i):
            j = sql.find("\n", i)
            i = n if j < 0 else j + 1
        elif sql.startswith("/*", i):
            depth, j = 1, i + 2
            while depth and j < n:
                if sql.startswith("/*", j):
                    depth, j = depth + 1, j + 2
                elif sql.startswith("*/", j):
                    depth, j = depth - 1, j + 2
                else:
                    j += 1
            if depth:
                raise _syntax("unterminated /* comment")
            i = j
        elif c == "'":
            body, j = _quoted(sql, i, "'", backslash=False)
            tokens.append(Token("string", body, i, j))
            i = j
        elif c in "eE" and i + 1 < n and sql[i + 1] == "'":
            body, j = _quoted(sql, i + 1, "'", backslash=True)
            tokens.append(Token("string", body, i, j))
            i = j
        elif c in "uU" and sql.startswith("&'", i + 1) or c in "bBxXnN" and sql.startswith("'", i + 1):
            q = i + (2 if sql[i + 1] == "&" else 1)
            body, j = _quoted(sql, q, "'", backslash=False)
            tokens.append(Token("string", body, i, j))
            i = j
        elif c in "uU" and sql.startswith('&"', i + 1):
            body, j = _quoted(sql, i + 2, '"', backslash=False)
            tokens.append(Token("ident", body, i, j))
            i = j
        elif c == '"':
            body, j = _quoted(sql, i, '"', backslash=False)
            tokens.append(Token("ident", body, i, j))
            i = j
        elif c == "$":
            m = _PARAM.match(sql, i)
            if m:
                tokens.append(Token("param", m.group(1), i, m.end()))
                i = m.end()
                continue
            m = _DOLLAR_TAG.match(sql, i)
            if not m:
                tokens.append(Token("op", c, i, i + 1))
                i += 1
                continue
            close = sql.find(m.group(0), m.end())
            if close < 0:
                raise _syntax("unterminated dollar-quoted string")
            tokens.append(Token("string", sql[m.end():close], i, close + len(m.group(0))))
            i = close + len(m.group(0))
        elif c == ";":
            tokens.append(Token("semicolon", c, i, i + 1))
            i += 1
        elif c.isdigit() or (c == "." and i + 1 < n and sql[i + 1].isdigit()):
            m = _NUMBER.match(sql, i)
            assert m is not None
            tokens.append(Token("number", m.group(0), i, m.end()))
            i = m.end()
        else:
            m = _WORD.match(sql, i)
            if m:
                tokens.append(Token("word", m.group(0).upper(), i, m.end()))
                i = m.end()
            else:
                tokens.append(Token("op", c, i, i + 1))
                i += 1
    return tokens


# --------------------------------------------------------------------------- statements


@dataclass(frozen=True)
class QueryStatement:
    """A statement for the engine or the catalog. ``tree`` is shared: copy before changing.

    ``error`` is set instead of ``tree`` when sqlglot cannot parse the text (the catalog may
    still claim it by its text).
    """

    text: str
    tree: exp.Expression | None
    error: HushError | None = None


@dataclass(frozen=True)
class ExplainStatement:
    text: str
    query: QueryStatement
    format: str = "text"  # one of EXPLAIN_FORMATS


@dataclass(frozen=True)
class SetStatement:
    """SET name = value; ``value`` None means DEFAULT. ``local`` lasts to the block's end."""

    name: str
    value: str | None
    local: bool = False


@dataclass(frozen=True)
class ShowStatement:
    name: str  # lower case; "all" for SHOW ALL


@dataclass(frozen=True)
class ResetStatement:
    name: str | None  # None for RESET ALL


@dataclass(frozen=True)
class TransactionStatement:
    event: TxEvent
    tag: str
    savepoint: str | None = None
    chain: bool = False


@dataclass(frozen=True)
class DiscardStatement:
    all: bool  # DISCARD ALL resets the session; PLANS/SEQUENCES/TEMP have nothing to drop
    tag: str


@dataclass(frozen=True)
class DeallocateStatement:
    name: str | None  # None for ALL


@dataclass(frozen=True)
class NoopStatement:
    """Accepted and ignored (SET TRANSACTION ..., SET SESSION CHARACTERISTICS ...)."""

    tag: str


@dataclass(frozen=True)
class EmptyStatement:
    """Only whitespace or comments."""


@dataclass(frozen=True)
class RefusedStatement:
    """A server command hushql recognises and refuses by its name. It fails when it runs, as
    PostgreSQL fails a command at execution, so statements before it in a message still run."""

    command: str
    error: HushError


Statement = Union[QueryStatement, ExplainStatement, SetStatement, ShowStatement,
                  ResetStatement, TransactionStatement, DiscardStatement, DeallocateStatement,
                  NoopStatement, EmptyStatement, RefusedStatement]


class _Cursor:
    """Reads one statement's tokens for the session-command grammar."""

    def __init__(self, tokens: Sequence[Token], sql: str) -> None:
        self.t = tokens
        self.i = 0
        self.sql = sql

    def peek(self, k: int = 0) -> Token | None:
        return self.t[self.i + k] if self.i + k < len(self.t) else None

    def word(self, *options: str) -> str | None:
        """Consumes a word among options (any word when none given); None if absent."""
        tok = self.peek()
        if tok is not None and tok.kind == "word" and (not options or tok.value in options):
            self.i += 1
            return tok.value
        return None

    def expect_word(self, *options: str) -> str:
        w = self.word(*options)
        if w is None:
            raise self.error()
        return w

    def op(self, *options: str) -> str | None:
        tok = self.peek()
        if tok is not None and tok.kind == "op" and tok.value in options:
            self.i += 1
            return tok.value
        return None

    def name(self) -> str:
        """An identifier, unquoted or quoted; unquoted ones fold to lower case."""
        tok = self.peek()
        if tok is None or tok.kind not in ("word", "ident"):
            raise self.error()
        self.i += 1
        return tok.value.lower() if tok.kind == "word" else tok.value

    def dotted_name(self) -> str:
        parts = [self.name()]
        while self.op("."):
            parts.append(self.name())
        return ".".join(parts)

    def done(self) -> bool:
        return self.i >= len(self.t)

    def end(self) -> None:
        if not self.done():
            raise self.error()

    def rest_text(self) -> str:
        tok = self.peek()
        return "" if tok is None else self.sql[tok.start:self.t[-1].end]

    def error(self) -> HushError:
        tok = self.peek()
        near = "end of input" if tok is None else f'"{self.sql[tok.start:tok.end]}"'
        return HushError(SYNTAX_ERROR, f"syntax error at or near {near}")


def _setting_value(c: _Cursor) -> str:
    """One item of a SET value list: word, identifier, string or signed number."""
    tok = c.peek()
    if tok is None:
        raise c.error()
    sign = c.op("-", "+") or ""
    tok = c.peek()
    if tok is None:
        raise c.error()
    if sign and tok.kind != "number":
        raise c.error()
    if tok.kind in ("string", "ident", "number"):
        c.i += 1
        return ("-" if sign == "-" else "") + tok.value
    if tok.kind == "word":
        c.i += 1
        return tok.value.lower()
    raise c.error()


def _parse_set(c: _Cursor) -> Statement:
    scope = c.word("SESSION", "LOCAL")
    if scope == "SESSION" and c.word("CHARACTERISTICS"):
        return NoopStatement("SET")
    local = scope == "LOCAL"
    if c.word("TRANSACTION"):
        return NoopStatement("SET")
    if c.word("TIME"):
        c.expect_word("ZONE")
        if c.word("LOCAL", "DEFAULT"):
            c.end()
            return SetStatement("timezone", None, local)
        value = _setting_value(c)
        c.end()
        return SetStatement("timezone", value, local)
    if c.word("SCHEMA"):
        value = _setting_value(c)
        c.end()
        return SetStatement("search_path", value, local)
    if c.word("NAMES"):
        if c.word("DEFAULT"):
            c.end()
            return SetStatement("client_encoding", None, local)
        value = _setting_value(c)
        c.end()
        return SetStatement("client_encoding", value, local)
    name = c.dotted_name()
    if not (c.word("TO") or c.op("=")):
        raise c.error()
    if c.word("DEFAULT"):
        c.end()
        return SetStatement(name, None, local)
    values = [_list_item(c, name)]
    while c.op(","):
        values.append(_list_item(c, name))
    c.end()
    return SetStatement(name, ", ".join(values), local)


_PLAIN_NAME = re.compile(r"^[a-z_][a-z0-9_$]*$")


def _list_item(c: _Cursor, setting: str) -> str:
    """A SET list item; search_path keeps the quotes a name needs, as PostgreSQL shows it."""
    tok = c.peek()
    value = _setting_value(c)
    if setting == "search_path" and tok is not None and tok.kind == "ident" \
            and not _PLAIN_NAME.match(value):
        return '"' + value.replace('"', '""') + '"'
    return value


def _parse_show(c: _Cursor) -> Statement:
    if c.word("ALL"):
        c.end()
        return ShowStatement("all")
    for words, name in ((("TIME", "ZONE"), "timezone"),
                        (("TRANSACTION", "ISOLATION", "LEVEL"), "transaction_isolation"),
                        (("SESSION", "AUTHORIZATION"), "session_authorization")):
        tok = c.peek()
        if tok is not None and tok.kind == "word" and tok.value == words[0]:
            for w in words:
                c.expect_word(w)
            c.end()
            return ShowStatement(name)
    name = c.dotted_name()
    c.end()
    return ShowStatement(name.lower())


def _parse_reset(c: _Cursor) -> Statement:
    if c.word("ALL"):
        c.end()
        return ResetStatement(None)
    if c.word("TIME"):
        c.expect_word("ZONE")
        c.end()
        return ResetStatement("timezone")
    if c.word("SESSION"):
        c.expect_word("AUTHORIZATION")
        c.end()
        return NoopStatement("RESET")
    name = c.dotted_name()
    c.end()
    return ResetStatement(name)


def _chain(c: _Cursor) -> bool:
    if c.word("AND"):
        no = c.word("NO") is not None
        c.expect_word("CHAIN")
        return not no
    return False


def _transaction_modes(c: _Cursor) -> None:
    # ISOLATION LEVEL ..., READ WRITE|ONLY, [NOT] DEFERRABLE, separated by optional commas.
    while not c.done():
        if c.op(","):
            continue
        if c.word("ISOLATION"):
            c.expect_word("LEVEL")
            if c.word("READ"):
                c.expect_word("COMMITTED", "UNCOMMITTED")
            elif c.word("REPEATABLE"):
                c.expect_word("READ")
            else:
                c.expect_word("SERIALIZABLE")
        elif c.word("READ"):
            c.expect_word("WRITE", "ONLY")
        elif c.word("NOT"):
            c.expect_word("DEFERRABLE")
        else:
            c.expect_word("DEFERRABLE")


def _parse_transaction(first: str, c: _Cursor) -> Statement:
    if first in ("BEGIN", "START"):
        if first == "START":
            c.expect_word("TRANSACTION")
        else:
            c.word("WORK", "TRANSACTION")
        _transaction_modes(c)
        return TransactionStatement(TxEvent.BEGIN, "BEGIN")
    if first in ("COMMIT", "END"):
        if c.word("PREPARED"):
            raise HushError(FEATURE_NOT_SUPPORTED, "two-phase commit is not supported")
        c.word("WORK", "TRANSACTION")
        chain = _chain(c)
        c.end()
        return TransactionStatement(TxEvent.COMMIT, "COMMIT", chain=chain)
    if first in ("ROLLBACK", "ABORT"):
        if c.word("PREPARED"):
            raise HushError(FEATURE_NOT_SUPPORTED, "two-phase commit is not supported")
        c.word("WORK", "TRANSACTION")
        if first == "ROLLBACK" and c.word("TO"):
            c.word("SAVEPOINT")
            name = c.name()
            c.end()
            return TransactionStatement(TxEvent.ROLLBACK_TO, "ROLLBACK", savepoint=name)
        chain = _chain(c)
        c.end()
        return TransactionStatement(TxEvent.ROLLBACK, "ROLLBACK", chain=chain)
    if first == "SAVEPOINT":
        name = c.name()
        c.end()
        return TransactionStatement(TxEvent.SAVEPOINT, "SAVEPOINT", savepoint=name)
    # RELEASE [SAVEPOINT] name
    c.word("SAVEPOINT")
    name = c.name()
    c.end()
    return TransactionStatement(TxEvent.RELEASE, "RELEASE", savepoint=name)


def _parse_explain(c: _Cursor, text: str) -> Statement:
    """EXPLAIN [ANALYZE] [VERBOSE] query, or EXPLAIN (option [value], ...) query.

    Every option is honoured or refused, never ignored: FORMAT TEXT or JSON chooses the output,
    ANALYZE may only be off (it would run the query), and the others describe PostgreSQL's
    own planner (costs, buffers, timing...), which hushql's EXPLAIN does not show.
    """
    options: dict[str, str] = {}
    if c.op("("):
        while True:
            opt = c.expect_word()
            value = "true"
            tok = c.peek()
            if tok is not None and not (tok.kind == "op" and tok.value in ",)"):
                value = _setting_value(c).lower()
            options["ANALYZE" if opt == "ANALYSE" else opt] = value
            if c.op(")"):
                break
            if not c.op(","):
                raise c.error()
    else:
        while True:
            w = c.word("ANALYZE", "ANALYSE", "VERBOSE")
            if w is None:
                break
            options["ANALYZE" if w == "ANALYSE" else w] = "true"
    if options.pop("ANALYZE", "false") not in _OFF:
        raise HushError(FEATURE_NOT_SUPPORTED, "EXPLAIN ANALYZE is not supported: it would run "
                        "the query", hint="Use EXPLAIN without ANALYZE; it charges nothing.")
    form = options.pop("FORMAT", "text")
    if form not in EXPLAIN_FORMATS:
        raise HushError(FEATURE_NOT_SUPPORTED, f"EXPLAIN format {form[:20]} is not supported",
                        hint="Use EXPLAIN (FORMAT TEXT) or EXPLAIN (FORMAT JSON).")
    if options:
        raise HushError(FEATURE_NOT_SUPPORTED, f"EXPLAIN option {next(iter(options))} is not "
                        "supported: hushql's EXPLAIN shows the rewrite, sensitivities and noise, "
                        "not PostgreSQL's plan", hint="Use EXPLAIN, EXPLAIN (FORMAT TEXT) or "
                        "EXPLAIN (FORMAT JSON).")
    inner = c.rest_text()
    if not inner:
        raise c.error()
    return ExplainStatement(text, query_statement(inner), form)


EXPLAIN_FORMATS = ("text", "json")
_OFF = ("false", "off", "0", "no")


def _parse_discard(c: _Cursor) -> Statement:
    w = c.expect_word("ALL", "PLANS", "SEQUENCES", "TEMP", "TEMPORARY")
    c.end()
    return DiscardStatement(w == "ALL", "DISCARD " + ("TEMP" if w == "TEMPORARY" else w))


def _parse_deallocate(c: _Cursor) -> Statement:
    c.word("PREPARE")
    if c.word("ALL"):
        c.end()
        return DeallocateStatement(None)
    name = c.name()
    c.end()
    return DeallocateStatement(name)


# Server commands refused by name, with what hushql offers instead.
_REFUSED_COMMANDS: dict[str, str] = {
    "CHECKPOINT": "hushql manages no storage of its own; it answers aggregate queries.",
    "LISTEN": "hushql sends no asynchronous notifications; ask again with a query instead.",
    "UNLISTEN": "hushql sends no asynchronous notifications, so there is nothing to stop.",
    "NOTIFY": "hushql relays no notifications between sessions.",
}


def _refused_command(name: str) -> RefusedStatement:
    return RefusedStatement(name, HushError(FEATURE_NOT_SUPPORTED, f"{name} is not supported",
                                            hint=_REFUSED_COMMANDS[name]))


_SESSION_COMMANDS = {"SET", "SHOW", "RESET", "BEGIN", "START", "COMMIT", "END", "ROLLBACK",
                     "ABORT", "SAVEPOINT", "RELEASE", "EXPLAIN", "DISCARD", "DEALLOCATE"}


def _parse_tree(text: str) -> exp.Expression:
    try:
        trees = sqlglot.parse(text, read="postgres")
    except (ParseError, TokenError) as exc:
        raise _sqlglot_error(exc) from None
    trees = [t for t in trees if t is not None]
    if len(trees) != 1:
        raise HushError(SYNTAX_ERROR, "syntax error: expected one statement")
    return mark_written_names(trees[0], text)  # refusals quote function names as written


def _sqlglot_error(exc: Exception) -> HushError:
    errors = getattr(exc, "errors", None) or []
    if errors and errors[0].get("highlight"):
        near = str(errors[0]["highlight"])[:60]
        return HushError(SYNTAX_ERROR, f'syntax error at or near "{near}"')
    return HushError(SYNTAX_ERROR, "syntax error")


def query_statement(text: str) -> QueryStatement:
    """A QueryStatement for one statement's text, parsed once per distinct text."""
    try:
        return QueryStatement(text, _parse_tree(text))
    except HushError as err:
        return QueryStatement(text, None, err)


def _classify(tokens: Sequence[Token], sql: str) -> Statement:
    text = sql[tokens[0].start:tokens[-1].end]
    first = tokens[0].value if tokens[0].kind == "word" else ""
    if first in _REFUSED_COMMANDS:
        return _refused_command(first)
    if first not in _SESSION_COMMANDS:
        return query_statement(text)
    c = _Cursor(tokens, sql)
    c.i = 1
    if first == "EXPLAIN":
        return _parse_explain(c, text)
    if any(t.kind == "param" for t in tokens):
        p = next(t for t in tokens if t.kind == "param")
        raise HushError(SYNTAX_ERROR, f"there is no parameter ${p.value} in a {first} command")
    if first == "SET":
        return _parse_set(c)
    if first == "SHOW":
        return _parse_show(c)
    if first == "RESET":
        return _parse_reset(c)
    if first == "DISCARD":
        return _parse_discard(c)
    if first == "DEALLOCATE":
        return _parse_deallocate(c)
    return _parse_transaction(first, c)


def estimated_bytes(sql: str, parsed: tuple[Statement, ...]) -> int:
    """About how much memory a split result holds: its text and its trees' nodes."""
    nodes = 0
    for st in parsed:
        tree = statement_tree(st)
        if tree is not None:
            nodes += sum(1 for _ in tree.walk())
    return 1024 + 2 * len(sql) + BYTES_PER_NODE * nodes


_SPLIT_CACHE: SizedCache[str, tuple[Statement, ...]] = SizedCache(
    estimated_bytes, most_bytes=SPLIT_CACHE_BYTES, most_entry_bytes=SPLIT_CACHE_BYTES // 64)


def split(sql: str) -> tuple[Statement, ...]:
    """The statements of a query string, in order; () when it holds none.

    Raises HushError (42601, 0A000) when the string cannot be split or a session command is
    malformed; a query sqlglot cannot parse comes back with its ``error`` set. Results for
    texts up to MAX_CACHED_TEXT are cached (trees are shared: copy before changing).
    """
    if len(sql) > MAX_CACHED_TEXT:
        return _split(sql)
    cached = _SPLIT_CACHE.get(sql)
    if cached is None:
        cached = _split(sql)
        _SPLIT_CACHE.put(sql, cached)
    return cached


def _split(sql: str) -> tuple[Statement, ...]:
    tokens = tokenize(sql)
    out: list[Statement] = []
    current: list[Token] = []
    for tok in tokens + [Token("semicolon", ";", len(sql), len(sql))]:
        if tok.kind == "semicolon":
            if current:
                out.append(_classify(current, sql))
            current = []
        else:
            current.append(tok)
    return tuple(out)


def single(sql: str) -> Statement:
    """The one statement of a Parse message; raises HushError 42601 for more than one."""
    return only_statement(split(sql))


def only_statement(statements: tuple[Statement, ...]) -> Statement:
    """The one statement of a split Parse text; raises HushError 42601 for more than one."""
    if not statements:
        return EmptyStatement()
    if len(statements) > 1:
        raise HushError(SYNTAX_ERROR, "cannot insert multiple commands into a prepared "
                                      "statement", hint="Send one statement per Parse message.")
    return statements[0]


# --------------------------------------------------------------------------- parameters


def parameter_count(tree: exp.Expression | None) -> int:
    """The highest $n in a tree (0 when it has none)."""
    if tree is None:
        return 0
    return max((_index(n) or 0 for n in tree.find_all(exp.Parameter, exp.Placeholder)), default=0)


def statement_tree(statement: Statement) -> exp.Expression | None:
    """The sqlglot tree a statement's parameters live in, if any."""
    if isinstance(statement, QueryStatement):
        return statement.tree
    if isinstance(statement, ExplainStatement):
        return statement.query.tree
    return None


def infer_parameter_types(tree: exp.Expression | None, declared: Sequence[int],
                          count: int, suggested: Sequence[int | None] = ()) -> tuple[int, ...]:
    """Type OIDs for ParameterDescription: the client's where given, else from the query.

    An untyped $n cast in the query (``$1::int``) takes the cast's type; in LIMIT or OFFSET it
    is bigint; else ``suggested[n-1]`` (what the engine infers from the column it meets), if
    any; otherwise text, which is how an untyped literal behaves.
    """
    found: dict[int, int] = {}
    if tree is not None:
        for node in tree.find_all(exp.Parameter, exp.Placeholder):
            i = _index(node)
            if i is None or i in found:
                continue
            parent = node.parent
            if isinstance(parent, exp.Cast):
                oid = types.oid_of_sqlglot(parent.to)
                if oid is not None:
                    found[i] = oid
            elif isinstance(parent, (exp.Limit, exp.Offset, exp.Fetch)):
                found[i] = types.INT8
    out = []
    for i in range(1, count + 1):
        given = declared[i - 1] if i <= len(declared) else 0
        hint = suggested[i - 1] if i <= len(suggested) else None
        out.append(given if given not in (0, types.UNKNOWN_LITERAL)
                   else found.get(i, hint if hint is not None else types.TEXT))
    return tuple(out)


def fold_casts(tree: exp.Expression, param_types: Sequence[int]) -> exp.Expression:
    """A copy of the tree in which a cast of ``$n`` to the very type it is decoded as
    (``$1::int`` with $1 an int4) is ``$n`` alone: its literal will already have that type.
    Done once per Parse; each Execute binds into the result (``bound``)."""
    def fold(node: exp.Expression) -> exp.Expression:
        if isinstance(node, exp.Cast) and not node.to.expressions:
            i = _index(node.this)
            if i is not None and i <= len(param_types) \
                    and types.oid_of_sqlglot(node.to) == param_types[i - 1]:
                return node.this.copy()
        return node

    return tree.transform(fold)


def bound(text: str, folded: exp.Expression, values: Sequence[Any],
          param_types: Sequence[int]) -> BoundStatement:
    """One Execute's statement: the folded tree of ``text`` and each value's literal node.

    The values are never turned into SQL text here: they become nodes (see types.literal),
    put in place of their ``$n`` when the engine plans (``BoundStatement.substituted``).
    """
    literals = tuple(types.literal(v, i + 1) for i, v in enumerate(values))
    return BoundStatement(text, folded, tuple(values), literals, tuple(param_types))


def bind(tree: exp.Expression, values: Sequence[Any], param_types: Sequence[int]
         ) -> exp.Expression:
    """A copy of the tree with every $n replaced by the literal node of values[n-1] (a cast of
    a parameter to its own decoded type replaced whole by the literal)."""
    return bound("", fold_casts(tree, param_types), values, param_types).substituted()


_STAND_INS: dict[int, Any] = {
    types.INT2: 1, types.INT4: 1, types.INT8: 1, types.OID: 1, types.NUMERIC: Decimal(1),
    types.FLOAT4: 1.0, types.FLOAT8: 1.0, types.BOOL: True, types.DATE: dt.date(2000, 1, 1),
    types.TIMESTAMP: dt.datetime(2000, 1, 1),
    types.TIMESTAMPTZ: dt.datetime(2000, 1, 1, tzinfo=dt.timezone.utc), types.TIME: dt.time(0),
}


def stand_in_values(tree: exp.Expression, param_types: Sequence[int]) -> list[Any]:
    """Values to plan a statement with before its parameters are known (Describe of a
    statement): a LIKE pattern gets '%', LIMIT and OFFSET get 1, other typed parameters a value
    of their type, untyped ones NULL. The columns of an answer do not depend on them."""
    context: dict[int, Any] = {}
    for node in tree.find_all(exp.Parameter, exp.Placeholder):
        i = _index(node)
        if i is None or i in context:
            continue
        parent = node.parent
        if isinstance(parent, exp.Cast):
            parent = parent.parent
        if isinstance(parent, (exp.Like, exp.ILike)):
            context[i] = "%"
        elif isinstance(parent, (exp.Limit, exp.Offset, exp.Fetch)):
            context[i] = 1
    return [context.get(i + 1, _STAND_INS.get(oid)) for i, oid in enumerate(param_types)]
