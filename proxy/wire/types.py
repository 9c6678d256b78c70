"""Type OIDs, and values to and from their wire forms, text or binary.

Encoding and decoding go through psycopg's adapters (``psycopg.adapt.Transformer()`` with no
connection: dumpers and loaders by type OID), so hushql does not hand-pack PostgreSQL formats.
This module adds only what the adapters do not do for a server: checking that binary parameter
data has the size its type requires, PostgreSQL's spellings where psycopg's text differs
(non-finite floats, numerics without exponents, booleans in all accepted spellings), and turning
a decoded parameter into a sqlglot literal node.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass
from decimal import Decimal
from typing import Any, Callable, Sequence

import psycopg
from psycopg.adapt import Transformer
from psycopg.pq import Format
from sqlglot import exp

from proxy.errors import (CHARACTER_NOT_IN_REPERTOIRE, FEATURE_NOT_SUPPORTED,
                          INVALID_BINARY_REPRESENTATION, INVALID_PARAMETER_VALUE,
                          INVALID_TEXT_REPRESENTATION, NUMERIC_VALUE_OUT_OF_RANGE,
                          PROTOCOL_VIOLATION, HushError)
from proxy.wire import codec

# Type OIDs (pg_type.dat of PostgreSQL; these are fixed across versions).
UNKNOWN = 0
BOOL = 16
NAME = 19
INT8 = 20
INT2 = 21
INT4 = 23
TEXT = 25
OID = 26
FLOAT4 = 700
FLOAT8 = 701
UNKNOWN_LITERAL = 705
BPCHAR = 1042
VARCHAR = 1043
DATE = 1082
TIME = 1083
TIMESTAMP = 1114
TIMESTAMPTZ = 1184
NUMERIC = 1700
JSON = 114

TEXT_FORMAT = 0
BINARY_FORMAT = 1

# typlen of fixed-size types (pg_type.dat); everything else is variable (-1).
_SIZES = {BOOL: 1, NAME: 64, INT8: 8, INT2: 2, INT4: 4, OID: 4, FLOAT4: 4, FLOAT8: 8, DATE: 4,
          TIME: 8, TIMESTAMP: 8, TIMESTAMPTZ: 8}
# Binary parameters of these types must have exactly this many bytes.
_BINARY_SIZES = {k: v for k, v in _SIZES.items() if k != NAME}

# Parameter types hushql accepts from clients: those that become plain SQL literals.
PARAMETER_OIDS = frozenset({UNKNOWN, UNKNOWN_LITERAL, BOOL, NAME, INT8, INT2, INT4, TEXT, OID,
                            FLOAT4, FLOAT8, BPCHAR, VARCHAR, DATE, TIME, TIMESTAMP, TIMESTAMPTZ,
                            NUMERIC})
_TEXTUAL = frozenset({UNKNOWN, UNKNOWN_LITERAL, TEXT, NAME, BPCHAR, VARCHAR})

_ADAPTERS = Transformer().adapters
_REGISTRY = psycopg.postgres.types


@dataclass(frozen=True, slots=True)
class WireType:
    """How one result column travels: its OID, size, and whether values go as str()."""

    oid: int
    size: int = -1
    as_text: bool = False  # no psycopg dumper for the real type: sent as text (OID 25)


def _has_dumpers(oid: int) -> bool:
    try:
        _ADAPTERS.get_dumper_by_oid(oid, Format.TEXT)
        _ADAPTERS.get_dumper_by_oid(oid, Format.BINARY)
    except psycopg.ProgrammingError:
        return False
    return True


def oid_of(type_: str | int) -> int | None:
    """The OID of a PostgreSQL type name ('bigint', 'double precision', 'text[]') or OID."""
    if isinstance(type_, int):
        return type_
    name = type_.strip().lower()
    array = name.endswith("[]")
    info = _REGISTRY.get(name[:-2] if array else name)
    if info is None:
        return None
    return info.array_oid if array else info.oid


def wire_type(type_: str | int) -> WireType:
    """The wire form of a column type; types psycopg cannot encode travel as text."""
    oid = oid_of(type_)
    if oid is None or not _has_dumpers(oid):
        return WireType(TEXT, -1, as_text=True)
    return WireType(oid, _SIZES.get(oid, -1))


# --------------------------------------------------------------------------- result values


def _as_int(v: Any) -> int:
    if isinstance(v, int):
        return int(v)
    if isinstance(v, (Decimal, float)) and v == v and v == int(v):
        return int(v)
    raise TypeError("not an integer")


def _as_decimal(v: Any) -> Decimal:
    if isinstance(v, Decimal):
        return v
    if isinstance(v, bool):
        raise TypeError("not a number")
    if isinstance(v, int):
        return Decimal(v)
    if isinstance(v, float):
        return Decimal(repr(v))
    raise TypeError("not a number")


def _as_float(v: Any) -> float:
    if isinstance(v, (float, int, Decimal)) and not isinstance(v, bool):
        return float(v)
    raise TypeError("not a number")


def _as_bool(v: Any) -> bool:
    if isinstance(v, bool):
        return v
    raise TypeError("not a boolean")


def _as_date(v: Any) -> dt.date:
    if isinstance(v, dt.date) and not isinstance(v, dt.datetime):
        return v
    raise TypeError("not a date")


def _as_str(v: Any) -> str:
    return v if isinstance(v, str) else str(v)


# Values of the proxy's own column types are checked before encoding: a mismatch is a bug and
# must fail, not travel as something a client misreads.
_COERCE: dict[int, Callable[[Any], Any]] = {
    INT8: _as_int, INT4: _as_int, INT2: _as_int, NUMERIC: _as_decimal, FLOAT8: _as_float,
    FLOAT4: _as_float, BOOL: _as_bool, DATE: _as_date, TEXT: _as_str, VARCHAR: _as_str,
    NAME: _as_str, JSON: _as_str,
}


def _float_text(v: float) -> bytes:
    # PostgreSQL spells non-finite floats Infinity, -Infinity, NaN (float8out).
    if math.isnan(v):
        return b"NaN"
    if math.isinf(v):
        return b"Infinity" if v > 0 else b"-Infinity"
    return repr(v).encode("ascii")


def _numeric_text(v: Decimal) -> bytes:
    # numeric_out never uses exponents; Decimal's str() can ('1E+5').
    if v.is_nan():
        return b"NaN"
    if v.is_infinite():
        return b"Infinity" if v > 0 else b"-Infinity"
    return format(v, "f").encode("ascii")


_TEXT_OVERRIDES: dict[int, Callable[[Any], bytes]] = {FLOAT8: _float_text, FLOAT4: _float_text,
                                                      NUMERIC: _numeric_text}


def _json_text(v: str) -> bytes:
    # A json value travels as its text in both formats (PostgreSQL's json_send sends the text
    # as is: from memory of src/backend/utils/adt/json.c; jsonb alone adds a version byte);
    # psycopg's json dumper would encode a str as a JSON string instead.
    return v.encode("utf-8")


_ANY_FORMAT_OVERRIDES: dict[int, Callable[[Any], bytes]] = {JSON: _json_text}


class ColumnEncoder:
    """Encodes the values of one result column in one format, via psycopg's dumpers."""

    __slots__ = ("_coerce", "_override", "_oid", "_format", "_dumpers")

    def __init__(self, wtype: WireType, fmt: int) -> None:
        self._oid = TEXT if wtype.as_text else wtype.oid
        self._coerce = _as_str if wtype.as_text else _COERCE.get(wtype.oid)
        self._format = Format.BINARY if fmt == BINARY_FORMAT else Format.TEXT
        self._override = _ANY_FORMAT_OVERRIDES.get(self._oid) or (
            _TEXT_OVERRIDES.get(self._oid) if fmt == TEXT_FORMAT else None)
        self._dumpers: dict[type, Any] = {}

    def encode(self, value: Any) -> bytes | None:
        """The wire bytes of one value (None for NULL); raises on a value of the wrong type."""
        if value is None:
            return None
        if self._coerce is not None:
            value = self._coerce(value)
        if self._override is not None:
            return self._override(value)
        cls = type(value)
        dumper = self._dumpers.get(cls)
        if dumper is None:
            dumper = _ADAPTERS.get_dumper_by_oid(self._oid, self._format)(cls)
            self._dumpers[cls] = dumper
        return bytes(dumper.dump(value))


