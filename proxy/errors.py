"""The one error type that may reach an analyst.

Everything the proxy refuses or fails at becomes a ``HushError`` carrying a SQLSTATE, a message
that says what was refused and a hint that says what would be accepted. Anything else raised
inside the proxy is a bug: the fronts turn it into an opaque internal error (XX000) and never
show its text, path or traceback.
"""

from __future__ import annotations

# SQLSTATE codes used by the proxy (PostgreSQL Appendix A, "PostgreSQL Error Codes").
SYNTAX_ERROR = "42601"
FEATURE_NOT_SUPPORTED = "0A000"
UNDEFINED_TABLE = "42P01"
UNDEFINED_COLUMN = "42703"
UNDEFINED_FUNCTION = "42883"
INSUFFICIENT_PRIVILEGE = "42501"
INVALID_PASSWORD = "28P01"
INVALID_PARAMETER_VALUE = "22023"
PROGRAM_LIMIT_EXCEEDED = "54000"
STATEMENT_TOO_COMPLEX = "54001"
TOO_MANY_ARGUMENTS = "54023"
BUDGET_EXHAUSTED = "53400"  # configuration_limit_exceeded: the analyst's or table's budget is spent
QUERY_CANCELED = "57014"
PROTOCOL_VIOLATION = "08P01"
INTERNAL_ERROR = "XX000"
UNDEFINED_OBJECT = "42704"
CANT_CHANGE_RUNTIME_PARAM = "55P02"
INVALID_SQL_STATEMENT_NAME = "26000"
INVALID_CURSOR_NAME = "34000"
DUPLICATE_PREPARED_STATEMENT = "42P05"
DUPLICATE_CURSOR = "42P03"
TOO_MANY_CONNECTIONS = "53300"
INVALID_AUTHORIZATION = "28000"
SUCCESSFUL_COMPLETION = "00000"  # the code a NOTICE carries
CONNECTION_FAILURE = "08006"  # the backend or ledger database went away; nothing was run
CANNOT_CONNECT = "08001"  # sqlclient_unable_to_establish_sqlconnection
CONFIG_FILE_ERROR = "F0000"
ADMIN_SHUTDOWN = "57P01"
INVALID_SAVEPOINT = "3B001"  # invalid_savepoint_specification
UNDEFINED_PARAMETER = "42P02"
INVALID_COLUMN_REFERENCE = "42P10"
AMBIGUOUS_COLUMN = "42702"
DUPLICATE_ALIAS = "42712"
DATATYPE_MISMATCH = "42804"
GROUPING_ERROR = "42803"
INVALID_LIMIT = "2201W"  # invalid_row_count_in_limit_clause
INVALID_OFFSET = "2201X"  # invalid_row_count_in_result_offset_clause
INVALID_TEXT_REPRESENTATION = "22P02"
NUMERIC_VALUE_OUT_OF_RANGE = "22003"
INVALID_BINARY_REPRESENTATION = "22P03"
CHARACTER_NOT_IN_REPERTOIRE = "22021"
ACTIVE_SQL_TRANSACTION = "25001"
NO_ACTIVE_SQL_TRANSACTION = "25P01"
IN_FAILED_SQL_TRANSACTION = "25P02"


class HushError(Exception):
    """An error meant for the analyst: SQLSTATE, message, and a hint saying what is accepted."""

    def __init__(self, sqlstate: str, message: str, hint: str | None = None,
                 detail: str | None = None) -> None:
        super().__init__(message)
        self.sqlstate = sqlstate
        self.message = message
        self.hint = hint
        self.detail = detail

    def __repr__(self) -> str:
        return f"HushError({self.sqlstate!r}, {self.message!r})"


def refused(message: str, hint: str) -> HushError:
    """A query shape the proxy cannot bound (0A000)."""
    return HushError(FEATURE_NOT_SUPPORTED, message, hint)
