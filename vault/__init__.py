"""mindward: EEG recordings and derived preferences under the participants' consent.

Public API: `Vault` (open/init an encrypted vault), `describe` and
`verify_audit` (no passphrase needed), and the `VaultError` tree.
"""

from vault.api import (
    Vault,
    describe,
    parse_public_key,
    prove,
    read_tree_head,
    verify_audit,
    verify_proof,
)
from vault.demo import run_demo
from vault.errors import (
    EXIT_CODES,
    AuthenticationFailed,
    Conflict,
    IntegrityError,
    InvalidInput,
    NotFound,
    PolicyRefusal,
    StorageFull,
    UsageError,
    VaultError,
)

__all__ = [
    "EXIT_CODES",
    "AuthenticationFailed",
    "Conflict",
    "IntegrityError",
    "InvalidInput",
    "NotFound",
    "PolicyRefusal",
    "StorageFull",
    "UsageError",
    "Vault",
    "VaultError",
    "describe",
    "parse_public_key",
    "prove",
    "read_tree_head",
    "run_demo",
    "verify_audit",
    "verify_proof",
]
