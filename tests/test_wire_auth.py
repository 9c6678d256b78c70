"""SCRAM-SHA-256: the RFC 7677 example exchange, verifiers, and failure without enumeration."""

from __future__ import annotations

import base64
import re

import pytest
import scramp

from proxy.wire import auth

# RFC 7677, section 3 ("SCRAM-SHA-256 and SCRAM-SHA-256-PLUS"), example exchange.
RFC_USER = "user"
RFC_PASSWORD = "pencil"
RFC_CLIENT_NONCE = "rOprNGfwEbeRWgbNEkqO"
RFC_SERVER_NONCE = "%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0"
RFC_SALT = "W22ZaJ0SNY7soEsUEjb6gQ=="
RFC_ITERATIONS = 4096
RFC_CLIENT_FIRST = "n,,n=user,r=rOprNGfwEbeRWgbNEkqO"
RFC_SERVER_FIRST = ("r=rOprNGfwEbeRWgbNEkqO%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0,"
                    "s=W22ZaJ0SNY7soEsUEjb6gQ==,i=4096")
RFC_CLIENT_FINAL = ("c=biws,r=rOprNGfwEbeRWgbNEkqO%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0,"
                    "p=dHzbZapWIk4jUhN+Ute9ytag9zjfMHgsqmmiz7AndVQ=")
RFC_SERVER_FINAL = "v=6rriTRBi23WpRR/wtup+mMhUZUn/dB5nLTJRsjl95G4="


def _rfc_verifier() -> auth.Verifier:
    text = auth.make_verifier(RFC_PASSWORD, iterations=RFC_ITERATIONS,
                              salt=base64.b64decode(RFC_SALT))
    return auth.parse_verifier(text)


def test_rfc7677_example_exchange() -> None:
    """Both sides driven through RFC 7677's example; every message matches the RFC's."""
    client = scramp.ScramClient(["SCRAM-SHA-256"], RFC_USER, RFC_PASSWORD,
                                c_nonce=RFC_CLIENT_NONCE)
    server = auth.ScramExchange(RFC_USER, _rfc_verifier(), server_nonce=RFC_SERVER_NONCE)
    client_first = client.get_client_first()
    assert client_first == RFC_CLIENT_FIRST
    server_first = server.first(client_first.encode()).decode()
    assert server_first == RFC_SERVER_FIRST
    client.set_server_first(server_first)
    client_final = client.get_client_final()
    assert client_final == RFC_CLIENT_FINAL  # the client proof of RFC 7677
    server_final = server.final(client_final.encode()).decode()
    assert server_final == RFC_SERVER_FINAL  # the server signature of RFC 7677
    client.set_server_final(server_final)


def test_verifier_format_matches_postgresql() -> None:
    text = auth.make_verifier("s3cret")
    # PostgreSQL's stored form (documentation of pg_authid.rolpassword).
    assert re.fullmatch(r"SCRAM-SHA-256\$4096:[A-Za-z0-9+/=]+\$[A-Za-z0-9+/=]+:[A-Za-z0-9+/=]+",
                        text)
    v = auth.parse_verifier(text)
    assert len(v.salt) == 16 and len(v.stored_key) == 32 and len(v.server_key) == 32
    assert str(v) == text
    assert auth.verify_password("s3cret", text)
    assert not auth.verify_password("s3cret ", text)
    assert auth.make_verifier("s3cret") != text  # a fresh salt each time


@pytest.mark.parametrize("bad", ["", "md5abc", "SCRAM-SHA-256$4096:c2FsdA==$a:b",
                                 "SCRAM-SHA-256$100:" + "A" * 24 + "$" + "A" * 44 + ":" + "A" * 44])
def test_parse_verifier_refuses_malformed(bad: str) -> None:
    with pytest.raises(ValueError):
        auth.parse_verifier(bad)


def _attempt(username: str, verifier: auth.Verifier | None, password: str,
             empty_scram_name: bool = False) -> str:
    """Runs one exchange as a client would; 'ok' or the step at which it failed."""
    client = scramp.ScramClient(["SCRAM-SHA-256"], username, password)
    first = client.get_client_first()
    if empty_scram_name:  # what libpq sends: the name is taken from the startup packet
        first = first.replace(f"n={username},", "n=,")
        client.client_first_bare = first[3:]
    server = auth.ScramExchange(username, verifier)
    try:
        server_first = server.first(first.encode())
    except auth.AuthenticationFailed:
        return "first"
    client.set_server_first(server_first.decode())
    try:
        server.final(client.get_client_final().encode())
    except auth.AuthenticationFailed:
        return "final"
    return "ok"


def test_right_password_with_and_without_scram_user_name() -> None:
    verifier = auth.parse_verifier(auth.make_verifier("pw"))
    assert _attempt("planner", verifier, "pw") == "ok"
    assert _attempt("planner", verifier, "pw", empty_scram_name=True) == "ok"


def test_unknown_user_fails_exactly_where_a_wrong_password_does() -> None:
    verifier = auth.parse_verifier(auth.make_verifier("pw"))
    assert _attempt("planner", verifier, "wrong") == "final"
    assert _attempt("nobody", None, "pw") == "final"
    assert _attempt("nobody", None, "anything", empty_scram_name=True) == "final"


def test_dummy_verifiers_look_like_real_ones() -> None:
    a, b = auth.dummy_verifier("alice"), auth.dummy_verifier("bob")
    assert a == auth.dummy_verifier("alice")  # stable per name: probing twice reveals nothing
    assert a.salt != b.salt  # and different between names, like real accounts
    assert a.iterations == auth.DEFAULT_ITERATIONS and len(a.salt) == 16


@pytest.mark.parametrize("client_first", [b"", b"n,,", b"garbage", b"n,,r=abc", b"\xff\xfe",
                                          b"p=tls-unique,,n=,r=abc"])
def test_malformed_client_first_fails_cleanly(client_first: bytes) -> None:
    server = auth.ScramExchange("planner", auth.parse_verifier(auth.make_verifier("pw")))
    with pytest.raises(auth.AuthenticationFailed):
        server.first(client_first)


def test_replayed_or_tampered_final_fails() -> None:
    verifier = auth.parse_verifier(auth.make_verifier("pw"))
    client = scramp.ScramClient(["SCRAM-SHA-256"], "planner", "pw")
    server = auth.ScramExchange("planner", verifier)
    client.set_server_first(server.first(client.get_client_first().encode()).decode())
    final = client.get_client_final()
    tampered = final[:-5] + ("A" if final[-5] != "A" else "B") + final[-4:]
    with pytest.raises(auth.AuthenticationFailed):
        server.final(tampered.encode())
