"""Fuzzing every file reader and every CLI entry point that takes a file or a value.

Each malformed input must give ONE clear line and an exit code from the table in
docs/cli.md (never 1, never a traceback) and leave the vault byte-identical (the
database and its WAL; SQLite's -shm read index may change). Readers are fuzzed
in-process with many examples; CLI commands (each pays the real Argon2id cost to
unlock) with few. Inputs start from valid files the vault itself wrote (or the
pyedflib sample recordings, an independent writer) and are mutated byte- and
structure-wise, so the fuzzer gets past the first check.

Outside sources: the EDF samples come with pyedflib (an independent EDF/BDF writer);
the duplicate-key mutation follows RFC 8259 section 4 (names SHOULD be unique).
"""

from __future__ import annotations

import contextlib
import datetime as dt
import io
import json
import os
import shutil
import tomllib
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pyedflib
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.conftest import ROOT, TEST_PASSPHRASE
from tests.policy.test_policy import to_toml
from vault import EXIT_CODES, Vault, VaultError, load_json, read_tree_head, verify_proof
from vault.audit import receipt
from vault.cli.app import main
from vault.formats.edf import deidentified_blocks, npy_deidentified_blocks
from vault.formats.edf_header import DeidOptions
from vault.formats.scores import read_rows
from vault.policy.consent import parse_consent_form
from vault.policy.policyset import load_default_policy, load_policy_dir

EXAMPLES = ROOT / "docs" / "examples"
EDF_SAMPLE = Path(pyedflib.__file__).parent / "tests" / "data" / "test_subsecond.edf"
DOCUMENTED = set(EXIT_CODES) - {0, 1}


SCALE = int(os.environ.get("MINDWARD_FUZZ_SCALE", "1"))  # e.g. 20 for a long, random hunt


