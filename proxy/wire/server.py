"""The asyncio server: sockets around the sans-I/O codec, the state tables and the session.

One task per connection reads bytes, feeds ``codec.FrontendReader``, moves the connection
through ``states.PHASES`` and hands query-phase messages to its ``Session``. Engine calls run in
a bounded thread pool so one analyst's slow query never blocks another's. While a query runs the
connection keeps watching its socket: a client that vanishes gets its backend query cancelled.

Any failure ends only its own connection, with an ErrorResponse where the protocol allows one;
the text of an unexpected exception never reaches a client (it is logged by type and code
location only).
"""

from __future__ import annotations

import asyncio
import contextlib
import hmac
import itertools
import logging
import secrets
import signal
import ssl
import struct
import sys
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from typing import Any, Awaitable, Callable, TypeVar

from proxy.errors import (ADMIN_SHUTDOWN, INVALID_AUTHORIZATION, INVALID_PASSWORD,
                          PROTOCOL_VIOLATION, TOO_MANY_CONNECTIONS, HushError)
from proxy.policy import Connections
from proxy.wire import auth, codec, guard, states
from proxy.wire.boundary import Answering, CatalogQuestions
from proxy.wire.session import Session, error_response, internal_error, log_internal
from proxy.wire.states import Act, ConnectionMachine, Event

log = logging.getLogger("hushql.wire")

READ_CHUNK = 64 * 1024
FLUSH_AT_BYTES = 256 * 1024
SHUTDOWN_GRACE_SECONDS = 5.0
SWITCH_INTERVAL_SECONDS = 0.0005

T = TypeVar("T")


class ClientGone(Exception):
    """The client closed its socket or the network dropped it."""


