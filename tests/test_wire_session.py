"""The session, driven message by message with a fake engine (no sockets)."""

from __future__ import annotations

import asyncio
import logging
from decimal import Decimal
from typing import Any

import pytest
from sqlglot import exp

from proxy.errors import HushError
from proxy.sql.statement import BoundStatement
from proxy.wire import codec
from proxy.wire.session import Session
from proxy.wire.states import TxStatus
from tests.test_wire_fakes import ANALYST, ROWS, FakeCatalog, FakeEngine
from tests.test_wire_fakes import engine  # noqa: F401  (a fixture)

COUNT = "SELECT district, count(*) FROM households GROUP BY district"


def _session(engine: FakeEngine, catalog: Any = None) -> Session:
    return Session(engine, ANALYST, catalog=catalog)


def _send(session: Session, *messages: Any) -> list[Any]:
    """Replies to a batch of messages as a client would read them off the wire: the server's
    skip-to-Sync rule applied, and every reply encoded and decoded by the codec."""
    async def go() -> list[Any]:
        wire, skipping = b"", False
        for m in messages:
            if isinstance(m, codec.Flush) or (skipping and not isinstance(m, codec.Sync)):
                continue
            replies, failed = await session.handle(m)
            wire += b"".join(r if isinstance(r, bytes) else r.encode() for r in replies)
            skipping = failed or (skipping and not isinstance(m, codec.Sync))
        reader = codec.BackendReader()
        reader.feed(wire)
        out = []
        while (msg := reader.next_message()) is not None:
            out.append(msg)
        return out
    return asyncio.run(go())


def _q(session: Session, sql: str) -> list[Any]:
    return _send(session, codec.Query(sql))


def _kinds(messages: list[Any]) -> list[str]:
    return [type(m).__name__ for m in messages]


def _errors(messages: list[Any]) -> list[str]:
    return [m.get("C") for m in messages if isinstance(m, codec.ErrorResponse)]


def _rows(messages: list[Any]) -> list[tuple]:
    return [m.values for m in messages if isinstance(m, codec.DataRow)]


def _show(session: Session, name: str) -> str:
    [row] = _rows(_q(session, f"SHOW {name}"))
    return row[0].decode()


def test_simple_query_with_several_statements(engine: FakeEngine) -> None:
    s = _session(engine)
    out = _q(s, f"{COUNT}; SHOW hushql.epsilon")
    assert _kinds(out) == ["NoticeResponse", "RowDescription", "DataRow", "DataRow", "DataRow",
                           "CommandComplete", "RowDescription", "DataRow", "CommandComplete",
                           "ReadyForQuery"]
    assert out[5].tag == "SELECT 3" and out[-2].tag == "SHOW" and out[-1].status == "I"
    assert [f.name for f in out[1].fields] == ["district", "households", "avg_occupants",
                                               "litres"]
    assert [f.type_oid for f in out[1].fields] == [25, 20, 701, 1700]
    assert _rows(out)[0] == (b"Northbank", b"120", b"2.5", b"1234.5")
    assert _rows(out)[2][2] is None  # NULL stays NULL
    notice = out[0]
    assert "epsilon 0.1" in notice.get("M") and "2.9 remains" in notice.get("M")
    assert "households: within ±30" in notice.get("D")
    assert engine.calls == [(ANALYST, COUNT, None)]  # plain text: the engine caches by it


def test_first_error_ends_the_message_and_nothing_after_runs(engine: FakeEngine) -> None:
    s = _session(engine)
    out = _q(s, f"{COUNT}; SELECT secret FROM elsewhere; {COUNT}")
    assert _errors(out) == ["0A000"] and len(engine.calls) == 1
    err = next(m for m in out if isinstance(m, codec.ErrorResponse))
    assert err.get("S") == "ERROR" and err.get("V") == "ERROR"
    assert err.get("H") and err.get("D") == "the query reads no granted table"
    assert out[-1] == codec.ReadyForQuery("I")


