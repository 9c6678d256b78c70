"""Session settings a client may SET, SHOW and RESET, as one table.

Each entry says how a value is checked and normalised, its default, whether it is read-only,
and whether a change is reported to the client with ParameterStatus (the settings PostgreSQL
reports; clients such as JDBC and libpq read them). hushql only remembers most of them so that
ordinary client start-up sequences succeed; none of them reaches the backend database. The
privacy settings (``hushql.epsilon``) are validated against the policies, in the session.

Time limits (``NOT_APPLIED``) are accepted, remembered and shown, but never applied: a query
runs under the proxy's own time limit (access.toml ``[limits] query_timeout_ms``), because a
deadline the analyst chooses turns "answered or cancelled" into a measurement of how long the
backend took on the data. Setting one draws a NOTICE saying so.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Callable, Mapping

from proxy.errors import (CANT_CHANGE_RUNTIME_PARAM, INVALID_PARAMETER_VALUE, UNDEFINED_OBJECT,
                          HushError)

# What clients are told about the server. libpq, asyncpg and JDBC all read the leading
# "major.minor" of server_version; the suffix names the proxy (common practice for forks).
SERVER_VERSION = "15.0 (hushql)"
SERVER_VERSION_NUM = "150000"

EPSILON = "hushql.epsilon"
REMAINING = "hushql.remaining"
FRESH = "hushql.fresh"
ACCURACY_COLUMNS = "hushql.accuracy_columns"


def _bad(name: str, value: str, hint: str) -> HushError:
    return HushError(INVALID_PARAMETER_VALUE,
                     f'invalid value for parameter "{name}": "{value}"', hint=hint)


def _choice(*allowed: str, canonical: Mapping[str, str] | None = None) -> Callable[[str, str], str]:
    table = {a.lower(): a for a in allowed}
    table.update({k.lower(): v for k, v in (canonical or {}).items()})

    def check(name: str, value: str) -> str:
        v = table.get(value.strip().lower())
        if v is None:
            raise _bad(name, value, "Accepted values: " + ", ".join(allowed) + ".")
        return v
    return check


def _boolean(name: str, value: str) -> str:
    v = value.strip().lower()
    if v in ("on", "true", "yes", "1", "t", "y"):
        return "on"
    if v in ("off", "false", "no", "0", "f", "n"):
        return "off"
    raise _bad(name, value, "Use on or off.")


def _only_on(name: str, value: str) -> str:
    if _boolean(name, value) != "on":
        raise _bad(name, value, f"hushql only works with {name} on.")
    return "on"


def _any_text(name: str, value: str) -> str:
    if len(value) > 1000 or any(ord(c) < 32 for c in value):
        raise _bad(name, value[:40], "Use printable text under 1000 characters.")
    return value


def _application_name(name: str, value: str) -> str:
    # PostgreSQL keeps 63 bytes (NAMEDATALEN - 1, value from memory) of printable ASCII.
    cleaned = "".join(c if 32 <= ord(c) < 127 else "?" for c in value)
    return cleaned.encode("ascii")[:63].decode("ascii")


def _client_encoding(name: str, value: str) -> str:
    # PostgreSQL compares encoding names with everything but letters and digits removed
    # (asyncpg sends 'utf-8' with its quotes).
    if "".join(c for c in value.lower() if c.isalnum()) in ("utf8", "unicode"):
        return "UTF8"
    raise _bad(name, value, "hushql speaks UTF8 only; set client_encoding to UTF8.")


def _datestyle(name: str, value: str, current: str = "ISO, MDY") -> str:
    style, order = "ISO", current.split(",")[-1].strip()
    for part in (p.strip().upper() for p in value.split(",")):
        if part in ("ISO",):
            style = "ISO"
        elif part in ("MDY", "DMY", "YMD", "US", "NONEURO", "NONEUROPEAN"):
            order = "MDY" if part in ("US", "NONEURO", "NONEUROPEAN") else part
        elif part in ("EURO", "EUROPEAN"):
            order = "DMY"
        elif part == "DEFAULT":
            style, order = "ISO", "MDY"
        else:
            raise _bad(name, value, "hushql writes dates in ISO style only: use ISO, MDY.")
    return f"{style}, {order}"


_OFFSET = re.compile(r"^[+-]?\d{1,2}(:\d{2}(:\d{2})?)?$")


def _timezone(name: str, value: str) -> str:
    v = value.strip()
    if not v or len(v) > 63:
        raise _bad(name, value[:40], "Use a time zone name such as UTC or Europe/Berlin.")
    if _OFFSET.match(v) or v.upper() in ("UTC", "GMT", "Z"):
        return v
    try:
        import zoneinfo
        zoneinfo.ZoneInfo(v)
    except Exception:
        raise _bad(name, value, "Use a time zone name such as UTC or Europe/Berlin.") from None
    return v


_UNITS_MS = {"ms": 1, "s": 1000, "min": 60_000, "h": 3_600_000, "d": 86_400_000}
_DURATION = re.compile(r"^\s*(\d{1,12})\s*(ms|s|min|h|d)?\s*$", re.IGNORECASE)


def parse_duration_ms(value: str) -> int:
    """Milliseconds in a duration setting ('5000', '5s', '1min'); raises ValueError."""
    m = _DURATION.match(value)
    if not m:
        raise ValueError(value)
    return int(m.group(1)) * _UNITS_MS[(m.group(2) or "ms").lower()]


def _duration(name: str, value: str) -> str:
    try:
        ms = parse_duration_ms(value)
    except ValueError:
        raise _bad(name, value, "Use a whole number of milliseconds, or with a unit: "
                                "ms, s, min, h, d.") from None
    if ms == 0:
        return "0"
    for unit in ("d", "h", "min", "s"):
        if ms % _UNITS_MS[unit] == 0:
            return f"{ms // _UNITS_MS[unit]}{unit}"
    return f"{ms}ms"


def _extra_float_digits(name: str, value: str) -> str:
    try:
        n = int(value.strip())
    except ValueError:
        raise _bad(name, value, "Use a whole number from -15 to 3.") from None
    if not -15 <= n <= 3:
        raise _bad(name, value, "Use a whole number from -15 to 3.")
    return str(n)


_ISOLATION = ("read uncommitted", "read committed", "repeatable read", "serializable")


@dataclass(frozen=True)
class Setting:
    """One row of the settings table."""

    name: str  # as shown to clients (PostgreSQL's spelling, e.g. "DateStyle")
    default: str
    check: Callable[[str, str], str] | None  # None: read-only
    reported: bool = False
    description: str = ""


SETTINGS: Mapping[str, Setting] = {s.name.lower(): s for s in (
    Setting("server_version", SERVER_VERSION, None, True, "Version this server reports."),
    Setting("server_version_num", SERVER_VERSION_NUM, None, False, "Version as a number."),
    Setting("server_encoding", "UTF8", None, True, "Encoding of text on the server."),
    Setting("client_encoding", "UTF8", _client_encoding, True, "Encoding of text sent."),
    Setting("DateStyle", "ISO, MDY", _datestyle, True, "How dates are written."),
    Setting("IntervalStyle", "postgres",
            _choice("postgres", "postgres_verbose", "sql_standard", "iso_8601"), True,
            "How intervals are written."),
    Setting("TimeZone", "UTC", _timezone, True, "Time zone of the session."),
    Setting("integer_datetimes", "on", None, True, "Dates and times are integers."),
    Setting("standard_conforming_strings", "on", _only_on, True,
            "Backslashes in ordinary string literals are literal."),
    Setting("application_name", "", _application_name, True, "Name of the client program."),
    Setting("is_superuser", "off", None, True, "Whether the session is a superuser."),
    Setting("session_authorization", "", None, True, "The connected account."),
    Setting("default_transaction_read_only", "on", _boolean, True,
            "hushql never writes; reported for clients that check."),
    Setting("in_hot_standby", "off", None, True, "Whether the server is a standby."),
    Setting("extra_float_digits", "1", _extra_float_digits, False,
            "Digits of floating-point output."),
    Setting("search_path", '"$user", public', _any_text, False, "Schema search order."),
    Setting("statement_timeout", "0", _duration, False,
            "Accepted, not applied: answers run under the proxy's own time limit."),
    Setting("lock_timeout", "0", _duration, False,
            "Accepted, not applied: answers run under the proxy's own time limit."),
    Setting("idle_in_transaction_session_timeout", "0", _duration, False,
            "Accepted, not applied: answers run under the proxy's own time limit."),
    Setting("transaction_isolation", "read committed", _choice(*_ISOLATION), False,
            "Accepted for compatibility: answers are not transactional."),
    Setting("default_transaction_isolation", "read committed", _choice(*_ISOLATION), False,
            "Accepted for compatibility."),
    Setting("transaction_read_only", "on", _boolean, False, "hushql never writes."),
    Setting("bytea_output", "hex", _choice("hex", "escape"), False, "How bytea is written."),
    Setting("max_identifier_length", "63", None, False, "Longest identifier."),
    Setting("lc_messages", "C", _any_text, False, "Language of messages (English only)."),
    Setting("lc_monetary", "C", _any_text, False, "Accepted for compatibility."),
    Setting("lc_numeric", "C", _any_text, False, "Accepted for compatibility."),
    Setting("lc_time", "C", _any_text, False, "Accepted for compatibility."),
    Setting("client_min_messages", "notice",
            _choice("debug5", "debug4", "debug3", "debug2", "debug1", "log", "notice",
                    "warning", "error"), False, "Accepted; hushql's notices are always sent."),
    Setting("row_security", "on", _boolean, False, "Accepted for compatibility."),
    Setting("jit", "off", _boolean, False, "Accepted for compatibility."),
    Setting(EPSILON, "", None, False, "Epsilon charged per query (policy default if unset)."),
    Setting(REMAINING, "", None, False, "Epsilon left in this analyst's budget."),
    Setting(FRESH, "off", _boolean, False,
            "on: pay for a new answer even to a question answered before (new noise, the data "
            "as it is now); off: the stored answer is given again for nothing."),
    Setting(ACCURACY_COLUMNS, "off", _boolean, False,
            "on: each aggregate column is followed by a <name>_margin95 column holding its "
            "95% margin of error."),
)}

# Time limits a client may set but that never apply (see the module docstring).
NOT_APPLIED = frozenset({"statement_timeout", "lock_timeout",
                         "idle_in_transaction_session_timeout"})
NOT_APPLIED_HINT = ("Answers run under the proxy's own time limit, the same for every analyst, "
                    "so that whether a query finishes in time says nothing about the data.")

# SHOW accepts a few multi-word spellings of the same settings (SQL standard forms).
ALIASES: Mapping[str, str] = {
    "time zone": "timezone",
    "transaction isolation level": "transaction_isolation",
    "session authorization": "session_authorization",
}


def lookup(name: str) -> Setting:
    """The table row for a setting name (any case); raises HushError 42704 if unknown."""
    key = ALIASES.get(name.lower(), name.lower())
    setting = SETTINGS.get(key)
    if setting is None:
        raise HushError(UNDEFINED_OBJECT, f'unrecognized configuration parameter "{name}"',
                        hint="SHOW ALL lists the settings hushql knows.")
    return setting


def normalise(name: str, value: str, current: str | None = None) -> str:
    """A checked, canonical value for a non-privacy setting; raises HushError (22023/55P02)."""
    setting = lookup(name)
    if setting.check is None:
        raise HushError(CANT_CHANGE_RUNTIME_PARAM,
                        f'parameter "{setting.name}" cannot be changed',
                        hint="This setting is fixed by the server; SHOW ALL lists the others.")
    if setting.check is _datestyle and current is not None:
        return _datestyle(setting.name, value, current)
    return setting.check(setting.name, value)
