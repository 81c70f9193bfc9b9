"""The architecture, checked from the source (independently of the import-linter contracts).

Each check is a function of a package root (the folder named `vault`) returning its violations, so
tests/architecture/test_cheating.py runs the same checks on a copy with a planted module.

1. Only vault/crypto/ imports cryptography, hashlib, hmac or secrets, or calls os.urandom.
2. The one door: decryptor and key-ring names only in vault/access/ (the primitives also in
   vault/crypto/); only vault/access/ imports the key ring, the blob store and vault.crypto.sealing;
   nothing in vault imports vault.crypto.hazmat.
3. vault/storage/ never imports crypto or access.
4. The CLI imports nothing from vault but the public package.
5. Grants are minted only in vault/policy/engine.py.
6. The clock is read only in vault/api.py.
7. No reflection around the checks above: no getattr/setattr/delattr/hasattr with a private or
   computed name (nor an alias of them), no __dict__, vars(), globals(), eval/exec,
   __getattribute__, an object's pickled state, other frames, sys.modules, and no gc, ctypes,
   pickle, importlib, inspect, builtins.
8. matplotlib only in vault/formats/plot.py, inside a function (import vault stays light).
9. No blanket `# noqa`, no `# ruff: noqa`, no SLF001 suppression unless listed with its reason.
10. SQL only in vault/storage/: no string that reads as an SQL statement, no `.execute`,
   `.executemany` or `.executescript` (called, passed around or named in a string) elsewhere.

What a file truly needs is listed below with the reason (MODULE_NEEDS, REFLECTION_NEEDS,
SLF001_NEEDS); today's known violations (PENDING) name who removes them.
"""

from __future__ import annotations

import ast
import functools
import re
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import pytest

import vault

PACKAGE = Path(vault.__file__).parent
PRIMITIVES = {"cryptography", "hashlib", "hmac", "secrets"}
# The primitives that turn ciphertext or wrapped keys into plaintext (vault/crypto/ and vault/access/).
DECRYPTORS = {"ChunkedDecryptor", "chunked_decrypt", "aes_gcm_decrypt"}  # and every name with "unwrap"
# What only the door (vault/access/) may name: the key ring, the blob store, their keys and decryptor.
DOOR_NAMES = {"KeyRing", "BlobStore", "_ring", "_blobs", "_decrypt",
              "participant_key", "participant_keys", "new_participant_key"}
DOOR_MODULES = ("vault.access.keys", "vault.access.blobs", "vault.crypto.sealing")
HAZMAT = "vault.crypto.hazmat"
MINTED = {"Grant", "Admission", "GrantRecord"}  # built only by the engine, with its _MINT
CLOCK_READS = {"now", "utcnow", "today"}  # on datetime / date
CLOCK_NAMES = {"SYSTEM_CLOCK", "SystemClock", "moment"}
# time's readers of the wall clock (monotonic and perf_counter measure intervals, and are allowed)
WALL_CLOCK = {"time", "time_ns", "localtime", "gmtime", "ctime", "asctime", "strftime"}
REFLECTION_CALLS = {"getattr", "setattr", "delattr", "hasattr"}
BANNED_NAMES = {"vars", "globals", "locals", "eval", "exec", "compile", "__import__", "breakpoint",
                "attrgetter", "methodcaller"}
BANNED_ATTRS = {"__dict__", "__globals__", "__closure__", "__code__", "__builtins__", "__subclasses__",
                "__reduce__", "__reduce_ex__", "__getstate__", "__setstate__",  # an object's whole state
                "f_locals", "f_globals", "f_back", "tb_frame", "gi_frame", "cr_frame"}  # other frames
BANNED_MODULES = {"gc", "ctypes", "pickle", "importlib", "inspect", "marshal", "shelve", "copyreg",
                  "builtins"}
SYS_HOOKS = {"sys.modules", "sys._getframe", "sys.settrace", "sys.setprofile", "sys.exc_info",
             "sys.exception"}
