"""Rows written into the audit log without the vault's key: caught by `audit verify`, flagged
(never signed as if authentic) by the vault, which keeps working.

The attacker here can write vault.db (the sqlite3 shell) but holds no passphrase. Every write
transaction signs the current tree head over the new size, so a row beyond the latest signed
head can only have been written without the key.
"""

from __future__ import annotations

import json
import os
import sqlite3
import tempfile
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import vault
from tests.conftest import TEST_PASSPHRASE
from vault import Vault, crypto
from vault.audit import log as audit
from vault.audit.log import AuditLog, TreeHead, encode_entry, verify_inclusion_bundle, verify_log
from vault.cli.app import main
from vault.storage import db as storage

AT = "2026-12-03T10:00:00Z"


def _forge(conn: sqlite3.Connection, action: str = "consent.amend") -> int:
    """Insert a well-formed entry with its correct leaf hash at the end (no trigger stops INSERT)."""
    seq = conn.execute("SELECT COALESCE(MAX(seq) + 1, 0) FROM audit_log").fetchone()[0]
    raw = encode_entry(seq, {"actor": "steward", "action": action, "decision": "done",
                             "subjects": ["0" * 32], "at": AT})
    conn.execute("INSERT INTO audit_log (seq, entry, leaf_hash) VALUES (?, ?, ?)",
                 (seq, raw, crypto.merkle_leaf_hash(raw)))
    return seq


def _db(path: Path) -> sqlite3.Connection:
    return sqlite3.connect(path / "vault.db", isolation_level=None)


def _abandon(v: Vault) -> None:
    """Leave a session as SIGKILL would: no close, no head signed at close."""
    v._conn.close()
    os.close(v._lock_fd)
    v._closed = True


def _closed_vault(path: Path, n: int = 3) -> bytes:
    with Vault.init(path, TEST_PASSPHRASE) as v:
        for _ in range(n):
            v.new_participant()
        return v.public_key


def test_raw_insert_fails_audit_verify_naming_it(vault_path: Path, capsys) -> None:
    public = _closed_vault(vault_path)
    conn = _db(vault_path)
    seq = _forge(conn)
    conn.close()
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and report.first_bad_entry == seq
    assert f"entries {seq}..{seq} (1) are not covered" in report.problem
    assert "without the vault's key" in report.problem
    assert report.unauthenticated == [{"first": seq, "last": seq, "flagged_at": None}]
    code = main(["audit", "verify", "--vault", str(vault_path), "--key", public.hex(), "--json"])
    out = json.loads(capsys.readouterr().out)
    assert code == vault.IntegrityError.exit_code == 5 and out["ok"] is False
    assert out["first_bad_entry"] == seq


def test_an_ordinary_session_never_signs_a_forged_row_as_authentic(vault_path: Path) -> None:
    public = _closed_vault(vault_path)
    conn = _db(vault_path)
    seq = _forge(conn)
    conn.close()
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        v.new_participant()
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and report.first_bad_entry == seq


def test_open_flags_forged_rows_for_good_and_the_vault_keeps_working(vault_path: Path) -> None:
    public = _closed_vault(vault_path)
    conn = _db(vault_path)
    first = _forge(conn)
    last = _forge(conn, "access.grant")
    forged_leaves = [r[0].hex() for r in conn.execute(
        "SELECT leaf_hash FROM audit_log WHERE seq >= ? ORDER BY seq", (first,))]
    conn.close()
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        flag = v.audit_flagged
        assert flag is not None
        assert (flag["first"], flag["last"], flag["count"], flag["flagged_at"]) == (
            first, last, 2, last + 1)
        entry = v.audit_entries(last + 1, 1)[0]
        assert entry["action"] == "audit.unauthenticated" and entry["actor"] == "mindward"
        assert entry["details"]["leaf_hashes"] == forged_leaves
        pid = v.new_participant()  # the vault keeps working (a withdrawal cannot wait)
        assert not v.verify()["ok"]
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and report.first_bad_entry == first
    assert report.problem == (f"entries {first}..{last} were written without the vault's key; "
                              f"flagged at entry {last + 1}")
    # the flag itself is authentic: provable under the signed head; a new session adds no flag
    assert verify_inclusion_bundle(vault.prove(vault_path, last + 1), public)
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        assert v.audit_flagged is None
        created = [e for e in v.audit_entries(last + 2) if e["action"] == "participant.create"]
        assert [e["subjects"] for e in created] == [[pid]]
        v.sign_head()
    again = vault.verify_audit(vault_path, public_key=public)
    assert not again.ok and again.problem == report.problem  # forever


