"""The cryptographic recipes anyone in `vault` may use, and the only door to the primitives.

WARNING: `vault.crypto` is the only package allowed to import `cryptography`, `hashlib`,
`hmac` or `secrets` (enforced by the import contracts in pyproject.toml and by
tests/architecture/). Three modules, from safe to hazardous:

- `vault.crypto` (this module): recipes anyone may use. Random bytes, keys and ids from the
  operating system's CSPRNG; SHA-256, HMAC-SHA-256, RFC 9162 Merkle hashing; Argon2id
  passphrase keys (RFC 9106, never below its second recommended option: t=3, p=4, m=64 MiB);
  labelled HKDF-Expand-SHA-256 sub-keys (RFC 5869); Ed25519 signatures (RFC 8032) over
  domain-separated messages; fingerprints and key commitments.
- `vault.crypto.sealing`: the blob AEAD (C2SP chunked encryption) and key wrapping (RFC 3394,
  RFC 5649). Only `vault.access` imports it.
- `vault.crypto.hazmat`: raw constructions (AES-GCM under a caller-chosen nonce, raw HKDF) for
  the published vectors and the benchmark. Nothing in `vault/` imports it.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from dataclasses import dataclass

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import hashes
from cryptography.hazmat.primitives.asymmetric.ed25519 import (
    Ed25519PrivateKey,
    Ed25519PublicKey,
)
from cryptography.hazmat.primitives.kdf.argon2 import Argon2id
from cryptography.hazmat.primitives.kdf.hkdf import HKDFExpand

from vault.crypto.sealing import unwrap_key as _unwrap_key
from vault.crypto.sealing import wrap_key as _wrap_key
from vault.errors import IntegrityError, UsageError

KEY_SIZE = 32

# --------------------------------------------------------------------------- randomness


def random_bytes(n: int) -> bytes:
    """`n` bytes from the operating system's CSPRNG (`secrets.token_bytes`, i.e. `os.urandom`),
    for every request: keys, salts and ids as well as the noise samplers' long streams."""
    return secrets.token_bytes(n)


def new_key() -> bytes:
    """A fresh uniformly random 256-bit key."""
    return secrets.token_bytes(KEY_SIZE)


def random_id(nbytes: int = 16) -> str:
    """A random identifier (hex), unlinkable to anything else."""
    return secrets.token_hex(nbytes)


def constant_time_equal(a: bytes, b: bytes) -> bool:
    return hmac.compare_digest(a, b)


# --------------------------------------------------------------------------- hashing


def sha256(data: bytes) -> bytes:
    return hashlib.sha256(data).digest()


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


class StreamingDigest:
    """SHA-256 over a stream (for content digests of files and exports)."""

    def __init__(self) -> None:
        self._h = hashlib.sha256()

    def update(self, data: bytes) -> None:
        self._h.update(data)

    def hexdigest(self) -> str:
        return self._h.hexdigest()


def merkle_leaf_hash(entry: bytes) -> bytes:
    """RFC 9162 section 2.1.1: MTH({d}) = SHA-256(0x00 || d)."""
    return hashlib.sha256(b"\x00" + entry).digest()


def merkle_node_hash(left: bytes, right: bytes) -> bytes:
    """RFC 9162 section 2.1.1: SHA-256(0x01 || left || right)."""
    return hashlib.sha256(b"\x01" + left + right).digest()


EMPTY_TREE_HASH = hashlib.sha256(b"").digest()


def hmac_sha256(key: bytes, message: bytes) -> bytes:
    return hmac.digest(key, message, "sha256")


# --------------------------------------------------------------------------- key derivation


@dataclass(frozen=True)
class KdfParams:
    """Argon2id parameters stored beside each wrapped master key."""

    salt: bytes
    iterations: int = 3
    lanes: int = 4
    memory_kib: int = 65536  # 64 MiB

    # RFC 9106 section 4, second recommended option
    MIN_ITERATIONS = 3
    MIN_MEMORY_KIB = 65536

    @classmethod
    def fresh(cls) -> KdfParams:
        return cls(salt=secrets.token_bytes(16))

    def check(self) -> None:
        if self.iterations < self.MIN_ITERATIONS or self.memory_kib < self.MIN_MEMORY_KIB:
            raise UsageError(
                "Argon2id parameters below RFC 9106's second recommended option "
                "(t=3, m=64 MiB) are refused"
            )
        if self.lanes < 1 or len(self.salt) < 16:
            raise UsageError("Argon2id needs at least one lane and a 16-byte salt")

    def as_dict(self) -> dict[str, object]:
        return {
            "algorithm": "argon2id",
            "salt": self.salt.hex(),
            "iterations": self.iterations,
            "lanes": self.lanes,
            "memory_kib": self.memory_kib,
        }

    @classmethod
    def from_dict(cls, d: dict[str, object]) -> KdfParams:
        if d.get("algorithm") != "argon2id":
            raise IntegrityError("unknown key-derivation algorithm in vault")
        return cls(
            salt=bytes.fromhex(str(d["salt"])),
            iterations=int(d["iterations"]),  # type: ignore[call-overload]
            lanes=int(d["lanes"]),  # type: ignore[call-overload]
            memory_kib=int(d["memory_kib"]),  # type: ignore[call-overload]
        )


