"""The ``hushql`` command: demo, serve, ask, check, hash-password.

Flags fall back to environment variables (``HUSHQL_POLICIES``, ``HUSHQL_BACKEND``,
``HUSHQL_LEDGER``, ``HUSHQL_LISTEN``) so a service manager can configure the proxy without a
command line. Every command exits 0 on success, 1 on a user-facing error (printed without a
traceback), 2 on bad usage.
"""

from __future__ import annotations

import argparse
import getpass
import logging
import os
import sys
from decimal import Decimal, InvalidOperation
from pathlib import Path
from typing import Sequence

from rich.console import Console
from rich.markup import escape
from rich.table import Table

from proxy import preflight
from proxy.errors import (CANNOT_CONNECT, CONFIG_FILE_ERROR, INVALID_PARAMETER_VALUE,
                          HushError)
from proxy.ledger_cli import add_ledger_command, run_ledger
from proxy.mirrors import add_mirrors_command, run_mirrors
from proxy.spark_backend import is_spark_dsn

DEFAULT_LISTEN = "127.0.0.1:7432"


def _default_policies() -> str:
    """HUSHQL_POLICIES, else ./policies, else the policies/ folder beside the package."""
    if os.environ.get("HUSHQL_POLICIES"):
        return os.environ["HUSHQL_POLICIES"]
    if Path("policies/access.toml").is_file():
        return "policies"
    return str(Path(__file__).resolve().parent.parent / "policies")


