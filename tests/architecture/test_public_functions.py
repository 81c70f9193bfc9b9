"""What an analyst or an outsider could do beyond the `Vault` methods: every public module function
that takes a use case's context (what the Vault hands a service), a log stamped by the vault's
own clock, a clock set back, a policy
or a note swapped in the database file. Each of these got through before it was closed."""

from __future__ import annotations

import ast
import datetime as dt
import importlib
import inspect
import json
import pkgutil
import sqlite3
from pathlib import Path

import pytest

import vault
from tests.clock import ManualClock
from tests.conftest import ROOT, TEST_PASSPHRASE
from vault import Conflict, IntegrityError, PolicyRefusal, UsageError, Vault
from vault.storage import db as storage

EXAMPLES = ROOT / "docs" / "examples"
NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
ANALYST = "analyst passphrase long enough"

# Every public function of a vault module whose first parameter is a use case's context (`ctx`),
# and who may call it. A new one fails this test until it is listed (and, if for stewards, checks
# the role).
PUBLIC: dict[str, str] = {
    "auditing.audit_entries": "anyone",  # roles the policy set lets read the log (audited)
    "auditing.verify": "steward",
    "auditing.sign_head": "steward",
    "blobs.new_participant": "steward",
    "blobs.put_blob": "steward",
    "blobs.blobs": "steward",
    "blobs.readable": "steward",
    "consent.enrol": "steward",
    "consent.amend_consent": "steward",
    "consent.consent_history": "steward",
    "consent.check_consent_heads": "anyone",  # what every open does (tags on trust, audited)
    "members.add_member": "steward",
    "members.remove_member": "steward",
    "members.members": "anyone",  # names and roles only, no participant data
    "members.export_members": "steward",
    "policy_apply.apply_policy": "steward",
    "rekeying.rekey": "steward",
    "rekeying.make_served": "steward",
    "tokens.served": "anyone",  # whether the vault was converted (a public fact, in describe)
    "tokens.member_roles": "anyone",  # names and roles, as members() shows
    "tokens.token_summary": "anyone",  # counts and expiry dates, no token text or tag
    "tokens.add_token_member": "steward",
    "tokens.issue_token": "steward",
    "tokens.revoke_tokens": "steward",
    "tokens.authenticate": "anyone",  # the check itself: audited, throttled, one opaque failure
    "budget.affordable": "anyone",  # reads remaining budget of ids the caller names
    "budget.charge": "steward",
    "budget.charge_in_transaction": "anyone",  # inside an export's transaction only (refused outside)
    "budget.refund_in_transaction": "anyone",
    "budget.budget_report": "anyone",  # per-participant rows for stewards only
    "export_eeg.export_eeg": "anyone",  # the policy engine decides
    "export_matrix.declared_items": "anyone",
    "export_matrix.release_items": "anyone",
    "export_matrix.export_matrix": "anyone",  # the policy engine decides
    "export_matrix.export_utility": "steward",
    "export_runs.begin": "anyone",  # steps of an export: charge and record, audited
    "export_runs.writing": "anyone",
    "export_runs.mark_signed": "anyone",
    "export_runs.publish": "anyone",
    "export_runs.abandon": "anyone",  # refunds only a run that wrote nothing
    "export_runs.recover": "anyone",  # what every open does
    "exports.pseudonyms": "anyone",
    "exports.sign_and_record": "anyone",  # needs a grant the engine minted
    "exports.check_export": "anyone",  # counts only
    "ingest.event_codes_for": "anyone",
    "ingest.scrub_clear_metadata": "anyone",  # what every open does
    "ingest.ingest_eeg": "steward",
    "ingest.ingest_eeg_stream": "steward",
    "ingest.ingest_scores": "steward",
    "ingest.ingest_scores_bytes": "steward",
    "report.record_of_processing": "steward",
    "withdraw.request_withdrawal": "steward",
    "withdraw.pending": "steward",
    "withdraw.process": "steward",
    "withdraw.reclaim": "anyone",  # hands freed pages back to the file system
    "withdraw.receipt_of": "steward",
    "withdraw.sweep": "steward",
}


def _vault_functions() -> dict[str, object]:
    found = {}
    for info in pkgutil.walk_packages(vault.__path__, "vault."):
        if info.ispkg or info.name.startswith(("vault.cli", "vault.demo_data")) or info.name in (
                "vault.api", "vault.__main__"):
            continue
        module = importlib.import_module(info.name)
        short = info.name.rsplit(".", 1)[-1]
        for name, fn in inspect.getmembers(module, inspect.isfunction):
            params = list(inspect.signature(fn).parameters)
            if fn.__module__ == module.__name__ and not name.startswith("_") and params[:1] == ["ctx"]:
                found[f"{short}.{name}"] = fn
    return found


