"""Holes an attack on the tool's inputs and outputs found (issue 13), one test each.

Outside sources:
- RFC 8259 section 4: object names SHOULD be unique and, when they are not, readers
  disagree on which value counts (some keep the first, Python's json keeps the last):
  common practice is to refuse duplicates in signed documents.
- SQLite's unix VFS gives the -wal and -shm files the database file's permissions
  (from memory of os_unix.c, robust_open/findCreateFileMode); checked here at umask 000.
- The wrapped data key is found in the raw files with Python's own bytes search, not
  through the vault's code.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import io
import json
import os
import sqlite3
import stat
from pathlib import Path

import numpy as np
import pytest

from tests.clock import ManualClock, at
from tests.conftest import ROOT, TEST_PASSPHRASE
from vault import InvalidInput, UsageError, Vault, read_tree_head
from vault.audit import manifest, receipt
from vault.cli.app import main
from vault.formats import strictjson

EXAMPLES = ROOT / "docs" / "examples"
T0 = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)


def cli(*args: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(list(args))
    return code, out.getvalue(), err.getvalue()


def form(name: str = "consent-all-granted.toml", code: str = "IN", **replace: str) -> bytes:
    text = (EXAMPLES / name).read_text().replace('code = "TL-', f'code = "{code}-', 1)
    for key, value in replace.items():
        lines = [f"{key} = {value}" if line.split("=")[0].strip() == key else line
                 for line in text.splitlines()]
        text = "\n".join(lines) + "\n"
    return text.encode()


@pytest.fixture
def env(monkeypatch, vault_path: Path) -> Path:
    monkeypatch.setenv("MINDWARD_PASSPHRASE", TEST_PASSPHRASE)
    monkeypatch.setenv("MINDWARD_VAULT", str(vault_path))
    return vault_path


def _enrolled(env: Path, code: str = "IN") -> str:
    path = env.parent / f"{code}.toml"
    path.write_bytes(form(code=code))
    status, out, err = cli("enrol", str(path), "--json")
    assert status == 0, err
    return json.loads(out)["participant_id"]


def _db_files(root: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in root.iterdir() if p.name.startswith("vault.db")
            and not p.name.endswith("-shm")}  # shm: SQLite's read index may change


# --------------------------------------------------------------------------- duplicate JSON keys


@pytest.fixture(scope="module")
def signed_receipt(tmp_path_factory) -> tuple[str, str, str]:
    """(receipt file text, the participant id it names, the vault's public key hex)."""
    path = tmp_path_factory.mktemp("receipt") / "vault"
    with Vault.init(path, TEST_PASSPHRASE, clock=ManualClock(T0)) as v:
        pid = v.enrol(form())["participant_id"]
        v.withdraw_request(pid, received=T0.date())
        document = v.withdraw_process(pid)["receipt"]
        key = v.public_key.hex()
    return receipt.to_bytes(document).decode("ascii"), pid, key


def test_a_forged_participant_before_the_real_one_is_refused(signed_receipt, tmp_path) -> None:
    text, pid, key = signed_receipt
    line = f'    "participant_id": "{pid}",'
    assert line in text
    forged = text.replace(line, f'    "participant_id": "{"f" * 32}",\n{line}', 1)
    assert json.loads(forged)["body"]["participant_id"] == pid  # what Python's json sees...
    path = tmp_path / "forged.json"
    path.write_text(forged)
    status, out, _ = cli("receipt", "verify", str(path), "--key", key)
    assert status == 5 and "duplicate key" in out  # ...was signed, but not what others see
    path.write_text(text)
    assert cli("receipt", "verify", str(path), "--key", key)[0] == 0


@pytest.mark.parametrize("reader", ["manifest", "receipt", "tree head", "sidecar", "entry"])
def test_every_json_reader_refuses_duplicate_keys(reader: str, tmp_path: Path) -> None:
    doubled = '{"body": {"a": 1}, "signature": "00", "public_key": "00", "body": {"a": 2}}'
    if reader == "manifest":
        with pytest.raises(InvalidInput, match="duplicate key"):
            manifest.load(doubled, "the manifest")
    elif reader == "receipt":
        assert receipt.verify_text(doubled, bytes(32))[0] is False
        with pytest.raises(InvalidInput, match="duplicate key"):
            receipt.load(doubled)
    elif reader == "tree head":
        head = ('{"vault_id": "x", "tree_size": 1, "tree_size": 2, "root_hash": "00", '
                '"signed_at": "2026-06-15T12:00:00Z", "signature": "00"}')
        with pytest.raises(Exception, match="strict JSON"):
            read_tree_head(head)
    elif reader == "sidecar":
        from vault.formats.edf import _sidecar

        side = tmp_path / "s.json"
        side.write_text('{"sampling_rate": 256, "sampling_rate": 512, "channel_names": ["Fz"], '
                        '"units": "uV"}')
        with pytest.raises(InvalidInput, match="strict JSON"):
            _sidecar(side)
    else:
        from vault.audit.log import decode_entry

        with pytest.raises(ValueError, match="duplicate key"):
            decode_entry(b'{"seq":0,"subjects":["a"],"subjects":["b"]}')


def test_strict_json_refuses_non_numbers_and_deep_nesting() -> None:
    for text in ("[NaN]", '{"a": Infinity}', "[" * 100_000 + "]" * 100_000):
        with pytest.raises(ValueError):
            strictjson.loads(text)
    assert strictjson.loads('{"a": [1, {"b": null}]}') == {"a": [1, {"b": None}]}


def test_a_proof_with_a_duplicated_key_does_not_check(env: Path, tmp_path: Path) -> None:
    status, out, _ = cli("init", "--json")
    key = json.loads(out)["public_key"]
    status, proof, _ = cli("audit", "prove", "0")
    assert status == 0
    path = tmp_path / "proof.json"
    path.write_text(proof)
    assert cli("audit", "check-proof", str(path), "--key", key)[0] == 0
    doc = json.loads(proof)
    path.write_text(proof.rstrip().rstrip("}") + f', "leaf_index": {doc["leaf_index"]}}}')
    status, _, err = cli("audit", "check-proof", str(path), "--key", key)
    assert status == 8 and err.count("\n") == 1


# --------------------------------------------------------------------------- file modes


@pytest.fixture
def open_umask():
    old = os.umask(0)
    yield
    os.umask(old)


def test_vault_files_are_private_whatever_the_umask(open_umask, vault_path: Path) -> None:
    with Vault.init(vault_path, TEST_PASSPHRASE, clock=ManualClock(T0)) as v:
        pid = v.enrol(form())["participant_id"]
        v.put_blob(pid, "eeg-raw", [b"x" * 100])
        present = {p.name for p in vault_path.iterdir()}
        assert {"vault.db", "vault.db-wal", "vault.db-shm"} <= present  # checked while open
        for path in [vault_path, *vault_path.rglob("*")]:
            mode = stat.S_IMODE(path.stat().st_mode)
            assert mode == (0o700 if path.is_dir() else 0o600), f"{path.name}: {oct(mode)}"


def test_an_older_vault_with_loose_files_is_tightened_at_open(vault_path: Path) -> None:
    Vault.init(vault_path, TEST_PASSPHRASE).close()
    os.chmod(vault_path / "vault.db", 0o644)
    Vault.open(vault_path, TEST_PASSPHRASE).close()
    assert stat.S_IMODE((vault_path / "vault.db").stat().st_mode) == 0o600


def test_written_reports_and_receipts_are_private(open_umask, env: Path, tmp_path: Path) -> None:
    assert cli("init")[0] == 0
    pid = _enrolled(env)
    assert cli("withdraw", "request", pid, "--received", dt.date.today().isoformat())[0] == 0
    outputs = [tmp_path / "receipt.json", tmp_path / "again.json", tmp_path / "record.md"]
    assert cli("withdraw", "process", pid, "--receipt", str(outputs[0]))[0] == 0
    assert cli("withdraw", "receipt", pid, "--out", str(outputs[1]))[0] == 0
    assert cli("report", "--out", str(outputs[2]))[0] == 0
    for path in outputs:
        assert stat.S_IMODE(path.stat().st_mode) == 0o600, path.name
    assert outputs[0].read_bytes() == outputs[1].read_bytes()
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".part")]  # no temp left