@dataclass(frozen=True)
class ResultShape:
    """The columns of a result: names and wire types, ready for RowDescription."""

    names: tuple[str, ...]
    types: tuple[WireType, ...]

    @classmethod
    def of(cls, columns: Sequence[Any]) -> "ResultShape":
        """From OutputColumn-like objects (.name, .type) or (name, type) pairs."""
        names, types = [], []
        for c in columns:
            name, type_ = (c.name, c.type) if hasattr(c, "name") else (c[0], c[1])
            names.append(str(name))
            types.append(wire_type(type_))
        return cls(tuple(names), tuple(types))

    def formats(self, result_formats: Sequence[int]) -> tuple[int, ...]:
        """Per-column formats from Bind's codes (none: all text; one: all alike; or one each).

        Raises HushError 08P01 when the count matches neither rule.
        """
        n = len(self.names)
        if not result_formats:
            return (TEXT_FORMAT,) * n
        if len(result_formats) == 1:
            return (result_formats[0],) * n
        if len(result_formats) != n:
            raise HushError(PROTOCOL_VIOLATION, f"bind message has {len(result_formats)} "
                            f"result formats but query has {n} columns")
        return tuple(result_formats)

    def description(self, formats: Sequence[int]) -> codec.RowDescription:
        return codec.RowDescription(tuple(
            codec.FieldDescription(name, t.oid if not t.as_text else TEXT, t.size, -1, f)
            for name, t, f in zip(self.names, self.types, formats)))

    def encoder(self, formats: Sequence[int]) -> "RowEncoder":
        return RowEncoder([ColumnEncoder(t, f) for t, f in zip(self.types, formats)])


