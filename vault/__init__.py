"""mindward: EEG recordings and derived preferences under the participants' consent.

Public API: `Vault` (open/init an encrypted vault), the key-free verifiers and
readers (`verify_audit`, `verify_proof`, `verify_export`, `verify_receipt_file`,
`check_consistency`, `prove`, `describe`, ...), a few input readers the command
line shares with library users, and the `VaultError` tree. Text rendering lives
in the command line (vault.cli), not here.

Names load on first use (PEP 562), so `import vault` costs almost nothing: a
command that only prints its version never loads the engine.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"  # the distribution's version (pyproject reads it from here)

from vault.errors import (
    EXIT_CODES,
    AuthenticationFailed,
    Conflict,
    IntegrityError,
    InvalidInput,
    NotFound,
    PolicyRefusal,
    StorageFull,
    Throttled,
    Unreachable,
    UsageError,
    VaultError,
)

# public name -> (module, attribute): loaded by __getattr__ on first use
_LAZY: dict[str, tuple[str, str]] = {
    "Vault": ("vault.api", "Vault"),
    "check_consistency": ("vault.api", "check_consistency"),
    "describe": ("vault.api", "describe"),
    "parse_public_key": ("vault.api", "parse_public_key"),
    "prove": ("vault.api", "prove"),
    "read_audit_log": ("vault.api", "read_audit_log"),
    "read_items": ("vault.api", "read_items"),
    "read_tree_head": ("vault.api", "read_tree_head"),
    "verify_audit": ("vault.api", "verify_audit"),
    "verify_export": ("vault.api", "verify_export"),
    "verify_proof": ("vault.api", "verify_proof"),
    "verify_receipt_file": ("vault.api", "verify_receipt_file"),
    "load_json": ("vault.formats.strictjson", "loads"),
    "load_policy_dir": ("vault.policy.policyset", "load_policy_dir"),
    "check_output_path": ("vault.storage.files", "check_output_path"),
    "write_output": ("vault.storage.files", "write_output"),
}

__all__ = [
    "EXIT_CODES",
    "AuthenticationFailed",
    "Conflict",
    "IntegrityError",
    "InvalidInput",
    "NotFound",
    "PolicyRefusal",
    "StorageFull",
    "Throttled",
    "Unreachable",
    "UsageError",
    "Vault",
    "VaultError",
    "check_consistency",
    "check_output_path",
    "describe",
    "load_json",
    "load_policy_dir",
    "parse_public_key",
    "prove",
    "read_audit_log",
    "read_items",
    "read_tree_head",
    "verify_audit",
    "verify_export",
    "verify_proof",
    "verify_receipt_file",
    "write_output",
]

if TYPE_CHECKING:  # what type checkers and IDEs see; at run time __getattr__ loads these
    from vault.api import (
        Vault,
        check_consistency,
        describe,
        parse_public_key,
        prove,
        read_audit_log,
        read_items,
        read_tree_head,
        verify_audit,
        verify_export,
        verify_proof,
        verify_receipt_file,
    )
    from vault.formats.strictjson import loads as load_json
    from vault.policy.policyset import load_policy_dir
    from vault.storage.files import check_output_path, write_output


def __getattr__(name: str) -> Any:
    try:
        module, attribute = _LAZY[name]
    except KeyError:
        raise AttributeError(f"module 'vault' has no attribute {name!r}") from None
    value = getattr(import_module(module), attribute)
    globals()[name] = value  # later lookups skip __getattr__
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
