"""The sans-I/O codec: round trips, chunked input, and malformed bytes."""

from __future__ import annotations

import struct

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from proxy.wire import codec

# Protocol strings are NUL-terminated, so generated text excludes NUL.
text = st.text(st.characters(blacklist_characters="\x00", blacklist_categories=("Cs",)),
               max_size=40)
i32 = st.integers(-(1 << 31), (1 << 31) - 1)
oid = st.integers(0, (1 << 32) - 1)
i16 = st.integers(-(1 << 15), (1 << 15) - 1)
fmt = st.sampled_from([0, 1])
value = st.one_of(st.none(), st.binary(max_size=40))

frontend_messages = st.one_of(
    st.builds(codec.StartupMessage, st.dictionaries(text.filter(bool), text, max_size=5)),
    st.just(codec.SSLRequest()),
    st.just(codec.GSSENCRequest()),
    st.builds(codec.CancelRequest, i32, i32),
)
typed_frontend_messages = st.one_of(
    st.builds(codec.Query, text),
    st.builds(codec.Parse, text, text, st.lists(oid, max_size=5).map(tuple)),
    st.builds(codec.Bind, text, text, st.lists(fmt, max_size=4).map(tuple),
              st.lists(value, max_size=4).map(tuple), st.lists(fmt, max_size=4).map(tuple)),
    st.builds(codec.Describe, st.sampled_from("SP"), text),
    st.builds(codec.Execute, text, st.integers(0, (1 << 31) - 1)),
    st.builds(codec.Close, st.sampled_from("SP"), text),
    st.just(codec.Sync()), st.just(codec.Flush()), st.just(codec.Terminate()),
    st.builds(codec.PasswordData, st.binary(max_size=60)),
    st.builds(codec.FunctionCall, st.binary(max_size=20)),
)
fields = st.lists(st.tuples(st.sampled_from("SVCMDHP"), text), max_size=6).map(tuple)
backend_messages = st.one_of(
    st.just(codec.AuthenticationOk()),
    st.builds(codec.AuthenticationSASL, st.lists(text.filter(bool), max_size=3).map(tuple)),
    st.builds(codec.AuthenticationSASLContinue, st.binary(max_size=60)),
    st.builds(codec.AuthenticationSASLFinal, st.binary(max_size=60)),
    st.builds(codec.ParameterStatus, text, text),
    st.builds(codec.BackendKeyData, i32, i32),
    st.builds(codec.ReadyForQuery, st.sampled_from("ITE")),
    st.builds(codec.RowDescription, st.lists(st.builds(
        codec.FieldDescription, text, oid, i16, i32, fmt, oid, i16), max_size=4).map(tuple)),
    st.builds(codec.DataRow, st.lists(value, max_size=5).map(tuple)),
    st.builds(codec.CommandComplete, text),
    st.just(codec.EmptyQueryResponse()),
    st.builds(codec.ErrorResponse, fields),
    st.builds(codec.NoticeResponse, fields),
    st.just(codec.ParseComplete()), st.just(codec.BindComplete()),
    st.just(codec.CloseComplete()), st.just(codec.NoData()), st.just(codec.PortalSuspended()),
    st.builds(codec.ParameterDescription, st.lists(oid, max_size=5).map(tuple)),
    st.builds(codec.NegotiateProtocolVersion, st.integers(0, 5),
              st.lists(text, max_size=3).map(tuple)),
)


def _drain(reader: codec.FrontendReader | codec.BackendReader) -> list:
    out = []
    while (msg := reader.next_message()) is not None:
        out.append(msg)
    return out


def _feed_in_chunks(reader, data: bytes, cuts: list[int]) -> list:
    out, last = [], 0
    for cut in sorted(c % (len(data) + 1) for c in cuts) + [len(data)]:
        reader.feed(data[last:cut])
        last = cut
        out += _drain(reader)
    return out


@settings(max_examples=200, deadline=None)
@given(st.lists(frontend_messages, min_size=1, max_size=1).flatmap(
    lambda first: st.tuples(st.just(first[0]), st.lists(typed_frontend_messages, max_size=6))),
    st.lists(st.integers(0, 10_000), max_size=6))
def test_frontend_round_trip_in_any_chunks(messages, cuts) -> None:
    first, rest = messages
    if not isinstance(first, codec.StartupMessage):
        rest = []  # only a StartupMessage switches the reader to typed messages
    data = first.encode() + b"".join(m.encode() for m in rest)
    got = _feed_in_chunks(codec.FrontendReader(), data, cuts)
    assert got == [first, *rest]


@settings(max_examples=200, deadline=None)
@given(st.lists(backend_messages, max_size=8), st.lists(st.integers(0, 10_000), max_size=6))
def test_backend_round_trip_in_any_chunks(messages, cuts) -> None:
    data = b"".join(m.encode() for m in messages)
    assert _feed_in_chunks(codec.BackendReader(), data, cuts) == messages


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=200), st.booleans())
def test_garbage_only_ever_raises_protocol_errors(data: bytes, after_startup: bool) -> None:
    reader = codec.FrontendReader(max_message_bytes=1000)
    if after_startup:
        reader.feed(codec.StartupMessage({"user": "u"}).encode())
        assert isinstance(reader.next_message(), codec.StartupMessage)
    reader.feed(data)
    try:
        _drain(reader)
    except (codec.ProtocolError, codec.CharacterEncodingError):
        pass