class Connection:
    """One client connection, from the first byte to the close."""

    def __init__(self, server: "WireServer", reader: asyncio.StreamReader,
                 writer: asyncio.StreamWriter) -> None:
        self.server = server
        self.reader = reader
        self.writer = writer
        self.parser = codec.FrontendReader(server.max_message_bytes)
        self.machine = ConnectionMachine()
        self.out = codec.MessageBatch()
        self.session: Session | None = None
        self.claimed: str | None = None  # the name given at startup, for the log
        self.address = guard.address_key(writer.get_extra_info("peername"))
        self.evicted = False  # dropped to make room for a newer login
        self.tls = False
        self.gone = False
        self.process_id = 0
        self.secret_key = 0

    # ---- I/O ------------------------------------------------------------------------------

    async def _read(self) -> Any:
        """The next frontend message; raises ClientGone, ProtocolError, CharacterEncodingError."""
        while True:
            msg = self.parser.next_message()
            if msg is not None:
                return msg
            if self.gone:
                raise ClientGone
            data = await self._receive()
            if not data:
                self.parser.check_eof()
                raise ClientGone
            self.parser.feed(data)

    async def _receive(self) -> bytes:
        """Up to READ_CHUNK bytes from the socket; b"" (with ``gone`` set) once it has closed."""
        try:
            data = await self.reader.read(READ_CHUNK)
        except (ConnectionError, OSError):
            data = b""
        if not data:
            self.gone = True
        return data

    def _send(self, *messages: Any) -> None:
        for m in messages:
            self.out.add(m)

    async def _flush(self) -> None:
        if self.out.size:
            self.writer.write(self.out.take())
        try:
            await self.writer.drain()
        except (ConnectionError, OSError):
            self.gone = True
            raise ClientGone from None

    async def _watch_socket(self) -> None:
        """While a query runs: keep reading (pipelined messages wait in the parser) so that a
        client closing its socket is noticed; returns when it has gone."""
        while self.parser.buffered() <= self.server.max_message_bytes:
            data = await self._receive()
            if not data:
                return
            self.parser.feed(data)
        await asyncio.Event().wait()  # enough buffered: stop reading, wait to be cancelled

    async def _watched(self, work: Awaitable[T]) -> T:
        """Awaits work while watching the socket; a vanished client cancels the running query.

        The work runs in this connection's task (a shutdown cancels it there), the watcher in
        a task of its own whose end, the socket closing, cancels the query from a callback:
        one task per statement rather than two and a wait on both. The watcher is awaited
        after it is cancelled, so it never reads alongside the next ``_read``."""
        watcher = asyncio.ensure_future(self._watch_socket())
        watcher.add_done_callback(self._vanished)
        try:
            return await work
        finally:
            watcher.remove_done_callback(self._vanished)
            watcher.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await watcher

    def _vanished(self, watcher: asyncio.Future[None]) -> None:
        """The watcher ended by itself: the client has gone, so its running query is cancelled."""
        if not watcher.cancelled() and self.gone and self.session is not None:
            self.session.cancel("vanished")

    async def _fatal(self, error: HushError) -> None:
        """Sends a FATAL error if the socket still takes it."""
        if self.gone:
            return
        self.out.take()
        self._send(error_response(error, "FATAL"))
        with contextlib.suppress(Exception):
            await asyncio.wait_for(self._flush(), 2.0)

    # ---- lifetime -------------------------------------------------------------------------

    def evict(self) -> None:
        """Ends a login in progress to make room for a newer one (see guard.ConnectionGate)."""
        self.evicted = True
        task = self.server._connections.get(self)
        if task is not None:
            task.cancel()

    async def run(self) -> None:
        """Serves the connection to its end; never raises."""
        started = time.monotonic()
        peer = self.writer.get_extra_info("peername")
        outcome = "closed"
        try:
            authenticated = await asyncio.wait_for(
                self._startup(), float(self.server.limits.login_timeout_seconds))
            if authenticated:
                outcome = "ended"
                await self._serve()
        except asyncio.TimeoutError:
            outcome = "startup timed out"
            await self._fatal(HushError(PROTOCOL_VIOLATION, "authentication took too long"))
        except ClientGone:
            outcome = "client vanished" if self.session is not None else "client left"
        except codec.ProtocolError as err:
            outcome = "protocol violation"
            await self._fatal(HushError(PROTOCOL_VIOLATION, err.message))
        except _Refused as refused:
            outcome = refused.outcome
            await self._fatal(refused.error)
        except HushError as err:  # a transition the state table does not allow
            outcome = f"refused {err.sqlstate}"
            await self._fatal(err)
        except asyncio.CancelledError:
            if self.evicted:
                outcome = "dropped for a newer login"
                await self._fatal(HushError(
                    TOO_MANY_CONNECTIONS, "too many connections are logging in from this "
                    "address", hint="Finish logging in promptly, or try again."))
            else:
                outcome = "server shutting down"
                await self._fatal(HushError(
                    ADMIN_SHUTDOWN, "terminating connection due to administrator command"))
        except Exception as exc:
            outcome = "internal error"
            log_internal("connection", exc)
            await self._fatal(internal_error())
        finally:
            if self.session is not None:
                self.session.cancel("vanished")
            self.server._forget(self)
            with contextlib.suppress(Exception):
                self.writer.close()
            if self.claimed is not None or outcome not in ("closed", "client left"):
                log.info("connection peer=%s analyst=%s tls=%s duration=%.1fs outcome=%s",
                         _peer(peer), (self.claimed or "-")[:64], "on" if self.tls else "off",
                         time.monotonic() - started, outcome)

    async def _startup(self) -> bool:
        """Negotiation, startup packet and SCRAM; True once the session is ready."""
        while True:
            msg = await self._read()
            self.machine.step(states.event_of(msg))
            if isinstance(msg, codec.SSLRequest):
                await self._answer_ssl()
            elif isinstance(msg, codec.GSSENCRequest):
                self._send(codec.NegotiationAnswer(False))
                await self._flush()
            elif isinstance(msg, codec.CancelRequest):
                self.server.cancel(msg.process_id, msg.secret_key)
                return False
            elif isinstance(msg, codec.StartupMessage):
                await self._authenticate(msg)
                return True

    async def _answer_ssl(self) -> None:
        context = self.server.ssl_context
        if context is None:
            self._send(codec.NegotiationAnswer(False))
            await self._flush()
            return
        # Bytes sent after SSLRequest but before the handshake would be read as if they had
        # come through TLS; refuse them (the plaintext-injection hazard of CVE-2021-23214,
        # number from memory).
        if self.parser.buffered() or len(getattr(self.reader, "_buffer", b"")):
            raise codec.ProtocolError("received unencrypted data after SSL request")
        self._send(codec.NegotiationAnswer(True))
        await self._flush()
        await self.writer.start_tls(context)
        self.tls = True

    async def _authenticate(self, startup: codec.StartupMessage) -> None:
        params = startup.params
        unrecognised = tuple(k for k in params if k.startswith("_pq_."))
        if startup.protocol & 0xFFFF or unrecognised:
            self._send(codec.NegotiateProtocolVersion(0, unrecognised))
        user = params.get("user", "")
        self.claimed = user or None
        if not user:
            raise _Refused(HushError(INVALID_AUTHORIZATION,
                                     "no user name specified in the startup packet",
                                     hint="Connect with user=<your analyst account>."),
                           "no user name")
        failed = _Refused(HushError(INVALID_PASSWORD,
                                    f'password authentication failed for user "{user}"'),
                          "authentication failed")
        # Known and unknown names alike: the throttle never looks the account up.
        wait = self.server.logins.wait(self.address, user)
        if wait > 0:
            failed.error.hint = (f"Too many failed logins from this address or for this "
                                 f"account; try again in {guard.ceil_seconds(wait)} seconds.")
            failed.outcome = "login throttled"
            raise failed
        self.server.logins.start(self.address, user)
        verifier = self.server.verifier_for(user)
        exchange = auth.ScramExchange(user, verifier)
        self._send(codec.AuthenticationSASL((auth.MECHANISM,)))
        self.machine.step(Event.AUTH_STARTED)
        await self._flush()
        msg = await self._read()
        self.machine.step(states.event_of(msg))
        initial = codec.SASLInitialResponse.parse(msg.data)
        if initial.mechanism != auth.MECHANISM:
            raise codec.ProtocolError("client selected an invalid SASL authentication mechanism")
        try:
            server_first = exchange.first(initial.data or b"")
        except auth.AuthenticationFailed:
            self.machine.step(Event.AUTH_FAILED)
            raise failed from None
        self._send(codec.AuthenticationSASLContinue(server_first))
        self.machine.step(Event.AUTH_CONTINUED)
        await self._flush()
        msg = await self._read()
        self.machine.step(states.event_of(msg))
        try:
            server_final = exchange.final(msg.data)
        except auth.AuthenticationFailed:
            self.machine.step(Event.AUTH_FAILED)
            raise failed from None
        self.server.logins.succeeded(self.address, user)
        # Counted as PostgreSQL counts reserved slots: once the account is known for sure.
        refusal = self.server.gate.session_refusal(self.server.is_admin(user))
        if refusal is not None:
            raise _Refused(HushError(TOO_MANY_CONNECTIONS, refusal,
                                     hint="Try again later, or close idle connections."),
                           "too many connections")
        self.server.gate.open_session(self)
        session = Session(self.server.engine, user, catalog=self.server.catalog,
                          executor=self.server.executor, database=params.get("database", ""),
                          refusals=self.server.refusals)
        try:
            session.apply_startup(params)
        except HushError as err:
            raise _Refused(err, f"bad startup parameter {err.sqlstate}") from None
        self.session = session
        self.process_id, self.secret_key = self.server._register(self)
        self._send(codec.AuthenticationSASLFinal(server_final), codec.AuthenticationOk(),
                   *session.parameter_statuses(),
                   codec.BackendKeyData(self.process_id, self.secret_key), *session.ready())
        self.machine.step(Event.AUTH_SUCCEEDED)
        await self._flush()

    async def _serve(self) -> None:
        session = self.session
        assert session is not None
        while True:
            try:
                msg = await self._read()
            except codec.CharacterEncodingError as err:
                event = states.event_of(err.kind) if err.kind is not None else Event.QUERY
                if self.machine.step(event).act is Act.IGNORE:
                    continue
                self._send(*session.fail(HushError(err.sqlstate, err.message),
                                         simple=event not in states.EXTENDED_EVENTS))
                if event in states.EXTENDED_EVENTS:
                    self.machine.step(Event.EXTENDED_FAILED)
                await self._flush()
                continue
            event = states.event_of(msg)
            step = self.machine.step(event)
            if step.act is Act.IGNORE:
                continue
            if event is Event.TERMINATE:
                await self._flush()
                return
            if event is Event.FLUSH:
                await self._flush()
                continue
            if event in (Event.QUERY, Event.EXECUTE, Event.DESCRIBE):
                replies, failed = await self._watched(session.handle(msg))
            else:
                replies, failed = await session.handle(msg)
            if self.gone:
                raise ClientGone
            self._send(*replies)
            if failed and event in states.EXTENDED_EVENTS:
                self.machine.step(Event.EXTENDED_FAILED)
            # An error goes out at once, as PostgreSQL sends it: a client that asked with
            # Flush rather than Sync would otherwise wait for it forever (Flush is ignored
            # while skipping to Sync).
            if failed or event in (Event.SYNC, Event.QUERY, Event.FUNCTION_CALL) \
                    or self.out.size >= FLUSH_AT_BYTES:
                await self._flush()


