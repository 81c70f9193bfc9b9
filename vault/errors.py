"""The one error tree of mindward.

Every failure a user can cause is a `VaultError` subclass with an exit code
from the table in docs/cli.md. Messages name fields and ids, never values
taken from participant data.
"""

from __future__ import annotations


class VaultError(Exception):
    """Base class. `exit_code` is what the CLI returns for it."""

    exit_code = 1

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message


class UsageError(VaultError):
    """The call itself is wrong (bad option value, missing argument)."""

    exit_code = 2


class AuthenticationFailed(VaultError):
    """Wrong passphrase, unknown member, or no passphrase available."""

    exit_code = 3


class PolicyRefusal(VaultError):
    """The policy engine refused the request; reasons are in the audit log."""

    exit_code = 4


class IntegrityError(VaultError):
    """Ciphertext, signature, proof or audit log failed verification."""

    exit_code = 5


class NotFound(VaultError):
    """No vault, participant, blob or entry by that name."""

    exit_code = 6


class Conflict(VaultError):
    """The request clashes with the vault's state (already exists, locked, done)."""

    exit_code = 7


class InvalidInput(VaultError):
    """A file or value given to the vault is malformed; nothing was stored."""

    exit_code = 8


class StorageFull(VaultError):
    """The disk has no room left; the write was rolled back."""

    exit_code = 9


EXIT_CODES: dict[int, str] = {
    0: "success",
    1: "unexpected internal error (a bug: please report it)",
    UsageError.exit_code: "usage error: wrong command, option or argument",
    AuthenticationFailed.exit_code: "locked: wrong or missing passphrase, or unknown member",
    PolicyRefusal.exit_code: "refused by the consent policy",
    IntegrityError.exit_code: "integrity failure: tampered, truncated or wrong-key data",
    NotFound.exit_code: "not found",
    Conflict.exit_code: "conflict with the vault's state (exists already, busy, done)",
    InvalidInput.exit_code: "malformed input file or value; nothing was stored",
    StorageFull.exit_code: "not enough disk space; nothing was stored",
}
