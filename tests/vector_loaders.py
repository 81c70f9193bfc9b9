"""Readers for published test-vector files (test helpers; no vector is stored here).

Sources, all read in place:
- Wycheproof JSON, ../shared/vectors/wycheproof (github.com/C2SP/wycheproof,
  testvectors_v1 at commit dac1dd4729fd1f8dd9e1e9f3dce51d783da6c166).
- The `cryptography_vectors` package: NIST CAVP `.rsp` files, NIST SP 800-38F
  key-wrap files, RFC-derived `.txt` files, Ed25519 `sign.input` and the
  c2sp.org/chunked-encryption `vectors.json`.

The parsers are written here from the file layouts; they do not use
cryptography's own test utilities.
"""

from __future__ import annotations

import base64
import hashlib  # test-only: SHA-512/SHA-256 digests of vector plaintexts (vault.crypto has no SHA-512)
import json
import zlib
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from functools import cache
from pathlib import Path
from typing import Any

import cryptography_vectors
import pytest

from tests.conftest import SHARED_VECTORS, shared_vectors_dir

WYCHEPROOF_DIR = "wycheproof"
WYCHEPROOF_COMMIT = "dac1dd4729fd1f8dd9e1e9f3dce51d783da6c166"

# c2sp.org/chunked-encryption layout (the recipe in vault/crypto/__init__.py uses the same numbers)
C2SP_HEADER = 24 + 32  # salt || key commitment
C2SP_CHUNK = 16384
C2SP_TAG = 16


# --------------------------------------------------------------------------- Wycheproof


@dataclass(frozen=True)
class WycheproofCase:
    """One Wycheproof test with its group's parameters."""

    file: str
    group: dict[str, Any] = field(repr=False)
    test: dict[str, Any] = field(repr=False)

    @property
    def tc_id(self) -> int:
        return int(self.test["tcId"])

    @property
    def result(self) -> str:
        return str(self.test["result"])

    @property
    def flags(self) -> list[str]:
        return list(self.test.get("flags", []))

    def hex(self, name: str) -> bytes:
        return bytes.fromhex(self.test[name])

    def describe(self) -> str:
        return f"{self.file} tcId {self.tc_id} ({self.test.get('comment', '')!r}, {self.flags})"


@cache
def _wycheproof_json(filename: str) -> dict[str, Any]:
    path = SHARED_VECTORS / WYCHEPROOF_DIR / filename
    return json.loads(path.read_text(encoding="utf-8"))


def wycheproof_params(
    filename: str, *, skip_group: Callable[[dict[str, Any]], str | None] | None = None
) -> list[Any]:
    """pytest params, one per test; groups the caller cannot run become one skip each.

    Collection must not skip the whole module, so when ../shared/vectors is
    absent this returns a single `None` param; the test then calls
    `require_wycheproof`, which skips (or fails under CI).
    """
    path = SHARED_VECTORS / WYCHEPROOF_DIR / filename
    if not path.is_file():
        return [pytest.param(None, id="vectors-absent")]
    data = _wycheproof_json(filename)
    params: list[Any] = []
    skipped: dict[str, int] = {}
    for group in data["testGroups"]:
        reason = skip_group(group) if skip_group else None
        if reason:
            skipped[reason] = skipped.get(reason, 0) + len(group["tests"])
            continue
        for test in group["tests"]:
            case = WycheproofCase(filename, group, test)
            params.append(pytest.param(case, id=f"tc{case.tc_id}-{case.result}"))
    for n, (reason, count) in enumerate(sorted(skipped.items())):
        params.append(
            pytest.param(
                None, id=f"unsupported-{n}", marks=pytest.mark.skip(reason=f"{reason} ({count} vectors)")
            )
        )
    return params


def require_wycheproof(case: WycheproofCase | None, filename: str) -> WycheproofCase:
    """The case itself, or skip/fail exactly as tests.conftest.shared_vectors_dir does."""
    if case is None:
        shared_vectors_dir(WYCHEPROOF_DIR, filename)
        pytest.fail(f"{filename} appeared after collection; rerun")
    return case


