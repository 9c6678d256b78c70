"""Everything that affects the connection state lives here, as tables of transitions.

Two machines describe one connection:

- ``PHASES``: where the conversation is (negotiating, authenticating, serving queries, skipping
  to Sync after an extended-query error, closed) and, for each message or outcome that can
  arrive in a phase, the next phase and whether the message is handled or silently dropped.
  A (phase, event) pair absent from the table is a protocol violation (08P01).
- ``TRANSACTIONS``: the transaction status reported in ReadyForQuery ('I' idle, 'T' in a block,
  'E' in a failed block) and how BEGIN, COMMIT, ROLLBACK, savepoints and ordinary statements
  move it, including which of them are refused, warned about or renamed.

The server and session consult these tables instead of testing states in scattered ``if``s, so
the whole protocol logic can be read (and tested) here. The behaviour follows PostgreSQL's
(protocol chapter "Message Flow", and its transaction commands' documented warnings).
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import Enum
from typing import Mapping

from proxy.errors import (ACTIVE_SQL_TRANSACTION, IN_FAILED_SQL_TRANSACTION,
                          NO_ACTIVE_SQL_TRANSACTION, PROTOCOL_VIOLATION, HushError)
from proxy.wire import codec

FAILED_BLOCK_MESSAGE = "current transaction is aborted, commands ignored until end of transaction block"
FAILED_BLOCK_HINT = "Send ROLLBACK to end the failed transaction block."


# --------------------------------------------------------------------------- protocol phases


class Phase(Enum):
    STARTUP = "waiting for the startup packet"
    STARTUP_AFTER_GSS = "GSS encryption refused, waiting for the startup packet"
    STARTUP_AFTER_SSL = "TLS settled, waiting for the startup packet"
    SASL_INITIAL = "waiting for the SASL initial response"
    SASL_CONTINUE = "waiting for the SASL response"
    READY = "serving queries"
    SKIP_TO_SYNC = "skipping messages until Sync after an error"
    CLOSED = "closed"


class Event(Enum):
    # messages from the client
    SSL_REQUEST = "SSLRequest"
    GSSENC_REQUEST = "GSSENCRequest"
    CANCEL_REQUEST = "CancelRequest"
    STARTUP = "StartupMessage"
    PASSWORD = "password message"
    QUERY = "Query"
    PARSE = "Parse"
    BIND = "Bind"
    DESCRIBE = "Describe"
    EXECUTE = "Execute"
    CLOSE = "Close"
    SYNC = "Sync"
    FLUSH = "Flush"
    FUNCTION_CALL = "FunctionCall"
    COPY = "Copy message"
    TERMINATE = "Terminate"
    # outcomes reported by the server after handling a message
    AUTH_STARTED = "authentication started"
    AUTH_CONTINUED = "authentication continued"
    AUTH_SUCCEEDED = "authentication succeeded"
    AUTH_FAILED = "authentication failed"
    EXTENDED_FAILED = "extended-query message failed"
    FATAL = "fatal error"


class Act(Enum):
    HANDLE = "handle"
    IGNORE = "ignore"


@dataclass(frozen=True, slots=True)
class Step:
    next: Phase
    act: Act = Act.HANDLE


_STARTUPS = (Phase.STARTUP, Phase.STARTUP_AFTER_GSS, Phase.STARTUP_AFTER_SSL)
_QUERY_EVENTS = (Event.QUERY, Event.PARSE, Event.BIND, Event.DESCRIBE, Event.EXECUTE,
                 Event.CLOSE, Event.SYNC, Event.FLUSH, Event.FUNCTION_CALL)

# Messages of the extended-query protocol: an error while handling one skips to Sync.
EXTENDED_EVENTS = frozenset({Event.PARSE, Event.BIND, Event.DESCRIBE, Event.EXECUTE,
                             Event.CLOSE})


def _build_phases() -> dict[tuple[Phase, Event], Step]:
    t: dict[tuple[Phase, Event], Step] = {}
    # Negotiation: GSS may be refused first, then SSL; once SSL is settled only startup follows.
    t[Phase.STARTUP, Event.GSSENC_REQUEST] = Step(Phase.STARTUP_AFTER_GSS)
    t[Phase.STARTUP, Event.SSL_REQUEST] = Step(Phase.STARTUP_AFTER_SSL)
    t[Phase.STARTUP_AFTER_GSS, Event.SSL_REQUEST] = Step(Phase.STARTUP_AFTER_SSL)
    for p in _STARTUPS:
        t[p, Event.CANCEL_REQUEST] = Step(Phase.CLOSED)
        t[p, Event.STARTUP] = Step(p)  # handled; the outcome moves on
        t[p, Event.AUTH_STARTED] = Step(Phase.SASL_INITIAL)
    # SCRAM: initial response, then the final response.
    t[Phase.SASL_INITIAL, Event.PASSWORD] = Step(Phase.SASL_INITIAL)
    t[Phase.SASL_INITIAL, Event.AUTH_CONTINUED] = Step(Phase.SASL_CONTINUE)
    t[Phase.SASL_CONTINUE, Event.PASSWORD] = Step(Phase.SASL_CONTINUE)
    t[Phase.SASL_CONTINUE, Event.AUTH_SUCCEEDED] = Step(Phase.READY)
    for p in (Phase.SASL_INITIAL, Phase.SASL_CONTINUE):
        t[p, Event.AUTH_FAILED] = Step(Phase.CLOSED)
    # Serving: everything is handled; Copy messages outside COPY are ignored (protocol docs).
    for e in _QUERY_EVENTS:
        t[Phase.READY, e] = Step(Phase.READY)
    t[Phase.READY, Event.COPY] = Step(Phase.READY, Act.IGNORE)
    t[Phase.READY, Event.EXTENDED_FAILED] = Step(Phase.SKIP_TO_SYNC)
    # After an extended-query error, drop everything until Sync.
    for e in _QUERY_EVENTS + (Event.COPY,):
        t[Phase.SKIP_TO_SYNC, e] = Step(Phase.SKIP_TO_SYNC, Act.IGNORE)
    t[Phase.SKIP_TO_SYNC, Event.SYNC] = Step(Phase.READY)
    t[Phase.SKIP_TO_SYNC, Event.EXTENDED_FAILED] = Step(Phase.SKIP_TO_SYNC)
    # Leaving is always allowed once a session can exist; a fatal error ends any phase.
    for p in Phase:
        if p is not Phase.CLOSED:
            t[p, Event.FATAL] = Step(Phase.CLOSED)
            if p not in _STARTUPS:
                t[p, Event.TERMINATE] = Step(Phase.CLOSED)
    return t


PHASES: Mapping[tuple[Phase, Event], Step] = _build_phases()

_EVENT_OF_MESSAGE: Mapping[type, Event] = {
    codec.SSLRequest: Event.SSL_REQUEST,
    codec.GSSENCRequest: Event.GSSENC_REQUEST,
    codec.CancelRequest: Event.CANCEL_REQUEST,
    codec.StartupMessage: Event.STARTUP,
    codec.PasswordData: Event.PASSWORD,
    codec.Query: Event.QUERY,
    codec.Parse: Event.PARSE,
    codec.Bind: Event.BIND,
    codec.Describe: Event.DESCRIBE,
    codec.Execute: Event.EXECUTE,
    codec.Close: Event.CLOSE,
    codec.Sync: Event.SYNC,
    codec.Flush: Event.FLUSH,
    codec.FunctionCall: Event.FUNCTION_CALL,
    codec.CopyMessage: Event.COPY,
    codec.Terminate: Event.TERMINATE,
}


def event_of(message: object) -> Event:
    """The event a frontend message (or message class) is; every codec frontend message has one."""
    return _EVENT_OF_MESSAGE[message if isinstance(message, type) else type(message)]


class ConnectionMachine:
    """The phase of one connection, moved only through ``PHASES``."""

    def __init__(self) -> None:
        self.phase = Phase.STARTUP

    def step(self, event: Event) -> Step:
        """Applies an event; raises HushError 08P01 when the table has no such transition."""
        step = PHASES.get((self.phase, event))
        if step is None:
            what = self.phase.value
            self.phase = Phase.CLOSED
            raise HushError(PROTOCOL_VIOLATION, f"unexpected {event.value} while {what}")
        self.phase = step.next
        return step


# --------------------------------------------------------------------------- transactions


class TxStatus(Enum):
    IDLE = "I"
    IN_BLOCK = "T"
    FAILED = "E"


class TxEvent(Enum):
    BEGIN = "BEGIN"
    COMMIT = "COMMIT"
    ROLLBACK = "ROLLBACK"
    SAVEPOINT = "SAVEPOINT"
    RELEASE = "RELEASE"
    ROLLBACK_TO = "ROLLBACK TO SAVEPOINT"
    OUTSIDE_BLOCK_ONLY = "statement that cannot run inside a transaction block"
    STATEMENT = "statement"
    STATEMENT_FAILED = "failed statement"


@dataclass(frozen=True, slots=True)
class TxStep:
    """Status after the event; a refusal (error) or warning to send; a command tag override.

    ``ends_block`` says a transaction block ended here (portals close, settings settle);
    ``rolls_back`` says its settings changes are undone.
    """

    next: TxStatus
    refuse: tuple[str, str] | None = None
    warn: tuple[str, str] | None = None
    tag: str | None = None
    ends_block: bool = False
    rolls_back: bool = False


_I, _T, _E = TxStatus.IDLE, TxStatus.IN_BLOCK, TxStatus.FAILED
_FAILED = (IN_FAILED_SQL_TRANSACTION, FAILED_BLOCK_MESSAGE)


def _only_in_block(what: str) -> tuple[str, str]:
    return (NO_ACTIVE_SQL_TRANSACTION, f"{what} can only be used in transaction blocks")


TRANSACTIONS: Mapping[tuple[TxStatus, TxEvent], TxStep] = {
    (_I, TxEvent.BEGIN): TxStep(_T),
    (_T, TxEvent.BEGIN): TxStep(_T, warn=(ACTIVE_SQL_TRANSACTION,
                                          "there is already a transaction in progress")),
    (_E, TxEvent.BEGIN): TxStep(_E, refuse=_FAILED),
    (_I, TxEvent.COMMIT): TxStep(_I, warn=(NO_ACTIVE_SQL_TRANSACTION,
                                           "there is no transaction in progress")),
    (_T, TxEvent.COMMIT): TxStep(_I, ends_block=True),
    (_E, TxEvent.COMMIT): TxStep(_I, tag="ROLLBACK", ends_block=True, rolls_back=True),
    (_I, TxEvent.ROLLBACK): TxStep(_I, warn=(NO_ACTIVE_SQL_TRANSACTION,
                                             "there is no transaction in progress")),
    (_T, TxEvent.ROLLBACK): TxStep(_I, ends_block=True, rolls_back=True),
    (_E, TxEvent.ROLLBACK): TxStep(_I, ends_block=True, rolls_back=True),
    (_I, TxEvent.SAVEPOINT): TxStep(_I, refuse=_only_in_block("SAVEPOINT")),
    (_T, TxEvent.SAVEPOINT): TxStep(_T),
    (_E, TxEvent.SAVEPOINT): TxStep(_E, refuse=_FAILED),
    (_I, TxEvent.RELEASE): TxStep(_I, refuse=_only_in_block("RELEASE SAVEPOINT")),
    (_T, TxEvent.RELEASE): TxStep(_T),
    (_E, TxEvent.RELEASE): TxStep(_E, refuse=_FAILED),
    (_I, TxEvent.ROLLBACK_TO): TxStep(_I, refuse=_only_in_block("ROLLBACK TO SAVEPOINT")),
    (_T, TxEvent.ROLLBACK_TO): TxStep(_T),
    (_E, TxEvent.ROLLBACK_TO): TxStep(_T),
    (_I, TxEvent.OUTSIDE_BLOCK_ONLY): TxStep(_I),
    (_T, TxEvent.OUTSIDE_BLOCK_ONLY): TxStep(_E, refuse=(
        ACTIVE_SQL_TRANSACTION, "this statement cannot run inside a transaction block")),
    (_E, TxEvent.OUTSIDE_BLOCK_ONLY): TxStep(_E, refuse=_FAILED),
    (_I, TxEvent.STATEMENT): TxStep(_I),
    (_T, TxEvent.STATEMENT): TxStep(_T),
    (_E, TxEvent.STATEMENT): TxStep(_E, refuse=_FAILED),
    (_I, TxEvent.STATEMENT_FAILED): TxStep(_I),
    (_T, TxEvent.STATEMENT_FAILED): TxStep(_E),
    (_E, TxEvent.STATEMENT_FAILED): TxStep(_E),
}


class TransactionMachine:
    """The transaction status of one session, moved only through ``TRANSACTIONS``."""

    def __init__(self) -> None:
        self.status = TxStatus.IDLE

    def peek(self, event: TxEvent) -> TxStep:
        """The step the event would take, without taking it."""
        return TRANSACTIONS[self.status, event]

    def step(self, event: TxEvent) -> TxStep:
        """Applies the event and returns its step (the caller sends any refusal or warning)."""
        step = TRANSACTIONS[self.status, event]
        self.status = step.next
        return step
