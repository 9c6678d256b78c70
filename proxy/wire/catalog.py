"""Catalog questions, answered from a data-free mirror of each analyst's granted tables.

Clients ask pg_catalog and information_schema what exists (psql's \\dt and \\d, JDBC's
DatabaseMetaData, SQLAlchemy's dialect start-up and inspector, asyncpg and pg8000 start-up,
``SELECT 1`` pings). hushql answers them from PostgreSQL itself, but never from the database
that holds the data:

- **Mirrors.** For every distinct set of granted tables there is one mirror database on the
  backend's server, ``hushql_mirror_<hash>``, made from template0. It holds one empty table per
  granted table with only the policy's exposed columns, typed from the column kinds, and the
  policy descriptions as comments. The hash covers the backend database's name and the mirror's
  whole layout, so a changed policy gets a new mirror and several proxies with the same
  policies share one. A mirror is built under a temporary name and renamed when complete; at
  start an existing one is checked (layout, emptiness, nothing added) and rebuilt if it differs.
- **An unprivileged role.** Each catalog query runs in a READ ONLY transaction with a
  statement timeout, after ``SET LOCAL ROLE hushql_catalog``: a NOLOGIN role with no attributes
  and no memberships, so a function that slipped past the checks below would still run
  without the backend role's powers (no pg_read_file, no other sessions' query texts). The
  only way back from inside a SELECT, ``set_config('role' | 'session_authorization', ...)``,
  is closed by the checks (a setting name must be one listed literal), and the transaction,
  role and all, is rolled back after every query. NOLOGIN means the role adds no credential
  anyone could use to connect to the server.
- **Checks on the exact text PostgreSQL will run**, with the session's PostgreSQL-faithful
  lexer (so quoting tricks cannot hide a call): every function called must be on an
  allow-list (what the supported clients were seen to send, plus harmless scalar helpers),
  ``current_setting``/``set_config`` only with a literal, listed setting name, and every
  ``pg_*`` name must be an allowed catalog relation or function. Sizes, statistics, files, large
  objects, locks, server activity, transaction ids and other databases are refused with 42501
  and a hint. The query runs through a server-side cursor (one statement only) and at most
  ``MAX_ROWS`` rows come back.
- **Bounded answers.** Function allow-lists cannot bound the size of a value (``||`` in a
  recursive CTE doubles a string without calling anything), so the size is checked where the
  value is made: the query runs wrapped so that PostgreSQL keeps a running total of the text
  size of the rows it sends and fails the query, before sending the row that passes
  ``MAX_BYTES``, with an error the catalog turns into 54000. The proxy therefore never holds
  more than ``MAX_BYTES`` of one answer's text, and at most ``MOST_AT_ONCE`` answers are
  fetched at a time in the whole process.
- **No needless facts about the backend.** ``version()``, ``current_user``, ``session_user``,
  ``current_role``, ``user`` and ``current_setting`` of the version or superuser settings are
  replaced, in the text sent to the mirror, by literals: the proxy's version string, the
  analyst's name, and ``off``.
- **Routing.** ``is_catalog_query`` is True only when every relation a query names is a catalog
  relation, a CTE or a function; any policy table name (``SELECT * FROM households LIMIT 0``)
  sends the query to the engine, which refuses raw rows. Because a mirror holds no rows, a
  routing mistake can reveal no data; the checks above guard the server.

When the mirror cannot be made (the backend role may not create databases or roles), the
catalog is unavailable and catalog queries are refused with 0A000 and a hint; the reason is
logged once at start.
"""

from __future__ import annotations

import hashlib
import json
import logging
import secrets
import threading
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, Iterable, Iterator, Sequence

import psycopg
from psycopg import sql
from psycopg.adapt import Transformer
from psycopg.pq import DiagnosticField, ExecStatus, Format
from psycopg.types.string import TextLoader
from psycopg_pool import ConnectionPool
from sqlglot import exp

from proxy import __version__
from proxy.errors import (FEATURE_NOT_SUPPORTED, INSUFFICIENT_PRIVILEGE, INTERNAL_ERROR,
                          PROGRAM_LIMIT_EXCEEDED, QUERY_CANCELED, TOO_MANY_CONNECTIONS,
                          HushError)
from proxy.dsn import with_database
from proxy.policy import ColumnPolicy, Policies
from proxy.wire import own_database, settings, statements, types
from proxy.wire.statements import Token

__all__ = ["Catalog", "build_catalog", "is_catalog_tree", "claims_text", "check_catalog_text",
           "mirror_layout", "personalise", "bounded", "ROLE"]

log = logging.getLogger("hushql.catalog")

ROLE = "hushql_catalog"
MIRROR_PREFIX = "hushql_mirror_"
# Bumped whenever the way mirrors are built changes, so old mirrors are not reused.
LAYOUT_VERSION = 1
STATEMENT_TIMEOUT_MS = 3000
MAX_ROWS = 100_000
# The largest catalog answer, in bytes of PostgreSQL's text for its rows. What the supported
# clients read is far smaller: all of pg_proc is some 0.5 MB (measured on PostgreSQL 15).
MAX_BYTES = 4 * 1024 * 1024
POOL_SIZE = 4
# Catalog answers being fetched at once in the process, whatever the mirror; others wait up
# to WAIT_SECONDS for their turn.
MOST_AT_ONCE = 4
WAIT_SECONDS = 10.0

CATALOG_HINT = ("Catalog questions are answered from an empty copy of your granted tables; "
                "sizes, statistics, files and server activity are not available.")

# ----------------------------------------------------------------------------- what is allowed

CATALOG_SCHEMAS = frozenset({"pg_catalog", "information_schema"})

