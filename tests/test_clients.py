"""Real clients against a running proxy on demo data: psql, psycopg (sync and async; client-
and server-side binding; prepared), asyncpg, pg8000, SQLAlchemy with pandas, and JDBC.

Each client runs the same four checks: an aggregate query (noisy, plausible counts with the
right column names and types, and a NOTICE where the client shows notices), a refused query
(its SQLSTATE), a query with a parameter, and a catalog listing that shows exactly the exposed
columns. TLS: psql and psycopg with sslmode=require against a certificate made for the run.
"""

from __future__ import annotations

import asyncio
import math
import os
import re
import shutil
import subprocess
from pathlib import Path
from types import SimpleNamespace

from decimal import Decimal
from fractions import Fraction

import psycopg
import pytest

from proxy import noise

from tests.proxy_fixtures import UNLISTED_COLUMN, RunningProxy
from tests.proxy_fixtures import demo_proxy, tls_proxy  # noqa: F401  (fixtures)

DISTRICTS = ["Harbourside", "Northbank", "Old Mill"]  # the declared domain, sorted
COUNT = ("SELECT district, count(*) AS households FROM households GROUP BY district "
         "ORDER BY district")
COUNT_ABOVE = ("SELECT district, count(*) AS households FROM households WHERE occupants > {} "
               "GROUP BY district ORDER BY district")
REFUSED = "SELECT * FROM households"
NOT_SUPPORTED = "0A000"
EXPOSED = ["household_id", "district", "occupants", "tariff", "has_garden"]
COLUMNS_QUERY = ("SELECT column_name FROM information_schema.columns WHERE table_name = {} "
                 "ORDER BY ordinal_position")
OCCUPANTS = 2  # the parameter: households with more than two occupants
# The column comment the mirror carries for occupants: the demo policy's description, kind,
# range and unit (policies/tables/households.toml).
OCCUPANTS_COMMENT = ("People living in the household; integer from 1 to 8 (sums count values "
                     "outside as the nearest end), measured in people")
HOUSEHOLDS_COMMENT = ("One row per household supplied by the utility; individuals: rows sharing "
                      "household_id are one individual of population households, at most 1 row "
                      "each")

# Each answer here spends the default epsilon 0.1 on one COUNT over a table with one row per
# household: sensitivity 1, discrete Laplace noise of scale b = 1 / 0.1 = 10. Its tail is
# P(|Z| >= t) = 2 exp(-t/b) / (1 + exp(-1/b)) <= 2 exp(-t/b), so t = b ln(2 / 1e-9) bounds
# one cell's noise except with probability 1e-9 (the geometric mechanism, Ghosh, Roughgarden &
# Sundararajan 2009). Counts are clamped at zero after the noise.
SCALE = 10
TOLERANCE = math.ceil(SCALE * math.log(2 / 1e-9))  # 215


@pytest.fixture(scope="module")
def exact(demo_proxy: RunningProxy) -> dict[str, dict[str, int]]:
    """Exact counts per district, for all households and for the parameterised filter, read
    straight from the backend (the figures the noisy answers must be near)."""
    query = ("SELECT district, count(*) FILTER (WHERE true), count(*) FILTER (WHERE occupants "
             "> %s) FROM utility.households GROUP BY district")
    with psycopg.connect(demo_proxy.backend_dsn) as conn:
        found = conn.execute(query, [OCCUPANTS]).fetchall()
    return {"all": {d: n for d, n, _ in found}, "above": {d: n for d, _, n in found}}


def assert_noisy_counts(rows: list, exact: dict[str, int]) -> None:
    """One row per declared district, in order, each a plausible noisy count."""
    assert [r[0] for r in rows] == DISTRICTS
    for district, count in rows:
        count = int(count)
        assert max(0, exact.get(district, 0) - TOLERANCE) <= count <= exact[district] + TOLERANCE


def assert_spent(notices: list[str]) -> None:
    """A notice whose first line says what the answer cost (or, for a question the module
    asked before, that it was reused and what it cost then), what remains and the margins."""
    assert any(re.search(r"(spent epsilon 0\.1 |spent nothing now \(epsilon 0\.1 paid )"
                         r".*remains; 95% margins: households ±\d+", n.splitlines()[0])
               for n in notices if n), notices


# ----------------------------------------------------------------------------- psql

