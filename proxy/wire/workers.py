"""Several serving processes on one port: ``hushql serve --workers N``.

One process answers under one interpreter lock; several processes use several cores. Rules:

- **Pre-forked accept.** A supervisor binds the listening socket once and forks N workers that
  all accept on it; the kernel gives each connection to exactly one. (Chosen over per-process
  SO_REUSEPORT sockets because connections waiting in a dead worker's own backlog would be
  lost; a shared socket's backlog survives any worker.) The supervisor forks before it has any
  thread or database connection; each worker opens its own engine (backend and ledger pools).
  The catalog mirrors are built once, by the supervisor, before forking.
- **Connections are spread evenly.** Each worker takes one connection per wake-up (asyncio's
  own server drains the whole waiting backlog at once: with it, one of two workers took 13 of
  a burst of 16 clients), and publishes how many it holds in ``ConnectionCounts``, a table in
  memory shared by all processes. A worker holding more than another live worker waits ``ACCEPT_HEAD_START`` before
  taking the next connection, leaving it to the less loaded one; after that wait it takes it
  anyway, so a stuck or slow worker never leaves a connection waiting for long.
- **Cancel requests reach the process holding the query.** A CancelRequest comes on a fresh
  connection, which any worker may accept. The process id a worker hands out in BackendKeyData
  carries the worker's slot in bits ``SLOT_SHIFT`` and up; a worker given a cancel for another
  slot forwards the (process id, secret key) pair as one datagram on that slot's Unix socket
  pair, made by the supervisor before forking so every worker holds every slot's sending end.
  The owning worker then checks the secret key exactly as a single process does. Forwarding is
  fire-and-forget, as the protocol's cancel is: nothing is ever answered on that connection.
- **All workers share one ledger**, whose row locks keep every budget exact across processes
  (see ``proxy.ledger``). ``--pool-size`` is the total for the service, divided among workers,
  so N workers do not open N times the database connections.
- **Memory per worker is bounded**: by the plan cache's entry limit, the engine thread pool, the
  pools and the connection limit; and, as a backstop against anything unforeseen, the supervisor
  reads each worker's resident size every ``MEMORY_CHECK_SECONDS`` and replaces a worker above
  the limit: that worker stops accepting, its open connections may finish for
  ``DRAIN_SECONDS``, then it shuts down (remaining sessions get FATAL 57P01), while a fresh
  worker in the same slot already accepts.
- **A worker that dies** (crash, SIGKILL, out of memory) is replaced in its slot; the ledger
  needs no repair, because a charge is committed before its query runs and never given back.
- **SIGHUP** to the supervisor asks ``WorkerSetup.renew`` for a setup made from the policy
  folder as it now is; when the new set passes every start-up check, every worker is replaced
  as for the memory limit (drain, successor at once), so new sessions get the new set; when it
  does not, the problems are logged and the workers carry on with the old one.
- **SIGTERM or SIGINT** to the supervisor is passed to every worker, which ends its connections
  with FATAL 57P01 as a single process does; the supervisor returns once all have exited.
"""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import logging
import mmap
import os
import secrets
import signal
import socket
import struct
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import Any

from proxy.wire.boundary import Answering
from proxy.wire.server import WireServer

log = logging.getLogger("hushql.workers")

SLOT_SHIFT = 23
"""Bits below the slot in a process id: 8 million connections per worker before reuse."""
MOST_WORKERS = 128
"""Slots fit in the 7 bits above ``SLOT_SHIFT``, so process ids stay positive Int32s."""
MEMORY_CHECK_SECONDS = 5.0
DRAIN_SECONDS = 60.0
RESPAWN_PAUSE_SECONDS = 1.0
"""A slot whose worker died is refilled at most this often, so a crash loop cannot spin."""
STOP_SECONDS = 15.0
"""How long the supervisor waits for workers after SIGTERM before it kills them."""

ACCEPT_HEAD_START = 0.02
"""Seconds a worker holding more connections than another leaves a new one to the others."""

_CANCEL = struct.Struct("!ii")  # process id, secret key: as in the CancelRequest message