# pg_catalog relations a catalog query may name: the per-database structure that psql, JDBC,
# SQLAlchemy, asyncpg and pg8000 read. pg_roles is here because psql's \d reads it (role names
# are readable by every PostgreSQL user by design and say nothing about the data). Left out on
# purpose: statistics (pg_stat*, pg_statio*, pg_statistic, pg_stats), other databases
# (pg_db_role_setting, pg_shdescription, pg_tablespace; pg_database is named only to be
# replaced by the proxy's own row, see proxy.wire.own_database), server state and files
# (pg_settings, pg_file_settings, pg_hba_file_rules, pg_locks, pg_prepared_xacts,
# pg_prepared_statements, pg_cursors, pg_replication*, pg_subscription, pg_available_extension*,
# pg_config, pg_shmem_allocations, pg_backend_memory_contexts), passwords (pg_authid,
# pg_shadow, pg_user_mapping*), large objects (pg_largeobject*).
ALLOWED_RELATIONS = frozenset({
    "pg_aggregate", "pg_am", "pg_amop", "pg_amproc", "pg_attrdef", "pg_attribute", "pg_cast",
    "pg_class", "pg_collation", "pg_constraint", "pg_conversion", "pg_default_acl", "pg_depend",
    "pg_description", "pg_enum", "pg_event_trigger", "pg_extension", "pg_foreign_data_wrapper",
    "pg_foreign_server", "pg_foreign_table", "pg_index", "pg_indexes", "pg_inherits",
    "pg_init_privs", "pg_language", "pg_matviews", "pg_namespace", "pg_opclass", "pg_operator",
    "pg_opfamily", "pg_partitioned_table", "pg_policies", "pg_policy", "pg_proc",
    "pg_publication", "pg_publication_namespace", "pg_publication_rel", "pg_publication_tables",
    "pg_range", "pg_rewrite", "pg_roles", "pg_rules", "pg_sequence", "pg_sequences",
    "pg_statistic_ext", "pg_tables", "pg_timezone_abbrevs", "pg_timezone_names",
    "pg_transform", "pg_trigger", "pg_ts_config", "pg_ts_dict", "pg_ts_parser",
    "pg_ts_template", "pg_type", "pg_views",
})

# Functions a catalog query may call: catalog helpers the clients use, information_schema's
# helpers, and scalar, array, aggregate and JSON functions that read nothing but their
# arguments. An allow-list rather than a deny-list: PostgreSQL has thousands of functions and
# new ones arrive with every release; one that reveals sizes, statistics, files, settings,
# activity or other databases must never pass by being unknown.
ALLOWED_FUNCTIONS = frozenset({
    # catalog helpers
    "format_type", "pg_get_userbyid", "pg_get_expr", "pg_get_constraintdef", "pg_get_indexdef",
    "pg_get_viewdef", "pg_get_triggerdef", "pg_get_ruledef", "pg_get_functiondef",
    "pg_get_function_arguments", "pg_get_function_identity_arguments",
    "pg_get_function_result", "pg_get_function_arg_default", "pg_get_serial_sequence",
    "pg_get_partkeydef", "pg_get_partition_constraintdef", "pg_get_statisticsobjdef",
    "pg_get_statisticsobjdef_columns", "pg_get_statisticsobjdef_expressions",
    "pg_relation_is_publishable", "pg_encoding_to_char", "pg_char_to_encoding",
    "pg_get_keywords", "pg_typeof", "pg_index_column_has_property", "pg_index_has_property",
    "pg_indexam_has_property", "pg_options_to_table", "pg_column_is_updatable",
    # Not pg_describe_object nor pg_identify_object: given pg_database's class they name
    # every database on the server (tests/test_own_database.py).
    "pg_relation_is_updatable",
    "pg_is_other_temp_schema", "pg_my_temp_schema", "pg_table_is_visible",
    "pg_type_is_visible", "pg_function_is_visible", "pg_operator_is_visible",
    "pg_opclass_is_visible", "pg_opfamily_is_visible", "pg_collation_is_visible",
    "pg_conversion_is_visible", "pg_statistics_obj_is_visible", "pg_ts_config_is_visible",
    "pg_ts_dict_is_visible", "pg_ts_parser_is_visible", "pg_ts_template_is_visible",
    "obj_description", "col_description", "has_table_privilege", "has_column_privilege",
    "has_any_column_privilege", "has_schema_privilege", "has_function_privilege",
    "has_type_privilege", "has_sequence_privilege", "to_regclass", "to_regtype",
    "to_regproc", "to_regprocedure", "to_regnamespace", "to_regoper", "to_regoperator",
    # information_schema helpers (JDBC uses _pg_expandarray for keys)
    "_pg_expandarray", "_pg_char_max_length", "_pg_char_octet_length",
    "_pg_numeric_precision", "_pg_numeric_precision_radix", "_pg_numeric_scale",
    "_pg_datetime_precision", "_pg_interval_type", "_pg_truetypid", "_pg_truetypmod",
    "_pg_index_position", "_pg_keysequal",
    # session facts (answered by the mirror, not the data database)
    "version", "current_schema", "current_schemas", "current_database", "current_catalog",
    "current_user", "current_role", "session_user", "user", "current_setting", "set_config",
    # text (none that can build large values: no lpad, repeat, replace or format)
    "lower", "upper", "length", "char_length", "character_length", "octet_length", "substr",
    "substring", "position", "strpos", "split_part", "left", "right", "trim", "btrim",
    "ltrim", "rtrim", "concat", "concat_ws", "initcap", "starts_with", "quote_ident",
    "quote_literal", "quote_nullable", "to_char", "regexp_match", "chr", "ascii",
    # numbers, conditionals, casts in function form
    "coalesce", "nullif", "greatest", "least", "abs", "round", "ceil", "ceiling", "floor",
    "mod", "sign", "trunc", "int2", "int4", "int8", "float4", "float8", "numeric", "text",
    "oid", "bool", "varchar", "char", "bpchar", "name",
    # time
    "now", "current_date", "current_time", "current_timestamp", "localtime",
    "localtimestamp", "statement_timestamp", "transaction_timestamp", "date_trunc",
    "date_part", "extract",
    # arrays and set-returning helpers
    "array_to_string", "string_to_array", "array_agg", "array_length", "array_lower",
    "array_upper", "array_position", "array_positions", "array_ndims", "array_dims",
    "array_append", "array_prepend", "array_cat", "array_remove", "cardinality", "unnest",
    "generate_series", "generate_subscripts",
    # aggregates and window functions
    "count", "sum", "min", "max", "avg", "bool_and", "bool_or", "every", "string_agg",
    "row_number", "rank", "dense_rank",
    # JSON
    "json_build_object", "json_build_array", "jsonb_build_object", "jsonb_build_array",
    "to_json", "to_jsonb", "row_to_json", "json_agg", "jsonb_agg", "json_object_agg",
    "jsonb_object_agg",
})

# Settings ``current_setting`` may read and ``set_config`` may change (within the catalog
# query's own transaction, which is rolled back): what clients ask about, never paths, server
# addresses, resource settings or anything role-related.
READABLE_SETTINGS = frozenset({
    "server_version", "server_version_num", "server_encoding", "client_encoding",
    "standard_conforming_strings", "integer_datetimes", "datestyle", "intervalstyle",
    "timezone", "application_name", "search_path", "default_transaction_isolation",
    "transaction_isolation", "default_transaction_read_only", "transaction_read_only",
    "max_identifier_length", "max_index_keys", "block_size", "lc_collate", "lc_ctype",
    "extra_float_digits", "bytea_output", "jit", "is_superuser", "client_min_messages",
})
WRITABLE_SETTINGS = frozenset({"search_path", "application_name", "datestyle", "intervalstyle",
                               "extra_float_digits", "bytea_output", "client_min_messages",
                               "jit"})
