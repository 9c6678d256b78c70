"""Shared stand-ins for the wire tests: a fake engine, a fake catalog, a raw protocol client.

No tests live here. The fake engine implements proxy.wire.boundary.Answering (HushError for
refusals, QueryControl for cancellation) and the fake catalog CatalogQuestions, with canned
answers, so the wire front can be tested without a database. The fake's ``policies`` is a plain
namespace tests may edit; its settings and accounts are read from it on every call.
"""

from __future__ import annotations

import socket
import threading
import time
from decimal import Decimal
from fractions import Fraction
from types import SimpleNamespace
from typing import Any, Iterator

import pytest
from sqlglot import exp

from proxy.accounts import Accounts
from proxy.answer import Accuracy, Answer, OutputColumn
from proxy.engine import parse_epsilon
from proxy.errors import HushError
from proxy.sql.limits import Limits
from proxy.sql.statement import BoundStatement
from proxy.wire import codec
from proxy.wire.auth import make_verifier
from proxy.wire.server import start_in_thread

PASSWORD = "correct horse"
ANALYST = "planner"

COLUMNS = [OutputColumn("district", "text"), OutputColumn("households", "bigint", noisy=True),
           OutputColumn("avg_occupants", "double precision", noisy=True),
           OutputColumn("litres", "numeric", noisy=True)]
ROWS = [("Northbank", 120, 2.5, Decimal("1234.5")), ("Old Mill", 80, 3.25, Decimal("-0.1")),
        ("Harbourside", 0, None, Decimal("0"))]


class FakeEngine:
    """Answers any statement naming table ``households``; refuses the rest with 0A000.

    A statement containing ``slow_query`` waits (up to 5 s) until cancelled; one containing
    ``explode`` raises an exception whose text must never reach a client.
    """

    SECRET_TEXT = "/srv/secret/path.py: row value 4242"

    def __init__(self, budget: Decimal = Decimal("3")) -> None:
        self.policies = SimpleNamespace(
            defaults=SimpleNamespace(epsilon_per_query=Decimal("0.1"),
                                     largest_epsilon_per_query=Decimal("1.0"),
                                     smallest_epsilon_per_query=Decimal("0.001"), most_cells=10000),
            analysts={ANALYST: SimpleNamespace(password=make_verifier(PASSWORD), budget=budget,
                                               tables=["households"], disabled=False)},
            admins={}, limits=Limits())
        self.budget = budget
        self.spent = Decimal(0)
        self.calls: list[tuple[str, Any, Decimal | None]] = []
        self.fresh: list[bool] = []  # each answer's fresh flag, in order
        self.described: list[Any] = []
        self.cancelled = threading.Event()
        self.started = threading.Event()
        self.lock = threading.Lock()

    @staticmethod
    def text_of(statement: Any) -> str:
        if isinstance(statement, BoundStatement):
            statement = statement.substituted()
        return statement if isinstance(statement, str) else statement.sql(dialect="postgres")

    def _accept(self, statement: Any) -> str:
        if isinstance(statement, BoundStatement):
            statement = statement.substituted()
        if isinstance(statement, exp.Expression) and any(
                True for _ in statement.find_all(exp.Parameter, exp.Placeholder)):
            raise HushError("0A000", "parameters are not accepted")
        text = self.text_of(statement)
        if "households" not in text.lower():
            raise HushError("0A000", "only aggregates over granted tables are accepted",
                            hint="write SELECT COUNT(*) FROM households ...",
                            detail="the query reads no granted table")
        return text

    def describe(self, analyst: str, statement: Any) -> list[OutputColumn]:
        self._accept(statement)
        self.described.append(statement)
        return list(COLUMNS)

    def describe_planned(self, analyst: str, statement: Any) -> list[OutputColumn] | None:
        return None  # the fake plans nothing ahead: every Describe goes through describe

    def answer(self, analyst: str, statement: Any, *, epsilon: Decimal | None = None,
               control: Any = None, fresh: bool = False) -> Answer:
        text = self._accept(statement)
        with self.lock:
            self.calls.append((analyst, statement, epsilon))
            self.fresh.append(fresh)
        if "slow_query" in text:
            self.started.set()
            for _ in range(500):
                if control is not None and control.cancelled:
                    self.cancelled.set()
                    raise HushError("57014", "canceling statement due to user request")
                time.sleep(0.01)
        if "explode" in text:
            raise RuntimeError(self.SECRET_TEXT)
        eps = epsilon if epsilon is not None else Decimal("0.1")
        with self.lock:
            self.spent += eps
            remaining = self.budget - self.spent
        accuracy = [Accuracy("households", eps, Decimal(1), Fraction(10), Decimal("30"), ""),
                    Accuracy("avg_occupants", eps, None, None, None, "a ratio of noisy values")]
        return Answer(list(COLUMNS), list(ROWS), eps, remaining, accuracy, ["households"])

    def explain(self, analyst: str, statement: Any, *, epsilon: Decimal | None = None,
                form: str = "text", fresh: bool = False) -> Answer:
        self._accept(statement)
        eps = epsilon if epsilon is not None else Decimal("0.1")
        return Answer([OutputColumn("item", "text"), OutputColumn("value", "text")],
                      [("epsilon", str(eps)), ("table", "households")], Decimal(0),
                      self.remaining(analyst), [])

    def remaining(self, analyst: str) -> Decimal:
        with self.lock:
            return self.budget - self.spent

    @property
    def limits(self) -> Limits:
        return self.policies.limits

    @property
    def default_epsilon(self) -> Decimal:
        return Decimal(self.policies.defaults.epsilon_per_query)

    @property
    def accounts(self) -> Accounts:
        return Accounts(self.policies)

    def epsilon_for(self, epsilon: Decimal | str | None) -> Decimal:
        defaults = self.policies.defaults
        chosen = defaults.epsilon_per_query if epsilon is None else epsilon
        return parse_epsilon(chosen, defaults.largest_epsilon_per_query,
                             defaults.smallest_epsilon_per_query)

    def parameter_types(self, analyst: str, tree: exp.Expression) -> list[str | None]:
        return []  # no inference: untyped parameters stay text

    def close(self) -> None:
        pass


