"""Every cryptographic primitive mindward uses, and nothing else.

WARNING: this is the only module allowed to import `cryptography`, `hashlib`,
`hmac` or `secrets` (enforced by the import contracts in pyproject.toml and by
tests/architecture/test_architecture.py). Its callers are the key ring (`vault.access.keys`), the
blob store (`vault.access.blobs`), the audit log (`vault.audit.log`, `vault.audit.merkle`) and,
later, pseudonyms and noise. Nobody outside this module chooses a nonce.

Recipes:
- passphrase -> key: Argon2id (RFC 9106), parameters never below the RFC's
  second recommended option (t=3, p=4, m=64 MiB).
- key wrapping: AES key wrap (RFC 3394, NIST SP 800-38F KW).
- sub-keys: HKDF-Expand with SHA-256 (RFC 5869), labelled and length-prefixed.
- blobs: C2SP chunked encryption v1 (c2sp.org/chunked-encryption) with
  AES-256-GCM and HKDF-SHA-512: a 24-byte salt and 32-byte key commitment,
  16 KiB chunks, the last always short, nonce = base nonce XOR counter.
- signatures: Ed25519 (RFC 8032) over domain-separated messages.
- Merkle hashing: RFC 9162 section 2.1 (SHA-256, 0x00 leaf / 0x01 node).
"""

from __future__ import annotations

import hashlib
import hmac
import io
import secrets
from collections.abc import Iterator
from dataclasses import dataclass
from typing import BinaryIO

from cryptography.exceptions import InvalidSignature, InvalidTag
from cryptography.hazmat.primitives import hashes
from cryptography.hazmat.primitives.asymmetric.ed25519 import (
    Ed25519PrivateKey,
    Ed25519PublicKey,
)
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes
from cryptography.hazmat.primitives.ciphers.aead import AESGCM
from cryptography.hazmat.primitives.kdf.argon2 import Argon2id
from cryptography.hazmat.primitives.kdf.hkdf import HKDF, HKDFExpand
from cryptography.hazmat.primitives.keywrap import (
    InvalidUnwrap,
    aes_key_unwrap,
    aes_key_unwrap_with_padding,
    aes_key_wrap,
    aes_key_wrap_with_padding,
)

from vault.errors import AuthenticationFailed, IntegrityError, UsageError

KEY_SIZE = 32

# --------------------------------------------------------------------------- randomness


_OS_ONLY = 4096  # requests below this size come straight from the operating system
_KEY_OUTPUT = 64 << 20  # bytes of keystream per fresh key
_ZEROS = bytes(1 << 20)


def random_bytes(n: int) -> bytes:
    """`n` bytes from a CSPRNG: the operating system's for short requests (keys, salts, ids);
    for long ones (noise samplers) an AES-256-CTR keystream under a fresh 256-bit key from the
    operating system for every 64 MiB, several times faster than the kernel's generator here.

    AES in counter mode as the generator is the core of NIST SP 800-90A's CTR_DRBG (this is not
    a full CTR_DRBG: each key is used once, for one stretch of output, then dropped).
    """
    if n < _OS_ONLY:
        return secrets.token_bytes(n)
    parts = []
    for start in range(0, n, _KEY_OUTPUT):
        parts += _keystream_parts(secrets.token_bytes(KEY_SIZE), min(_KEY_OUTPUT, n - start))
    return parts[0] if len(parts) == 1 else b"".join(parts)


def keystream(key: bytes, n: int, counter_block: bytes = bytes(16)) -> bytes:
    """`n` bytes of AES-CTR keystream from `counter_block` (NIST SP 800-38A section 6.5)."""
    return b"".join(_keystream_parts(key, n, counter_block))


def _keystream_parts(key: bytes, n: int, counter_block: bytes = bytes(16)) -> list[bytes]:
    enc = Cipher(algorithms.AES(key), modes.CTR(counter_block)).encryptor()
    zeros = memoryview(_ZEROS)
    parts = [enc.update(zeros[: min(len(zeros), n - start)]) for start in range(0, n, len(zeros))]
    enc.finalize()
    return parts


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


def hkdf_sha256(ikm: bytes, salt: bytes | None, info: bytes, length: int) -> bytes:
    """HKDF extract-and-expand (RFC 5869); exposed for the published vectors."""
    try:
        return HKDF(algorithm=hashes.SHA256(), length=length, salt=salt, info=info).derive(ikm)
    except ValueError as exc:
        raise UsageError(f"HKDF cannot produce {length} bytes") from exc