def test_every_public_vault_function_is_listed_with_who_may_call_it() -> None:
    assert set(_vault_functions()) == set(PUBLIC)


def test_no_service_takes_the_vault_itself() -> None:
    # the facade hands services a Context; a service reaching for the Vault (or a parameter
    # still named for it) would see its private parts again
    for info in pkgutil.walk_packages(vault.__path__, "vault."):
        if not info.name.startswith("vault.services.") or info.ispkg:
            continue
        module = importlib.import_module(info.name)
        for node in ast.walk(ast.parse(inspect.getsource(module))):  # TYPE_CHECKING blocks too
            if isinstance(node, ast.ImportFrom):
                assert node.module != "vault.api" and "Vault" not in {n.name for n in node.names}, \
                    info.name
            elif isinstance(node, ast.Import):
                assert "vault.api" not in {n.name for n in node.names}, info.name
        for name, fn in inspect.getmembers(module, inspect.isfunction):
            if fn.__module__ == module.__name__:
                assert list(inspect.signature(fn).parameters)[:1] != ["v"], f"{info.name}.{name}"


@pytest.fixture
def lab(vault_path: Path):
    clock = ManualClock(NOW)
    with Vault.init(vault_path, TEST_PASSPHRASE, clock=clock) as v:
        text = (EXAMPLES / "consent-all-granted.toml").read_text()
        pids = [v.enrol(text.replace('code = "TL-', f'code = "p{i}-', 1).encode())["participant_id"]
                for i in range(6)]
        v.add_member("omar", "analyst", ANALYST)
    return vault_path, clock, pids


def test_steward_functions_refuse_an_analyst_before_doing_anything(lab) -> None:
    path, clock, _ = lab
    functions = _vault_functions()
    with Vault.open(path, ANALYST, member="omar", clock=clock) as a:
        before = a._audit.size
        for name, who in PUBLIC.items():
            if who != "steward":
                continue
            fn = functions[name]
            params = inspect.signature(fn).parameters.values()
            args = [None for p in params if p.kind is p.POSITIONAL_OR_KEYWORD and p.default is p.empty][1:]
            kwargs = {p.name: None for p in params if p.kind is p.KEYWORD_ONLY and p.default is p.empty}
            with pytest.raises(PolicyRefusal, match="stewards only"):
                fn(a._context(), *args, **kwargs)
        assert a._audit.size - before == sum(who == "steward" for who in PUBLIC.values())


def test_ledger_writes_outside_a_transaction_are_refused(lab) -> None:
    # an analyst called the refund in autocommit: the ledger was wiped, the audit entry failed
    from vault.services import budget

    path, clock, _ = lab
    with Vault.open(path, ANALYST, member="omar", clock=clock) as a:
        for fn in (budget.refund_in_transaction, budget.charge_in_transaction):
            with pytest.raises(UsageError, match="only inside a transaction"):
                fn(a._context(), "recommender-training", ["recommender-training"], {}, export_id="x",
                   at="") \
                    if fn is budget.refund_in_transaction else \
                    fn(a._context(), "recommender-training", {}, export_id="x", at="")


def test_the_log_is_dated_by_the_vaults_clock_whatever_a_caller_passes(lab) -> None:
    path, clock, _ = lab
    with Vault.open(path, TEST_PASSPHRASE, clock=clock) as v:
        with storage.transaction(v._conn):
            v._audit.append({"actor": "steward", "action": "test.stamp", "decision": "done"},
                            "1999-01-01T00:00:00Z")
        assert v.audit_entries()[-1]["at"] == "2026-06-15T12:00:00Z"


def test_an_analysts_clock_cannot_go_back_before_the_log(lab) -> None:
    path, clock, _ = lab
    with Vault.open(path, ANALYST, member="omar", clock=clock) as a:
        a.authorize("primary-analysis", ["eeg-raw"])
        clock.set(NOW - dt.timedelta(days=1))
        with pytest.raises(Conflict, match="clock reads earlier"):
            a.authorize("primary-analysis", ["eeg-raw"])
    with pytest.raises(Conflict, match="clock reads earlier"):
        Vault.open(path, ANALYST, member="omar", clock=ManualClock(NOW - dt.timedelta(days=1))).now()
    with Vault.open(path, TEST_PASSPHRASE, clock=clock) as v:  # a steward may correct the record
        assert v.now() == NOW - dt.timedelta(days=1)


