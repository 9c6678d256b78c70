"""Same question, same answer (proxy.stored_answers, ledger schema version 6), on real
PostgreSQL: a repeated question is answered from the ledger without a new charge, across an
engine restart, never across analysts; ``fresh`` pays again; a changed policy, epsilon or
statement is a new question; identical questions at once are charged once."""

from __future__ import annotations

import dataclasses
import datetime as dt
import threading
from decimal import Decimal
from fractions import Fraction
from pathlib import Path

import psycopg
import pytest

from proxy.answer import Accuracy, Answer, OutputColumn
from proxy.answer_notes import Note
from proxy.backend import Backend
from proxy.engine import Engine
from proxy.ledger import Ledger
from proxy.policy import load_policies
from proxy.stored_answers import (decode_answer, encode_answer, normalised_statement,
                                  question_key)
from tests.policy_fixtures import DUMMY_VERIFIER, load_clinic, write_policies

QUESTION = "SELECT ward, COUNT(*) AS people, AVG(age) FROM people GROUP BY ward"


@pytest.fixture(scope="module")
def clinic_dsn(module_dsn: str) -> str:
    load_clinic(module_dsn)
    return module_dsn


def policies_at(folder: Path, *, second_analyst: bool = True, age_high: int | None = None):
    """The clinic policies with a second analyst ``colleague`` granted the same tables;
    ``age_high`` changes the declared top of the age range (a policy change)."""
    write_policies(folder)
    if second_analyst:
        with (folder / "access.toml").open("a") as out:
            out.write(f'\n[analysts.colleague]\npassword = "{DUMMY_VERIFIER}"\nbudget = 1000\n'
                      'tables = ["people", "visits"]\n')
    if age_high is not None:
        people = folder / "tables" / "people.toml"
        text = people.read_text()
        assert "range = [0, 100]" in text  # the clinic fixture's age range
        people.write_text(text.replace("range = [0, 100]", f"range = [0, {age_high}]", 1))
    return load_policies(folder)


@pytest.fixture
def engines(clinic_dsn: str, tmp_path: Path, request):
    """make(folder_options) -> an Engine on one ledger schema per test (shared by every
    engine the test makes, as restarted proxies share a ledger)."""
    made: list[Engine] = []
    schema = "stored_" + "".join(c if c.isalnum() else "_" for c in request.node.name[:30].lower())

    def make(**options) -> Engine:
        policies = policies_at(tmp_path / f"p{len(made)}", **options)
        engine = Engine(policies, Backend(clinic_dsn, pool_size=2),
                        Ledger(clinic_dsn, schema=schema))
        made.append(engine)
        return engine

    yield make, schema
    for engine in made:
        engine.close()


def charges(dsn: str, schema: str, analyst: str) -> int:
    with psycopg.connect(dsn) as conn:
        row = conn.execute(f"SELECT count(*) FROM {schema}.charges WHERE analyst = %s",
                           [analyst]).fetchone()
    assert row is not None
    return int(row[0])


def test_a_repeated_question_costs_nothing_and_gets_the_same_answer(engines, clinic_dsn) -> None:
    make, schema = engines
    engine = make()
    first = engine.answer("tester", QUESTION, epsilon=Decimal("0.5"))
    assert first.reused_from is None and first.cost == Decimal("0.5")
    # Spacing, keyword case and unquoted identifiers' case do not make a new question.
    again = engine.answer("tester", "select ward, count(*) as people, avg(AGE)\n from PEOPLE "
                                    "group by WARD", epsilon=Decimal("0.5"))
    assert again.rows == first.rows and again.accuracy == first.accuracy
    assert again.columns == first.columns and again.notes == first.notes
    assert again.reused_from is not None and again.cost == 0
    assert again.epsilon == Decimal("0.5")  # what it cost when first paid
    assert again.remaining == first.remaining == engine.remaining("tester") == Decimal("999.5")
    assert charges(clinic_dsn, schema, "tester") == 1
    # The time it was paid is the charge's own.
    with psycopg.connect(clinic_dsn) as conn:
        paid = conn.execute(f"SELECT reserved_at FROM {schema}.charges").fetchone()
    assert paid is not None and again.reused_from == paid[0]


