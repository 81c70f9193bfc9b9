"""The append-only, tamper-evident audit log.

Entries are canonical JSON (docs/formats.md): `{"seq":N,` first, then the other
fields with sorted keys, ASCII only. Leaf hashes and tree hashes follow RFC
9162 section 2.1. Tree heads are signed with the vault's Ed25519 key. SQLite
triggers refuse UPDATE and DELETE on the log (defence in depth); the Merkle
checks are the guarantee. Entries carry actor, action, purpose, random
participant ids, decision and reasons, never names or data values.
"""

from __future__ import annotations

import json
import sqlite3
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from vault import crypto, merkle, strictjson
from vault.errors import IntegrityError, NotFound, UsageError
from vault.storage import get_meta, set_meta

HEAD_DOMAIN = "tree-head"
_FRONTIER_KEY = "audit_frontier"


def canonical_json(value: Any) -> bytes:
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=True).encode()


def encode_entry(seq: int, fields: Mapping[str, Any]) -> bytes:
    if "seq" in fields:
        raise UsageError("audit fields may not set 'seq'")
    body = canonical_json(dict(fields))
    return b'{"seq":%d' % seq + (b"," + body[1:] if len(body) > 2 else b"}")


def decode_entry(raw: bytes) -> dict[str, Any]:
    value = strictjson.loads(raw)  # a duplicated key in an entry is refused (ValueError)
    if not isinstance(value, dict):
        raise IntegrityError("an audit entry is not a JSON object")
    return value