_SETTING_FUNCTIONS = {"current_setting": READABLE_SETTINGS, "set_config": WRITABLE_SETTINGS}

# Words that may stand before "(" without being a function call: SQL keywords and the type
# names that take modifiers (varchar(10)). Upper case, as the lexer gives words.
_CALL_WORDS = frozenset({
    "SELECT", "FROM", "WHERE", "AND", "OR", "NOT", "IN", "EXISTS", "ANY", "ALL", "SOME",
    "ARRAY", "VALUES", "AS", "ON", "USING", "JOIN", "LATERAL", "BY", "HAVING", "WHEN", "THEN",
    "ELSE", "CASE", "OVER", "FILTER", "GROUP", "DISTINCT", "UNION", "INTERSECT", "EXCEPT",
    "LIMIT", "OFFSET", "FETCH", "BETWEEN", "LIKE", "ILIKE", "TO", "ESCAPE", "OPERATOR", "ROW",
    "ROWS", "CAST", "FOR", "IS", "WITH", "RECURSIVE", "MATERIALIZED", "TABLESAMPLE",
    "INTERVAL", "VARCHAR", "CHAR", "CHARACTER", "VARYING", "NUMERIC", "DECIMAL", "DEC",
    "FLOAT", "BIT", "TIME", "TIMESTAMP", "NCHAR", "NATIONAL", "ORDER", "PARTITION", "RANGE",
    "GROUPS", "PRECEDING", "FOLLOWING", "UNBOUNDED", "CURRENT",
})
# Names of functions that must never be reached unchecked: they run SQL from a string, change
# settings, reach other servers, large objects or transaction ids. None is on the allow-list
# but set_config; here they are refused even where they do not look like calls.
_NEVER_BARE = ("set_config", "query_to_xml", "table_to_xml", "schema_to_xml",
               "database_to_xml", "cursor_to_xml", "dblink", "lo_", "txid_")
# System columns that reveal server-wide transaction counters.
_DENIED_WORDS = frozenset({"xmin", "xmax", "cmin", "cmax"})

_QUERY_STARTS = frozenset({"SELECT", "WITH", "VALUES"})


def _refuse(what: str) -> HushError:
    return HushError(INSUFFICIENT_PRIVILEGE, f"{what} is not available through hushql",
                     hint=CATALOG_HINT)


def check_catalog_text(text: str) -> None:
    """Raises HushError (42501, 0A000, 42601) unless ``text`` is one catalog SELECT whose every
    function call and ``pg_*`` name is allowed. Reads the text as PostgreSQL will."""
    tokens = statements.tokenize(text)
    if not tokens:
        raise HushError(FEATURE_NOT_SUPPORTED, "empty catalog query")
    start = next((t for t in tokens if not (t.kind == "op" and t.value == "(")), tokens[0])
    if start.kind != "word" or start.value not in _QUERY_STARTS:
        raise HushError(FEATURE_NOT_SUPPORTED, "only SELECT statements may ask the catalog",
                        hint=CATALOG_HINT)
    for i, tok in enumerate(tokens):
        if tok.kind == "semicolon":
            raise HushError(FEATURE_NOT_SUPPORTED, "one catalog statement at a time")
        if text[tok.start:tok.start + 2].upper() == "U&":
            # The lexer keeps escapes as written, so U&"\0070g_..." would hide a name.
            raise HushError(FEATURE_NOT_SUPPORTED, "Unicode escapes are not accepted in "
                            "catalog queries", hint="Write names and strings plainly.")
        if tok.kind not in ("word", "ident"):
            continue
        name = tok.value.lower()
        if name in _DENIED_WORDS:
            raise _refuse(f"system column {name}")
        if _is_call(tokens, i):
            _check_call(tokens, i, name)
        elif _after_as(tokens, i):
            continue  # an alias of the query's own: "... AS pg_get_expr_1"
        elif name.startswith("pg_") and name not in ("pg_catalog", own_database.RELATION) \
                and name not in ALLOWED_RELATIONS:
            raise _refuse(f"relation {name}" if name not in ALLOWED_FUNCTIONS
                          else f"{name} without a call")
        elif name in _SETTING_FUNCTIONS or name.startswith(_NEVER_BARE):
            # A second guard should a call ever be misread as an alias: these names may
            # appear only as calls the checks above have seen.
            raise _refuse(f"{name} without a call")


def _is_op(tok: Token | None, value: str) -> bool:
    return tok is not None and tok.kind == "op" and tok.value == value


def _after_as(tokens: Sequence[Token], i: int) -> bool:
    """Whether the name at i is an alias given with AS (``... AS pg_get_expr_1``)."""
    return i > 0 and _is_word(tokens[i - 1], "AS")


def _is_call(tokens: Sequence[Token], i: int) -> bool:
    """Whether the word at i is called as a function: followed by "(", and not a keyword or
    type name that takes parentheses, an alias's column list (after AS, after WITH
    ORDINALITY, or after a parenthesised FROM item), or a CTE's column list
    (``name(a, b) AS (SELECT ...``). Anything else is a call, so an unusual spelling is
    checked rather than skipped."""
    nxt = tokens[i + 1] if i + 1 < len(tokens) else None
    if not _is_op(nxt, "("):
        return False
    tok = tokens[i]
    if tok.kind == "word" and tok.value in _CALL_WORDS:
        return False
    if _after_as(tokens, i) or (i > 0 and _is_word(tokens[i - 1], "ORDINALITY")) \
            or _alias_after_group(tokens, i):
        return False
    close = _matching(tokens, i + 1)
    after = list(tokens[close + 1:close + 4])
    if len(after) >= 2 and _is_word(after[0], "AS"):
        if _is_word(after[1], "MATERIALIZED", "NOT"):
            return False
        # A CTE's body is a query; a column definition list ("f() AS (a int)") is not.
        if _is_op(after[1], "(") and len(after) == 3 and (
                _is_word(after[2], *_QUERY_STARTS) or _is_op(after[2], "(")):
            return False
    return True


