"""The accounts object the wire front logs in with: verifiers and account facts from policies,
and the front's Protocols met by the test stand-ins."""

from __future__ import annotations

from proxy.accounts import Accounts
from proxy.policy import AccessPolicy, AdminPolicy, AnalystPolicy, Policies
from proxy.wire.auth import make_verifier
from proxy.wire.boundary import AccountFacts, Answering, CatalogQuestions
from tests.test_wire_fakes import FakeCatalog, FakeEngine

PLANNER = make_verifier("planner's password")
RESEARCHER = make_verifier("researcher's password")
AUDITOR = make_verifier("auditor's password")
AUDITOR_AS_ANALYST = make_verifier("another password")


def _policies() -> Policies:
    access = AccessPolicy(
        analysts={"planner": AnalystPolicy(password=PLANNER, budget=1),
                  "researcher": AnalystPolicy(password=RESEARCHER, budget=1, disabled=True),
                  "auditor": AnalystPolicy(password=AUDITOR_AS_ANALYST, budget=1)},
        admins={"auditor": AdminPolicy(password=AUDITOR),
                "retired": AdminPolicy(password=AUDITOR, disabled=True)})
    return Policies(access=access, tables={})


def test_verifiers_come_from_enabled_accounts_analysts_first() -> None:
    accounts = Accounts(_policies())
    assert accounts.verifier("planner") == PLANNER
    assert accounts.verifier("auditor") == AUDITOR_AS_ANALYST  # a name in both is the analyst
    assert accounts.verifier("researcher") is None  # disabled
    assert accounts.verifier("retired") is None  # disabled administrator
    assert accounts.verifier("nobody") is None


def test_account_facts() -> None:
    accounts = Accounts(_policies())
    assert accounts.is_analyst("planner") and not accounts.is_admin("planner")
    assert accounts.is_admin("auditor") and accounts.is_admin("retired")
    assert not accounts.is_analyst("retired") and not accounts.is_admin("nobody")
    assert accounts.is_disabled("researcher") and accounts.is_disabled("retired")
    assert not accounts.is_disabled("planner") and not accounts.is_disabled("nobody")


def test_the_stand_ins_offer_every_member_of_the_front_protocols() -> None:
    engine = FakeEngine()
    assert isinstance(engine, Answering)
    assert isinstance(engine.accounts, AccountFacts)
    assert isinstance(FakeCatalog(), CatalogQuestions)
    assert not isinstance(object(), Answering)  # the check can fail