# A file that truly needs one of BANNED_MODULES, with the reason.
MODULE_NEEDS = {
    ("formats/bids.py", "importlib"): "importlib.metadata: the installed version, for dataset_description",
    ("__init__.py", "importlib"): "import_module: public names load on first use (PEP 562)",
    ("cli/app.py", "importlib"): "importlib.metadata.entry_points: `mindward bench` is an entry point",
}
# Reflection a function truly needs, by (file, function), with the reason.
REFLECTION_NEEDS = {
    ("policy/consent.py", "_check_permissions"): "form_permission is a Literal of the form's public fields",
    ("policy/consent.py", "from_json"): "__dict__ seeds the cached_property `digest` from the stored bytes",
    ("policy/policyset.py", "__setattr__"): "hasattr(self, '_chains'): the set refuses writes once built",
    ("__init__.py", "__getattr__"): "PEP 562: a public name (from __all__) read off its module, then cached",
    ("__init__.py", "__dir__"): "PEP 562: dir(vault) lists the loaded and the lazy public names",
}
# SLF001 suppressions that are truly needed, by (file, the line's code before its comment), with
# the reason (keyed by text, not line number, so an edit above does not move the allowance;
# none today).
SLF001_NEEDS: dict[tuple[str, str], str] = {}
# A string that opens (after whitespace) as an SQL statement: a statement keyword and what follows it
# in SQLite's grammar, so English ("Create a new vault", "REPLACE this export") is not taken for SQL.
# The keyword list is our own; the shapes after it are common practice (SQLite's statement syntax).
SQL_STATEMENT = re.compile(r"""\s*(?:
      select\s+(?:.*\bfrom\s+["\w]|distinct\b|all\b|count\s*\(|max\s*\(|min\s*\(|sum\s*\(|[\d*(?'"])
    | (?:insert|replace)(?:\s+or\s+\w+)?(?:\s+into\b|\s*$)
    | update(?:\s+or\s+\w+)?\s+["\w.]+\s+set\b
    | delete\s+from\b
    | (?:create|drop)\s+(?:unique\s+|temp(?:orary)?\s+|virtual\s+)?(?:table|index|trigger|view)\b
    | alter\s+table\b
    | pragma\s+["\w.]+
    | with\s+(?:recursive\s+)?["\w]+\s*(?:\([^)]*\)\s*)?as\s*(?:not\s+)?(?:materialized\s*)?\(
    | begin(?:\s+(?:deferred|immediate|exclusive))?(?:\s+transaction)?\s*;?\s*$
    | (?:commit|end|rollback)(?:\s+transaction)?\s*;?\s*$
    | (?:vacuum|analyze|reindex)(?:\s+["\w.]+)?\s*;?\s*$
    | (?:savepoint|release(?:\s+savepoint)?)\s+["\w]+\s*;?\s*$
    | attach\s+(?:database\s+)?\S+\s+as\s+["\w]+
    | detach\s+(?:database\s+)?["\w]+\s*;?\s*$
    | (?-i:SELECT|INSERT|UPDATE|DELETE|CREATE|DROP|ALTER|PRAGMA|WITH|REPLACE|BEGIN)\s*$  # bare, in capitals
)""", re.IGNORECASE | re.VERBOSE | re.DOTALL)
SQL_RUNNERS = {"execute", "executemany", "executescript"}
NOQA = re.compile(r"#\s*(?P<file>(?:ruff|flake8)\s*:\s*)?noqa(?P<codes>:?[\sA-Z0-9,]*)", re.IGNORECASE)
# Known violations waiting for a fix, each with who removes it (none today). A test fails when an
# entry no longer matches a violation.
PENDING: dict[tuple[str, str, str], str] = {
}


@dataclass(frozen=True)
class Violation:
    check: str
    rel: str  # path under the package root, posix
    line: int
    token: str  # the name, module or call found

    def __str__(self) -> str:
        return f"{self.check}: vault/{self.rel}:{self.line}: {self.token}"


