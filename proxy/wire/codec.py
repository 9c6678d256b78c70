"""PostgreSQL protocol 3.0 messages as typed values, and their bytes, with no I/O.

Sans-I/O in the manner of h11: a reader is fed bytes (``feed``) and hands back whole messages
(``next_message``), or ``None`` when it needs more bytes; every message serialises itself with
``encode()``. Nothing here touches a socket, a clock or the engine, so all of it is testable with
plain bytes. Both directions are here: ``FrontendReader`` parses what a client sends (the
server's side) and ``BackendReader`` parses what a server sends (for tests and tools).

Framing follows the protocol chapter of the PostgreSQL documentation ("Message Formats"): a
type byte, an Int32 length that counts itself but not the type byte, then the body. The startup
packet has no type byte. Any framing fault raises ``ProtocolError`` (SQLSTATE 08P01), whose
message is ours and safe to send to the client.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass, field
from typing import ClassVar, Union

from proxy.errors import CHARACTER_NOT_IN_REPERTOIRE, PROTOCOL_VIOLATION

PROTOCOL_3_0 = 196608  # 3 << 16
SSL_REQUEST_CODE = 80877103  # 1234 << 16 | 5679
GSSENC_REQUEST_CODE = 80877104  # 1234 << 16 | 5680
CANCEL_REQUEST_CODE = 80877102  # 1234 << 16 | 5678

# The server refuses startup packets larger than this (PostgreSQL's MAX_STARTUP_PACKET_LENGTH,
# value from memory) whatever the general message limit is: nobody is authenticated yet.
MAX_STARTUP_PACKET = 10_000
DEFAULT_MAX_MESSAGE_BYTES = 1 << 20

_I16 = struct.Struct("!h")
_U16 = struct.Struct("!H")
_I32 = struct.Struct("!i")


class ProtocolError(Exception):
    """The byte stream broke the protocol; the connection cannot continue (SQLSTATE 08P01)."""

    sqlstate = PROTOCOL_VIOLATION

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message


class MessageTooLarge(ProtocolError):
    """A message declared a length above the configured limit (SQLSTATE 08P01)."""


class CharacterEncodingError(Exception):
    """A well-framed message carried text that is not UTF-8 (SQLSTATE 22021).

    The message boundary is intact, so unlike ``ProtocolError`` the connection may go on.
    """

    sqlstate = CHARACTER_NOT_IN_REPERTOIRE

    def __init__(self, message: str, kind: type | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.kind = kind  # the message class whose text was bad, so the server knows the flow


# --------------------------------------------------------------------------- body reading


class _Body:
    """A cursor over one message body; every read checks bounds and raises ProtocolError."""

    __slots__ = ("data", "pos", "what")

    def __init__(self, data: bytes, what: str) -> None:
        self.data = data
        self.pos = 0
        self.what = what

    def _need(self, n: int) -> None:
        if n < 0 or self.pos + n > len(self.data):
            raise ProtocolError(f"{self.what} message is truncated")

    def int16(self) -> int:
        self._need(2)
        (v,) = _I16.unpack_from(self.data, self.pos)
        self.pos += 2
        return v

    def uint16(self) -> int:
        self._need(2)
        (v,) = _U16.unpack_from(self.data, self.pos)
        self.pos += 2
        return v

    def int32(self) -> int:
        self._need(4)
        (v,) = _I32.unpack_from(self.data, self.pos)
        self.pos += 4
        return v

    def byte(self) -> bytes:
        self._need(1)
        v = self.data[self.pos:self.pos + 1]
        self.pos += 1
        return v

    def raw(self, n: int) -> bytes:
        self._need(n)
        v = self.data[self.pos:self.pos + n]
        self.pos += n
        return v

    def rest(self) -> bytes:
        v = self.data[self.pos:]
        self.pos = len(self.data)
        return v

    def cstring_bytes(self) -> bytes:
        end = self.data.find(b"\x00", self.pos)
        if end < 0:
            raise ProtocolError(f"{self.what} message has an unterminated string")
        v = self.data[self.pos:end]
        self.pos = end + 1
        return v

    def cstring(self) -> str:
        raw = self.cstring_bytes()
        try:
            return raw.decode("utf-8")
        except UnicodeDecodeError:
            raise CharacterEncodingError("invalid byte sequence for encoding \"UTF8\"") from None

    def counted_bytes(self) -> bytes | None:
        n = self.int32()
        if n == -1:
            return None
        if n < -1:
            raise ProtocolError(f"{self.what} message has a negative value length")
        return self.raw(n)

    def end(self) -> None:
        if self.pos != len(self.data):
            raise ProtocolError(f"{self.what} message has trailing bytes")


def _cstr(s: str | bytes) -> bytes:
    b = s.encode("utf-8") if isinstance(s, str) else s
    if b"\x00" in b:
        raise ValueError("protocol strings cannot contain NUL")
    return b + b"\x00"


def _frame(type_byte: bytes, body: bytes) -> bytes:
    return type_byte + _I32.pack(len(body) + 4) + body


def _counted(value: bytes | None) -> bytes:
    if value is None:
        return _I32.pack(-1)
    return _I32.pack(len(value)) + value


# --------------------------------------------------------------------------- frontend messages


@dataclass(frozen=True, slots=True)
class StartupMessage:
    """First packet of a session: protocol version and parameters (user, database, ...)."""

    params: dict[str, str]
    protocol: int = PROTOCOL_3_0

    def encode(self) -> bytes:
        body = _I32.pack(self.protocol)
        body += b"".join(_cstr(k) + _cstr(v) for k, v in self.params.items()) + b"\x00"
        return _I32.pack(len(body) + 4) + body


@dataclass(frozen=True, slots=True)
class SSLRequest:
    """Asks whether the server will switch to TLS; answered with one byte, S or N."""

    def encode(self) -> bytes:
        return _I32.pack(8) + _I32.pack(SSL_REQUEST_CODE)


@dataclass(frozen=True, slots=True)
class GSSENCRequest:
    """Asks for GSSAPI encryption; hushql always answers N."""

    def encode(self) -> bytes:
        return _I32.pack(8) + _I32.pack(GSSENC_REQUEST_CODE)


@dataclass(frozen=True, slots=True)
class CancelRequest:
    """Sent on a fresh connection to cancel the query running on another one."""

    process_id: int
    secret_key: int

    def encode(self) -> bytes:
        return _I32.pack(16) + _I32.pack(CANCEL_REQUEST_CODE) + _I32.pack(self.process_id) \
            + _I32.pack(self.secret_key)


@dataclass(frozen=True, slots=True)
class PasswordData:
    """A 'p' message. Its meaning (SASLInitialResponse, SASLResponse) depends on the state."""

    TYPE: ClassVar[bytes] = b"p"
    data: bytes

    def encode(self) -> bytes:
        return _frame(self.TYPE, self.data)


@dataclass(frozen=True, slots=True)
class SASLInitialResponse:
    """Body of the first 'p' message of a SASL exchange: mechanism and client-first data."""

    mechanism: str
    data: bytes | None

    def encode(self) -> bytes:
        return PasswordData(_cstr(self.mechanism) + _counted(self.data)).encode()

    @classmethod
    def parse(cls, data: bytes) -> "SASLInitialResponse":
        """Reads a PasswordData body as a SASLInitialResponse; raises ProtocolError."""
        b = _Body(data, "SASLInitialResponse")
        try:
            mech = b.cstring()
        except CharacterEncodingError:
            raise ProtocolError("SASLInitialResponse names an invalid mechanism") from None
        payload = b.counted_bytes()
        b.end()
        return cls(mech, payload)


@dataclass(frozen=True, slots=True)
class Query:
    """Simple query: one string that may hold several statements."""

    TYPE: ClassVar[bytes] = b"Q"
    sql: str

    def encode(self) -> bytes:
        return _frame(self.TYPE, _cstr(self.sql))


@dataclass(frozen=True, slots=True)
class Parse:
    """Prepares one statement under a name ('' is the unnamed statement)."""

    TYPE: ClassVar[bytes] = b"P"
    name: str
    sql: str
    param_oids: tuple[int, ...] = ()

    def encode(self) -> bytes:
        body = _cstr(self.name) + _cstr(self.sql) + _U16.pack(len(self.param_oids))
        body += b"".join(_I32.pack(_signed32(o)) for o in self.param_oids)
        return _frame(self.TYPE, body)


@dataclass(frozen=True, slots=True)
class Bind:
    """Makes a portal from a prepared statement and parameter values."""

    TYPE: ClassVar[bytes] = b"B"
    portal: str
    statement: str
    param_formats: tuple[int, ...] = ()
    params: tuple[bytes | None, ...] = ()
    result_formats: tuple[int, ...] = ()

    def encode(self) -> bytes:
        body = _cstr(self.portal) + _cstr(self.statement)
        body += _U16.pack(len(self.param_formats))
        body += b"".join(_I16.pack(f) for f in self.param_formats)
        body += _U16.pack(len(self.params)) + b"".join(_counted(p) for p in self.params)
        body += _U16.pack(len(self.result_formats))
        body += b"".join(_I16.pack(f) for f in self.result_formats)
        return _frame(self.TYPE, body)


@dataclass(frozen=True, slots=True)
class Describe:
    """Asks for the description of a statement (kind 'S') or portal (kind 'P')."""

    TYPE: ClassVar[bytes] = b"D"
    kind: str
    name: str

    def encode(self) -> bytes:
        return _frame(self.TYPE, self.kind.encode("ascii") + _cstr(self.name))


@dataclass(frozen=True, slots=True)
class Execute:
    """Runs a portal; max_rows 0 means all rows."""

    TYPE: ClassVar[bytes] = b"E"
    portal: str
    max_rows: int = 0

    def encode(self) -> bytes:
        return _frame(self.TYPE, _cstr(self.portal) + _I32.pack(self.max_rows))


@dataclass(frozen=True, slots=True)
class Close:
    """Closes a statement (kind 'S') or portal (kind 'P')."""

    TYPE: ClassVar[bytes] = b"C"
    kind: str
    name: str

    def encode(self) -> bytes:
        return _frame(self.TYPE, self.kind.encode("ascii") + _cstr(self.name))


@dataclass(frozen=True, slots=True)
class _EmptyMessage:
    """A message that is only its type byte (and a length of 4)."""

    TYPE: ClassVar[bytes] = b""

    def encode(self) -> bytes:
        return _frame(self.TYPE, b"")


class Sync(_EmptyMessage):
    """Ends an extended-query batch; the server answers ReadyForQuery."""

    __slots__ = ()
    TYPE = b"S"


class Flush(_EmptyMessage):
    """Asks the server to send what it has buffered."""

    __slots__ = ()
    TYPE = b"H"


class Terminate(_EmptyMessage):
    """The client is leaving."""

    __slots__ = ()
    TYPE = b"X"


@dataclass(frozen=True, slots=True)
class FunctionCall:
    """Fast-path function call; hushql refuses it, but it is a legal message."""

    TYPE: ClassVar[bytes] = b"F"
    body: bytes

    def encode(self) -> bytes:
        return _frame(self.TYPE, self.body)


@dataclass(frozen=True, slots=True)
class CopyMessage:
    """CopyData/CopyDone/CopyFail outside COPY; the protocol says to ignore them."""

    type_byte: bytes
    body: bytes

    def encode(self) -> bytes:
        return _frame(self.type_byte, self.body)


FrontendMessage = Union[
    StartupMessage, SSLRequest, GSSENCRequest, CancelRequest, PasswordData, Query, Parse,
    Bind, Describe, Execute, Close, Sync, Flush, Terminate, FunctionCall, CopyMessage,
]


def _format_codes(b: _Body, what: str) -> tuple[int, ...]:
    n = b.uint16()
    codes = tuple(b.int16() for _ in range(n))
    if any(c not in (0, 1) for c in codes):
        raise ProtocolError(f"{what} message has an unsupported format code")
    return codes


# Type bytes of the typed frontend messages (protocol chapter, "Message Formats"); any other is
# refused as soon as its header arrives, without waiting for the body it announces.
FRONTEND_TYPES = frozenset(b"QPBDCESHXpFdcf")


def _parse_typed_frontend(type_byte: bytes, body: bytes) -> FrontendMessage:
    """Decodes one typed frontend message body; raises ProtocolError or CharacterEncodingError."""
    if type_byte == b"Q":
        b = _Body(body, "Query")
        try:
            sql = b.cstring()
        except CharacterEncodingError as exc:
            exc.kind = Query
            raise
        b.end()
        return Query(sql)
    if type_byte == b"P":
        b = _Body(body, "Parse")
        try:
            name, sql = b.cstring(), b.cstring()
        except CharacterEncodingError as exc:
            exc.kind = Parse
            raise
        n = b.uint16()
        oids = tuple(b.int32() & 0xFFFFFFFF for _ in range(n))
        b.end()
        return Parse(name, sql, oids)
    if type_byte == b"B":
        b = _Body(body, "Bind")
        try:
            portal, stmt = b.cstring(), b.cstring()
        except CharacterEncodingError as exc:
            exc.kind = Bind
            raise
        pformats = _format_codes(b, "Bind")
        n = b.uint16()
        params = tuple(b.counted_bytes() for _ in range(n))
        rformats = _format_codes(b, "Bind")
        b.end()
        return Bind(portal, stmt, pformats, params, rformats)
    if type_byte in (b"D", b"C"):
        what = "Describe" if type_byte == b"D" else "Close"
        b = _Body(body, what)
        kind = b.byte()
        if kind not in (b"S", b"P"):
            raise ProtocolError(f"{what} message has an invalid target kind")
        try:
            name = b.cstring()
        except CharacterEncodingError as exc:
            exc.kind = Describe if type_byte == b"D" else Close
            raise
        b.end()
        cls = Describe if type_byte == b"D" else Close
        return cls(kind.decode("ascii"), name)
    if type_byte == b"E":
        b = _Body(body, "Execute")
        try:
            portal = b.cstring()
        except CharacterEncodingError as exc:
            exc.kind = Execute
            raise
        max_rows = b.int32()
        b.end()
        return Execute(portal, max(max_rows, 0))
    if type_byte in (b"S", b"H", b"X"):
        cls = {b"S": Sync, b"H": Flush, b"X": Terminate}[type_byte]
        _Body(body, cls.__name__).end()
        return cls()
    if type_byte == b"p":
        return PasswordData(body)
    if type_byte == b"F":
        return FunctionCall(body)
    if type_byte in (b"d", b"c", b"f"):
        return CopyMessage(type_byte, body)
    raise ProtocolError(f"invalid frontend message type {type_byte[0]}")


def _parse_startup(body: bytes) -> FrontendMessage:
    """Decodes a startup-phase packet body (after its length word)."""
    b = _Body(body, "startup")
    code = b.int32()
    if code == SSL_REQUEST_CODE:
        b.end()
        return SSLRequest()
    if code == GSSENC_REQUEST_CODE:
        b.end()
        return GSSENCRequest()
    if code == CANCEL_REQUEST_CODE:
        pid, key = b.int32(), b.int32()
        b.end()
        return CancelRequest(pid, key)
    if code >> 16 != 3:
        raise ProtocolError(f"unsupported frontend protocol {code >> 16}.{code & 0xFFFF}: "
                            "server supports 3.0")
    params: dict[str, str] = {}
    while True:
        try:
            name = b.cstring()
        except CharacterEncodingError:
            raise ProtocolError("startup packet holds text that is not UTF-8") from None
        if name == "":
            break
        try:
            value = b.cstring()
        except CharacterEncodingError:
            raise ProtocolError("startup packet holds text that is not UTF-8") from None
        if name in params:
            raise ProtocolError(f"startup packet repeats parameter {name!r}")
        params[name] = value
    b.end()
    return StartupMessage(params, code)


class FrontendReader:
    """Parses bytes a client sends into frontend messages (the server side).

    Starts in the startup phase (packets without a type byte) and switches to typed messages by
    itself once a StartupMessage has been read. ``next_message`` returns None when it needs more
    bytes; it raises ProtocolError on any framing fault, after which the reader is unusable.
    """

    def __init__(self, max_message_bytes: int = DEFAULT_MAX_MESSAGE_BYTES) -> None:
        self.max_message_bytes = max_message_bytes
        self._buf = bytearray()
        self._startup = True
        self._broken = False

    def feed(self, data: bytes) -> None:
        """Appends bytes received from the client."""
        self._buf += data

    def buffered(self) -> int:
        """How many received bytes are not yet returned as messages."""
        return len(self._buf)

    def next_message(self) -> FrontendMessage | None:
        """The next whole message, or None if more bytes are needed."""
        if self._broken:
            raise ProtocolError("connection already failed")
        try:
            return self._next()
        except ProtocolError:
            self._broken = True
            raise

    def _next(self) -> FrontendMessage | None:
        buf = self._buf
        if self._startup:
            if len(buf) < 4:
                return None
            (length,) = _I32.unpack_from(buf, 0)
            if length < 8 or length > MAX_STARTUP_PACKET:
                raise ProtocolError("invalid length of startup packet")
            if len(buf) < length:
                return None
            body = bytes(buf[4:length])
            del buf[:length]
            msg = _parse_startup(body)
            if isinstance(msg, StartupMessage):
                self._startup = False
            return msg
        if not buf:
            return None
        if buf[0] not in FRONTEND_TYPES:
            raise ProtocolError(f"invalid frontend message type {buf[0]}")
        if len(buf) < 5:
            return None
        type_byte = bytes(buf[0:1])
        (length,) = _I32.unpack_from(buf, 1)
        if length < 4:
            raise ProtocolError("invalid message length")
        if length - 4 > self.max_message_bytes:
            raise MessageTooLarge(f"message of {length - 4} bytes exceeds the limit of "
                                  f"{self.max_message_bytes} bytes")
        if len(buf) < length + 1:
            return None
        body = bytes(buf[5:length + 1])
        del buf[:length + 1]
        return _parse_typed_frontend(type_byte, body)

    def check_eof(self) -> None:
        """Called when the client closed its side; raises if a message was left half sent."""
        if self._buf:
            raise ProtocolError("connection closed in the middle of a message")


# --------------------------------------------------------------------------- backend messages


@dataclass(frozen=True, slots=True)
class AuthenticationOk:
    TYPE: ClassVar[bytes] = b"R"

    def encode(self) -> bytes:
        return _frame(self.TYPE, _I32.pack(0))


@dataclass(frozen=True, slots=True)
class AuthenticationSASL:
    """Offers SASL mechanisms, best first."""

    TYPE: ClassVar[bytes] = b"R"
    mechanisms: tuple[str, ...]

    def encode(self) -> bytes:
        body = _I32.pack(10) + b"".join(_cstr(m) for m in self.mechanisms) + b"\x00"
        return _frame(self.TYPE, body)


@dataclass(frozen=True, slots=True)
class AuthenticationSASLContinue:
    TYPE: ClassVar[bytes] = b"R"
    data: bytes

    def encode(self) -> bytes:
        return _frame(self.TYPE, _I32.pack(11) + self.data)


@dataclass(frozen=True, slots=True)
class AuthenticationSASLFinal:
    TYPE: ClassVar[bytes] = b"R"
    data: bytes

    def encode(self) -> bytes:
        return _frame(self.TYPE, _I32.pack(12) + self.data)


@dataclass(frozen=True, slots=True)
class ParameterStatus:
    TYPE: ClassVar[bytes] = b"S"
    name: str
    value: str

    def encode(self) -> bytes:
        return _frame(self.TYPE, _cstr(self.name) + _cstr(self.value))


@dataclass(frozen=True, slots=True)
class BackendKeyData:
    TYPE: ClassVar[bytes] = b"K"
    process_id: int
    secret_key: int

    def encode(self) -> bytes:
        return _frame(self.TYPE, _I32.pack(self.process_id) + _I32.pack(self.secret_key))


@dataclass(frozen=True, slots=True)
class ReadyForQuery:
    """Transaction status: 'I' idle, 'T' in a block, 'E' in a failed block."""

    TYPE: ClassVar[bytes] = b"Z"
    status: str

    def encode(self) -> bytes:
        return _frame(self.TYPE, self.status.encode("ascii"))


@dataclass(frozen=True, slots=True)
class FieldDescription:
    """One column of a RowDescription."""

    name: str
    type_oid: int
    type_size: int = -1
    type_modifier: int = -1
    format: int = 0
    table_oid: int = 0
    column_number: int = 0


@dataclass(frozen=True, slots=True)
class RowDescription:
    TYPE: ClassVar[bytes] = b"T"
    fields: tuple[FieldDescription, ...]

    def encode(self) -> bytes:
        parts = [_I16.pack(len(self.fields))]
        for f in self.fields:
            parts.append(_cstr(f.name))
            parts.append(struct.pack("!ihihih", _signed32(f.table_oid), f.column_number,
                                     _signed32(f.type_oid), f.type_size, f.type_modifier,
                                     f.format))
        return _frame(self.TYPE, b"".join(parts))


@dataclass(frozen=True, slots=True)
class DataRow:
    TYPE: ClassVar[bytes] = b"D"
    values: tuple[bytes | None, ...]

    def encode(self) -> bytes:
        return encode_data_row(self.values)


def encode_data_row(values: tuple[bytes | None, ...] | list[bytes | None]) -> bytes:
    """DataRow bytes straight from encoded column values (the hot path of an answer)."""
    body = _I16.pack(len(values)) + b"".join(_counted(v) for v in values)
    return b"D" + _I32.pack(len(body) + 4) + body


@dataclass(frozen=True, slots=True)
class CommandComplete:
    TYPE: ClassVar[bytes] = b"C"
    tag: str

    def encode(self) -> bytes:
        return _frame(self.TYPE, _cstr(self.tag))


class EmptyQueryResponse(_EmptyMessage):
    __slots__ = ()
    TYPE = b"I"


# Field codes of ErrorResponse / NoticeResponse (protocol documentation, "Error and Notice
# Message Fields").
FIELD_SEVERITY = "S"
FIELD_SEVERITY_PLAIN = "V"
FIELD_CODE = "C"
FIELD_MESSAGE = "M"
FIELD_DETAIL = "D"
FIELD_HINT = "H"


@dataclass(frozen=True, slots=True)
class _FieldsMessage:
    """ErrorResponse and NoticeResponse share one layout: (code byte, string) pairs, then NUL."""

    TYPE: ClassVar[bytes] = b""
    fields: tuple[tuple[str, str], ...]

    def encode(self) -> bytes:
        body = b"".join(code.encode("ascii") + _cstr(_no_nul(value))
                        for code, value in self.fields)
        return _frame(self.TYPE, body + b"\x00")

    def get(self, code: str) -> str | None:
        """The value of one field, or None when absent."""
        for c, v in self.fields:
            if c == code:
                return v
        return None

    @classmethod
    def build(cls, severity: str, sqlstate: str, message: str, *, detail: str | None = None,
              hint: str | None = None):
        """The fields hushql sends: S, V, C, M and, when given, D and H."""
        fields = [(FIELD_SEVERITY, severity), (FIELD_SEVERITY_PLAIN, severity),
                  (FIELD_CODE, sqlstate), (FIELD_MESSAGE, message)]
        if detail:
            fields.append((FIELD_DETAIL, detail))
        if hint:
            fields.append((FIELD_HINT, hint))
        return cls(tuple(fields))


class ErrorResponse(_FieldsMessage):
    __slots__ = ()
    TYPE = b"E"


class NoticeResponse(_FieldsMessage):
    __slots__ = ()
    TYPE = b"N"


class ParseComplete(_EmptyMessage):
    __slots__ = ()
    TYPE = b"1"


class BindComplete(_EmptyMessage):
    __slots__ = ()
    TYPE = b"2"


class CloseComplete(_EmptyMessage):
    __slots__ = ()
    TYPE = b"3"


class NoData(_EmptyMessage):
    __slots__ = ()
    TYPE = b"n"


class PortalSuspended(_EmptyMessage):
    __slots__ = ()
    TYPE = b"s"


@dataclass(frozen=True, slots=True)
class ParameterDescription:
    TYPE: ClassVar[bytes] = b"t"
    type_oids: tuple[int, ...]

    def encode(self) -> bytes:
        body = _I16.pack(len(self.type_oids)) + b"".join(_I32.pack(_signed32(o))
                                                         for o in self.type_oids)
        return _frame(self.TYPE, body)


@dataclass(frozen=True, slots=True)
class NegotiateProtocolVersion:
    """Tells a client asking for 3.x (x > 0) or _pq_ options what this server speaks."""

    TYPE: ClassVar[bytes] = b"v"
    newest_minor: int
    unrecognized: tuple[str, ...] = ()

    def encode(self) -> bytes:
        body = _I32.pack(self.newest_minor) + _I32.pack(len(self.unrecognized))
        body += b"".join(_cstr(o) for o in self.unrecognized)
        return _frame(self.TYPE, body)


@dataclass(frozen=True, slots=True)
class NegotiationAnswer:
    """The single unframed byte answering SSLRequest or GSSENCRequest: S (yes) or N (no)."""

    accept: bool

    def encode(self) -> bytes:
        return b"S" if self.accept else b"N"


BackendMessage = Union[
    AuthenticationOk, AuthenticationSASL, AuthenticationSASLContinue, AuthenticationSASLFinal,
    ParameterStatus, BackendKeyData, ReadyForQuery, RowDescription, DataRow, CommandComplete,
    EmptyQueryResponse, ErrorResponse, NoticeResponse, ParseComplete, BindComplete,
    CloseComplete, NoData, PortalSuspended, ParameterDescription, NegotiateProtocolVersion,
]


def _signed32(oid: int) -> int:
    """OIDs are unsigned 32-bit; the wire carries them in an Int32 slot."""
    return oid - (1 << 32) if oid >= 1 << 31 else oid


def _no_nul(value: str) -> str:
    return value.replace("\x00", " ")


def _fields(b: _Body) -> tuple[tuple[str, str], ...]:
    out = []
    while True:
        code = b.byte()
        if code == b"\x00":
            break
        out.append((code.decode("latin-1"), b.cstring()))
    return tuple(out)


def _parse_backend(type_byte: bytes, body: bytes) -> BackendMessage:
    """Decodes one backend message body (client side); raises ProtocolError."""
    b = _Body(body, f"backend {type_byte!r}")
    msg: BackendMessage
    if type_byte == b"R":
        code = b.int32()
        if code == 0:
            msg = AuthenticationOk()
        elif code == 10:
            mechs = []
            while True:
                m = b.cstring()
                if m == "":
                    break
                mechs.append(m)
            msg = AuthenticationSASL(tuple(mechs))
        elif code == 11:
            msg = AuthenticationSASLContinue(b.rest())
        elif code == 12:
            msg = AuthenticationSASLFinal(b.rest())
        else:
            raise ProtocolError(f"unsupported authentication request {code}")
    elif type_byte == b"S":
        msg = ParameterStatus(b.cstring(), b.cstring())
    elif type_byte == b"K":
        msg = BackendKeyData(b.int32(), b.int32())
    elif type_byte == b"Z":
        msg = ReadyForQuery(b.byte().decode("latin-1"))
    elif type_byte == b"T":
        n = b.int16()
        fields = []
        for _ in range(max(n, 0)):
            name = b.cstring()
            table_oid, col, oid, size, mod, fmt = (b.int32(), b.int16(), b.int32(), b.int16(),
                                                   b.int32(), b.int16())
            fields.append(FieldDescription(name, oid & 0xFFFFFFFF, size, mod, fmt,
                                           table_oid & 0xFFFFFFFF, col))
        msg = RowDescription(tuple(fields))
    elif type_byte == b"D":
        n = b.int16()
        msg = DataRow(tuple(b.counted_bytes() for _ in range(max(n, 0))))
    elif type_byte == b"C":
        msg = CommandComplete(b.cstring())
    elif type_byte == b"I":
        msg = EmptyQueryResponse()
    elif type_byte == b"E":
        msg = ErrorResponse(_fields(b))
    elif type_byte == b"N":
        msg = NoticeResponse(_fields(b))
    elif type_byte in (b"1", b"2", b"3", b"n", b"s"):
        msg = {b"1": ParseComplete, b"2": BindComplete, b"3": CloseComplete, b"n": NoData,
               b"s": PortalSuspended}[type_byte]()
    elif type_byte == b"t":
        n = b.int16()
        msg = ParameterDescription(tuple(b.int32() & 0xFFFFFFFF for _ in range(max(n, 0))))
    elif type_byte == b"v":
        minor, n = b.int32(), b.int32()
        msg = NegotiateProtocolVersion(minor, tuple(b.cstring() for _ in range(max(n, 0))))
    else:
        raise ProtocolError(f"invalid backend message type {type_byte!r}")
    b.end()
    return msg


class BackendReader:
    """Parses bytes a server sends (the client side), for tests and tools.

    Call ``expect_negotiation_answer()`` after sending SSLRequest/GSSENCRequest: the next
    message is then the single unframed answer byte.
    """

    def __init__(self, max_message_bytes: int = 1 << 30) -> None:
        self.max_message_bytes = max_message_bytes
        self._buf = bytearray()
        self._negotiation = False

    def feed(self, data: bytes) -> None:
        self._buf += data

    def expect_negotiation_answer(self) -> None:
        self._negotiation = True

    def next_message(self) -> BackendMessage | NegotiationAnswer | None:
        buf = self._buf
        if self._negotiation:
            if not buf:
                return None
            byte = bytes(buf[:1])
            del buf[:1]
            self._negotiation = False
            if byte == b"E":  # an old server's error instead of an answer: let the caller see
                raise ProtocolError("server answered negotiation with an error")
            if byte not in (b"S", b"N"):
                raise ProtocolError("invalid negotiation answer")
            return NegotiationAnswer(byte == b"S")
        if len(buf) < 5:
            return None
        type_byte = bytes(buf[0:1])
        (length,) = _I32.unpack_from(buf, 1)
        if length < 4 or length - 4 > self.max_message_bytes:
            raise ProtocolError("invalid message length")
        if len(buf) < length + 1:
            return None
        body = bytes(buf[5:length + 1])
        del buf[:length + 1]
        try:
            return _parse_backend(type_byte, body)
        except CharacterEncodingError as exc:
            raise ProtocolError(exc.message) from None


@dataclass
class MessageBatch:
    """Encoded backend messages waiting to be written, so a reply goes out in one write."""

    parts: list[bytes] = field(default_factory=list)
    size: int = 0

    def add(self, message: BackendMessage | bytes) -> None:
        data = message if isinstance(message, (bytes, bytearray)) else message.encode()
        self.parts.append(data)
        self.size += len(data)

    def take(self) -> bytes:
        data = b"".join(self.parts)
        self.parts.clear()
        self.size = 0
        return data