def wycheproof_tests(filename: str) -> list[WycheproofCase]:
    """Every test of a file (inside a test: skips when the folder is absent)."""
    shared_vectors_dir(WYCHEPROOF_DIR, filename)
    data = _wycheproof_json(filename)
    return [WycheproofCase(filename, g, t) for g in data["testGroups"] for t in g["tests"]]


def wycheproof_declared_count(filename: str) -> int:
    return int(_wycheproof_json(filename)["numberOfTests"])


# --------------------------------------------------------------------------- chunked encryption


@dataclass(frozen=True)
class ChunkedVector:
    """A c2sp.org/chunked-encryption vector from either source, normalised.

    `msg_length`/`digest_hex` describe the message (valid) or the longest valid
    prefix (invalid with partial plaintext); `aead_key`/`base_nonce` are absent
    exactly for vectors that must fail while the header is processed.
    """

    source: str
    name: str
    key: bytes
    context: bytes
    valid: bool
    header_failure: bool
    msg_length: int | None
    digest_name: str
    digest_hex: str | None
    aead_key: bytes | None
    base_nonce: bytes | None
    encoded_ct: str | None = field(repr=False)
    ct_codec: str = field(repr=False)  # "hex-zlib" | "b64" | "b64-zlib"

    def ciphertext(self) -> bytes:
        if self.encoded_ct is None:
            return b""
        if self.ct_codec == "hex-zlib":
            return zlib.decompress(bytes.fromhex(self.encoded_ct))
        raw = base64.b64decode(self.encoded_ct)
        return zlib.decompress(raw) if self.ct_codec == "b64-zlib" else raw

    def digest_matches(self, data: bytes) -> bool:
        return hashlib.new(self.digest_name, data).hexdigest() == self.digest_hex

    def raw_nonce(self, counter: int) -> bytes:
        """Raw mode nonce: base nonce XOR the chunk number as a 12-byte big-endian integer
        (c2sp.org/chunked-encryption, "AEAD usage")."""
        assert self.base_nonce is not None
        return (int.from_bytes(self.base_nonce, "big") ^ counter).to_bytes(12, "big")


def chunked_from_wycheproof(case: WycheproofCase) -> ChunkedVector:
    t = case.test
    return ChunkedVector(
        source="wycheproof",
        name=f"tc{case.tc_id}",
        key=bytes.fromhex(t["key"]),
        context=bytes.fromhex(t["ctx"]),
        valid=case.result == "valid",
        header_failure="HeaderFailure" in case.flags,
        msg_length=t.get("msgLength"),
        digest_name="sha512",
        digest_hex=t.get("msgSha512"),
        aead_key=bytes.fromhex(t["aeadKey"]) if "aeadKey" in t else None,
        base_nonce=bytes.fromhex(t["baseNonce"]) if "baseNonce" in t else None,
        encoded_ct=t["ct"],
        ct_codec="hex-zlib",
    )


CRYPTOGRAPHY_CHUNKED = "chunked-encryption/vectors.json"


@cache
def _cryptography_chunked_raw() -> list[dict[str, Any]]:
    with cryptography_vectors.open_vector_file(CRYPTOGRAPHY_CHUNKED, "r") as fh:
        return list(json.load(fh)["vectors"])


def cryptography_chunked_vectors(aead: str) -> list[ChunkedVector]:
    out = []
    for v in _cryptography_chunked_raw():
        if v["aead"] != aead:
            continue
        out.append(
            ChunkedVector(
                source="cryptography_vectors",
                name=v["name"],
                key=bytes.fromhex(v["key"]),
                context=v["context"].encode("utf-8"),
                valid=v["expect"] == "success",
                # the format has no flags; these vectors (and only these) omit the AEAD key
                header_failure="aead_key" not in v,
                msg_length=v.get("payload_length"),
                digest_name="sha256",
                digest_hex=v.get("payload_sha256"),
                aead_key=bytes.fromhex(v["aead_key"]) if "aead_key" in v else None,
                base_nonce=bytes.fromhex(v["base_nonce"]) if "base_nonce" in v else None,
                encoded_ct=v["ciphertext"],
                ct_codec="b64-zlib" if v.get("compressed") else "b64",
            )
        )
    return out