def psql(proxy: RunningProxy, *args: str, user: str = "planner", stdin: str | None = None,
         conninfo: str | None = None) -> subprocess.CompletedProcess[str]:
    binary = shutil.which("psql")
    if binary is None:
        pytest.skip("psql is not installed")
    env = dict(os.environ, PGPASSWORD=proxy.accounts[user], PAGER="", PSQLRC="/dev/null")
    env.pop("PGSERVICE", None)
    target = conninfo or f"host={proxy.host} port={proxy.port} dbname=hushql_demo user={user}"
    return subprocess.run([binary, "-X", "-A", "-F", "|", "-d", target, *args], input=stdin,
                          env=env, capture_output=True, text=True, timeout=30)


def psql_major() -> int:
    out = subprocess.run([shutil.which("psql") or "psql", "--version"], capture_output=True,
                         text=True).stdout
    found = re.search(r"(\d+)", out)
    return int(found.group(1)) if found else 0


def table_rows(stdout: str) -> list[list[str]]:
    """Rows of psql's unaligned output, header first, without the '(n rows)' footer."""
    return [line.split("|") for line in stdout.splitlines()
            if line and not re.fullmatch(r"\(\d+ rows?\)", line)]


def test_psql(demo_proxy: RunningProxy, exact) -> None:
    done = psql(demo_proxy, "-c", COUNT)
    assert done.returncode == 0, done.stderr
    header, *rows = table_rows(done.stdout)
    assert header == ["district", "households"]
    assert_noisy_counts(rows, exact["all"])
    assert "NOTICE:  this answer spent epsilon 0.1" in done.stderr
    assert "95% of answers" in done.stderr

    described = psql(demo_proxy, stdin=COUNT + " \\gdesc\n")  # Describe only: nothing charged
    assert table_rows(described.stdout) == [["Column", "Type"], ["district", "text"],
                                            ["households", "bigint"]]

    refused = psql(demo_proxy, stdin="\\set VERBOSITY verbose\n" + REFUSED + ";\n")
    assert f"ERROR:  {NOT_SUPPORTED}:" in refused.stderr and "HINT:" in refused.stderr

    if psql_major() >= 16:  # a protocol-level parameter: \bind arrived in psql 16
        script = COUNT_ABOVE.format("$1") + f" \\bind {OCCUPANTS} \\g\n"
    else:  # psql 15 and older can only interpolate a variable into the text
        script = f"\\set n {OCCUPANTS}\n" + COUNT_ABOVE.format(":n") + ";\n"
    param = psql(demo_proxy, stdin=script)
    assert param.returncode == 0, param.stderr
    assert_noisy_counts(table_rows(param.stdout)[1:], exact["above"])

    described = psql(demo_proxy, "-c", "\\d households")
    assert described.returncode == 0, described.stderr
    listed = [r[0] for r in table_rows(described.stdout)[2:]]  # after title and header
    assert listed == EXPOSED and UNLISTED_COLUMN not in described.stdout
    assert table_rows(described.stdout)[2][1] == "integer"

    # \d+ shows the policy in the Description column.
    detailed = psql(demo_proxy, "-c", "\\d+ households")
    assert detailed.returncode == 0, detailed.stderr
    header = table_rows(detailed.stdout)[1]
    by_name = {r[0]: dict(zip(header, r)) for r in table_rows(detailed.stdout)[2:] if len(r) > 1}
    assert by_name["occupants"]["Description"] == OCCUPANTS_COMMENT
    assert by_name["district"]["Description"] == ("category, one of: Northbank, Old Mill, "
                                                  "Harbourside")
    # (\dt+ asks for table sizes, which are refused; the comment itself is answered.)
    commented = psql(demo_proxy, "-t", "-c",
                     "SELECT obj_description('households'::regclass, 'pg_class')")
    assert commented.stdout.strip() == HOUSEHOLDS_COMMENT, commented.stderr

    tables = psql(demo_proxy, "-c", "\\dt")
    assert [r[1] for r in table_rows(tables.stdout)[2:]] == ["households", "readings", "tariffs"]
    theirs = psql(demo_proxy, "-c", "\\dt", user="researcher")  # granted households only
    assert [r[1] for r in table_rows(theirs.stdout)[2:]] == ["households"]


# ----------------------------------------------------------------------------- psycopg