def test_a_syntax_error_anywhere_means_nothing_runs(engine: FakeEngine) -> None:
    out = _q(_session(engine), f"{COUNT}; SELECT FROM WHERE")
    assert _errors(out) == ["42601"] and engine.calls == []


def test_empty_query(engine: FakeEngine) -> None:
    assert _kinds(_q(_session(engine), " ; -- nothing")) == ["EmptyQueryResponse",
                                                             "ReadyForQuery"]


def test_internal_errors_say_nothing(engine: FakeEngine, caplog) -> None:
    caplog.set_level(logging.INFO)
    out = _q(_session(engine), "SELECT explode FROM households")
    [err] = [m for m in out if isinstance(m, codec.ErrorResponse)]
    assert err.get("C") == "XX000" and err.get("M") == "internal error"
    everything = repr(out) + caplog.text
    assert FakeEngine.SECRET_TEXT not in everything and "/srv" not in everything
    assert "RuntimeError" in caplog.text  # the operator still learns what kind of failure


def test_failed_transaction_block_refuses_until_rollback(engine: FakeEngine) -> None:
    s = _session(engine)
    assert _q(s, "BEGIN")[-1].status == "T"
    assert _q(s, "SELECT nothing FROM nowhere")[-1].status == "E"
    out = _q(s, COUNT)
    assert _errors(out) == ["25P02"] and engine.calls == [] and out[-1].status == "E"
    out = _q(s, "COMMIT")
    assert out[0].tag == "ROLLBACK" and out[-1].status == "I"
    assert _q(s, COUNT)[-1].status == "I" and len(engine.calls) == 1


def test_transaction_warnings_and_savepoints(engine: FakeEngine) -> None:
    s = _session(engine)
    out = _q(s, "COMMIT")
    assert out[0].get("S") == "WARNING" and out[0].get("C") == "25P01"
    assert _errors(_q(s, "SAVEPOINT a")) == ["25P01"]
    _q(s, "BEGIN; SAVEPOINT a; SET hushql.epsilon = 0.5")
    assert _q(s, "SELECT nothing FROM nowhere")[-1].status == "E"
    assert _q(s, "ROLLBACK TO SAVEPOINT a")[-1].status == "T"
    assert _show(s, "hushql.epsilon") == "0.1"  # the SET after the savepoint is undone
    assert _errors(_q(s, "RELEASE nosuch")) == ["3B001"]
    assert _q(s, "ROLLBACK")[-1].status == "I"


def test_settings_follow_transactions(engine: FakeEngine) -> None:
    s = _session(engine)
    _q(s, "BEGIN; SET hushql.epsilon = 0.5; ROLLBACK")
    assert _show(s, "hushql.epsilon") == "0.1"
    _q(s, "BEGIN; SET hushql.epsilon = 0.5; COMMIT")
    assert _show(s, "hushql.epsilon") == "0.5"
    _q(s, "BEGIN; SET LOCAL hushql.epsilon = 0.7")
    assert _show(s, "hushql.epsilon") == "0.7"
    _q(s, "COMMIT")
    assert _show(s, "hushql.epsilon") == "0.5"
    out = _q(s, "SET LOCAL hushql.epsilon = 0.9")  # outside a block: a warning, no effect
    assert out[0].get("C") == "25P01" and _show(s, "hushql.epsilon") == "0.5"


def test_epsilon_is_validated_and_reaches_the_engine(engine: FakeEngine) -> None:
    s = _session(engine)
    for bad in ("0", "-0.1", "1.5", "'abc'", "'NaN'", "'Infinity'"):
        out = _q(s, f"SET hushql.epsilon = {bad}")
        [err] = [m for m in out if isinstance(m, codec.ErrorResponse)]
        assert err.get("C") == "22023" and "1.0" in err.get("H"), bad
    _q(s, "SET hushql.epsilon TO '0.25'")
    _q(s, COUNT)
    assert engine.calls[-1][2] == Decimal("0.25")
    assert _show(s, "hushql.remaining") == "2.75"
    _q(s, "RESET hushql.epsilon")
    _q(s, COUNT)
    assert engine.calls[-1][2] is None  # back to the policy default, chosen by the engine
    assert _errors(_q(s, "SET hushql.remaining = 5")) == ["55P02"]


