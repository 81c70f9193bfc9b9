"""Withdrawal, erasure, deletion receipts, recall and retention sweeps.

Outside sources:
- Ed25519 (RFC 8032): receipt signatures are re-checked with the `cryptography` package
  directly, over the message built as docs/formats.md states it (no project code).
- RFC 9162 section 2.1.3.2: the receipt's inclusion proof is re-checked with the
  verification algorithm transcribed below from the RFC (from memory of its text),
  using hashlib; it shares no code with vault.audit.merkle.
- RFC 3394 (AES key wrap): "no key material remains" is checked by trying every 40-byte
  window of the database under the participant's key-wrapping key with the `cryptography`
  package's own unwrap: a wrapped data key would be found wherever it survived.
- SQLite's own reader (sqlite3 module) counts rows independently of the vault's code.
"""

from __future__ import annotations

import copy
import datetime as dt
import hashlib
import json
import os
import random
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pyedflib
import pytest
from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey
from cryptography.hazmat.primitives.keywrap import InvalidUnwrap, aes_key_unwrap
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.clock import ManualClock, at, ctx_at
from tests.conftest import ROOT, TEST_PASSPHRASE, assert_absent, files_of
from vault import Conflict, InvalidInput, NotFound, PolicyRefusal, UsageError, Vault, crypto, verify_audit
from vault.audit import receipt
from vault.services import exports, withdraw
from vault.storage import registry

EXAMPLES = ROOT / "docs" / "examples"
PYEDFLIB_DATA = Path(pyedflib.__file__).parent / "tests" / "data"
NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
RECEIVED = dt.date(2026, 6, 10)
ENTERED = dt.datetime(2026, 5, 1, 9, 0, tzinfo=dt.UTC)  # before the expired form lapsed: it can be entered
RECIPIENT = "Westbrook Institute of Food Design"  # the invented partner of the default policy
# The withdrawing participant (invented, like every person in the examples).
T_NAME, T_MAIL, T_PHONE, T_CODE = (b"Odalys Fernhollow", b"odalys.fernhollow@mail.northfield.example",
                                   b"+44 7700 900777", b"TQ-417")
MARKER = b"PLAINTEXT-MARKER-OF-THE-WITHDRAWN-PARTICIPANT"


# --------------------------------------------------------------------------- the lab


def _form(name: str, code: str, *, person: tuple[bytes, bytes, bytes] | None = None) -> bytes:
    text = (EXAMPLES / name).read_text().replace('code = "TL-', f'code = "{code}-', 1)
    if person is not None:
        lines = []
        for line in text.splitlines():
            key = line.split("=")[0].strip()
            value = {"name": person[0], "email": person[1], "phone": person[2]}.get(key)
            lines.append(f'{key} = "{value.decode()}"' if value is not None else line)
        text = "\n".join(lines) + "\n"
    return text.encode()


def _grant_blobs(v: Vault, pid: str) -> dict[str, bytes]:
    """Plaintext of every eeg-raw blob of `pid`, read through the one door."""
    grant = ctx_at(v, NOW).authorize_release("method-development", ["eeg-raw"], cohort=False,
                        participants=(pid,))
    return {b["blob_id"]: b"".join(at(v, NOW).read_blob(grant, b["blob_id"]))
            for b in v.blobs(pid) if b["kind"] == "eeg-raw"}


def _export(v: Vault, purpose: str, categories: list[str], members: list[str], **options: Any
            ) -> dict[str, Any]:
    grant = ctx_at(v, NOW).authorize_release(purpose, categories, **options)
    chosen = [p for p in members if p in grant.participants]
    return exports.sign_and_record(ctx_at(v, NOW), export_id=exports.new_export_id(), kind="aggregate",
                                   grant=grant, members=exports.pseudonyms(v._context(), purpose, chosen),
                                   body={})


def _build_lab(path: Path) -> dict[str, Any]:
    """22 invented participants, one of them (T) with a recording, blobs, scores and exports."""
    with Vault.init(path, TEST_PASSPHRASE, clock=ManualClock(NOW)) as v:
        t = at(v, NOW).enrol(_form("consent-all-granted.toml", T_CODE.decode(),
                          person=(T_NAME, T_MAIL, T_PHONE)))["participant_id"]
        others = [at(v, NOW).enrol(_form("consent-all-granted.toml", f"P{i:02d}",
                                person=(b"Maren Ashcombe%d" % i, b"m%d@mail.northfield.example" % i,
                                        b"+44 7700 9001%02d" % i)))["participant_id"]
                  for i in range(20)]
        no_rec = at(v, NOW).enrol(_form("consent-no-recommender.toml", "NR"))["participant_id"]
        expired = at(v, ENTERED).enrol(_form("consent-expired.toml", "EX"))["participant_id"]
        at(v, NOW).ingest_eeg(t, PYEDFLIB_DATA / "test_subsecond.edf")
        at(v, NOW).put_blob(t, "eeg-raw", [MARKER * 300, os.urandom(20000), MARKER])
        for pid in [*others, no_rec, expired]:
            at(v, NOW).put_blob(pid, "eeg-raw", [f"EEG-OF-{pid}".encode() * 50])
        csv = path.parent / f"{path.name}-scores.csv"
        for kind, values in (("derived", ("0.25", "-0.5")), ("explicit", ("3", "1"))):
            csv.write_text("participant_id,item_id,value\n" + "".join(
                f"{p},dish-{i:02d},{values[i % 2]}\n" for p in (t, others[0]) for i in range(4)))
            at(v, NOW).ingest_scores(csv, kind)
        csv.unlink()
        internal = _export(v, "primary-analysis", ["eeg-raw"], [t, *others])
        shared = _export(v, "external-sharing", ["scores-derived"], [t, *others, no_rec],
                         export=True, epsilon=0.5, recipient=RECIPIENT,
                         affordable=dict.fromkeys([t, *others, no_rec], True))
        without_t = _export(v, "primary-analysis", ["eeg-raw"], others)
    return {"t": t, "others": others, "no_rec": no_rec, "expired": expired,
            "manifests": {"internal": internal, "shared": shared, "without_t": without_t}}


