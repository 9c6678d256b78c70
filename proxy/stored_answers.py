"""Same question, same answer: which asked questions are "the same", and how a released answer
is kept in the ledger to be given again. Pure: no I/O (the ledger stores, the engine decides).

The privacy argument.
- A stored answer is an answer already released to this analyst, paid for by a charge in the
  ledger. Giving the same released figures to the same analyst again is post-processing of
  what they already hold: it reveals nothing new about anyone, so it is charged nothing
  (Dwork & Roth 2014, Proposition 2.1). Asking again without this would only pay for more
  noise draws whose average converges to the true value: reuse is also what keeps a repeated
  question (a desktop tool's automatic ``SELECT count(*)``) from wasting the budget.
- Stored answers never cross analysts: the key starts with the analyst's name and the lookup
  is by analyst. (Another analyst has not seen the figures; giving them would be a release to
  them that nobody paid for.) For the same reason they are not among the administrators'
  ledger relations (proxy.wire.ledger_relations): administrators see charges, not answers.
- The key holds everything the released figures depend on besides the data: the analyst; the
  normalised statement (the parsed tree's canonical SQL with unquoted identifiers folded to
  lower case as PostgreSQL folds them, and with bound parameter values as literals); the
  epsilon (a different epsilon is a different question: more or less noise); a fingerprint of
  the table policy (ranges, steps, values, individuals, bounds: a changed policy must not give
  an answer computed under the old one); the rewrite's fingerprint (the backend SQL, which
  also changes with the backend's column types and with the mechanism's code); and
  ``ANSWER_FORMAT``, bumped whenever the answer's computation changes in a way none of the
  former shows.
- The data is not in the key. A stored answer is a released answer: reusing it after the data
  changed leaks nothing new, but it describes the data as it was when it was first paid for.
  The notice of a reused answer says when that was, and ``SET hushql.fresh = on`` pays for new
  noise over the current data (and stores that answer for the next asking).
- Concurrency: the engine lets one identical question (same key) run at a time in a process,
  so two arriving at once are charged once and the second gets the first's stored answer.
  Fresh questions do not wait: each pays and stores its own answer (the newest is given).
  Across several proxy processes sharing a ledger (``serve --workers``), two identical
  questions arriving at the very same moment on two processes may each be charged once; each
  is stored, and later askings get the most recent. Nothing is released uncharged either way.
- A statement that is refused, or fails after its charge, stores nothing.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import json
from decimal import Decimal
from fractions import Fraction
from typing import Any

import sqlglot
import sqlglot.expressions as exp
from sqlglot.optimizer.normalize_identifiers import normalize_identifiers

from proxy.answer import Accuracy, Answer, OutputColumn
from proxy.policy import TablePolicy

__all__ = ["ANSWER_FORMAT", "normalised_statement", "policy_fingerprint", "question_key",
           "encode_answer", "decode_answer"]

ANSWER_FORMAT = 1
"""Bumped when the way answers are computed changes unseen by the key's other parts."""


def normalised_statement(statement: str | exp.Expression) -> str:
    """The statement as sqlglot writes its parsed tree back (PostgreSQL dialect): spacing,
    keyword case and unquoted identifiers' case no longer matter. A tree (bound parameters
    already literals) is copied, never changed."""
    tree = sqlglot.parse_one(statement, read="postgres") if isinstance(statement, str) \
        else statement.copy()
    return normalize_identifiers(tree, dialect="postgres").sql(dialect="postgres")


def policy_fingerprint(tables: list[TablePolicy]) -> str:
    """SHA-256 (hex) of the table policies an answer was computed under, in a canonical form."""
    body = json.dumps([t.model_dump(mode="json") for t in tables], sort_keys=True)
    return hashlib.sha256(body.encode()).hexdigest()


def question_key(analyst: str, statement: str, epsilon: Decimal, policy: str,
                 rewrite: str) -> str:
    """The stored-answer key (SHA-256 hex): see the module docstring for why each part."""
    body = json.dumps([ANSWER_FORMAT, analyst, statement, format(epsilon.normalize(), "f"),
                       policy, rewrite])
    return hashlib.sha256(body.encode()).hexdigest()


# ---- an Answer as JSON and back, exactly ----------------------------------------------------

_CLASSES: dict[str, type] = {"Answer": Answer, "Accuracy": Accuracy, "OutputColumn": OutputColumn}
_NOT_STORED = ("remaining", "reused_from")  # facts of the moment it is given, not of the answer
# The stored fields of each class, and the types kept as they are, looked up by exact type
# first (an answer's values are almost all of these): the isinstance chain below is the rule.
_STORED_FIELDS: dict[type, tuple[str, ...]] = {
    cls: tuple(f.name for f in dataclasses.fields(cls) if f.name not in _NOT_STORED)
    for cls in _CLASSES.values()}
_AS_THEY_ARE = frozenset({type(None), bool, int, str})


def _encode(value: Any) -> Any:
    kind = type(value)
    if kind in _AS_THEY_ARE:
        return value
    fields = _STORED_FIELDS.get(kind)
    if fields is not None:
        return {"object": kind.__name__,
                "fields": {name: _encode(getattr(value, name)) for name in fields}}
    if isinstance(value, bool) or value is None or isinstance(value, (int, str)):
        return value
    if isinstance(value, float):
        return {"float": repr(value)}
    if isinstance(value, Decimal):
        return {"decimal": str(value)}
    if isinstance(value, Fraction):
        return {"fraction": [value.numerator, value.denominator]}
    if isinstance(value, dt.datetime):
        return {"datetime": value.isoformat()}
    if isinstance(value, dt.date):
        return {"date": value.isoformat()}
    if isinstance(value, (list, tuple)):
        return {"tuple" if isinstance(value, tuple) else "list": [_encode(v) for v in value]}
    if dataclasses.is_dataclass(value) and type(value).__name__ in _CLASSES:
        return {"object": type(value).__name__,
                "fields": {f.name: _encode(getattr(value, f.name))
                           for f in dataclasses.fields(value) if f.name not in _NOT_STORED}}
    raise TypeError(f"cannot store a {type(value).__name__} in an answer")


def _decode(value: Any) -> Any:
    if not isinstance(value, dict):
        return value
    if "object" in value:
        cls = _CLASSES[value["object"]]
        known = {f.name for f in dataclasses.fields(cls)}
        fields = {k: _decode(v) for k, v in value["fields"].items() if k in known}
        if cls is Answer:
            fields["remaining"] = Decimal(0)  # filled in when given
        return cls(**fields)
    (tag, body), = value.items()
    if tag == "float":
        return float(body)
    if tag == "decimal":
        return Decimal(body)
    if tag == "fraction":
        return Fraction(body[0], body[1])
    if tag == "datetime":
        return dt.datetime.fromisoformat(body)
    if tag == "date":
        return dt.date.fromisoformat(body)
    items = [_decode(v) for v in body]
    return tuple(items) if tag == "tuple" else items


def encode_answer(answer: Answer) -> str:
    """The released answer as JSON text, every value's type kept (Decimal, date, Fraction,
    float exactly); without the facts of the moment (remaining budget, reuse)."""
    return json.dumps(_encode(answer))


def decode_answer(text: str | dict[str, Any]) -> Answer:
    """``encode_answer``'s inverse (psycopg hands jsonb over already parsed)."""
    found = _decode(json.loads(text) if isinstance(text, str) else text)
    if not isinstance(found, Answer):
        raise ValueError("not a stored answer")
    return found
