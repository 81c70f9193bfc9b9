"""HAZARDOUS MATERIALS: raw constructions for the published vectors and the benchmark only.

WARNING: nothing in `vault/` imports this module, and nothing should. These functions let the
caller choose the nonce (reusing one under a key breaks AES-GCM's confidentiality and its
authentication) or sign bytes with no domain, and they skip the key commitment, the labels
and the length framing that the recipes in `vault.crypto` and the blob format in
`vault.crypto.sealing` add. They exist so that tests can check the primitives against
published vectors (NIST SP 800-38D, RFC 5869, RFC 8032, Wycheproof) and so that
`mindward bench` has a raw baseline to measure the vault against. The import contracts in
pyproject.toml allow only tests and `bench/` to import it.
"""

from __future__ import annotations

from cryptography.exceptions import InvalidTag
from cryptography.hazmat.primitives import hashes
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from cryptography.hazmat.primitives.ciphers.aead import AESGCM
from cryptography.hazmat.primitives.kdf.hkdf import HKDF

from vault.errors import IntegrityError, UsageError


def aes_gcm_encrypt(key: bytes, nonce: bytes, plaintext: bytes, aad: bytes | None) -> bytes:
    """Raw AES-GCM (NIST SP 800-38D) under a caller-chosen nonce."""
    return AESGCM(key).encrypt(nonce, plaintext, aad)


def aes_gcm_decrypt(key: bytes, nonce: bytes, ciphertext: bytes, aad: bytes | None) -> bytes:
    """Raw AES-GCM decryption; IntegrityError when the tag does not verify."""
    try:
        return AESGCM(key).decrypt(nonce, ciphertext, aad)
    except (InvalidTag, ValueError) as exc:
        raise IntegrityError("AES-GCM authentication failed") from exc


class RawAesGcm:
    """A keyed AES-GCM object for the benchmark's raw-rate baseline (caller-chosen nonces)."""

    def __init__(self, key: bytes) -> None:
        self._aead = AESGCM(key)

    def encrypt(self, nonce: bytes, data: bytes) -> bytes:
        return self._aead.encrypt(nonce, data, None)

    def decrypt(self, nonce: bytes, data: bytes) -> bytes:
        return self._aead.decrypt(nonce, data, None)


def hkdf_sha256(ikm: bytes, salt: bytes | None, info: bytes, length: int) -> bytes:
    """HKDF extract-and-expand with SHA-256 (RFC 5869), for its published vectors."""
    try:
        return HKDF(algorithm=hashes.SHA256(), length=length, salt=salt, info=info).derive(ikm)
    except ValueError as exc:
        raise UsageError(f"HKDF cannot produce {length} bytes") from exc


def ed25519_sign(seed: bytes, message: bytes) -> bytes:
    """Plain RFC 8032 Ed25519 signature of `message`, with no domain separation (the vault's
    `SigningKey.sign` always prefixes one)."""
    return Ed25519PrivateKey.from_private_bytes(seed).sign(message)