@pytest.fixture(scope="module")
def template(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, Any]]:
    path = tmp_path_factory.mktemp("template") / "vault"
    return path, _build_lab(path)


@pytest.fixture
def lab(template, tmp_path: Path):
    source, facts = template
    path = tmp_path / "vault"
    shutil.copytree(source, path)
    v = Vault.open(path, TEST_PASSPHRASE, clock=ManualClock(NOW))
    yield v, facts
    at(v, NOW).close()


def _withdraw(v: Vault, pid: str, scope: str = "full", *, now: dt.datetime = NOW) -> dict[str, Any]:
    withdraw.request_withdrawal(ctx_at(v, now), pid, received=RECEIVED, scope=scope)
    return withdraw.process(ctx_at(v, now), pid)


# --------------------------------------------------------------------------- outside checks


def _rfc9162_inclusion_ok(leaf: bytes, index: int, size: int, path: list[bytes], root: bytes) -> bool:
    """RFC 9162 section 2.1.3.2, step by step (transcribed from memory of the RFC)."""
    if index >= size:
        return False
    fn, sn, r = index, size - 1, leaf
    for p in path:
        if sn == 0:
            return False
        if fn & 1 or fn == sn:
            r = hashlib.sha256(b"\x01" + p + r).digest()
            if not fn & 1:
                while not fn & 1 and fn != 0:
                    fn >>= 1
                    sn >>= 1
        else:
            r = hashlib.sha256(b"\x01" + r + p).digest()
        fn >>= 1
        sn >>= 1
    return sn == 0 and r == root


def _independent_signature_ok(document: dict[str, Any], public_key: bytes) -> bool:
    """Ed25519 over "mindward/v1/signature/" domain 0x00 canonical-JSON(body) (docs/formats.md)."""
    body = json.dumps(document["body"], sort_keys=True, separators=(",", ":"),
                      ensure_ascii=True).encode()
    message = b"mindward/v1/signature/" + document["domain"].encode() + b"\x00" + body
    try:
        Ed25519PublicKey.from_public_bytes(public_key).verify(bytes.fromhex(document["signature"]),
                                                              message)
    except InvalidSignature:
        return False
    return True


def _unwrappable_windows(data: bytes, kek: bytes) -> int:
    """How many 40-byte windows of `data` are an RFC 3394 wrap of some key under `kek`."""
    found = 0
    for i in range(len(data) - 39):
        try:
            aes_key_unwrap(kek, data[i : i + 40])
            found += 1
        except InvalidUnwrap:
            pass
    return found


def _raw_count(path: Path, sql: str, *args: object) -> int:
    conn = sqlite3.connect(f"file:{path / 'vault.db'}?mode=ro", uri=True)
    try:
        return int(conn.execute(sql, args).fetchone()[0])
    finally:
        conn.close()


# --------------------------------------------------------------------------- erasure