def _alias_after_group(tokens: Sequence[Token], i: int) -> bool:
    """Whether the name at i follows a parenthesised FROM item, as in psql's
    ``FROM (VALUES ...) s(name, tp)`` or ``FROM generate_series(1, 3) g(n)``: the ")" before
    it closes a group opened after FROM, JOIN, LATERAL or ",", or a function's arguments.
    Not after OPERATOR(...) or DISTINCT ON (...), where what follows is an operand."""
    if i == 0 or not _is_op(tokens[i - 1], ")"):
        return False
    depth, j = 0, i - 1
    while j >= 0:
        if _is_op(tokens[j], ")"):
            depth += 1
        elif _is_op(tokens[j], "("):
            depth -= 1
            if depth == 0:
                break
        j -= 1
    if j <= 0:
        return False
    before = tokens[j - 1]
    if _is_word(before, "FROM", "JOIN", "LATERAL") or _is_op(before, ","):
        return True
    return before.kind in ("word", "ident") and not _is_word(before, *_CALL_WORDS)


def _is_word(tok: Token | None, *values: str) -> bool:
    return tok is not None and tok.kind == "word" and tok.value in values


def _matching(tokens: Sequence[Token], open_at: int) -> int:
    """Index of the ")" closing the "(" at open_at (the last token when unbalanced)."""
    depth = 0
    for j in range(open_at, len(tokens)):
        if _is_op(tokens[j], "("):
            depth += 1
        elif _is_op(tokens[j], ")"):
            depth -= 1
            if depth == 0:
                return j
    return len(tokens) - 1


def _check_call(tokens: Sequence[Token], i: int, name: str) -> None:
    """Raises unless the call at i is to an allowed function, unqualified or qualified by a
    catalog schema, with a listed setting name where it takes one."""
    if _is_op(tokens[i - 1] if i else None, "."):
        qualifier = tokens[i - 2] if i >= 2 else None
        if qualifier is None or qualifier.kind not in ("word", "ident") \
                or qualifier.value.lower() not in CATALOG_SCHEMAS \
                or _is_op(tokens[i - 3] if i >= 3 else None, "."):
            raise _refuse(f"function {name} outside pg_catalog")
    if name not in ALLOWED_FUNCTIONS:
        raise _refuse(f"function {name}")
    allowed_settings = _SETTING_FUNCTIONS.get(name)
    if allowed_settings is not None:
        # The setting's name must be exactly one literal ('name' followed by "," or ")"), so
        # no expression can turn it into role or session_authorization.
        arg = tokens[i + 2] if i + 2 < len(tokens) else None
        end = tokens[i + 3] if i + 3 < len(tokens) else None
        if arg is None or arg.kind != "string" or arg.value.lower() not in allowed_settings \
                or not (_is_op(end, ",") or _is_op(end, ")")):
            shown = arg.value[:40] if arg is not None and arg.kind == "string" else "that setting"
            raise _refuse(f"{name} of {shown}")


def is_catalog_tree(tree: exp.Expression, policy_tables: Iterable[str]) -> bool:
    """True when a parsed query asks only the catalog: a SELECT (or set operation) whose every
    relation is a catalog relation, a CTE of its own or a function, and none of whose names is
    a policy table's. Such queries may still be refused by ``check_catalog_text``."""
    if not isinstance(tree, (exp.Select, exp.SetOperation, exp.Subquery, exp.Values)):
        return False
    protected = {t.lower() for t in policy_tables}
    ctes = {cte.alias_or_name.lower() for cte in tree.find_all(exp.CTE)}
    for table in tree.find_all(exp.Table):
        name = table.name.lower()
        if name in protected:
            return False
        if isinstance(table.this, exp.Func):
            continue  # a function in FROM: checked by name in check_catalog_text
        if table.catalog:
            return False
        schema = table.db.lower()
        if schema in CATALOG_SCHEMAS or (not schema and (name.startswith("pg_") or name in ctes)):
            continue
        return False
    return True


def claims_text(text: str, policy_tables: Iterable[str]) -> bool:
    """For text sqlglot cannot parse: True when it reads like a catalog SELECT (it names
    pg_catalog, information_schema or a pg_* relation) and no identifier in it is a policy
    table's name. Safe to over-claim: the mirror holds no rows."""
    try:
        tokens = statements.tokenize(text)
    except HushError:
        return False
    if not tokens or tokens[0].kind != "word" or tokens[0].value not in _QUERY_STARTS:
        return False
    protected = {t.lower() for t in policy_tables}
    names = [t.value.lower() for t in tokens if t.kind in ("word", "ident")]
    if any(n in protected for n in names):
        return False
    return any(n in CATALOG_SCHEMAS or n.startswith("pg_") for n in names)


# ----------------------------------------------------------------------------- what is told

# version() as the proxy tells it: the "PostgreSQL major.minor" prefix clients parse, then
# the proxy's own name and version instead of the backend's build.
VERSION_STRING = f"PostgreSQL {settings.SERVER_VERSION.split()[0]} (hushql {__version__})"
_IDENTITY = ("current_user", "session_user", "current_role", "user")
# Settings current_setting() answers from the proxy rather than the mirror's server.
_TOLD_SETTINGS = {"server_version": settings.SERVER_VERSION,
                  "server_version_num": settings.SERVER_VERSION_NUM, "is_superuser": "off"}


def _literal(value: str, sql_type: str, column: str) -> str:
    """A scalar subquery standing for a value: it keeps the column name a call would give
    (PostgreSQL names a scalar subquery's column after its one target). The value is quoted
    with standard_conforming_strings on, as every mirror connection sets."""
    if "\x00" in value:
        raise HushError(FEATURE_NOT_SUPPORTED, "this account name cannot be shown")
    quoted = "'" + value.replace("'", "''") + "'"
    return f'(SELECT {quoted}::{sql_type} AS "{column}")'