class RowEncoder:
    """Turns result rows into DataRow bytes."""

    __slots__ = ("_columns",)

    def __init__(self, columns: list[ColumnEncoder]) -> None:
        self._columns = columns

    def encode(self, row: Sequence[Any]) -> bytes:
        """DataRow bytes; raises ValueError when the row has the wrong number of values."""
        if len(row) != len(self._columns):
            raise ValueError("row width does not match its description")
        return codec.encode_data_row([c.encode(v) for c, v in zip(self._columns, row)])


# --------------------------------------------------------------------------- parameters

def _text_bool(text: str) -> bool:
    """boolin's rules (PostgreSQL docs, "Boolean Type"): any prefix of true/false/yes/no,
    on/off from two letters ('of' is off, 'o' is ambiguous), 1 and 0."""
    t = text.strip().lower()
    if t in ("1", "0"):
        return t == "1"
    for word, result, shortest in (("true", True, 1), ("false", False, 1), ("yes", True, 1),
                                   ("no", False, 1), ("on", True, 2), ("off", False, 2)):
        if len(t) >= shortest and word.startswith(t):
            return result
    raise ValueError(text)


def type_name(oid: int) -> str:
    """A readable name of a type OID, for messages."""
    info = _REGISTRY.get(oid)
    return info.name if info is not None else f"oid {oid}"


def check_parameter_oid(oid: int, position: int) -> None:
    """Raises HushError 0A000 when parameters of this type cannot be accepted."""
    if oid not in PARAMETER_OIDS:
        raise HushError(FEATURE_NOT_SUPPORTED,
                        f"parameter ${position} has type {type_name(oid)}, which hushql does "
                        "not accept", hint="Send parameters as text, numbers, booleans, dates "
                        "or timestamps.")


def decode_parameter(data: bytes | None, oid: int, fmt: int, position: int) -> Any:
    """A Python value from one Bind parameter; raises HushError 22P02/22P03/22021/0A000.

    Untyped parameters (OID 0 or 705) are read as text, like an untyped literal in SQL.
    """
    check_parameter_oid(oid, position)
    if data is None:
        return None
    binary = fmt == BINARY_FORMAT
    if oid in _TEXTUAL:
        try:
            text = data.decode("utf-8")
        except UnicodeDecodeError:
            raise HushError(CHARACTER_NOT_IN_REPERTOIRE, "invalid byte sequence for encoding "
                            f'"UTF8" in parameter ${position}') from None
        if "\x00" in text:
            raise HushError(CHARACTER_NOT_IN_REPERTOIRE,
                            f'invalid byte sequence for encoding "UTF8": 0x00 in parameter '
                            f"${position}")
        return text
    if binary:
        size = _BINARY_SIZES.get(oid)
        if size is not None and len(data) != size:
            raise HushError(INVALID_BINARY_REPRESENTATION,
                            f"incorrect binary data format in bind parameter {position}")
    try:
        if not binary and oid == BOOL:
            return _text_bool(data.decode("ascii"))
        loader = _ADAPTERS.get_loader(oid, Format.BINARY if binary else Format.TEXT)
        if loader is None:
            raise ValueError("no loader")
        return _check_range(loader(oid).load(data), oid, position)
    except HushError:
        raise
    except Exception:
        if binary:
            raise HushError(INVALID_BINARY_REPRESENTATION,
                            f"incorrect binary data format in bind parameter {position}"
                            ) from None
        raise HushError(INVALID_TEXT_REPRESENTATION,
                        f"invalid input syntax for type {type_name(oid)} in parameter "
                        f"${position}") from None