class FakeCatalog:
    """Claims queries on pg_catalog; answers with one fixed table."""

    def __init__(self) -> None:
        self.runs: list[tuple[str, str, list[Any]]] = []

    def is_catalog_query(self, tree: exp.Expression) -> bool:
        return any(t.db == "pg_catalog" for t in tree.find_all(exp.Table))

    def run(self, analyst: str, sql: str, params: list[Any],
            remaining: Decimal | None = None) -> tuple[list[Any], list[tuple]]:
        self.runs.append((analyst, sql, list(params)))
        return [OutputColumn("relname", "name"), OutputColumn("oid", "oid")], \
            [("households", 16384), ("readings", 16390)]

    def is_catalog_text(self, text: str) -> bool:
        return False  # claims parsed statements only

    def describe(self, analyst: str, sql: str) -> list[Any]:
        return [OutputColumn("relname", "name"), OutputColumn("oid", "oid")]

    def parameter_types(self, analyst: str, sql: str) -> list[int]:
        return []

    def close(self) -> None:
        pass


@pytest.fixture
def engine() -> FakeEngine:
    return FakeEngine()


@pytest.fixture
def server(engine: FakeEngine) -> Iterator[tuple[str, int]]:
    """A wire server on a free loopback port, backed by the fake engine."""
    host, port, stop = start_in_thread(engine, max_connections=8, max_message_bytes=64 * 1024)
    try:
        yield host, port
    finally:
        stop()


def dsn(address: tuple[str, int], user: str = ANALYST, password: str = PASSWORD,
        **extra: str) -> str:
    host, port = address
    parts = {"host": host, "port": str(port), "user": user, "password": password,
             "dbname": "demo", "sslmode": "disable", "connect_timeout": "5", **extra}
    return " ".join(f"{k}='{v}'" for k, v in parts.items())


class RawClient:
    """A protocol client over a plain socket, built on the codec (for malformed-input tests)."""

    def __init__(self, address: tuple[str, int]) -> None:
        self.sock = socket.create_connection(address, timeout=5)
        self.reader = codec.BackendReader()

    def send(self, data: bytes) -> None:
        self.sock.sendall(data)

    def receive(self) -> Any:
        """The next backend message; raises EOFError when the server closed the socket."""
        while True:
            msg = self.reader.next_message()
            if msg is not None:
                return msg
            data = self.sock.recv(65536)
            if not data:
                raise EOFError
            self.reader.feed(data)

    def until(self, kind: type) -> list[Any]:
        """Messages up to and including the first of this type."""
        seen = []
        while True:
            msg = self.receive()
            seen.append(msg)
            if isinstance(msg, kind):
                return seen

    def closed(self) -> bool:
        """Whether the server has closed its side (after reading anything left)."""
        try:
            while True:
                self.receive()
        except EOFError:
            return True
        except (socket.timeout, OSError):
            return False

    def login(self, user: str = ANALYST, password: str = PASSWORD) -> list[Any]:
        """Startup and SCRAM; returns the messages after authentication, to ReadyForQuery."""
        import scramp

        self.send(codec.StartupMessage({"user": user, "database": "demo"}).encode())
        sasl = self.receive()
        if isinstance(sasl, codec.ErrorResponse):  # refused before any exchange
            return [sasl]
        assert isinstance(sasl, codec.AuthenticationSASL)
        client = scramp.ScramClient(list(sasl.mechanisms), user, password)
        self.send(codec.SASLInitialResponse("SCRAM-SHA-256",
                                            client.get_client_first().encode()).encode())
        cont = self.receive()
        if isinstance(cont, codec.ErrorResponse):
            return [cont]
        client.set_server_first(cont.data.decode())
        self.send(codec.PasswordData(client.get_client_final().encode()).encode())
        return self.until((codec.ReadyForQuery, codec.ErrorResponse))  # type: ignore[arg-type]

    def close(self) -> None:
        self.sock.close()