def default_workers() -> int:
    """One worker per core this process may run on (at least 1)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not Linux
        return max(1, os.cpu_count() or 1)


def slot_of(process_id: int) -> int:
    """The worker slot a BackendKeyData process id was handed out by."""
    return (process_id >> SLOT_SHIFT) & (MOST_WORKERS - 1)


@dataclass(frozen=True)
class WorkerSetup:
    """What every worker needs; ``make_engine`` runs in the worker, after the fork."""

    make_engine: Callable[[], Answering]
    server_options: dict[str, Any]  # WireServer keywords (catalog, ssl_context, limits...)
    workers: int
    memory_limit_bytes: int | None = None
    # A setup from the policy folder as it now is, or None when it fails the start-up checks.
    renew: Callable[[], "WorkerSetup | None"] | None = None


class ConnectionCounts:
    """Open connections per worker slot, in anonymous shared memory made before forking, so
    every worker reads the others' counts. A slot without a serving worker holds ``ABSENT``.
    Each slot is written by its own worker only (the supervisor marks an empty slot absent);
    a read may be a moment old, which only makes the spread less even, never loses a
    connection."""

    ABSENT = -1

    def __init__(self, slots: int) -> None:
        self._memory = mmap.mmap(-1, 4 * slots)
        self._counts = memoryview(self._memory).cast("i")
        for slot in range(slots):
            self._counts[slot] = self.ABSENT

    def set(self, slot: int, count: int) -> None:
        self._counts[slot] = count

    def fewest_elsewhere(self, slot: int) -> int | None:
        """The smallest count among the other serving workers (None: there is none)."""
        others = [n for index, n in enumerate(self._counts)
                  if index != slot and n != self.ABSENT]
        return min(others) if others else None


class WorkerServer(WireServer):
    """A WireServer accepting on an inherited socket, whose process ids name its slot and
    which forwards cancel requests for other slots to their owners."""

    def __init__(self, engine: Answering, *, slot: int, listener: socket.socket,
                 routes: list[socket.socket], counts: ConnectionCounts | None = None,
                 **options: Any) -> None:
        super().__init__(engine, **options)
        self.slot = slot
        self._listener = listener
        self._routes = routes
        self._counts = counts
        self._accepting = False
        self._held_back = False  # the next wake-up takes its connection whatever the counts
        self._held = 0  # connections accepted and not yet ended
        self._tasks: set[asyncio.Task[None]] = set()
        low = (1 << SLOT_SHIFT) - 1
        # WireServer draws BackendKeyData process ids from this iterator.
        self._pids = ((slot << SLOT_SHIFT) | (n & low) or 1
                      for n in itertools.count(secrets.randbelow(low) + 1))

    async def start(self, host: str = "", port: int = 0) -> tuple[str, int]:
        """Accepts on the inherited socket (``host`` and ``port`` are the supervisor's), one
        connection per wake-up (see ``_accept_one``)."""
        asyncio.get_running_loop().add_reader(self._listener.fileno(), self._accept_one)
        self._accepting = True
        self._publish()
        bound = self._listener.getsockname()
        return bound[0], bound[1]

    def _accept_one(self) -> None:
        """Takes at most one waiting connection, unless this worker holds more than another
        and has not yet given the others their head start (module rules). Every worker is
        woken for each arrival and the first to call accept gets it."""
        if self._counts is not None and not self._held_back:
            fewest = self._counts.fewest_elsewhere(self.slot)
            if fewest is not None and self._held > fewest:
                self._held_back = True
                loop = asyncio.get_running_loop()
                loop.remove_reader(self._listener.fileno())
                loop.call_later(ACCEPT_HEAD_START, self._resume)
                return
        self._held_back = False
        try:
            sock, _ = self._listener.accept()
        except (BlockingIOError, InterruptedError):
            return  # another worker took it
        except OSError as exc:  # out of file descriptors and the like: leave it queued
            log.warning("worker %d could not accept: %s", self.slot, exc.strerror)
            return
        sock.setblocking(False)
        task = asyncio.get_running_loop().create_task(self._serve_socket(sock))
        self._tasks.add(task)  # the loop keeps only weak references to tasks
        task.add_done_callback(self._tasks.discard)

    def _resume(self) -> None:
        """After a head start: listen again (the next wake-up accepts whatever the counts)."""
        if self._accepting:
            asyncio.get_running_loop().add_reader(self._listener.fileno(), self._accept_one)

    async def _serve_socket(self, sock: socket.socket) -> None:
        self._held += 1
        self._publish()
        try:
            try:
                reader, writer = await asyncio.open_connection(sock=sock)
            except OSError:
                sock.close()
                return
            await self._accept(reader, writer)
        finally:
            self._held -= 1
            self._publish()

    def _publish(self) -> None:
        """This worker's count in the shared table, while it accepts (a worker draining after
        its replacement took the slot stays out of it)."""
        if self._counts is not None and self._accepting:
            self._counts.set(self.slot, self._held)

    def stop_accepting(self) -> None:
        """Leaves the shared socket to the other workers; open connections carry on."""
        if self._accepting:
            self._accepting = False
            asyncio.get_running_loop().remove_reader(self._listener.fileno())

    async def close(self) -> None:
        self.stop_accepting()
        await super().close()

    def cancel(self, process_id: int, secret_key: int) -> None:
        """Cancels locally when the id is this worker's, else forwards to the owning slot."""
        owner = slot_of(process_id)
        if owner == self.slot:
            super().cancel(process_id, secret_key)
        elif owner < len(self._routes):
            with contextlib.suppress(OSError):  # owner gone or its inbox full: as lost
                self._routes[owner].send(_CANCEL.pack(process_id, secret_key))

    def receive_forwarded(self, inbox: socket.socket) -> None:
        """Handles every cancel forwarded to this slot that is waiting in ``inbox``."""
        while True:
            try:
                data = inbox.recv(_CANCEL.size)
            except (BlockingIOError, InterruptedError):
                return
            if len(data) == _CANCEL.size:
                process_id, secret_key = _CANCEL.unpack(data)
                if slot_of(process_id) == self.slot:
                    super().cancel(process_id, secret_key)


