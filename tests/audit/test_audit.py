"""The audit log: appends, signed heads, proofs, and tampering with the triggers dropped."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import pytest

import vault
from tests.conftest import TEST_PASSPHRASE
from vault import Vault
from vault.audit.log import TreeHead, encode_entry, verify_inclusion_bundle


def _vault_with_entries(path: Path, n: int) -> tuple[bytes, list[str]]:
    with Vault.init(path, TEST_PASSPHRASE) as v:
        pids = [v.new_participant() for _ in range(n)]
        v.sign_head()
        public = v.public_key
    return public, pids


def _raw(path: Path) -> sqlite3.Connection:
    conn = sqlite3.connect(path / "vault.db", isolation_level=None)
    conn.execute("DROP TRIGGER audit_log_no_update")
    conn.execute("DROP TRIGGER audit_log_no_delete")
    return conn


def test_triggers_refuse_update_and_delete(vault_path: Path) -> None:
    _vault_with_entries(vault_path, 2)
    conn = sqlite3.connect(vault_path / "vault.db")
    for sql in ("UPDATE audit_log SET entry = x'00' WHERE seq = 1", "DELETE FROM audit_log WHERE seq = 1",
                "DELETE FROM tree_heads"):
        with pytest.raises(sqlite3.IntegrityError, match="append-only"):
            conn.execute(sql)


def test_untouched_log_verifies_with_the_key_alone(vault_path: Path) -> None:
    public, _ = _vault_with_entries(vault_path, 5)
    report = vault.verify_audit(vault_path, public_key=public)
    assert report.ok and report.entries == 6 and report.heads_checked >= 2


def test_edited_entry_is_named(vault_path: Path) -> None:
    public, _pids = _vault_with_entries(vault_path, 5)
    conn = _raw(vault_path)
    raw = conn.execute("SELECT entry FROM audit_log WHERE seq = 3").fetchone()[0]
    conn.execute("UPDATE audit_log SET entry = ? WHERE seq = 3", (raw.replace(b"done", b"undo"),))
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and report.first_bad_entry == 3 and "altered" in report.problem


def test_edited_entry_with_recomputed_leaf_fails_the_signed_head(vault_path: Path) -> None:
    from vault.crypto import merkle_leaf_hash

    public, _ = _vault_with_entries(vault_path, 5)
    conn = _raw(vault_path)
    raw = conn.execute("SELECT entry FROM audit_log WHERE seq = 4").fetchone()[0]
    forged = raw.replace(b"done", b"undo")
    conn.execute("UPDATE audit_log SET entry = ?, leaf_hash = ? WHERE seq = 4",
                 (forged, merkle_leaf_hash(forged)))
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and "do not match" in report.problem
    assert report.first_bad_entry is not None and report.first_bad_entry <= 4


def test_deleted_entry_is_named(vault_path: Path) -> None:
    public, _ = _vault_with_entries(vault_path, 5)
    _raw(vault_path).execute("DELETE FROM audit_log WHERE seq = 2")
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and report.first_bad_entry == 2 and "missing" in report.problem


def test_reordered_entries_are_named(vault_path: Path) -> None:
    public, _ = _vault_with_entries(vault_path, 5)
    conn = _raw(vault_path)
    rows = dict(conn.execute("SELECT seq, entry FROM audit_log WHERE seq IN (2, 4)").fetchall())
    leaves = dict(conn.execute("SELECT seq, leaf_hash FROM audit_log WHERE seq IN (2, 4)").fetchall())
    conn.execute("UPDATE audit_log SET entry = ?, leaf_hash = ? WHERE seq = 2", (rows[4], leaves[4]))
    conn.execute("UPDATE audit_log SET entry = ?, leaf_hash = ? WHERE seq = 4", (rows[2], leaves[2]))
    report = vault.verify_audit(vault_path, public_key=public)
    assert not report.ok and report.first_bad_entry == 2 and "out of place" in report.problem


def _current_head_text(path: Path) -> str:
    conn = sqlite3.connect(path / "vault.db")
    try:
        return conn.execute("SELECT value FROM meta WHERE key = 'audit_head'").fetchone()[0]
    finally:
        conn.close()


def test_truncation_with_heads_removed_is_caught_by_an_earlier_head(vault_path: Path) -> None:
    """Truncation to an older consistent state (rows, durable heads and a current head the
    attacker copied back then) passes on its own: only a head kept outside catches it."""
    with Vault.init(vault_path, TEST_PASSPHRASE) as v:
        for _ in range(3):
            v.new_participant()
        old_current = _current_head_text(vault_path)  # copied by the attacker at size 4
        for _ in range(2):
            v.new_participant()
        v.sign_head()
        public = v.public_key
    earlier = json.loads(json.dumps(vault.describe(vault_path)["latest_tree_head"]))
    size = earlier["tree_size"]
    assert json.loads(old_current)["tree_size"] == size - 2
    conn = _raw(vault_path)
    conn.execute("DROP TRIGGER tree_heads_no_delete")
    conn.execute("DELETE FROM audit_log WHERE seq >= ?", (size - 2,))
    conn.execute("DELETE FROM tree_heads WHERE tree_size > ?", (size - 2,))
    assert not vault.verify_audit(vault_path, public_key=public).ok  # the current head covers 6
    conn.execute("UPDATE meta SET value = ? WHERE key = 'audit_head'", (old_current,))
    assert vault.verify_audit(vault_path, public_key=public).ok  # internally consistent now
    report = vault.verify_audit(vault_path, public_key=public, trusted=[TreeHead.from_dict(earlier)])
    assert not report.ok and "removed" in report.problem


def test_rewritten_history_is_caught_by_an_earlier_head(vault_path: Path) -> None:
    """An attacker with the signing key could re-sign; an auditor's earlier head still catches it."""
    public, _ = _vault_with_entries(vault_path, 3)
    earlier = TreeHead.from_dict(vault.describe(vault_path)["latest_tree_head"])
    forged = TreeHead(earlier.vault_id, earlier.tree_size, bytes(32), earlier.signed_at, earlier.signature)
    report = vault.verify_audit(vault_path, public_key=public, trusted=[forged])
    assert not report.ok and "bad signature" in report.problem


