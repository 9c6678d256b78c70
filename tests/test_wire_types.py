"""Values to and from the wire: result encoding, parameter decoding, literal nodes."""

from __future__ import annotations

import datetime as dt
import math
from decimal import Decimal

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from psycopg.adapt import Transformer
from psycopg.pq import Format
from sqlglot import exp

from proxy.errors import HushError
from proxy.wire import types

_LOADERS = Transformer().adapters

# The proxy's own column types and values of each.
VALUES = {
    "bigint": st.integers(-(1 << 63), (1 << 63) - 1),
    "integer": st.integers(-(1 << 31), (1 << 31) - 1),
    "numeric": st.decimals(allow_nan=False, allow_infinity=False, places=4,
                           min_value=Decimal("-1e12"), max_value=Decimal("1e12")),
    "double precision": st.floats(allow_nan=False),
    "text": st.text(st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00")),
    "date": st.dates(),
    "boolean": st.booleans(),
}


def _load(data: bytes, oid: int, fmt: int):
    """Decoded as a psycopg client would decode it."""
    loader = _LOADERS.get_loader(oid, Format.BINARY if fmt else Format.TEXT)
    return loader(oid).load(data)


@pytest.mark.parametrize("type_name", list(VALUES))
@pytest.mark.parametrize("fmt", [types.TEXT_FORMAT, types.BINARY_FORMAT])
def test_answer_values_round_trip_through_a_client_decoder(type_name: str, fmt: int) -> None:
    wtype = types.wire_type(type_name)
    assert not wtype.as_text
    encoder = types.ColumnEncoder(wtype, fmt)

    @settings(max_examples=60, deadline=None)
    @given(VALUES[type_name])
    def check(value) -> None:
        assert _load(encoder.encode(value), wtype.oid, fmt) == value

    check()


def test_oids_of_the_answer_types() -> None:
    # OIDs from PostgreSQL's pg_type.dat.
    assert {n: types.wire_type(n).oid for n in VALUES} == {
        "bigint": 20, "integer": 23, "numeric": 1700, "double precision": 701, "text": 25,
        "date": 1082, "boolean": 16}
    assert types.wire_type("bigint").size == 8 and types.wire_type("text").size == -1
    assert types.oid_of("text[]") == 1009


def test_postgresql_spellings_in_text_format() -> None:
    f = types.ColumnEncoder(types.wire_type("double precision"), types.TEXT_FORMAT)
    assert [f.encode(v) for v in (math.inf, -math.inf, math.nan, 0.1)] == [
        b"Infinity", b"-Infinity", b"NaN", b"0.1"]
    n = types.ColumnEncoder(types.wire_type("numeric"), types.TEXT_FORMAT)
    assert n.encode(Decimal("1E+5")) == b"100000" and n.encode(7) == b"7"
    b = types.ColumnEncoder(types.wire_type("boolean"), types.TEXT_FORMAT)
    assert (b.encode(True), b.encode(False), b.encode(None)) == (b"t", b"f", None)


def test_a_value_of_the_wrong_type_is_refused_not_misencoded() -> None:
    with pytest.raises(TypeError):
        types.ColumnEncoder(types.wire_type("bigint"), 0).encode(Decimal("1.5"))
    with pytest.raises(TypeError):
        types.ColumnEncoder(types.wire_type("date"), 1).encode("2026-01-01")
    with pytest.raises(TypeError):
        types.ColumnEncoder(types.wire_type("boolean"), 0).encode(1)


def test_types_without_adapters_travel_as_text() -> None:
    wtype = types.wire_type("regclass")
    assert wtype.as_text
    shape = types.ResultShape.of([("c", "regclass")])
    assert shape.description((1,)).fields[0].type_oid == types.TEXT
    assert shape.encoder((1,)).encode(["pg_class"])[-8:] == b"pg_class"


def test_result_formats_follow_bind_rules() -> None:
    shape = types.ResultShape.of([("a", "text"), ("b", "bigint")])
    assert shape.formats(()) == (0, 0) and shape.formats((1,)) == (1, 1)
    assert shape.formats((0, 1)) == (0, 1)
    with pytest.raises(HushError) as caught:
        shape.formats((0, 1, 1))
    assert caught.value.sqlstate == "08P01"


@pytest.mark.parametrize("data, oid, fmt, expected", [
    (b"42", types.INT4, 0, 42),
    (b" -7 ", types.INT8, 0, -7),
    (b"\x00\x00\x00\x2a", types.INT4, 1, 42),
    (b"12.50", types.NUMERIC, 0, Decimal("12.50")),
    (b"2026-02-28", types.DATE, 0, dt.date(2026, 2, 28)),
    (b"yes", types.BOOL, 0, True),
    (b"of", types.BOOL, 0, False),
    (b"\x01", types.BOOL, 1, True),
    (b"Northbank", types.UNKNOWN, 0, "Northbank"),
    ("Hafen\u00e4".encode(), types.VARCHAR, 1, "Hafen\u00e4"),
    (None, types.INT4, 0, None),
])
def test_parameters_decode(data, oid, fmt, expected) -> None:
    assert types.decode_parameter(data, oid, fmt, 1) == expected


@pytest.mark.parametrize("data, oid, fmt, code", [
    (b"forty", types.INT4, 0, "22P02"),
    (b"\x00\x01", types.INT4, 1, "22P03"),  # psycopg alone would read this as 65536
    (b"\x00" * 9, types.INT8, 1, "22P03"),
    (b"2026-13-01", types.DATE, 0, "22P02"),
    (b"o", types.BOOL, 0, "22P02"),  # ambiguous: on or off
    (b"\xff", types.TEXT, 0, "22021"),
    (b"a\x00b", types.TEXT, 0, "22021"),
    (b"x", 17, 0, "0A000"),  # bytea parameters are not accepted
])
def test_bad_parameters_are_refused_with_sqlstates(data, oid, fmt, code) -> None:
    with pytest.raises(HushError) as caught:
        types.decode_parameter(data, oid, fmt, 3)
    assert caught.value.sqlstate == code
    assert "$3" in caught.value.message or "parameter 3" in caught.value.message \
        or code == "0A000"


@pytest.mark.parametrize("value, sql", [
    (5, "5"), (-5, "-5"), (Decimal("-1.50"), "-1.50"), (Decimal("1E+3"), "1000"),
    (0.25, "0.25"), (True, "TRUE"), (None, "NULL"), ("it's", "'it''s'"),
    (dt.date(2026, 1, 2), "CAST('2026-01-02' AS DATE)"),
])
def test_literal_nodes(value, sql) -> None:
    node = types.literal(value, 1)
    assert node.sql(dialect="postgres") == sql
    if isinstance(value, int) and not isinstance(value, bool) and value < 0:
        assert isinstance(node, exp.Neg)  # shaped like the parser's own -5


@pytest.mark.parametrize("value", [Decimal("NaN"), float("inf"), b"bytes", [1]])
def test_values_no_literal_can_carry(value) -> None:
    with pytest.raises(HushError):
        types.literal(value, 1)


# Limits of PostgreSQL's integer and real types (its documentation, "Numeric Types"): text
# parameters beyond them are refused with 22003 as PostgreSQL refuses them on input.
@pytest.mark.parametrize("text, oid, accepted", [
    (b"2147483647", types.INT4, True), (b"2147483648", types.INT4, False),
    (b"-2147483648", types.INT4, True), (b"-2147483649", types.INT4, False),
    (b"32767", types.INT2, True), (b"32768", types.INT2, False),
    (b"9223372036854775807", types.INT8, True), (b"9223372036854775808", types.INT8, False),
    (b"3.4e38", types.FLOAT4, True), (b"3.5e38", types.FLOAT4, False),
    (b"1e308", types.FLOAT8, True)])
def test_parameters_are_range_checked_for_their_declared_type(text: bytes, oid: int,
                                                              accepted: bool) -> None:
    if accepted:
        assert types.decode_parameter(text, oid, types.TEXT_FORMAT, 1) is not None
    else:
        with pytest.raises(HushError) as caught:
            types.decode_parameter(text, oid, types.TEXT_FORMAT, 1)
        assert caught.value.sqlstate == "22003"