def test_stored_answers_survive_a_restart(engines, clinic_dsn) -> None:
    make, schema = engines
    first = make().answer("tester", QUESTION, epsilon=Decimal("0.5"))
    restarted = make()  # a new engine on the same ledger (its plan cache is empty)
    again = restarted.answer("tester", QUESTION, epsilon=Decimal("0.5"))
    assert again.rows == first.rows and again.reused_from is not None
    assert charges(clinic_dsn, schema, "tester") == 1


def test_stored_answers_never_cross_analysts(engines, clinic_dsn) -> None:
    make, schema = engines
    engine = make()
    engine.answer("tester", QUESTION, epsilon=Decimal("0.5"))
    theirs = engine.answer("colleague", QUESTION, epsilon=Decimal("0.5"))
    assert theirs.reused_from is None
    assert charges(clinic_dsn, schema, "colleague") == 1
    assert engine.remaining("colleague") == Decimal("999.5")


def test_fresh_pays_for_new_noise_and_is_stored(engines, clinic_dsn) -> None:
    make, schema = engines
    engine = make()
    engine.answer("tester", QUESTION, epsilon=Decimal("0.5"))
    fresh = engine.answer("tester", QUESTION, epsilon=Decimal("0.5"), fresh=True)
    assert fresh.reused_from is None
    assert charges(clinic_dsn, schema, "tester") == 2
    assert engine.remaining("tester") == Decimal("999.0")
    again = engine.answer("tester", QUESTION, epsilon=Decimal("0.5"))
    assert again.reused_from is not None and again.rows == fresh.rows  # the newest is given
    assert charges(clinic_dsn, schema, "tester") == 2


def test_another_epsilon_or_statement_is_another_question(engines, clinic_dsn) -> None:
    make, schema = engines
    engine = make()
    engine.answer("tester", QUESTION, epsilon=Decimal("0.5"))
    assert engine.answer("tester", QUESTION, epsilon=Decimal("0.25")).reused_from is None
    assert engine.answer("tester", QUESTION + " HAVING COUNT(*) > 0",
                         epsilon=Decimal("0.5")).reused_from is None
    # 0.50 is the same epsilon as 0.5.
    assert engine.answer("tester", QUESTION, epsilon=Decimal("0.50")).reused_from is not None
    assert charges(clinic_dsn, schema, "tester") == 3


def test_a_changed_policy_is_a_new_question(engines, clinic_dsn) -> None:
    make, schema = engines
    make().answer("tester", QUESTION, epsilon=Decimal("0.5"))
    same = make().answer("tester", QUESTION, epsilon=Decimal("0.5"))  # same policy, reloaded
    assert same.reused_from is not None
    changed = make(age_high=120).answer("tester", QUESTION, epsilon=Decimal("0.5"))
    assert changed.reused_from is None
    assert charges(clinic_dsn, schema, "tester") == 2