def test_psycopg_sync(demo_proxy: RunningProxy, exact) -> None:
    notices: list[str] = []
    with psycopg.connect(demo_proxy.conninfo(), autocommit=True) as conn:
        conn.add_notice_handler(lambda d: notices.append(d.message_primary or ""))
        cur = conn.execute(COUNT)  # server-side binding (extended protocol)
        assert [(c.name, c.type_code) for c in cur.description] == [("district", 25),
                                                                     ("households", 20)]
        assert_noisy_counts(cur.fetchall(), exact["all"])
        assert_spent(notices)

        with pytest.raises(psycopg.errors.FeatureNotSupported) as caught:
            conn.execute(REFUSED)
        assert caught.value.sqlstate == NOT_SUPPORTED and caught.value.diag.message_hint

        with psycopg.ClientCursor(conn) as client_side:  # values merged into the text
            client_side.execute(COUNT_ABOVE.format("%s"), [OCCUPANTS])
            assert_noisy_counts(client_side.fetchall(), exact["above"])
        prepared = conn.execute(COUNT_ABOVE.format("%s"), [OCCUPANTS], prepare=True)
        assert_noisy_counts(prepared.fetchall(), exact["above"])  # a named prepared statement

        listed = conn.execute(COLUMNS_QUERY.format("%s"), ["households"]).fetchall()
        assert [r[0] for r in listed] == EXPOSED
        # A catalog query sqlglot cannot parse, with a parameter the mirror counts and types.
        types = conn.execute("SELECT typname FROM pg_catalog.pg_type WHERE oid = any(%s::oid[]) "
                             "ORDER BY 1", ["{23,25}"]).fetchall()
        assert types == [("int4",), ("text",)]


def test_psycopg_notices_fresh_answers_and_my_tables(demo_proxy: RunningProxy, exact) -> None:
    """The notice's fields as the protocol names them (Message one line, then Detail and
    Hint); a repeated question reused for nothing, hushql.fresh paying again; and
    hushql.my_tables with the budget SHOW hushql.remaining tells."""
    question = COUNT.replace("count(*)", "count(*) ") + " LIMIT 3"  # a question of this test's
    notices: list[SimpleNamespace] = []  # a Diagnostic's fields live only in the handler
    with psycopg.connect(demo_proxy.conninfo(user="researcher"), autocommit=True) as conn:
        conn.add_notice_handler(lambda d: notices.append(SimpleNamespace(
            message_primary=d.message_primary, message_detail=d.message_detail,
            message_hint=d.message_hint)))

        def remaining() -> Decimal:
            return Decimal(conn.execute("SHOW hushql.remaining").fetchone()[0])

        before = remaining()
        first = conn.execute(question).fetchall()
        assert_noisy_counts(first, exact["all"])
        paid = notices[-1]
        assert "\n" not in paid.message_primary and paid.message_primary.startswith(
            "this answer spent epsilon 0.1 of your privacy budget; ")
        assert "households: within ±" in paid.message_detail
        assert "hushql.fresh" in paid.message_hint
        assert remaining() == before - Decimal("0.1")

        again = conn.execute(question.lower()).fetchall()  # the same question, spelt otherwise
        assert again == first and remaining() == before - Decimal("0.1")
        assert notices[-1].message_primary.startswith(
            "this answer was given before and is reused: it spent nothing now (epsilon 0.1 paid ")
        assert "as it was when first paid for" in notices[-1].message_detail

        conn.execute("SET hushql.fresh = on")
        conn.execute(question).fetchall()
        assert remaining() == before - Decimal("0.2")
        assert notices[-1].message_primary.startswith("this answer spent epsilon 0.1")
        conn.execute("RESET hushql.fresh")
        # EXPLAIN says an answer is stored (the newest, paid for by the fresh asking).
        explained = dict(conn.execute("EXPLAIN " + question).fetchall())
        assert explained["stored answer"].startswith("stored, first paid")

        facts = conn.execute("SELECT column_name, kind, low, high, remaining_budget FROM "
                             "hushql.my_tables WHERE table_name = 'households' "
                             "ORDER BY column_name").fetchall()
        assert [f[0] for f in facts] == sorted(EXPOSED)
        assert ("occupants", "integer", "1", "8", remaining()) in facts