def test_full_withdrawal_leaves_no_trace_in_any_byte(lab, tmp_path: Path) -> None:
    v, facts = lab
    t = facts["t"]
    path = v.path
    old_ring = v._door._ring
    old_wrapped = v._conn.execute("SELECT wrapped_key FROM participants WHERE pid = ?", (t,)).fetchone()[0]
    at(v, NOW).rekey("a new passphrase, long enough")  # leaves an older wrap in freed space
    row = v._conn.execute("SELECT wrapped_key, date_offset, lab_code_tag FROM participants "
                          "WHERE pid = ?", (t,)).fetchone()
    wrapped, offset, tag = row
    data_key = v._door._ring.participant_key(v._conn, t)
    item_tags = [r[0].encode() for r in v._conn.execute(
        "SELECT item_tag FROM score_items WHERE pid = ?", (t,))]
    blob_files = [v._door._blobs.path(b["blob_id"]) for b in v.blobs(t)]
    snippets = []
    for f in blob_files:
        raw = f.read_bytes()
        snippets += [raw[:56], raw[len(raw) // 2 : len(raw) // 2 + 48]]
    assert offset is not None and tag and item_tags and len(blob_files) >= 3
    assert any(wrapped in f.read_bytes() for f in files_of(path)), "the test would prove nothing"
    assert any(MARKER in chunk for chunk in _grant_blobs(v, t).values())
    needles = [old_wrapped, wrapped, data_key, offset, tag.encode(), *item_tags, *snippets,
               MARKER, T_NAME, T_MAIL, T_PHONE, T_CODE]

    result = _withdraw(v, t)
    assert result["data_key_destroyed"] and result["wal_truncated"]
    assert not any(f.exists() for f in blob_files)
    assert_absent(path, *needles)  # while open: DB, WAL, SHM, blobs, tmp
    kek_now, kek_before = v._door._ring._participant_kek(t), old_ring._participant_kek(t)
    at(v, NOW).close()
    assert_absent(path, *needles)
    db = (path / "vault.db").read_bytes()
    assert _unwrappable_windows(db, kek_now) == 0 and _unwrappable_windows(db, kek_before) == 0

    with Vault.open(path, "a new passphrase, long enough", clock=ManualClock(NOW)) as again:
        with pytest.raises(NotFound, match="erased"):
            again._door._ring.participant_key(again._conn, t)
        assert again.blobs(t) == []
        grant = at(again, NOW).authorize("primary-analysis", ["eeg-raw"])
        assert t not in grant.participants
    assert _raw_count(path, "SELECT COUNT(*) FROM participants WHERE pid = ? AND wrapped_key IS NULL "
                      "AND date_offset IS NULL AND lab_code_tag IS NULL AND erased_at IS NOT NULL", t) == 1
    for table in ("blobs", "recordings", "score_batches", "score_items", "budget_ledger"):
        assert _raw_count(path, f"SELECT COUNT(*) FROM {table} WHERE pid = ?", t) == 0, table
    assert _raw_count(path, "SELECT COUNT(*) FROM export_members WHERE pid = ?", t) == 2  # lineage


def test_other_participants_are_intact_and_verify(lab) -> None:
    v, facts = lab
    before = {pid: _grant_blobs(v, pid) for pid in facts["others"][:3]}
    _withdraw(v, facts["t"])
    assert v.verify()["ok"]
    for pid, blobs in before.items():
        assert _grant_blobs(v, pid) == blobs and all(b.startswith(b"EEG-OF-") for b in blobs.values())
    assert verify_audit(v.path, public_key=v.public_key).ok
    assert len(v.blobs(facts["others"][0])) == 4  # identity, EEG, derived scores, ratings


def test_consent_history_shows_the_withdrawal(lab) -> None:
    v, facts = lab
    t = facts["t"]
    result = _withdraw(v, t)
    body = result["receipt"]["body"]
    history = [json.loads(r[0]) for r in v._conn.execute(
        "SELECT body FROM consents WHERE pid = ? ORDER BY number", (t,))]
    assert [h["change"] for h in history] == ["enrolled", "withdrawn"]
    assert {p["status"] for p in history[-1]["purposes"].values()} == {"withdrawn"}
    assert body["consent"]["version"] == 2 and body["consent"]["change"] == "withdrawn"


def test_second_withdrawal_is_a_clear_no_op_error(lab) -> None:
    v, facts = lab
    t = facts["t"]
    first = _withdraw(v, t)
    size = v._audit.size
    for attempt in (lambda: withdraw.process(ctx_at(v, NOW), t),
                    lambda: withdraw.process(ctx_at(v, NOW), first["request_id"]),
                    lambda: withdraw.request_withdrawal(ctx_at(v, NOW), t, received=RECEIVED),
                    lambda: withdraw.request_withdrawal(ctx_at(v, NOW), t, received=RECEIVED,
                                                        scope="purpose:re-contact")):
        with pytest.raises(Conflict, match=r"erased|processed already|nothing"):
            attempt()
    assert v._audit.size == size
    assert withdraw.receipt_of(v._context(), t) == first["receipt"]
    assert _raw_count(v.path, "SELECT COUNT(*) FROM withdrawals WHERE pid = ?", t) == 1


def test_only_stewards_withdraw(lab) -> None:
    v, facts = lab
    at(v, NOW).add_member("omar", "analyst", "analyst passphrase long enough")
    at(v, NOW).close()
    with Vault.open(v.path, "analyst passphrase long enough", member="omar",
                    clock=ManualClock(NOW)) as analyst:
        with pytest.raises(PolicyRefusal, match="stewards only"):
            withdraw.request_withdrawal(ctx_at(analyst, NOW), facts["t"], received=RECEIVED)
        with pytest.raises(PolicyRefusal, match="stewards only"):
            withdraw.sweep(ctx_at(analyst, NOW))


def test_a_participant_without_consent_or_data_can_be_erased(fresh_vault: Vault) -> None:
    pid = at(fresh_vault, ENTERED).new_participant()  # a request cannot predate the enrolment
    result = _withdraw(fresh_vault, pid)
    assert result["blobs_deleted"] == 0 and result["stage"] == "nothing-stored"
    assert result["receipt"]["body"]["consent"] is None
    assert receipt.verify_receipt(result["receipt"], fresh_vault.public_key) == (True, [])


# --------------------------------------------------------------------------- the receipt


def test_receipt_names_what_was_destroyed_and_nothing_identifying(lab) -> None:
    v, facts = lab
    t = facts["t"]
    blob_ids = sorted(b["blob_id"] for b in v.blobs(t))
    key = v._door._ring.participant_key(v._conn, t)
    pseudonyms = [r[0] for r in v._conn.execute("SELECT pseudonym FROM export_members WHERE pid = ?", (t,))]
    result = _withdraw(v, t)
    doc = result["receipt"]
    body = doc["body"]
    assert body["vault_id"] == v.vault_id and body["participant_id"] == t and body["scope"] == "full"
    assert body["destroyed"]["blobs"] == blob_ids and body["destroyed"]["blob_count"] == len(blob_ids)
    assert body["destroyed"]["key_commitment"] == crypto.key_commitment(key, v.vault_id.encode(), t.encode())
    assert body["destroyed"]["by_category"] == {"eeg-raw": 2, "identity-contact": 1,
                                                "scores-derived": 1, "ratings-explicit": 1}
    assert body["destroyed"]["rows"]["score_items"] == 8 and body["destroyed"]["rows"]["recordings"] == 1
    assert body["stage"] == {"reached": "shared", "stored": True, "derived": True, "exported": True,
                             "shared": True}
    held = body["unreachable_copies"]
    assert {e["export_id"] for e in held["exports"]} == {
        facts["manifests"][k]["body"]["export_id"] for k in ("internal", "shared")}
    assert held["recipients_to_notify"] == [RECIPIENT]
    assert any("backup" in note.lower() for note in held["notes"])
    assert body["received"] == "2026-06-10" and body["deadline"] == "2026-07-10" and body["on_time"]
    text = json.dumps(doc).encode()
    for secret in (T_NAME, T_MAIL, T_PHONE, T_CODE, key.hex().encode(), *map(str.encode, pseudonyms)):
        assert secret not in text
    assert sorted(e["recipient"] for e in result["notify"]) == sorted(["internal", RECIPIENT])


def test_receipt_verifies_offline_and_against_outside_implementations(lab) -> None:
    v, facts = lab
    doc = _withdraw(v, facts["t"])["receipt"]
    public = v.public_key
    assert receipt.verify_receipt(doc, public) == (True, [])
    assert _independent_signature_ok(doc, public)  # Ed25519 via cryptography, message per formats.md
    bundle = doc["body"]["audit"]
    head = bundle["tree_head"]
    leaf = hashlib.sha256(b"\x00" + bundle["entry"].encode()).digest()  # RFC 9162 leaf hash
    path = [bytes.fromhex(p) for p in bundle["proof"]]
    assert _rfc9162_inclusion_ok(leaf, bundle["leaf_index"], head["tree_size"], path,
                                 bytes.fromhex(head["root_hash"]))
    head_body = json.dumps({k: head[k] for k in ("vault_id", "tree_size", "root_hash", "signed_at")},
                           sort_keys=True, separators=(",", ":")).encode()
    Ed25519PublicKey.from_public_bytes(public).verify(
        bytes.fromhex(head["signature"]), b"mindward/v1/signature/tree-head\x00" + head_body)
    entry = json.loads(bundle["entry"])
    assert entry["action"] == "withdraw.erase" and entry["subjects"] == [facts["t"]]
    # the vault's own log holds the same entry under a head the auditor can check later
    assert v.audit_entries(bundle["leaf_index"], 1)[0] == entry


def test_receipt_against_the_wrong_key_fails(lab) -> None:
    v, facts = lab
    doc = _withdraw(v, facts["t"])["receipt"]
    other = crypto.SigningKey.generate().public_key
    ok, reasons = receipt.verify_receipt(doc, other)
    assert not ok and any("signature" in r for r in reasons)
    forged = copy.deepcopy(doc)
    forged["public_key"] = other.hex()  # a swapped key inside the document does not help
    assert not receipt.verify_receipt(forged, other)[0]
    resigned = receipt.sign(crypto.SigningKey.generate(), doc["body"])  # re-signed by another vault
    assert not receipt.verify_receipt(resigned, v.public_key)[0]


@pytest.fixture(scope="module")
def one_receipt(template, tmp_path_factory: pytest.TempPathFactory) -> tuple[dict[str, Any], bytes]:
    source, facts = template
    path = tmp_path_factory.mktemp("receipt") / "vault"
    shutil.copytree(source, path)
    with Vault.open(path, TEST_PASSPHRASE, clock=ManualClock(NOW)) as v:
        doc = _withdraw(v, facts["t"])["receipt"]
        return doc, v.public_key


def _leaves(value: Any, path: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    if isinstance(value, dict):
        out = [path] if path else []
        for k, x in value.items():
            out += _leaves(x, (*path, k))
        return out
    if isinstance(value, list):
        out = [path]
        for i, x in enumerate(value):
            out += _leaves(x, (*path, i))
        return out
    return [path]


def _changed(value: Any, salt: int) -> Any:
    if isinstance(value, bool):
        return not value
    if isinstance(value, int):
        return value + 1 + salt % 7
    if isinstance(value, str):
        if not value:
            return "x"
        i = salt % len(value)
        return value[:i] + ("0" if value[i] != "0" else "1") + value[i + 1 :]
    if isinstance(value, list):
        return value[:-1] if value else ["x"]
    if isinstance(value, dict):
        if not value:
            return {"x": 1}
        dropped = sorted(value)[salt % len(value)]
        return {k: x for k, x in value.items() if k != dropped}
    return 0 if value is None else None


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_any_altered_field_fails_verification(one_receipt, data) -> None:
    doc, public = one_receipt
    paths = _leaves(doc)
    where = data.draw(st.sampled_from(paths))
    salt = data.draw(st.integers(0, 10_000))
    altered = copy.deepcopy(doc)
    parent = altered
    for step in where[:-1]:
        parent = parent[step]
    parent[where[-1]] = _changed(parent[where[-1]], salt)
    assert altered != doc
    ok, reasons = receipt.verify_receipt(altered, public)
    assert not ok and reasons, where


def test_extra_or_missing_top_level_fields_fail(one_receipt) -> None:
    doc, public = one_receipt
    assert receipt.verify_receipt(doc, public) == (True, [])
    assert not receipt.verify_receipt({**doc, "note": "added"}, public)[0]
    for key in doc:
        assert not receipt.verify_receipt({k: x for k, x in doc.items() if k != key}, public)[0]
    for junk in (None, [], "text", 3, {"body": []}, {"body": {"audit": "x"}}):
        assert not receipt.verify_receipt(junk, public)[0]


def test_byte_flips_in_a_receipt_file_fail(one_receipt) -> None:
    doc, public = one_receipt
    raw = receipt.to_bytes(doc)
    assert receipt.verify_text(raw, public) == (True, [])
    rng = random.Random(7)
    changed = 0
    for _ in range(400):
        i = rng.randrange(len(raw))
        flipped = raw[:i] + bytes([raw[i] ^ (1 << rng.randrange(8))]) + raw[i + 1 :]
        try:
            same = json.loads(flipped) == doc
        except ValueError:
            same = False
        if same:
            continue  # whitespace that stayed whitespace: the same document
        changed += 1
        assert not receipt.verify_text(flipped, public)[0], i
    assert changed > 300


def test_erased_files_can_be_reclaimed_later_or_at_the_next_open(lab) -> None:
    v, facts = lab
    t = facts["t"]
    blob_ids = [b["blob_id"] for b in v.blobs(t)]
    withdraw.request_withdrawal(ctx_at(v, NOW), t, received=RECEIVED)
    result = withdraw.process(ctx_at(v, NOW), t, reclaim_space=False)
    assert "files_unlinked" not in result
    assert not any(v._door._blobs.path(b).exists() for b in blob_ids)  # out of the store at once
    trash = sorted(p.name for p in (v.path / "tmp").iterdir())
    assert trash == sorted(b + withdraw.TRASH_SUFFIX for b in blob_ids)
    at(v, NOW).close()
    Vault.open(v.path, TEST_PASSPHRASE, clock=ManualClock(NOW)).close()  # the store's recovery at open
    assert list((v.path / "tmp").iterdir()) == []


def test_a_wal_that_cannot_be_emptied_is_reported_not_hidden(lab) -> None:
    v, facts = lab
    reader = sqlite3.connect(f"file:{v.path / 'vault.db'}?mode=ro", uri=True, isolation_level=None)
    try:
        reader.execute("BEGIN")
        reader.execute("SELECT COUNT(*) FROM participants").fetchone()  # holds a snapshot
        with pytest.raises(Conflict, match="not yet flushed from the file"):  # no longer exit 0
            _withdraw(v, facts["t"])
    finally:
        reader.close()
    done = withdraw._finish_interrupted(v._context())
    assert done["wal_truncated"] is True and done["flushed"] and done["finished_earlier_erasure"]
    assert (v.path / "vault.db-wal").stat().st_size == 0


# --------------------------------------------------------------------------- purpose-only withdrawal


def test_withdrawing_a_purpose_others_still_cover_deletes_nothing(lab) -> None:
    v, facts = lab
    t = facts["t"]
    before = {b["blob_id"] for b in v.blobs(t)}
    result = _withdraw(v, t, "purpose:recommender-training")
    assert result["blobs_deleted"] == 0 and not result["data_key_destroyed"]
    assert {b["blob_id"] for b in v.blobs(t)} == before
    kept = {k["category"]: k["still_granted_for"] for k in result["kept"]}
    assert set(kept) == {"eeg-raw", "scores-derived", "ratings-explicit"}
    assert "primary-analysis" in kept["scores-derived"] and "recommender-training" not in kept["eeg-raw"]
    latest = v.consent_history(t)[-1]
    assert latest["change"] == "withdrawn"
    assert latest["purposes"]["recommender-training"]["status"] == "withdrawn"
    assert latest["purposes"]["primary-analysis"]["status"] == "given"
    assert receipt.verify_receipt(result["receipt"], v.public_key) == (True, [])
    assert result["notify"] == []  # no export of recommender training held them
    assert _grant_blobs(v, t)  # still readable for the purposes still granted
    decision = at(v, NOW).access_check("recommender-training", ["scores-derived"], participants=(t,))
    assert [r.value for r in decision.decisions[t].reasons] == ["consent-withdrawn"]


def test_withdrawing_the_only_purpose_that_grants_a_category_deletes_it(lab) -> None:
    v, facts = lab
    t = facts["t"]
    identity = [b for b in v.blobs(t) if b["kind"] == "identity-contact"]
    assert len(identity) == 1
    path = v._door._blobs.path(identity[0]["blob_id"])
    result = _withdraw(v, t, "purpose:re-contact")
    body = result["receipt"]["body"]
    assert body["destroyed"]["blobs"] == [identity[0]["blob_id"]] and body["destroyed"]["identity_record"]
    assert not path.exists() and {b["kind"] for b in v.blobs(t)} == {"eeg-raw", "scores-derived",
                                                                    "ratings-explicit"}
    assert v._door._ring.participant_key(v._conn, t)  # the key lives on


def test_purpose_withdrawals_delete_a_category_once_nothing_grants_it(lab) -> None:
    v, facts = lab
    t = facts["t"]
    eeg = {b["blob_id"] for b in v.blobs(t) if b["kind"] == "eeg-raw"}
    for purpose in ("recommender-training", "external-sharing", "method-development"):
        assert _withdraw(v, t, f"purpose:{purpose}")["blobs_deleted"] == 0
    last = _withdraw(v, t, "purpose:primary-analysis")
    gone = set(last["receipt"]["body"]["destroyed"]["blobs"])
    assert eeg <= gone and {b["kind"] for b in v.blobs(t)} == {"identity-contact"}
    assert _raw_count(v.path, "SELECT COUNT(*) FROM recordings WHERE pid = ?", t) == 0
    assert _raw_count(v.path, "SELECT COUNT(*) FROM score_items WHERE pid = ?", t) == 0
    assert last["stage"] == "exported" and last["recipients_to_notify"] == []  # internal export only
    assert {e["purpose"] for e in last["notify"]} == {"primary-analysis"}
    assert _withdraw(v, t, "purpose:re-contact")["blobs_deleted"] == 1  # the identity record
    assert v.blobs(t) == [] and v._door._ring.participant_key(v._conn, t)  # nothing left, key still there
    assert t in withdraw.sweep(ctx_at(v, NOW), dry_run=True)["no_purpose_permits"]  # for the steward


def test_purpose_scopes_that_do_not_fit_the_consent_are_refused(lab) -> None:
    v, facts = lab
    t = facts["t"]
    with pytest.raises(InvalidInput, match="only through recommender-training"):
        withdraw.request_withdrawal(ctx_at(v, NOW), t, received=RECEIVED,
                                    scope="purpose:recommender-training/canteen-menu")
    with pytest.raises(InvalidInput, match="does not answer"):
        withdraw.request_withdrawal(ctx_at(v, NOW), t, received=RECEIVED, scope="purpose:mind-reading")
    for bad in ("everything", "purpose:", "purpose:Bad Id", "full "):
        with pytest.raises(UsageError):
            withdraw.request_withdrawal(ctx_at(v, NOW), t, received=RECEIVED, scope=bad)


# --------------------------------------------------------------------------- requests


def test_deadline_comes_from_the_policy_and_pending_lists_overdue_first(lab, tmp_path: Path) -> None:
    v, facts = lab
    a, b, c = facts["others"][:3]
    late = withdraw.request_withdrawal(ctx_at(v, NOW), a, received=dt.date(2026, 5, 1))
    assert late["deadline"] == "2026-05-31" and late["days_left"] < 0  # 30 days: GDPR Art. 12(3)
    policy = tmp_path / "policy"
    shutil.copytree(ROOT / "policies", policy)
    text = (policy / "policy.toml").read_text()
    assert "withdrawal_deadline_days = 30" in text
    (policy / "policy.toml").write_text(text.replace("withdrawal_deadline_days = 30",
                                                     "withdrawal_deadline_days = 10"))
    at(v, NOW).apply_policy(policy)
    soon = withdraw.request_withdrawal(ctx_at(v, NOW), b, received=dt.date(2026, 6, 14))
    assert soon["deadline"] == "2026-06-24"
    mid = withdraw.request_withdrawal(ctx_at(v, NOW), c, received=dt.date(2026, 6, 1),
                                      scope="purpose:re-contact")
    listed = withdraw.pending(ctx_at(v, NOW))
    assert [r["request_id"] for r in listed] == [late["request_id"], mid["request_id"], soon["request_id"]]
    assert [r["overdue"] for r in listed] == [True, True, False]
    done = withdraw.process(ctx_at(v, NOW), mid["request_id"])
    assert not done["on_time"]
    assert ([r["request_id"] for r in withdraw.pending(ctx_at(v, NOW))]
            == [late["request_id"], soon["request_id"]])


def test_bad_requests_change_nothing(lab) -> None:
    v, facts = lab
    t = facts["t"]
    size = v._audit.size
    with pytest.raises(UsageError, match="future"):
        withdraw.request_withdrawal(ctx_at(v, NOW), t, received=dt.date(2026, 7, 1))
    with pytest.raises(UsageError, match="date"):
        withdraw.request_withdrawal(ctx_at(v, NOW), t, received=NOW)  # type: ignore[arg-type]
    with pytest.raises(NotFound):
        withdraw.request_withdrawal(ctx_at(v, NOW), "0" * 32, received=RECEIVED)
    with pytest.raises(NotFound, match="no open withdrawal request"):
        withdraw.process(ctx_at(v, NOW), t)
    with pytest.raises(NotFound):
        withdraw.process(ctx_at(v, NOW), "w-0000000000000000")
    assert v._audit.size == size
    first = withdraw.request_withdrawal(ctx_at(v, NOW), t, received=RECEIVED)
    with pytest.raises(Conflict, match=first["request_id"]):
        withdraw.request_withdrawal(ctx_at(v, NOW), t, received=RECEIVED)


def test_a_full_withdrawal_supersedes_open_purpose_requests(lab) -> None:
    v, facts = lab
    t = facts["t"]
    purpose = withdraw.request_withdrawal(ctx_at(v, NOW), t, received=RECEIVED, scope="purpose:re-contact")
    with pytest.raises(UsageError, match="several open requests"):
        withdraw.request_withdrawal(ctx_at(v, NOW), t, received=RECEIVED, scope="purpose:external-sharing")
        withdraw.process(ctx_at(v, NOW), t)
    full = withdraw.request_withdrawal(ctx_at(v, NOW), t, received=RECEIVED)
    result = withdraw.process(ctx_at(v, NOW), t)  # the full request wins
    assert result["request_id"] == full["request_id"]
    assert purpose["request_id"] in result["superseded_requests"]
    assert withdraw.pending(ctx_at(v, NOW)) == []


# --------------------------------------------------------------------------- recall


def test_withdrawal_lists_the_exports_to_recall_and_export_check_sees_it(lab) -> None:
    v, facts = lab
    manifests = facts["manifests"]
    for name in ("internal", "shared", "without_t"):
        assert not at(v, NOW).check_export(manifests[name])["must_replace"], name
    result = _withdraw(v, facts["t"])
    assert {(e["export_id"], e["recipient"]) for e in result["notify"]} == {
        (manifests["internal"]["body"]["export_id"], "internal"),
        (manifests["shared"]["body"]["export_id"], RECIPIENT)}
    for name in ("internal", "shared"):
        check = at(v, NOW).check_export(manifests[name])
        assert check["must_replace"] and check["withdrawn_or_erased"] == 1
        assert check["consent_no_longer_covers"] == 0
        assert facts["t"] not in json.dumps(check)  # counts, never who
    assert not at(v, NOW).check_export(manifests["without_t"])["must_replace"]


def test_export_check_after_a_purpose_withdrawal(lab) -> None:
    v, facts = lab
    manifests = facts["manifests"]
    result = _withdraw(v, facts["others"][0], "purpose:external-sharing")
    assert [e["recipient"] for e in result["notify"]] == [RECIPIENT]
    check = at(v, NOW).check_export(manifests["shared"])
    assert check["must_replace"] and check["consent_no_longer_covers"] == 1
    assert check["withdrawn_or_erased"] == 0
    assert not at(v, NOW).check_export(manifests["internal"])["must_replace"]


def test_export_check_of_a_narrower_purpose_uses_the_consent_for_its_parent(lab) -> None:
    v, facts = lab
    members = [facts["t"], *facts["others"]]
    doc = _export(v, "recommender-training/canteen-menu", ["scores-derived"], members, export=True,
                  epsilon=0.5, affordable=dict.fromkeys(members, True))
    assert not at(v, NOW).check_export(doc)["must_replace"]  # a fresh export still stands


# --------------------------------------------------------------------------- retention


def test_sweep_erases_ended_consent_with_receipts_and_is_idempotent(lab) -> None:
    v, facts = lab
    expired = facts["expired"]
    dry = withdraw.sweep(ctx_at(v, NOW), dry_run=True)
    assert dry["would_erase"] == [{"participant_id": expired, "trigger": "consent-expired"}]
    assert not v._conn.execute("SELECT erased_at FROM participants WHERE pid = ?", (expired,)).fetchone()[0]
    files = [v._door._blobs.path(b["blob_id"]) for b in v.blobs(expired)]
    report = withdraw.sweep(ctx_at(v, NOW))
    assert [e["participant_id"] for e in report["erased"]] == [expired] and report["wal_truncated"]
    assert not any(f.exists() for f in files) and v.blobs(expired) == []
    doc = withdraw.receipt_of(v._context(), expired)
    assert doc["body"]["trigger"] == "consent-expired" and doc["body"]["consent"]["change"].startswith("none")
    assert receipt.verify_receipt(doc, v.public_key) == (True, [])
    assert withdraw.sweep(ctx_at(v, NOW))["erased"] == []
    later = withdraw.sweep(ctx_at(v, dt.datetime(2031, 3, 5, tzinfo=dt.UTC)), dry_run=True)
    assert len(later["would_erase"]) == 22  # everyone else's retention ended on 2031-03-02 / 04
    assert {w["trigger"] for w in later["would_erase"]} == {"retention-ended", "consent-expired"}
    erases = [e for e in v.audit_entries() if e["action"] == "withdraw.erase"]
    assert [e["subjects"] for e in erases] == [[expired]]


_SWEEPER = """
import datetime as dt, fcntl, json, os, sys
from tests.clock import ManualClock
from tests.conftest import TEST_PASSPHRASE
from vault import Vault
from vault.services import withdraw
NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
fd = os.open(os.path.join(sys.argv[1], "lock"), os.O_RDWR)
try:
    fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    blocked = False
except BlockingIOError:
    blocked = True
os.close(fd)
print("tried", flush=True)
with Vault.open(sys.argv[1], TEST_PASSPHRASE, clock=ManualClock(NOW)) as v:  # waits for the lock
    print(json.dumps({"blocked": blocked, "erased": len(withdraw.sweep(v._context())["erased"])}))
"""


def test_a_concurrent_sweep_waits_for_the_lock_and_then_finds_nothing(template, tmp_path: Path) -> None:
    source, facts = template
    path = tmp_path / "vault"
    shutil.copytree(source, path)
    v = Vault.open(path, TEST_PASSPHRASE, clock=ManualClock(NOW))
    with subprocess.Popen([sys.executable, "-c", _SWEEPER, str(path)], cwd=ROOT, stdout=subprocess.PIPE,
                          stderr=subprocess.PIPE, env={**os.environ, "PYTHONPATH": str(ROOT)}) as child:
        assert child.stdout is not None
        assert child.stdout.readline().strip() == b"tried"
        time.sleep(0.2)  # the child now waits for the vault's lock
        assert len(withdraw.sweep(ctx_at(v, NOW))["erased"]) == 1
        at(v, NOW).close()
        out, err = child.communicate(timeout=60)
    assert child.returncode == 0, err
    second = json.loads(out)
    assert second == {"blocked": True, "erased": 0}
    with Vault.open(path, TEST_PASSPHRASE, clock=ManualClock(NOW)) as again:
        erases = [e for e in again.audit_entries() if e["action"] == "withdraw.erase"]
        assert [e["subjects"] for e in erases] == [[facts["expired"]]]


# --------------------------------------------------------------------------- SIGKILL

RUNS = 52


@pytest.fixture(scope="module")
def crash_template(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str, list[str], bytes]:
    path = tmp_path_factory.mktemp("crash") / "vault"
    with Vault.init(path, TEST_PASSPHRASE, clock=ManualClock(NOW)) as v:
        t = at(v, NOW).enrol(_form("consent-all-granted.toml", "K"))["participant_id"]
        other = at(v, NOW).enrol(_form("consent-all-granted.toml", "L"))["participant_id"]
        for i in range(8):
            at(v, NOW).put_blob(t, "eeg-raw", [MARKER + bytes([i]) * 5000])
        at(v, NOW).put_blob(other, "eeg-raw", [b"EEG-OF-OTHER" * 100])
        withdraw.request_withdrawal(ctx_at(v, NOW), t, received=RECEIVED)
        wrapped = v._conn.execute("SELECT wrapped_key FROM participants WHERE pid = ?", (t,)).fetchone()[0]
        blobs = [b["blob_id"] for b in v.blobs(t)]
    return path, t, blobs, wrapped


def _child(path: Path, target: str, mode: str, n: int) -> subprocess.Popen[bytes]:
    return subprocess.Popen([sys.executable, "-m", "tests.withdraw_killer", str(path), target, mode, str(n)],
                            cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            env={**os.environ, "PYTHONPATH": str(ROOT)})


def _check_after_kill(path: Path, t: str, blobs: list[str], wrapped: bytes) -> str:
    with Vault.open(path, TEST_PASSPHRASE, clock=ManualClock(NOW)) as v:  # the open runs the store's recovery
        erased = v._conn.execute("SELECT wrapped_key IS NULL FROM participants WHERE pid = ?",
                                 (t,)).fetchone()[0]
        status, stored = v._conn.execute("SELECT status, receipt FROM withdrawals WHERE pid = ?",
                                         (t,)).fetchone()
        present = [b for b in blobs if v._door._blobs.path(b).exists()]
        erase_entries = [e for e in v.audit_entries() if e["action"] == "withdraw.erase"]
        if erased:
            state = "after"
            assert status == "processed" and stored is not None and len(erase_entries) == 1
            assert receipt.verify_receipt(withdraw.receipt_of(v._context(), t), v.public_key) == (True, [])
            assert v.blobs(t) == [] and present == []
            assert registry.consent_history(v._conn, t)[-1].change == "withdrawn"
            with pytest.raises(Conflict):
                withdraw.process(ctx_at(v, NOW), t)
        else:
            state = "before"
            assert status == "pending" and stored is None and erase_entries == []
            assert sorted(b["blob_id"] for b in v.blobs(t)) == sorted(blobs) and present == blobs
            assert len(_grant_blobs(v, t)) == 8 and len(v.consent_history(t)) == 1
            withdraw.process(ctx_at(v, NOW), t)  # the rerun completes it
            assert v.blobs(t) == [] and not any(v._door._blobs.path(b).exists() for b in blobs)
        assert v.verify()["ok"]
    assert_absent(path, wrapped, MARKER)
    return state


@pytest.mark.slow
def test_sigkill_during_process_leaves_before_or_after_and_a_rerun_completes(crash_template,
                                                                             tmp_path: Path) -> None:
    source, t, blobs, wrapped = crash_template
    probe = tmp_path / "probe"
    shutil.copytree(source, probe)
    with _child(probe, t, "count", 0) as child:
        out, err = child.communicate(timeout=60)
    assert child.returncode == 0, err
    steps = int(out)
    assert steps > 20
    rng = random.Random(20260615)
    states: dict[str, int] = {}
    for run in range(RUNS):
        path = tmp_path / f"run{run}"
        shutil.copytree(source, path)
        if run % 4 == 3:  # a kill after a random delay, as an operator's would land
            with _child(path, t, "time", 0) as child:
                assert child.stdout is not None and child.stdout.readline().strip() == b"ready"
                time.sleep(rng.uniform(0.0, 0.2))
                child.send_signal(signal.SIGKILL)
                child.wait()
        else:  # a kill just before a random step: statement, unlink or fsync
            with _child(path, t, "step", rng.randint(1, steps + 1)) as child:
                child.communicate(timeout=60)
        state = _check_after_kill(path, t, blobs, wrapped)
        states[state] = states.get(state, 0) + 1
        shutil.rmtree(path)
    print("SIGKILL states", states, "steps", steps)
    assert states.get("before", 0) >= 5 and states.get("after", 0) >= 5, states
