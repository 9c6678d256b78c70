"""Tests for proxy.answer_notes without a database: a stand-in ledger that can be held.

What must hold: notes are written in the order given, several per call, and each stays
findable (``pending``) until written; a note whose store fails gets its outcome recorded alone;
the queue's memory is bounded (an answer waits for room, then gives its note up); closing writes
what is queued.
"""

from __future__ import annotations

import datetime as dt
import threading
import time
from decimal import Decimal

import pytest

from proxy import answer_notes
from proxy.answer_notes import AnswerNotes, Note


class HeldLedger:
    """Records store_answers and finish calls; store_answers waits while ``held`` is clear."""

    def __init__(self, *, fail: bool = False) -> None:
        self.held = threading.Event()
        self.held.set()
        self.fail = fail
        self.batches: list[list[int]] = []
        self.finished: list[int] = []

    def store_answers(self, notes: list[Note]) -> list[bool]:
        self.held.wait(30)
        self.batches.append([n.charge_id for n in notes])
        if self.fail:
            raise OSError("the ledger went away")
        return [True] * len(notes)

    def finish(self, charge_id: int, outcome: str) -> None:
        assert outcome == "answered"
        self.finished.append(charge_id)


def note(charge: int, question: str = "q", size: int = 10) -> Note:
    return Note("tester", question, "SELECT 1", Decimal("0.1"), charge, '"' + "x" * size + '"',
                dt.datetime(2026, 12, 2, tzinfo=dt.timezone.utc))


def test_notes_are_written_in_order_in_batches_and_found_until_written() -> None:
    ledger = HeldLedger()
    ledger.held.clear()
    notes = AnswerNotes(ledger)  # type: ignore[arg-type]
    try:
        for charge in range(1, 6):
            notes.add(note(charge, question=f"q{charge}"))
        found = notes.pending("tester", "q3")
        assert found is not None and found.charge_id == 3 and found.answer == "x" * 10
        assert notes.pending("other analyst", "q3") is None
        ledger.held.set()
        assert notes.flush(10)
        assert notes.pending("tester", "q3") is None
        assert [c for batch in ledger.batches for c in batch] == [1, 2, 3, 4, 5]
        assert len(ledger.batches) < 5  # the ones queued while the first was held went together
        assert ledger.finished == []
    finally:
        notes.close()


def test_a_note_that_cannot_be_stored_still_records_its_outcome() -> None:
    ledger = HeldLedger(fail=True)
    notes = AnswerNotes(ledger)  # type: ignore[arg-type]
    notes.add(note(7))
    notes.add(note(8))
    assert notes.flush(10)
    notes.close()
    assert sorted(ledger.finished) == [7, 8]


def test_the_queue_is_bounded_and_an_answer_gives_its_note_up_when_it_stays_full(
        monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(answer_notes, "MOST_QUEUED_BYTES", 100)
    monkeypatch.setattr(answer_notes, "CLOSE_SECONDS", 0.5)
    ledger = HeldLedger()
    ledger.held.clear()
    notes = AnswerNotes(ledger)  # type: ignore[arg-type]
    try:
        notes.add(note(1, size=60))  # taken by the writer, which is held
        deadline = time.monotonic() + 5
        while notes._queue and time.monotonic() < deadline:  # noqa: SLF001
            time.sleep(0.01)
        notes.add(note(2, size=60))  # queued: the writer's batch no longer counts
        started = time.monotonic()
        with pytest.raises(RuntimeError, match="full"):
            notes.add(note(3, size=60))  # 62 + 62 bytes > 100: waits, then gives up
        assert 0.4 < time.monotonic() - started < 5
        ledger.held.set()
        assert notes.flush(10)
        notes.add(note(4, size=60))  # room again
    finally:
        notes.close()
    assert [c for batch in ledger.batches for c in batch] == [1, 2, 4]


def test_closing_writes_what_is_queued_and_then_refuses_notes() -> None:
    ledger = HeldLedger()
    notes = AnswerNotes(ledger)  # type: ignore[arg-type]
    ledger.held.clear()
    for charge in (1, 2, 3):
        notes.add(note(charge))
    threading.Timer(0.2, ledger.held.set).start()
    notes.close()
    assert [c for batch in ledger.batches for c in batch] == [1, 2, 3]
    with pytest.raises(RuntimeError, match="closed"):
        notes.add(note(4))