def test_psycopg_async(demo_proxy: RunningProxy, exact) -> None:
    async def run() -> None:
        notices: list[str] = []
        conn = await psycopg.AsyncConnection.connect(demo_proxy.conninfo(), autocommit=True)
        async with conn:
            conn.add_notice_handler(lambda d: notices.append(d.message_primary or ""))
            cur = await conn.execute(COUNT, binary=True)  # binary results
            assert [c.type_code for c in cur.description] == [25, 20]
            assert_noisy_counts(await cur.fetchall(), exact["all"])
            assert_spent(notices)
            with pytest.raises(psycopg.errors.FeatureNotSupported):
                await conn.execute(REFUSED)
            async with psycopg.AsyncClientCursor(conn) as client_side:
                await client_side.execute(COUNT_ABOVE.format("%s"), [OCCUPANTS])
                assert_noisy_counts(await client_side.fetchall(), exact["above"])
            prepared = await conn.execute(COUNT_ABOVE.format("%s"), [OCCUPANTS], prepare=True)
            assert_noisy_counts(await prepared.fetchall(), exact["above"])
            listed = await (await conn.execute(COLUMNS_QUERY.format("%s"), ["households"])
                            ).fetchall()
            assert [r[0] for r in listed] == EXPOSED

    asyncio.run(run())


# ----------------------------------------------------------------------------- asyncpg

def test_asyncpg(demo_proxy: RunningProxy, exact) -> None:
    asyncpg = pytest.importorskip("asyncpg")

    async def run() -> None:
        conn = await asyncpg.connect(host=demo_proxy.host, port=demo_proxy.port,
                                     user="planner", password=demo_proxy.accounts["planner"],
                                     database="hushql_demo", ssl=False)
        notices: list[str] = []
        conn.add_log_listener(lambda _conn, message: notices.append(message.message))
        try:
            rows = await conn.fetch(COUNT)  # prepared and executed with binary results
            assert [tuple(r) for r in rows] and list(rows[0].keys()) == ["district", "households"]
            assert_noisy_counts([tuple(r) for r in rows], exact["all"])

            with pytest.raises(asyncpg.exceptions.FeatureNotSupportedError) as caught:
                await conn.fetch(REFUSED)
            assert caught.value.sqlstate == NOT_SUPPORTED

            # Untyped $1: its type comes from the column it meets (occupants, an integer).
            statement = await conn.prepare(COUNT_ABOVE.format("$1"))
            assert [(a.name, a.type.name) for a in statement.get_attributes()] == [
                ("district", "text"), ("households", "int8")]
            assert [t.name for t in statement.get_parameters()][0] in ("int2", "int4", "int8")
            assert_noisy_counts([tuple(r) for r in await statement.fetch(OCCUPANTS)],
                                exact["above"])

            listed = await conn.fetch("SELECT attname FROM pg_catalog.pg_attribute WHERE "
                                      "attrelid = 'households'::regclass AND attnum > $1 "
                                      "ORDER BY attnum", 0)  # $1 typed by the mirror: int2
            assert [r["attname"] for r in listed] == EXPOSED
            # Catalog types without a binary form here ("char", regclass) come back as text.
            row = await conn.fetchrow("SELECT c.relkind, c.oid::regclass AS name, c.relnatts "
                                      "FROM pg_catalog.pg_class c WHERE c.relname = $1",
                                      "households")
            assert tuple(row) == ("r", "households", 5)
            await asyncio.sleep(0)  # let the log listener run
            assert_spent(notices)
        finally:
            await conn.close()

    asyncio.run(run())


# ----------------------------------------------------------------------------- pg8000

def test_pg8000(demo_proxy: RunningProxy, exact) -> None:
    native = pytest.importorskip("pg8000.native")
    conn = native.Connection("planner", host=demo_proxy.host, port=demo_proxy.port,
                             password=demo_proxy.accounts["planner"], database="hushql_demo")
    try:
        rows = conn.run(COUNT)
        assert [(c["name"], c["type_oid"]) for c in conn.columns] == [("district", 25),
                                                                       ("households", 20)]
        assert_noisy_counts(rows, exact["all"])
        # pg8000 keeps each notice as its raw fields: {b"M": b"message", ...}
        assert_spent([n.get(b"M", b"").decode() for n in conn.notices])

        with pytest.raises(native.DatabaseError) as caught:
            conn.run(REFUSED)
        assert caught.value.args[0]["C"] == NOT_SUPPORTED

        assert_noisy_counts(conn.run(COUNT_ABOVE.format(":n"), n=OCCUPANTS), exact["above"])
        listed = conn.run(COLUMNS_QUERY.format(":t"), t="households")
        assert [r[0] for r in listed] == EXPOSED
    finally:
        conn.close()