def personalise(text: str, analyst: str) -> str:
    """``text`` with every question about the backend's identity replaced by the proxy's
    answer: version(), the role functions and keywords (as the analyst's name), and
    current_setting of the version and superuser settings. Runs on checked text."""
    tokens = statements.tokenize(text)
    edits: list[tuple[int, int, str]] = []
    i = 0
    while i < len(tokens):
        first = i
        if _is_word_or_ident(tokens[i], "pg_catalog") and i + 2 < len(tokens) \
                and _is_op(tokens[i + 1], ".") and tokens[i + 2].kind in ("word", "ident"):
            i += 2
        tok = tokens[i]
        name = tok.value.lower() if tok.kind in ("word", "ident") else ""
        qualified = i > 0 and _is_op(tokens[i - 1], ".") and first == i
        value: str | None = None
        end = i
        if name and not qualified and _is_op(tokens[i + 1] if i + 1 < len(tokens) else None,
                                              "("):
            close = _matching(tokens, i + 1)
            args = tokens[i + 2:close]
            if name == "version" and not args:
                value = _literal(VERSION_STRING, "text", "version")
            elif name in _IDENTITY and not args:
                value = _literal(analyst, "name", name)
            elif name == "current_setting" and args and args[0].kind == "string" \
                    and args[0].value.lower() in _TOLD_SETTINGS \
                    and (len(args) == 1 or _is_op(args[1], ",")):
                value = _literal(_TOLD_SETTINGS[args[0].value.lower()], "text",
                                 "current_setting")
            end = close
        elif tok.kind == "word" and name in _IDENTITY and first == i and not qualified \
                and not (i > 0 and _is_word(tokens[i - 1], "AS")):
            value = _literal(analyst, "name", name)
        if value is not None:
            if first > 0 and _is_word(tokens[first - 1], "FROM", "JOIN", "LATERAL"):
                value += f' AS "{name}"'  # a FROM item needs an alias (PostgreSQL 15)
            edits.append((tokens[first].start, tokens[end].end, value))
            i = end
        i += 1
    for start, stop, value in reversed(edits):
        text = text[:start] + value + text[stop:]
    return text


def _is_word_or_ident(tok: Token, value: str) -> bool:
    return tok.kind in ("word", "ident") and tok.value.lower() == value


# The running total of the answer's text size, and the error that stops it (a cast that
# cannot succeed, built from the row so that the planner cannot fold it in advance).
_SIZE_COLUMN = "hushql_answer_bytes"
_TOO_LARGE = "bytes: hushql catalog answer too large"


def bounded(text: str, most_bytes: int) -> str:
    """The query wrapped so that the mirror fails it, before sending the row that brings the
    answer's text above ``most_bytes``; the wrapper adds one last column (the running size)
    that ``Catalog.run`` drops. Rows keep their order: the window has no ORDER BY of its own
    and PostgreSQL keeps the subquery's order through it."""
    return (f"SELECT w.* FROM (SELECT q.*, sum(octet_length(q::text)) OVER (ROWS UNBOUNDED "
            f"PRECEDING) AS {_SIZE_COLUMN} FROM (\n{text}\n) AS q) AS w WHERE CASE WHEN "
            f"w.{_SIZE_COLUMN} > {int(most_bytes)} THEN (w.{_SIZE_COLUMN}::text || "
            f"' {_TOO_LARGE}')::int > 0 ELSE true END")


# ----------------------------------------------------------------------------- mirror layout


@dataclass(frozen=True)
class MirrorColumn:
    name: str
    type: str
    description: str | None = None


@dataclass(frozen=True)
class MirrorTable:
    name: str
    description: str
    columns: tuple[MirrorColumn, ...]


def column_type(column: ColumnPolicy) -> str:
    """The mirror's SQL type for a policy column, from its kind alone."""
    if column.kind == "integer":
        low, high = column.range or (0, 0)
        int4 = -(2 ** 31) <= int(low) and int(high) < 2 ** 31
        return "integer" if int4 else "bigint"
    return {"category": "text", "number": "numeric", "date": "date",
            "boolean": "boolean"}[column.kind]


def mirror_layout(policies: Policies, tables: Iterable[str]) -> tuple[MirrorTable, ...]:
    """The empty tables a mirror of these granted tables holds, sorted by name."""
    out = []
    for name in sorted(set(tables)):
        policy = policies.tables[name]
        out.append(MirrorTable(name, policy.description, tuple(
            MirrorColumn(col, column_type(c), c.description)
            for col, c in policy.columns.items())))
    return tuple(out)


def mirror_name(backend_database: str, layout: tuple[MirrorTable, ...]) -> str:
    """``hushql_mirror_<hash>``: one name per backend database and layout."""
    body = json.dumps([LAYOUT_VERSION, backend_database,
                       [[t.name, t.description, [[c.name, c.type, c.description]
                                                 for c in t.columns]] for t in layout]])
    return MIRROR_PREFIX + hashlib.sha256(body.encode()).hexdigest()[:12]


class CatalogSetupError(Exception):
    """The mirror or its role could not be made; the catalog is then unavailable."""


_ROLE_FACTS = (
    "SELECT rolsuper OR rolcreatedb OR rolcreaterole OR rolcanlogin OR rolreplication "
    "OR rolbypassrls OR rolinherit, EXISTS (SELECT 1 FROM pg_auth_members WHERE member = r.oid), "
    "pg_has_role(current_user, r.oid, 'MEMBER') FROM pg_roles r WHERE rolname = %s")


def _ensure_role(admin: psycopg.Connection[Any]) -> None:
    """Makes ROLE a NOLOGIN role with no attributes and no memberships that the admin role
    may SET ROLE to: creates it, or repairs one that has drifted. A role an administrator
    made that way beforehand (and granted to the backend role) is used as it is, so the
    backend role then needs no CREATEROLE. Raises CatalogSetupError when it cannot be made
    safe."""
    role = sql.Identifier(ROLE)
    try:
        facts = admin.execute(_ROLE_FACTS, (ROLE,)).fetchone()
        if facts is None:
            try:
                admin.execute(sql.SQL("CREATE ROLE {} NOLOGIN NOINHERIT").format(role))
            except (psycopg.errors.DuplicateObject, psycopg.errors.UniqueViolation):
                pass  # another proxy made it at the same moment
            facts = admin.execute(_ROLE_FACTS, (ROLE,)).fetchone()
        if facts is not None and facts[0]:
            admin.execute(sql.SQL("ALTER ROLE {} NOLOGIN NOSUPERUSER NOCREATEDB NOCREATEROLE "
                                  "NOINHERIT NOREPLICATION NOBYPASSRLS").format(role))
        if facts is not None and facts[1]:
            for (group,) in admin.execute(
                    "SELECT g.rolname FROM pg_auth_members m JOIN pg_roles g ON g.oid = m.roleid "
                    "JOIN pg_roles r ON r.oid = m.member WHERE r.rolname = %s",
                    (ROLE,)).fetchall():
                admin.execute(sql.SQL("REVOKE {} FROM {}").format(sql.Identifier(group), role))
        if facts is not None and not facts[2]:
            admin.execute(sql.SQL("GRANT {} TO CURRENT_USER").format(role))
    except psycopg.errors.InsufficientPrivilege:
        raise CatalogSetupError(f"the backend role may not create or change role {ROLE}; an "
                                f"administrator can create it (NOLOGIN) and grant it to the "
                                f"backend role") from None
    facts = admin.execute(_ROLE_FACTS, (ROLE,)).fetchone()
    if facts is None or facts[0] or facts[1] or not facts[2]:
        raise CatalogSetupError(f"role {ROLE} has attributes or memberships it must not have")