# The values each declared numeric parameter type can hold, as PostgreSQL checks them on input
# (22003): two's-complement integers, and IEEE 754 binary32's largest finite value for real.
_RANGES: dict[int, tuple[int | float, int | float]] = {
    INT2: (-2**15, 2**15 - 1), INT4: (-2**31, 2**31 - 1), INT8: (-2**63, 2**63 - 1),
    FLOAT4: (-3.4028234663852886e38, 3.4028234663852886e38)}


def _check_range(value: Any, oid: int, position: int) -> Any:
    """``value`` when its declared type can hold it; HushError 22003 otherwise."""
    bounds = _RANGES.get(oid)
    if bounds is not None and isinstance(value, (int, float)) and not isinstance(value, bool) \
            and math.isfinite(value) and not bounds[0] <= value <= bounds[1]:
        raise HushError(NUMERIC_VALUE_OUT_OF_RANGE,
                        f"parameter ${position} is out of range for type {type_name(oid)}")
    return value


def _number(text: str, negative: bool) -> exp.Expression:
    lit = exp.Literal.number(text)
    return exp.Neg(this=lit) if negative else lit


def literal(value: Any, position: int) -> exp.Expression:
    """The sqlglot node for a decoded parameter, shaped as the parser shapes a literal.

    Raises HushError 22023 for non-finite numbers and 0A000 for values no literal can carry.
    """
    if value is None:
        return exp.Null()
    if isinstance(value, bool):
        return exp.Boolean(this=value)
    if isinstance(value, int):
        return _number(str(abs(value)), value < 0)
    if isinstance(value, Decimal):
        if not value.is_finite():
            raise HushError(INVALID_PARAMETER_VALUE,
                            f"parameter ${position} is not a finite number")
        return _number(format(abs(value), "f"), value.is_signed())
    if isinstance(value, float):
        if not math.isfinite(value):
            raise HushError(INVALID_PARAMETER_VALUE,
                            f"parameter ${position} is not a finite number")
        return _number(repr(abs(value)), math.copysign(1.0, value) < 0)
    if isinstance(value, str):
        return exp.Literal.string(value)
    if isinstance(value, dt.datetime):
        kind = "timestamptz" if value.tzinfo is not None else "timestamp"
        return exp.cast(exp.Literal.string(value.isoformat(sep=" ")), kind)
    if isinstance(value, dt.date):
        return exp.cast(exp.Literal.string(value.isoformat()), "date")
    if isinstance(value, dt.time):
        return exp.cast(exp.Literal.string(value.isoformat()), "time")
    raise HushError(FEATURE_NOT_SUPPORTED, f"parameter ${position} has a type hushql does not "
                    "accept", hint="Send parameters as text, numbers, booleans or dates.")


_SQLGLOT_TYPES = {
    exp.DataType.Type.BOOLEAN: BOOL, exp.DataType.Type.SMALLINT: INT2,
    exp.DataType.Type.INT: INT4, exp.DataType.Type.BIGINT: INT8,
    exp.DataType.Type.DECIMAL: NUMERIC, exp.DataType.Type.FLOAT: FLOAT4,
    exp.DataType.Type.DOUBLE: FLOAT8, exp.DataType.Type.TEXT: TEXT,
    exp.DataType.Type.VARCHAR: VARCHAR, exp.DataType.Type.CHAR: BPCHAR,
    exp.DataType.Type.DATE: DATE, exp.DataType.Type.TIME: TIME,
    exp.DataType.Type.TIMESTAMP: TIMESTAMP, exp.DataType.Type.TIMESTAMPTZ: TIMESTAMPTZ,
}


def oid_of_sqlglot(datatype: exp.DataType) -> int | None:
    """The OID of a sqlglot type node (from a cast such as ``$1::int``), if it is a plain one."""
    return _SQLGLOT_TYPES.get(datatype.this) if isinstance(datatype, exp.DataType) else None