def test_wrong_public_key_fails(vault_path: Path) -> None:
    _vault_with_entries(vault_path, 1)
    report = vault.verify_audit(vault_path, public_key=bytes(32))
    assert not report.ok and "signature" in report.problem


def test_inclusion_proofs_verify_offline_and_reject_tampering(vault_path: Path) -> None:
    public, _ = _vault_with_entries(vault_path, 9)
    for seq in range(10):
        bundle = vault.prove(vault_path, seq)
        assert verify_inclusion_bundle(bundle, public)
        assert not verify_inclusion_bundle(bundle, bytes(32))
        tampered = dict(bundle, entry=bundle["entry"].replace("steward", "stewart"))
        assert not verify_inclusion_bundle(tampered, public)
        moved = dict(bundle, leaf_index=(seq + 1) % 10)
        assert not verify_inclusion_bundle(moved, public)
    with pytest.raises(vault.NotFound):
        vault.prove(vault_path, 10)


def test_entries_hold_no_free_text_values(fresh_vault: Vault) -> None:
    pid = fresh_vault.new_participant()
    entries = fresh_vault.audit_entries()
    assert entries[-1]["subjects"] == [pid] and len(pid) == 32
    with pytest.raises(vault.UsageError):
        encode_entry(0, {"seq": 5})


def test_entry_encoding_is_canonical() -> None:
    assert encode_entry(7, {"b": 1, "a": "x"}) == b'{"seq":7,"a":"x","b":1}'
    assert encode_entry(0, {}) == b'{"seq":0}'


def test_batch_and_single_appends_build_the_rfc9162_tree(fresh_vault: Vault) -> None:
    from vault.audit import merkle
    from vault.crypto import merkle_leaf_hash
    from vault.storage import db as storage

    log = fresh_vault._audit
    with storage.transaction(fresh_vault._conn):
        for i in range(7):
            log.append({"actor": "t", "action": "single", "n": i}, "2026-01-01T00:00:00Z")
        log.append_many([{"actor": "t", "action": "batch", "n": i} for i in range(40)],
                        "2026-01-01T00:00:00Z")
    rows = fresh_vault._conn.execute("SELECT seq, entry, leaf_hash FROM audit_log ORDER BY seq").fetchall()
    assert [r[0] for r in rows] == list(range(len(rows)))
    assert all(merkle_leaf_hash(r[1]) == r[2] for r in rows)
    current = log.current_head()  # signed by the transaction itself
    assert current.root_hash == merkle.root_from_leaf_hashes([r[2] for r in rows])
    assert current.tree_size == len(rows) and current.verify(fresh_vault.public_key)
    head = fresh_vault.sign_head()
    assert head.tree_size == len(rows) and head.verify(fresh_vault.public_key)