def test_only_stewards_name_participants_in_a_request(lab) -> None:
    # an analyst naming raw ids learnt which exist and which pseudonym each maps to
    path, clock, pids = lab
    with Vault.open(path, ANALYST, member="omar", clock=clock) as a:
        for call in (a.access_check, a.authorize):
            with pytest.raises(PolicyRefusal, match="stewards only"):
                call("primary-analysis", ["eeg-raw"], participants=[pids[0], "0" * 32])


def test_a_policy_swapped_into_the_file_is_refused_at_open(lab) -> None:
    # an outsider pinned a copy of the policy without DP noise for recommender training
    from vault.policy.policyset import parse_policy_json
    from vault.storage import registry

    path, clock, _ = lab
    conn = sqlite3.connect(path / "vault.db")
    version = conn.execute("SELECT value FROM meta WHERE key = 'policy_version'").fetchone()[0]
    body = json.loads(conn.execute("SELECT body FROM policy_versions WHERE version = ?",
                                   (version,)).fetchone()[0])
    body["purposes"]["recommender-training"]["dp_required"] = False
    body["purposes"]["recommender-training/canteen-menu"]["dp_required"] = False
    body["purposes"]["external-sharing"]["dp_required"] = False
    forged = parse_policy_json(json.dumps(body).encode())
    with conn:
        registry.store_policy(conn, forged, "2026-06-15T12:00:00Z")
        conn.execute("UPDATE meta SET value = ? WHERE key = 'policy_version'", (forged.version,))
    conn.close()
    for passphrase, member in ((TEST_PASSPHRASE, "steward"), (ANALYST, "omar")):
        with pytest.raises(IntegrityError, match="pinned policy set was changed"):
            Vault.open(path, passphrase, member=member, clock=clock)


def test_a_vault_without_a_policy_pin_gets_one_on_trust(lab) -> None:
    path, clock, _ = lab
    conn = sqlite3.connect(path / "vault.db")
    with conn:
        conn.execute("DELETE FROM meta WHERE key = 'policy_pin'")  # as vaults made before it
    conn.close()
    with Vault.open(path, TEST_PASSPHRASE, clock=clock) as v:
        assert v.audit_entries()[-1]["action"] == "policy.pinned"
    Vault.open(path, TEST_PASSPHRASE, clock=clock).close()


def _withdraw_recommender(v: Vault, pid: str, code: str) -> None:
    amended = (EXAMPLES / "amend-withdraw-recommender.toml").read_text()
    v.amend_consent(pid, amended.replace('code = "TL-', f'code = "{code}-', 1).encode())


@pytest.mark.parametrize("tamper", ["delete-newest", "edit-newest"])
def test_a_withdrawal_undone_in_the_file_stops_the_vault(lab, tamper: str) -> None:
    # an outsider dropped the trigger and removed (or rewrote) the newest consent version: the
    # withdrawn participant was permitted again and every check passed
    path, clock, pids = lab
    with Vault.open(path, TEST_PASSPHRASE, clock=clock) as v:
        _withdraw_recommender(v, pids[0], "p0")
    conn = sqlite3.connect(path / "vault.db")
    with conn:
        conn.execute("DROP TRIGGER consents_no_delete")
        conn.execute("DROP TRIGGER consents_no_update")
        if tamper == "delete-newest":
            conn.execute("DELETE FROM consents WHERE pid = ? AND number = 2", (pids[0],))
        else:
            body = conn.execute("SELECT body FROM consents WHERE pid = ? AND number = 2",
                                (pids[0],)).fetchone()[0]
            conn.execute("UPDATE consents SET body = ? WHERE pid = ? AND number = 2",
                         (body.replace(b'"withdrawn"', b'"given"'), pids[0]))
    conn.close()
    for passphrase, member in ((TEST_PASSPHRASE, "steward"), (ANALYST, "omar")):
        with pytest.raises(IntegrityError, match="newest consent of 1 participant"):
            Vault.open(path, passphrase, member=member, clock=clock)


def test_consent_heads_of_an_older_vault_are_tagged_on_trust(lab) -> None:
    path, clock, pids = lab
    conn = sqlite3.connect(path / "vault.db")
    with conn:
        conn.execute("UPDATE participants SET consent_tag = NULL")
    conn.close()
    with Vault.open(path, TEST_PASSPHRASE, clock=clock) as v:
        tagged = [e for e in v.audit_entries() if e["action"] == "consent.tagged"]
        assert [e["details"]["participants"] for e in tagged] == [len(pids)]
        _withdraw_recommender(v, pids[1], "p1")  # later versions are tagged as they are added
    Vault.open(path, TEST_PASSPHRASE, clock=clock).close()