# --------------------------------------------------------------------------- output paths


def test_an_unwritable_receipt_path_is_refused_before_anything_is_erased(env: Path) -> None:
    assert cli("init")[0] == 0
    pid = _enrolled(env)
    assert cli("withdraw", "request", pid, "--received", dt.date.today().isoformat())[0] == 0
    before = _db_files(env)
    missing = env.parent / "no-such-dir" / "r.json"
    status, _, err = cli("withdraw", "process", pid, "--receipt", str(missing))
    assert status == 6 and "no-such-dir" in err and err.count("\n") == 1
    status, _, err = cli("withdraw", "process", pid, "--receipt", str(env.parent))
    assert status == 2 and "is a folder" in err
    assert _db_files(env) == before  # nothing erased, nothing audited
    status, out, _ = cli("withdraw", "pending", "--json")
    assert [r["participant_id"] for r in json.loads(out)] == [pid]


@pytest.mark.parametrize("command", [("report",), ("withdraw", "receipt", "w-0000000000000000")])
def test_other_outputs_check_their_path_first(env: Path, command: tuple[str, ...]) -> None:
    assert cli("init")[0] == 0
    status, _, err = cli(*command, "--out", str(env.parent / "missing" / "out.txt"))
    assert status == 6 and "missing" in err and err.count("\n") == 1
    status, _, err = cli(*command, "--out", str(env))
    assert status == 2 and err.count("\n") == 1