@pytest.mark.parametrize("sql, code", [
    ("SET client_encoding = 'LATIN1'", "22023"),
    ("SET DateStyle = 'German'", "22023"),
    ("SET standard_conforming_strings = off", "22023"),
    ("SET server_version = '16'", "55P02"),
    ("SET no_such_thing = 1", "42704"),
    ("SHOW no_such_thing", "42704"),
    ("SET statement_timeout = 'soon'", "22023"),
])
def test_bad_settings(engine: FakeEngine, sql: str, code: str) -> None:
    out = _q(_session(engine), sql)
    assert _errors(out) == [code]
    assert next(m for m in out if isinstance(m, codec.ErrorResponse)).get("H")


def test_client_settings_are_remembered_and_reported(engine: FakeEngine) -> None:
    s = _session(engine)
    out = _q(s, "SET application_name = 'notebook'; SET DateStyle TO ISO, DMY; "
                "SET extra_float_digits = 3; SET statement_timeout = '90s'")
    assert codec.ParameterStatus("application_name", "notebook") in out
    assert codec.ParameterStatus("DateStyle", "ISO, DMY") in out
    assert _kinds(out)[-1] == "ReadyForQuery"
    assert _show(s, '"DateStyle"') == "ISO, DMY"
    assert _show(s, "statement_timeout") == "90s"
    assert _show(s, "transaction isolation level") == "read committed"
    assert _show(s, "server_version") == "15.0 (hushql)"
    _q(s, "RESET ALL")
    assert _show(s, "application_name") == ""


def test_show_all_lists_privacy_settings(engine: FakeEngine) -> None:
    rows = {r[0].decode(): r[1].decode() for r in _rows(_q(_session(engine), "SHOW ALL"))}
    assert rows["hushql.epsilon"] == "0.1" and rows["hushql.remaining"] == "3"
    assert rows["TimeZone"] == "UTC"


def test_startup_parameters_become_session_defaults(engine: FakeEngine) -> None:
    s = _session(engine)
    s.apply_startup({"user": ANALYST, "database": "demo", "application_name": "psql",
                     "options": "-c hushql.epsilon=0.3 --search_path=public",
                     "client_encoding": "utf-8", "some_unknown_option": "x"})
    assert _show(s, "hushql.epsilon") == "0.3" and _show(s, "search_path") == "public"
    assert codec.ParameterStatus("application_name", "psql") in s.parameter_statuses()
    _q(s, "SET hushql.epsilon = 0.2; RESET ALL")
    assert _show(s, "hushql.epsilon") == "0.3"  # RESET returns to the connection's defaults
    with pytest.raises(HushError):
        _session(engine).apply_startup({"user": ANALYST, "client_encoding": "LATIN1"})
    with pytest.raises(HushError):
        _session(engine).apply_startup({"user": ANALYST, "options": "-c hushql.epsilon=9"})


def test_discard_and_deallocate(engine: FakeEngine) -> None:
    s = _session(engine)
    _send(s, codec.Parse("q1", COUNT), codec.Sync())
    assert _q(s, "DEALLOCATE q1")[0].tag == "DEALLOCATE"
    assert _errors(_q(s, "DEALLOCATE q1")) == ["26000"]
    _send(s, codec.Parse("q2", COUNT), codec.Sync())
    _q(s, "SET application_name = 'x'")
    assert _q(s, "DISCARD ALL")[0].tag == "DISCARD ALL"
    assert "q2" not in s.statements and _show(s, "application_name") == ""
    out = _q(s, "BEGIN; DISCARD ALL")
    assert _errors(out) == ["25001"] and out[-1].status == "E"


