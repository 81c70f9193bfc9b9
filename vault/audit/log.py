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
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from vault import crypto
from vault.audit import merkle
from vault.errors import IntegrityError, NotFound, UsageError
from vault.formats import strictjson
from vault.storage import audit_rows
from vault.storage.db import Connection, find_meta, get_meta

HEAD_DOMAIN = "tree-head"
FLAG_ACTION = "audit.unauthenticated"
FLAG_LEAVES_LISTED = 256  # a flag lists this many leaf hashes; `range_root` commits to all
_FRONTIER_KEY = "audit_frontier"
_HEAD_KEY = "audit_head"  # the current signed head: canonical JSON of TreeHead.to_dict()
_FLAG_MARK = b'"action":"%s"' % FLAG_ACTION.encode()


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


def _stored_bytes(value: object) -> bytes:
    """A row's entry as the bytes SQLite holds (a forger may store text or numbers)."""
    if isinstance(value, bytes):
        return value
    return str(value).encode("utf-8", "surrogatepass")


Ranges = tuple[tuple[int, int], ...]


def _ranges(value: object) -> Ranges:
    """`[[first, last], ...]` as stored in a head; IntegrityError for anything else."""
    if not isinstance(value, list):
        raise IntegrityError("malformed tree head")
    out = []
    for item in value:
        if (not isinstance(item, list) or len(item) != 2
                or not all(type(x) is int and x >= 0 for x in item) or item[0] > item[1]):
            raise IntegrityError("malformed tree head")
        out.append((item[0], item[1]))
    return tuple(out)


@dataclass(frozen=True)
class TreeHead:
    vault_id: str
    tree_size: int
    root_hash: bytes
    signed_at: str
    signature: bytes
    # entries under this head that were written without the key (first, last), signed with it;
    # absent from the body when empty, so such heads keep the original four-field format
    unauthenticated: Ranges = ()

    def _fields(self) -> dict[str, Any]:
        fields: dict[str, Any] = {
            "vault_id": self.vault_id, "tree_size": self.tree_size,
            "root_hash": self.root_hash.hex(), "signed_at": self.signed_at,
        }
        if self.unauthenticated:
            fields["unauthenticated"] = [list(r) for r in self.unauthenticated]
        return fields

    def body(self) -> bytes:
        return canonical_json(self._fields())

    def verify(self, public_key: bytes) -> bool:
        return crypto.verify_signature(public_key, HEAD_DOMAIN, self.body(), self.signature)

    def vouches_for(self, seq: int) -> bool:
        """Is entry `seq` under this head and not one it names as written without the key?"""
        return 0 <= seq < self.tree_size and not any(a <= seq <= b for a, b in self.unauthenticated)

    def to_dict(self) -> dict[str, Any]:
        return {**self._fields(), "signature": self.signature.hex()}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> TreeHead:
        try:
            return cls(
                vault_id=str(d["vault_id"]), tree_size=int(d["tree_size"]),
                root_hash=bytes.fromhex(d["root_hash"]), signed_at=str(d["signed_at"]),
                signature=bytes.fromhex(d["signature"]),
                unauthenticated=_ranges(d.get("unauthenticated", [])),
            )
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
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
    # ranges written without the key: `first`, `last`, `flagged_at` (None: not yet flagged)
    unauthenticated: list[dict[str, Any]] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        return {
            "ok": self.ok, "entries": self.entries, "heads_checked": self.heads_checked,
            "first_bad_entry": self.first_bad_entry, "problem": self.problem,
            "latest_head": self.latest_head, "notes": self.notes,
            "unauthenticated": self.unauthenticated,
        }