# ----------------------------------------------------------------------------- SQLAlchemy

def test_sqlalchemy_with_pandas(demo_proxy: RunningProxy, exact) -> None:
    sqlalchemy = pytest.importorskip("sqlalchemy")
    pandas = pytest.importorskip("pandas")
    engine = sqlalchemy.create_engine(demo_proxy.url(scheme="postgresql+psycopg"))
    try:
        frame = pandas.read_sql(COUNT, engine)  # after the dialect's start-up queries
        assert list(frame.columns) == ["district", "households"]
        assert str(frame["households"].dtype) == "int64"
        assert_noisy_counts(frame.values.tolist(), exact["all"])

        with pytest.raises(pandas.errors.DatabaseError) as caught:  # wraps SQLAlchemy's error
            pandas.read_sql(REFUSED, engine)
        assert isinstance(caught.value.__cause__, sqlalchemy.exc.DBAPIError)
        assert caught.value.__cause__.orig.sqlstate == NOT_SUPPORTED

        frame = pandas.read_sql(sqlalchemy.text(COUNT_ABOVE.format(":n")), engine,
                                params={"n": OCCUPANTS})
        assert_noisy_counts(frame.values.tolist(), exact["above"])

        inspector = sqlalchemy.inspect(engine)
        assert inspector.get_table_names() == ["households", "readings", "tariffs"]
        columns = inspector.get_columns("households")
        assert [c["name"] for c in columns] == EXPOSED
        assert [type(c["type"]).__name__ for c in columns] == [
            "INTEGER", "TEXT", "INTEGER", "TEXT", "BOOLEAN"]
        assert columns[2]["comment"] == OCCUPANTS_COMMENT
        assert inspector.get_table_comment("households")["text"] == HOUSEHOLDS_COMMENT
        assert inspector.get_pk_constraint("households")["constrained_columns"] == []
        assert inspector.get_foreign_keys("readings") == []

        # Reflection (current_setting with a parameter, pg_tablespace) now works, and
        # read_sql_table then asks for every row, which is refused as any raw read is.
        table = sqlalchemy.Table("households", sqlalchemy.MetaData(), autoload_with=engine)
        assert [c.name for c in table.columns] == EXPOSED
        assert table.comment == HOUSEHOLDS_COMMENT
        with pytest.raises(pandas.errors.DatabaseError) as caught:
            pandas.read_sql_table("households", engine)
        assert caught.value.__cause__.orig.sqlstate == NOT_SUPPORTED

        # The accuracy as columns: pandas drops notices, so the margins travel in the frame.
        with engine.connect() as conn:
            conn.exec_driver_sql("SET hushql.accuracy_columns = on")
            frame = pandas.read_sql(COUNT, conn)
        assert list(frame.columns) == ["district", "households", "households_margin95"]
        assert str(frame["households_margin95"].dtype) == "float64"
        # COUNT at epsilon 0.1: sensitivity 1, scale 10 (the module's SCALE).
        assert set(frame["households_margin95"]) == {float(noise.bound95(Fraction(SCALE)))}
    finally:
        engine.dispose()


# ----------------------------------------------------------------------------- JDBC

JDBC_JAR = Path("/usr/share/java/postgresql.jar")  # Debian package libpostgresql-jdbc-java
JDBC_SOURCE = Path(__file__).resolve().parent / "jdbc" / "HushqlClientCheck.java"