def test_the_cli_cautions_when_an_open_flags_rows(vault_path: Path, capsys, monkeypatch) -> None:
    _closed_vault(vault_path, 1)
    conn = _db(vault_path)
    seq = _forge(conn)
    conn.close()
    monkeypatch.setenv("MINDWARD_PASSPHRASE", TEST_PASSPHRASE)
    assert main(["member", "list", "--vault", str(vault_path), "--json"]) == 0
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and f"entries {seq}..{seq} were written without" in err
    assert main(["audit", "verify", "--vault", str(vault_path)]) == 5
    out = capsys.readouterr().out
    assert f"flagged at entry {seq + 1}" in out


def test_no_inclusion_proof_vouches_for_a_flagged_entry(vault_path: Path) -> None:
    """Flagged rows sit under signed heads, so those heads name them: neither `audit prove`
    nor a proof the forger builds from the leaf hashes passes the offline check."""
    from vault.audit import merkle

    public = _closed_vault(vault_path)
    conn = _db(vault_path)
    seq = _forge(conn)
    conn.close()
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        v.new_participant()
    head = TreeHead.from_dict(vault.describe(vault_path)["latest_tree_head"])
    assert head.unauthenticated == ((seq, seq),) and head.verify(public)
    with pytest.raises(vault.IntegrityError, match=f"entry {seq} was written without"):
        vault.prove(vault_path, seq)
    conn = _db(vault_path)
    raw, = conn.execute("SELECT entry FROM audit_log WHERE seq = ?", (seq,)).fetchone()
    leaves = [r[0] for r in conn.execute(
        "SELECT leaf_hash FROM audit_log WHERE seq < ? ORDER BY seq", (head.tree_size,))]
    conn.close()
    built = {"entry": raw.decode(), "leaf_index": seq, "tree_head": head.to_dict(),
             "proof": [h.hex() for h in merkle.inclusion_proof(leaves, seq)]}
    assert merkle.verify_inclusion(leaves[seq], seq, head.tree_size,
                                   merkle.inclusion_proof(leaves, seq), head.root_hash)
    assert not verify_inclusion_bundle(built, public)  # the signed head names it
    stripped = dict(built, tree_head={k: x for k, x in head.to_dict().items()
                                      if k != "unauthenticated"})
    assert not verify_inclusion_bundle(stripped, public)  # and the signature covers the list
    for other in (0, seq + 1):
        assert verify_inclusion_bundle(vault.prove(vault_path, other), public)


def test_a_withdrawal_still_gets_a_verifiable_receipt_after_a_forgery(vault_path: Path) -> None:
    """The legal deadline does not wait for the forensics: erasure and its receipt still work."""
    from vault.audit import receipt

    with Vault.init(vault_path, TEST_PASSPHRASE) as v:
        pid = v.new_participant()
        public = v.public_key
    conn = _db(vault_path)
    seq = _forge(conn)
    conn.close()
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        assert v.audit_flagged is not None
        v.withdraw_request(pid, received=v.now().date())
        result = v.withdraw_process(pid)
    assert receipt.verify_receipt(result["receipt"], public) == (True, [])
    audit_part = result["receipt"]["body"]["audit"]
    assert audit_part["leaf_index"] > seq + 1
    assert audit_part["tree_head"]["unauthenticated"] == [[seq, seq]]