def test_extended_query_with_a_parameter_and_row_limits(engine: FakeEngine) -> None:
    s = _session(engine)
    sql = "SELECT district, count(*) FROM households WHERE district = $1 GROUP BY district"
    out = _send(s, codec.Parse("s1", sql), codec.Describe("S", "s1"), codec.Sync())
    assert _kinds(out) == ["ParseComplete", "ParameterDescription", "RowDescription",
                           "ReadyForQuery"]
    assert out[1].type_oids == (25,)
    out = _send(s, codec.Bind("p1", "s1", (), (b"Old Mill' OR 1=1 --",), (1,)),
                codec.Describe("P", "p1"), codec.Execute("p1", 2))
    assert _kinds(out) == ["BindComplete", "RowDescription", "NoticeResponse", "DataRow",
                           "DataRow", "PortalSuspended"]
    assert [f.format for f in out[1].fields] == [1, 1, 1, 1]
    assert out[3].values[1] == (120).to_bytes(8, "big")  # binary bigint
    out = _send(s, codec.Execute("p1", 2), codec.Sync())
    assert _kinds(out) == ["DataRow", "CommandComplete", "ReadyForQuery"]
    assert out[1].tag == "SELECT 1"
    [(_, bound, _)] = engine.calls  # ran once, with the value as a literal node
    tree = bound.substituted()
    assert isinstance(tree, exp.Expression) and not list(tree.find_all(exp.Parameter))
    assert "Old Mill' OR 1=1 --" in [lit.this for lit in tree.find_all(exp.Literal)]
    # The statement was described with a stand-in, never with the placeholder.
    assert engine.described and all(
        isinstance(d, BoundStatement) and not list(d.substituted().find_all(exp.Parameter))
        for d in engine.described)
    assert "p1" not in s.portals  # the implicit transaction ended at Sync


def test_unnamed_statement_and_portal_flow(engine: FakeEngine) -> None:
    out = _send(_session(engine), codec.Parse("", COUNT), codec.Bind("", "", (), (), ()),
                codec.Describe("P", ""), codec.Execute("", 0), codec.Sync())
    assert _kinds(out) == ["ParseComplete", "BindComplete", "RowDescription",
                           "NoticeResponse", "DataRow", "DataRow", "DataRow", "CommandComplete",
                           "ReadyForQuery"]
    assert engine.calls[0][1] == COUNT


def test_session_commands_through_the_extended_protocol(engine: FakeEngine) -> None:
    s = _session(engine)
    out = _send(s, codec.Parse("", "SET hushql.epsilon = 0.4"), codec.Bind("", "", (), (), ()),
                codec.Describe("P", ""), codec.Execute("", 0), codec.Parse("", "BEGIN"),
                codec.Bind("", "", (), (), ()), codec.Execute("", 0), codec.Sync())
    assert _kinds(out) == ["ParseComplete", "BindComplete", "NoData", "CommandComplete",
                           "ParseComplete", "BindComplete", "CommandComplete", "ReadyForQuery"]
    assert out[-1].status == "T" and _show(s, "hushql.epsilon") == "0.4"


@pytest.mark.parametrize("messages, code", [
    ([codec.Bind("", "nosuch", (), (), ())], "26000"),
    ([codec.Execute("nosuch", 0)], "34000"),
    ([codec.Describe("P", "nosuch")], "34000"),
    ([codec.Parse("", "SELECT a FROM households WHERE b = $1"), codec.Bind("", "", (), (), ())],
     "08P01"),
    ([codec.Parse("", COUNT), codec.Bind("", "", (), (), (0, 1))], None),  # checked at Execute
    ([codec.Parse("x", COUNT), codec.Parse("x", COUNT)], "42P05"),
    ([codec.Parse("", "SELECT 1; SELECT 2")], "42601"),
    ([codec.Parse("", "SELECT a FROM households WHERE b = $1", (17,))], "0A000"),
    ([codec.Parse("", "SELECT a FROM households WHERE b = $1"),
      codec.Bind("", "", (1,), (b"\xff",), ())], "22021"),
])
def test_extended_errors_skip_to_sync(engine: FakeEngine, messages, code) -> None:
    s = _session(engine)
    out = _send(s, *messages, codec.Execute("", 0), codec.Sync())
    errors = _errors(out)
    assert len(errors) == 1 and (code is None or errors[0] == code)
    assert out[-1] == codec.ReadyForQuery("I")


