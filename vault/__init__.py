"""mindward: EEG recordings and derived preferences under the participants' consent.

Public API: `Vault` (open/init an encrypted vault), `describe` and
`verify_audit` (no passphrase needed), and the `VaultError` tree.
"""

from vault.api import (
    Vault,
    check_consistency,
    describe,
    format_budget,
    format_decision,
    parse_public_key,
    prove,
    read_audit_log,
    read_items,
    read_tree_head,
    report_markdown,
    summarise_decision,
    verify_audit,
    verify_export,
    verify_proof,
    verify_receipt_file,
)
from vault.cli.demo import run_demo
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
from vault.formats.strictjson import loads as load_json
from vault.policy.policyset import describe_policy, load_policy_dir
from vault.storage.files import check_output_path, write_output

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
    "check_consistency",
    "check_output_path",
    "describe",
    "describe_policy",
    "format_budget",
    "format_decision",
    "load_json",
    "load_policy_dir",
    "parse_public_key",
    "prove",
    "read_audit_log",
    "read_items",
    "read_tree_head",
    "report_markdown",
    "run_demo",
    "summarise_decision",
    "verify_audit",
    "verify_export",
    "verify_proof",
    "verify_receipt_file",
    "write_output",
]