def fast(n: int) -> settings:
    """`n` examples (the whole file runs in about a minute); derandomized unless scaled up."""
    return settings(max_examples=n * SCALE, deadline=None, derandomize=SCALE == 1,
                    database=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


# --------------------------------------------------------------------------- mutations

def _apply(data: bytes, edits: list[tuple[int, int, bytes]]) -> bytes:
    """Each edit (kind, position, bytes): 0 replace, 1 insert, 2 delete, 3 truncate."""
    out = bytearray(data)
    for kind, where, chunk in edits:
        at = where % (len(out) + 1)
        if kind == 0:
            out[at : at + len(chunk)] = chunk
        elif kind == 1:
            out[at:at] = chunk
        elif kind == 2:
            del out[at : at + max(1, len(chunk))]
        else:
            del out[at:]
    return bytes(out)


EDITS = st.lists(st.tuples(st.integers(0, 3), st.integers(0, 1 << 20),
                           st.binary(min_size=1, max_size=12)), min_size=1, max_size=4)


def mutated(data: bytes, limit: int | None = None) -> st.SearchStrategy[bytes]:
    """`data` with a few byte edits, kept inside its first `limit` bytes when given."""
    if limit is None:
        return EDITS.map(lambda e: _apply(data, e))
    head, tail = data[:limit], data[limit:]
    return EDITS.map(lambda e: _apply(head, [x for x in e if x[0] != 3]) + tail) | EDITS.map(
        lambda e: _apply(data, [(3, e[0][1] % len(data), b"")]))


# EDF/BDF header layout (the EDF specification, Kemp et al. 1992; common practice)
_FIXED = [(0, 8), (8, 80), (88, 80), (168, 8), (176, 8), (184, 8), (192, 44), (236, 8),
          (244, 8), (252, 4)]
_SIGNAL = [16, 80, 8, 8, 8, 8, 8, 80, 8, 32]
ODD_VALUES = st.sampled_from(["-1", "0", "1e9", "1e308", "nan", "inf", "", "+0.0", "99999999",
                              "0.000001", "-0", "1 2", "\x00", "01.01.85", "31.02.99", "25.61.61",
                              "EDF+C", "EDF+D", "BDF+C", "24BIT", "EDF Annotations", "\u00e9"])


def _edf_fields(data: bytes) -> list[tuple[int, int]]:
    fields = list(_FIXED)
    try:
        ns = int(data[252:256])
    except ValueError:
        return fields
    at = 256
    for width in _SIGNAL:
        for _ in range(ns):
            fields.append((at, width))
            at += width
    return fields


@st.composite
def edf_field_mutant(draw: Any, data: bytes) -> bytes:
    """A valid recording with one to three header fields set to odd values."""
    out = bytearray(data)
    fields = _edf_fields(data)
    for _ in range(draw(st.integers(1, 3))):
        start, width = draw(st.sampled_from(fields))
        text = draw(ODD_VALUES | st.text(st.characters(max_codepoint=0x7F), max_size=width))
        raw = text.encode("utf-8")[:width].ljust(width, b" ")
        out[start : start + width] = raw
    return bytes(out)


def _annotation_spans(data: bytes) -> list[int]:
    """Offsets of the EDF+ annotation text (TALs start with '+' or '-' then a digit)."""
    return [i for i in range(int(data[184:192]), len(data) - 1)
            if data[i] in b"+-" and data[i + 1 : i + 2].isdigit() and data[i - 1] in b"\x00\x14"]


@st.composite
def annotation_mutant(draw: Any) -> bytes:
    """The EDF+ sample with bytes of its annotation records (TALs) edited."""
    at = draw(st.sampled_from(TAL_OFFSETS))
    chunk = draw(st.binary(min_size=1, max_size=8) | st.sampled_from(
        [b"\x14", b"\x15", b"\x00", b"+", b"-", b"1e9", b"\x14\x14", b"\xff\xfe"]))
    return EDF_BYTES[:at] + chunk + EDF_BYTES[at + draw(st.integers(0, 8)):]


JSON_LEAF = st.one_of(st.none(), st.booleans(), st.integers(-(2**70), 2**70),
                      st.floats(allow_nan=False, allow_infinity=False), st.text(max_size=20))
JSON_ANY = st.recursive(JSON_LEAF, lambda kids: st.lists(kids, max_size=3)
                        | st.dictionaries(st.text(max_size=8), kids, max_size=3), max_leaves=8)


def _paths(value: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    out = [prefix]
    if isinstance(value, dict):
        for k, v in value.items():
            out += _paths(v, (*prefix, k))
    elif isinstance(value, list):
        for i, v in enumerate(value):
            out += _paths(v, (*prefix, i))
    return out


def _replace(value: Any, path: tuple[Any, ...], new: Any) -> Any:
    if not path:
        return new
    copy = dict(value) if isinstance(value, dict) else list(value)
    copy[path[0]] = _replace(value[path[0]], path[1:], new)
    return copy


@st.composite
def json_mutant(draw: Any, doc: Any) -> bytes:
    """A JSON document with one part replaced, a key doubled, or its text byte-edited."""
    how = draw(st.sampled_from(["replace", "double", "bytes"]))
    text = json.dumps(doc, indent=1, sort_keys=True)
    if how == "bytes":
        return draw(mutated(text.encode()))
    paths = _paths(doc)
    path = draw(st.sampled_from(paths))
    if how == "replace":
        return json.dumps(_replace(doc, path, draw(JSON_ANY))).encode()
    keyed = [p for p in paths if p and isinstance(p[-1], str)]
    if not keyed:
        return text.encode()
    path = draw(st.sampled_from(keyed))
    key = json.dumps(path[-1])
    at = text.find(key + ":")  # first spelling of that key: put a forged twin in front
    forged = f"{key}: {json.dumps(draw(JSON_LEAF))}, "
    return (text[:at] + forged + text[at:]).encode() if at >= 0 else text.encode()


TOML_VALUE = st.recursive(
    st.one_of(st.booleans(), st.integers(-(2**63), 2**63 - 1), st.floats(), st.text(max_size=30),
              st.dates(), st.sampled_from(["eeg-raw", "given", "primary-analysis", "TL-1"])),
    lambda kids: st.lists(kids, max_size=3) | st.dictionaries(
        st.sampled_from(["granted", "refused", "explicit", "code", "x"]), kids, max_size=2),
    max_leaves=6)


@st.composite
def toml_mutant(draw: Any, raw: bytes) -> bytes:
    """A TOML document with one value replaced by an odd one (or removed), re-written."""
    doc = tomllib.loads(raw.decode("utf-8"))
    path = draw(st.sampled_from([p for p in _paths(doc) if p]))
    if draw(st.booleans()):
        parent = _get(doc, path[:-1])
        parent = {k: v for k, v in parent.items() if k != path[-1]} if isinstance(parent, dict) \
            else parent
        doc = _replace(doc, path[:-1], parent) if path[:-1] else parent
    else:
        doc = _replace(doc, path, draw(TOML_VALUE))
    try:
        return to_toml(doc).encode("utf-8", "surrogatepass")
    except (TypeError, UnicodeEncodeError):
        return raw


def _get(value: Any, path: tuple[Any, ...]) -> Any:
    for key in path:
        value = value[key]
    return value


# --------------------------------------------------------------------------- the lab


def cli(*args: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(list(args))
    return code, out.getvalue(), err.getvalue()


def _form(name: str, code: str) -> bytes:
    return (EXAMPLES / name).read_text().replace('code = "TL-', f'code = "{code}-', 1).encode()


@pytest.fixture(scope="module")
def world(tmp_path_factory: pytest.TempPathFactory):
    root = tmp_path_factory.mktemp("fuzz")
    path = root / "vault"
    facts: dict[str, Any] = {"root": root, "vault": path, "scratch": root / "scratch"}
    facts["scratch"].mkdir()
    with Vault.init(path, TEST_PASSPHRASE) as v:  # the system clock, as the CLI sees it
        pids = [v.enrol(_form("consent-all-granted.toml", f"F{i}"))["participant_id"]
                for i in range(6)]
        for pid in pids[:5]:
            v.ingest_eeg(pid, EDF_SAMPLE)
        facts["export"] = root / "export"
        v.export_eeg("primary-analysis", facts["export"])
        erased = pids[5]
        v.withdraw_request(erased, received=dt.datetime.now(dt.UTC).date())
        facts["receipt"] = v.withdraw_process(erased)["receipt"]
        facts["head"] = v.sign_head().to_dict()
        facts["key"] = v.public_key.hex()
        facts["pid"] = pids[0]
    facts["proof"] = json.loads(cli_env(path, "audit", "prove", "1")[1])
    facts["manifest"] = json.loads((facts["export"] / "manifest.json").read_text())
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("MINDWARD_PASSPHRASE", TEST_PASSPHRASE)
        mp.setenv("MINDWARD_VAULT", str(path))
        mp.delenv("MINDWARD_DEBUG", raising=False)
        yield facts


def cli_env(path: Path, *args: str) -> tuple[int, str, str]:
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("MINDWARD_VAULT", str(path))
        return cli(*args)


def _state(path: Path) -> dict[str, bytes]:
    """The database and a non-empty WAL (an empty WAL and none are the same state)."""
    files = {p.name: p.read_bytes() for p in path.iterdir()
             if p.name.startswith("vault.db") and not p.name.endswith("-shm")}
    return {name: data for name, data in files.items() if data or name == "vault.db"}


def check(world: dict[str, Any], args: list[str], *, may_succeed: bool = False) -> None:
    """One clear line, a documented exit code, and the vault unchanged unless it succeeded
    (or was refused by the policy, which the audit log records)."""
    before = _state(world["vault"])
    code, out, err = cli(*args)
    assert "Traceback" not in out + err
    if code == 0 and may_succeed:
        return
    assert code in DOCUMENTED, (args, code, err)
    assert err.count("\n") <= 1, err
    assert err == "" or err.startswith("mindward: error: "), err
    if code != 4:  # a policy refusal is audited by design (the log then verifies, see below)
        assert _state(world["vault"]) == before, f"{args[:2]} changed the vault"


def _write(world: dict[str, Any], name: str, data: bytes) -> str:
    path = world["scratch"] / name
    path.write_bytes(data)
    return str(path)


# --------------------------------------------------------------------------- readers, in-process

POLICY = load_default_policy()
NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
OPTIONS = DeidOptions(date_offset_days=17)
EDF_BYTES = EDF_SAMPLE.read_bytes()
EDF_HEADER = int(EDF_BYTES[184:192])
TAL_OFFSETS = _annotation_spans(EDF_BYTES)[:400]
BDF_BYTES = (EDF_SAMPLE.parent / "test_generator_datarec_generator_2.bdf").read_bytes()
FORM = _form("consent-all-granted.toml", "FZ")
SIDECAR = {"sampling_rate": 256, "channel_names": ["Fz", "Cz"], "units": "uV",
           "start_date": "2026-03-02", "start_time": "10:00:00"}


def only_vault_errors(call: Callable[[], Any]) -> None:
    try:
        call()
    except VaultError as exc:
        assert exc.exit_code in DOCUMENTED and "\n" not in exc.message


@fast(60)
@given(data=mutated(EDF_BYTES, EDF_HEADER) | edf_field_mutant(EDF_BYTES)
       | edf_field_mutant(BDF_BYTES) | annotation_mutant())
def test_edf_reader(tmp_path_factory, data: bytes) -> None:
    path = tmp_path_factory.getbasetemp() / "fuzz.edf"
    path.write_bytes(data)

    def stream() -> None:
        result = deidentified_blocks(path, OPTIONS)
        for _ in result.blocks:
            pass

    only_vault_errors(stream)


CSV_ROW = st.lists(st.one_of(st.text(max_size=12), st.sampled_from(
    ["3", "0.5", "-1", "1e3", "\u0663", "nan", "1_0", " 2", '"', "0" * 32])), min_size=0, max_size=4)


@fast(80)
@given(rows=st.lists(CSV_ROW, max_size=5), header=st.booleans(), bom=st.booleans())
def test_scores_reader(tmp_path_factory, rows: list[list[str]], header: bool, bom: bool) -> None:
    lines = (["participant_id,item_id,value"] if header else []) + [",".join(r) for r in rows]
    path = tmp_path_factory.getbasetemp() / "fuzz.csv"
    path.write_bytes((b"\xef\xbb\xbf" if bom else b"") + "\n".join(lines).encode("utf-8", "replace"))
    for category in ("ratings-explicit", "scores-derived"):
        only_vault_errors(lambda c=category: read_rows(path, c, POLICY.categories[c]))


@fast(80)
@given(raw=mutated(FORM) | toml_mutant(FORM))
def test_consent_form_reader(raw: bytes) -> None:
    only_vault_errors(lambda: parse_consent_form(raw, POLICY, now=NOW))


@fast(60)
@given(raw=json_mutant(SIDECAR))
def test_sidecar_reader(tmp_path_factory, raw: bytes) -> None:
    base = tmp_path_factory.getbasetemp()
    np.save(base / "fuzz.npy", np.zeros((2, 300), dtype="<f4"))
    (base / "fuzz.json").write_bytes(raw)

    def stream() -> None:
        for _ in npy_deidentified_blocks(base / "fuzz.npy", base / "fuzz.json", OPTIONS).blocks:
            pass

    only_vault_errors(stream)


@fast(80)
@given(data=st.data())
def test_receipt_reader(world, data) -> None:
    raw = data.draw(json_mutant(world["receipt"]))
    ok, reasons = receipt.verify_text(raw, bytes.fromhex(world["key"]))
    if ok:  # only the document the vault signed verifies, however it is spelled
        assert load_json(raw) == world["receipt"] and reasons == []
    else:
        assert reasons and all(isinstance(r, str) and "\n" not in r for r in reasons)


@fast(60)
@given(data=st.data())
def test_tree_head_and_proof_readers(world, data) -> None:
    head = data.draw(json_mutant(world["head"]))
    only_vault_errors(lambda: read_tree_head(head.decode("utf-8", "replace")))
    proof = data.draw(json_mutant(world["proof"]))
    try:
        bundle = load_json(proof)
    except ValueError:
        return
    if isinstance(bundle, dict) and verify_proof(bundle, bytes.fromhex(world["key"])):
        assert bundle == world["proof"]


POLICY_FILES = {p.name: p.read_bytes() for p in (ROOT / "policies").glob("*.toml")}


@fast(40)
@given(name=st.sampled_from(sorted(POLICY_FILES)), data=st.data())
def test_policy_reader(tmp_path_factory, name: str, data) -> None:
    folder = tmp_path_factory.getbasetemp() / "fuzz-policy"
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir()
    for other, raw in POLICY_FILES.items():
        (folder / other).write_bytes(raw)
    raw = POLICY_FILES[name]
    (folder / name).write_bytes(data.draw(mutated(raw) | toml_mutant(raw)))
    only_vault_errors(lambda: load_policy_dir(folder))


# --------------------------------------------------------------------------- the CLI, end to end


@fast(12)
@given(raw=mutated(FORM) | toml_mutant(FORM))
def test_cli_enrol(world, raw: bytes) -> None:
    check(world, ["enrol", _write(world, "form.toml", raw)], may_succeed=True)


@fast(6)
@given(raw=mutated(FORM))
def test_cli_consent_amend(world, raw: bytes) -> None:
    check(world, ["consent", "amend", world["pid"], _write(world, "amend.toml", raw)],
          may_succeed=True)


@fast(12)
@given(data=mutated(EDF_BYTES, EDF_HEADER) | edf_field_mutant(EDF_BYTES))
def test_cli_ingest_eeg(world, data: bytes) -> None:
    check(world, ["ingest", "eeg", world["pid"], _write(world, "rec.edf", data)], may_succeed=True)


@fast(8)
@given(raw=json_mutant(SIDECAR))
def test_cli_ingest_eeg_sidecar(world, raw: bytes) -> None:
    array = world["scratch"] / "rec.npy"
    np.save(array, np.zeros((2, 300), dtype="<f4"))
    check(world, ["ingest", "eeg", world["pid"], str(array),
                  "--sidecar", _write(world, "rec.json", raw)], may_succeed=True)


@fast(10)
@given(rows=st.lists(CSV_ROW, max_size=4), pid_first=st.booleans())
def test_cli_ingest_scores(world, rows: list[list[str]], pid_first: bool) -> None:
    lines = ["participant_id,item_id,value"]
    lines += [",".join(([world["pid"]] if pid_first else []) + r) for r in rows]
    check(world, ["ingest", "scores", _write(world, "s.csv", "\n".join(lines).encode()),
                  "--kind", "explicit"], may_succeed=True)


@fast(6)
@given(data=st.data())
def test_cli_export_check(world, data) -> None:
    raw = data.draw(json_mutant(world["manifest"]))
    check(world, ["export", "check", _write(world, "manifest.json", raw)], may_succeed=True)


@fast(8)
@given(received=st.one_of(st.text(max_size=12), st.dates().map(dt.date.isoformat)),
       scope=st.one_of(st.just("full"), st.text(max_size=20), st.text(max_size=12).map(
           lambda s: "purpose:" + s)))
def test_cli_withdraw_request(world, received: str, scope: str) -> None:
    check(world, ["withdraw", "request", world["pid"], "--received", received, "--scope", scope],
          may_succeed=received == dt.datetime.now(dt.UTC).date().isoformat())


# The offline checkers need no passphrase: cheap, so more examples.


@fast(15)
@given(data=st.data())
def test_cli_receipt_verify(world, data) -> None:
    raw = data.draw(json_mutant(world["receipt"]))
    check(world, ["receipt", "verify", _write(world, "r.json", raw), "--key", world["key"]],
          may_succeed=True)


@fast(15)
@given(data=st.data())
def test_cli_check_proof(world, data) -> None:
    raw = data.draw(json_mutant(world["proof"]))
    check(world, ["audit", "check-proof", _write(world, "p.json", raw), "--key", world["key"]],
          may_succeed=True)


@fast(12)
@given(data=st.data(), consistency=st.booleans())
def test_cli_tree_heads(world, data, consistency: bool) -> None:
    head = _write(world, "h.json", data.draw(json_mutant(world["head"])))
    args = (["audit", "consistency", head, "--key", world["key"]] if consistency
            else ["audit", "verify", "--head", head, "--key", world["key"]])
    check(world, args, may_succeed=True)


@fast(10)
@given(data=st.data())
def test_cli_export_verify(world, data) -> None:
    copy = world["scratch"] / "export"
    shutil.rmtree(copy, ignore_errors=True)
    shutil.copytree(world["export"], copy)
    (copy / "manifest.json").write_bytes(data.draw(json_mutant(world["manifest"])))
    check(world, ["export", "verify", str(copy), "--key", world["key"]], may_succeed=True)


@fast(8)
@given(name=st.sampled_from(sorted(POLICY_FILES)), data=st.data())
def test_cli_policy_check(world, name: str, data) -> None:
    folder = world["scratch"] / "policy"
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir()
    for other, raw in POLICY_FILES.items():
        (folder / other).write_bytes(raw)
    (folder / name).write_bytes(data.draw(mutated(POLICY_FILES[name])))
    check(world, ["policy", "check", str(folder)], may_succeed=True)


ARGV_COMMANDS = [["consent", "show"], ["withdraw", "process"], ["withdraw", "receipt"],
                 ["audit", "prove"], ["audit", "show", "--start"], ["budget", "--purpose"],
                 ["access", "check", "--category", "eeg-raw", "--purpose"]]


@fast(15)
@given(command=st.sampled_from(ARGV_COMMANDS),
       value=st.one_of(st.text(max_size=40), st.sampled_from(
           ["x" * 100_000, "-1", "w-" + "0" * 16, "a\nb", "\x1b[31m", "b-\r\n"])))
def test_cli_arguments(world, command: list[str], value: str) -> None:
    if "\x00" in value:
        value = value.replace("\x00", "")  # the OS cannot pass a NUL in argv
    check(world, [*command, value], may_succeed=True)


def test_the_fuzzed_vault_still_verifies(world) -> None:
    code, out, _ = cli("verify", "--json")
    assert code == 0 and json.loads(out)["ok"] is True
    code, out, _ = cli("audit", "verify", "--key", world["key"], "--json")
    assert code == 0 and json.loads(out)["ok"] is True
    assert os.environ["MINDWARD_VAULT"] == str(world["vault"])