class AuditLog:
    """Appends and proofs over one vault's log; appends join the caller's transaction.

    Every append also signs a tree head over the new size (the *current head*, one meta
    row, written with the rows in the same transaction), so after any commit a signed head
    covers every row. Rows beyond it were written without the key: before it signs
    anything, the log records them in an `audit.unauthenticated` entry, so they are
    marked for good and never signed as if authentic. Without a `signer` the log is
    read-only (proofs, entries).
    """

    def __init__(self, conn: Connection, vault_id: str,
                 signer: crypto.SigningKey | None = None,
                 stamp: Callable[[], str] | None = None) -> None:
        self.conn = conn
        self.vault_id = vault_id
        self._signer = signer
        self._stamp = stamp  # the vault's clock: when set, no caller's `at` reaches an entry
        self._cache: merkle.CompactRange | None = None  # the frontier the current head signs
        self._head_text: str | None = None  # the stored current head that frontier matches
        self._flagged: dict[str, Any] | None = None  # the flag the last reconcile wrote
        self._ranges: Ranges = ()  # the flagged ranges every new head names

    # -- state --------------------------------------------------------------------------------

    def _db_size(self) -> int:
        return audit_rows.size(self.conn)

    @property
    def size(self) -> int:
        """Rows in the log (signed or not)."""
        return self._db_size()

    def current_head(self) -> TreeHead | None:
        """The head the latest write transaction signed (not checked here)."""
        text = find_meta(self.conn, _HEAD_KEY)
        return None if text is None else TreeHead.from_dict(json.loads(text))

    def _ready(self, at: str) -> merkle.CompactRange:
        """The frontier of the whole log under the stored current head, flagging rows first.

        Cheap when nothing moved since this log last wrote (same size, same stored head);
        otherwise (first use, a rolled-back transaction, a write by anyone else) the log is
        reconciled against its signed heads.
        """
        if self._signer is None:
            raise UsageError("this audit log was opened without the vault's signing key "
                             "and cannot be appended to")
        if not self.conn.in_transaction:
            raise UsageError("audit entries are appended inside a write transaction")
        size, head_text = audit_rows.size_and_meta(self.conn, _HEAD_KEY)
        cache = self._cache
        if cache is None or cache.size != size or head_text != self._head_text:
            self._reconcile(at)
            cache = self._cache
            assert cache is not None
        return cache

    def _signed_heads(self) -> list[TreeHead]:
        """The stored current head and the latest durable head, those that verify."""
        assert self._signer is not None
        public = self._signer.public_key
        heads: list[TreeHead] = []
        for load in (self.current_head, self.latest_head):
            try:
                head = load()
            except (IntegrityError, ValueError, TypeError):
                continue
            if head is not None and head.vault_id == self.vault_id and head.verify(public):
                heads.append(head)
        return sorted(heads, key=lambda h: h.tree_size, reverse=True)

    def _stored_frontier(self) -> merkle.CompactRange | None:
        text = find_meta(self.conn, _FRONTIER_KEY)
        try:
            return None if text is None else merkle.CompactRange.from_bytes(bytes.fromhex(text))
        except (IntegrityError, ValueError):
            return None

    def _signed_prefix(self, heads: list[TreeHead]) -> tuple[merkle.CompactRange, Ranges]:
        """The frontier of the longest prefix of the log whose root a signed head vouches for,
        and the flagged ranges that head names."""
        stored = self._stored_frontier()
        for head in heads:
            if (stored is not None and stored.size == head.tree_size
                    and crypto.constant_time_equal(stored.root(), head.root_hash)):
                return stored, head.unauthenticated
        # the slow path (a tampered or legacy state): one pass over the stored leaf hashes
        by_size = {h.tree_size: h for h in heads}
        best: tuple[merkle.CompactRange, Ranges] = (merkle.CompactRange(), ())
        frontier = merkle.CompactRange()
        top = max(by_size, default=0)
        for seq, leaf in audit_rows.leaf_rows_below(self.conn, top):
            if seq != frontier.size or type(leaf) is not bytes or len(leaf) != merkle.HASH_SIZE:
                break
            frontier.append(leaf)
            head = by_size.get(frontier.size)
            if head is not None and crypto.constant_time_equal(frontier.root(), head.root_hash):
                best = (frontier.copy(), head.unauthenticated)
        return best

    def _reconcile(self, at: str) -> None:
        """Line the cache up with the signed heads; flag rows no head covers."""
        head_text = find_meta(self.conn, _HEAD_KEY)
        size = self._db_size()
        frontier, self._ranges = self._signed_prefix(self._signed_heads())
        covered = frontier.size
        if covered > size:
            raise IntegrityError(
                f"audit entries {size}..{covered - 1} are missing although a signed tree head "
                "covers them: the log was truncated; restore the vault from a backup and verify "
                "its audit log", hint="verify-audit")
        self._cache, self._head_text = frontier, head_text
        if covered == size:
            return
        # the tree commits to the rows as stored, whatever their leaf_hash column claims
        leaves = [crypto.merkle_leaf_hash(_stored_bytes(raw))
                  for raw in audit_rows.entries_from(self.conn, covered)]
        if len(leaves) != size - covered:
            raise IntegrityError(f"the audit log has a gap before entry {size - 1} (rows out of "
                                 "sequence): it cannot be extended", hint="verify-audit")
        frontier.extend(leaves)
        self._ranges = (*self._ranges, (covered, size - 1))
        flag = {"first": covered, "last": size - 1, "count": size - covered,
                "signed_size": covered, "range_root": merkle.root_from_leaf_hashes(leaves).hex(),
                "leaf_hashes": [h.hex() for h in leaves[:FLAG_LEAVES_LISTED]]}
        seq = self._write([{"actor": "mindward", "action": FLAG_ACTION, "decision": "flagged",
                            "details": flag}], at)[0]
        self._flagged = {**flag, "flagged_at": seq}

    def flag_unsigned(self, at: str) -> dict[str, Any] | None:
        """Inside a write transaction: record rows no signed head covers (see the class).

        Returns the flag just written (`first`, `last`, `count`, `flagged_at`, ...) or None
        when every row was covered. Raises IntegrityError when signed rows are missing.
        """
        self._flagged = None
        self._ready(at)  # checks signer and transaction; reconciles when anything moved
        return self._flagged

    # -- writing ------------------------------------------------------------------------------

    def append(self, fields: Mapping[str, Any], at: str) -> int:
        """Append one entry (inside an open transaction); returns its sequence number."""
        return self.append_many([fields], at)[0]

    def append_many(self, entries: Iterable[Mapping[str, Any]], at: str) -> list[int]:
        """Append entries (inside an open transaction) and sign the current head over them.

        A log with a `stamp` (the vault's) dates entries by it and ignores `at`."""
        if self._stamp is not None:
            at = self._stamp()
        self._ready(at)
        return self._write(entries, at)

    def _write(self, entries: Iterable[Mapping[str, Any]], at: str) -> list[int]:
        assert self._cache is not None and self._signer is not None
        frontier = self._cache.copy()  # a working copy
        rows: list[tuple[int, bytes, bytes]] = []
        for fields in entries:
            seq = frontier.size
            raw = encode_entry(seq, {**fields, "at": at})
            leaf = crypto.merkle_leaf_hash(raw)
            frontier.append(leaf)
            rows.append((seq, raw, leaf))
        if not rows:
            return []
        audit_rows.insert_rows(self.conn, rows)
        head = self._sign(frontier, self._signer, at)
        self._store_current(frontier, head)
        return [r[0] for r in rows]

    def _sign(self, frontier: merkle.CompactRange, key: crypto.SigningKey, at: str) -> TreeHead:
        root = frontier.root()
        body = TreeHead(self.vault_id, frontier.size, root, at, b"", self._ranges).body()
        return TreeHead(self.vault_id, frontier.size, root, at, key.sign(HEAD_DOMAIN, body),
                        self._ranges)

    def _store_current(self, frontier: merkle.CompactRange, head: TreeHead) -> None:
        text = canonical_json(head.to_dict()).decode("ascii")
        audit_rows.set_meta_pair(self.conn, (_FRONTIER_KEY, frontier.to_bytes().hex()),
                                 (_HEAD_KEY, text))
        self._cache, self._head_text = frontier, text

    def sign_head(self, key: crypto.SigningKey, at: str) -> TreeHead:
        """Sign the current tree head afresh (inside an open transaction) and keep it in the
        durable history (`tree_heads`); unsigned rows are flagged first."""
        if self._signer is None or key.public_key != self._signer.public_key:
            raise UsageError("tree heads are signed with the key this audit log was opened with")
        frontier = self._ready(at)
        head = self._sign(frontier, key, at)
        self._store_current(frontier, head)
        audit_rows.insert_tree_head(self.conn, head.tree_size, head.body(), head.signature)
        return self.latest_head() or head

    def latest_head(self) -> TreeHead | None:
        row = audit_rows.latest_tree_head(self.conn)
        return None if row is None else TreeHead.from_row(*row)

    def entries(self, start: int = 0, limit: int | None = None) -> list[dict[str, Any]]:
        return [decode_entry(raw) for raw in audit_rows.entries_from(self.conn, start, limit)]

    def _leaf_hashes(self, size: int) -> list[bytes]:
        leaves = audit_rows.leaf_hashes_below(self.conn, size)
        if len(leaves) != size:
            raise IntegrityError("the audit log is shorter than its signed tree head")
        return leaves

    def inclusion_bundle(self, seq: int) -> dict[str, Any]:
        """Entry `seq`, its inclusion proof and the signed head it is proven against."""
        head = self.latest_head()
        if head is None or seq < 0 or seq >= head.tree_size:
            raise NotFound(f"no audit entry {seq} under a signed tree head")
        if not head.vouches_for(seq):
            raise IntegrityError(f"audit entry {seq} was written without the vault's key "
                                 "(flagged): there is no proof to give")
        raw = audit_rows.entry_at(self.conn, seq)
        proof = merkle.inclusion_proof(self._leaf_hashes(head.tree_size), seq)
        return {
            "entry": _stored_bytes(raw).decode("ascii"), "leaf_index": seq,
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
    if not head.verify(public_key) or not head.vouches_for(index):
        return False
    try:
        if decode_entry(entry).get("seq") != index:
            return False
    except (ValueError, IntegrityError):
        return False
    return merkle.verify_inclusion(
        crypto.merkle_leaf_hash(entry), index, head.tree_size, proof, head.root_hash)


def _stored_current_head(conn: Connection) -> TreeHead | None:
    text = find_meta(conn, _HEAD_KEY)
    if text is None:
        return None
    try:
        return TreeHead.from_dict(json.loads(text))
    except (ValueError, TypeError, AttributeError) as exc:
        raise IntegrityError("the current tree head is malformed") from exc


def _flag_of(seq: int, raw: bytes) -> dict[str, Any] | None:
    """The range an `audit.unauthenticated` entry flags (callers test for `_FLAG_MARK` first)."""
    try:
        entry = decode_entry(raw)
    except (ValueError, IntegrityError):
        return None
    details = entry.get("details")
    if entry.get("action") != FLAG_ACTION or not isinstance(details, dict):
        return None
    try:
        return {"first": int(details["first"]), "last": int(details["last"]), "flagged_at": seq}
    except (KeyError, TypeError, ValueError):
        return {"first": None, "last": None, "flagged_at": seq}


def verify_log(conn: Connection, public_key: bytes,
               trusted: Sequence[TreeHead] = ()) -> VerifyReport:
    """Recompute every leaf and every signed root; needs no passphrase.

    The signed heads are the durable history (`tree_heads`) and the current head, which
    every write transaction signs: a row beyond every signed head was written without the
    key and fails, and so do rows the vault has flagged as such (`audit.unauthenticated`).
    `trusted` are tree heads held outside the vault (an auditor's copy): a log that no
    longer contains them, or whose prefix hashes differently, fails.
    """
    vault_id = get_meta(conn, "vault_id")
    heads = [TreeHead.from_row(b, s) for b, s in audit_rows.tree_heads(conn)]
    checks: dict[int, list[tuple[str, TreeHead]]] = {}
    for head in heads:
        checks.setdefault(head.tree_size, []).append(("signed tree head", head))
    report = VerifyReport(ok=False, entries=0, heads_checked=0)
    try:
        current = _stored_current_head(conn)
    except IntegrityError as exc:
        report.problem = str(exc)
        return report
    if current is not None:
        checks.setdefault(current.tree_size, []).append(("current tree head", current))
    for head in trusted:
        checks.setdefault(head.tree_size, []).append(("trusted tree head", head))
    for kind, head in (c for cs in checks.values() for c in cs):
        if head.vault_id != vault_id:
            report.problem = f"a {kind} belongs to another vault"
            return report
        if not head.verify(public_key):
            report.problem = f"the {kind} at size {head.tree_size} has a bad signature"
            return report
    signed = heads + ([current] if current else [])
    covered = max((h.tree_size for h in signed), default=0)

    frontier = merkle.CompactRange()
    expected = 0
    leaf_hash = crypto.merkle_leaf_hash
    pending = sorted(checks)
    next_check = pending.pop(0) if pending else -1
    last_good = 0
    flags: list[dict[str, Any]] = []

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
    mark = _FLAG_MARK
    rows = audit_rows.all_rows(conn)
    try:
        for seq, raw, stored in rows:
            if seq != expected:
                report.first_bad_entry, report.problem = expected, f"entry {expected} is missing"
                if seq < 0:
                    report.first_bad_entry = seq
                    report.problem = f"a row with sequence number {seq} lies outside the log"
                return report
            start = b'{"seq":%d,' % seq
            if not raw.startswith(start) and raw != b'{"seq":%d}' % seq:
                report.first_bad_entry, report.problem = seq, f"entry {seq} is out of place"
                return report
            leaf = leaf_hash(raw)
            if leaf != stored:
                report.first_bad_entry, report.problem = seq, f"entry {seq} was altered"
                return report
            # the vault writes flags with "action" as the first key after seq (keys sorted)
            if raw.startswith(mark, len(start)) and (flag := _flag_of(seq, raw)) is not None:
                flags.append(flag)
            frontier.append(leaf)
            expected += 1
            if expected == next_check:
                if (problem := check_heads()) is not None:
                    report.first_bad_entry, report.problem = last_good, problem
                    return report
                last_good = expected
                next_check = pending.pop(0) if pending else -1
    except TypeError:  # an entry or leaf stored as text or a number: not what the vault wrote
        report.first_bad_entry, report.problem = expected, f"entry {expected} was altered"
        return report
    report.entries = expected
    if next_check != -1:
        report.first_bad_entry = expected
        report.problem = (f"the log has {expected} entries but a tree head covers {next_check}: "
                          "entries were removed")
        return report
    report.latest_head = max(signed, key=lambda h: h.tree_size).to_dict() if signed else None
    # a flag only counts under a signed head; one beyond them is itself unauthenticated
    flags = [f for f in flags if f["flagged_at"] < covered]
    for f in flags:
        if f["first"] is not None and not 0 <= f["first"] <= f["last"] < f["flagged_at"]:
            f["first"] = f["last"] = None
    if expected > covered:
        flags.append({"first": covered, "last": expected - 1, "flagged_at": None})
    report.unauthenticated = flags
    if flags:
        first = flags[0]
        report.first_bad_entry = first["first"] if first["first"] is not None else first["flagged_at"]
        report.problem = _describe_unauthenticated(first)
        if len(flags) > 1:
            report.problem += f" (and {len(flags) - 1} more such range(s): see 'unauthenticated')"
        return report
    if not signed:
        report.notes.append("no signed tree head yet")
    report.ok = True
    return report


def _describe_unauthenticated(flag: Mapping[str, Any]) -> str:
    first, last, at = flag["first"], flag["last"], flag["flagged_at"]
    if at is None:
        return (f"entries {first}..{last} ({last - first + 1}) are not covered by any signed "
                "tree head: they were written without the vault's key (or the current head "
                "was removed, or a mindward older than per-transaction heads was killed before "
                "it closed)")
    if first is None:
        return f"entry {at} flags entries written without the vault's key but is malformed"
    return f"entries {first}..{last} were written without the vault's key; flagged at entry {at}"