def _mirror_is_sound(dsn: str, layout: tuple[MirrorTable, ...]) -> bool:
    """Whether an existing mirror holds exactly the layout, no rows, and nothing else of its
    own (no other relations, schemas, functions or extensions)."""
    try:
        with psycopg.connect(dsn, autocommit=True, connect_timeout=10) as conn:
            relations = conn.execute(
                "SELECT n.nspname, c.relname, c.relkind FROM pg_class c JOIN pg_namespace n "
                "ON n.oid = c.relnamespace WHERE n.nspname NOT IN ('pg_catalog', "
                "'information_schema') AND n.nspname NOT LIKE 'pg_toast%' "
                "AND n.nspname NOT LIKE 'pg_temp%' ORDER BY 2").fetchall()
            if relations != [("public", t.name, "r") for t in layout]:
                return False
            for t in layout:
                columns = conn.execute(
                    "SELECT attname, format_type(atttypid, atttypmod) FROM pg_attribute "
                    "WHERE attrelid = %s::regclass AND attnum > 0 AND NOT attisdropped "
                    "ORDER BY attnum", (f"public.{t.name}",)).fetchall()
                if columns != [(c.name, c.type) for c in t.columns]:
                    return False
                empty = conn.execute(sql.SQL("SELECT NOT EXISTS (SELECT FROM {})").format(
                    sql.Identifier("public", t.name))).fetchone()
                if not (empty and empty[0]):
                    return False
            extra = conn.execute(
                "SELECT (SELECT count(*) FROM pg_namespace WHERE nspname NOT IN ('pg_catalog', "
                "'information_schema', 'public') AND nspname NOT LIKE 'pg_toast%' "
                "AND nspname NOT LIKE 'pg_temp%') + (SELECT count(*) FROM pg_proc p JOIN "
                "pg_namespace n ON n.oid = p.pronamespace WHERE n.nspname NOT IN "
                "('pg_catalog', 'information_schema')) + (SELECT count(*) FROM pg_extension "
                "WHERE extname <> 'plpgsql')").fetchone()
            return bool(extra) and extra[0] == 0
    except psycopg.Error:
        return False


def _fill_mirror(dsn: str, layout: tuple[MirrorTable, ...]) -> None:
    """Creates the empty tables, comments and privileges in a new mirror database."""
    role = sql.Identifier(ROLE)
    with psycopg.connect(dsn, autocommit=False, connect_timeout=10) as conn:
        conn.execute("REVOKE ALL ON SCHEMA public FROM PUBLIC")
        conn.execute(sql.SQL("GRANT USAGE ON SCHEMA public TO {}").format(role))
        for t in layout:
            ident = sql.Identifier("public", t.name)
            conn.execute(sql.SQL("CREATE TABLE {} ({})").format(ident, sql.SQL(", ").join(
                sql.SQL("{} {}").format(sql.Identifier(c.name), sql.SQL(c.type))
                for c in t.columns)))
            if t.description:
                conn.execute(sql.SQL("COMMENT ON TABLE {} IS {}").format(
                    ident, sql.Literal(t.description)))
            for c in t.columns:
                if c.description:
                    conn.execute(sql.SQL("COMMENT ON COLUMN {} IS {}").format(
                        sql.Identifier("public", t.name, c.name), sql.Literal(c.description)))
            conn.execute(sql.SQL("GRANT SELECT ON {} TO {}").format(ident, role))
        conn.commit()


def _create_mirror(admin: psycopg.Connection[Any], admin_dsn: str, name: str,
                   layout: tuple[MirrorTable, ...]) -> None:
    """Reuses a sound mirror called ``name`` or builds it anew under a temporary name and
    renames it into place. Raises CatalogSetupError when databases cannot be created."""
    exists = admin.execute("SELECT 1 FROM pg_database WHERE datname = %s", (name,)).fetchone()
    if exists and _mirror_is_sound(with_database(admin_dsn, name), layout):
        return
    building = f"{name}_new_{secrets.token_hex(4)}"
    ident = sql.Identifier(building)
    # The C locale with libc, so no server default (an ICU locale, a non-UTF8 locale) can
    # refuse it; LOCALE_PROVIDER is PostgreSQL 15's, so older servers get the plain form.
    for options in ("LOCALE 'C' LOCALE_PROVIDER libc", "LOCALE 'C'"):
        try:
            admin.execute(sql.SQL("CREATE DATABASE {} TEMPLATE template0 ENCODING 'UTF8' "
                                  + options).format(ident))
            break
        except psycopg.errors.SyntaxError:
            continue
        except psycopg.errors.InsufficientPrivilege:
            raise CatalogSetupError("the backend role may not create databases") from None
    else:
        raise CatalogSetupError("the server would not create a UTF8 database in the C locale")
    try:
        admin.execute(sql.SQL("REVOKE ALL ON DATABASE {} FROM PUBLIC").format(ident))
        _fill_mirror(with_database(admin_dsn, building), layout)
        admin.execute(sql.SQL("ALTER DATABASE {} SET default_transaction_read_only = on"
                              ).format(ident))
        admin.execute(sql.SQL("ALTER DATABASE {} SET statement_timeout = {}").format(
            ident, sql.Literal(f"{STATEMENT_TIMEOUT_MS}ms")))
        if exists:
            admin.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(
                sql.Identifier(name)))
        try:
            admin.execute(sql.SQL("ALTER DATABASE {} RENAME TO {}").format(
                ident, sql.Identifier(name)))
            building = ""
        except psycopg.errors.DuplicateDatabase:
            pass  # another proxy finished the same mirror first; use theirs
    finally:
        if building:
            admin.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(ident))


# ----------------------------------------------------------------------------- answering

# Results come back from the mirror as PostgreSQL's text; the few types the wire front sends
# natively are decoded with psycopg's loaders, everything else (arrays, "char", regclass,
# oidvector, domains such as information_schema's sql_identifier) travels as text.
_NATIVE_OIDS = frozenset({types.BOOL, types.INT2, types.INT4, types.INT8, types.OID,
                          types.FLOAT4, types.FLOAT8, types.NUMERIC, types.TEXT, types.VARCHAR,
                          types.BPCHAR, types.NAME, types.DATE})
