"""A local Spark Connect server for the tests: one per test session, started from the installed
pyspark package (its ``bin/spark-submit`` runs the Connect server class) on Java from PATH,
with a local master on both cores and a small driver; stopped at the end of the session.

Tests using ``spark_dsn`` skip, with the reason, when java or pyspark is absent. With
``HUSHQL_TEST_SPARK=sc://HOST:PORT`` they use that server instead (to run them again without
the start-up wait); the tests write tables in its catalog (databases clinic and utility).
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

# The Connect server's main class, as the package's sbin/start-connect-server.sh names it.
CONNECT_SERVER_CLASS = "org.apache.spark.sql.connect.service.SparkConnectServer"
START_SECONDS = 180


def spark_home() -> Path | None:
    """The installed pyspark package's folder (it is a SPARK_HOME), None without pyspark."""
    try:
        import pyspark
    except ImportError:
        return None
    return Path(pyspark.__file__).parent


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _answers(port: int) -> bool:
    try:
        socket.create_connection(("127.0.0.1", port), timeout=1).close()
        return True
    except OSError:
        return False


@pytest.fixture(scope="session")
def spark_dsn(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """``sc://127.0.0.1:PORT`` of a Spark Connect server private to this test session."""
    home = spark_home()
    if home is None:
        pytest.skip("pyspark is not installed (pip install -e '.[spark]')")
    given = os.environ.get("HUSHQL_TEST_SPARK")
    if given:
        yield given
        return
    if shutil.which("java") is None:
        pytest.skip("java is not on PATH (Spark needs Java 17)")
    folder = tmp_path_factory.mktemp("spark")
    port = _free_port()
    command = [str(home / "bin" / "spark-submit"), "--class", CONNECT_SERVER_CLASS,
               "--name", "hushql-tests", "--master", "local[2]", "--driver-memory", "1g",
               "--conf", f"spark.connect.grpc.binding.port={port}",
               "--conf", "spark.connect.grpc.binding.address=127.0.0.1",
               "--conf", "spark.ui.enabled=false",
               "--conf", "spark.sql.shuffle.partitions=2",
               "--conf", "spark.sql.catalogImplementation=in-memory",
               "--conf", f"spark.sql.warehouse.dir={folder / 'warehouse'}",
               "--conf", f"spark.driver.extraJavaOptions=-Djava.io.tmpdir={folder}"]
    environment = dict(os.environ, SPARK_HOME=str(home), SPARK_LOG_DIR=str(folder),
                       SPARK_LOCAL_IP="127.0.0.1")
    log = (folder / "server.log").open("wb")
    server = subprocess.Popen(command, stdout=log, stderr=subprocess.STDOUT, cwd=folder,
                              env=environment, start_new_session=True)
    try:
        deadline = time.monotonic() + START_SECONDS
        while not _answers(port):
            if server.poll() is not None or time.monotonic() > deadline:
                tail = (folder / "server.log").read_text(errors="replace")[-2000:]
                pytest.fail(f"the Spark Connect server did not start:\n{tail}")
            time.sleep(0.5)
        yield f"sc://127.0.0.1:{port}"
    finally:
        os.killpg(server.pid, signal.SIGTERM)
        try:
            server.wait(timeout=30)
        except subprocess.TimeoutExpired:
            os.killpg(server.pid, signal.SIGKILL)
            server.wait()
        log.close()