def hkdf_expand(prk: bytes, info: bytes, length: int, *, sha512: bool = False) -> bytes:
    """HKDF-Expand only (RFC 5869 section 2.3)."""
    algorithm = hashes.SHA512() if sha512 else hashes.SHA256()
    try:
        return HKDFExpand(algorithm=algorithm, length=length, info=info).derive(prk)
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


# --------------------------------------------------------------------------- key wrapping


def wrap_key(kek: bytes, key: bytes) -> bytes:
    """AES key wrap (RFC 3394): 40 bytes out for a 32-byte key."""
    try:
        return aes_key_wrap(kek, key)
    except ValueError as exc:
        raise UsageError("AES-KW wraps keys of 16 bytes or more, in 8-byte steps") from exc


def unwrap_key(kek: bytes, wrapped: bytes) -> bytes:
    try:
        return aes_key_unwrap(kek, wrapped)
    except (InvalidUnwrap, ValueError) as exc:
        raise IntegrityError("a wrapped key failed its integrity check") from exc


def wrap_key_padded(kek: bytes, key: bytes) -> bytes:
    """AES key wrap with padding (RFC 5649), for secrets of any length."""
    try:
        return aes_key_wrap_with_padding(kek, key)
    except ValueError as exc:
        raise UsageError("AES-KWP needs a non-empty key and a valid wrapping key") from exc


def unwrap_key_padded(kek: bytes, wrapped: bytes) -> bytes:
    try:
        return aes_key_unwrap_with_padding(kek, wrapped)
    except (InvalidUnwrap, ValueError) as exc:
        raise IntegrityError("a wrapped key failed its integrity check") from exc


def unwrap_master(kek: bytes, wrapped: bytes) -> bytes:
    """Unwrap a master key; a failure here means a wrong passphrase."""
    try:
        return aes_key_unwrap(kek, wrapped)
    except (InvalidUnwrap, ValueError) as exc:
        raise AuthenticationFailed("wrong passphrase") from exc


# --------------------------------------------------------------------------- AEAD


def aes_gcm_encrypt(key: bytes, nonce: bytes, plaintext: bytes, aad: bytes | None) -> bytes:
    """Raw AES-GCM (NIST SP 800-38D); exposed for vectors and the benchmark."""
    return AESGCM(key).encrypt(nonce, plaintext, aad)


def aes_gcm_decrypt(key: bytes, nonce: bytes, ciphertext: bytes, aad: bytes | None) -> bytes:
    try:
        return AESGCM(key).decrypt(nonce, ciphertext, aad)
    except (InvalidTag, ValueError) as exc:
        raise IntegrityError("AES-GCM authentication failed") from exc


class RawAesGcm:
    """A keyed AES-GCM object for the benchmark's raw-rate baseline."""

    def __init__(self, key: bytes) -> None:
        self._aead = AESGCM(key)

    def encrypt(self, nonce: bytes, data: bytes) -> bytes:
        return self._aead.encrypt(nonce, data, None)

    def decrypt(self, nonce: bytes, data: bytes) -> bytes:
        return self._aead.decrypt(nonce, data, None)


# --------------------------------------------------------------------------- chunked encryption

CHUNK_SIZE = 16384
TAG_SIZE = 16
SALT_SIZE = 24
COMMITMENT_SIZE = 32
HEADER_SIZE = SALT_SIZE + COMMITMENT_SIZE
NONCE_SIZE = 12
CT_CHUNK_SIZE = CHUNK_SIZE + TAG_SIZE
MAX_CHUNKS = 1 << 38
_C2SP_AEAD = b"AEAD_AES_256_GCM"
_C2SP_PREFIX = b"c2sp.org/chunked-encryption@v1+"


def _chunked_keys(input_key: bytes, salt: bytes, context: bytes) -> tuple[bytes, int, bytes]:
    if len(input_key) != KEY_SIZE:
        raise IntegrityError("chunked encryption needs a 32-byte input key")
    info = _C2SP_PREFIX + _C2SP_AEAD + b"\x00" + salt + context
    okm = hkdf_expand(input_key, info, KEY_SIZE + NONCE_SIZE + COMMITMENT_SIZE, sha512=True)
    key = okm[:KEY_SIZE]
    base_nonce = int.from_bytes(okm[KEY_SIZE : KEY_SIZE + NONCE_SIZE], "big")
    return key, base_nonce, okm[KEY_SIZE + NONCE_SIZE :]


