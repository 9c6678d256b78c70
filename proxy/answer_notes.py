"""Notes written after an answer is released: its stored copy and its 'answered' outcome.

Everything about when those notes reach the ledger lives here. Rules:

- A note is not a charge. The charge was durable before the query ran (``proxy.ledger``); a
  note only lets the same question be given again for nothing (``proxy.stored_answers``) and
  says how the charge ended. So notes are written off the answer's path: ``add`` only queues,
  and one thread per engine writes what is queued, many notes per ledger transaction, whose
  commit does not wait for the disk. A crash may lose the notes not yet written, as it may lose
  an asynchronous commit: the analyst then pays again for that question, and the charge reads
  'reserved' (started, outcome unknown), which is true. No charge is ever lost or undone.
- Until its note is written, an answer stays here (``pending``), so the same question asked
  again in this process finds it as it would find it in the ledger: identical questions within
  one process are still charged once. Another process finds it once it is written.
- A note that cannot be stored (the ledger refuses it, or is unreachable) still tries to record
  the outcome alone, as the engine did before notes were queued; a failure is logged, never
  raised into an answer already released.
- Memory is bounded: at most ``MOST_QUEUED_BYTES`` of answers wait at once. An answer arriving
  when they are full waits for room (the ledger is then slower than the answers, and the
  reservations will soon wait on it too); after ``CLOSE_SECONDS`` its note is given up (logged,
  the outcome recorded alone), never the answer.
- ``flush`` waits for everything queued so far; ``close`` flushes (bounded wait), then stops
  the thread. Nothing here touches PostgreSQL except through ``Ledger``.
"""

from __future__ import annotations

import json
import logging
import threading
from collections import deque
from dataclasses import dataclass
from datetime import datetime
from decimal import Decimal

from proxy.ledger import Ledger, StoredAnswer

log = logging.getLogger("hushql.notes")

BATCH_LIMIT = 64
"""Notes written in one ledger transaction at most."""
CLOSE_SECONDS = 10.0
"""How long ``close`` waits for queued notes, and ``add`` for room, before giving up (logged)."""
MOST_QUEUED_BYTES = 64 << 20
"""Answer JSON waiting to be written, at most (one answer larger than this waits alone)."""


@dataclass(frozen=True)
class Note:
    """An answer released for ``charge_id``: what ``Ledger.store_answers`` keeps."""

    analyst: str
    question: str  # the stored-answer key
    statement: str
    epsilon: Decimal
    charge_id: int
    answer: str  # stored_answers.encode_answer's JSON
    paid_at: datetime  # the charge's reserved_at


class AnswerNotes:
    """A queue of notes and the thread that writes them (module rules)."""

    def __init__(self, ledger: Ledger, *, batch_limit: int = BATCH_LIMIT) -> None:
        self._ledger = ledger
        self._limit = batch_limit
        self._changed = threading.Condition()
        self._queue: deque[Note] = deque()
        self._pending: dict[tuple[str, str], Note] = {}
        self._writing = 0
        self._queued_bytes = 0
        self._closing = False
        self._thread = threading.Thread(target=self._write_until_closed, name="hushql-notes",
                                        daemon=True)
        self._thread.start()

    def add(self, note: Note) -> None:
        """Queue ``note``; from now on ``pending`` finds it until it is written. Waits while
        the queue is full; RuntimeError when closed or still full after ``CLOSE_SECONDS``."""
        size = len(note.answer)
        with self._changed:
            if not self._changed.wait_for(
                    lambda: self._closing or not self._queue
                    or self._queued_bytes + size <= MOST_QUEUED_BYTES, CLOSE_SECONDS):
                raise RuntimeError("answer notes queue full")
            if self._closing:
                raise RuntimeError("answer notes are closed")
            self._queued_bytes += size
            self._queue.append(note)
            self._pending[(note.analyst, note.question)] = note
            self._changed.notify_all()

    def pending(self, analyst: str, question: str) -> StoredAnswer | None:
        """The newest queued, not yet written, answer to ``question`` (its ``remaining`` is
        left for the caller to read), or None."""
        with self._changed:
            note = self._pending.get((analyst, question))
        if note is None:
            return None
        return StoredAnswer(json.loads(note.answer), note.paid_at, note.charge_id,
                            remaining=Decimal(0))

    def flush(self, timeout: float | None = None) -> bool:
        """Waits until every note queued before this call is written; False on timeout."""
        with self._changed:
            return self._changed.wait_for(lambda: not self._queue and not self._writing,
                                          timeout)

    def close(self) -> None:
        """Writes what is queued (at most ``CLOSE_SECONDS``), then stops the thread."""
        if not self.flush(CLOSE_SECONDS):
            log.warning("%d answer notes were not written before closing", len(self._queue))
        with self._changed:
            self._closing = True
            self._changed.notify_all()
        self._thread.join(CLOSE_SECONDS)

    def _write_until_closed(self) -> None:
        while True:
            with self._changed:
                self._changed.wait_for(lambda: self._queue or self._closing)
                if not self._queue:
                    return  # closing, nothing left
                batch = [self._queue.popleft()
                         for _ in range(min(self._limit, len(self._queue)))]
                self._writing = len(batch)
                self._queued_bytes -= sum(len(note.answer) for note in batch)
                self._changed.notify_all()  # room for waiting answers
            try:
                self._write(batch)
            finally:
                with self._changed:
                    for note in batch:
                        key = (note.analyst, note.question)
                        if self._pending.get(key) is note:
                            del self._pending[key]
                    self._writing = 0
                    self._changed.notify_all()

    def _write(self, batch: list[Note]) -> None:
        """Stores the batch; each note whose outcome was not recorded gets it alone."""
        try:
            recorded = self._ledger.store_answers(batch)
        except Exception:
            log.exception("could not store %d answers", len(batch))
            recorded = [False] * len(batch)
        for note, done in zip(batch, recorded, strict=True):
            if done:
                continue
            try:
                self._ledger.finish(note.charge_id, "answered")
            except Exception:
                log.exception("could not record the outcome of charge %s", note.charge_id)