_AS_STRING = frozenset({types.TEXT, types.VARCHAR, types.BPCHAR, types.NAME})


# Every OID psycopg knows, and 0 (the fallback for the rest): loaded as str.
_ALL_OIDS = tuple(sorted({0} | {oid for info in psycopg.postgres.types
                                 for oid in (info.oid, info.array_oid) if oid}))
_LOADERS = Transformer()


def _column_type(oid: int) -> int | str:
    """How a mirror result column is declared to the client."""
    return oid if oid in _NATIVE_OIDS else "text"


def _decoder(oid: int) -> Any:
    if oid not in _NATIVE_OIDS or oid in _AS_STRING:
        return None
    loader = _LOADERS.get_loader(oid, Format.TEXT)
    return lambda s: loader.load(s.encode())


# SQLSTATE classes whose messages can only be about the query's own text and values: syntax
# and access (42), data (22), features (0A), transaction state (25), cardinality (21),
# statement and cursor names (26, 34) (PostgreSQL Appendix A).
_QUERY_ERROR_CLASSES = frozenset({"42", "22", "0A", "25", "21", "26", "34"})


class Catalog:
    """Routes and answers catalog questions from the mirrors; thread-safe.

    ``mirrors`` maps each account to its mirror database (analysts by their grants,
    administrators to the mirror of no tables). With ``unavailable`` set, every catalog
    question is refused with 0A000 and that reason's hint.
    """

    def __init__(self, policies: Policies, *, admin_dsn: str = "",
                 mirrors: dict[str, str] | None = None, unavailable: str | None = None,
                 timeout_ms: int = STATEMENT_TIMEOUT_MS, max_rows: int = MAX_ROWS,
                 max_bytes: int = MAX_BYTES, database: str = "") -> None:
        self.policies = policies
        self.database = database  # the one name pg_database shows (proxy.wire.own_database)
        self._database_columns: list[str] | None = None
        self.admin_dsn = admin_dsn
        self.mirrors = dict(mirrors or {})
        self.unavailable = unavailable
        self.timeout_ms = timeout_ms
        self.max_rows = max_rows
        self.max_bytes = max_bytes
        self._at_once = threading.BoundedSemaphore(MOST_AT_ONCE)
        self._policy_tables = frozenset(policies.tables)
        self._pools: dict[str, ConnectionPool] = {}
        self._lock = threading.Lock()

    # ---- routing (called by the session) ------------------------------------------------

    def is_catalog_query(self, tree: exp.Expression) -> bool:
        return is_catalog_tree(tree, self._policy_tables)

    def is_catalog_text(self, text: str) -> bool:
        return claims_text(text, self._policy_tables)

    # ---- answering -----------------------------------------------------------------------

    def run(self, analyst: str, sql_text: str, params: Sequence[Any] = ()
            ) -> tuple[list[tuple[str, int | str]], list[tuple[Any, ...]]]:
        """Runs one checked catalog SELECT in the analyst's mirror: (columns, rows). Raises
        HushError (42501 refused, 54000 too many rows or bytes, 53300 too many at once, 57014
        timeout, or the mirror's own error about the query)."""
        if not self._at_once.acquire(timeout=WAIT_SECONDS):
            raise HushError(TOO_MANY_CONNECTIONS, "too many catalog questions at once",
                            hint="Try again in a moment.")
        try:
            with self._transaction(analyst, sql_text) as conn:
                # A server-side cursor: one statement only, and at most max_rows + 1 fetched.
                with psycopg.RawServerCursor(conn, "hushql_catalog_answer") as cur:
                    cur.execute(bounded(self._runnable(conn, personalise(sql_text, analyst)),
                                        self.max_bytes),
                                list(params))
                    described = list(cur.description or [])[:-1]
                    rows = [row[:-1] for row in cur.fetchmany(self.max_rows + 1)]
        finally:
            self._at_once.release()
        if len(rows) > self.max_rows:
            raise HushError(PROGRAM_LIMIT_EXCEEDED, "the catalog answer has more than "
                            f"{self.max_rows} rows", hint="Narrow the catalog query.")
        decoders = [_decoder(c.type_code) for c in described]
        values = [tuple(v if v is None or d is None else d(v) for v, d in zip(row, decoders))
                  for row in rows]
        return [(c.name, _column_type(c.type_code)) for c in described], values

    def describe(self, analyst: str, sql_text: str) -> list[tuple[str, int | str]]:
        """The columns a catalog SELECT would return, from the mirror's planner; runs
        nothing. Raises HushError like ``run``."""
        result = self._prepared(analyst, sql_text)
        return [(result.fname(i).decode(), _column_type(result.ftype(i)))
                for i in range(result.nfields)]

    def parameter_types(self, analyst: str, sql_text: str) -> list[int]:
        """The type OID of each $n as the mirror infers it (0 where it cannot tell); runs
        nothing. [] for a text without parameters. Raises HushError like ``run``."""
        if not any(t.kind == "param" for t in statements.tokenize(sql_text)):
            return []
        result = self._prepared(analyst, sql_text)
        return [result.param_type(i) for i in range(result.nparams)]

    def _prepared(self, analyst: str, sql_text: str) -> Any:
        """The mirror's description (a libpq result) of the checked text, prepared unnamed in
        the catalog transaction; raises HushError with the mirror's refusal."""
        with self._transaction(analyst, sql_text) as conn:
            result = conn.pgconn.prepare(
                b"", self._runnable(conn, personalise(sql_text, analyst)).encode())
            if result.status == ExecStatus.COMMAND_OK:
                result = conn.pgconn.describe_prepared(b"")
        if result.status != ExecStatus.COMMAND_OK:
            def field(code: DiagnosticField) -> str | None:
                value = result.error_field(code)
                return value.decode(errors="replace") if value else None
            raise self._error(field(DiagnosticField.SQLSTATE),
                              field(DiagnosticField.MESSAGE_PRIMARY),
                              field(DiagnosticField.MESSAGE_HINT))
        return result

    def _runnable(self, conn: psycopg.Connection[Any], sql_text: str) -> str:
        """The checked text as the mirror runs it: pg_database narrowed to one row."""
        if not own_database.names_pg_database(sql_text):
            return sql_text
        if self._database_columns is None:
            self._database_columns = [row[0] for row in conn.execute(own_database.COLUMNS_QUERY)]
        subquery = own_database.own_database_subquery(self._database_columns, self.database)
        return own_database.replace_pg_database(sql_text, subquery)

    @contextmanager
    def _transaction(self, analyst: str, sql_text: str) -> Iterator[psycopg.Connection[Any]]:
        """A mirror connection inside the catalog transaction: READ ONLY, the statement and
        lock timeouts, the unprivileged role; rolled back afterwards, whatever happens. The
        text is checked first; mirror errors become HushErrors."""
        try:
            with self._pool_for(analyst, sql_text).connection() as conn:
                try:
                    conn.execute(sql.SQL(
                        "SET LOCAL statement_timeout = {}; SET LOCAL lock_timeout = {}; "
                        "SET LOCAL ROLE {}").format(sql.Literal(f"{self.timeout_ms}ms"),
                                                    sql.Literal(f"{self.timeout_ms}ms"),
                                                    sql.Identifier(ROLE)))
                    yield conn
                finally:
                    _end(conn)
        except psycopg.Error as error:  # includes the pool's timeouts
            raise self._error(error.sqlstate, error.diag.message_primary,
                              error.diag.message_hint) from None

    def _error(self, state: str | None, message: str | None, hint: str | None) -> HushError:
        """A mirror error for the client: its SQLSTATE and message where they can only be
        about the query itself (syntax, names, privileges, bad input), else a generic line.
        No row of data can be in them: the mirror has none."""
        state = state or INTERNAL_ERROR
        if _TOO_LARGE in (message or ""):
            return HushError(PROGRAM_LIMIT_EXCEEDED, f"the catalog answer is larger than "
                             f"{self.max_bytes} bytes", hint="Narrow the catalog query.")
        if state == QUERY_CANCELED:
            return HushError(QUERY_CANCELED, "canceling statement due to statement timeout",
                             hint=f"Catalog questions must finish within {self.timeout_ms} ms.")
        if state[:2] in _QUERY_ERROR_CLASSES:
            return HushError(state, message or "the catalog query failed", hint=hint)
        return HushError(state if state[:2] == "53" else INTERNAL_ERROR,
                         "the catalog query failed", hint=CATALOG_HINT)

    def _pool_for(self, analyst: str, sql_text: str) -> ConnectionPool:
        """The mirror pool for this analyst, once the text has passed the checks."""
        if self.unavailable is not None:
            raise HushError(FEATURE_NOT_SUPPORTED, "catalog queries are not available on this "
                            "server", hint=self.unavailable)
        try:
            check_catalog_text(sql_text)
        except HushError as err:
            # By SQLSTATE only: the message can quote a literal of the query.
            log.info("catalog refused analyst=%s sqlstate=%s", analyst[:64], err.sqlstate)
            raise
        database = self.mirrors.get(analyst)
        if database is None:
            raise HushError(INSUFFICIENT_PRIVILEGE, f'no catalog for account "{analyst}"')
        with self._lock:
            pool = self._pools.get(database)
            if pool is None:
                # check: a mirror rebuilt by another proxy drops its connections.
                pool = ConnectionPool(with_database(self.admin_dsn, database), min_size=1,
                                      max_size=POOL_SIZE, open=False, configure=_configure,
                                      check=ConnectionPool.check_connection,
                                      name=f"hushql-catalog-{database[-12:]}")
                try:
                    pool.open(wait=True, timeout=10)
                except psycopg.Error:
                    pool.close()
                    raise
                self._pools[database] = pool
        return pool

    # ---- lifetime ------------------------------------------------------------------------

    def close(self) -> None:
        """Closes the mirror pools (the mirrors stay for the next start)."""
        with self._lock:
            pools, self._pools = list(self._pools.values()), {}
        for pool in pools:
            pool.close()

    def drop_mirrors(self) -> None:
        """Closes the pools and drops this catalog's mirror databases (tests, uninstall)."""
        self.close()
        if not self.admin_dsn:
            return
        with psycopg.connect(self.admin_dsn, autocommit=True) as admin:
            for database in sorted(set(self.mirrors.values())):
                admin.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(
                    sql.Identifier(database)))