def chunked_length(plaintext_length: int) -> int:
    """Ciphertext length of a message of `plaintext_length` bytes."""
    return HEADER_SIZE + (plaintext_length // CHUNK_SIZE + 1) * TAG_SIZE + plaintext_length


class ChunkedEncryptor:
    """Push-based streaming encryption; memory is one chunk plus the caller's buffer.

    `header` must be written first, then every `update()` output, then `finalize()`.
    """

    def __init__(self, input_key: bytes, context: bytes, *, _salt: bytes | None = None) -> None:
        salt = secrets.token_bytes(SALT_SIZE) if _salt is None else _salt
        key, self._base_nonce, commitment = _chunked_keys(input_key, salt, context)
        self._aead = AESGCM(key)
        self.header = salt + commitment
        self._counter = 0
        self._pending = bytearray()
        self._done = False
        self.plaintext_length = 0

    def _seal(self, chunk: bytes | memoryview) -> bytes:
        if self._counter >= MAX_CHUNKS:
            raise IntegrityError("message exceeds the chunk counter")
        nonce = (self._base_nonce ^ self._counter).to_bytes(NONCE_SIZE, "big")
        self._counter += 1
        return self._aead.encrypt(nonce, chunk, None)

    def update(self, data: bytes | bytearray | memoryview) -> bytes:
        if self._done:
            raise UsageError("encryptor already finalized")
        self.plaintext_length += len(data)
        out: list[bytes] = []
        view = memoryview(data)
        if self._pending:
            need = CHUNK_SIZE - len(self._pending)
            self._pending += view[:need]
            view = view[need:]
            if len(self._pending) < CHUNK_SIZE:
                return b""
            out.append(self._seal(bytes(self._pending)))
            self._pending.clear()
        full = len(view) - len(view) % CHUNK_SIZE
        for start in range(0, full, CHUNK_SIZE):
            out.append(self._seal(view[start : start + CHUNK_SIZE]))
        self._pending += view[full:]
        return b"".join(out)

    def finalize(self) -> bytes:
        """The final, always short chunk (possibly empty)."""
        if self._done:
            raise UsageError("encryptor already finalized")
        self._done = True
        last = self._seal(bytes(self._pending))
        self._pending.clear()
        return last


def _read_exactly(reader: BinaryIO, n: int) -> bytes:
    parts: list[bytes] = []
    remaining = n
    while remaining:
        part = reader.read(remaining)
        if not part:
            break
        parts.append(part)
        remaining -= len(part)
    return parts[0] if len(parts) == 1 else b"".join(parts)


def _readinto_exactly(reader: BinaryIO, view: memoryview) -> int:
    """Fill `view` from `reader` unless the stream ends first; returns the bytes read."""
    got = 0
    # real files read straight into the buffer; any other stream through its own read()
    readinto = reader.readinto if isinstance(reader, io.BufferedReader | io.FileIO) else None
    while got < len(view):
        if readinto is not None:
            n = readinto(view[got:])
        else:
            part = reader.read(len(view) - got)
            n = len(part)
            view[got : got + n] = part
        if not n:
            break
        got += n
    return got


class ChunkedDecryptor:
    """Pull-based streaming decryption of a C2SP chunked ciphertext.

    Checks the key commitment before decrypting anything, hands out a chunk
    only after its tag verified, checks the final short chunk and that nothing
    follows it before handing that chunk out, and once it has failed keeps
    failing on every later call.
    """

    def __init__(self, input_key: bytes, context: bytes, reader: BinaryIO) -> None:
        self._reader = reader
        self._buffer = bytearray()
        self._failed: str | None = None
        self._finished = False
        self._counter = 0
        header = _read_exactly(reader, HEADER_SIZE)
        if len(header) != HEADER_SIZE:
            self._fail("ciphertext is truncated (no complete header)")
        key, self._base_nonce, commitment = _chunked_keys(input_key, header[:SALT_SIZE], context)
        if not hmac.compare_digest(commitment, header[SALT_SIZE:]):
            self._fail("key commitment does not match (wrong key, wrong context or tampered)")
        self._aead = AESGCM(key)

    def _fail(self, why: str) -> None:
        self._failed = why
        raise IntegrityError(f"integrity check failed: {why}")

    def _nonce(self) -> bytes:
        if self._counter >= MAX_CHUNKS:
            self._fail("message exceeds the chunk counter")
        nonce = (self._base_nonce ^ self._counter).to_bytes(NONCE_SIZE, "big")
        self._counter += 1
        return nonce

    def _open(self, chunk: memoryview) -> bytes:
        try:
            return self._aead.decrypt(self._nonce(), chunk, None)
        except InvalidTag:
            self._fail(f"chunk {self._counter - 1} failed authentication")
            raise  # unreachable: _fail raises

    def next_run(self, max_chunks: int = 64) -> list[bytes] | None:
        """The next run of up to `max_chunks` authenticated plaintext chunks, or None at the end.

        A run is handed out only when every chunk in it authenticated and, if
        it holds the final chunk, nothing follows that chunk.
        """
        if self._failed is not None:
            raise IntegrityError(f"integrity check failed: {self._failed}")
        if self._finished:
            return None
        if max_chunks < 1:
            raise UsageError("max_chunks must be at least 1")
        want = max_chunks * CT_CHUNK_SIZE
        if len(self._buffer) != want:
            self._buffer = bytearray(want)
        view = memoryview(self._buffer)
        got = _readinto_exactly(self._reader, view)
        full = got // CT_CHUNK_SIZE
        final = got < want
        if final and got - full * CT_CHUNK_SIZE < TAG_SIZE:
            self._fail("ciphertext is truncated (final chunk missing)")
        run = [self._open(view[i * CT_CHUNK_SIZE : (i + 1) * CT_CHUNK_SIZE]) for i in range(full)]
        if final:
            run.append(self._open(view[full * CT_CHUNK_SIZE : got]))
            if self._reader.read(1):
                self._fail("data follows the final chunk")
            self._finished = True
        return run

    def next_chunk(self, max_chunks: int = 64) -> bytes | None:
        """The next run joined into one bytes object (see `next_run`)."""
        run = self.next_run(max_chunks)
        return None if run is None else b"".join(run)

    def __iter__(self) -> Iterator[bytes]:
        """Authenticated chunks, handed out a verified run at a time."""
        while (run := self.next_run()) is not None:
            yield from run


def chunked_encrypt(input_key: bytes, context: bytes, plaintext: bytes) -> bytes:
    """One-shot chunked encryption of a small record."""
    enc = ChunkedEncryptor(input_key, context)
    return enc.header + enc.update(plaintext) + enc.finalize()


def chunked_decrypt(input_key: bytes, context: bytes, ciphertext: bytes) -> bytes:
    """One-shot chunked decryption of a message held in memory; raises IntegrityError,
    never returns partial data. Same checks as `ChunkedDecryptor`, without its buffers."""
    view = memoryview(ciphertext)
    if len(view) < HEADER_SIZE:
        raise IntegrityError("integrity check failed: ciphertext is truncated (no complete header)")
    key, base_nonce, commitment = _chunked_keys(input_key, bytes(view[:SALT_SIZE]), context)
    if not hmac.compare_digest(commitment, view[SALT_SIZE:HEADER_SIZE]):
        raise IntegrityError("integrity check failed: key commitment does not match "
                             "(wrong key, wrong context or tampered)")
    body = view[HEADER_SIZE:]
    full, final = divmod(len(body), CT_CHUNK_SIZE)
    if final < TAG_SIZE:  # the final chunk is always short, and never missing
        raise IntegrityError("integrity check failed: ciphertext is truncated (final chunk missing)")
    if full >= MAX_CHUNKS:
        raise IntegrityError("integrity check failed: message exceeds the chunk counter")
    aead = AESGCM(key)
    out = []
    for i in range(full + 1):
        nonce = (base_nonce ^ i).to_bytes(NONCE_SIZE, "big")
        try:
            out.append(aead.decrypt(nonce, body[i * CT_CHUNK_SIZE : (i + 1) * CT_CHUNK_SIZE], None))
        except InvalidTag:
            raise IntegrityError(f"integrity check failed: chunk {i} failed authentication") from None
    return out[0] if full == 0 else b"".join(out)


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
        return wrap_key(kek, self._seed)

    @classmethod
    def unwrap(cls, kek: bytes, wrapped: bytes) -> SigningKey:
        return cls(unwrap_key(kek, wrapped))

    @property
    def public_key(self) -> bytes:
        return self._key.public_key().public_bytes_raw()

    def sign(self, domain: str, payload: bytes) -> bytes:
        """Sign `payload` in a named domain (tree-head, manifest, receipt...)."""
        return self._key.sign(_signed_message(domain, payload))

    def sign_raw(self, message: bytes) -> bytes:
        """Plain RFC 8032 signature; for the published vectors only."""
        return self._key.sign(message)

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

