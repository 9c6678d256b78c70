"""The demo: an invented municipal water utility, loaded into PostgreSQL and ready to query.

Everything here is invented for the demo (no real people, places or readings): a few thousand
households in the districts Northbank, Old Mill and Harbourside, and one meter reading per
household per day for 2026. Water use depends on occupants, garden and season, and a few values
lie outside the declared ranges on purpose (leaks above 2000 litres, meter corrections below
zero, unread meters as NULL, households with more than 8 occupants), so the policies' clamping
has something to do.

The data come from numpy's seeded generator. That is right here and only here: this is data
generation, where repeatability matters; privacy noise never comes from numpy's generator.

Loading replaces the tables in one transaction (the old ones stay until the new ones are
complete) and streams text COPY, about a million rows in a few seconds.
"""

from __future__ import annotations

import datetime as dt
import shlex
import signal
import sys
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import psycopg
from psycopg import sql
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

from proxy.dsn import with_database  # noqa: F401 - re-exported for callers of the demo
from proxy.localpg import LocalServer, LocalServerError, start_local_postgres
from proxy.policy import PolicyError, load_policies

# The demo's accounts. These passwords are public (written here and printed by `hushql demo`);
# their SCRAM-SHA-256 verifiers are in policies/access.toml. Never reuse them for real data.
PLANNER_PASSWORD = "planner-demo"
RESEARCHER_PASSWORD = "researcher-demo"
AUDITOR_PASSWORD = "auditor-demo"

DEMO_DATABASE = "hushql_demo"
DEMO_DATA_DIR = Path(".hushql") / "demo-postgres"
SCHEMA = "utility"
DISTRICTS = ("Northbank", "Old Mill", "Harbourside")
TARIFFS = ("standard", "saver", "social")
YEAR = 2026
DAYS = (dt.date(YEAR + 1, 1, 1) - dt.date(YEAR, 1, 1)).days
# Account numbers are six digits starting with 1 (the range declared in the policies).
FIRST_ACCOUNT = 100001
LAST_ACCOUNT = 199999

# The utility's published price list: a public table (policies/tables/tariffs.toml), one row per
# tariff, invented like everything here.
TARIFF_PRICES = (("standard", "2.40", "Metered supply at the full price per cubic metre"),
                 ("saver", "2.10", "Lower price for households that agree to a usage cap"),
                 ("social", "1.20", "Reduced price for households receiving support"))

_DDL = f"""
DROP TABLE IF EXISTS {SCHEMA}.tariffs;
DROP TABLE IF EXISTS {SCHEMA}.meter_readings;
DROP TABLE IF EXISTS {SCHEMA}.households;
CREATE SCHEMA IF NOT EXISTS {SCHEMA};
CREATE TABLE {SCHEMA}.households (
    household_id integer PRIMARY KEY,
    district     text    NOT NULL,
    occupants    integer NOT NULL,
    tariff       text    NOT NULL,
    has_garden   boolean NOT NULL
);
CREATE TABLE {SCHEMA}.meter_readings (
    household_id integer      NOT NULL,
    district     text         NOT NULL,
    reading_date date         NOT NULL,
    litres       numeric(7,1)
);
CREATE TABLE {SCHEMA}.tariffs (
    tariff       text         PRIMARY KEY,
    price_per_m3 numeric(5,2) NOT NULL,
    description  text         NOT NULL
);
COMMENT ON TABLE {SCHEMA}.households IS 'hushql demo: invented households of an invented utility';
COMMENT ON TABLE {SCHEMA}.tariffs IS 'hushql demo: the invented utility''s published price list';
COMMENT ON TABLE {SCHEMA}.meter_readings IS 'hushql demo: invented daily meter readings';
"""

# Built after the rows are in: one sort instead of a million index insertions and FK checks.
_CONSTRAINTS = f"""
ALTER TABLE {SCHEMA}.meter_readings
    ADD PRIMARY KEY (household_id, reading_date),
    ADD FOREIGN KEY (household_id) REFERENCES {SCHEMA}.households;
"""


def demo_accounts() -> list[tuple[str, str]]:
    """The demo's (account name, password) pairs: two analysts and one administrator."""
    return [("planner", PLANNER_PASSWORD), ("researcher", RESEARCHER_PASSWORD),
            ("auditor", AUDITOR_PASSWORD)]