def _listen(value: str) -> tuple[str, int]:
    host, _, port = value.rpartition(":")
    if not host or not port.isdigit():
        raise argparse.ArgumentTypeError(f"expected HOST:PORT, got {value!r}")
    return host.strip("[]"), int(port)


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="hushql", description=(
        "A PostgreSQL-protocol proxy that answers aggregate SQL with differential privacy."))
    commands = parser.add_subparsers(dest="command", required=True)

    def engine_flags(command: argparse.ArgumentParser) -> None:
        command.add_argument("--policies", default=os.environ.get("HUSHQL_POLICIES"),
                             help="policy folder with access.toml and tables/ (HUSHQL_POLICIES); "
                                  "required")
        command.add_argument("--backend", default=os.environ.get("HUSHQL_BACKEND"),
                             help="DSN of the database holding the tables (HUSHQL_BACKEND)")
        command.add_argument("--ledger", default=os.environ.get("HUSHQL_LEDGER"),
                             help="DSN of the ledger database; default: schema hushql in the "
                                  "backend (HUSHQL_LEDGER)")
        command.add_argument("--pool-size", type=int, default=16,
                             help="backend connections in the pool, and as many to the ledger "
                                  "(default 16)")

    demo = commands.add_parser("demo", help="start a private PostgreSQL with the invented "
                               "water-utility scenario and serve it")
    demo.add_argument("--backend", help="load the scenario into this database instead of "
                                        "starting one")
    demo.add_argument("--ledger", help="ledger database for a Spark backend (sc://HOST:PORT), "
                                       "which keeps its ledger in PostgreSQL")
    demo.add_argument("--data-dir", type=Path, help="folder for the private PostgreSQL "
                                                    "(default .hushql/demo-postgres)")
    demo.add_argument("--policies", default=_default_policies(), help="demo policy folder")
    demo.add_argument("--listen", type=_listen, default=_listen(DEFAULT_LISTEN),
                      help=f"address to serve on (default {DEFAULT_LISTEN})")
    demo.add_argument("--no-serve", action="store_true",
                      help="load the scenario without serving it, and print how to serve it")
    demo.add_argument("--no-load", action="store_true",
                      help="serve a scenario loaded before with --no-serve (needs --backend; "
                           "on Spark, the tables must still be in its catalog)")
    demo.add_argument("--households", type=int, default=3000,
                      help="households to invent, each with a year of daily readings "
                           "(default 3000)")

    serve = commands.add_parser("serve", help="serve the proxy to SQL clients")
    engine_flags(serve)
    serve.add_argument("--listen", type=_listen,
                       default=_listen(os.environ.get("HUSHQL_LISTEN", DEFAULT_LISTEN)),
                       help=f"HOST:PORT to listen on (HUSHQL_LISTEN, default {DEFAULT_LISTEN})")
    serve.add_argument("--tls-cert", type=Path, help="PEM certificate for TLS")
    serve.add_argument("--tls-key", type=Path, help="PEM private key for TLS")
    serve.add_argument("--max-connections", type=int, default=None,
                       help="sessions at once (default: most_sessions in access.toml)")
    serve.add_argument("--max-message-bytes", type=int, default=1 << 20)
    serve.add_argument("--mirror-admin", default=os.environ.get("HUSHQL_MIRROR_ADMIN"),
                       help="DSN allowed to create the catalog mirrors at start "
                            "(HUSHQL_MIRROR_ADMIN); without it, `hushql mirrors` makes them")
    serve.set_defaults(allow_demo_accounts=False)  # only `hushql demo` serves the demo accounts
    serve.add_argument("--workers", type=int, default=0,
                       help="serving processes sharing the port; --pool-size is divided among "
                            "them (default: one per core)")
    serve.add_argument("--worker-memory-mb", type=int, default=1024,
                       help="a worker above this resident size is replaced (default 1024)")

    ask = commands.add_parser("ask", help="answer one query through the engine, no network")
    engine_flags(ask)
    ask.add_argument("--as", dest="analyst", required=True, help="analyst account to charge")
    ask.add_argument("--epsilon", help="epsilon for this query (default from access.toml)")
    ask.add_argument("--explain", action="store_true",
                     help="show the plan, sensitivity and noise instead of answering (free)")
    ask.add_argument("--fresh", action="store_true",
                     help="pay for a new answer even if this question was answered before")
    ask.add_argument("sql", help="one SELECT statement")

    check = commands.add_parser("check", help="validate a policy folder")
    check.add_argument("directory", nargs="?", default=_default_policies())
    check.add_argument("--backend", help="also check each source, column and type against this "
                                         "database, and budgets against its ledger")
    check.add_argument("--ledger", help="ledger DSN for the budget check (default: --backend)")

    commands.add_parser("hash-password",
                        help="read a password and print its SCRAM-SHA-256 verifier")
    add_ledger_command(commands)
    add_mirrors_command(commands)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the console script; returns the exit code."""
    args = _parser().parse_args(argv)
    logging.basicConfig(level=logging.INFO, stream=sys.stderr,
                        format="%(asctime)s %(name)s %(levelname)s %(message)s")
    # The format names no caller, thread or process: skip collecting them for each record (one
    # per answer), as the Python logging HOWTO's "Optimization" section describes.
    logging._srcfile = None
    logging.logThreads = logging.logProcesses = logging.logMultiprocessing = False
    # sqlglot's warnings quote statement text; logs never carry SQL or values.
    logging.getLogger("sqlglot").setLevel(logging.ERROR)
    console = Console()
    try:
        return _COMMANDS[args.command](args, console)
    except HushError as error:
        # Never wrapped: one line for what failed and one for what to do, as they paste.
        console.print(f"[red]ERROR {error.sqlstate}[/red]: {escape(error.message)}", highlight=False,
                      soft_wrap=True)
        if error.hint:
            console.print(f"HINT: {error.hint}", highlight=False, soft_wrap=True, markup=False)
        return 1
    except KeyboardInterrupt:
        return 130


def _need_backend(args: argparse.Namespace) -> str:
    if not args.backend:
        raise HushError(CANNOT_CONNECT, "no backend database given",
                        hint="pass --backend DSN or set HUSHQL_BACKEND")
    if is_spark_dsn(args.backend) and not args.ledger:
        raise HushError(CANNOT_CONNECT, "a Spark backend (sc://) needs a PostgreSQL ledger",
                        hint="pass --ledger postgresql://... or set HUSHQL_LEDGER: the ledger, "
                             "stored answers and catalog mirror stay in PostgreSQL")
    return args.backend


def _postgres_dsn(args: argparse.Namespace) -> str:
    """The PostgreSQL server holding the catalog mirror: the backend's, or for a Spark
    backend the ledger's."""
    return args.ledger if is_spark_dsn(args.backend) else args.backend


def _connect(policies, args: argparse.Namespace, *, pool_size: int):
    """The engine over ``args.backend`` and ``args.ledger``, each checked to answer first so that
    an unreachable one is one line, not a pool's timeout."""
    import psycopg

    from proxy.engine import Engine

    backend = _need_backend(args)
    if is_spark_dsn(backend):
        preflight.check_spark_reachable(backend, "--backend or HUSHQL_BACKEND")
    else:
        preflight.check_reachable(backend, "backend", "--backend or HUSHQL_BACKEND")
    if args.ledger:
        preflight.check_reachable(args.ledger, "ledger", "--ledger or HUSHQL_LEDGER")
    try:
        return Engine.connect(policies, backend, args.ledger, pool_size=pool_size)
    except psycopg.Error as error:  # e.g. the ledger schema cannot be created
        raise HushError(CANNOT_CONNECT, "cannot open the backend and ledger databases: "
                        + preflight.first_line(error),
                        hint="the role needs to read the tables and, for the ledger, to create "
                             "schema hushql (or give --ledger a database where it may)") from None


