"""A private PostgreSQL server for the demo and for tests on machines without one.

Order of preference: server binaries on PATH (``initdb`` and ``pg_ctl``, or Debian's
``/usr/lib/postgresql/*/bin``), else the ``pgserver`` wheel (extra ``embedded``). The server lives
in a data folder of its own, listens on 127.0.0.1 and a Unix socket inside that folder, and trusts
local connections only. PostgreSQL refuses to run as root, so under root the server runs as the
``postgres`` (or ``nobody``) system user, in a folder that user owns.
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import socket
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable


class LocalServerError(RuntimeError):
    """The private server could not be had; the message says why, in a line or a few."""


class NoPostgresError(LocalServerError):
    """Neither server binaries nor the pgserver wheel are available."""


@dataclass
class LocalServer:
    """A running private server; ``dsn`` connects as its superuser to database ``postgres``."""

    dsn: str
    data_dir: Path
    _stop: Callable[[], None] = field(repr=False)

    def stop(self) -> None:
        """Stop the server; the data folder is kept so a later start reuses it."""
        self._stop()


def find_binaries() -> Path | None:
    """The folder holding initdb and pg_ctl, from PATH or Debian's layout, or None."""
    initdb = shutil.which("initdb")
    if initdb and shutil.which("pg_ctl"):
        return Path(os.path.realpath(initdb)).parent
    for folder in sorted(glob.glob("/usr/lib/postgresql/*/bin"), reverse=True):
        if Path(folder, "initdb").exists() and Path(folder, "pg_ctl").exists():
            return Path(folder)
    return None


def start_local_postgres(data_dir: str | Path, *, port: int | None = None) -> LocalServer:
    """Start (initialising if needed) a server in ``data_dir``; returns once it accepts connections.

    Raises NoPostgresError naming both ways to get a server when neither is available.
    """
    binaries = find_binaries()
    if binaries is not None:
        return _start_from_binaries(binaries, Path(data_dir), port or free_port())
    try:
        import pgserver  # type: ignore[import-not-found]
    except ImportError:
        raise NoPostgresError(
            "no PostgreSQL found: install the server binaries (initdb and pg_ctl on PATH, e.g. "
            "Debian's postgresql package) or the embedded wheel with "
            "`pip install 'hushql[embedded]'` (pgserver, Python 3.9-3.12)") from None
    Path(data_dir).mkdir(parents=True, exist_ok=True)
    server = pgserver.get_server(str(data_dir), cleanup_mode="stop")
    return LocalServer(dsn=server.get_uri(), data_dir=Path(data_dir), _stop=server.cleanup)


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _server_user() -> str | None:
    """The unprivileged user to run the server as when we are root, else None."""
    if os.geteuid() != 0:
        return None
    for name in ("postgres", "nobody"):
        try:
            pwd.getpwnam(name)
            return name
        except KeyError:
            continue
    raise NoPostgresError("running as root and no 'postgres' or 'nobody' user to run the server as")


def _start_from_binaries(binaries: Path, data_dir: Path, port: int) -> LocalServer:
    user = _server_user()
    data_dir = data_dir.resolve()
    data_dir.mkdir(parents=True, exist_ok=True)
    if user is not None:
        entry = pwd.getpwnam(user)
        os.chown(data_dir, entry.pw_uid, entry.pw_gid)
        _make_traversable(data_dir)
    pgdata = data_dir / "pgdata"
    # As root, drop the group and supplementary groups too, or initdb keeps root's.
    drop = {} if user is None else {"user": user, "group": pwd.getpwnam(user).pw_gid,
                                    "extra_groups": []}
    run = lambda *args: subprocess.run(  # noqa: E731 - one place that sets user and output
        [str(a) for a in args], check=True, capture_output=True, text=True, **drop)
    if not (pgdata / "PG_VERSION").exists():
        try:
            run(binaries / "initdb", "-D", pgdata, "-U", "postgres", "--auth=trust",
                "--encoding=UTF8", "--locale=C.UTF-8" if _has_c_utf8() else "--no-locale")
        except subprocess.CalledProcessError as error:
            raise LocalServerError(f"initdb failed in {data_dir}: "
                                   f"{(error.stderr or '').strip()[-1000:]}") from None
    options = f"-h 127.0.0.1 -p {port} -k {data_dir} -c fsync=on -c listen_addresses=127.0.0.1"
    log = data_dir / "server.log"
    try:
        run(binaries / "pg_ctl", "-D", pgdata, "-l", log, "-o", options, "-w", "-t", "60", "start")
    except subprocess.CalledProcessError as error:
        tail = log.read_text(errors="replace")[-2000:] if log.exists() else error.stderr
        raise LocalServerError(f"PostgreSQL did not start in {data_dir}:\n{tail}") from None
    dsn = f"postgresql://postgres@127.0.0.1:{port}/postgres"

    def stop() -> None:
        subprocess.run([str(binaries / "pg_ctl"), "-D", str(pgdata), "-m", "fast", "-w", "stop"],
                       capture_output=True, **drop)

    _wait_ready(port)
    return LocalServer(dsn=dsn, data_dir=data_dir, _stop=stop)


def _has_c_utf8() -> bool:
    return any(Path(p).exists() for p in ("/usr/lib/locale/C.utf8", "/usr/lib/locale/C.UTF-8"))


def _make_traversable(path: Path) -> None:
    """Let the server user reach ``path`` through its parents (adds o+x only where missing)."""
    for parent in list(path.parents)[:-1]:
        mode = parent.stat().st_mode
        if not mode & 0o001:
            os.chmod(parent, mode | 0o001)


def _wait_ready(port: int, timeout: float = 30.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=1):
                return
        except OSError:
            time.sleep(0.1)
    raise LocalServerError(f"PostgreSQL on port {port} did not accept connections in {timeout} s")