def test_consistency_proofs_against_an_earlier_head(vault_path: Path) -> None:
    """RFC 9162 section 2.1.4: today's log extends a head an auditor kept, checked offline."""
    from vault.audit.log import verify_consistency_bundle

    public, _ = _vault_with_entries(vault_path, 3)
    earlier = TreeHead.from_dict(vault.describe(vault_path)["latest_tree_head"])
    assert vault.check_consistency(vault_path, earlier, public)["ok"]  # same size: trivially
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        for _ in range(6):
            v.new_participant()
    result = vault.check_consistency(vault_path, earlier, public)
    assert result["ok"] and result["bundle"]["proof"]
    assert not vault.check_consistency(vault_path, earlier, bytes(32))["ok"]
    bundle = result["bundle"]
    forged_proof = dict(bundle, proof=[bytes(32).hex(), *bundle["proof"][1:]])
    assert not verify_consistency_bundle(forged_proof, earlier, public)
    wrong_size = dict(bundle, old_size=earlier.tree_size + 1)
    assert not verify_consistency_bundle(wrong_size, earlier, public)
    # rewrite history below the earlier head (re-signing as a key holder could): caught
    conn = _raw(vault_path)
    conn.execute("DROP TRIGGER tree_heads_no_delete")
    raw = conn.execute("SELECT entry FROM audit_log WHERE seq = 1").fetchone()[0]
    from vault.crypto import merkle_leaf_hash

    forged = raw.replace(b"done", b"undo")
    conn.execute("UPDATE audit_log SET entry = ?, leaf_hash = ? WHERE seq = 1",
                 (forged, merkle_leaf_hash(forged)))
    conn.execute("DELETE FROM tree_heads")
    conn.close()
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        _resign(vault_path, v._signing)  # fresh heads over the rewritten log, validly signed
    assert vault.verify_audit(vault_path, public_key=public).ok  # consistent on its own terms
    assert not vault.check_consistency(vault_path, earlier, public)["ok"]


def _resign(path: Path, signing: vault.crypto.SigningKey) -> None:
    """What a key holder can do: sign the log as it now stands (durable and current head)."""
    from vault.audit import merkle

    conn = sqlite3.connect(path / "vault.db", isolation_level=None)
    leaves = [r[0] for r in conn.execute("SELECT leaf_hash FROM audit_log ORDER BY seq")]
    frontier = merkle.CompactRange()
    frontier.extend(leaves)
    vault_id = conn.execute("SELECT value FROM meta WHERE key = 'vault_id'").fetchone()[0]
    body = TreeHead(vault_id, len(leaves), frontier.root(), "2026-12-03T00:00:00Z", b"")
    head = TreeHead(**{**body.__dict__, "signature": signing.sign("tree-head", body.body())})
    conn.execute("INSERT INTO tree_heads VALUES (?, ?, ?)", (head.tree_size, head.body(),
                                                            head.signature))
    conn.execute("UPDATE meta SET value = ? WHERE key = 'audit_head'",
                 (json.dumps(head.to_dict()),))
    conn.execute("UPDATE meta SET value = ? WHERE key = 'audit_frontier'",
                 (frontier.to_bytes().hex(),))
    conn.close()


def test_consistency_reports_truncation(vault_path: Path) -> None:
    public, _ = _vault_with_entries(vault_path, 5)
    earlier = TreeHead.from_dict(vault.describe(vault_path)["latest_tree_head"])
    conn = _raw(vault_path)
    conn.execute("DROP TRIGGER tree_heads_no_delete")
    conn.execute("DELETE FROM audit_log WHERE seq >= 3")
    conn.execute("DELETE FROM tree_heads WHERE tree_size > 3")
    conn.close()
    result = vault.check_consistency(vault_path, earlier, public)
    assert not result["ok"] and "removed" in result["problem"]
