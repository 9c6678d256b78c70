"""The demo's invented water-utility scenario, loaded into Apache Spark as Parquet tables.

The same rows as ``proxy.demo.load_scenario`` writes into PostgreSQL (same generator, same
seed), as tables ``utility.households``, ``utility.meter_readings`` and the public
``utility.tariffs`` of the Spark Connect server's catalog, stored as Parquet. The readings go in chunks of households, each appended
to the table, so the progress bar moves as they are written. Readings are sent as whole tenths
of a litre and made DECIMAL(7,1) in Spark, the PostgreSQL table's numeric(7,1).
"""

from __future__ import annotations

import datetime as dt
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
from rich.console import Console

from proxy.demo import (DAYS, DISTRICTS, SCHEMA, TARIFF_PRICES, TARIFFS, YEAR, _database_name,
                        _print_examples, _progress, _say, _shell_quote, generate_scenario,
                        hushql_command)
from proxy.policy import Policies, PolicyError, load_policies
from proxy.spark_backend import source_problems

HOUSEHOLD_COLUMNS = ("CAST(household_id AS INT) AS household_id", "district",
                     "CAST(occupants AS INT) AS occupants", "tariff", "has_garden")
READING_COLUMNS = ("CAST(household_id AS INT) AS household_id", "district", "reading_date",
                   "CAST(CAST(tenths AS DECIMAL(8,0)) / 10 AS DECIMAL(7,1)) AS litres")


def load_scenario_into_spark(dsn: str, *, households: int = 3000, seed: int = 2026,
                             progress: bool = True, per_chunk: int = 500) -> dict[str, int]:
    """Create (or replace) ``utility.households`` and ``utility.meter_readings`` on the Spark
    Connect server ``dsn``; returns the row counts as ``load_scenario`` does."""
    import pandas as pd
    from pyspark.sql import SparkSession

    scenario = generate_scenario(households, seed)
    session = SparkSession.builder.remote(dsn).create()
    try:
        session.sql(f"CREATE DATABASE IF NOT EXISTS {SCHEMA}")
        with _progress(progress) as bar:
            houses_task = bar.add_task("households", total=scenario.households)
            readings_task = bar.add_task("readings", total=scenario.readings)
            houses = pd.DataFrame({
                "household_id": scenario.household_id,
                "district": [DISTRICTS[d] for d in scenario.district.tolist()],
                "occupants": scenario.occupants.astype(np.int64),
                "tariff": [TARIFFS[t] for t in scenario.tariff.tolist()],
                "has_garden": scenario.has_garden.astype(bool)})
            session.createDataFrame(houses).selectExpr(*HOUSEHOLD_COLUMNS).write \
                .mode("overwrite").format("parquet").saveAsTable(f"{SCHEMA}.households")
            bar.advance(houses_task, scenario.households)
            dates = np.array([dt.date(YEAR, 1, 1) + dt.timedelta(days=i) for i in range(DAYS)])
            for first in range(0, scenario.households, per_chunk):
                last = min(first + per_chunk, scenario.households)
                count = last - first
                tenths = scenario.litres_tenths[first:last].reshape(-1)
                chunk = pd.DataFrame({
                    "household_id": np.repeat(scenario.household_id[first:last], DAYS),
                    "district": np.repeat([DISTRICTS[d] for d in scenario.district[first:last].tolist()], DAYS),
                    "reading_date": np.tile(dates, count),
                    "tenths": pd.array(np.where(scenario.unread[first:last].reshape(-1), None, tenths),
                                       dtype="Int64")})
                session.createDataFrame(chunk).selectExpr(*READING_COLUMNS).write \
                    .mode("overwrite" if first == 0 else "append").format("parquet") \
                    .saveAsTable(f"{SCHEMA}.meter_readings")
                bar.advance(readings_task, count * DAYS)
            prices = pd.DataFrame(TARIFF_PRICES, columns=["tariff", "price", "description"])
            session.createDataFrame(prices).selectExpr(
                "tariff", "CAST(price AS DECIMAL(5,2)) AS price_per_m3", "description").write \
                .mode("overwrite").format("parquet").saveAsTable(f"{SCHEMA}.tariffs")
    finally:
        session.stop()
    return {"households": scenario.households, "readings": scenario.readings}


def run_spark_demo(backend: str, ledger: str, policies_dir: Path,
                   listen: tuple[str, int] | None,
                   serve_callback: Callable[[str], None] | None = None, *,
                   console: Console | None = None, households: int = 3000,
                   load: bool = True) -> int:
    """``hushql demo --backend sc://... --ledger postgresql://...``: load the scenario into
    Spark (unless ``load`` is false: then the tables the policies name must be there already,
    as ``--no-serve`` left them), print how to query it, then serve it
    (``serve_callback(backend)`` blocks). Returns the exit code: 1 when the policies are
    broken, Spark cannot take the tables, or (without loading) they are missing."""
    out = console or Console()
    err = console or Console(stderr=True)
    try:
        policies = load_policies(policies_dir)
    except PolicyError as error:
        _say(err, f"The policies in {policies_dir} have problems:")
        for line in error.problems:
            _say(err, line)
        return 1
    if not load:
        return _serve_loaded(backend, ledger, policies_dir, policies, listen, serve_callback,
                             out, err)
    started = time.perf_counter()
    try:
        counts = load_scenario_into_spark(backend, households=households)
    except Exception as error:  # Spark Connect's errors; the operator's terminal, one line
        _say(err, f"hushql demo: cannot load the scenario into Spark: {type(error).__name__}")
        _say(err, "Check --backend: a Spark Connect server must run there and its user may "
                  f"create database {SCHEMA}.")
        return 1
    seconds = time.perf_counter() - started
    _say(out, f"Loaded {counts['households']:,} households and {counts['readings']:,} "
              f"readings into Spark in {seconds:.1f} s.")
    return _examples_then_serve(backend, ledger, policies_dir, listen, serve_callback, out)


def _serve_loaded(backend: str, ledger: str, policies_dir: Path, policies: Policies,
                  listen: tuple[str, int] | None, serve_callback: Callable[[str], None] | None,
                  out: Console, err: Console) -> int:
    """``--no-load``: serve the tables a previous run wrote, after checking that every table,
    column and type the policies name is on the server (one line when not)."""
    try:
        problems = source_problems(policies, backend)
    except Exception as error:  # Spark Connect's errors; the operator's terminal, one line
        problems = [f"the server did not answer ({type(error).__name__})"]
    if problems:
        _say(err, f"hushql demo --no-load: the scenario is not loaded on {backend} "
                  f"({problems[0]}); load it first with: {hushql_command()} demo --backend "
                  f"{_shell_quote(backend)} --ledger {_shell_quote(ledger)} --no-serve")
        return 1
    return _examples_then_serve(backend, ledger, policies_dir, listen, serve_callback, out)


def _examples_then_serve(backend: str, ledger: str, policies_dir: Path,
                         listen: tuple[str, int] | None,
                         serve_callback: Callable[[str], None] | None, out: Console) -> int:
    _print_examples(out, backend, policies_dir, listen, _database_name(ledger),
                    serving=serve_callback is not None, ledger=ledger)
    if serve_callback is not None:
        try:
            serve_callback(backend)
        except KeyboardInterrupt:
            pass
    return 0
