"""The policy set: data categories, roles and purposes, read from `policies/*.toml`.

Pure: `parse_policy_files` takes file names and bytes, `load_policy_dir` only
reads the folder. Every malformed input becomes one `InvalidInput` line naming
the file and the field path. The schema is documented in policies/README.md.

Version: `PolicySet.digest` is SHA-256 over the canonical JSON of the validated
model (sorted keys, no whitespace, UTF-8) behind a domain prefix, so comments,
layout and the split into files do not change it but any rule or text does.
`PolicySet.version` is its first 16 hex digits.
"""

from __future__ import annotations

import json
import tomllib
from collections.abc import Mapping
from pathlib import Path
from types import MappingProxyType
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    StringConstraints,
    ValidationError,
    ValidationInfo,
    model_validator,
)

from vault import crypto
from vault.errors import InvalidInput, UsageError
from vault.policy.event_codes import EventCodes

SCHEMA_VERSION = 1
VERSION_LENGTH = 16
DIGEST_DOMAIN = b"mindward/v1/policy-set\n"
MAX_FILE_BYTES = 1 << 20
SECTIONS = ("policy", "categories", "roles", "purposes")

# GDPR Art. 9(2) conditions we model: (a) explicit consent, (j) research with Art. 89(1) safeguards.
ART9_EXPLICIT_CONSENT = "art9-2-a"
ART9_RESEARCH = "art9-2-j"

_ID = r"[a-z][a-z0-9]*(?:-[a-z0-9]+)*"
Id = Annotated[str, StringConstraints(pattern=rf"^{_ID}$", max_length=64)]
PurposeId = Annotated[str, StringConstraints(pattern=rf"^{_ID}(?:/{_ID})*$", max_length=128)]
Text = Annotated[str, StringConstraints(strip_whitespace=True, min_length=1, max_length=2000)]
ShortText = Annotated[str, StringConstraints(strip_whitespace=True, min_length=1, max_length=200)]
DpvTerm = Annotated[str, StringConstraints(pattern=r"^(?:dpv|eu-gdpr):[A-Za-z0-9-]+$")]
Flag = Annotated[bool, Field(strict=True)]
Count = Annotated[int, Field(strict=True)]
Number = Annotated[float, Field(strict=True, allow_inf_nan=False)]
Epsilon = Annotated[float, Field(strict=True, gt=0, allow_inf_nan=False)]
# item ids of scores and ratings (as vault.formats.scores accepts them): ASCII, no spaces, 1-64 characters
ITEM_ID_PATTERN = r"[A-Za-z0-9][A-Za-z0-9_.:/-]{0,63}"
ItemId = Annotated[str, StringConstraints(pattern=rf"^{ITEM_ID_PATTERN}$", max_length=64)]
MAX_CATALOGUE = 100_000