@dataclass
class _Slot:
    inbox: socket.socket  # receiving end, read by this slot's worker only
    route: socket.socket  # sending end, used by every other worker
    pid: int = 0
    started: float = 0.0


def run_workers(setup: WorkerSetup, host: str, port: int) -> None:
    """Binds ``host:port``, runs ``setup.workers`` workers until SIGTERM or SIGINT, and returns
    once every worker has exited."""
    if not 1 <= setup.workers <= MOST_WORKERS:
        raise ValueError(f"workers must be between 1 and {MOST_WORKERS}")
    listener = socket.create_server((host, port), backlog=1024)
    listener.setblocking(False)
    slots = []
    for _ in range(setup.workers):
        inbox, route = socket.socketpair(socket.AF_UNIX, socket.SOCK_DGRAM)
        inbox.setblocking(False)
        route.setblocking(False)
        slots.append(_Slot(inbox, route))
    counts = ConnectionCounts(len(slots))
    log.info("listening on %s:%d with %d workers", *listener.getsockname()[:2], setup.workers)
    stopping: list[int] = []
    previous = {sig: signal.signal(sig, lambda signum, _frame: stopping.append(signum))
                for sig in (signal.SIGTERM, signal.SIGINT)}
    reloads: list[int] = []
    previous[signal.SIGHUP] = signal.signal(signal.SIGHUP,
                                            lambda signum, _frame: reloads.append(signum))
    draining: dict[int, float] = {}  # pid of a replaced worker -> when it was asked to drain
    try:
        for index in range(len(slots)):
            _spawn(index, slots, listener, setup, counts)
        last_memory_check = time.monotonic()
        while not stopping:
            time.sleep(0.2)
            for pid, code in _reaped():
                draining.pop(pid, None)
                for index, slot in enumerate(slots):
                    if slot.pid == pid:
                        log.warning("worker %d (pid %d) exited with %s; replacing it", index,
                                    pid, code)
                        slot.pid = 0
                        counts.set(index, ConnectionCounts.ABSENT)
            for index, slot in enumerate(slots):
                if slot.pid == 0 and not stopping \
                        and time.monotonic() - slot.started >= RESPAWN_PAUSE_SECONDS:
                    _spawn(index, slots, listener, setup, counts)
            if reloads:
                reloads.clear()
                renewed = setup.renew() if setup.renew is not None else None
                if renewed is not None:
                    setup = renewed
                    _replace(range(len(slots)), slots, listener, setup, draining, "new policies",
                             counts)
            if setup.memory_limit_bytes and \
                    time.monotonic() - last_memory_check >= MEMORY_CHECK_SECONDS:
                last_memory_check = time.monotonic()
                _replace_oversized(slots, listener, setup, draining, counts)
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
        live = [slot.pid for slot in slots if slot.pid] + list(draining)
        _stop_all(live)
        listener.close()
        for slot in slots:
            slot.inbox.close()
            slot.route.close()
        log.info("stopped")


def _spawn(index: int, slots: list[_Slot], listener: socket.socket, setup: WorkerSetup,
           counts: ConnectionCounts) -> None:
    """Forks the worker for slot ``index``; in the child, serves and never returns."""
    slots[index].started = time.monotonic()
    pid = os.fork()
    if pid:
        slots[index].pid = pid
        return
    code = 1
    try:
        for sig in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
            signal.signal(sig, signal.SIG_DFL)
        for other, slot in enumerate(slots):
            if other != index:
                slot.inbox.close()
        code = _worker_main(index, listener, slots[index].inbox,
                            [slot.route for slot in slots], setup, counts)
    except BaseException as exc:  # the child must never return into the supervisor's loop
        log.error("worker %d failed: %s", index, type(exc).__name__)
    finally:
        logging.shutdown()
        os._exit(code)


