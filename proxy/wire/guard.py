"""What the wire front lets a client hold or try before anything is charged.

Rules of this module (the limits themselves come from ``[connections]`` in access.toml):

- **Nothing free is unbounded.** A connection that has not logged in, a failed login and a
  refused statement cost no epsilon, so each costs something else: a slot that expires, or a
  token from a bucket that refills slowly.
- **Logins in progress** are counted apart from sessions, in total and per client address (an
  IPv6 client by its /64, the block one subscriber usually holds: common practice). When a
  count is full, the *oldest* login in progress of that address (or, for the total, of the
  address holding the most) is dropped to make room: holding slots then costs an attacker a
  steady stream of new connections instead of one idle socket per slot, and someone who
  connects after a burst still gets in. Each login must also finish within the login timeout.
- **Sessions** (logged-in connections) are counted against ``most_sessions``; the last
  ``admin_sessions_kept`` of them only administrators may take, so analysts (or an attacker
  holding an analyst's password) cannot lock the administrators out.
- **Failed logins** cost one token from two buckets, the client address's and the claimed
  account name's, known or not. A login is refused before its exchange while either bucket is
  empty; a successful one gives its token back. Parallel attempts each take their token when
  they start, so concurrency cannot outrun the refill rate.
- **Refused statements** cost an account tokens in proportion to the text that had to be read
  (one per statement plus one per ``REFUSAL_UNIT_BYTES``), taken before the statement is read
  and given back when it succeeds. While the bucket cannot pay, the statement waits (for free:
  nothing is read) and is then refused with 53400 and a hint saying how long to wait.

Everything here is in-memory, per process, and touches no socket: the server asks and acts.
"""

from __future__ import annotations

import ipaddress
import math
import time
from collections import OrderedDict
from typing import Callable, Generic, Hashable, TypeVar

from proxy.policy import Connections

K = TypeVar("K", bound=Hashable)
C = TypeVar("C", bound=Hashable)

# One refusal unit per this many bytes of statement text (the parse work a refusal wasted grows
# about linearly with the text: measured in benchmarks/bench_flood.py).
REFUSAL_UNIT_BYTES = 8192
# Keys a bucket table remembers; beyond this, full buckets are forgotten first, then the
# longest unused ones (an attacker inventing names can only make the table forget itself).
MOST_KEYS = 65536


def address_key(peer: object) -> str:
    """The key a client address is counted under: IPv4 as is, IPv6 by its /64."""
    host = peer[0] if isinstance(peer, tuple) and peer else peer
    try:
        ip = ipaddress.ip_address(str(host))
    except ValueError:
        return str(host or "-")
    if isinstance(ip, ipaddress.IPv6Address):
        if ip.ipv4_mapped is not None:
            return str(ip.ipv4_mapped)
        return str(ipaddress.IPv6Network((ip, 64), strict=False))
    return str(ip)