# --------------------------------------------------------------------------- purpose withdrawal


def test_a_purpose_withdrawal_that_keeps_data_prints_what_it_kept(env: Path) -> None:
    assert cli("init")[0] == 0
    pid = _enrolled(env)
    today = dt.date.today().isoformat()
    scope = "purpose:recommender-training"
    assert cli("withdraw", "request", pid, "--received", today, "--scope", scope)[0] == 0
    samples = env.parent / "s.npy"
    np.save(samples, np.zeros((1, 256), dtype="<i2"))
    (env.parent / "s.json").write_text('{"sampling_rate": 256, "channel_names": ["Fz"], '
                                       '"units": "uV"}')
    assert cli("ingest", "eeg", pid, str(samples), "--sidecar", str(env.parent / "s.json"))[0] == 0
    status, out, err = cli("withdraw", "process", pid)
    assert status == 0, err
    assert "kept: eeg-raw (1 blobs, still granted for " in out  # was a TypeError (exit 1)


# --------------------------------------------------------------------------- flushing an erasure


def test_an_erasure_another_process_blocks_is_reported_and_finished_later(env: Path) -> None:
    assert cli("init")[0] == 0
    pid = _enrolled(env)
    assert cli("withdraw", "request", pid, "--received", dt.date.today().isoformat())[0] == 0
    db = env / "vault.db"
    wrapped = bytes(sqlite3.connect(db).execute(
        "SELECT wrapped_key FROM participants WHERE pid = ?", (pid,)).fetchone()[0])
    reader = sqlite3.connect(f"file:{db}?mode=ro", uri=True, isolation_level=None)
    reader.execute("BEGIN")
    reader.execute("SELECT COUNT(*) FROM participants").fetchone()  # holds a snapshot
    try:
        status, _, err = cli("withdraw", "process", pid)
        assert status == 7 and "not yet flushed" in err and err.count("\n") == 1
        assert wrapped in db.read_bytes() + (env / "vault.db-wal").read_bytes()
        status, _, err = cli("withdraw", "process", pid)  # still held: still said
        assert status == 7 and "still not flushed" in err
    finally:
        reader.close()
    status, _, _ = cli("member", "list")  # any open of the vault finishes it
    assert status == 0
    data = b"".join(p.read_bytes() for p in env.iterdir() if p.name.startswith("vault.db"))
    assert wrapped not in data
    meta = sqlite3.connect(db).execute("SELECT key FROM meta").fetchall()
    assert ("erasure_unflushed",) not in meta


# --------------------------------------------------------------------------- implausible input


@pytest.mark.parametrize(("dates", "field", "says"), [
    ({"signed": "0001-01-01"}, "signed", "check the year"),
    ({"signed": "1900-05-05"}, "signed", "check the year"),
    ({"expires": "9999-12-30", "retention_end": "9999-12-31"}, "expires", "100 years"),
    ({"retention_end": "9999-12-31"}, "retention_end", "100 years"),
    ({"expires": "2026-06-15"}, "expires", "ended already"),
])
def test_implausible_consent_dates_are_refused(fresh_vault: Vault, dates: dict[str, str],
                                               field: str, says: str) -> None:
    with pytest.raises(InvalidInput, match=f"{field}: .*{says}"):
        at(fresh_vault, T0).enrol(form(**dates))
    assert fresh_vault.blobs() == []


def test_an_already_expired_form_is_not_enrolled_as_given(vault_path: Path) -> None:
    with Vault.init(vault_path, TEST_PASSPHRASE, clock=ManualClock(T0)) as v:
        with pytest.raises(InvalidInput, match="expires: this consent has ended already"):
            v.enrol(form("consent-expired.toml"))
        assert v.blobs() == []


