"""A running hushql proxy for tests with real clients: the demo scenario, the real engine, the
catalog mirror and the wire server on a free loopback port.

Use the fixtures by importing them into a test module::

    from tests.proxy_fixtures import demo_proxy, tls_proxy  # noqa: F401  (fixtures)

``demo_proxy`` loads a small demo (``HOUSEHOLDS`` households) into the module's own database,
adds one backend column that no policy lists (so tests can show it never appears), and serves
it without TLS. ``tls_proxy`` serves the same engine and catalog on a second port with a
self-signed certificate made for the test run.
"""

from __future__ import annotations

import shutil
import ssl
import subprocess
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import psycopg
import pytest
from psycopg.conninfo import make_conninfo

from proxy.demo import DEMO_DATABASE, demo_accounts, load_scenario
from proxy.engine import Engine
from proxy.policy import Policies, load_policies
from proxy.wire.catalog import Catalog, build_catalog
from proxy.wire.server import start_in_thread

DEMO_POLICIES = Path(__file__).resolve().parent.parent / "policies"
HOUSEHOLDS = 300  # 109,500 readings: loads in about a second
# A backend column that no policy lists: it must never reach a client, catalog or not.
UNLISTED_COLUMN = "meter_serial"


@dataclass
class RunningProxy:
    """Where a test proxy listens and what it serves."""

    host: str
    port: int
    backend_dsn: str  # the database holding the demo data (for computing exact figures)
    accounts: dict[str, str]  # account name -> password
    engine: Engine
    catalog: Catalog
    policies: Policies
    certificate: Path | None = None  # PEM of the self-signed certificate, when TLS is on
    extra: dict[str, Any] = field(default_factory=dict)

    def conninfo(self, user: str = "planner", **params: Any) -> str:
        """A libpq connection string for ``user`` (password included)."""
        return make_conninfo(host=self.host, port=self.port, user=user,
                             password=self.accounts[user], dbname=DEMO_DATABASE, **params)

    def url(self, user: str = "planner", scheme: str = "postgresql") -> str:
        """A URL for ``user``, e.g. scheme "postgresql+psycopg" for SQLAlchemy."""
        return (f"{scheme}://{user}:{self.accounts[user]}@{self.host}:{self.port}/"
                f"{DEMO_DATABASE}")


def add_unlisted_column(dsn: str) -> None:
    """Gives utility.households a column no policy lists, filled with invented serials."""
    with psycopg.connect(dsn, autocommit=True) as conn:
        conn.execute(f"ALTER TABLE utility.households ADD COLUMN {UNLISTED_COLUMN} text")
        conn.execute(f"UPDATE utility.households SET {UNLISTED_COLUMN} = "
                     "'MS-' || household_id::text")


def make_certificate(folder: Path) -> tuple[Path, Path] | None:
    """A self-signed certificate and key for 127.0.0.1/localhost made with the openssl
    command, or None when openssl is not installed."""
    openssl = shutil.which("openssl")
    if openssl is None:
        return None
    cert, key = folder / "server.crt", folder / "server.key"
    subprocess.run([openssl, "req", "-x509", "-newkey", "ec", "-pkeyopt",
                    "ec_paramgen_curve:prime256v1", "-nodes", "-days", "2",
                    "-subj", "/CN=localhost", "-addext",
                    "subjectAltName=IP:127.0.0.1,DNS:localhost",
                    "-keyout", str(key), "-out", str(cert)],
                   check=True, capture_output=True, timeout=30)
    return cert, key


def server_context(cert: Path, key: Path) -> ssl.SSLContext:
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    context.load_cert_chain(str(cert), str(key))
    return context


@contextmanager
def running_proxy(backend_dsn: str, *, policies_dir: Path = DEMO_POLICIES,
                  households: int = HOUSEHOLDS) -> Iterator[RunningProxy]:
    """Loads the demo into ``backend_dsn`` and serves it; stops and drops the mirrors after."""
    load_scenario(backend_dsn, households=households, progress=False)
    add_unlisted_column(backend_dsn)
    policies = load_policies(policies_dir)
    engine = Engine.connect(policies, backend_dsn, pool_size=4)
    catalog = build_catalog(policies, backend_dsn)
    try:
        assert catalog.unavailable is None, catalog.unavailable
        host, port, stop = start_in_thread(engine, catalog=catalog,
                                           limits=policies.access.connections)
        try:
            yield RunningProxy(host, port, backend_dsn, dict(demo_accounts()), engine, catalog,
                               policies)
        finally:
            stop()
    finally:
        catalog.drop_mirrors()
        engine.close()


@pytest.fixture(scope="module")
def demo_proxy(module_dsn: str) -> Iterator[RunningProxy]:
    """The demo behind a proxy on a free loopback port, for one test module."""
    with running_proxy(module_dsn) as proxy:
        yield proxy


@pytest.fixture(scope="module")
def tls_proxy(demo_proxy: RunningProxy, tmp_path_factory: pytest.TempPathFactory
              ) -> Iterator[RunningProxy]:
    """The same engine and catalog on a second port that offers TLS with a self-signed
    certificate; skips when openssl is missing."""
    made = make_certificate(tmp_path_factory.mktemp("tls"))
    if made is None:
        pytest.skip("the openssl command is needed to make a test certificate")
    cert, key = made
    host, port, stop = start_in_thread(demo_proxy.engine, catalog=demo_proxy.catalog,
                                       ssl_context=server_context(cert, key))
    try:
        yield RunningProxy(host, port, demo_proxy.backend_dsn, demo_proxy.accounts,
                           demo_proxy.engine, demo_proxy.catalog, demo_proxy.policies,
                           certificate=cert)
    finally:
        stop()
