"""The door and the context as an attacker inside the package would try them: with public
names only (no private attribute), every route to plaintext still takes this vault's grant."""

from __future__ import annotations

import dataclasses
import datetime as dt
import pickle
import sqlite3

import pytest

from tests.clock import at
from tests.conftest import ROOT
from vault import NotFound, PolicyRefusal, UsageError, Vault
from vault.policy.decide import Request
from vault.policy.engine import PolicyEngine
from vault.storage import db as storage
from vault.storage import registry

EXAMPLES = ROOT / "docs" / "examples"
NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
SECRET = b"EEG-OF-THE-PARTICIPANT" * 50
PURPOSE = "method-development"  # a minimum cohort of one


@pytest.fixture
def stored(fresh_vault: Vault) -> tuple[Vault, str, str]:
    v = at(fresh_vault, NOW)
    form = (EXAMPLES / "consent-all-granted.toml").read_bytes()
    pid = v.enrol(form)["participant_id"]
    return v, pid, v.put_blob(pid, "eeg-raw", [SECRET]).blob_id


def test_a_grant_from_an_engine_a_caller_built_opens_nothing(stored) -> None:
    # a planted module builds its own engine (real consent, audit thrown away) and mints a grant
    # that would pass every live check: the door asks the vault's engine, which never issued it
    v, pid, blob = stored
    ctx = v._context()  # what every service holds; from here on only public names
    own = PolicyEngine(ctx.policy, lambda pids: registry.latest_consents(ctx.conn, pids),
                       lambda entries: None, ctx.now)
    grant = own.authorize(Request(actor="steward", role="steward", purpose=PURPOSE,
                                  categories=frozenset({"eeg-raw"}), cohort=False))
    assert pid in grant.participants  # the grant itself is genuine, for its own engine
    before = ctx.audit.size
    for route in (lambda: ctx.door.read(grant, [blob], for_noise=False),
                  lambda: list(ctx.read_for_release(grant, [blob])),
                  lambda: list(v.read_blobs(grant, [blob]))):
        with pytest.raises(PolicyRefusal, match="not issued by this vault session"):
            route()
    forged = dataclasses.replace(ctx, engine=own)  # a context carrying the caller's engine
    with pytest.raises(PolicyRefusal, match="not issued by this vault session"):
        list(forged.read_for_release(grant, [blob]))
    assert ctx.audit.size == before  # nothing was read, so nothing to record


def test_the_door_binds_to_its_vault_once(stored) -> None:
    v, _, _ = stored
    ctx = v._context()
    own = PolicyEngine(ctx.policy, lambda pids: {}, lambda entries: None, ctx.now)
    with pytest.raises(UsageError, match="bound to its vault already"):
        ctx.door.attach(lambda: own, lambda entries: None)


def test_the_vaults_own_grant_reads_and_is_audited(stored) -> None:
    v, pid, blob = stored
    ctx = v._context()
    grant = ctx.authorize_release(PURPOSE, ["eeg-raw"], cohort=False)
    before = ctx.audit.size
    ((blob_id, who, chunks),) = ctx.door.read(grant, [blob], for_noise=False)
    assert (blob_id, who, b"".join(chunks)) == (blob, pid, SECRET)
    assert ctx.audit.size == before + 1
    assert v.audit_entries()[-1]["action"] == "access.read"


def test_shred_is_the_cryptographic_erase(stored) -> None:
    v, pid, blob = stored
    ctx = v._context()
    assert ctx.door.readable(pid)
    grant = ctx.authorize_release(PURPOSE, ["eeg-raw"], cohort=False)
    with storage.transaction(ctx.conn):
        ctx.door.shred(pid, "2026-06-15T12:00:00Z")
    assert not ctx.door.readable(pid)
    row = ctx.conn.execute("SELECT wrapped_key, date_offset, lab_code_tag, erased_at FROM participants "
                           "WHERE pid = ?", (pid,)).fetchone()
    assert row == (None, None, None, "2026-06-15T12:00:00Z")
    with pytest.raises((PolicyRefusal, NotFound)):  # a grant from before the erase opens nothing
        ctx.door.read(grant, [blob], for_noise=False)
    with pytest.raises(NotFound):
        ctx.door.write_blob(pid, "eeg-raw", [b"more"])


def test_the_context_and_the_door_do_not_travel(stored) -> None:
    v, _, _ = stored
    ctx = v._context()
    with pytest.raises(dataclasses.FrozenInstanceError):
        ctx.role = "steward"  # type: ignore[misc]
    for thing in (ctx, ctx.door):
        with pytest.raises(TypeError, match="not serialisable"):
            pickle.dumps(thing)
    shown = repr(ctx)
    assert "Connection" not in shown and "Door" not in shown and "SigningKey" not in shown


def test_an_analysts_context_refuses_steward_work_audited(stored, vault_path) -> None:
    v, _, _ = stored
    v.add_member("omar", "analyst", "analyst passphrase long enough")
    v.close()
    with Vault.open(vault_path, "analyst passphrase long enough", member="omar",
                    clock=v._clock) as a:
        ctx = a._context()
        before = ctx.audit.size
        with pytest.raises(PolicyRefusal, match="stewards only"):
            ctx.require_steward("test.steward")
        assert ctx.audit.size == before + 1
        with pytest.raises(PolicyRefusal, match="stewards only"):
            a.readable("0" * 32)
    conn = sqlite3.connect(vault_path / "vault.db")
    actions = [bytes(r[0]).decode() for r in conn.execute("SELECT entry FROM audit_log ORDER BY seq")]
    conn.close()
    assert any('"test.steward"' in e and '"refuse"' in e for e in actions)