@dataclass(frozen=True)
class Scenario:
    """The generated demo data as arrays: one entry per household, one row per household-day.

    ``district`` and ``tariff`` index DISTRICTS and TARIFFS; ``litres_tenths`` holds readings
    in tenths of a litre (shape households x DAYS), meaningless where ``unread`` is True.
    """

    household_id: np.ndarray
    district: np.ndarray
    occupants: np.ndarray
    tariff: np.ndarray
    has_garden: np.ndarray
    litres_tenths: np.ndarray
    unread: np.ndarray

    @property
    def households(self) -> int:
        return int(self.household_id.size)

    @property
    def readings(self) -> int:
        return int(self.litres_tenths.size)


def generate_scenario(households: int = 3000, seed: int = 2026) -> Scenario:
    """Invent the utility's households and a year of daily readings; same seed, same data.

    The figures (140 litres per person per day, summer watering, holidays, leaks) are invented
    to look plausible, not taken from any real utility.
    """
    if not 1 <= households <= LAST_ACCOUNT - FIRST_ACCOUNT + 1:
        raise ValueError(f"households must be between 1 and {LAST_ACCOUNT - FIRST_ACCOUNT + 1}")
    rng = np.random.default_rng(seed)
    n = households
    household_id = np.arange(FIRST_ACCOUNT, FIRST_ACCOUNT + n, dtype=np.int64)
    district = rng.choice(len(DISTRICTS), size=n, p=[0.40, 0.25, 0.35])
    # Harbourside is flats (fewer people, few gardens), Northbank family houses.
    occupants = np.minimum(1 + rng.poisson(np.array([1.6, 1.3, 0.9])[district]), 8)
    large = rng.choice(n, size=max(1, n // 400), replace=False)
    occupants[large] = rng.integers(9, 12, size=large.size)  # above the declared range [1, 8]
    has_garden = rng.random(n) < np.array([0.75, 0.55, 0.20])[district]
    tariff = rng.choice(len(TARIFFS), size=n, p=[0.63, 0.25, 0.12])

    day = np.arange(DAYS)
    weekday = (np.datetime64(f"{YEAR}-01-01") + day).astype(np.int64) % 7  # 0 = Thursday
    weekend = np.isin(weekday, (2, 3))  # Saturday, Sunday
    season = 1 + 0.08 * np.cos(2 * np.pi * (day - 196) / DAYS)  # a little more in mid-July
    # Gardens are watered from May to September, most in July.
    watering_season = np.where((day >= 120) & (day <= 273),
                               np.clip(np.sin(np.pi * (day - 120) / 153), 0, None), 0.0)

    habit = rng.lognormal(0.0, 0.25, n) * np.where(tariff == TARIFFS.index("saver"), 0.9, 1.0)
    base = 140.0 * occupants ** 0.9 * habit
    litres = (base[:, None] * season[None, :] * np.where(weekend, 1.08, 1.0)[None, :]
              * rng.lognormal(0.0, 0.15, (n, DAYS)))
    waters_today = rng.random((n, DAYS)) < 0.45
    litres += (has_garden[:, None] * watering_season[None, :] * waters_today
               * rng.gamma(2.0, 60.0, (n, DAYS)))
    away = rng.random(n) < 0.4
    leave = rng.integers(0, DAYS - 14, n)
    back = leave + rng.integers(3, 15, n)
    on_holiday = away[:, None] & (day[None, :] >= leave[:, None]) & (day[None, :] < back[:, None])
    litres = np.where(on_holiday, litres * 0.02, litres)

    # Leaks: a few households lose 2,400-3,400 litres a day for 2-6 days (above the range).
    for house in rng.choice(n, size=max(1, n // 250), replace=False):
        start, length = int(rng.integers(0, DAYS - 6)), int(rng.integers(2, 7))
        litres[house, start:start + length] = rng.uniform(2400, 3400, length)
    tenths = np.rint(litres * 10).astype(np.int64)
    # Meter corrections (a few negative readings, below the range) and unread meters (NULL),
    # on distinct ordinary days so that neither hides a leak or the other.
    flat = tenths.reshape(-1)
    ordinary = np.flatnonzero(flat < 20_000)
    corrections, missing = max(1, n // 1000), max(3, flat.size // 2000)
    chosen = rng.choice(ordinary, size=corrections + missing, replace=False)
    flat[chosen[:corrections]] = -rng.integers(5, 400, corrections)
    unread = np.zeros(tenths.shape, dtype=bool)
    unread.reshape(-1)[chosen[corrections:]] = True
    return Scenario(household_id=household_id, district=district, occupants=occupants,
                    tariff=tariff, has_garden=has_garden, litres_tenths=tenths, unread=unread)


def load_scenario(dsn: str, *, households: int = 3000, seed: int = 2026,
                  progress: bool = True) -> dict[str, int]:
    """Create schema ``utility`` with ``households``, ``meter_readings`` and the public
    ``tariffs`` in ``dsn``'s database.

    Replaces the tables if present, atomically (one transaction). Returns the row counts as
    {"households": ..., "readings": ...}. Same seed and count give the same rows.
    """
    scenario = generate_scenario(households, seed)
    with _progress(progress) as bar, psycopg.connect(dsn) as conn:
        houses_task = bar.add_task("households", total=scenario.households)
        readings_task = bar.add_task("readings", total=scenario.readings)
        with conn.transaction():
            conn.execute(_DDL)
            with conn.cursor() as cursor:
                cursor.executemany(f"INSERT INTO {SCHEMA}.tariffs VALUES (%s, %s, %s)", TARIFF_PRICES)
            _copy(conn, f"{SCHEMA}.households", _household_lines(scenario),
                  lambda rows: bar.advance(houses_task, rows))
            _copy(conn, f"{SCHEMA}.meter_readings", _reading_lines(scenario),
                  lambda rows: bar.advance(readings_task, rows))
            conn.execute(_CONSTRAINTS)
        conn.execute(f"ANALYZE {SCHEMA}.households, {SCHEMA}.meter_readings, {SCHEMA}.tariffs")
        conn.commit()
    return {"households": scenario.households, "readings": scenario.readings}


def _copy(conn: psycopg.Connection, table: str, chunks: Iterator[tuple[bytes, int]],
          advance: Callable[[int], None]) -> None:
    """Stream text-format COPY chunks of (bytes, row count) into ``table``.

    FREEZE is allowed because the table was created in this transaction; it spares the first
    reader from rewriting every page's visibility hints.
    """
    with conn.cursor().copy(f"COPY {table} FROM STDIN WITH (FORMAT text, FREEZE)") as copy:
        for data, rows in chunks:
            copy.write(data)
            advance(rows)


def _household_lines(s: Scenario) -> Iterator[tuple[bytes, int]]:
    lines = [f"{h}\t{DISTRICTS[d]}\t{o}\t{TARIFFS[t]}\t{'t' if g else 'f'}\n"
             for h, d, o, t, g in zip(s.household_id.tolist(), s.district.tolist(),
                                      s.occupants.tolist(), s.tariff.tolist(),
                                      s.has_garden.tolist())]
    yield "".join(lines).encode(), len(lines)


def _reading_lines(s: Scenario, per_chunk: int = 100) -> Iterator[tuple[bytes, int]]:
    """COPY text for the readings, ``per_chunk`` households (x DAYS rows) at a time."""
    dates = [str(dt.date(YEAR, 1, 1) + dt.timedelta(days=i)) for i in range(DAYS)]
    low, high = int(s.litres_tenths.min()), int(s.litres_tenths.max())
    # Every reading is one of a few thousand values: format each once, look the rest up.
    text = [_tenths_text(v) for v in range(low, high + 1)]
    values = np.where(s.unread, high + 1 - low, s.litres_tenths - low)
    text.append("\\N")
    for first in range(0, s.households, per_chunk):
        lines: list[str] = []
        for house in range(first, min(first + per_chunk, s.households)):
            prefix = f"{s.household_id[house]}\t{DISTRICTS[s.district[house]]}\t"
            lines += [f"{prefix}{d}\t{text[v]}\n" for d, v in zip(dates, values[house].tolist())]
        yield "".join(lines).encode(), len(lines)


def _tenths_text(tenths: int) -> str:
    """-15 -> '-1.5': exact decimal text of a whole number of tenths."""
    sign = "-" if tenths < 0 else ""
    whole, tenth = divmod(abs(tenths), 10)
    return f"{sign}{whole}.{tenth}"


@contextmanager
def _progress(enabled: bool) -> Iterator[Progress]:
    """A rich progress bar on stderr, or one that draws nothing when disabled."""
    bar = Progress(TextColumn("{task.description:>10}"), BarColumn(), MofNCompleteColumn(),
                   TimeElapsedColumn(), console=Console(stderr=True), disable=not enabled)
    with bar:
        yield bar


# --- running the demo -------------------------------------------------------------------------

# (account, query, what to expect when it is not an answer)
EXAMPLE_QUERIES: list[tuple[str, str, str]] = [
    ("planner", "SELECT district, COUNT(*) FROM households GROUP BY district", ""),
    ("planner", "SELECT tariff, AVG(occupants) FROM households GROUP BY tariff", ""),
    ("planner", "SELECT district, SUM(litres) AS july_litres FROM readings "
                "WHERE reading_date BETWEEN '2026-07-01' AND '2026-07-31' GROUP BY district", ""),
    ("planner", "SELECT h.tariff, AVG(r.litres) FROM readings r JOIN households h "
                "ON h.household_id = r.household_id GROUP BY h.tariff", ""),
    ("planner", "SELECT * FROM tariffs", ""),
    ("researcher", "SELECT has_garden, COUNT(*) FROM households GROUP BY has_garden", ""),
    ("researcher", "SELECT COUNT(*) FROM readings", "refused: readings is not granted"),
    ("planner", "SELECT * FROM households", "refused: raw rows"),
]


def run_demo(backend: str | None, data_dir: Path | None, policies_dir: Path,
             listen: tuple[str, int] | None, serve_callback: Callable[[str], None] | None = None,
             *, console: Console | None = None, households: int = 3000,
             load: bool = True) -> int:
    """``hushql demo``: check the policies, load the scenario, print how to query it, then serve.

    With no ``backend``, starts a private PostgreSQL in ``data_dir`` (default
    ``.hushql/demo-postgres``) and creates database hushql_demo in it. Calls
    ``serve_callback(backend_dsn)`` if given (it blocks; the banner then shows how to connect
    to ``listen``). Without it the banner shows how to serve what was loaded on ``listen``, and
    a private server is kept running until Ctrl-C, so that the printed commands can use it.
    With ``load`` false the scenario loaded before into ``backend`` is served as it is.
    Returns the exit code: 0 after a clean stop, 1 when the policies are broken or no server
    can be had.
    """
    out = console or Console()
    err = console or Console(stderr=True)
    if not 1 <= households <= LAST_ACCOUNT - FIRST_ACCOUNT + 1:
        _say(err, f"hushql demo: --households must be between 1 and "
                  f"{LAST_ACCOUNT - FIRST_ACCOUNT + 1}")
        return 1
    try:
        load_policies(policies_dir)
    except PolicyError as error:
        _say(err, f"The policies in {policies_dir} have problems:")
        for line in error.problems:
            _say(err, line)
        return 1
    server: LocalServer | None = None
    if backend is None:
        folder = data_dir or Path.cwd() / DEMO_DATA_DIR
        _say(out, f"Starting a private PostgreSQL in {folder} ...")
        try:
            server = start_local_postgres(folder)
        except LocalServerError as error:  # no binaries, or initdb / the server failed
            _say(err, f"hushql demo: {error}")
            _say(err, f"Or point the demo at a server you have: {hushql_command()} demo "
                      "--backend DSN")
            return 1
    try:
        with _stop_on_sigterm():
            try:
                if server is not None:
                    backend = _ensure_database(server.dsn, DEMO_DATABASE)
                assert backend is not None
                started = time.perf_counter()
                counts = load_scenario(backend, households=households) if load else None
                seconds = time.perf_counter() - started
                database = _database_name(backend)
            except psycopg.Error as error:
                _say(err, "hushql demo: cannot load the scenario into the backend: "
                          + (str(error).strip().splitlines() or [type(error).__name__])[0])
                _say(err, "Check --backend: the database must exist and the role may create "
                          "schema utility in it.")
                return 1
            if counts is not None:
                _say(out, f"Loaded {counts['households']:,} households and "
                          f"{counts['readings']:,} readings in {seconds:.1f} s.")
            _print_examples(out, backend, policies_dir, listen, database,
                            serving=serve_callback is not None)
            if serve_callback is not None:
                serve_callback(backend)
            elif server is not None:
                _say(out, "The private PostgreSQL runs until Ctrl-C.")
                threading.Event().wait()
    except KeyboardInterrupt:
        pass
    finally:
        if server is not None:
            _say(out, "Stopping the private PostgreSQL.")
            server.stop()
    return 0


def _say(console: Console, text: str) -> None:
    """Print plain text: no markup, emoji or highlighting, never wrapped (so it pastes)."""
    console.print(text, markup=False, emoji=False, highlight=False, soft_wrap=True)


def hushql_command() -> str:
    """How to run this same hushql from any shell and folder: the console script beside this
    Python (a virtual environment's bin/, not necessarily on PATH), else ``python -m``."""
    script = Path(sys.executable).absolute().parent / "hushql"
    if script.is_file():
        return _shell_quote(str(script))
    return f"{_shell_quote(str(Path(sys.executable).absolute()))} -m proxy.cli"


def client_host(host: str) -> str:
    """The host a client on this machine connects to for a server listening on ``host``
    (a wildcard address means loopback), bracketed when it is an IPv6 address."""
    host = {"0.0.0.0": "127.0.0.1", "::": "::1", "": "127.0.0.1"}.get(host, host)
    return f"[{host}]" if ":" in host else host


def _print_examples(out: Console, backend: str, policies_dir: Path,
                    listen: tuple[str, int] | None, database: str, *, serving: bool,
                    ledger: str | None = None) -> None:
    """The commands to try, one per line and never wrapped, so they paste into a shell as is.

    Every path is absolute and hushql is named by its full path, so the lines work from any
    folder in a shell where the virtual environment is not activated. A psql URL is printed
    only when the demo serves; otherwise the command that serves what was loaded.
    """
    hushql = hushql_command()
    lines = [f"export HUSHQL_BACKEND={_shell_quote(backend)}",
             f"export HUSHQL_POLICIES={_shell_quote(str(policies_dir.absolute()))}"]
    if ledger is not None:  # a Spark backend keeps its ledger in PostgreSQL
        lines.insert(1, f"export HUSHQL_LEDGER={_shell_quote(ledger)}")
    spark = ledger is not None  # joins are answered on PostgreSQL only (spark_backend.check)
    lines += [f"{hushql} ask --as {who} {_shell_quote(query)}" + (f"    # {note}" if note else "")
              for who, query, note in [
                  (who, query, note or ("refused on Spark: joins run on PostgreSQL only"
                                        if spark and " JOIN " in query else ""))
                  for who, query, note in EXAMPLE_QUERIES]]
    planner = dict(demo_accounts())["planner"]
    if listen is not None:
        host, port = listen
        if serving:
            url = f"postgresql://planner:{planner}@{client_host(host)}:{port}/{database}"
            lines.append(f"psql {_shell_quote(url)}    # the demo's invented planner account")
        else:
            # The demo's published passwords are served by `hushql demo` only, never by `serve`.
            ledger_flag = "" if ledger is None else f" --ledger {_shell_quote(ledger)}"
            lines.append(f"{hushql} demo --no-load --backend {_shell_quote(backend)}{ledger_flag} "
                         f"--listen {_shell_quote(f'{host}:{port}')}"
                         f"    # then connect to database {database} as planner / {planner}")
    out.rule("hushql demo: try these")
    for line in lines:
        _say(out, line)
    _say(out, "Accounts (invented, for this demo only): "
         + ", ".join(f"{name} / {password}" for name, password in demo_accounts()))
    out.rule()


def _database_name(dsn: str) -> str:
    """The name of the database ``dsn`` connects to, as the server reports it."""
    with psycopg.connect(dsn) as conn:
        return conn.info.dbname


def _shell_quote(text: str) -> str:
    """Quote for a POSIX shell; double quotes when they suffice, since SQL uses single ones."""
    if text and all(c.isalnum() or c in "@%+=:,./-_" for c in text):
        return text
    if not any(c in text for c in '"$`\\!'):
        return f'"{text}"'
    return shlex.quote(text)


def _ensure_database(admin_dsn: str, name: str) -> str:
    """Create database ``name`` on the server of ``admin_dsn`` if missing; return its DSN."""
    with psycopg.connect(admin_dsn, autocommit=True) as conn:
        exists = conn.execute("SELECT 1 FROM pg_database WHERE datname = %s", (name,)).fetchone()
        if exists is None:
            conn.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(name)))
    return with_database(admin_dsn, name)




@contextmanager
def _stop_on_sigterm() -> Iterator[None]:
    """Treat SIGTERM (docker stop, systemd) like Ctrl-C so the private server stops cleanly."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def interrupt(signum: int, frame: object) -> None:
        raise KeyboardInterrupt

    previous = signal.signal(signal.SIGTERM, interrupt)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)