class _Refused(Exception):
    """Ends the connection with this error before the query phase."""

    def __init__(self, error: HushError, outcome: str) -> None:
        super().__init__(error.message)
        self.error = error
        self.outcome = outcome


def _limits(limits: Connections | None, max_connections: int | None) -> Connections:
    """The connection limits: the policy's ``[connections]`` (defaults when None), with
    ``max_connections`` (a command-line override) replacing most_sessions; the sessions kept
    for administrators then shrink, if need be, to leave analysts at least one."""
    limits = limits if limits is not None else Connections()
    if max_connections is None:
        return limits
    return limits.model_copy(update={
        "most_sessions": max_connections,
        "admin_sessions_kept": max(0, min(limits.admin_sessions_kept, max_connections - 1))})


def _peer(peer: Any) -> str:
    if isinstance(peer, tuple) and len(peer) >= 2:
        return f"{peer[0]}:{peer[1]}"
    return str(peer or "-")


class WireServer:
    """Accepts connections and runs each one; shares the engine, catalog and thread pool."""

    def __init__(self, engine: Answering, *, ssl_context: ssl.SSLContext | None = None,
                 max_message_bytes: int = codec.DEFAULT_MAX_MESSAGE_BYTES,
                 limits: Connections | None = None, max_connections: int | None = None,
                 catalog: CatalogQuestions | None = None, engine_threads: int = 32) -> None:
        # sqlglot logs statements it cannot fully parse, text and all; they may hold values.
        logging.getLogger("sqlglot").setLevel(logging.ERROR)
        self.engine = engine
        self.ssl_context = ssl_context
        self.max_message_bytes = max_message_bytes
        self.limits = _limits(limits, max_connections)
        self.gate: guard.ConnectionGate[Connection] = guard.ConnectionGate(self.limits)
        self.logins = guard.LoginThrottle(self.limits)
        self.refusals = guard.RefusalAllowance(self.limits)
        self.catalog = catalog
        self.executor = ThreadPoolExecutor(max_workers=engine_threads,
                                           thread_name_prefix="hushql-engine")
        self._server: asyncio.base_events.Server | None = None
        self._connections: dict[Connection, asyncio.Task[None]] = {}
        self._by_pid: dict[int, Connection] = {}
        self._pids = itertools.count(secrets.randbelow(1 << 20) + 1000)

    @property
    def active(self) -> int:
        """Open connections, authenticated or not."""
        return len(self._connections)

    async def start(self, host: str = "127.0.0.1", port: int = 7432) -> tuple[str, int]:
        """Starts listening; returns the bound (host, port) (port 0 picks a free one)."""
        self._server = await asyncio.start_server(self._accept, host, port, reuse_address=True)
        bound = self._server.sockets[0].getsockname()
        return bound[0], bound[1]

    async def serve_forever(self) -> None:
        assert self._server is not None
        await self._server.serve_forever()

    async def _accept(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        conn = Connection(self, reader, writer)
        task = asyncio.current_task()
        assert task is not None
        self._connections[conn] = task
        for older in self.gate.arrive(conn, conn.address):
            older.evict()
        await conn.run()

    def _forget(self, conn: Connection) -> None:
        self.gate.leave(conn)
        self._connections.pop(conn, None)
        if self._by_pid.get(conn.process_id) is conn:
            del self._by_pid[conn.process_id]

    def _register(self, conn: Connection) -> tuple[int, int]:
        """A process id and secret key for CancelRequest (both Int32 on the wire)."""
        pid = next(self._pids) & 0x7FFFFFFF
        self._by_pid[pid] = conn
        return pid, secrets.randbelow(1 << 32) - (1 << 31)

    def cancel(self, process_id: int, secret_key: int) -> None:
        """Handles a CancelRequest: cancels that connection's query if the key matches."""
        conn = self._by_pid.get(process_id)
        if conn is None or conn.session is None:
            return
        pack = struct.Struct("!i").pack
        if hmac.compare_digest(pack(conn.secret_key), pack(secret_key)):
            conn.session.cancel("user")

    def is_admin(self, user: str) -> bool:
        return self.engine.accounts.is_admin(user)

    def verifier_for(self, user: str) -> auth.Verifier | None:
        """The account's verifier (analysts, then administrators), or None when unknown or
        unusable (then the exchange runs against a stand-in and fails like a wrong password)."""
        stored = self.engine.accounts.verifier(user)
        if stored is None:
            return None
        try:
            return auth.parse_verifier(stored)
        except ValueError:
            log.warning("account %s has an unusable password verifier", user)
            return None

    async def close(self) -> None:
        """Stops listening, ends every connection (FATAL 57P01), and stops the thread pool."""
        if self._server is not None:
            self._server.close()
        tasks = list(self._connections.values())
        for conn in list(self._connections):
            if conn.session is not None:
                conn.session.cancel("vanished")
        for task in tasks:
            task.cancel()
        if tasks:
            await asyncio.wait(tasks, timeout=SHUTDOWN_GRACE_SECONDS)
        if self._server is not None:
            with contextlib.suppress(Exception):
                await asyncio.wait_for(self._server.wait_closed(), SHUTDOWN_GRACE_SECONDS)
        self.executor.shutdown(wait=False, cancel_futures=True)


async def serve(engine: Answering, *, host: str = "127.0.0.1", port: int = 7432,
                ssl_context: ssl.SSLContext | None = None,
                max_message_bytes: int = codec.DEFAULT_MAX_MESSAGE_BYTES,
                limits: Connections | None = None, max_connections: int | None = None,
                catalog: CatalogQuestions | None = None, ready: asyncio.Event | None = None,
                engine_threads: int = 32) -> None:
    """Serves the PostgreSQL protocol until cancelled; sets ``ready`` once listening."""
    server = WireServer(engine, ssl_context=ssl_context, max_message_bytes=max_message_bytes,
                        limits=limits, max_connections=max_connections, catalog=catalog,
                        engine_threads=engine_threads)
    bound_host, bound_port = await server.start(host, port)
    log.info("listening on %s:%d tls=%s", bound_host, bound_port,
             "available" if ssl_context else "off")
    if ready is not None:
        ready.set()
    try:
        await server.serve_forever()
    finally:
        await server.close()
        log.info("stopped")


def run_server(engine: Answering, **kwargs: Any) -> None:
    """Blocking ``serve``; returns after SIGINT or SIGTERM, once connections are closed."""
    if not logging.getLogger().handlers:
        logging.basicConfig(stream=sys.stderr, level=logging.INFO,
                            format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    # While a long statement is parsed on the parse lane (session.py), the event loop and the
    # engine threads wait for the GIL up to the switch interval at each hand-over; a tenth of
    # Python's default 5 ms keeps a flood of long statements from multiplying everyone else's
    # latency (benchmarks/bench_flood.py, flood without the refusal allowance).
    sys.setswitchinterval(SWITCH_INTERVAL_SECONDS)

    async def main() -> None:
        loop = asyncio.get_running_loop()
        stop = asyncio.Event()
        for sig in (signal.SIGINT, signal.SIGTERM):
            with contextlib.suppress(NotImplementedError, RuntimeError):
                loop.add_signal_handler(sig, stop.set)
        serving = asyncio.create_task(serve(engine, **kwargs))
        stopping = asyncio.create_task(stop.wait())
        await asyncio.wait({serving, stopping}, return_when=asyncio.FIRST_COMPLETED)
        stopping.cancel()
        if not serving.done():
            serving.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await serving

    asyncio.run(main())


def start_in_thread(engine: Answering, *, host: str = "127.0.0.1", port: int = 0,
                    **kwargs: Any) -> tuple[str, int, Callable[[], None]]:
    """Runs a server on a background thread (tests, tools); returns (host, port, stop).

    ``stop()`` closes every connection and waits for the thread. Other keywords as ``serve``.
    """
    started = threading.Event()
    state: dict[str, Any] = {}

    def run() -> None:
        loop = asyncio.new_event_loop()
        state["loop"] = loop

        async def main() -> None:
            server = WireServer(engine, **kwargs)
            try:
                state["address"] = await server.start(host, port)
            except BaseException as exc:
                state["error"] = exc
                started.set()
                server.executor.shutdown(wait=False)
                return
            stop = asyncio.Event()
            state["stop"] = stop
            started.set()
            await stop.wait()
            await server.close()

        try:
            loop.run_until_complete(main())
        finally:
            loop.close()

    thread = threading.Thread(target=run, name="hushql-wire-test-server", daemon=True)
    thread.start()
    if not started.wait(10):
        raise RuntimeError("the server did not start within 10 seconds")
    if "error" in state:
        raise state["error"]
    bound_host, bound_port = state["address"]

    def stop() -> None:
        loop = state["loop"]
        if not loop.is_closed():
            with contextlib.suppress(RuntimeError):
                loop.call_soon_threadsafe(state["stop"].set)
        thread.join(10)

    return bound_host, bound_port, stop