def test_close_is_quiet_about_missing_names_and_closes_portals(engine: FakeEngine) -> None:
    s = _session(engine)
    out = _send(s, codec.Close("S", "nosuch"), codec.Close("P", "nosuch"), codec.Sync())
    assert _kinds(out) == ["CloseComplete", "CloseComplete", "ReadyForQuery"]
    _q(s, "BEGIN")
    _send(s, codec.Parse("st", COUNT), codec.Bind("po", "st", (), (), ()), codec.Sync())
    assert "po" in s.portals  # portals live to the end of the block
    _send(s, codec.Close("S", "st"), codec.Sync())
    assert "po" not in s.portals


def test_explain_goes_to_the_engine_and_charges_nothing(engine: FakeEngine) -> None:
    s = _session(engine)
    _q(s, "SET hushql.epsilon = 0.3")
    out = _q(s, "EXPLAIN SELECT count(*) FROM households")
    assert ("epsilon".encode(), b"0.3") in _rows(out)
    assert [m.tag for m in out if isinstance(m, codec.CommandComplete)] == ["EXPLAIN"]
    assert engine.calls == [] and engine.spent == 0


def test_catalog_queries_go_to_the_catalog_or_are_refused(engine: FakeEngine) -> None:
    catalog = FakeCatalog()
    s = _session(engine, catalog)
    out = _q(s, "SELECT relname, oid FROM pg_catalog.pg_class")
    assert [f.type_oid for f in next(m for m in out if isinstance(m, codec.RowDescription))
            .fields] == [19, 26]
    assert _rows(out) == [(b"households", b"16384"), (b"readings", b"16390")]
    assert catalog.runs == [(ANALYST, "SELECT relname, oid FROM pg_catalog.pg_class", [])]
    out = _send(s, codec.Parse("", "SELECT relname FROM pg_catalog.pg_class WHERE relname = $1"),
                codec.Bind("", "", (), (b"households",), ()), codec.Execute("", 0), codec.Sync())
    assert catalog.runs[-1][2] == ["households"] and engine.calls == []
    assert _errors(_q(_session(engine), "SELECT version()")) == ["0A000"]
    assert _errors(_q(_session(engine), "SELECT relname FROM pg_catalog.pg_class")) == ["0A000"]


def test_statement_timeout_is_accepted_but_never_cancels_an_answer(engine: FakeEngine) -> None:
    s = _session(engine)
    out = _q(s, "SET statement_timeout = 50")
    [notice] = [m for m in out if isinstance(m, codec.NoticeResponse)]
    assert "not applied" in (notice.get("M") or "")
    assert _show(s, "statement_timeout") == "50ms"

    async def slow_then_cancel() -> list:
        running = asyncio.ensure_future(s.handle(codec.Query("SELECT slow_query FROM households")))
        await asyncio.sleep(0.3)  # six times the analyst's timeout
        assert not engine.cancelled.is_set()
        s.cancel()  # a CancelRequest still works
        return (await running)[0]

    [err] = [m for m in asyncio.run(slow_then_cancel()) if isinstance(m, codec.ErrorResponse)]
    assert err.get("C") == "57014" and engine.cancelled.is_set()
    assert err.get("M") == "canceling statement due to user request"


def test_function_call_is_refused(engine: FakeEngine) -> None:
    out = _send(_session(engine), codec.FunctionCall(b"\x00\x00\x00\x01"))
    assert _errors(out) == ["0A000"] and out[-1] == codec.ReadyForQuery("I")