@dataclass(frozen=True)
class TreeHead:
    vault_id: str
    tree_size: int
    root_hash: bytes
    signed_at: str
    signature: bytes

    def body(self) -> bytes:
        return canonical_json({
            "vault_id": self.vault_id, "tree_size": self.tree_size,
            "root_hash": self.root_hash.hex(), "signed_at": self.signed_at,
        })

    def verify(self, public_key: bytes) -> bool:
        return crypto.verify_signature(public_key, HEAD_DOMAIN, self.body(), self.signature)

    def to_dict(self) -> dict[str, Any]:
        return {
            "vault_id": self.vault_id, "tree_size": self.tree_size,
            "root_hash": self.root_hash.hex(), "signed_at": self.signed_at,
            "signature": self.signature.hex(),
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> TreeHead:
        try:
            return cls(
                vault_id=str(d["vault_id"]), tree_size=int(d["tree_size"]),
                root_hash=bytes.fromhex(d["root_hash"]), signed_at=str(d["signed_at"]),
                signature=bytes.fromhex(d["signature"]),
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise IntegrityError("malformed tree head") from exc

    @classmethod
    def from_row(cls, body: bytes, signature: bytes) -> TreeHead:
        return cls.from_dict({**json.loads(body), "signature": signature.hex()})


@dataclass
class VerifyReport:
    ok: bool
    entries: int
    heads_checked: int
    first_bad_entry: int | None = None
    problem: str | None = None
    latest_head: dict[str, Any] | None = None
    notes: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        return {
            "ok": self.ok, "entries": self.entries, "heads_checked": self.heads_checked,
            "first_bad_entry": self.first_bad_entry, "problem": self.problem,
            "latest_head": self.latest_head, "notes": self.notes,
        }


class AuditLog:
    """Appends and proofs over one vault's log; appends join the caller's transaction."""

    def __init__(self, conn: sqlite3.Connection, vault_id: str) -> None:
        self.conn = conn
        self.vault_id = vault_id
        self._cache: merkle.CompactRange | None = None

    def _frontier(self) -> merkle.CompactRange:
        """The tree's frontier: cached in memory, checked against the log's length.

        It is persisted with every signed head; entries appended since then are
        folded in from their stored leaf hashes, so a rolled-back or crashed
        transaction can never leave the cache ahead of the log.
        """
        row = self.conn.execute("SELECT MAX(seq) FROM audit_log").fetchone()
        size = 0 if row[0] is None else row[0] + 1
        if self._cache is None or self._cache.size != size:
            self._cache = self._rebuild(size)
        return self._cache

    def _rebuild(self, size: int) -> merkle.CompactRange:
        row = self.conn.execute("SELECT value FROM meta WHERE key = ?", (_FRONTIER_KEY,)).fetchone()
        frontier = merkle.CompactRange()
        if row is not None:
            frontier = merkle.CompactRange.from_bytes(bytes.fromhex(row[0]))
        if frontier.size > size:
            raise IntegrityError("the audit log is shorter than its recorded frontier")
        tail = [r[0] for r in self.conn.execute(
            "SELECT leaf_hash FROM audit_log WHERE seq >= ? ORDER BY seq", (frontier.size,))]
        frontier.extend(tail)
        if frontier.size != size:
            raise IntegrityError("the audit log has gaps")
        return frontier

    @property
    def size(self) -> int:
        return self._frontier().size

    def append(self, fields: Mapping[str, Any], at: str) -> int:
        """Append one entry (inside an open transaction); returns its sequence number."""
        return self.append_many([fields], at)[0]

    def append_many(self, entries: Iterable[Mapping[str, Any]], at: str) -> list[int]:
        frontier = merkle.CompactRange.from_bytes(self._frontier().to_bytes())  # a working copy
        rows: list[tuple[int, bytes, bytes]] = []
        for fields in entries:
            seq = frontier.size
            raw = encode_entry(seq, {**fields, "at": at})
            leaf = crypto.merkle_leaf_hash(raw)
            frontier.append(leaf)
            rows.append((seq, raw, leaf))
        self.conn.executemany(
            "INSERT INTO audit_log (seq, entry, leaf_hash) VALUES (?, ?, ?)", rows
        )
        self._cache = frontier  # re-checked against the log's length on next use
        return [r[0] for r in rows]

    def sign_head(self, key: crypto.SigningKey, at: str) -> TreeHead:
        """Sign the current tree head (inside an open transaction) and store it."""
        frontier = self._frontier()
        set_meta(self.conn, _FRONTIER_KEY, frontier.to_bytes().hex())
        unsigned = TreeHead(self.vault_id, frontier.size, frontier.root(), at, b"")
        head = TreeHead(**{**unsigned.__dict__, "signature": key.sign(HEAD_DOMAIN, unsigned.body())})
        self.conn.execute(
            "INSERT OR IGNORE INTO tree_heads (tree_size, body, signature) VALUES (?, ?, ?)",
            (head.tree_size, head.body(), head.signature),
        )
        return self.latest_head() or head

    def latest_head(self) -> TreeHead | None:
        row = self.conn.execute(
            "SELECT body, signature FROM tree_heads ORDER BY tree_size DESC LIMIT 1"
        ).fetchone()
        return None if row is None else TreeHead.from_row(row[0], row[1])

    def entries(self, start: int = 0, limit: int | None = None) -> list[dict[str, Any]]:
        rows = self.conn.execute(
            "SELECT entry FROM audit_log WHERE seq >= ? ORDER BY seq LIMIT ?",
            (start, -1 if limit is None else limit),
        )
        return [decode_entry(r[0]) for r in rows]

    def _leaf_hashes(self, size: int) -> list[bytes]:
        rows = self.conn.execute(
            "SELECT leaf_hash FROM audit_log WHERE seq < ? ORDER BY seq", (size,)
        ).fetchall()
        if len(rows) != size:
            raise IntegrityError("the audit log is shorter than its signed tree head")
        return [r[0] for r in rows]

    def inclusion_bundle(self, seq: int) -> dict[str, Any]:
        """Entry `seq`, its inclusion proof and the signed head it is proven against."""
        head = self.latest_head()
        if head is None or seq < 0 or seq >= head.tree_size:
            raise NotFound(f"no audit entry {seq} under a signed tree head")
        row = self.conn.execute("SELECT entry FROM audit_log WHERE seq = ?", (seq,)).fetchone()
        proof = merkle.inclusion_proof(self._leaf_hashes(head.tree_size), seq)
        return {
            "entry": row[0].decode("ascii"), "leaf_index": seq,
            "proof": [p.hex() for p in proof], "tree_head": head.to_dict(),
        }

    def consistency_bundle(self, old_size: int) -> dict[str, Any]:
        head = self.latest_head()
        if head is None or not 0 < old_size <= head.tree_size:
            raise NotFound(f"no signed tree head to prove size {old_size} against")
        proof = ([] if old_size == head.tree_size else
                 merkle.consistency_proof(self._leaf_hashes(head.tree_size), old_size, head.tree_size))
        return {"old_size": old_size, "proof": [p.hex() for p in proof], "tree_head": head.to_dict()}


def verify_consistency_bundle(bundle: Mapping[str, Any], earlier: TreeHead,
                              public_key: bytes) -> bool:
    """Offline: the log under the bundle's signed head extends the `earlier` signed head
    (RFC 9162 section 2.1.4.2), so nothing before it was rewritten or removed."""
    try:
        head = TreeHead.from_dict(bundle["tree_head"])
        proof = [bytes.fromhex(p) for p in bundle["proof"]]
        old_size = int(bundle["old_size"])
    except (KeyError, TypeError, ValueError, IntegrityError):
        return False
    if not (earlier.verify(public_key) and head.verify(public_key)):
        return False
    if earlier.vault_id != head.vault_id or old_size != earlier.tree_size:
        return False
    if old_size == head.tree_size:
        return crypto.constant_time_equal(earlier.root_hash, head.root_hash) and not proof
    return merkle.verify_consistency(old_size, head.tree_size, earlier.root_hash, head.root_hash,
                                     proof)


def verify_inclusion_bundle(bundle: Mapping[str, Any], public_key: bytes) -> bool:
    """Offline check of an `inclusion_bundle` with the vault's public key alone."""
    try:
        head = TreeHead.from_dict(bundle["tree_head"])
        entry = str(bundle["entry"]).encode("ascii")
        proof = [bytes.fromhex(p) for p in bundle["proof"]]
        index = int(bundle["leaf_index"])
    except (KeyError, TypeError, ValueError, UnicodeEncodeError, IntegrityError):
        return False
    if not head.verify(public_key):
        return False
    try:
        if decode_entry(entry).get("seq") != index:
            return False
    except (ValueError, IntegrityError):
        return False
    return merkle.verify_inclusion(
        crypto.merkle_leaf_hash(entry), index, head.tree_size, proof, head.root_hash)


def verify_log(conn: sqlite3.Connection, public_key: bytes,
               trusted: Sequence[TreeHead] = ()) -> VerifyReport:
    """Recompute every leaf and every signed root; needs no passphrase.

    `trusted` are tree heads held outside the vault (an auditor's copy): a log
    that no longer contains them, or whose prefix hashes differently, fails.
    """
    vault_id = get_meta(conn, "vault_id")
    heads = [TreeHead.from_row(b, s) for b, s in conn.execute(
        "SELECT body, signature FROM tree_heads ORDER BY tree_size")]
    checks: dict[int, list[tuple[str, TreeHead]]] = {}
    for head in heads:
        checks.setdefault(head.tree_size, []).append(("signed tree head", head))
    for head in trusted:
        checks.setdefault(head.tree_size, []).append(("trusted tree head", head))
    report = VerifyReport(ok=False, entries=0, heads_checked=0)
    for kind, head in (c for cs in checks.values() for c in cs):
        if head.vault_id != vault_id:
            report.problem = f"a {kind} belongs to another vault"
            return report
        if not head.verify(public_key):
            report.problem = f"the {kind} at size {head.tree_size} has a bad signature"
            return report

    frontier = merkle.CompactRange()
    expected = 0
    leaf_hash = crypto.merkle_leaf_hash
    pending = sorted(checks)
    next_check = pending.pop(0) if pending else -1
    last_good = 0

    def check_heads() -> str | None:
        root = frontier.root()
        for kind, head in checks[frontier.size]:
            if not crypto.constant_time_equal(root, head.root_hash):
                return (f"entries {last_good}..{frontier.size - 1} do not match the {kind} "
                        f"of size {frontier.size}")
            report.heads_checked += 1
        return None

    if next_check == 0:
        if (problem := check_heads()) is not None:
            report.problem = problem
            return report
        next_check = pending.pop(0) if pending else -1
    for seq, raw, stored in conn.execute("SELECT seq, entry, leaf_hash FROM audit_log ORDER BY seq"):
        if seq != expected:
            report.first_bad_entry, report.problem = expected, f"entry {expected} is missing"
            return report
        if not raw.startswith(b'{"seq":%d,' % seq) and raw != b'{"seq":%d}' % seq:
            report.first_bad_entry, report.problem = seq, f"entry {seq} is out of place"
            return report
        leaf = leaf_hash(raw)
        if leaf != stored:
            report.first_bad_entry, report.problem = seq, f"entry {seq} was altered"
            return report
        frontier.append(leaf)
        expected += 1
        if expected == next_check:
            if (problem := check_heads()) is not None:
                report.first_bad_entry, report.problem = last_good, problem
                return report
            last_good = expected
            next_check = pending.pop(0) if pending else -1
    report.entries = expected
    if next_check != -1:
        report.first_bad_entry = expected
        report.problem = (f"the log has {expected} entries but a tree head covers {next_check}: "
                          "entries were removed")
        return report
    if heads and heads[-1].tree_size < expected:
        report.notes.append(
            f"{expected - heads[-1].tree_size} newest entries are not yet under a signed head")
    if not heads:
        report.notes.append("no signed tree head yet")
    report.latest_head = heads[-1].to_dict() if heads else None
    report.ok = True
    return report