def cryptography_chunked_aeads() -> set[str]:
    return {v["aead"] for v in _cryptography_chunked_raw()}


# --------------------------------------------------------------------------- NIST-style text files


@dataclass
class NistRecord:
    """One record of a NIST CAVP-style file: `[section]` values, fields, and a FAIL mark."""

    line: int
    section: dict[str, str]
    fields: dict[str, str] = field(default_factory=dict)
    fail: bool = False

    def hex(self, name: str) -> bytes:
        return bytes.fromhex(self.fields[name])

    def number(self, name: str) -> int:
        return int(self.fields[name])

    def where(self, path: str) -> str:
        return f"{path} line {self.line}"


def parse_nist(lines: Iterable[str], start_key: str) -> list[NistRecord]:
    """Parse `KEY = value` records; a record starts at each `start_key` line.

    `[Name = value]` lines set section values that apply to the records after
    them; a bare `FAIL` line marks the current record; `#` starts a comment.
    Anything else is an error, so a format change cannot silently drop records.
    """
    records: list[NistRecord] = []
    section: dict[str, str] = {}
    current: NistRecord | None = None
    for lineno, raw in enumerate(lines, 1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        if line.startswith("[") and line.endswith("]"):
            name, _, value = line[1:-1].partition("=")
            section = {**section, name.strip(): value.strip()}
            current = None
            continue
        if line == "FAIL":
            if current is None:
                raise ValueError(f"line {lineno}: FAIL outside a record")
            current.fail = True
            continue
        key, sep, value = line.partition("=")
        if not sep:
            raise ValueError(f"line {lineno}: cannot parse {line[:40]!r}")
        key = key.strip()
        if key.lower() == start_key.lower():
            current = NistRecord(line=lineno, section=dict(section))
            records.append(current)
        if current is None:
            raise ValueError(f"line {lineno}: field {key!r} before the first {start_key!r}")
        if key in current.fields:
            raise ValueError(f"line {lineno}: field {key!r} twice in one record")
        current.fields[key] = value.strip()
    return records


def nist_file(path: str, start_key: str) -> list[NistRecord]:
    with cryptography_vectors.open_vector_file(path, "r") as fh:
        return parse_nist(fh, start_key)


def vectors_file_exists(path: str) -> bool:
    return Path(cryptography_vectors.__file__).parent.joinpath(path).is_file()


# --------------------------------------------------------------------------- Ed25519 sign.input


@dataclass(frozen=True)
class Ed25519Line:
    line: int
    seed: bytes
    public_key: bytes
    message: bytes
    signature: bytes


def parse_ed25519_sign_input(lines: Iterable[str]) -> list[Ed25519Line]:
    """`sk||pk : pk : message : signature||message :`, all hex, one test per line."""
    out: list[Ed25519Line] = []
    for lineno, raw in enumerate(lines, 1):
        if not raw.strip():
            continue
        parts = raw.strip().split(":")
        if len(parts) != 5 or parts[4] != "":
            raise ValueError(f"line {lineno}: expected 4 colon-terminated fields")
        secret, public, message, signed = (bytes.fromhex(p) for p in parts[:4])
        if secret[32:] != public or signed[64:] != message:
            raise ValueError(f"line {lineno}: inconsistent fields")
        out.append(Ed25519Line(lineno, secret[:32], public, message, signed[:64]))
    return out


def ed25519_sign_input(path: str) -> list[Ed25519Line]:
    with cryptography_vectors.open_vector_file(path, "r") as fh:
        return parse_ed25519_sign_input(fh)