def test_tx_status_is_what_ready_for_query_reports(engine: FakeEngine) -> None:
    s = _session(engine)
    _q(s, "BEGIN")
    assert s.tx.status is TxStatus.IN_BLOCK
    assert _q(s, "COMMIT AND CHAIN")[-1].status == "T"
    assert _q(s, "ROLLBACK")[-1].status == "I"
    assert len(ROWS) == 3


def test_the_engine_may_type_untyped_parameters(engine: FakeEngine) -> None:
    seen = []

    def parameter_types(analyst, tree):
        seen.append(tree)
        return ["bigint", None]

    engine.parameter_types = parameter_types  # an optional engine method
    s = _session(engine)
    sql = "SELECT count(*) FROM households WHERE occupants > $1 AND district = $2"
    out = _send(s, codec.Parse("", sql), codec.Describe("S", ""),
                codec.Bind("", "", (), (b"2", b"Old Mill"), ()), codec.Execute("", 0),
                codec.Sync())
    assert out[1].type_oids == (20, 25)
    [(_, bound, _)] = engine.calls
    assert "occupants > 2 AND district = 'Old Mill'" in bound.substituted().sql(dialect="postgres")
    assert len(seen) == 1 and list(seen[0].find_all(exp.Parameter))


def test_an_error_undoes_the_settings_of_its_implicit_transaction(engine: FakeEngine) -> None:
    s = _session(engine)
    _q(s, "SET hushql.epsilon = 0.5; SELECT secret FROM elsewhere")
    assert _show(s, "hushql.epsilon") == "0.1"  # the message ran as one, and failed as one
    _send(s, codec.Parse("", "SET hushql.epsilon = 0.6"), codec.Bind("", "", (), (), ()),
          codec.Execute("", 0), codec.Parse("", "SELECT FROM WHERE"), codec.Sync())
    assert _show(s, "hushql.epsilon") == "0.1"
    _q(s, "BEGIN; SET hushql.epsilon = 0.7; COMMIT; SELECT secret FROM elsewhere")
    assert _show(s, "hushql.epsilon") == "0.7"  # committed before the error
    _q(s, "SET hushql.epsilon = 0.8")
    assert _show(s, "hushql.epsilon") == "0.8"


def test_fresh_and_accuracy_columns_settings(engine: FakeEngine) -> None:
    """hushql.fresh reaches the engine; hushql.accuracy_columns adds a <name>_margin95 column
    per noisy column, in the description (Describe before Execute) and in the rows."""
    s = _session(engine)
    _q(s, COUNT)
    _q(s, "SET hushql.fresh = on")
    _q(s, COUNT)
    _q(s, "RESET hushql.fresh")
    _q(s, COUNT)
    assert engine.fresh == [False, True, False]
    assert _errors(_q(s, "SET hushql.fresh = maybe")) == ["22023"]

    _q(s, "SET hushql.accuracy_columns = on")
    out = _send(s, codec.Parse("", COUNT), codec.Bind("", "", (), (), ()),
                codec.Describe("P", ""), codec.Execute("", 0), codec.Sync())
    [described] = [m for m in out if isinstance(m, codec.RowDescription)]
    assert [f.name for f in described.fields] == [
        "district", "households", "avg_occupants", "litres", "households_margin95",
        "avg_occupants_margin95", "litres_margin95"]
    rows = _rows(out)
    assert len(rows) == len(ROWS)
    # The fake's accuracy: households ±30; avg_occupants without a finite bound; litres none.
    assert {(float(r[4]), r[5], r[6]) for r in rows} == {(30.0, None, None)}, rows
    _q(s, "SET hushql.accuracy_columns = off")
    plain = [m for m in _q(s, COUNT) if isinstance(m, codec.RowDescription)]
    assert [f.name for f in plain[0].fields] == ["district", "households", "avg_occupants",
                                                 "litres"]