def test_forged_row_during_a_session_is_flagged_before_the_next_append(vault_path: Path) -> None:
    public = _closed_vault(vault_path)
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        v.new_participant()
        conn = _db(vault_path)  # a second writer while the vault is open (WAL allows it)
        seq = _forge(conn)
        conn.close()
        v.new_participant()
        actions = [e["action"] for e in v.audit_entries(seq)]
        assert actions == ["consent.amend", "audit.unauthenticated", "participant.create"]
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and report.first_bad_entry == seq and "flagged at" in report.problem


def test_forged_row_before_close_is_flagged_not_signed(vault_path: Path) -> None:
    public = _closed_vault(vault_path)
    v = Vault.open(vault_path, TEST_PASSPHRASE)
    conn = _db(vault_path)
    seq = _forge(conn)
    conn.close()
    v.close()  # close signs a durable head: it must flag the row first
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and report.unauthenticated == [
        {"first": seq, "last": seq, "flagged_at": seq + 1}]


def test_deleting_the_newest_rows_fails_and_open_refuses(vault_path: Path) -> None:
    public = _closed_vault(vault_path)
    v = Vault.open(vault_path, TEST_PASSPHRASE)
    for _ in range(3):
        v.new_participant()
    size = v._audit.size
    _abandon(v)  # no durable head covers the last three: only the current head does
    conn = _db(vault_path)
    conn.execute("DROP TRIGGER audit_log_no_delete")
    conn.execute("DELETE FROM audit_log WHERE seq >= ?", (size - 2,))
    conn.close()
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and report.first_bad_entry == size - 2 and "removed" in report.problem
    with pytest.raises(vault.IntegrityError, match=f"entries {size - 2}..{size - 1} are missing"):
        Vault.open(vault_path, TEST_PASSPHRASE)
    assert not vault.verify_audit(vault_path, public_key=public).ok


def test_an_older_current_head_swapped_in_uncovers_rows(vault_path: Path) -> None:
    public = _closed_vault(vault_path)
    v = Vault.open(vault_path, TEST_PASSPHRASE)
    older = v._conn.execute("SELECT value FROM meta WHERE key = 'audit_head'").fetchone()[0]
    older_size = json.loads(older)["tree_size"]
    v.new_participant()
    conn = _db(vault_path)
    seq = _forge(conn)  # the forger then hides it behind the older head
    conn.execute("UPDATE meta SET value = ? WHERE key = 'audit_head'", (older,))
    conn.close()
    _abandon(v)
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and report.first_bad_entry == older_size
    assert report.unauthenticated == [{"first": older_size, "last": seq, "flagged_at": None}]
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        assert v.audit_flagged is not None and v.audit_flagged["first"] == older_size
    assert not vault.verify_audit(vault_path, public_key=public).ok


def test_removed_or_garbled_current_head_uncovers_the_session(vault_path: Path) -> None:
    public = _closed_vault(vault_path)
    v = Vault.open(vault_path, TEST_PASSPHRASE)
    v.new_participant()
    durable = v._audit.latest_head().tree_size
    _abandon(v)
    conn = _db(vault_path)
    conn.execute("UPDATE meta SET value = '{\"tree_size\": 99}' WHERE key = 'audit_head'")
    assert not vault.verify_audit(vault_path, public_key=public).ok
    conn.execute("DELETE FROM meta WHERE key = 'audit_head'")
    conn.close()
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and report.first_bad_entry == durable


def test_a_forged_flag_counts_for_nothing(vault_path: Path) -> None:
    """An unsigned row claiming to be the vault's flag for other rows is itself unauthenticated."""
    public = _closed_vault(vault_path)
    conn = _db(vault_path)
    seq = conn.execute("SELECT MAX(seq) + 1 FROM audit_log").fetchone()[0]
    raw = encode_entry(seq, {"actor": "mindward", "action": "audit.unauthenticated",
                             "details": {"first": 0, "last": 0}, "at": AT})
    conn.execute("INSERT INTO audit_log VALUES (?, ?, ?)", (seq, raw, crypto.merkle_leaf_hash(raw)))
    conn.close()
    report = vault.verify_audit(vault_path, public_key=public)
    assert report.unauthenticated == [{"first": seq, "last": seq, "flagged_at": None}]


