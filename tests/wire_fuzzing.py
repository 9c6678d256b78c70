"""Random and mutated protocol input for fuzzing the wire front (tests and the longer script
benchmarks/fuzz_wire.py). No tests live here.

Each case is one connection: bytes to send before logging in, or (after a real login) a byte
string built from valid frontend messages that are then mutated (bytes flipped, cut, repeated,
lengths changed, unknown type bytes). ``run_case`` sends a case and reads whatever comes back
until the server closes or goes quiet, and checks that what came back is well-formed protocol
with no internal error (XX000) in it.
"""

from __future__ import annotations

import random
import socket
import struct
from dataclasses import dataclass

from proxy.wire import codec

SQL_PIECES = [
    "SELECT count(*) FROM households", "SELECT district, count(*) FROM households GROUP BY 1",
    "SELECT avg(occupants) FROM households WHERE district = $1", "SHOW hushql.epsilon",
    "SET hushql.epsilon = 0.2", "BEGIN", "COMMIT", "ROLLBACK", "SAVEPOINT a", "LISTEN x",
    "SELECT * FROM pg_catalog.pg_class", "EXPLAIN SELECT count(*) FROM households",
    "SELECT 'unterminated", "SELECT $$x", "/* open comment", "DISCARD ALL", "DEALLOCATE ALL",
    "SELECT count(*) FROM households WHERE occupants IN (1, 2, 3)", "", ";", "SELECT 1; SELECT 2",
    "SET statement_timeout = 1", "RESET ALL", "SELECT slow_query FROM households",
]


@dataclass
class Case:
    login: bool  # log in properly first, then send ``data``
    data: bytes


def _string(rng: random.Random) -> str:
    if rng.random() < 0.7:
        return rng.choice(SQL_PIECES)
    return "".join(rng.choice("SELECT()'\"$;,*/-\\ \x00é\U0001f600abc123") for _ in
                   range(rng.randrange(0, 60)))


def _message(rng: random.Random) -> bytes:
    """One frontend message, valid or nearly so."""
    pick = rng.randrange(11)
    try:
        if pick == 0:
            return codec.Query(_string(rng).replace("\x00", "")).encode()
        if pick == 1:
            return codec.Parse(rng.choice(["", "s1", "s2"]), _string(rng).replace("\x00", ""),
                               tuple(rng.choice([0, 23, 25, 705, 999999]) for _ in
                                     range(rng.randrange(3)))).encode()
        if pick == 2:
            params = tuple(rng.choice([None, b"1", b"abc", b"\x00\x00\x00\x01",
                                       rng.randbytes(rng.randrange(12))])
                           for _ in range(rng.randrange(3)))
            return codec.Bind(rng.choice(["", "p1"]), rng.choice(["", "s1", "s2"]),
                              tuple(rng.choice([0, 1]) for _ in range(rng.randrange(3))),
                              params,
                              tuple(rng.choice([0, 1]) for _ in range(rng.randrange(2)))).encode()
        if pick == 3:
            return codec.Describe(rng.choice("SP"), rng.choice(["", "s1", "p1"])).encode()
        if pick == 4:
            return codec.Execute(rng.choice(["", "p1"]), rng.randrange(-1, 3)).encode()
        if pick == 5:
            return codec.Close(rng.choice("SP"), rng.choice(["", "s1", "p1"])).encode()
        if pick == 6:
            return codec.Sync().encode()
        if pick == 7:
            return codec.Flush().encode()
        if pick == 8:
            return bytes([rng.choice(b"dcfFp")]) + struct.pack("!i", 4 + 3) + b"abc"
        if pick == 9:  # a random type byte and body
            body = rng.randbytes(rng.randrange(16))
            return bytes([rng.randrange(256)]) + struct.pack("!i", len(body) + 4) + body
        return codec.Sync().encode()
    except ValueError:  # a NUL the encoder refuses
        return codec.Sync().encode()


def _mutate(rng: random.Random, data: bytes) -> bytes:
    out = bytearray(data)
    for _ in range(rng.randrange(1, 4)):
        if not out:
            break
        kind = rng.randrange(5)
        at = rng.randrange(len(out))
        if kind == 0:
            out[at] = rng.randrange(256)
        elif kind == 1:
            del out[at:at + rng.randrange(1, 8)]
        elif kind == 2:
            out[at:at] = rng.randbytes(rng.randrange(1, 8))
        elif kind == 3 and at + 5 <= len(out):  # a length word changed
            out[at + 1:at + 5] = struct.pack("!i", rng.choice([-1, 0, 3, 5, 1 << 20, 1 << 30]))
        else:
            out += out[at:at + rng.randrange(1, 32)]
    return bytes(out)


def _startup(rng: random.Random) -> bytes:
    pick = rng.randrange(6)
    if pick == 0:
        return rng.randbytes(rng.randrange(1, 64))
    if pick == 1:
        return codec.SSLRequest().encode() + rng.randbytes(rng.randrange(8))
    if pick == 2:
        return codec.CancelRequest(rng.randrange(1 << 31), rng.randrange(-(1 << 31), 1 << 31)
                                   ).encode()
    params = {"user": rng.choice(["planner", "nobody", "", "x" * 200]), "database": "demo"}
    if rng.random() < 0.3:
        params["options"] = rng.choice(["-c datestyle=ISO", "-x", "--a=b", "-c search_path"])
    data = codec.StartupMessage(params).encode()
    if pick == 3:
        data += codec.SASLInitialResponse("SCRAM-SHA-256", rng.randbytes(rng.randrange(40))
                                          ).encode()
    return _mutate(rng, data) if pick == 5 else data


def make_case(rng: random.Random) -> Case:
    """One random case: a mutated login half the time, else mutated messages after login."""
    if rng.random() < 0.5:
        return Case(False, _startup(rng))
    data = b"".join(_message(rng) for _ in range(rng.randrange(1, 8)))
    if rng.random() < 0.6:
        data = _mutate(rng, data)
    return Case(True, data)


class BadAnswer(AssertionError):
    """The server sent something malformed, or an internal error."""


def run_case(address: tuple[str, int], case: Case, *, quiet_seconds: float = 0.3) -> int:
    """Sends one case (logging in first as the fake engine's analyst when it says so) and reads
    the answers until the server closes or is quiet for ``quiet_seconds``; returns how many
    messages came back. Raises BadAnswer."""
    from tests.test_wire_fakes import RawClient

    client = RawClient(address)
    try:
        if case.login:
            assert isinstance(client.login()[-1], codec.ReadyForQuery)
        elif case.data[:8] in (codec.SSLRequest().encode(), codec.GSSENCRequest().encode()):
            client.reader.expect_negotiation_answer()
        client.sock.sendall(case.data)
        client.sock.settimeout(quiet_seconds)
        count = 0
        while True:
            try:
                msg = client.receive()
            except (EOFError, socket.timeout, ConnectionError):
                break
            except codec.ProtocolError as err:
                raise BadAnswer(f"malformed answer: {err.message}") from None
            count += 1
            if isinstance(msg, codec.ErrorResponse) and msg.get("C") == "XX000":
                raise BadAnswer(f"internal error for {case.data[:80]!r}")
        return count
    finally:
        client.close()