@dataclass(frozen=True, eq=False)  # hashed by identity: one per file text
class Source:
    rel: str
    module: str  # dotted name
    tree: ast.Module
    nodes: tuple[ast.AST, ...]  # every node, walked once

    @property
    def room(self) -> str:
        return self.rel.split("/")[0] if "/" in self.rel else ""


def sources(root: Path) -> list[Source]:
    found = []
    for path in sorted(root.rglob("*.py")):
        rel = path.relative_to(root).as_posix()
        parts = [root.name, *rel[:-3].split("/")]
        if parts[-1] == "__init__":
            parts.pop()
        found.append(_source(path.read_text(), rel, ".".join(parts)))
    return found


@functools.lru_cache(maxsize=4096)
def _source(text: str, rel: str, module: str) -> Source:
    """Parsed once per file text (the checks run over the same trees many times)."""
    tree = ast.parse(text, filename=rel)
    return Source(rel, module, tree, tuple(ast.walk(tree)))


def imports(src: Source) -> list[tuple[ast.stmt, str]]:
    """Every module or module.name imported, relative imports resolved."""
    return _imports_of(src)


@functools.lru_cache(maxsize=4096)
def _imports_of(src: Source) -> list[tuple[ast.stmt, str]]:
    package = src.module if src.rel.endswith("__init__.py") else src.module.rpartition(".")[0]
    found: list[tuple[ast.stmt, str]] = []
    for node in src.nodes:
        if isinstance(node, ast.Import):
            found += [(node, alias.name) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")[: len(package.split(".")) - (node.level - 1)]
                base = ".".join([*anchor, base] if base else anchor)
            found.append((node, base))
            found += [(node, f"{base}.{alias.name}") for alias in node.names]
    return found


@functools.lru_cache(maxsize=4096)
def names(src: Source) -> list[tuple[ast.AST, str]]:
    """Every identifier used: names, attributes and imported names (with their aliases)."""
    found: list[tuple[ast.AST, str]] = []
    for node in src.nodes:
        if isinstance(node, ast.Name):
            found.append((node, node.id))
        elif isinstance(node, ast.Attribute):
            found.append((node, node.attr))
        elif isinstance(node, ast.ImportFrom):
            for alias in node.names:
                found.append((node, alias.name))
                if alias.asname:
                    found.append((node, alias.asname))
    return found


def _hit(check: str, src: Source, node: ast.AST, token: str) -> Violation:
    return Violation(check, src.rel, getattr(node, "lineno", 0), token)


def check_primitives(root: Path) -> list[Violation]:
    found = []
    for src in sources(root):
        if src.room == "crypto":
            continue
        for node, name in imports(src):
            if name.split(".")[0] in PRIMITIVES or name == "os.urandom":
                found.append(_hit("primitives", src, node, name))
        found += [_hit("primitives", src, node, "urandom") for node, name in names(src) if name == "urandom"]
    return found


def check_decryptors(root: Path) -> list[Violation]:
    found = []
    for src in sources(root):
        if src.room == "access":
            continue
        for node, name in names(src):
            primitive = name in DECRYPTORS or "unwrap" in name
            if name in DOOR_NAMES or (primitive and src.room != "crypto"):
                found.append(_hit("decryptors", src, node, name))
    return found


def check_door_imports(root: Path) -> list[Violation]:
    """Only vault/access/ imports the key ring, the blob store and the blob AEAD; nobody the hazmat."""
    found = []
    for src in sources(root):
        for node, name in imports(src):
            door = next((m for m in DOOR_MODULES if f"{name}.".startswith(f"{m}.")), None)
            # vault/crypto/ itself: SigningKey wraps its seed with sealing's key wrap
            if door and src.room not in ("access", "crypto"):
                found.append(_hit("door-imports", src, node, door))
            elif f"{name}.".startswith(f"{HAZMAT}.") and src.rel != "crypto/hazmat.py":
                found.append(_hit("door-imports", src, node, HAZMAT))
    return found


def check_storage_keyless(root: Path) -> list[Violation]:
    return [_hit("storage-keyless", src, node, name)
            for src in sources(root) if src.room == "storage"
            for node, name in imports(src) if name.startswith(("vault.crypto", "vault.access"))]


def check_grant_minting(root: Path) -> list[Violation]:
    """`_MINT` (the grant-minting token) and the minted classes' constructors only in the engine."""
    found = []
    for src in sources(root):
        if src.rel == "policy/engine.py":
            continue
        found += [_hit("grant-minting", src, node, name) for node, name in names(src) if name == "_MINT"]
        for node in src.nodes:
            if isinstance(node, ast.Call) and _last_name(node.func) in MINTED:
                found.append(_hit("grant-minting", src, node, f"{_last_name(node.func)}("))
    return found


def _last_name(node: ast.AST) -> str:
    return node.id if isinstance(node, ast.Name) else node.attr if isinstance(node, ast.Attribute) else ""


def check_clock(root: Path) -> list[Violation]:
    """datetime.now/utcnow/today, date.today, time.time, the system clock: only vault/api.py."""
    found = []
    for src in sources(root):
        if src.rel == "api.py":
            continue
        for node, name in imports(src):
            top, _, leaf = name.rpartition(".")
            if (top == "time" and leaf in WALL_CLOCK) or leaf in CLOCK_NAMES:
                found.append(_hit("clock", src, node, name))
        for node, name in names(src):
            if name in CLOCK_NAMES - {"moment"}:
                found.append(_hit("clock", src, node, name))
        for node in src.nodes:
            if isinstance(node, ast.Call) and _last_name(node.func) == "moment":
                found.append(_hit("clock", src, node, "moment("))
            if not (isinstance(node, ast.Attribute) and isinstance(node.ctx, ast.Load)):
                continue
            receiver = _last_name(node.value)
            if node.attr in CLOCK_READS and receiver in {"datetime", "date", "dt"}:
                found.append(_hit("clock", src, node, node.attr))
            elif node.attr in WALL_CLOCK and receiver == "time":
                found.append(_hit("clock", src, node, f"time.{node.attr}"))
    return found


@functools.lru_cache(maxsize=4096)
def _literal_loop_names(src: Source) -> dict[int, set[str]]:
    """For each loop over a tuple of public string literals: the loop variable, by line of each use."""
    safe: dict[int, set[str]] = {}
    for loop in src.nodes:
        if not (isinstance(loop, ast.For) and isinstance(loop.target, ast.Name)
                and isinstance(loop.iter, ast.Tuple | ast.List)):
            continue
        items = loop.iter.elts
        if all(isinstance(i, ast.Constant) and isinstance(i.value, str) and not i.value.startswith("_")
               for i in items):
            for inner in ast.walk(loop):
                if isinstance(inner, ast.Name) and inner.id == loop.target.id:
                    safe.setdefault(inner.lineno, set()).add(inner.id)
    return safe


@functools.lru_cache(maxsize=4096)
def _functions(src: Source) -> dict[int, str]:
    """Line -> name of the innermost enclosing function."""
    where: dict[int, str] = {}
    for fn in src.nodes:
        if isinstance(fn, ast.FunctionDef | ast.AsyncFunctionDef):
            for line in range(fn.lineno, (fn.end_lineno or fn.lineno) + 1):
                where[line] = fn.name  # walk is breadth-first: inner functions overwrite
    return where


def check_reflection(root: Path) -> list[Violation]:
    found = []
    for src in sources(root):
        safe, where = _literal_loop_names(src), _functions(src)
        calls = {id(n.func): n for n in src.nodes if isinstance(n, ast.Call)}

        def needed(node: ast.AST, src: Source = src, where: dict[int, str] = where) -> bool:
            return (src.rel, where.get(getattr(node, "lineno", 0), "")) in REFLECTION_NEEDS

        for node, name in imports(src):
            top = name.split(".")[0]
            if (top in BANNED_MODULES and (src.rel, top) not in MODULE_NEEDS) or name in SYS_HOOKS:
                found.append(_hit("reflection", src, node, name))
        for node in src.nodes:
            token = _reflection(node, calls.get(id(node)), safe)
            if token and not needed(node):
                found.append(_hit("reflection", src, node, token))
    return found


def _reflection(node: ast.AST, call: ast.Call | None, safe: dict[int, set[str]]) -> str:
    """What makes node a reach around the checks ("" if nothing); call: the call node is the func of."""
    if isinstance(node, ast.Name):
        if node.id in BANNED_NAMES:
            return node.id
        if node.id in REFLECTION_CALLS:  # getattr(obj, name) and friends
            name = call.args[1] if call and len(call.args) >= 2 else None
            return "" if name is not None and _public_name(name, safe) else f"{node.id}(...)"
        return ""
    if not isinstance(node, ast.Attribute):
        return ""
    receiver = _last_name(node.value)
    if node.attr in BANNED_ATTRS or (node.attr == "__class__" and isinstance(node.ctx, ast.Store)):
        return node.attr
    if f"{receiver}.{node.attr}" in SYS_HOOKS:
        return f"{receiver}.{node.attr}"
    if node.attr == "__getattribute__":
        return node.attr
    if node.attr in {"__setattr__", "__delattr__"}:
        # allowed: a class writing its own frozen fields, object.__setattr__(self, ...) or super()
        own = receiver == "object" and call and call.args and _last_name(call.args[0]) == "self"
        parent = isinstance(node.value, ast.Call) and _last_name(node.value.func) == "super"
        return "" if own or parent else node.attr
    return ""


def _public_name(arg: ast.expr, safe: dict[int, set[str]]) -> bool:
    """A literal public attribute name, or a loop variable over such literals."""
    if isinstance(arg, ast.Constant) and isinstance(arg.value, str):
        return not arg.value.startswith("_")
    return isinstance(arg, ast.Name) and arg.id in safe.get(arg.lineno, set())


def check_lazy_matplotlib(root: Path) -> list[Violation]:
    found = []
    for src in sources(root):
        hits = [(node, name) for node, name in imports(src) if name.split(".")[0] == "matplotlib"]
        nested = {id(n) for fn in src.nodes if hits and isinstance(fn, ast.FunctionDef | ast.AsyncFunctionDef)
                  for n in ast.walk(fn)}
        found += [_hit("lazy-matplotlib", src, node, name) for node, name in hits
                  if src.rel != "formats/plot.py" or id(node) not in nested]
    return found


def check_suppressions(root: Path) -> list[Violation]:
    """No blanket `# noqa` or `# ruff: noqa`, and no SLF001 suppression unless listed with its reason."""
    found = []
    for path in sorted(root.rglob("*.py")):
        rel = path.relative_to(root).as_posix()
        for number, line in enumerate(path.read_text().splitlines(), 1):
            match = NOQA.search(line)
            if not match:
                continue
            codes = match.group("codes") or ""
            if match.group("file") or not codes.strip(":").strip() or (
                    "SLF" in codes and (rel, line.split("#")[0].strip()) not in SLF001_NEEDS):
                found.append(Violation("suppressions", rel, number, match.group(0).strip()))
    return found


def check_sql(root: Path) -> list[Violation]:
    """Every SQL statement lives in vault/storage/: elsewhere no SQL text and no cursor runners."""
    found = []
    for src in sources(root):
        if src.room == "storage":
            continue
        for node in src.nodes:
            if isinstance(node, ast.Attribute) and node.attr in SQL_RUNNERS:
                found.append(_hit("sql", src, node, f".{node.attr}"))
            elif isinstance(node, ast.Constant) and isinstance(node.value, str):
                if node.value in SQL_RUNNERS:  # getattr(conn, "execute") and the like
                    found.append(_hit("sql", src, node, repr(node.value)))
                elif SQL_STATEMENT.match(node.value):
                    found.append(_hit("sql", src, node, " ".join(node.value.split()[:3])))
    return found


CHECKS: dict[str, Callable[[Path], list[Violation]]] = {
    "primitives": check_primitives,
    "decryptors": check_decryptors,
    "door-imports": check_door_imports,
    "storage-keyless": check_storage_keyless,
    "grant-minting": check_grant_minting,
    "clock": check_clock,
    "reflection": check_reflection,
    "lazy-matplotlib": check_lazy_matplotlib,
    "suppressions": check_suppressions,
    "sql": check_sql,
}


def violations(check: str, root: Path = PACKAGE) -> list[Violation]:
    """The check's violations under root, less today's PENDING ones."""
    return [v for v in CHECKS[check](root) if (v.check, v.rel, v.token) not in PENDING]


def test_only_crypto_touches_primitives() -> None:
    assert not [str(v) for v in violations("primitives")], "use vault.crypto's recipes, not os.urandom"


def test_only_the_door_decrypts() -> None:
    assert not [str(v) for v in violations("decryptors")]


def test_only_the_door_imports_keys_and_blobs_and_nothing_imports_hazmat() -> None:
    assert not [str(v) for v in violations("door-imports")]


def test_storage_never_sees_keys() -> None:
    assert not [str(v) for v in violations("storage-keyless")]


def test_only_the_policy_engine_mints_grants() -> None:
    assert not [str(v) for v in violations("grant-minting")]


def test_only_api_reads_the_clock() -> None:
    assert not [str(v) for v in violations("clock")], "take the time from the caller (services: ctx.now())"


def test_no_reflection_around_the_checks() -> None:
    assert not [str(v) for v in violations("reflection")]


def test_matplotlib_is_imported_lazily_by_the_plot_only() -> None:
    assert not [str(v) for v in violations("lazy-matplotlib")]


def test_no_blanket_or_private_access_suppressions() -> None:
    assert not [str(v) for v in violations("suppressions")], "name each noqa's rule; SLF001 only if listed"


def test_only_storage_runs_sql() -> None:
    assert not [str(v) for v in violations("sql")], "put the statement behind a function in vault/storage/"


def test_pending_allowances_are_still_needed() -> None:
    """UNTIL-MERGE entries that no longer match a violation must be deleted from PENDING."""
    found = {(v.check, v.rel, v.token) for check in CHECKS for v in CHECKS[check](PACKAGE)}
    assert set(PENDING) <= found, f"delete from PENDING: {sorted(set(PENDING) - found)}"


def _rel(path: Path) -> str:
    return path.relative_to(PACKAGE).as_posix()


def _imports(tree: ast.AST) -> set[str]:
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            found.add(node.module)
            found |= {f"{node.module}.{a.name}" for a in node.names}
    return found


def _tree(path: Path) -> ast.AST:
    return ast.parse(path.read_text(), filename=str(path))


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
        # `mindward serve` starts the service room (the layer below the CLI), imported in the command
        allowed |= path.name == "app.py" and name.startswith("vault.server.")
        # `--server` acts through the remote client room (beside the service), imported when a
        # service is named
        allowed |= path.name == "app.py" and (name == "vault.remote" or name.startswith("vault.remote."))
        assert allowed, f"cli/{path.name} imports {name}"


# One planted line per check, each a route the check exists to stop; the checks must flag every one.
PLANTED = {
    "primitives": "import os\nkey = os.urandom(32)\n",
    "decryptors": "def leak(v, key, pid, bid):\n    return v._store._decrypt(key, pid, bid)\n",
    "door-imports": "from vault.crypto import hazmat\n",
    "storage-keyless": "from ..access import keys\n",
    "grant-minting": "from vault.policy import engine\ng = engine.Grant(object(), None, 'x')\n",
    "clock": "import datetime as dt\nstamp = dt.datetime.now(dt.UTC)\n",
    "reflection": "def door(v, name):\n    return getattr(v, name)\n",
    "lazy-matplotlib": "import matplotlib\n",
    "suppressions": "def door(v):\n    return v._door  # noqa\n",
    "sql": "def keys(conn):\n    return conn.execute('select wrapped_key from participants').fetchall()\n",
}
# Where each plant goes (default storage/): SQL is storage's own, so its plant sits in another room.
PLANTED_AT = {"sql": "audit/planted.py"}


@pytest.mark.parametrize("check", sorted(CHECKS))
def test_each_check_flags_its_planted_route(check: str, tmp_path: Path) -> None:
    """Guard against a vacuous check: a one-line plant in an otherwise empty package is seen."""
    root = tmp_path / "vault"
    planted = root / PLANTED_AT.get(check, "storage/planted.py")
    planted.parent.mkdir(parents=True)
    planted.write_text(PLANTED[check])
    assert [v.rel for v in CHECKS[check](root)], f"{check} missed: {PLANTED[check]!r}"
    assert not CHECKS[check](tmp_path / "empty"), "an empty tree has no violations"


def test_storage_may_run_sql(tmp_path: Path) -> None:
    """The sql check exempts exactly vault/storage/: the same plant there is no violation."""
    (tmp_path / "vault" / "storage").mkdir(parents=True)
    (tmp_path / "vault" / "storage" / "planted.py").write_text(PLANTED["sql"])
    assert check_sql(tmp_path / "vault") == []


# What vault/storage/ runs: every string there that opens with a statement keyword in capitals
# (storage's habit) must read as SQL to the check, or the check could miss a moved statement.
_CAPITAL_KEYWORD = re.compile(r"\s*(?:SELECT|INSERT|UPDATE|DELETE|CREATE|DROP|ALTER|PRAGMA|WITH|"
                              r"REPLACE|BEGIN|COMMIT|ROLLBACK|VACUUM)\b")


def _storage_statements() -> list[str]:
    return sorted({node.value for src in sources(PACKAGE) if src.room == "storage" for node in src.nodes
                   if isinstance(node, ast.Constant) and isinstance(node.value, str)
                   and _CAPITAL_KEYWORD.match(node.value)})


def test_storage_statements_are_seen_as_sql() -> None:
    statements = _storage_statements()
    assert len(statements) > 100, "storage holds the vault's statements"  # a scan that finds none is vacuous
    assert [s for s in statements if not SQL_STATEMENT.match(s)] == []


@pytest.mark.parametrize("text", [
    "select wrapped_key from participants", "  SELECT 1", "insert or ignore into t values (?)",
    "Replace Into meta VALUES (?, ?)", "update participants set x = 1", "DELETE FROM audit_log",
    "create unique index i on t (a)", "drop table audit_log", "alter table t add column c",
    "pragma journal_mode = DELETE", "with recent(seq) as (select 1) select * from recent",
    "begin immediate", "COMMIT;", "rollback", "vacuum", "attach database 'x.db' as other",
    "INSERT", "DELETE ",
])
def test_sql_text_is_recognised(text: str) -> None:
    """Statements in SQLite's syntax (common practice), in any case, are taken for SQL."""
    assert SQL_STATEMENT.match(text)


@pytest.mark.parametrize("text", [
    "Create a new vault at `path`", "REPLACE this export: request a new one", "With --version: print JSON.",
    "Delete the rows of `blob_ids`", "Update the consent of a participant", "create", "release",
    "begin with the oldest", "Drop the staging folder", "selected 3 participants", "pragmatic",
    "release(s); spent min", "Insert a card", "alter the budget",
])
def test_english_is_not_taken_for_sql(text: str) -> None:
    """Messages and docstrings that open with a statement's verb are not SQL."""
    assert not SQL_STATEMENT.match(text)


def test_tests_do_not_mint_grants_either() -> None:
    planted = {"test_architecture.py", "test_cheating.py"}  # they plant the token to show it is caught
    for path in (PACKAGE.parent / "tests").rglob("*.py"):
        assert "_MINT" not in path.read_text() or path.name in planted, path.name
