"""The one error tree of mindward.

Every failure a user can cause is a `VaultError` subclass with an exit code
from the table in docs/cli.md. Messages name fields and ids, never values
taken from participant data.
"""

from __future__ import annotations


class VaultError(Exception):
    """Base class. `exit_code` is what the CLI returns for it.

    `message` says what is wrong in the library's terms. Two optional keys let a front end
    say more in its own terms: `hint`, the next step (a key of HINTS;
    tests/cli/test_hints.py checks every one used), and `param`, the
    argument of the call that was at fault (the CLI names its option).
    """

    exit_code = 1

    def __init__(self, message: str, *, hint: str | None = None, param: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.hint = hint
        self.param = param


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


class Throttled(VaultError):
    """Too many failed attempts from one client, or the service is at its limit; retry later."""

    exit_code = 10


class Unreachable(VaultError):
    """The service could not be reached or stopped answering mid-way; nothing was kept locally."""

    exit_code = 11


# next steps an error can point to, in library terms (vault.cli words each as a command)
HINTS: dict[str, str] = {
    "create": "create a vault first (Vault.init)",
    "enrol": "participant ids are the ones enrolment returned (Vault.enrol)",
    "verify-audit": "verify the audit log (verify_audit)",
    "amend-consent": "add a consent version instead (Vault.amend_consent)",
    "key-free-checks": "use the checks that need no key (read_audit_log, verify_audit, prove)",
    "public-key": "pass the public key you hold (Vault.public_key, describe)",
    "withdraw-request": "record a withdrawal request first (Vault.withdraw_request)",
    "withdraw-receipt": "the receipt is kept (Vault.withdraw_receipt)",
    "check-export": "check the export against the vault (Vault.check_export)",
    "serve-setup": "convert the vault for the service first (Vault.make_served)",
}

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
    Throttled.exit_code: "throttled: too many failed attempts, or the service is busy; retry later",
    Unreachable.exit_code: "the service could not be reached or broke off; nothing was kept",
}
