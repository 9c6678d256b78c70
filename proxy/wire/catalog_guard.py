"""The catalog's guard: which catalog SQL is allowed and how it is rewritten, as pure functions
over text and trees (no I/O). The session imports only this part of the catalog;
proxy.wire.catalog provisions the mirrors and runs the checked text.

Rules:

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
  relation, ``hushql.my_tables`` (proxy.wire.askable), a CTE or a function; any policy table name (``SELECT * FROM households LIMIT 0``)
  sends the query to the engine, which refuses raw rows. Because a mirror holds no rows, a
  routing mistake can reveal no data; the checks guard the server.
"""

from __future__ import annotations

from typing import Iterable, Sequence

from sqlglot import exp

from proxy import __version__
from proxy.errors import FEATURE_NOT_SUPPORTED, INSUFFICIENT_PRIVILEGE, HushError
from proxy.wire import askable, own_database, settings, statements
from proxy.wire.statements import Token

__all__ = ["check_catalog_text", "is_catalog_tree", "claims_text", "looks_like_catalog",
           "personalise", "bounded", "narrowed", "CATALOG_HINT", "VERSION_STRING"]

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
    # SQLAlchemy's table reflection compares each table's access method with the default.
    "default_table_access_method",
})
WRITABLE_SETTINGS = frozenset({"search_path", "application_name", "datestyle", "intervalstyle",
                               "extra_float_digits", "bytea_output", "client_min_messages",
                               "jit"})
_SETTING_FUNCTIONS = {"current_setting": READABLE_SETTINGS, "set_config": WRITABLE_SETTINGS}

# Server-wide relations clients read, answered only in part: each reference is replaced (by
# proxy.wire.own_database's rules) with a subquery keeping the rows a client needs. JDBC's
# key queries read max_index_keys from pg_settings; SQLAlchemy's reflection joins
# pg_tablespace for a table's tablespace (the mirror's tables are in pg_default). The
# settings are the readable ones the proxy does not answer itself (its version is told, not
# the server's); the catalog role reads no file names (sourcefile is NULL for roles outside
# pg_read_all_settings, PostgreSQL documentation, "pg_settings").
NARROWED_RELATIONS: dict[str, str] = {
    "pg_settings": "(SELECT * FROM pg_catalog.pg_settings WHERE name IN ({}))",
    "pg_tablespace": "(SELECT * FROM pg_catalog.pg_tablespace "
                     "WHERE spcname IN ('pg_default', 'pg_global'))",
}

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


def check_catalog_text(text: str, params: Sequence[object] | None = None) -> None:
    """Raises HushError (42501, 0A000, 42601) unless ``text`` is one catalog SELECT whose every
    function call and ``pg_*`` name is allowed. Reads the text as PostgreSQL will. A setting
    name given as a parameter is checked against ``params`` (the values it will run with);
    None means the text is only prepared or described, which evaluates nothing."""
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
            _check_call(tokens, i, name, params)
        elif _after_as(tokens, i):
            continue  # an alias of the query's own: "... AS pg_get_expr_1"
        elif name.startswith("pg_") and name not in ("pg_catalog", own_database.RELATION) \
                and name not in ALLOWED_RELATIONS and name not in NARROWED_RELATIONS:
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


def _check_call(tokens: Sequence[Token], i: int, name: str,
                params: Sequence[object] | None) -> None:
    """Raises unless the call at i is to an allowed function, unqualified or qualified by a
    catalog schema, with a listed setting name where it takes one: a literal, or a parameter
    whose value (when it has one) is listed; either may carry a ``::type`` cast."""
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
        after = i + 3
        if _is_op(_at(tokens, after), ":") and _is_op(_at(tokens, after + 1), ":") \
                and _at(tokens, after + 2) is not None \
                and _at(tokens, after + 2).kind in ("word", "ident"):  # type: ignore[union-attr]
            after += 3
        end = _at(tokens, after)
        value: object = arg.value if arg is not None and arg.kind == "string" else None
        if arg is not None and arg.kind == "param" and params is not None:
            index = int(arg.value) - 1
            value = params[index] if 0 <= index < len(params) else None
        listed = (arg is not None and arg.kind == "param" and params is None) or (
            isinstance(value, str) and value.lower() in allowed_settings)
        if not listed or not (_is_op(end, ",") or _is_op(end, ")")):
            shown = value[:40] if isinstance(value, str) else "that setting"
            raise _refuse(f"{name} of {shown}")


def _at(tokens: Sequence[Token], i: int) -> Token | None:
    return tokens[i] if 0 <= i < len(tokens) else None


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
        if (schema, name) == (askable.SCHEMA, askable.RELATION):
            continue  # the analyst's own policy facts (proxy.wire.askable)
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


def narrowed(text: str) -> str:
    """``text`` with every reference to a ``NARROWED_RELATIONS`` relation replaced by its
    subquery. Runs on checked text."""
    told = sorted(READABLE_SETTINGS - set(_TOLD_SETTINGS))
    for relation, subquery in NARROWED_RELATIONS.items():
        if own_database.names_pg_database(text, relation):
            body = subquery.format(", ".join(f"'{name}'" for name in told))
            text = own_database.replace_pg_database(text, body, relation)
    return text


def _is_word_or_ident(tok: Token, value: str) -> bool:
    return tok.kind in ("word", "ident") and tok.value.lower() == value


# The running total of the answer's text size, and the error that stops it (a cast that
# cannot succeed, built from the row so that the planner cannot fold it in advance).
_SIZE_COLUMN = "hushql_answer_bytes"
TOO_LARGE_MARK = "bytes: hushql catalog answer too large"


def bounded(text: str, most_bytes: int) -> str:
    """The query wrapped so that the mirror fails it, before sending the row that brings the
    answer's text above ``most_bytes``; the wrapper adds one last column (the running size)
    that ``Catalog.run`` drops. Rows keep their order: the window has no ORDER BY of its own
    and PostgreSQL keeps the subquery's order through it."""
    return (f"SELECT w.* FROM (SELECT q.*, sum(octet_length(q::text)) OVER (ROWS UNBOUNDED "
            f"PRECEDING) AS {_SIZE_COLUMN} FROM (\n{text}\n) AS q) AS w WHERE CASE WHEN "
            f"w.{_SIZE_COLUMN} > {int(most_bytes)} THEN (w.{_SIZE_COLUMN}::text || "
            f"' {TOO_LARGE_MARK}')::int > 0 ELSE true END")


# ----------------------------------------------------------------------------- without a catalog

# Functions and schemas that mark a query about the catalog rather than the data.
_IDENTIFYING_FUNCTIONS = frozenset({
    "version", "current_schema", "current_schemas", "current_database", "current_catalog",
    "current_user", "session_user", "current_setting", "set_config", "format_type",
    "obj_description", "col_description", "has_table_privilege", "has_schema_privilege",
    "to_regclass"})


def looks_like_catalog(tree: exp.Expression) -> bool:
    """Whether a query reads catalog relations or catalog functions (used when no catalog
    is plugged in, so such queries get a clear refusal)."""
    for table in tree.find_all(exp.Table):
        if table.db.lower() in CATALOG_SCHEMAS or table.name.lower().startswith("pg_"):
            return True
    for func in tree.find_all(exp.Func):
        name = (func.name if isinstance(func, exp.Anonymous) else func.sql_name()).lower()
        if name in _IDENTIFYING_FUNCTIONS or name.startswith("pg_"):
            return True
    return isinstance(tree, exp.Select) and any(
        isinstance(n, (exp.CurrentUser, exp.CurrentSchema)) for n in tree.walk())
