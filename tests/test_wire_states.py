"""The connection and transaction state tables."""

from __future__ import annotations

import pytest

from proxy.errors import HushError
from proxy.wire.states import (EXTENDED_EVENTS, PHASES, TRANSACTIONS, Act, ConnectionMachine,
                               Event, Phase, TransactionMachine, TxEvent, TxStatus)

MESSAGE_EVENTS = [e for e in Event if e.name not in (
    "AUTH_STARTED", "AUTH_CONTINUED", "AUTH_SUCCEEDED", "AUTH_FAILED", "EXTENDED_FAILED",
    "FATAL")]


def _machine_at(*events: Event) -> ConnectionMachine:
    m = ConnectionMachine()
    for e in events:
        m.step(e)
    return m


LOGGED_IN = (Event.STARTUP, Event.AUTH_STARTED, Event.PASSWORD, Event.AUTH_CONTINUED,
             Event.PASSWORD, Event.AUTH_SUCCEEDED)


def test_a_normal_life() -> None:
    m = _machine_at(Event.GSSENC_REQUEST, Event.SSL_REQUEST, *LOGGED_IN)
    assert m.phase is Phase.READY
    for e in (Event.QUERY, Event.PARSE, Event.BIND, Event.EXECUTE, Event.SYNC):
        assert m.step(e).act is Act.HANDLE
    m.step(Event.TERMINATE)
    assert m.phase is Phase.CLOSED


@pytest.mark.parametrize("event", [Event.QUERY, Event.PARSE, Event.SYNC, Event.PASSWORD,
                                   Event.TERMINATE])
def test_nothing_but_negotiation_before_startup(event: Event) -> None:
    with pytest.raises(HushError) as caught:
        ConnectionMachine().step(event)
    assert caught.value.sqlstate == "08P01"


def test_negotiation_order_and_repeats() -> None:
    with pytest.raises(HushError):  # SSL is settled once; GSS cannot follow it
        _machine_at(Event.SSL_REQUEST, Event.GSSENC_REQUEST)
    with pytest.raises(HushError):
        _machine_at(Event.SSL_REQUEST, Event.SSL_REQUEST)
    assert _machine_at(Event.CANCEL_REQUEST).phase is Phase.CLOSED


def test_queries_are_refused_until_authenticated() -> None:
    with pytest.raises(HushError):
        _machine_at(Event.STARTUP, Event.AUTH_STARTED, Event.QUERY)
    with pytest.raises(HushError):  # a password message after login is out of order
        _machine_at(*LOGGED_IN, Event.PASSWORD)
    assert _machine_at(Event.STARTUP, Event.AUTH_STARTED, Event.PASSWORD,
                       Event.AUTH_FAILED).phase is Phase.CLOSED


def test_an_extended_error_skips_to_sync() -> None:
    m = _machine_at(*LOGGED_IN, Event.PARSE, Event.EXTENDED_FAILED)
    for e in (Event.BIND, Event.EXECUTE, Event.QUERY, Event.FLUSH, Event.COPY):
        assert m.step(e).act is Act.IGNORE
    assert m.step(Event.SYNC).act is Act.HANDLE
    assert m.phase is Phase.READY


def test_every_phase_but_closed_can_fail_and_the_table_is_total_where_it_must_be() -> None:
    for phase in Phase:
        if phase is not Phase.CLOSED:
            assert PHASES[phase, Event.FATAL].next is Phase.CLOSED
    for event in MESSAGE_EVENTS:
        assert (Phase.CLOSED, event) not in PHASES  # nothing is read after the close
    for event in (Event.QUERY, Event.SYNC, Event.FLUSH, *EXTENDED_EVENTS):
        assert (Phase.READY, event) in PHASES and (Phase.SKIP_TO_SYNC, event) in PHASES


def _tx(*events: TxEvent) -> TransactionMachine:
    m = TransactionMachine()
    for e in events:
        m.step(e)
    return m


def test_transaction_status_follows_postgresql() -> None:
    assert _tx(TxEvent.BEGIN).status is TxStatus.IN_BLOCK
    assert _tx(TxEvent.BEGIN, TxEvent.STATEMENT_FAILED).status is TxStatus.FAILED
    assert _tx(TxEvent.STATEMENT_FAILED).status is TxStatus.IDLE  # no block, nothing to fail
    failed = _tx(TxEvent.BEGIN, TxEvent.STATEMENT_FAILED)
    assert failed.step(TxEvent.STATEMENT).refuse[0] == "25P02"
    assert failed.step(TxEvent.BEGIN).refuse[0] == "25P02"
    step = failed.step(TxEvent.COMMIT)  # COMMIT of a failed block is a rollback
    assert step.tag == "ROLLBACK" and step.rolls_back and failed.status is TxStatus.IDLE
    assert _tx(TxEvent.BEGIN, TxEvent.STATEMENT_FAILED,
               TxEvent.ROLLBACK_TO).status is TxStatus.IN_BLOCK


def test_transaction_warnings_and_refusals() -> None:
    assert _tx().step(TxEvent.COMMIT).warn[0] == "25P01"
    assert _tx(TxEvent.BEGIN).step(TxEvent.BEGIN).warn[0] == "25001"
    assert _tx().step(TxEvent.SAVEPOINT).refuse[0] == "25P01"
    block = _tx(TxEvent.BEGIN)
    assert block.step(TxEvent.OUTSIDE_BLOCK_ONLY).refuse[0] == "25001"
    assert block.status is TxStatus.FAILED  # the refusal fails the block


def test_transaction_table_is_total() -> None:
    for status in TxStatus:
        for event in TxEvent:
            assert (status, event) in TRANSACTIONS