class _Model(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class PolicyMeta(_Model):
    """The `[policy]` table: name, schema version and lab-wide settings."""

    name: Id
    schema_version: Literal[1] = Field(alias="schema")
    title: ShortText
    description: Text
    form_versions: tuple[ShortText, ...] = Field(min_length=1)
    # GDPR Art. 12(3): act on a request within one month (extendable by two in hard cases).
    withdrawal_deadline_days: Annotated[Count, Field(ge=1, le=90)] = 30

    model_config = ConfigDict(frozen=True, extra="forbid", populate_by_name=True)


class Category(_Model):
    """A kind of data the vault holds."""

    title: ShortText
    description: Text
    kind: Literal["recording", "scores", "ratings", "identity", "attributes"]
    special_category: Flag = False  # GDPR Art. 9(1) data (treat EEG as such; ask your DPO)
    derived_from: Id | None = None  # derived data inherits its source's consent scope
    value_type: Literal["integer", "real"] | None = None
    value_range: tuple[Number, Number] | None = None
    # recordings: the annotations kept by de-identification (vault.policy.event_codes language)
    event_codes: tuple[str, ...] | None = None
    # Earlier versions' regular expression: accepted only in policy snapshots stored in a
    # vault (so that vault still opens, with an unchanged version), never used: a policy
    # set without event_codes keeps no annotation. Files may not set it.
    event_code_pattern: str | None = None

    @model_validator(mode="before")
    @classmethod
    def _no_free_patterns(cls, data: Any, info: ValidationInfo) -> Any:
        stored = isinstance(info.context, dict) and info.context.get("stored_snapshot")
        if isinstance(data, dict) and data.get("event_code_pattern") is not None and not stored:
            raise ValueError("event_code_pattern is no longer accepted (a regular expression can "
                             "keep free text): list the codes in event_codes, e.g. "
                             "['stim/\\d{1,3}', 'block/start']")
        return data
    # the public item catalogue of a scores/ratings category: what noised releases list as
    # columns (never the items the data happens to hold) and all that ingest accepts
    items: Annotated[tuple[ItemId, ...], Field(min_length=1, max_length=MAX_CATALOGUE)] | None = None


class Role(_Model):
    """A role members hold; only roles with `reads_data` may invoke purposes."""

    title: ShortText
    description: Text
    reads_data: Flag
    reads_audit: Flag = False


class Purpose(_Model):
    """Why data is processed, by whom, on what basis and under which limits."""

    title: ShortText
    description: Text
    dpv: DpvTerm  # closest W3C DPV purpose term
    parent: PurposeId | None = None
    lawful_basis: Text
    lawful_basis_dpv: DpvTerm
    special_category: Flag = False
    special_category_basis: Literal["art9-2-a", "art9-2-j"] | None = None
    research_safeguards: Text | None = None  # Art. 89(1) measures, required for art9-2-j
    roles: tuple[Id, ...] = Field(min_length=1)
    categories: tuple[Id, ...] = Field(min_length=1)
    dp_required: Flag = False
    epsilon_per_release: Epsilon | None = None
    epsilon_per_participant: Epsilon | None = None
    min_cohort: Annotated[Count, Field(ge=1, le=1_000_000)] = 1
    per_rating_unit_allowed: Flag = False
    on_budget_exceeded: Literal["exclude", "refuse"] = "exclude"
    requires_recipient: Flag = False
    recipients: tuple[ShortText, ...] = ()
    form_permission: Literal["recontact", "external_sharing"] | None = None


class PolicyFile(_Model):
    """One TOML file: any subset of the four sections."""

    policy: PolicyMeta | None = None
    categories: dict[Id, Category] = Field(default_factory=dict)
    roles: dict[Id, Role] = Field(default_factory=dict)
    purposes: dict[PurposeId, Purpose] = Field(default_factory=dict)


class PolicyDocument(_Model):
    """All files merged; what the digest covers."""

    policy: PolicyMeta
    categories: dict[Id, Category]
    roles: dict[Id, Role]
    purposes: dict[PurposeId, Purpose]


# --------------------------------------------------------------------------- errors


def safe_id(value: object, limit: int = 40) -> str:
    """An id quoted for an error message: printable ASCII only, truncated."""
    text = "".join(ch if 32 <= ord(ch) < 127 else "?" for ch in str(value))
    return repr(text[:limit] + ("..." if len(text) > limit else ""))


def _loc_path(loc: tuple[int | str, ...]) -> str:
    path = ""
    for part in loc:
        if isinstance(part, int):
            path += f"[{part}]"
        elif part == "[key]":
            path += " (id)"
        else:
            text = "".join(ch if 32 <= ord(ch) < 127 else "?" for ch in part)[:64]
            path += f".{text}" if path else text
    return path or "(top level)"


def _error_message(err: Mapping[str, Any]) -> str:
    kind = err.get("type", "")
    if kind == "extra_forbidden":
        return "unknown field"
    if kind == "missing":
        return "required field is missing"
    msg = str(err.get("msg", "invalid value"))
    return msg.removeprefix("Value error, ")


def invalid_from_validation(source: str, exc: ValidationError, *, prefix: str = "") -> InvalidInput:
    """One line naming `source` and the first field at fault; never the value itself."""
    errors = exc.errors(include_input=False, include_url=False)
    first = errors[0]
    path = _loc_path(tuple(first.get("loc", ())))
    if prefix:
        path = prefix + ("" if path.startswith("[") else ".") + path
    more = f" (and {len(errors) - 1} more problem(s))" if len(errors) > 1 else ""
    return InvalidInput(f"{source}: {path}: {_error_message(first)}{more}")


def parse_toml(source: str, raw: bytes) -> dict[str, Any]:
    """TOML bytes -> dict, or InvalidInput naming `source` (never quoting its content)."""
    if len(raw) > MAX_FILE_BYTES:
        raise InvalidInput(f"{source}: larger than {MAX_FILE_BYTES} bytes")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InvalidInput(f"{source}: not UTF-8 text (byte {exc.start})") from None
    text = text.removeprefix("\ufeff")  # a byte-order mark some editors write; not TOML
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InvalidInput(f"{source}: not valid TOML: {exc}") from None
    except RecursionError:
        raise InvalidInput(f"{source}: not valid TOML: nested too deeply") from None


# --------------------------------------------------------------------------- the policy set


class PolicySet:
    """A validated, immutable policy set with precomputed lookups for the decision engine."""

    __slots__ = ("_chains", "categories", "digest", "document", "meta", "purposes", "roles",
                 "version")

    def __init__(self, document: PolicyDocument, origins: Mapping[str, str] | None = None) -> None:
        try:
            _check_references(document)
        except _RefError as exc:
            section_id = ".".join(exc.path.split(".", 2)[:2]).split("[")[0]
            source = (origins or {}).get(section_id, "policy set")
            raise InvalidInput(f"{source}: {exc.path}: {exc.message}") from None
        self.document = document
        self.meta = document.policy
        self.categories: Mapping[str, Category] = MappingProxyType(dict(document.categories))
        self.roles: Mapping[str, Role] = MappingProxyType(dict(document.roles))
        self.purposes: Mapping[str, Purpose] = MappingProxyType(dict(document.purposes))
        self.digest = crypto.sha256_hex(DIGEST_DOMAIN + canonical_json(document))
        self.version = self.digest[:VERSION_LENGTH]
        self._chains = {pid: _chain(document.purposes, pid) for pid in document.purposes}

    def __setattr__(self, name: str, value: object) -> None:
        if hasattr(self, "_chains"):
            raise AttributeError("a PolicySet is immutable")
        object.__setattr__(self, name, value)

    def __repr__(self) -> str:
        return f"PolicySet({self.meta.name!r}, version={self.version!r})"

    def chain(self, purpose: str) -> tuple[str, ...]:
        """`purpose` followed by its ancestors, narrowest first: the purposes whose
        consent covers a request for `purpose` (never a narrower one)."""
        return self._chains[purpose]

    def covers(self, consented: str, requested: str) -> bool:
        """True when consent for `consented` covers a request for `requested`."""
        return requested in self._chains and consented in self._chains[requested]

    def consent_scope(self, categories: frozenset[str] | set[str]) -> frozenset[str]:
        """`categories` plus every category they are derived from: what a participant
        must have granted, since derived data inherits its source's consent scope."""
        out = set(categories)
        for cid in categories:
            source = self.categories[cid].derived_from if cid in self.categories else None
            while source is not None:
                out.add(source)
                source = self.categories[source].derived_from
        return frozenset(out)

    def special_categories(self) -> frozenset[str]:
        return frozenset(c for c, cat in self.categories.items() if cat.special_category)

    def lines(self) -> list[str]:
        """The set as lines of text, one per definition, then its warnings (`policy show`, and
        the service's GET /v1/policy: one wording for both)."""
        from vault.policy.describe import describe_policy

        return describe_policy(self)

    def warnings(self) -> list[str]:
        """Things that load but make the decision engine refuse; shown by `policy check`."""
        out = []
        for pid, p in sorted(self.purposes.items()):
            if p.special_category and p.special_category_basis is None:
                out.append(f"purposes.{pid}: processes special-category data but names no "
                           "GDPR Art. 9(2) condition: every request for it is refused")
        for cid, c in sorted(self.categories.items()):
            if c.event_code_pattern is not None:
                out.append(f"categories.{cid}: event_code_pattern (an earlier version's regular "
                           "expression) is ignored: every annotation is relabelled until a policy "
                           "set with event_codes is applied")
        return out

    def canonical_json(self) -> bytes:
        return canonical_json(self.document)


def canonical_json(model: BaseModel) -> bytes:
    """Sorted keys, no whitespace, UTF-8, field names as in the files.

    A category without `event_codes` is dumped without that key, exactly as before the
    field existed, so the versions of earlier policy sets (and the vaults pinned to them)
    stay what they were.
    """
    data = model.model_dump(mode="json", by_alias=True)
    for category in data.get("categories", {}).values() if isinstance(model, PolicyDocument) else ():
        if category.get("event_codes") is None:
            category.pop("event_codes", None)
    return json.dumps(data, sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False).encode("utf-8")


def _chain(purposes: Mapping[str, Purpose], pid: str) -> tuple[str, ...]:
    out = [pid]
    parent = purposes[pid].parent
    while parent is not None:
        out.append(parent)
        parent = purposes[parent].parent
    return tuple(out)


class _RefError(Exception):
    def __init__(self, path: str, message: str) -> None:
        super().__init__(path, message)
        self.path, self.message = path, message


def _fail(path: str, message: str) -> _RefError:
    return _RefError(path, message)


def _check_categories(doc: PolicyDocument) -> None:
    for cid, cat in doc.categories.items():
        if cat.derived_from is not None and cat.derived_from not in doc.categories:
            raise _fail(f"categories.{cid}.derived_from",
                        f"unknown category {safe_id(cat.derived_from)}")
    for cid, cat in doc.categories.items():
        path = f"categories.{cid}"
        seen, cur = {cid}, cat.derived_from
        while cur is not None:
            if cur in seen:
                raise _fail(f"{path}.derived_from", "derivation cycle")
            seen.add(cur)
            cur = doc.categories[cur].derived_from
        scored = cat.kind in ("scores", "ratings")
        if scored and (cat.value_type is None or cat.value_range is None):
            raise _fail(path, f"a '{cat.kind}' category needs value_type and value_range")
        if cat.value_range is not None:
            low, high = cat.value_range
            if not low < high:
                raise _fail(f"{path}.value_range", "the lower bound must be below the upper")
            if cat.value_type == "integer" and not (low.is_integer() and high.is_integer()):
                raise _fail(f"{path}.value_range", "integer scores need integer bounds")
        if cat.items is not None:
            if not scored:
                raise _fail(f"{path}.items", "only scores and ratings categories list items")
            if len(set(cat.items)) != len(cat.items):
                raise _fail(f"{path}.items", "an item is listed twice")
        if cat.event_codes is not None:
            if cat.kind != "recording":
                raise _fail(f"{path}.event_codes", "only recordings carry event codes")
            try:
                EventCodes(cat.event_codes)
            except UsageError as exc:
                raise _fail(f"{path}.event_codes", exc.message) from None


def _check_purpose(doc: PolicyDocument, pid: str, p: Purpose) -> None:
    path = f"purposes.{pid}"
    for i, rid in enumerate(p.roles):
        if rid not in doc.roles:
            raise _fail(f"{path}.roles[{i}]", f"unknown role {safe_id(rid)}")
        if not doc.roles[rid].reads_data:
            raise _fail(f"{path}.roles[{i}]", f"role {safe_id(rid)} may not read data")
    if len(set(p.roles)) != len(p.roles):
        raise _fail(f"{path}.roles", "a role is listed twice")
    for i, cid in enumerate(p.categories):
        if cid not in doc.categories:
            raise _fail(f"{path}.categories[{i}]", f"unknown category {safe_id(cid)}")
        if doc.categories[cid].special_category and not p.special_category:
            raise _fail(f"{path}.special_category",
                        f"must be true: category {safe_id(cid)} is special-category data")
    if len(set(p.categories)) != len(p.categories):
        raise _fail(f"{path}.categories", "a category is listed twice")
    if p.special_category_basis is not None and not p.special_category:
        raise _fail(f"{path}.special_category_basis", "set special_category = true or drop it")
    if p.special_category_basis == ART9_RESEARCH and p.research_safeguards is None:
        raise _fail(f"{path}.research_safeguards",
                    "required with art9-2-j (GDPR Art. 89(1) safeguards)")
    if p.dp_required and (p.epsilon_per_release is None or p.epsilon_per_participant is None):
        raise _fail(path, "dp_required needs epsilon_per_release and epsilon_per_participant")
    if (p.epsilon_per_release is None) != (p.epsilon_per_participant is None):
        raise _fail(path, "give both epsilon_per_release and epsilon_per_participant, or neither")
    if (p.epsilon_per_release is not None and p.epsilon_per_participant is not None
            and p.epsilon_per_release > p.epsilon_per_participant):
        raise _fail(f"{path}.epsilon_per_release", "exceeds epsilon_per_participant")
    if p.recipients and not p.requires_recipient:
        raise _fail(f"{path}.recipients", "only purposes with requires_recipient list recipients")
    if p.parent is not None and p.parent not in doc.purposes:
        raise _fail(f"{path}.parent", f"unknown purpose {safe_id(p.parent)}")


def _check_narrower(doc: PolicyDocument, pid: str, child: Purpose) -> None:
    """A child purpose may never be broader than its parent in any limit."""
    if child.parent is None:
        return
    parent = doc.purposes[child.parent]
    path = f"purposes.{pid}"
    extra = [c for c in child.categories if c not in parent.categories]
    if extra:
        raise _fail(f"{path}.categories", f"{safe_id(extra[0])} is not allowed by the parent")
    extra = [r for r in child.roles if r not in parent.roles]
    if extra:
        raise _fail(f"{path}.roles", f"{safe_id(extra[0])} is not allowed by the parent")
    if child.min_cohort < parent.min_cohort:
        raise _fail(f"{path}.min_cohort", "below the parent's")
    if parent.dp_required and not child.dp_required:
        raise _fail(f"{path}.dp_required", "the parent requires differential privacy")
    for name in ("epsilon_per_release", "epsilon_per_participant"):
        mine, theirs = getattr(child, name), getattr(parent, name)
        if theirs is not None and (mine is None or mine > theirs):
            raise _fail(f"{path}.{name}", "above the parent's")
    if child.per_rating_unit_allowed and not parent.per_rating_unit_allowed:
        raise _fail(f"{path}.per_rating_unit_allowed", "the parent does not allow it")
    if parent.requires_recipient and not child.requires_recipient:
        raise _fail(f"{path}.requires_recipient", "the parent requires a recipient")
    if parent.recipients and not (child.recipients
                                  and set(child.recipients) <= set(parent.recipients)):
        raise _fail(f"{path}.recipients", "must list some of the parent's recipients only")
    if parent.on_budget_exceeded == "refuse" and child.on_budget_exceeded != "refuse":
        raise _fail(f"{path}.on_budget_exceeded", "the parent refuses the whole release")
    if child.special_category and child.special_category_basis != parent.special_category_basis:
        raise _fail(f"{path}.special_category_basis", "must match the parent's")
    if parent.form_permission is not None and child.form_permission != parent.form_permission:
        raise _fail(f"{path}.form_permission", "must match the parent's")


def _check_references(doc: PolicyDocument) -> None:
    _check_categories(doc)
    for pid, p in doc.purposes.items():
        _check_purpose(doc, pid, p)
    for pid in doc.purposes:  # cycles, before walking chains
        seen, cur = set(), pid
        while cur is not None:
            if cur in seen:
                raise _fail(f"purposes.{pid}.parent", "the purpose hierarchy has a cycle")
            seen.add(cur)
            cur = doc.purposes[cur].parent
    for pid, p in doc.purposes.items():
        _check_narrower(doc, pid, p)
    flagged: dict[str, str] = {}
    for pid, p in doc.purposes.items():
        if p.form_permission is not None and p.parent is None:
            if p.form_permission in flagged:
                raise _fail(f"purposes.{pid}.form_permission",
                            f"also claimed by purposes.{flagged[p.form_permission]}")
            flagged[p.form_permission] = pid


# --------------------------------------------------------------------------- loading


def parse_policy_files(files: Mapping[str, bytes]) -> PolicySet:
    """Validate and merge policy files given as {file name: bytes}."""
    return parse_policy_tables({name: parse_toml(name, raw) for name, raw in sorted(files.items())})


def parse_policy_tables(tables: Mapping[str, Mapping[str, Any]]) -> PolicySet:
    """Validate and merge already-parsed files given as {file name: TOML tables}."""
    if not tables:
        raise InvalidInput("policy set: no .toml files found")
    merged: dict[str, Any] = {"categories": {}, "roles": {}, "purposes": {}}
    origin: dict[str, str] = {}
    for name in sorted(tables):
        try:
            part = PolicyFile.model_validate(tables[name])
        except ValidationError as exc:
            raise invalid_from_validation(name, exc) from None
        if part.policy is not None:
            if "policy" in merged:
                raise InvalidInput(f"{name}: policy: also defined in {origin['policy']}")
            merged["policy"], origin["policy"] = part.policy, name
        for section in ("categories", "roles", "purposes"):
            for key, value in getattr(part, section).items():
                where = f"{section}.{key}"
                if where in origin:
                    raise InvalidInput(f"{name}: {where}: also defined in {origin[where]}")
                merged[section][key], origin[where] = value, name
    if "policy" not in merged:
        raise InvalidInput("policy set: policy: no file defines the [policy] table")
    document = PolicyDocument.model_construct(**merged)
    return PolicySet(document, origin)


def parse_policy_json(raw: bytes) -> PolicySet:
    """Rebuild a policy set from `PolicySet.canonical_json()` (e.g. a stored snapshot)."""
    try:
        document = PolicyDocument.model_validate_json(raw, context={"stored_snapshot": True})
    except ValidationError as exc:
        raise invalid_from_validation("policy snapshot", exc) from None
    return PolicySet(document)


def load_policy_dir(folder: Path) -> PolicySet:
    """Read every `*.toml` directly in `folder` (README and other files are ignored)."""
    if not folder.is_dir():
        raise InvalidInput(f"policy set: {folder} is not a folder")
    files: dict[str, bytes] = {}
    for path in sorted(folder.glob("*.toml")):
        if path.stat().st_size > MAX_FILE_BYTES:
            raise InvalidInput(f"{path.name}: larger than {MAX_FILE_BYTES} bytes")
        files[path.name] = path.read_bytes()
    return parse_policy_files(files)


# installed: vault/default_policies (package data); in a checkout: the top-level policies/
_PACKAGED = Path(__file__).resolve().parents[1] / "default_policies"
DEFAULT_POLICY_DIR = _PACKAGED if _PACKAGED.is_dir() else Path(__file__).resolve().parents[2] / "policies"


def load_default_policy() -> PolicySet:
    return load_policy_dir(DEFAULT_POLICY_DIR)