def _epsilon(text: str | None) -> Decimal | None:
    """``--epsilon`` as a Decimal (the engine checks its range); None when not given."""
    if not text:
        return None
    try:
        return Decimal(text)
    except InvalidOperation:
        raise HushError(INVALID_PARAMETER_VALUE, f"invalid epsilon {text[:40]!r}",
                        hint="write a decimal number such as --epsilon 0.25") from None


def _load(args: argparse.Namespace):
    from proxy.policy import PolicyError, load_policies

    if not args.policies:
        raise HushError(CONFIG_FILE_ERROR, "no policy folder named",
                        hint="pass --policies DIR or set HUSHQL_POLICIES (`hushql demo` serves "
                             "the bundled demo policies)")
    try:
        return load_policies(args.policies)
    except PolicyError as error:
        from proxy.demo import hushql_command

        raise HushError(CONFIG_FILE_ERROR, "the policy folder has problems:\n" + "\n".join(error.problems),
                        hint=f"run `{hushql_command()} check {args.policies}`") from None


def _run_check(args: argparse.Namespace, console: Console) -> int:
    from proxy.policy_report import check_command

    return check_command(args.directory, console=console, backend=args.backend,
                         ledger=args.ledger)


def _run_hash_password(args: argparse.Namespace, console: Console) -> int:
    from proxy.wire.auth import make_verifier

    if sys.stdin.isatty():
        password = getpass.getpass("Password: ")
        if getpass.getpass("Again: ") != password:
            console.print("[red]the passwords differ[/red]")
            return 1
    else:
        password = sys.stdin.readline().rstrip("\n")
    if not password:
        console.print("[red]an empty password is not allowed[/red]")
        return 1
    print(make_verifier(password))
    return 0


def _run_ask(args: argparse.Namespace, console: Console) -> int:
    epsilon = _epsilon(args.epsilon)
    engine = _connect(_load(args), args, pool_size=2)
    try:
        if args.explain:
            answer = engine.explain(args.analyst, args.sql, epsilon=epsilon, fresh=args.fresh)
        else:
            answer = engine.answer(args.analyst, args.sql, epsilon=epsilon, fresh=args.fresh)
    finally:
        engine.close()
    print_answer(answer, console, show_cost=not args.explain)
    return 0


def print_answer(answer, console: Console, *, show_cost: bool = True) -> None:
    """A rich table of the noisy rows, then what the answer cost and how accurate it is."""
    table = Table(*[c.name for c in answer.columns], show_lines=False)
    for row in answer.rows:
        table.add_row(*["" if v is None else str(v) for v in row])
    console.print(table)
    if not show_cost:
        return
    if answer.reused_from is not None:
        from proxy.engine import paid_text

        console.print(f"epsilon spent: 0 (asked before: the stored answer, epsilon "
                      f"{answer.epsilon} paid {paid_text(answer.reused_from)}; --fresh pays for "
                      f"a new one)   remaining: {answer.remaining}", highlight=False)
    else:
        console.print(f"epsilon spent: {answer.epsilon}   remaining: {answer.remaining}",
                      highlight=False)
    for item in answer.accuracy:
        scale = "" if item.scale is None else f", noise scale {float(item.scale):.4g}"
        bound = "unbounded" if item.bound95 is None else f"±{item.bound95}"
        console.print(f"  {item.column}: 95% of answers within {bound} of the exact value"
                      f"{scale} ({item.note}){item.clipping_text}", highlight=False)
    for note in answer.notes:
        console.print(f"  note: {note}", highlight=False)


def _run_serve(args: argparse.Namespace, console: Console) -> int:
    from proxy.wire.server import run_server
    from proxy.wire.workers import default_workers

    policies = _load(args)
    from proxy.safe_config import refuse_unsafe_serving
    from proxy.wire.ledger_relations import LedgerRelations

    backend = _need_backend(args)
    context = preflight.tls_context(args.tls_cert, args.tls_key)
    host, port = args.listen
    preflight.check_can_listen(host, port)
    refuse_unsafe_serving(policies, backend,
                          allow_demo_accounts=args.allow_demo_accounts)
    workers = args.workers or default_workers()
    if workers > 1:
        return _run_workers(args, policies, context, workers)
    engine = _connect(policies, args, pool_size=args.pool_size)
    # Administrators' read-only ledger relations in front of the catalog.
    catalog = LedgerRelations(policies, args.ledger or args.backend, _catalog(policies, args))
    _reload_on_sighup(args, engine, catalog)
    try:
        run_server(engine, host=host, port=port, ssl_context=context,
                   engine_threads=max(32, 2 * args.pool_size),
                   max_message_bytes=args.max_message_bytes,
                   limits=policies.access.connections, max_connections=args.max_connections,
                   catalog=catalog)
    except OSError as error:  # the port was taken between the check and the bind
        if not preflight.is_listen_error(error):
            raise
        raise preflight.listen_error(host, port, error) from None
    finally:
        catalog.close()
        engine.close()
    return 0


