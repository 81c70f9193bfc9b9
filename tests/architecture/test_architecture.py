"""The architecture, checked from the source (independently of the import-linter contracts).

1. One crypto module: only vault/crypto/__init__.py imports cryptography, hashlib, hmac or secrets,
   or calls os.urandom.
2. Only the store decrypts: only vault/access/blobs.py (and crypto itself) reaches the decryptors.
3. The database layer never imports crypto, keys or the store.
4. The CLI imports nothing from vault but the public package.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

import vault

PACKAGE = Path(vault.__file__).parent
PRIMITIVES = {"cryptography", "hashlib", "hmac", "secrets"}
DECRYPTORS = {"ChunkedDecryptor", "chunked_decrypt", "aes_gcm_decrypt", "unwrap_key", "unwrap_master",
              "unwrap_key_padded"}
DECRYPT_ALLOWED = {"crypto/__init__.py", "access/blobs.py", "access/keys.py"}  # keys unwraps keys, never data


def _modules() -> list[Path]:
    return sorted(PACKAGE.rglob("*.py"))


def _rel(path: Path) -> str:
    return path.relative_to(PACKAGE).as_posix()


def _imports(tree: ast.AST) -> set[str]:
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
            names |= {f"{node.module}.{a.name}" for a in node.names}
    return names


def _tree(path: Path) -> ast.AST:
    return ast.parse(path.read_text(), filename=str(path))


@pytest.mark.parametrize("path", _modules(), ids=_rel)
def test_only_crypto_touches_primitives(path: Path) -> None:
    if _rel(path).startswith("crypto/"):
        return
    tree = _tree(path)
    roots = {name.split(".")[0] for name in _imports(tree)}
    assert not roots & PRIMITIVES, f"{path.name} imports {roots & PRIMITIVES}"
    for node in ast.walk(tree):
        if isinstance(node, ast.Attribute) and node.attr == "urandom":
            pytest.fail(f"{path.name} calls os.urandom; use vault.crypto.random_bytes")


@pytest.mark.parametrize("path", _modules(), ids=_rel)
def test_only_the_store_decrypts(path: Path) -> None:
    if _rel(path) in DECRYPT_ALLOWED:
        return
    used = {n.attr for n in ast.walk(_tree(path)) if isinstance(n, ast.Attribute)}
    used |= {n.id for n in ast.walk(_tree(path)) if isinstance(n, ast.Name)}
    assert not used & DECRYPTORS, f"{path.name} uses {used & DECRYPTORS}"


def test_storage_never_sees_keys() -> None:
    imported = _imports(_tree(PACKAGE / "storage" / "db.py"))
    forbidden = ("vault.crypto", "vault.access")
    assert not {m for m in imported if m.startswith(forbidden)}


@pytest.mark.parametrize("path", sorted((PACKAGE / "cli").rglob("*.py")), ids=_rel)
def test_cli_uses_the_public_api_only(path: Path) -> None:
    """Every file of vault/cli/ (app, demo, plot, render) imports from the library only the
    public package (names in vault.__all__), vault.errors and vault.cli itself, at any depth
    (function bodies too); the demo study's generator is data, not library. Never the benchmarks."""
    tree = _tree(path)
    relative = [n for n in ast.walk(tree) if isinstance(n, ast.ImportFrom) and n.level > 0]
    assert not relative, f"cli/{path.name} uses a relative import"
    for name in _imports(tree):
        assert not name.startswith("mindward_bench"), f"cli/{path.name} imports the benchmarks"
        if name == "vault" or not name.startswith("vault."):
            continue
        module, _, attr = name.rpartition(".")
        allowed = name == "vault.errors" or module == "vault.errors"
        allowed |= module == "vault" and attr in vault.__all__
        allowed |= name.startswith(("vault.cli.", "vault.demo_data.")) or name in {
            "vault.cli", "vault.demo_data"}
        assert allowed, f"cli/{path.name} imports {name}"


def test_the_checker_itself_catches_a_violation(tmp_path: Path) -> None:
    """Guard against a vacuous test: a planted import is seen."""
    planted = tmp_path / "planted.py"
    planted.write_text("import hashlib\nfrom cryptography.hazmat.primitives import hashes\n")
    assert {"hashlib", "cryptography"} <= {n.split(".")[0] for n in _imports(_tree(planted))}


@pytest.mark.parametrize("path", _modules(), ids=_rel)
def test_only_the_policy_engine_mints_grants(path: Path) -> None:
    """`_MINT` (the grant-minting token) is named nowhere but vault/policy/engine.py."""
    if _rel(path) == "policy/engine.py":
        return
    tree = _tree(path)
    names = {n.id for n in ast.walk(tree) if isinstance(n, ast.Name)}
    names |= {n.attr for n in ast.walk(tree) if isinstance(n, ast.Attribute)}
    names |= {a.name for n in ast.walk(tree) if isinstance(n, ast.ImportFrom) for a in n.names}
    assert "_MINT" not in names, f"{path.name} names the grant-minting token"


def test_tests_do_not_mint_grants_either() -> None:
    for path in (PACKAGE.parent / "tests").rglob("*.py"):
        assert "_MINT" not in path.read_text() or path.name == "test_architecture.py", path.name