def test_a_byte_order_mark_in_a_form_is_skipped(vault_path: Path) -> None:
    with Vault.init(vault_path, TEST_PASSPHRASE, clock=ManualClock(T0)) as v:
        assert v.enrol(b"\xef\xbb\xbf" + form())["consent_version"] == 1


def test_a_withdrawal_received_before_the_consent_was_signed_is_refused(vault_path: Path) -> None:
    with Vault.init(vault_path, TEST_PASSPHRASE, clock=ManualClock(T0)) as v:
        pid = v.enrol(form())["participant_id"]  # signed 2026-03-02
        for day in (dt.date(1, 1, 1), dt.date(2026, 3, 1)):
            with pytest.raises(UsageError, match="before the participant's consent was signed"):
                v.withdraw_request(pid, received=day)
        assert v.withdraw_request(pid, received=dt.date(2026, 3, 2))["deadline"] == "2026-04-01"


def test_bad_rows_and_sidecars_are_malformed_input_not_bugs(env: Path) -> None:
    assert cli("init")[0] == 0
    pid = _enrolled(env)
    csv = env.parent / "r.csv"
    header = "participant_id,item_id,value\n"
    for row, says in ((f"{pid},dish-01,\u0663\n", "ASCII decimal"),  # Arabic-Indic three
                      (f"{pid},dish-01,1_0\n", "ASCII decimal"),
                      (f"{pid},{'d' * 10_000_000},3\n", "row 2")):
        csv.write_text(header + row)
        status, _, err = cli("ingest", "scores", str(csv), "--kind", "explicit")
        assert status == 8 and says in err and err.count("\n") == 1
    np.save(env.parent / "s.npy", np.zeros((1, 256), dtype="<i2"))
    (env.parent / "s.json").write_text('[{"sampling_rate": 256}]')
    status, _, err = cli("ingest", "eeg", pid, str(env.parent / "s.npy"),
                         "--sidecar", str(env.parent / "s.json"))
    assert status == 8 and "sidecar" in err and err.count("\n") == 1


def test_an_id_with_a_newline_or_a_huge_id_still_gives_one_line(env: Path) -> None:
    assert cli("init")[0] == 0
    for value in ("a\nb", "\x1b[2J", "x" * 100_000):  # found by tests/formats/test_fuzz_inputs.py
        status, out, err = cli("consent", "show", value)
        assert status == 6 and err.count("\n") == 1 and len(err) < 600 and "\x1b" not in err
        status, out, _ = cli("consent", "show", value, "--json")
        assert json.loads(out)["exit_code"] == 6


# --------------------------------------------------------------------------- blob layout


def _blob_id(v: Vault, pid: str) -> str:
    return v.put_blob(pid, "eeg-raw", [b"payload"]).blob_id


def test_blobs_are_spread_over_folders_by_their_random_part(vault_path: Path) -> None:
    with Vault.init(vault_path, TEST_PASSPHRASE, clock=ManualClock(T0)) as v:
        pid = v.enrol(form())["participant_id"]
        for _ in range(12):
            _blob_id(v, pid)
        ids = [b["blob_id"] for b in v.blobs()]  # with the identity record
    folders = {p.parent.name for p in (vault_path / "blobs").rglob("*.mwb")}
    assert folders == {b[2:4] for b in ids} and len(folders) > 1  # 12 draws, 256 folders


def test_a_vault_with_the_old_single_folder_layout_is_moved_at_open(vault_path: Path) -> None:
    with Vault.init(vault_path, TEST_PASSPHRASE, clock=ManualClock(T0)) as v:
        pid = v.enrol(form())["participant_id"]
        for _ in range(3):
            _blob_id(v, pid)
        ids = [b["blob_id"] for b in v.blobs()]
    blobs = vault_path / "blobs"
    (blobs / "b-").mkdir()
    for path in list(blobs.rglob("*.mwb")):  # the layout before: blobs/<blob_id[:2]>/
        path.rename(blobs / "b-" / path.name)
    with Vault.open(vault_path, TEST_PASSPHRASE, clock=ManualClock(T0)) as v:
        assert v.verify()["ok"] is True
        assert sorted(p.name for p in blobs.rglob("*.mwb")) == sorted(b + ".mwb" for b in ids)
        assert all(v._door._blobs.path(b).exists() for b in ids)
    assert not (blobs / "b-").exists()