def test_a_garbled_forged_row_is_flagged_by_its_stored_bytes(vault_path: Path) -> None:
    """A forger controls column types too: a text entry and a bogus leaf hash still get flagged."""
    public = _closed_vault(vault_path)
    conn = _db(vault_path)
    seq = conn.execute("SELECT MAX(seq) + 1 FROM audit_log").fetchone()[0]
    conn.execute("INSERT INTO audit_log VALUES (?, ?, ?)", (seq, f'{{"seq":{seq}}}', "zz"))
    conn.close()
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        flag = v.audit_flagged
        assert flag is not None and flag["first"] == seq
        assert flag["leaf_hashes"] == [crypto.merkle_leaf_hash(b'{"seq":%d}' % seq).hex()]
        v.new_participant()
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and report.first_bad_entry == seq


def test_rows_out_of_sequence_fail_verify_and_open_refuses(vault_path: Path) -> None:
    """A forged row past a gap, or below zero, cannot join the tree: verify names it, and open
    refuses (exit 5) rather than extend a log with holes."""
    public = _closed_vault(vault_path)
    conn = _db(vault_path)
    raw = encode_entry(-1, {"actor": "steward", "action": "x", "at": AT})
    conn.execute("INSERT INTO audit_log VALUES (-1, ?, ?)", (raw, crypto.merkle_leaf_hash(raw)))
    conn.close()
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and "sequence number -1" in report.problem
    conn = _db(vault_path)
    conn.execute("DROP TRIGGER audit_log_no_delete")
    conn.execute("DELETE FROM audit_log WHERE seq = -1")
    seq = conn.execute("SELECT MAX(seq) + 3 FROM audit_log").fetchone()[0]
    raw = encode_entry(seq, {"actor": "steward", "action": "x", "at": AT})
    conn.execute("INSERT INTO audit_log VALUES (?, ?, ?)", (seq, raw, crypto.merkle_leaf_hash(raw)))
    conn.close()
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and f"entry {seq - 2} is missing" in report.problem
    with pytest.raises(vault.IntegrityError, match=f"gap before entry {seq}"):
        Vault.open(vault_path, TEST_PASSPHRASE)


def test_appends_need_the_signer_and_a_transaction(fresh_vault: Vault) -> None:
    reader = AuditLog(fresh_vault._conn, fresh_vault.vault_id)
    with storage.transaction(fresh_vault._conn), pytest.raises(vault.UsageError, match="signing key"):
        reader.append({"actor": "x", "action": "y"}, AT)
    with pytest.raises(vault.UsageError, match="transaction"):
        fresh_vault._audit.append({"actor": "x", "action": "y"}, AT)
    other = crypto.SigningKey.generate()
    with storage.transaction(fresh_vault._conn), pytest.raises(vault.UsageError, match="key"):
        fresh_vault._audit.sign_head(other, AT)


def test_a_vault_in_the_layout_before_current_heads_opens_and_verifies(vault_path: Path) -> None:
    """Migration: vaults written before per-transaction heads have no `audit_head` meta row
    (everything else is unchanged); closed ones are covered by their durable head."""
    public = _closed_vault(vault_path)
    conn = _db(vault_path)
    conn.execute("DELETE FROM meta WHERE key = 'audit_head'")  # exactly the old layout
    assert conn.execute("SELECT COUNT(*) FROM meta WHERE key LIKE 'audit_%'").fetchone()[0] == 1
    conn.close()
    assert vault.verify_audit(vault_path, public_key=public).ok
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        assert v.audit_flagged is None
        v.new_participant()
        assert v._audit.current_head().tree_size == v._audit.size
    report = vault.verify_audit(vault_path, public_key=public)
    assert report.ok and not report.unauthenticated