class Buckets(Generic[K]):
    """Token buckets by key: ``capacity`` tokens each, one back every ``seconds_per_token``.

    A balance may go below zero (a cost larger than what was left); it then takes longer to
    refill. Keys whose bucket is full are not stored.
    """

    def __init__(self, capacity: int, seconds_per_token: float, *, most_keys: int = MOST_KEYS,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.capacity = float(capacity)
        self.seconds_per_token = float(seconds_per_token)
        self.most_keys = most_keys
        self.clock = clock
        self._levels: OrderedDict[K, tuple[float, float]] = OrderedDict()  # key -> (level, at)

    def balance(self, key: K) -> float:
        """Tokens in the key's bucket now."""
        stored = self._levels.get(key)
        if stored is None:
            return self.capacity
        level, at = stored
        return min(self.capacity, level + (self.clock() - at) / self.seconds_per_token)

    def wait(self, key: K, cost: float = 1.0) -> float:
        """Seconds until the bucket can pay ``cost`` (a cost above the capacity needs a full
        bucket); 0.0 when it can now."""
        missing = min(cost, self.capacity) - self.balance(key)
        return max(0.0, missing * self.seconds_per_token)

    def take(self, key: K, cost: float = 1.0) -> None:
        """Takes ``cost`` tokens (the balance may go negative)."""
        self._store(key, self.balance(key) - cost)

    def give_back(self, key: K, cost: float = 1.0) -> None:
        """Returns tokens taken for work that turned out to cost nothing."""
        self._store(key, self.balance(key) + cost)

    def _store(self, key: K, level: float) -> None:
        self._levels.pop(key, None)
        if level >= self.capacity:
            return
        self._levels[key] = (level, self.clock())
        if len(self._levels) > self.most_keys:
            for stale in [k for k in self._levels if self.balance(k) >= self.capacity]:
                del self._levels[stale]
            while len(self._levels) > self.most_keys:
                self._levels.popitem(last=False)

    def __len__(self) -> int:
        return len(self._levels)


class LoginThrottle:
    """Failed logins by client address and by claimed account name (known or not alike)."""

    def __init__(self, limits: Connections, *,
                 clock: Callable[[], float] = time.monotonic) -> None:
        every = float(limits.seconds_per_failed_login)
        self._addresses: Buckets[str] = Buckets(limits.failed_logins_allowed, every, clock=clock)
        self._accounts: Buckets[str] = Buckets(limits.failed_logins_allowed, every, clock=clock)

    def wait(self, address: str, account: str) -> float:
        """Seconds before a login from ``address`` as ``account`` may be tried; 0.0: now."""
        return max(self._addresses.wait(address), self._accounts.wait(account))

    def start(self, address: str, account: str) -> None:
        """A login begins: it takes its token now (given back if it succeeds)."""
        self._addresses.take(address)
        self._accounts.take(account)

    def succeeded(self, address: str, account: str) -> None:
        self._addresses.give_back(address)
        self._accounts.give_back(account)


def refusal_cost(text: str) -> int:
    """Refusal units a statement of this text costs when it is refused."""
    return 1 + len(text) // REFUSAL_UNIT_BYTES


class RefusalAllowance:
    """Per account: how much refused work it may still cause before it has to wait."""

    def __init__(self, limits: Connections, *,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self._accounts: Buckets[str] = Buckets(limits.refusals_allowed,
                                               float(limits.seconds_per_refusal), clock=clock)

    def wait(self, account: str, text: str) -> float:
        """Seconds until ``account`` may have ``text`` read; 0.0: now."""
        return self._accounts.wait(account, refusal_cost(text))

    def take(self, account: str, text: str) -> int:
        """Takes the statement's cost before it is read; returns it for ``give_back``."""
        cost = refusal_cost(text)
        self._accounts.take(account, cost)
        return cost

    def give_back(self, account: str, cost: int) -> None:
        self._accounts.give_back(account, cost)


class ConnectionGate(Generic[C]):
    """Counts logins in progress (by address) and sessions; says whom to drop or refuse."""

    def __init__(self, limits: Connections) -> None:
        self.limits = limits
        self._logging_in: dict[str, OrderedDict[C, None]] = {}
        self._address_of: dict[C, str] = {}
        self._sessions: set[C] = set()

    @property
    def logging_in(self) -> int:
        return len(self._address_of)

    @property
    def sessions(self) -> int:
        return len(self._sessions)

    def arrive(self, conn: C, address: str) -> list[C]:
        """Counts a new connection from ``address`` as logging in; returns the connections to
        drop (the oldest logins in progress) so that it fits."""
        drop: list[C] = []
        here = self._logging_in.setdefault(address, OrderedDict())
        while len(here) >= self.limits.most_logins_in_progress_per_address:
            drop.append(self._pop_oldest(address))
        while self.logging_in >= self.limits.most_logins_in_progress:
            busiest = max(self._logging_in, key=lambda a: len(self._logging_in[a]))
            drop.append(self._pop_oldest(busiest))
        self._logging_in.setdefault(address, OrderedDict())[conn] = None
        self._address_of[conn] = address
        return drop

    def _pop_oldest(self, address: str) -> C:
        waiting = self._logging_in[address]
        conn, _ = waiting.popitem(last=False)
        del self._address_of[conn]
        if not waiting:
            del self._logging_in[address]
        return conn

    def is_logging_in(self, conn: C) -> bool:
        return conn in self._address_of

    def session_refusal(self, admin: bool) -> str | None:
        """Why a newly authenticated connection may not become a session (None: it may)."""
        most = self.limits.most_sessions
        if self.sessions >= most:
            return "too many connections"
        if not admin and self.sessions >= most - self.limits.admin_sessions_kept:
            return "remaining connection slots are reserved for administrators"
        return None

    def open_session(self, conn: C) -> None:
        """The connection has logged in: it stops counting as a login and counts as a session."""
        self._forget_login(conn)
        self._sessions.add(conn)

    def leave(self, conn: C) -> None:
        """The connection has ended, whatever state it was in."""
        self._forget_login(conn)
        self._sessions.discard(conn)

    def _forget_login(self, conn: C) -> None:
        address = self._address_of.pop(conn, None)
        if address is not None:
            waiting = self._logging_in[address]
            del waiting[conn]
            if not waiting:
                del self._logging_in[address]


def ceil_seconds(seconds: float) -> int:
    """Whole seconds for a hint (at least 1)."""
    return max(1, math.ceil(seconds))
