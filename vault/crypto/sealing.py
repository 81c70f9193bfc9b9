"""Sealing: the blob AEAD and key wrapping. Importable only by `vault.access` (the door's rooms).

WARNING: these functions turn vault ciphertext and wrapped keys into plaintext and keys. The
import contracts in pyproject.toml let only `vault.access.*` import this module (and
`vault.crypto` itself, whose `SigningKey` wraps its seed here); everything else reaches
participant data through a grant at the door.

- blobs: C2SP chunked encryption v1 (c2sp.org/chunked-encryption) with AES-256-GCM and
  HKDF-SHA-512: a 24-byte salt and 32-byte key commitment, 16 KiB chunks, the last always
  short, nonce = base nonce XOR counter. Nobody outside this module chooses a nonce.
- key wrapping: AES key wrap (RFC 3394, NIST SP 800-38F KW) and with padding (RFC 5649, KWP).
"""

from __future__ import annotations

import hmac
import io
import secrets
from collections.abc import Iterator
from typing import BinaryIO

from cryptography.exceptions import InvalidTag
from cryptography.hazmat.primitives import hashes
from cryptography.hazmat.primitives.ciphers.aead import AESGCM
from cryptography.hazmat.primitives.kdf.hkdf import HKDFExpand
from cryptography.hazmat.primitives.keywrap import (
    InvalidUnwrap,
    aes_key_unwrap,
    aes_key_unwrap_with_padding,
    aes_key_wrap,
    aes_key_wrap_with_padding,
)

from vault.errors import AuthenticationFailed, IntegrityError, UsageError

KEY_SIZE = 32


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
    info = _C2SP_PREFIX + _C2SP_AEAD + b"\x00" + salt + context  # HKDF-Expand-SHA-512 (RFC 5869)
    okm = HKDFExpand(hashes.SHA512(), KEY_SIZE + NONCE_SIZE + COMMITMENT_SIZE, info).derive(input_key)
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