def _reload_on_sighup(args: argparse.Namespace, engine, relations) -> None:
    """SIGHUP re-reads the policy folder (see proxy.reload)."""
    import signal

    from proxy.reload import PolicyReloader

    reloader = PolicyReloader(args.policies, args.backend, engine, relations,
                              lambda policies: _catalog(policies, args),
                              allow_demo_accounts=args.allow_demo_accounts)
    if hasattr(signal, "SIGHUP"):  # not on Windows
        signal.signal(signal.SIGHUP, reloader.reload_in_background)


def _run_workers(args: argparse.Namespace, policies, context, workers: int) -> int:
    """``serve`` with several processes (proxy.wire.workers): the catalog mirrors are built
    here, before forking; each worker opens its engine with its share of ``--pool-size``.
    SIGHUP replaces every worker with one serving the policy folder as it now is, if it passes
    the start-up checks (proxy.reload.load_checked)."""
    from proxy.engine import Engine
    from proxy.reload import load_checked, log_reloaded
    from proxy.wire.ledger_relations import LedgerRelations
    from proxy.wire.workers import WorkerSetup, run_workers

    backend = _need_backend(args)
    share = max(2, -(-args.pool_size // workers))

    def setup_for(policies) -> WorkerSetup:
        # Administrators' ledger relations in front of the catalog, built before forking (they
        # and the catalog open their connections lazily, in each worker).
        catalog = LedgerRelations(policies, args.ledger or backend, _catalog(policies, args))
        return WorkerSetup(
            make_engine=lambda: Engine.connect(policies, backend, args.ledger, pool_size=share),
            server_options=dict(ssl_context=context, engine_threads=max(32, 2 * share),
                                max_message_bytes=args.max_message_bytes,
                                limits=policies.access.connections,
                                max_connections=args.max_connections, catalog=catalog),
            workers=workers, memory_limit_bytes=args.worker_memory_mb << 20, renew=renew)

    def renew() -> WorkerSetup | None:
        fresh = load_checked(args.policies, backend, args.allow_demo_accounts)
        if fresh is None:
            return None
        setup = setup_for(fresh)
        log_reloaded(fresh)  # the workers are replaced with it next
        return setup

    run_workers(setup_for(policies), *args.listen)
    return 0


def _catalog(policies, args: argparse.Namespace):
    """The data-free catalog mirrors: made at start only with --mirror-admin (see
    proxy.mirrors), else those an administrator made."""
    from proxy.mirrors import serving_catalog

    return serving_catalog(policies, _postgres_dsn(args), args.mirror_admin)


def _run_demo(args: argparse.Namespace, console: Console) -> int:
    from proxy.demo import run_demo

    if not args.no_serve:  # before initdb and loading, which take a while
        preflight.check_can_listen(*args.listen)

    def serve(backend_dsn: str) -> None:
        namespace = argparse.Namespace(policies=args.policies, backend=backend_dsn,
                                       ledger=args.ledger, pool_size=16, listen=args.listen,
                                       tls_cert=None, tls_key=None, max_connections=None,
                                       max_message_bytes=1 << 20, allow_demo_accounts=True,
                                       mirror_admin=_postgres_dsn(args), workers=1)
        _run_serve(namespace, console)

    if is_spark_dsn(args.backend):
        from proxy.spark_demo import run_spark_demo

        _need_backend(args)  # refuses sc:// without --ledger
        preflight.check_spark_reachable(args.backend, "--backend")
        preflight.check_reachable(args.ledger, "ledger", "--ledger")
        return run_spark_demo(args.backend, args.ledger, Path(args.policies), args.listen,
                              None if args.no_serve else serve, households=args.households,
                              load=not args.no_load)
    if args.no_load and not args.backend:
        raise HushError(CONFIG_FILE_ERROR, "--no-load serves a scenario loaded before, so it "
                        "needs --backend naming the database it was loaded into")
    return run_demo(args.backend, args.data_dir, Path(args.policies), args.listen,
                    None if args.no_serve else serve, households=args.households,
                    load=not args.no_load)


_COMMANDS = {
    "demo": _run_demo,
    "serve": _run_serve,
    "ask": _run_ask,
    "check": _run_check,
    "hash-password": _run_hash_password,
    "ledger": run_ledger,
    "mirrors": run_mirrors,
}

if __name__ == "__main__":
    sys.exit(main())