def _end(conn: psycopg.Connection[Any]) -> None:
    """Rolls the catalog query's transaction back (settings and role with it). A broken
    connection is left for the pool to discard."""
    try:
        conn.rollback()
    except psycopg.Error:
        pass


def _configure(conn: psycopg.Connection[Any]) -> None:
    """Each mirror connection: read-only transactions, PostgreSQL's text for every result
    value, ISO date style (so psycopg's loaders read the few native types back)."""
    conn.autocommit = True
    # standard_conforming_strings on: the text checks read strings as the server will.
    conn.execute("SET standard_conforming_strings = on; SET datestyle = 'ISO, MDY'; "
                 "SET intervalstyle = 'postgres'; SET extra_float_digits = 3; "
                 "SET bytea_output = 'hex'")
    conn.autocommit = False
    conn.read_only = True
    conn.prepare_threshold = None  # nothing of one query outlives its transaction
    for oid in _ALL_OIDS:
        conn.adapters.register_loader(oid, TextLoader)


def build_catalog(policies: Policies, backend_dsn: str) -> Catalog:
    """The catalog for these policies: builds or reuses one mirror per distinct grant set on
    the backend's server, and the unprivileged role. Never raises for a server that will not
    allow it: the catalog is then unavailable (logged) and refuses catalog queries."""
    try:
        with psycopg.connect(backend_dsn, autocommit=True, connect_timeout=10) as admin:
            database = admin.execute("SELECT current_database()").fetchone()[0]  # type: ignore[index]
            _ensure_role(admin)
            grants: dict[str, tuple[str, ...]] = {
                name: tuple(sorted(set(a.tables))) for name, a in policies.analysts.items()}
            grants.update({name: () for name in policies.admins})
            names: dict[tuple[str, ...], str] = {}
            for tables in sorted(set(grants.values())):
                layout = mirror_layout(policies, tables)
                names[tables] = mirror_name(database, layout)
                _create_mirror(admin, backend_dsn, names[tables], layout)
    except CatalogSetupError as err:
        log.warning("catalog mirror unavailable: %s; catalog queries will be refused", err)
        return Catalog(policies, unavailable=f"Ask the administrator: {err}.")
    except psycopg.Error as err:
        log.warning("catalog mirror unavailable (%s); catalog queries will be refused",
                    type(err).__name__)
        return Catalog(policies, unavailable="Ask the administrator to check the catalog "
                                             "mirror (see the server log).")
    log.info("catalog mirrors ready: %d for %d accounts", len(names), len(grants))
    return Catalog(policies, admin_dsn=backend_dsn, database=database,
                   mirrors={account: names[tables] for account, tables in grants.items()})