def _worker_main(slot: int, listener: socket.socket, inbox: socket.socket,
                 routes: list[socket.socket], setup: WorkerSetup, counts: ConnectionCounts) -> int:
    """One worker: its own engine, a WorkerServer on the shared socket, until SIGTERM."""
    engine = setup.make_engine()
    try:
        asyncio.run(_serve_worker(engine, slot, listener, inbox, routes, setup, counts))
    finally:
        engine.close()
        catalog = setup.server_options.get("catalog")
        if catalog is not None:
            catalog.close()
    return 0


async def _serve_worker(engine: Answering, slot: int, listener: socket.socket, inbox: socket.socket,
                        routes: list[socket.socket], setup: WorkerSetup,
                        counts: ConnectionCounts) -> None:
    loop = asyncio.get_running_loop()
    server = WorkerServer(engine, slot=slot, listener=listener, routes=routes, counts=counts,
                          **setup.server_options)
    await server.start()
    loop.add_reader(inbox.fileno(), server.receive_forwarded, inbox)
    stop = asyncio.Event()
    drain = asyncio.Event()
    loop.add_signal_handler(signal.SIGTERM, stop.set)
    loop.add_signal_handler(signal.SIGINT, stop.set)
    loop.add_signal_handler(signal.SIGUSR1, drain.set)
    log.info("worker %d serving (pid %d)", slot, os.getpid())
    stopping = asyncio.ensure_future(stop.wait())
    draining = asyncio.ensure_future(drain.wait())
    await asyncio.wait({stopping, draining}, return_when=asyncio.FIRST_COMPLETED)
    if drain.is_set() and not stop.is_set():
        server.stop_accepting()
        deadline = loop.time() + DRAIN_SECONDS
        while server.active and not stop.is_set() and loop.time() < deadline:
            await asyncio.sleep(0.5)
    stopping.cancel()
    draining.cancel()
    loop.remove_reader(inbox.fileno())
    await server.close()


def _reaped() -> list[tuple[int, str]]:
    """Children that have exited since the last call: (pid, how)."""
    done = []
    while True:
        try:
            pid, status = os.waitpid(-1, os.WNOHANG)
        except ChildProcessError:
            return done
        if pid == 0:
            return done
        if os.WIFSIGNALED(status):
            done.append((pid, f"signal {signal.Signals(os.WTERMSIG(status)).name}"))
        else:
            done.append((pid, f"code {os.waitstatus_to_exitcode(status)}"))


def resident_bytes(pid: int) -> int | None:
    """A process's resident set size from /proc (Linux), or None when unreadable."""
    try:
        with open(f"/proc/{pid}/statm") as statm:
            pages = int(statm.read().split()[1])
    except (OSError, ValueError, IndexError):
        return None
    return pages * os.sysconf("SC_PAGE_SIZE")


def _replace_oversized(slots: list[_Slot], listener: socket.socket, setup: WorkerSetup,
                       draining: dict[int, float], counts: ConnectionCounts) -> None:
    """Replaces each worker above the memory limit."""
    assert setup.memory_limit_bytes is not None
    limit = setup.memory_limit_bytes
    oversized = [index for index, slot in enumerate(slots)
                 if slot.pid and (resident_bytes(slot.pid) or 0) > limit]
    _replace(oversized, slots, listener, setup, draining, "memory above the limit", counts)


def _replace(indexes: Iterable[int], slots: list[_Slot], listener: socket.socket,
             setup: WorkerSetup, draining: dict[int, float], why: str,
             counts: ConnectionCounts) -> None:
    """Asks the workers in ``indexes`` to drain, and starts each one's successor at once."""
    for index in indexes:
        slot = slots[index]
        if slot.pid:
            log.warning("worker %d (pid %d): %s; replacing it", index, slot.pid, why)
            with contextlib.suppress(ProcessLookupError):
                os.kill(slot.pid, signal.SIGUSR1)
            draining[slot.pid] = time.monotonic()
        _spawn(index, slots, listener, setup, counts)


def _stop_all(pids: list[int]) -> None:
    """SIGTERM to every worker, then SIGKILL to any still running after ``STOP_SECONDS``."""
    for pid in pids:
        with contextlib.suppress(ProcessLookupError):
            os.kill(pid, signal.SIGTERM)
    deadline = time.monotonic() + STOP_SECONDS
    waiting = set(pids)
    while waiting and time.monotonic() < deadline:
        waiting -= {pid for pid, _ in _reaped()}
        if waiting:
            time.sleep(0.05)
    for pid in waiting:
        log.warning("worker pid %d did not stop in time; killing it", pid)
        with contextlib.suppress(ProcessLookupError):
            os.kill(pid, signal.SIGKILL)
        with contextlib.suppress(ChildProcessError):
            os.waitpid(pid, 0)