def _typed_reader(limit: int = 1000) -> codec.FrontendReader:
    reader = codec.FrontendReader(max_message_bytes=limit)
    reader.feed(codec.StartupMessage({"user": "u"}).encode())
    assert isinstance(reader.next_message(), codec.StartupMessage)
    return reader


def test_truncated_message_waits_then_fails_at_eof() -> None:
    reader = _typed_reader()
    data = codec.Query("SELECT 1").encode()
    reader.feed(data[:-1])
    assert reader.next_message() is None
    with pytest.raises(codec.ProtocolError, match="middle of a message"):
        reader.check_eof()
    reader.feed(data[-1:])
    assert reader.next_message() == codec.Query("SELECT 1")
    reader.check_eof()  # nothing left over


def test_oversized_message_is_refused_from_its_header_alone() -> None:
    reader = _typed_reader(limit=100)
    reader.feed(b"Q" + struct.pack("!i", 10_000))  # the body never needs to arrive
    with pytest.raises(codec.MessageTooLarge):
        reader.next_message()
    with pytest.raises(codec.ProtocolError):  # a failed reader stays failed
        reader.next_message()


@pytest.mark.parametrize("data, needle", [
    (b"Z\x00\x00\x00\x04", "invalid frontend message type"),
    (b"Q\x00\x00\x00\x02", "invalid message length"),
    (b"Q\x00\x00\x00\x07abc", "unterminated string"),
    (b"S\x00\x00\x00\x05x", "trailing bytes"),
    (b"E\x00\x00\x00\x06\x00\x00", "truncated"),
    (b"D\x00\x00\x00\x06Xa\x00"[:7] + b"\x00", "invalid target kind"),
    (codec.Bind("", "", (2,), (), ()).encode(), "unsupported format code"),
    (b"B\x00\x00\x00\x0e\x00\x00\x00\x00\x00\x01\xff\xff\xff\xfe\x00\x00",
     "negative value length"),
])
def test_malformed_typed_messages(data: bytes, needle: str) -> None:
    reader = _typed_reader()
    reader.feed(data)
    with pytest.raises(codec.ProtocolError, match=needle):
        reader.next_message()


@pytest.mark.parametrize("data, needle", [
    (struct.pack("!ii", 8, 2 << 16), "unsupported frontend protocol 2.0"),
    (struct.pack("!i", 4), "invalid length of startup packet"),
    (struct.pack("!i", 20_000), "invalid length of startup packet"),
    (struct.pack("!ii", 9, 196608) + b"u", "unterminated string"),
    (struct.pack("!ii", 17, 196608) + b"u\x00a\x00u\x00b\x00\x00", "repeats parameter"),
    (struct.pack("!iiii", 16, codec.SSL_REQUEST_CODE, 0, 0), "trailing bytes"),
])
def test_malformed_startup_packets(data: bytes, needle: str) -> None:
    reader = codec.FrontendReader()
    reader.feed(data)
    with pytest.raises(codec.ProtocolError, match=needle):
        reader.next_message()


def test_text_that_is_not_utf8_keeps_the_stream_in_step() -> None:
    reader = _typed_reader()
    reader.feed(b"Q\x00\x00\x00\x07\xff\xfe\x00" + codec.Sync().encode())
    with pytest.raises(codec.CharacterEncodingError) as caught:
        reader.next_message()
    assert caught.value.kind is codec.Query and caught.value.sqlstate == "22021"
    assert reader.next_message() == codec.Sync()  # the next message is still found


def test_sasl_initial_response_parse() -> None:
    msg = codec.SASLInitialResponse("SCRAM-SHA-256", b"n,,n=,r=abc")
    reader = _typed_reader()
    reader.feed(msg.encode())
    data = reader.next_message()
    assert isinstance(data, codec.PasswordData)
    assert codec.SASLInitialResponse.parse(data.data) == msg
    with pytest.raises(codec.ProtocolError):
        codec.SASLInitialResponse.parse(b"SCRAM-SHA-256\x00\x00\x00\x00\x09abc")


def test_known_bytes_of_a_few_messages() -> None:
    # Layouts from the protocol documentation's "Message Formats".
    assert codec.ReadyForQuery("I").encode() == b"Z\x00\x00\x00\x05I"
    assert codec.SSLRequest().encode() == b"\x00\x00\x00\x08\x04\xd2\x16\x2f"
    assert codec.DataRow((b"1", None)).encode() == \
        b"D\x00\x00\x00\x0f\x00\x02\x00\x00\x00\x011\xff\xff\xff\xff"
    err = codec.ErrorResponse.build("ERROR", "42601", "bad", hint="fix it")
    assert err.encode() == b"E\x00\x00\x00\x27SERROR\x00VERROR\x00C42601\x00Mbad\x00Hfix it\x00\x00"
    assert err.get("C") == "42601" and err.get("D") is None
