"""mindward: EEG recordings and derived preferences under the participants' consent.

Public API: `Vault` (open/init an encrypted vault), `describe` and
`verify_audit` (no passphrase needed), and the `VaultError` tree.
"""

from vault.api import (
    Vault,
    describe,
    format_decision,
    parse_public_key,
    prove,
    read_tree_head,
    summarise_decision,
    verify_audit,
    verify_export,
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
from vault.policyset import describe_policy, load_policy_dir

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
    "describe_policy",
    "format_decision",
    "load_policy_dir",
    "parse_public_key",
    "prove",
    "read_tree_head",
    "run_demo",
    "summarise_decision",
    "verify_audit",
    "verify_export",
    "verify_proof",
]