def argon2id(
    password: bytes, salt: bytes, *, iterations: int, lanes: int, memory_kib: int, length: int,
    ad: bytes | None = None, key: bytes | None = None,
) -> bytes:
    """Raw Argon2id (RFC 9106; `key` is its secret value K); exposed for the published vectors."""
    return Argon2id(
        salt=salt, length=length, iterations=iterations, lanes=lanes,
        memory_cost=memory_kib, ad=ad, secret=key,
    ).derive(password)


def passphrase_key(passphrase: str, params: KdfParams) -> bytes:
    """Key-encryption key from a passphrase (Argon2id, RFC 9106)."""
    params.check()
    return argon2id(
        passphrase.encode("utf-8"), params.salt, iterations=params.iterations,
        lanes=params.lanes, memory_kib=params.memory_kib, length=KEY_SIZE,
    )


def hkdf_expand(prk: bytes, info: bytes, length: int) -> bytes:
    """HKDF-Expand with SHA-256 only (RFC 5869 section 2.3); `prk` must be uniformly random."""
    try:
        return HKDFExpand(algorithm=hashes.SHA256(), length=length, info=info).derive(prk)
    except ValueError as exc:
        raise UsageError(f"HKDF-Expand cannot produce {length} bytes") from exc


def derive_key(root: bytes, label: str, *context: bytes) -> bytes:
    """A 256-bit sub-key of a uniformly random `root`, bound to a label and context.

    info = "mindward/v1/" label 0x00 (len16 || part)*, so no two (label, context)
    tuples share an encoding.
    """
    info = b"mindward/v1/" + label.encode("ascii") + b"\x00"
    info += b"".join(len(part).to_bytes(2, "big") + part for part in context)
    return hkdf_expand(root, info, KEY_SIZE)


# --------------------------------------------------------------------------- signatures

_SIG_PREFIX = b"mindward/v1/signature/"


def _signed_message(domain: str, payload: bytes) -> bytes:
    return _SIG_PREFIX + domain.encode("ascii") + b"\x00" + payload


class SigningKey:
    """The vault's Ed25519 key (RFC 8032). The seed only leaves here wrapped."""

    def __init__(self, seed: bytes) -> None:
        self._key = Ed25519PrivateKey.from_private_bytes(seed)
        self._seed = seed

    @classmethod
    def generate(cls) -> SigningKey:
        return cls(secrets.token_bytes(32))

    def wrapped(self, kek: bytes) -> bytes:
        """The seed under AES key wrap (RFC 3394), as `vault.crypto.sealing` wraps keys."""
        return _wrap_key(kek, self._seed)

    @classmethod
    def unwrap(cls, kek: bytes, wrapped: bytes) -> SigningKey:
        return cls(_unwrap_key(kek, wrapped))

    @property
    def public_key(self) -> bytes:
        return self._key.public_key().public_bytes_raw()

    def sign(self, domain: str, payload: bytes) -> bytes:
        """Sign `payload` in a named domain (tree-head, manifest, receipt...)."""
        return self._key.sign(_signed_message(domain, payload))

    def __reduce__(self) -> object:
        raise TypeError("signing keys are not serialisable")


def verify_raw(public_key: bytes, message: bytes, signature: bytes) -> bool:
    """Plain RFC 8032 verification; False for any malformed input."""
    try:
        Ed25519PublicKey.from_public_bytes(public_key).verify(signature, message)
    except (InvalidSignature, ValueError):
        return False
    return True


def verify_signature(public_key: bytes, domain: str, payload: bytes, signature: bytes) -> bool:
    return verify_raw(public_key, _signed_message(domain, payload), signature)


def fingerprint(public_key: bytes) -> str:
    """Short, human-comparable fingerprint of a public key: 'mw:' + 40 hex digits."""
    digest = hashlib.sha256(b"mindward/v1/fingerprint\x00" + public_key).hexdigest()[:40]
    return "mw:" + "-".join(digest[i : i + 4] for i in range(0, 40, 4))


def key_commitment(key: bytes, *context: bytes) -> str:
    """A public commitment to a data key (hex), so receipts can name it without revealing it."""
    return hmac_sha256(key, b"mindward/v1/key-commitment\x00" + b"\x00".join(context)).hex()

