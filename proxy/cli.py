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
from decimal import Decimal
from pathlib import Path
from typing import Sequence

from rich.console import Console
from rich.table import Table

from proxy.errors import CANNOT_CONNECT, CONFIG_FILE_ERROR, HushError

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
        command.add_argument("--policies", default=_default_policies(),
                             help="policy folder with access.toml and tables/ (HUSHQL_POLICIES)")
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
    demo.add_argument("--data-dir", type=Path, help="folder for the private PostgreSQL "
                                                    "(default .hushql/demo-postgres)")
    demo.add_argument("--policies", default=_default_policies(), help="demo policy folder")
    demo.add_argument("--listen", type=_listen, default=_listen(DEFAULT_LISTEN),
                      help=f"address to serve on (default {DEFAULT_LISTEN})")
    demo.add_argument("--no-serve", action="store_true",
                      help="load the scenario and stop, without serving")

    serve = commands.add_parser("serve", help="serve the proxy to SQL clients")
    engine_flags(serve)
    serve.add_argument("--listen", type=_listen,
                       default=_listen(os.environ.get("HUSHQL_LISTEN", DEFAULT_LISTEN)),
                       help=f"HOST:PORT to listen on (HUSHQL_LISTEN, default {DEFAULT_LISTEN})")
    serve.add_argument("--tls-cert", type=Path, help="PEM certificate for TLS")
    serve.add_argument("--tls-key", type=Path, help="PEM private key for TLS")
    serve.add_argument("--max-connections", type=int, default=200)
    serve.add_argument("--max-message-bytes", type=int, default=1 << 20)

    ask = commands.add_parser("ask", help="answer one query through the engine, no network")
    engine_flags(ask)
    ask.add_argument("--as", dest="analyst", required=True, help="analyst account to charge")
    ask.add_argument("--epsilon", help="epsilon for this query (default from access.toml)")
    ask.add_argument("--explain", action="store_true",
                     help="show the plan, sensitivity and noise instead of answering (free)")
    ask.add_argument("sql", help="one SELECT statement")

    check = commands.add_parser("check", help="validate a policy folder")
    check.add_argument("directory", nargs="?", default=_default_policies())

    commands.add_parser("hash-password",
                        help="read a password and print its SCRAM-SHA-256 verifier")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the console script; returns the exit code."""
    args = _parser().parse_args(argv)
    logging.basicConfig(level=logging.INFO, stream=sys.stderr,
                        format="%(asctime)s %(name)s %(levelname)s %(message)s")
    # sqlglot's warnings quote statement text; logs never carry SQL or values.
    logging.getLogger("sqlglot").setLevel(logging.ERROR)
    console = Console()
    try:
        return _COMMANDS[args.command](args, console)
    except HushError as error:
        console.print(f"[red]ERROR {error.sqlstate}[/red]: {error.message}", highlight=False)
        if error.hint:
            console.print(f"HINT: {error.hint}", highlight=False)
        return 1
    except KeyboardInterrupt:
        return 130


def _need_backend(args: argparse.Namespace) -> str:
    if not args.backend:
        raise HushError(CANNOT_CONNECT, "no backend database given",
                        hint="pass --backend DSN or set HUSHQL_BACKEND")
    return args.backend


def _load(args: argparse.Namespace):
    from proxy.policy import PolicyError, load_policies

    try:
        return load_policies(args.policies)
    except PolicyError as error:
        raise HushError(CONFIG_FILE_ERROR, "the policy folder has problems:\n" + "\n".join(error.problems),
                        hint=f"run `hushql check {args.policies}`") from None


def _run_check(args: argparse.Namespace, console: Console) -> int:
    from proxy.policy_report import check_command

    return check_command(args.directory, console=console)


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
    from proxy.engine import Engine

    engine = Engine.connect(_load(args), _need_backend(args), args.ledger, pool_size=2)
    try:
        epsilon = Decimal(args.epsilon) if args.epsilon else None
        if args.explain:
            answer = engine.explain(args.analyst, args.sql, epsilon=epsilon)
        else:
            answer = engine.answer(args.analyst, args.sql, epsilon=epsilon)
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
    import ssl

    from proxy.engine import Engine
    from proxy.wire.server import run_server

    policies = _load(args)
    context = None
    if args.tls_cert or args.tls_key:
        if not (args.tls_cert and args.tls_key):
            raise HushError(CONFIG_FILE_ERROR, "TLS needs both --tls-cert and --tls-key")
        context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
        context.load_cert_chain(str(args.tls_cert), str(args.tls_key))
    engine = Engine.connect(policies, _need_backend(args), args.ledger, pool_size=args.pool_size)
    catalog = _catalog(policies, args)
    host, port = args.listen
    try:
        run_server(engine, host=host, port=port, ssl_context=context,
                   engine_threads=max(32, 2 * args.pool_size),
                   max_message_bytes=args.max_message_bytes,
                   max_connections=args.max_connections, catalog=catalog)
    finally:
        if catalog is not None:
            catalog.close()
        engine.close()
    return 0


def _catalog(policies, args: argparse.Namespace):
    """The data-free catalog mirror, when that module is present."""
    try:
        from proxy.wire.catalog import build_catalog
    except ImportError:
        return None
    return build_catalog(policies, args.backend)


def _run_demo(args: argparse.Namespace, console: Console) -> int:
    from proxy.demo import run_demo

    def serve(backend_dsn: str) -> None:
        if args.no_serve:
            return
        namespace = argparse.Namespace(policies=args.policies, backend=backend_dsn,
                                       ledger=None, pool_size=16, listen=args.listen,
                                       tls_cert=None, tls_key=None, max_connections=200,
                                       max_message_bytes=1 << 20)
        _run_serve(namespace, console)
    return run_demo(args.backend, args.data_dir, Path(args.policies), args.listen, serve)


_COMMANDS = {
    "demo": _run_demo,
    "serve": _run_serve,
    "ask": _run_ask,
    "check": _run_check,
    "hash-password": _run_hash_password,
}

if __name__ == "__main__":
    sys.exit(main())