def test_identical_questions_at_once_are_charged_once(engines, clinic_dsn) -> None:
    make, schema = engines
    engine = make()
    results: list[Answer] = []
    start = threading.Barrier(4)

    def ask() -> None:
        start.wait()
        results.append(engine.answer("tester", QUESTION, epsilon=Decimal("0.5")))

    threads = [threading.Thread(target=ask) for _ in range(4)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(60)
    assert len(results) == 4
    assert charges(clinic_dsn, schema, "tester") == 1
    assert sum(r.reused_from is None for r in results) == 1
    assert all(r.rows == results[0].rows for r in results)


def test_explain_says_whether_an_answer_is_stored(engines) -> None:
    make, _ = engines
    engine = make()

    def stored_line(epsilon: Decimal = Decimal("0.5"), **options) -> str:
        rows = engine.explain("tester", QUESTION, epsilon=epsilon, **options).rows
        return next(str(v) for k, v in rows if k == "stored answer")

    assert stored_line().startswith("none")
    engine.answer("tester", QUESTION, epsilon=Decimal("0.5"))
    assert stored_line().startswith("stored, first paid") and "charges nothing" in stored_line()
    assert "a new answer is charged" in stored_line(fresh=True)
    assert stored_line(epsilon=Decimal("0.25")).startswith("none")  # another question


def test_refused_and_failed_questions_store_nothing(engines, clinic_dsn) -> None:
    make, schema = engines
    engine = make()
    with pytest.raises(Exception):
        engine.answer("tester", "SELECT * FROM people")
    with psycopg.connect(clinic_dsn) as conn:
        row = conn.execute(f"SELECT count(*) FROM {schema}.stored_answers").fetchone()
    assert row == (0,)


def _outcomes(dsn: str, schema: str) -> list[tuple[str, int]]:
    """Per charge, in order: its outcome and how many answers it stored."""
    with psycopg.connect(dsn) as conn:
        return conn.execute(
            f"SELECT c.outcome, count(a.id)::int FROM {schema}.charges c LEFT JOIN "
            f"{schema}.stored_answers a ON a.charge_id = c.id GROUP BY c.id ORDER BY c.id"
        ).fetchall()


def test_storing_notes_the_charge_answered_in_the_same_statement(engines, clinic_dsn) -> None:
    """The stored answer and the 'answered' outcome are written by one statement, after the
    answer is released (proxy.answer_notes); a store that fails records neither."""
    make, schema = engines
    engine = make()
    engine.answer("tester", QUESTION, epsilon=Decimal("0.5"))
    assert engine.flush_notes(10)
    assert _outcomes(clinic_dsn, schema) == [("answered", 1)]
    ledger = engine.ledger
    charge = ledger.reserve("tester", ["people"], Decimal("0.5"), QUESTION, "f").charge_id
    with psycopg.connect(clinic_dsn, autocommit=True) as conn:  # an answer stored beforehand
        conn.execute(f"INSERT INTO {schema}.stored_answers (analyst, question, statement, "
                     "epsilon, charge_id, answer) VALUES ('tester', 'q', 's', 0.5, %s, '{}')",
                     [charge])
    with pytest.raises(psycopg.errors.UniqueViolation):
        ledger.store_answer("tester", "q", QUESTION, Decimal("0.5"), charge, "{}")
    assert _outcomes(clinic_dsn, schema)[1] == ("reserved", 1)  # the note went with the store


def test_notes_written_together_fall_back_one_by_one(engines, clinic_dsn) -> None:
    """Three notes in one transaction, the middle one's charge already holding an answer: the
    transaction fails, so each is stored alone; the other two are stored and noted answered,
    the middle one neither (its outcome is then the engine's to record alone)."""
    make, schema = engines
    ledger = make().ledger
    charges = [ledger.reserve("tester", ["people"], Decimal("0.5"), QUESTION, "f").charge_id
               for _ in range(3)]
    with psycopg.connect(clinic_dsn, autocommit=True) as conn:
        conn.execute(f"INSERT INTO {schema}.stored_answers (analyst, question, statement, "
                     "epsilon, charge_id, answer) VALUES ('tester', 'q', 's', 0.5, %s, '{}')",
                     [charges[1]])
    notes = [Note("tester", f"q{i}", QUESTION, Decimal("0.5"), charge, "{}",
                  dt.datetime.now(dt.timezone.utc)) for i, charge in enumerate(charges)]
    assert ledger.store_answers(notes) == [True, False, True]
    assert _outcomes(clinic_dsn, schema) == [("answered", 1), ("reserved", 1), ("answered", 1)]
    # A batch that stores cleanly: one statement; a charge already finished is not noted again.
    more = [ledger.reserve("tester", ["people"], Decimal("0.5"), QUESTION, "f").charge_id
            for _ in range(2)]
    ledger.finish(more[1], "failed")
    notes = [Note("tester", f"r{i}", QUESTION, Decimal("0.5"), charge, '{"k": [1, "two"]}',
                  dt.datetime.now(dt.timezone.utc)) for i, charge in enumerate(more)]
    assert ledger.store_answers(notes) == [True, False]
    assert _outcomes(clinic_dsn, schema)[3:] == [("answered", 1), ("failed", 1)]
    assert ledger.stored_answer("tester", "r0").answer == {"k": [1, "two"]}


def test_an_answer_whose_store_fails_is_still_noted_answered(engines, clinic_dsn,
                                                              monkeypatch) -> None:
    """Storing fails: the answer is still given (only its reuse is lost) and the notes thread
    records the outcome on its own."""
    make, schema = engines
    engine = make()

    def refuse(*args: object) -> bool:
        raise psycopg.OperationalError("the ledger went away")

    monkeypatch.setattr(engine.ledger, "store_answers", refuse)
    answer = engine.answer("tester", QUESTION, epsilon=Decimal("0.5"))
    assert answer.rows
    assert engine.flush_notes(10)
    assert _outcomes(clinic_dsn, schema) == [("answered", 0)]


def test_a_question_asked_again_before_its_note_is_written_is_not_paid_twice(
        engines, clinic_dsn, monkeypatch) -> None:
    """The note of the first answer is held back (a slow ledger): the same question asked
    again meanwhile finds it queued, is given it for nothing, with the charge's own time; once
    written, the ledger holds one charge and one stored answer. Closing the engine writes what
    is still queued."""
    make, schema = engines
    engine = make()
    release = threading.Event()
    store = engine.ledger.store_answers

    def slow(notes):  # type: ignore[no-untyped-def]
        release.wait(30)
        return store(notes)

    monkeypatch.setattr(engine.ledger, "store_answers", slow)
    first = engine.answer("tester", QUESTION, epsilon=Decimal("0.5"))
    again = engine.answer("tester", QUESTION, epsilon=Decimal("0.5"))
    assert again.reused_from is not None and again.cost == 0 and again.rows == first.rows
    assert again.remaining == Decimal("999.5")
    assert _outcomes(clinic_dsn, schema) == [("reserved", 0)]  # not written yet
    with psycopg.connect(clinic_dsn) as conn:
        paid = conn.execute(f"SELECT reserved_at FROM {schema}.charges").fetchone()
    assert paid is not None and again.reused_from == paid[0]
    release.set()
    engine.close()
    assert _outcomes(clinic_dsn, schema) == [("answered", 1)]
    assert charges(clinic_dsn, schema, "tester") == 1


# ---- pure parts --------------------------------------------------------------------------------

def test_an_answer_survives_json_exactly() -> None:
    answer = Answer([OutputColumn("day", "date"), OutputColumn("litres", "numeric", True),
                     OutputColumn("mean", "double precision", True)],
                    [(dt.date(2026, 1, 2), Decimal("12.50"), 0.1 + 0.2), (None, Decimal(-3), None)],
                    Decimal("0.25"), Decimal("9"),
                    [Accuracy("litres", Decimal("0.125"), Decimal("0.5"), Fraction(4, 3),
                              Decimal("6.5"), "discrete Laplace", Decimal("1.5"), Decimal(0))],
                    ["readings"], 17, ["a note"])
    back = decode_answer(encode_answer(answer))
    assert back.rows == answer.rows and back.accuracy == answer.accuracy
    assert back.columns == answer.columns and back.charge_id == 17 and back.notes == ["a note"]
    assert type(back.rows[0][1]) is Decimal and back.rows[0][2] == 0.1 + 0.2
    assert back.remaining == 0  # not stored: filled in when the answer is given


def test_the_key_holds_analyst_statement_epsilon_policy_and_rewrite() -> None:
    base = ("tester", normalised_statement("SELECT COUNT(*) FROM people"), Decimal("0.5"),
            "policy", "rewrite")
    key = question_key(*base)
    assert question_key(*base[:2], Decimal("0.500"), *base[3:]) == key
    for changed in (("colleague", *base[1:]), (base[0], "SELECT 1", *base[2:]),
                    (*base[:2], Decimal("0.25"), *base[3:]), (*base[:3], "other", base[4]),
                    (*base[:4], "other")):
        assert question_key(*changed) != key
    # Quoted identifiers keep their case (PostgreSQL folds only unquoted ones).
    assert normalised_statement('SELECT COUNT(*) FROM "People"') != base[1]


def test_margin_columns_follow_each_aggregate() -> None:
    """hushql.accuracy_columns: one <name>_margin95 column per noisy column, the same bound in
    every row, NULL where there is no finite bound; keys get none."""
    from proxy.answer import margin_columns, with_margins

    columns = [OutputColumn("district", "text"), OutputColumn("households", "bigint", True),
               OutputColumn("mean", "double precision", True)]
    answer = Answer(columns, [("a", 3, 1.5), ("b", 0, None)], Decimal("0.1"), Decimal(1),
                    [Accuracy("households", Decimal("0.05"), Decimal(1), Fraction(20),
                              Decimal("59"), ""),
                     Accuracy("mean", Decimal("0.05"), None, None, None, "ratio")])
    shown, rows = with_margins(answer)
    assert [c.name for c in shown] == ["district", "households", "mean", "households_margin95",
                                       "mean_margin95"]
    assert shown == margin_columns(columns)  # what Describe says is what Execute sends
    assert rows == [("a", 3, 1.5, 59.0, None), ("b", 0, None, 59.0, None)]


def test_the_notice_keeps_the_essentials_on_its_first_line() -> None:
    """Message: one line with cost, budget left and margins (the JDBC driver keeps only it);
    Detail and Hint carry the rest (protocol "Error and Notice Message Fields")."""
    from proxy.wire.session import answer_notice

    answer = Answer([OutputColumn("n", "bigint", True)], [(5,)], Decimal("0.1"), Decimal("2.9"),
                    [Accuracy("n", Decimal("0.1"), Decimal(1), Fraction(10), Decimal("30"),
                              "discrete Laplace")], notes=["rows without a key are not counted"])
    fields = {f: v for f, v in answer_notice(answer).fields}
    assert fields["M"] == ("this answer spent epsilon 0.1 of your privacy budget; 2.9 remains; "
                           "95% margins: n ±30")
    assert "n: within ±30 of the exact value in 95% of answers" in fields["D"]
    assert "rows without a key are not counted" in fields["D"] and "hushql.fresh" in fields["H"]
    paid = dt.datetime(2026, 3, 4, 5, 6, 7, tzinfo=dt.timezone.utc)
    reused = dataclasses.replace(answer, reused_from=paid)
    fields = {f: v for f, v in answer_notice(reused).fields}
    assert fields["M"].startswith("this answer was given before and is reused: it spent nothing "
                                  "now (epsilon 0.1 paid 2026-03-04 05:06:07 UTC); 2.9 remains")
    assert "\n" not in fields["M"]


def test_an_unreadable_stored_answer_is_answered_anew(engines, clinic_dsn) -> None:
    """Fail closed: a stored answer this program cannot read back (a damaged row) is never
    given; the question is paid for and answered anew."""
    make, schema = engines
    engine = make()
    engine.answer("tester", QUESTION, epsilon=Decimal("0.5"))
    assert engine.flush_notes(10)  # the stored answer is in the ledger, to be damaged
    with psycopg.connect(clinic_dsn, autocommit=True) as conn:
        conn.execute(f"UPDATE {schema}.stored_answers SET answer = '{{\"object\": \"Nothing\"}}'")
    again = engine.answer("tester", QUESTION, epsilon=Decimal("0.5"))
    assert again.reused_from is None
    assert charges(clinic_dsn, schema, "tester") == 2


def test_parameter_values_are_part_of_the_question(engines, clinic_dsn) -> None:
    """A prepared statement whose value binds late (planned once for every value of its class)
    is a new question for each value, and the same question for the same value again."""
    from proxy.wire import statements, types

    make, schema = engines
    engine = make()
    text = "SELECT COUNT(*) FROM people WHERE age = $1"
    tree = statements.single(text).tree
    assert tree is not None

    def ask(value: int):
        bound = statements.bound(text, statements.fold_casts(tree, (types.INT8,)), [value],
                                 (types.INT8,))
        return engine.answer("tester", bound, epsilon=Decimal("0.5"))

    firsts = [ask(value) for value in (30, 31, 32)]
    assert all(a.reused_from is None for a in firsts)
    assert charges(clinic_dsn, schema, "tester") == 3
    again = ask(31)
    assert again.reused_from is not None and again.rows == firsts[1].rows
    assert charges(clinic_dsn, schema, "tester") == 3