@pytest.fixture(scope="module")
def jdbc_classes(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The JDBC check compiled into a temporary folder (never committed as .class)."""
    missing = [name for name in ("java", "javac") if shutil.which(name) is None]
    if missing or not JDBC_JAR.is_file():
        pytest.skip("the JDBC test needs java, javac and the PostgreSQL JDBC driver at "
                    f"{JDBC_JAR} (Debian package libpostgresql-jdbc-java); missing: "
                    f"{', '.join(missing) or JDBC_JAR}")
    folder = tmp_path_factory.mktemp("jdbc")
    subprocess.run(["javac", "-d", str(folder), "-cp", str(JDBC_JAR), str(JDBC_SOURCE)],
                   check=True, capture_output=True, timeout=120)
    return folder


def test_jdbc(demo_proxy: RunningProxy, exact, jdbc_classes: Path) -> None:
    done = subprocess.run(
        ["java", "-cp", f"{jdbc_classes}{os.pathsep}{JDBC_JAR}", "HushqlClientCheck",
         demo_proxy.host, str(demo_proxy.port), "hushql_demo", "planner",
         demo_proxy.accounts["planner"]], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    facts: dict[str, list[list[str]]] = {}
    for line in done.stdout.splitlines():
        key, *values = line.split("\t")
        facts.setdefault(key, []).append(values)
    assert facts["product"] == [["PostgreSQL", "15.0 (hushql)"]]
    assert facts["dp-column"] == [["district", "text"], ["households", "int8"]]
    assert_noisy_counts([(d, int(n)) for d, n in facts["dp-row"]], exact["all"])
    assert_spent([m for _, m in facts["notice"]])
    assert facts["refused"] == [[NOT_SUPPORTED]]
    assert facts["param-column"] == [["district", "text"], ["households", "int8"]]
    assert_noisy_counts([(d, int(n)) for d, n in facts["param-row"]], exact["above"])
    assert [t[0] for t in facts["table"]] == ["households", "readings", "tariffs"]
    assert facts["table"][0][1] == HOUSEHOLDS_COMMENT
    assert [(c[0], c[1]) for c in facts["column"]] == [
        ("household_id", "int4"), ("district", "text"), ("occupants", "int4"),
        ("tariff", "text"), ("has_garden", "bool")]
    assert facts["column"][2][3] == OCCUPANTS_COMMENT  # REMARKS: the policy, in words
    assert facts["imported-keys"] == [["0"]] and facts["exported-keys"] == [["0"]]
    assert facts["margin-column"] == [["district", "text"], ["households", "int8"],
                                      ["households_margin95", "float8"]]
    margin = float(noise.bound95(Fraction(SCALE)))
    assert [(d, float(m)) for d, _, m in facts["margin-row"]] == [(d, margin) for d in DISTRICTS]
    # The same question again: the stored answer, for nothing, with its counts.
    assert [(d, int(n)) for d, n, _ in facts["margin-row"]] == [
        (d, int(n)) for d, n in facts["dp-row"]]
    assert any("spent nothing now" in m for _, m in facts["notice"]), facts["notice"]
    assert facts["primary-keys"] == [["0"]]
    assert facts["size"] == [["42501"]]  # pg_database_size refused


# ----------------------------------------------------------------------------- TLS

def test_psql_with_tls(tls_proxy: RunningProxy, exact) -> None:
    target = (f"host={tls_proxy.host} port={tls_proxy.port} dbname=hushql_demo user=planner "
              "sslmode=require")
    done = psql(tls_proxy, "-c", "\\conninfo", "-c", COUNT, conninfo=target)
    assert done.returncode == 0, done.stderr
    assert "SSL connection (protocol: TLS" in done.stdout
    header, *rows = [r for r in table_rows(done.stdout) if len(r) == 2]  # after \conninfo
    assert header == ["district", "households"]
    assert_noisy_counts(rows, exact["all"])


def test_psycopg_with_tls(tls_proxy: RunningProxy, demo_proxy: RunningProxy, exact) -> None:
    with psycopg.connect(tls_proxy.conninfo(sslmode="require"), autocommit=True) as conn:
        assert conn.pgconn.ssl_in_use
        assert_noisy_counts(conn.execute(COUNT).fetchall(), exact["all"])
        listed = conn.execute(COLUMNS_QUERY.format("%s"), ["households"]).fetchall()
        assert [r[0] for r in listed] == EXPOSED
    # The certificate made for the run also passes full verification (name 127.0.0.1).
    with psycopg.connect(tls_proxy.conninfo(sslmode="verify-full",
                                            sslrootcert=str(tls_proxy.certificate))) as conn:
        assert conn.execute("SELECT 1").fetchone() == (1,)
    # A server without a certificate declines TLS, and sslmode=require then refuses to go on.
    with pytest.raises(psycopg.OperationalError):
        psycopg.connect(demo_proxy.conninfo(sslmode="require"), connect_timeout=5)