def test_an_old_session_killed_before_close_is_flagged(vault_path: Path) -> None:
    """Old versions signed only at close: their unsigned tail cannot be told from a forgery."""
    public = _closed_vault(vault_path)
    conn = _db(vault_path)
    conn.execute("DELETE FROM meta WHERE key = 'audit_head'")
    seq = _forge(conn, "participant.create")  # what the old code appended and never signed
    conn.close()
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        assert v.audit_flagged is not None and v.audit_flagged["first"] == seq
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and f"flagged at entry {seq + 1}" in report.problem


# -- property: honest appends, rollbacks, new sessions and one forged insert anywhere ------------

_OPS = st.lists(st.one_of(
    st.tuples(st.just("append"), st.integers(1, 5)),
    st.tuples(st.just("rollback"), st.integers(1, 3)),
    st.tuples(st.just("session"), st.just(0)),
    st.tuples(st.just("durable"), st.just(0)),
), min_size=1, max_size=14)


def _fresh_log(directory: Path) -> tuple[sqlite3.Connection, crypto.SigningKey]:
    conn = storage.connect(directory)
    storage.create_schema(conn)
    with storage.transaction(conn):
        storage.set_meta(conn, "vault_id", "v" * 32)
    return conn, crypto.SigningKey.generate()


@settings(max_examples=60, deadline=None)
@given(ops=_OPS, forge_at=st.one_of(st.none(), st.integers(0, 14)))
def test_property_one_forged_insert_is_always_named(ops: list[tuple[str, int]],
                                                    forge_at: int | None) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        conn, key = _fresh_log(Path(tmp))
        log = AuditLog(conn, "v" * 32, signer=key)
        forged: int | None = None
        honest = 0
        for i, (op, n) in enumerate([*ops, ("append", 1)]):
            if i == forge_at:
                forged = _forge(conn)  # between two transactions, the log's cache still warm
            if op == "append":
                with storage.transaction(conn):
                    log.append_many([{"actor": "t", "action": "a", "n": k} for k in range(n)], AT)
                honest += n
            elif op == "rollback":
                with pytest.raises(RuntimeError), storage.transaction(conn):
                    log.append_many([{"actor": "t", "action": "r"}] * n, AT)
                    raise RuntimeError("rolled back")
            elif op == "session":
                log = AuditLog(conn, "v" * 32, signer=key)
            else:
                with storage.transaction(conn):
                    log.sign_head(key, AT)
        report = verify_log(conn, key.public_key)
        actions = [json.loads(r[0])["action"] for r in conn.execute(
            "SELECT entry FROM audit_log ORDER BY seq")]
        current = log.current_head()
        conn.close()
    assert current is not None and current.tree_size == len(actions)
    assert current.unauthenticated == (() if forged is None else ((forged, forged),))
    assert actions.count("a") == honest and "r" not in actions
    if forged is None:
        assert report.ok and not report.unauthenticated, report.problem
        assert "audit.unauthenticated" not in actions
    else:
        assert not report.ok and report.first_bad_entry == forged
        assert report.unauthenticated == [{"first": forged, "last": forged,
                                           "flagged_at": forged + 1}]
        assert actions[forged + 1] == "audit.unauthenticated"
        assert actions.count("audit.unauthenticated") == 1


def test_current_head_is_the_documented_record(fresh_vault: Vault) -> None:
    """docs/formats.md: meta `audit_head` is the canonical JSON of a signed tree head."""
    fresh_vault.new_participant()
    text = fresh_vault._conn.execute(
        "SELECT value FROM meta WHERE key = 'audit_head'").fetchone()[0]
    head = TreeHead.from_dict(json.loads(text))
    assert text.encode() == audit.canonical_json(head.to_dict())
    assert sorted(json.loads(head.body())) == ["root_hash", "signed_at", "tree_size", "vault_id"]
    assert head.tree_size == fresh_vault._audit.size and head.verify(fresh_vault.public_key)
