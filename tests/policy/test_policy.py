"""Policy sets (schema, loader, content hash) and the pure decision function.

Outside sources: the W3C DPV 2.1 term lists below (w3c/dpv, 2.1/dpv/modules/purposes.csv,
consent_status.ttl and 2.1/legal/eu/gdpr/modules/legal_basis*.csv, read 2026-12 via the
DPVCG repository); GDPR Art. 12(3) and 9(2). The decision property test compares
`decide` with an oracle written here, rule by rule, from the issue text.
"""

from __future__ import annotations

import copy
import datetime as dt
import hashlib
import json
import math
import re
import tomllib
from collections.abc import Iterator, Mapping
from fractions import Fraction
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from vault import crypto
from vault.cli.render import describe_policy
from vault.errors import InvalidInput, UsageError
from vault.policy.consent import ConsentStatus, ConsentVersion, PurposeConsent
from vault.policy.decide import PERMIT, Reason, Request, decide, request_reasons
from vault.policy.event_codes import EventCodes
from vault.policy.policyset import (
    DEFAULT_POLICY_DIR,
    DIGEST_DOMAIN,
    PolicySet,
    load_default_policy,
    load_policy_dir,
    parse_policy_files,
    parse_policy_json,
    parse_policy_tables,
)

ROOT = Path(__file__).resolve().parents[2]
EXAMPLES = ROOT / "docs" / "examples"
NOW = dt.datetime(2026, 6, 15, 12, tzinfo=dt.UTC)  # the demo's reference date

# W3C DPV 2.1 purpose terms (w3c/dpv 2.1/dpv/modules/purposes.csv), the subset a lab may use.
DPV_PURPOSES = {
    "dpv:AcademicResearch", "dpv:ScientificResearch", "dpv:ResearchAndDevelopment",
    "dpv:NonCommercialResearch", "dpv:CommercialResearch", "dpv:ProvidePersonalisedRecommendations",
    "dpv:ProvideProductRecommendations", "dpv:ServicePersonalisation", "dpv:ServiceOptimisation",
    "dpv:CommunicationManagement", "dpv:ImproveExistingProductsAndServices",
}
# DPV GDPR extension legal bases (2.1/legal/eu/gdpr/modules/legal_basis.csv).
DPV_GDPR_BASES = {"eu-gdpr:A6-1-a", "eu-gdpr:A6-1-e", "eu-gdpr:A6-1-f"}


# --------------------------------------------------------------------------- helpers


def default_tables() -> dict[str, dict[str, Any]]:
    return {p.name: tomllib.loads(p.read_text("utf-8")) for p in DEFAULT_POLICY_DIR.glob("*.toml")}


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        return repr(v)
    if isinstance(v, dt.date):
        return v.isoformat()
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise TypeError(type(v))


def to_toml(tables: Mapping[str, Any], prefix: str = "") -> str:
    """A small TOML writer (tests only): scalars first, then sub-tables."""
    lines = [f"{json.dumps(k)} = {_toml_value(v)}" for k, v in tables.items()
             if not isinstance(v, dict)]
    for k, v in tables.items():
        if isinstance(v, dict):
            name = f"{prefix}.{json.dumps(k)}" if prefix else json.dumps(k)
            lines.append(f"[{name}]")
            lines.append(to_toml(v, name))
    return "\n".join(lines) + "\n"


def with_change(tables: dict[str, Any], file: str, path: str, value: Any) -> dict[str, Any]:
    out = copy.deepcopy(tables)
    node = out[file]
    keys = path.split("|")
    for k in keys[:-1]:
        node = node[k]
    if value is DELETE:
        del node[keys[-1]]
    else:
        node[keys[-1]] = value
    return out


DELETE = object()


def version(pid: str, purposes: dict[str, PurposeConsent], expires: dt.date,
            retention_end: dt.date | None = None) -> ConsentVersion:
    return ConsentVersion(participant_id=pid, number=1, previous_digest=None, change="enrolled",
                          recorded_at=NOW - dt.timedelta(days=90), policy_version="0" * 16,
                          form_version="f", signed=dt.date(2026, 3, 1), expires=expires,
                          retention_end=retention_end, purposes=purposes)


def entry(status: ConsentStatus, cats: set[str], explicit: bool = False) -> PurposeConsent:
    return PurposeConsent(status=status, categories=frozenset(cats), explicit=explicit,
                          lawful_basis_dpv="eu-gdpr:A6-1-a")


def pid(i: int) -> str:
    return f"{i:032x}"


# --------------------------------------------------------------------------- the default set


def test_default_policy_defines_the_required_ids() -> None:
    policy = load_default_policy()
    assert {"eeg-raw", "scores-derived", "ratings-explicit", "identity-contact",
            "demographics"} <= set(policy.categories)
    assert {"primary-analysis", "recommender-training", "method-development",
            "external-sharing", "re-contact"} <= set(policy.purposes)
    assert {"steward", "analyst", "auditor"} <= set(policy.roles)
    auditor = policy.roles["auditor"]
    assert auditor.reads_audit and not auditor.reads_data
    assert all("auditor" not in p.roles for p in policy.purposes.values())


def test_default_purposes_map_to_published_dpv_terms_named_in_their_description() -> None:
    policy = load_default_policy()
    for pid_, p in policy.purposes.items():
        assert p.dpv in DPV_PURPOSES, pid_
        assert p.dpv in " ".join(p.description.split()), pid_  # named in the description
        assert p.lawful_basis_dpv in DPV_GDPR_BASES, pid_


def test_default_policy_carries_the_later_fields() -> None:
    policy = load_default_policy()
    # GDPR Art. 12(3): "within one month"; 30 days is common practice, no source.
    assert policy.meta.withdrawal_deadline_days == 30
    ratings, scores = policy.categories["ratings-explicit"], policy.categories["scores-derived"]
    assert (ratings.value_type, ratings.value_range) == ("integer", (0.0, 3.0))
    assert scores.value_type == "real" and scores.value_range == (-1.0, 1.0)
    assert scores.derived_from == "eeg-raw"
    codes = EventCodes(policy.categories["eeg-raw"].event_codes or ())
    assert codes.matches("stim/dish-07") and codes.matches("block/start")
    assert not codes.matches("note: Ada tired") and not codes.matches("stim/Zelda_visit")
    assert policy.purposes["external-sharing"].requires_recipient
    assert not any(p.per_rating_unit_allowed for p in policy.purposes.values())
    assert policy.covers("recommender-training", "recommender-training/canteen-menu")
    assert not policy.covers("recommender-training/canteen-menu", "recommender-training")
    # EEG is special-category data; every purpose touching it names an Art. 9(2) condition.
    for p in policy.purposes.values():
        if "eeg-raw" in p.categories:
            assert p.special_category and p.special_category_basis in ("art9-2-a", "art9-2-j")
    assert policy.warnings() == []


def test_describe_lists_every_definition_and_the_version() -> None:
    policy = load_default_policy()
    text = "\n".join(describe_policy(policy))
    assert policy.version in text
    for name in [*policy.categories, *policy.roles, *policy.purposes]:
        assert f"  {name}" in text
    assert "event codes kept: stim/dish-\\d{2}, block/start, block/end" in text  # shown to the steward


def test_example_policy_set_loads_and_demonstrates_the_hierarchy() -> None:
    policy = load_policy_dir(EXAMPLES / "policy-set")
    assert policy.chain("primary-analysis/signal-quality") == (
        "primary-analysis/signal-quality", "primary-analysis")
    assert policy.purposes["shared-summary"].on_budget_exceeded == "refuse"
    assert "auditor" in policy.roles and not policy.roles["auditor"].reads_data


# --------------------------------------------------------------------------- the content hash


def test_version_is_the_hash_of_the_canonical_model() -> None:
    policy = load_default_policy()
    assert policy.digest == crypto.sha256_hex(DIGEST_DOMAIN + policy.canonical_json())
    assert policy.version == policy.digest[:16]
    assert re.fullmatch(r"[0-9a-f]{64}", policy.digest)


def test_comments_layout_and_file_split_do_not_change_the_version() -> None:
    policy = load_default_policy()
    tables = default_tables()
    merged: dict[str, Any] = {}
    for t in tables.values():
        for section, value in t.items():
            merged.setdefault(section, {}).update(value)
    one_file = parse_policy_files({"all.toml": to_toml(merged).encode()})
    assert one_file.version == policy.version
    assert parse_policy_json(policy.canonical_json()).version == policy.version


@pytest.mark.parametrize(("file", "path", "value"), [
    ("purposes.toml", "purposes|primary-analysis|description", "A different description."),
    ("purposes.toml", "purposes|recommender-training|epsilon_per_release", 0.9),
    ("purposes.toml", "purposes|primary-analysis|min_cohort", 6),
    ("roles.toml", "roles|analyst|reads_audit", True),
    ("policy.toml", "policy|withdrawal_deadline_days", 29),
])
def test_any_change_of_content_changes_the_version(file: str, path: str, value: Any) -> None:
    before = parse_policy_tables(default_tables())
    after = parse_policy_tables(with_change(default_tables(), file, path, value))
    assert after.version != before.version


# --------------------------------------------------------------------------- malformed sets

MALFORMED = [
    ("purposes.toml", "purposes|primary-analysis|roles", ["steward", "auditr"],
     "purposes.toml: purposes.primary-analysis.roles[1]: unknown role 'auditr'"),
    ("purposes.toml", "purposes|primary-analysis|roles", ["auditor"],
     "purposes.toml: purposes.primary-analysis.roles[0]: role 'auditor' may not read data"),
    ("purposes.toml", "purposes|recommender-training|categories", ["scores-derived", "eeg-rwa"],
     "purposes.toml: purposes.recommender-training.categories[1]: unknown category 'eeg-rwa'"),
    ("purposes.toml", "purposes|primary-analysis|special_category", False,
     "purposes.primary-analysis.special_category: must be true"),
    ("purposes.toml", "purposes|method-development|research_safeguards", DELETE,
     "purposes.method-development.research_safeguards: required with art9-2-j"),
    ("purposes.toml", "purposes|recommender-training|epsilon_per_release", 5.0,
     "purposes.recommender-training.epsilon_per_release: exceeds epsilon_per_participant"),
    ("purposes.toml", "purposes|recommender-training|epsilon_per_participant", DELETE,
     "purposes.toml: purposes.recommender-training:"),
    ("purposes.toml", "purposes|recommender-training|epsilon_per_release", -1.0,
     "purposes.toml: purposes.recommender-training.epsilon_per_release: Input should be greater"),
    ("purposes.toml", "purposes|recommender-training|epsilon_per_release", math.inf,
     "purposes.toml: purposes.recommender-training.epsilon_per_release:"),
    ("purposes.toml", "purposes|recommender-training|dp_required", "yes",
     "purposes.toml: purposes.recommender-training.dp_required: Input should be a valid boolean"),
    ("purposes.toml", "purposes|recommender-training|min_cohort", 0,
     "purposes.toml: purposes.recommender-training.min_cohort: Input should be greater"),
    ("purposes.toml", "purposes|recommender-training|colour", "blue",
     "purposes.toml: purposes.recommender-training.colour: unknown field"),
    ("purposes.toml", "purposes|recommender-training|parent", "recommender-training/canteen-menu",
     "the purpose hierarchy has a cycle"),
    ("purposes.toml", "purposes|recommender-training/canteen-menu|parent", "nope",
     "purposes.recommender-training/canteen-menu.parent: unknown purpose 'nope'"),
    ("purposes.toml", "purposes|recommender-training/canteen-menu|categories",
     ["scores-derived", "demographics"],
     "purposes.recommender-training/canteen-menu.categories: 'demographics' is not allowed"),
    ("purposes.toml", "purposes|recommender-training/canteen-menu|min_cohort", 2,
     "purposes.recommender-training/canteen-menu.min_cohort: below the parent's"),
    ("purposes.toml", "purposes|recommender-training/canteen-menu|epsilon_per_release", 1.5,
     "purposes.recommender-training/canteen-menu.epsilon_per_release: above the parent's"),
    ("purposes.toml", "purposes|recommender-training/canteen-menu|dp_required", False,
     "purposes.recommender-training/canteen-menu.dp_required"),
    ("purposes.toml", "purposes|primary-analysis|dpv", "ScientificResearch",
     "purposes.toml: purposes.primary-analysis.dpv: String should match pattern"),
    ("purposes.toml", "purposes|re-contact|recipients", ["Somebody"],
     "purposes.re-contact.recipients: only purposes with requires_recipient"),
    ("purposes.toml", "purposes|re-contact|form_permission", "external_sharing",
     "form_permission: also claimed by"),
    ("categories.toml", "categories|scores-derived|derived_from", "eeg-rwa",
     "categories.toml: categories.scores-derived.derived_from: unknown category 'eeg-rwa'"),
    ("categories.toml", "categories|eeg-raw|derived_from", "scores-derived",
     "derivation cycle"),
    ("categories.toml", "categories|ratings-explicit|value_range", [3, 0],
     "categories.ratings-explicit.value_range: the lower bound must be below the upper"),
    ("categories.toml", "categories|ratings-explicit|value_range", [0, 2.5],
     "categories.ratings-explicit.value_range: integer scores need integer bounds"),
    ("categories.toml", "categories|ratings-explicit|value_range", DELETE,
     "categories.ratings-explicit: a 'ratings' category needs value_type and value_range"),
    ("categories.toml", "categories|eeg-raw|event_codes", ["stim/("],
     "categories.eeg-raw.event_codes: event code 1: character 6 is not allowed"),
    ("categories.toml", "categories|eeg-raw|event_codes", ["(a+)+$"],
     "categories.eeg-raw.event_codes: event code 1: character 1 is not allowed"),
    ("categories.toml", "categories|eeg-raw|event_codes", [r"stim/.*"],
     "categories.eeg-raw.event_codes: event code 1: character 7 is not allowed"),
    ("categories.toml", "categories|eeg-raw|event_codes", [r"S\d{1,9}"],
     "categories.eeg-raw.event_codes: event code 1: digit runs need 1 <= M <= N <= 4"),
    ("categories.toml", "categories|eeg-raw|event_codes", [r"S\d{1,2}\d{1,2}"],
     "a digit run may not follow a digit or another run"),
    ("categories.toml", "categories|eeg-raw|event_codes", [],
     "categories.eeg-raw.event_codes: event codes: list 1 to 200 codes"),
    ("categories.toml", "categories|eeg-raw|event_code_pattern", "^stim/[A-Za-z0-9_-]+$",
     "categories.toml: categories.eeg-raw: event_code_pattern is no longer accepted"),
    ("categories.toml", "categories|ratings-explicit|event_codes", ["stim/1"],
     "categories.ratings-explicit.event_codes: only recordings carry event codes"),
    ("categories.toml", "categories|Bad Id", {"title": "x"},
     "categories.toml: categories.Bad Id (id): String should match pattern"),
    ("policy.toml", "policy|schema", 2, "policy.toml: policy.schema: Input should be 1"),
    ("policy.toml", "policy|form_versions", [], "policy.toml: policy.form_versions:"),
    ("policy.toml", "policy|withdrawal_deadline_days", 400,
     "policy.toml: policy.withdrawal_deadline_days: Input should be less than or equal to 90"),
    ("roles.toml", "roles|auditor|reads_data", DELETE,
     "roles.toml: roles.auditor.reads_data: required field is missing"),
]


@pytest.mark.parametrize(("file", "path", "value", "message"), MALFORMED)
def test_malformed_policy_is_refused_naming_file_and_field(file: str, path: str, value: Any,
                                                           message: str) -> None:
    with pytest.raises(InvalidInput) as info:
        parse_policy_tables(with_change(default_tables(), file, path, value))
    assert message in info.value.message
    assert "\n" not in info.value.message


def test_whole_file_problems() -> None:
    tables = default_tables()
    with pytest.raises(InvalidInput, match=r"^policy set: policy: no file defines"):
        parse_policy_tables({k: v for k, v in tables.items() if k != "policy.toml"})
    with pytest.raises(InvalidInput, match=r"^z\.toml: roles\.steward: also defined in roles"):
        parse_policy_tables({**tables, "z.toml": {"roles": tables["roles.toml"]["roles"]}})
    with pytest.raises(InvalidInput, match=r"^bad\.toml: not valid TOML: .*line 1"):
        parse_policy_files({"bad.toml": b"[policy\nname = 1"})
    with pytest.raises(InvalidInput, match=r"^bad\.toml: not UTF-8"):
        parse_policy_files({"bad.toml": b"name = '\xff'"})
    with pytest.raises(InvalidInput, match=r"no \.toml files"):
        parse_policy_files({})
    with pytest.raises(InvalidInput, match="snapshot"):
        parse_policy_json(b'{"policy": 1}')


def test_a_purpose_without_its_art9_condition_loads_with_a_warning_and_is_refused() -> None:
    policy = parse_policy_tables(with_change(
        default_tables(), "purposes.toml", "purposes|primary-analysis|special_category_basis",
        DELETE))
    assert any("primary-analysis" in w for w in policy.warnings())
    request = Request(actor="a", role="analyst", purpose="primary-analysis",
                      categories=frozenset({"ratings-explicit"}), cohort=False)
    assert Reason.SPECIAL_CATEGORY_BASIS_MISSING in request_reasons(policy, request)


JUNK = st.recursive(
    st.none() | st.booleans() | st.integers(-5, 10**6) | st.floats(allow_nan=True)
    | st.text(max_size=12) | st.dates(),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=8), inner,
                                                                max_size=3),
    max_leaves=6,
)


def _paths(node: Any, prefix: tuple[str, ...] = ()) -> Iterator[tuple[str, ...]]:
    if isinstance(node, dict):
        for k, v in node.items():
            yield (*prefix, k)
            yield from _paths(v, (*prefix, k))


@settings(max_examples=150, deadline=None)
@given(data=st.data(), junk=JUNK, delete=st.booleans())
def test_fuzzed_policy_tables_give_success_or_one_clear_line(data: st.DataObject, junk: Any,
                                                             delete: bool) -> None:
    tables = default_tables()
    file = data.draw(st.sampled_from(sorted(tables)))
    path = data.draw(st.sampled_from(list(_paths(tables[file]))))
    node = tables[file]
    for k in path[:-1]:
        node = node[k]
    if delete:
        del node[path[-1]]
    else:
        node[path[-1]] = junk
    try:
        policy = parse_policy_tables(tables)
    except InvalidInput as exc:
        assert "\n" not in exc.message and ": " in exc.message
        return
    assert isinstance(policy, PolicySet) and describe_policy(policy)


@settings(max_examples=100, deadline=None)
@given(raw=st.binary(max_size=300) | st.text(max_size=300).map(str.encode))
def test_fuzzed_policy_bytes_give_success_or_invalid_input(raw: bytes) -> None:
    try:
        parse_policy_files({"fuzz.toml": raw})
    except InvalidInput as exc:
        assert exc.message.startswith(("fuzz.toml: ", "policy set: "))


# --------------------------------------------------------------------------- random policies


@st.composite
def random_policy(draw: st.DrawFn) -> PolicySet:
    """A valid random policy set: 1-4 categories, 3 roles, 1-4 purposes in a forest."""
    n_cats = draw(st.integers(1, 4))
    cats = [f"c{i}" for i in range(n_cats)]
    special = {c: draw(st.booleans()) for c in cats}
    categories: dict[str, dict[str, Any]] = {
        c: {"title": c, "description": c, "kind": "attributes", "special_category": special[c]}
        for c in cats}
    if n_cats >= 2 and draw(st.booleans()):
        categories["c1"]["derived_from"] = "c0"  # c1 inherits c0's consent scope
    roles = {"r0": True, "r1": draw(st.booleans()), "r2": False}
    data_roles = [r for r, reads in roles.items() if reads]
    purposes: dict[str, dict[str, Any]] = {}
    for j in range(draw(st.integers(1, 4))):
        parent_id = draw(st.sampled_from([None, *purposes])) if purposes else None
        parent = purposes.get(parent_id) if parent_id else None
        pool_c = parent["categories"] if parent else cats
        pool_r = parent["roles"] if parent else data_roles
        p_cats = draw(st.lists(st.sampled_from(pool_c), min_size=1, unique=True))
        p_roles = draw(st.lists(st.sampled_from(pool_r), min_size=1, unique=True))
        is_special = any(special[c] for c in p_cats) or draw(st.integers(0, 3)) == 0
        if parent is None:
            basis = (draw(st.sampled_from(["art9-2-a", "art9-2-j", "art9-2-a", None]))
                     if is_special else None)
        else:
            basis = parent.get("special_category_basis") if is_special else None
        p: dict[str, Any] = {
            "title": f"p{j}", "description": "d", "dpv": "dpv:AcademicResearch",
            "lawful_basis": "consent", "lawful_basis_dpv": "eu-gdpr:A6-1-a",
            "special_category": is_special, "roles": p_roles, "categories": p_cats,
        }
        if basis:
            p["special_category_basis"] = basis
        if basis == "art9-2-j":
            p["research_safeguards"] = "pseudonymised"
        p["dp_required"] = bool((parent or {}).get("dp_required")) or draw(st.booleans())
        parent_eps = (parent or {}).get("epsilon_per_release")
        if parent_eps is not None:
            p["epsilon_per_participant"] = parent["epsilon_per_participant"]
            p["epsilon_per_release"] = min(parent_eps, draw(st.sampled_from([0.5, 1.0, 2.0])))
        elif p["dp_required"] or draw(st.booleans()):
            rel = draw(st.sampled_from([0.5, 1.0, 2.0]))
            p["epsilon_per_release"] = rel
            p["epsilon_per_participant"] = rel * draw(st.integers(1, 3))
        p["min_cohort"] = (parent or {}).get("min_cohort", 1) + draw(st.integers(0, 3))
        p["per_rating_unit_allowed"] = ((parent is None or parent["per_rating_unit_allowed"])
                                        and draw(st.booleans()))
        p["on_budget_exceeded"] = ("refuse" if (parent or {}).get("on_budget_exceeded") == "refuse"
                                   else draw(st.sampled_from(["exclude", "refuse"])))
        p["requires_recipient"] = bool((parent or {}).get("requires_recipient")) or draw(
            st.booleans())
        if p["requires_recipient"]:
            allowed = (parent or {}).get("recipients") or []
            p["recipients"] = ["R1"] if allowed else draw(st.sampled_from([[], ["R1"]]))
        if parent_id:
            p["parent"] = parent_id
        purposes[f"p{j}"] = p
    tables = {"x.toml": {
        "policy": {"name": "random", "schema": 1, "title": "t", "description": "d",
                   "form_versions": ["f"]},
        "categories": categories,
        "roles": {r: {"title": r, "description": r, "reads_data": reads} for r, reads in
                  roles.items()},
        "purposes": purposes,
    }}
    return parse_policy_files({"x.toml": to_toml(tables["x.toml"]).encode()})


STORED_STATUSES = [s for s in ConsentStatus if s is not ConsentStatus.EXPIRED]


@st.composite
def random_consent(draw: st.DrawFn, policy: PolicySet, i: int) -> ConsentVersion | None:
    """Mostly consents that could permit (given, all categories, not expired), some not."""
    if draw(st.integers(0, 9)) == 0:
        return None
    cats = sorted(policy.categories)
    every = sorted(policy.purposes)
    roots = [p for p in every if policy.purposes[p].parent is None]
    answered = draw(st.just(every) | st.just(roots)
                    | st.lists(st.sampled_from(every), unique=True))
    purposes = {}
    for p in answered:
        status = draw(st.sampled_from([ConsentStatus.GIVEN, ConsentStatus.RENEWED])
                      | st.sampled_from(STORED_STATUSES))
        granted = draw(st.just(cats) | st.lists(st.sampled_from(cats), unique=True))
        purposes[p] = entry(status, set(granted), draw(st.booleans()))
    expires = NOW.date() + dt.timedelta(days=draw(st.sampled_from([400, 400, 400, 400, -30, 0, 1])))
    retention = draw(st.sampled_from([None, expires, expires + dt.timedelta(days=9)]))
    return version(pid(i), purposes, expires, retention)


@st.composite
def random_request(draw: st.DrawFn, policy: PolicySet) -> Request:
    """Half plausible requests built from a purpose, half anything at all."""
    cats = [*sorted(policy.categories), "zz"]
    purpose_id = draw(st.sampled_from([*sorted(policy.purposes), "nope"]))
    purpose = policy.purposes.get(purpose_id)
    if purpose is not None and draw(st.booleans()):
        cap = purpose.epsilon_per_release
        return Request(
            actor="someone", role=draw(st.sampled_from(purpose.roles)), purpose=purpose_id,
            categories=frozenset(draw(st.lists(st.sampled_from(purpose.categories), min_size=1,
                                               unique=True))),
            cohort=draw(st.booleans()), export=draw(st.booleans()),
            epsilon=None if cap is None else draw(st.sampled_from([None, cap, cap / 2])),
            recipient=(purpose.recipients or ["R1"])[0] if purpose.requires_recipient else None,
        )
    return Request(
        actor="someone",
        role=draw(st.sampled_from([*sorted(policy.roles), "nobody"])),
        purpose=purpose_id,
        categories=frozenset(draw(st.lists(st.sampled_from(cats), min_size=1, unique=True))),
        cohort=draw(st.booleans()),
        export=draw(st.booleans()),
        epsilon=draw(st.sampled_from([None, 0.25, 0.5, 1.0, 5.0])),
        privacy_unit=draw(st.sampled_from(["participant", "rating"])),
        recipient=draw(st.sampled_from([None, "R1", "R2"])),
    )


def oracle_request_ok(policy: PolicySet, r: Request) -> bool:
    """Every request-wide rule of the issue, written independently of vault.policy.decide."""
    purpose, role = policy.purposes.get(r.purpose), policy.roles.get(r.role)
    if purpose is None or role is None or not role.reads_data or r.role not in purpose.roles:
        return False
    if not set(r.categories) <= set(purpose.categories):
        return False
    if purpose.special_category and purpose.special_category_basis is None:
        return False
    if r.export and purpose.dp_required and r.epsilon is None:
        return False
    if (r.epsilon is not None and purpose.epsilon_per_release is not None
            and r.epsilon > Fraction(str(purpose.epsilon_per_release))):  # amounts as decimals
        return False
    if r.privacy_unit == "rating" and not purpose.per_rating_unit_allowed:
        return False
    if purpose.requires_recipient and r.recipient is None:
        return False
    return r.recipient is None or (purpose.requires_recipient and (
        not purpose.recipients or r.recipient in purpose.recipients))


def oracle_participant_ok(policy: PolicySet, r: Request, cv: ConsentVersion | None,
                          affordable: bool, *, ignore_budget: bool = False) -> bool:
    if cv is None:
        return False
    answer, p = None, r.purpose
    while p is not None:  # the narrowest answered purpose at or above the request wins
        if p in cv.purposes:
            answer = cv.purposes[p]
            break
        p = policy.purposes[p].parent
    if answer is None or answer.status not in ("given", "renewed"):
        return False
    end = min(cv.expires, cv.retention_end or cv.expires)
    if dt.datetime(end.year, end.month, end.day, tzinfo=dt.UTC) <= NOW:
        return False
    needed = set(r.categories)
    for c in r.categories:  # derived data needs what it is derived from
        source = policy.categories[c].derived_from
        while source is not None:
            needed.add(source)
            source = policy.categories[source].derived_from
    if not needed <= set(answer.categories):
        return False
    purpose = policy.purposes[r.purpose]
    special = {c for c in needed if policy.categories[c].special_category}
    if purpose.special_category_basis == "art9-2-a" and special and not answer.explicit:
        return False
    return ignore_budget or r.epsilon is None or affordable


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_permit_iff_every_rule_allows_it(data: st.DataObject) -> None:
    policy = data.draw(random_policy())
    n = data.draw(st.integers(0, 8))
    consents = {pid(i): data.draw(random_consent(policy, i)) for i in range(n)}
    # the exact accountant's verdict per participant (some absent from it: they cannot afford)
    affordable = {pid(i): data.draw(st.sampled_from([True, True, False])) for i in range(n)
                  if data.draw(st.integers(0, 4)) > 0}
    request = data.draw(random_request(policy))
    decision = decide(policy, request, consents, now=NOW, affordable=affordable)
    request_ok = oracle_request_ok(policy, request)
    assert (request_reasons(policy, request) == ()) == request_ok
    eligible = []
    for p, cv in consents.items():
        expected = request_ok and oracle_participant_ok(policy, request, cv, affordable.get(p, False))
        got = decision.decisions[p]
        assert got.permit == expected, (p, got)
        assert got.permit == (got.reasons == ())
        if expected:
            eligible.append(p)
    assert list(decision.eligible) == eligible
    if not request_ok:
        assert not decision.permit and decision.cohort_reasons
        return
    purpose = policy.purposes[request.purpose]
    budget_blocked = request.epsilon is not None and any(
        oracle_participant_ok(policy, request, cv, False, ignore_budget=True)
        and not affordable.get(p, False) for p, cv in consents.items())
    cohort_ok = (not (purpose.on_budget_exceeded == "refuse" and budget_blocked)
                 and (not request.cohort or len(eligible) >= purpose.min_cohort))
    assert decision.permit == cohort_ok
    assert decision.included == (tuple(eligible) if cohort_ok else ())
    refused = sum(1 for d in decision.decisions.values() if not d.permit)
    assert sum(decision.counts.values()) >= refused


# --------------------------------------------------------------------------- specific rules


def _all_granted(explicit: bool = True) -> ConsentVersion:
    cats = {"eeg-raw", "scores-derived", "ratings-explicit", "demographics", "identity-contact"}
    purposes = {p: entry(ConsentStatus.GIVEN, cats, explicit) for p in (
        "primary-analysis", "recommender-training", "method-development", "external-sharing",
        "re-contact")}
    return version(pid(0), purposes, dt.date(2031, 1, 1))


def _req(**kw: Any) -> Request:
    base: dict[str, Any] = dict(actor="a", role="analyst", purpose="primary-analysis",
                                categories=frozenset({"ratings-explicit"}), cohort=False)
    base.update(kw)
    return Request(**base)


class _Untouchable(Mapping[str, ConsentVersion | None]):
    """Consents that must not be read (request-wide refusals look at none)."""

    def __init__(self, keys: list[str]) -> None:
        self._keys = keys

    def __getitem__(self, key: str) -> ConsentVersion | None:
        raise AssertionError("consent read despite a request-wide refusal")

    def get(self, key: str, default: Any = None) -> Any:
        raise AssertionError("consent read despite a request-wide refusal")

    def __iter__(self) -> Iterator[str]:
        return iter(self._keys)

    def __len__(self) -> int:
        return len(self._keys)


@pytest.mark.parametrize(("kw", "reason"), [
    (dict(role="auditor"), Reason.ROLE_NOT_ALLOWED),
    (dict(role="analyst", purpose="external-sharing", recipient="Westbrook Institute of Food "
          "Design", categories=frozenset({"scores-derived"})), Reason.ROLE_NOT_ALLOWED),
    (dict(purpose="selling"), Reason.UNKNOWN_PURPOSE),
    (dict(categories=frozenset({"eeg-rwa"})), Reason.UNKNOWN_CATEGORY),
    (dict(purpose="recommender-training", categories=frozenset({"eeg-raw"})),
     Reason.PURPOSE_NOT_ALLOWED_CATEGORY),
    (dict(purpose="recommender-training", categories=frozenset({"scores-derived"}), export=True),
     Reason.DP_NOISE_REQUIRED),
    (dict(purpose="recommender-training", categories=frozenset({"scores-derived"}), export=True,
          epsilon=1.5), Reason.RELEASE_EPSILON_EXCEEDS_CAP),
    (dict(purpose="recommender-training", categories=frozenset({"scores-derived"}), epsilon=0.5,
          privacy_unit="rating"), Reason.PRIVACY_UNIT_NOT_ALLOWED),
    (dict(role="steward", purpose="external-sharing", categories=frozenset({"scores-derived"})),
     Reason.RECIPIENT_REQUIRED),
    (dict(role="steward", purpose="external-sharing", categories=frozenset({"scores-derived"}),
          recipient="Someone Else"), Reason.RECIPIENT_NOT_ALLOWED),
    (dict(recipient="Westbrook Institute of Food Design"), Reason.RECIPIENT_NOT_ALLOWED),
])
def test_request_wide_refusals_read_no_consent(kw: dict[str, Any], reason: Reason) -> None:
    policy = load_default_policy()
    decision = decide(policy, _req(**kw), _Untouchable([pid(0), pid(1)]), now=NOW,
                      affordable={})
    assert not decision.permit and reason in decision.cohort_reasons
    assert all(not d.permit and reason in d.reasons for d in decision.decisions.values())
    assert decision.counts[reason.value] == 2 and decision.included == ()


def test_consent_for_a_purpose_covers_narrower_requests_never_broader() -> None:
    policy = load_default_policy()
    cats = {"eeg-raw", "scores-derived", "ratings-explicit"}
    parent_only = version(pid(0), {"recommender-training": entry(ConsentStatus.GIVEN, cats)},
                          dt.date(2031, 1, 1))
    child_only = version(pid(1), {"recommender-training/canteen-menu":
                                  entry(ConsentStatus.GIVEN, cats)}, dt.date(2031, 1, 1))
    parent_but_not_child = version(pid(2), {
        "recommender-training": entry(ConsentStatus.GIVEN, cats),
        "recommender-training/canteen-menu": entry(ConsentStatus.REFUSED, set())},
        dt.date(2031, 1, 1))
    consents = {pid(0): parent_only, pid(1): child_only, pid(2): parent_but_not_child}
    child = decide(policy, _req(purpose="recommender-training/canteen-menu",
                                categories=frozenset({"scores-derived"})), consents, now=NOW)
    parent = decide(policy, _req(purpose="recommender-training",
                                 categories=frozenset({"scores-derived"})), consents, now=NOW)
    assert [child.decisions[pid(i)].permit for i in range(3)] == [True, True, False]
    assert child.decisions[pid(2)].reasons == (Reason.CONSENT_REFUSED,)
    assert [parent.decisions[pid(i)].permit for i in range(3)] == [True, False, True]
    assert parent.decisions[pid(1)].reasons == (Reason.NO_CONSENT_FOR_PURPOSE,)


def test_derived_scores_need_their_recording_granted() -> None:
    policy = load_default_policy()
    scores_only = version(pid(0), {"primary-analysis": entry(
        ConsentStatus.GIVEN, {"scores-derived", "ratings-explicit"}, True)}, dt.date(2031, 1, 1))
    d = decide(policy, _req(categories=frozenset({"scores-derived"})), {pid(0): scores_only},
               now=NOW)
    assert d.decisions[pid(0)].reasons == (Reason.CATEGORY_NOT_GRANTED,)
    assert policy.consent_scope({"scores-derived"}) == {"scores-derived", "eeg-raw"}


def test_per_participant_reasons() -> None:
    policy = load_default_policy()
    cats = {"eeg-raw", "ratings-explicit"}
    consents: dict[str, ConsentVersion | None] = {
        pid(0): version(pid(0), {"primary-analysis": entry(ConsentStatus.GIVEN, cats, True)},
                        dt.date(2031, 1, 1)),
        pid(1): None,
        pid(2): version(pid(2), {"primary-analysis": entry(ConsentStatus.GIVEN, cats, False)},
                        dt.date(2031, 1, 1)),
        pid(3): version(pid(3), {"primary-analysis": entry(ConsentStatus.GIVEN,
                                                           {"ratings-explicit"}, True)},
                        dt.date(2031, 1, 1)),
        pid(4): version(pid(4), {"primary-analysis": entry(ConsentStatus.WITHDRAWN, set())},
                        dt.date(2031, 1, 1)),
        pid(5): version(pid(5), {"primary-analysis": entry(ConsentStatus.REVOKED, set())},
                        dt.date(2031, 1, 1)),
        pid(6): version(pid(6), {"primary-analysis": entry(ConsentStatus.INVALIDATED, set())},
                        dt.date(2031, 1, 1)),
        pid(7): version(pid(7), {"primary-analysis": entry(ConsentStatus.GIVEN, cats, True)},
                        dt.date(2031, 1, 1), retention_end=dt.date(2026, 6, 15)),
    }
    request = _req(categories=frozenset({"eeg-raw"}), participants=(*consents, pid(99)))
    d = decide(policy, request, consents, now=NOW)
    got = {p: d.decisions[p].reasons for p in d.decisions}
    assert got == {
        pid(0): (), pid(1): (Reason.NO_CONSENT_FOR_PURPOSE,),
        pid(2): (Reason.SPECIAL_CATEGORY_BASIS_MISSING,),
        pid(3): (Reason.CATEGORY_NOT_GRANTED,), pid(4): (Reason.CONSENT_WITHDRAWN,),
        pid(5): (Reason.CONSENT_REVOKED,), pid(6): (Reason.CONSENT_INVALIDATED,),
        pid(7): (Reason.CONSENT_EXPIRED,), pid(99): (Reason.UNKNOWN_PARTICIPANT,),
    }
    assert d.permit and d.included == (pid(0),)  # not a cohort request: no minimum
    # explicit consent is only needed when special-category data is requested
    ratings = decide(policy, _req(), consents, now=NOW)
    assert ratings.decisions[pid(2)] is PERMIT


def test_expiry_happens_at_the_start_of_the_day_without_anyone_acting() -> None:
    policy = load_default_policy()
    cv = version(pid(0), {"primary-analysis": entry(ConsentStatus.GIVEN, {"ratings-explicit"})},
                 dt.date(2026, 6, 1))
    edge = dt.datetime(2026, 6, 1, tzinfo=dt.UTC)
    before = decide(policy, _req(), {pid(0): cv}, now=edge - dt.timedelta(microseconds=1))
    at = decide(policy, _req(), {pid(0): cv}, now=edge)
    assert before.decisions[pid(0)] is PERMIT
    assert at.decisions[pid(0)].reasons == (Reason.CONSENT_EXPIRED,)
    # the same instant in another time zone decides the same
    cest = dt.timezone(dt.timedelta(hours=2))
    assert decide(policy, _req(), {pid(0): cv}, now=edge.astimezone(cest)).decisions[
        pid(0)].reasons == (Reason.CONSENT_EXPIRED,)
    assert cv.status_at("primary-analysis", edge) is ConsentStatus.EXPIRED


def test_minimum_cohort_and_counts_without_ids() -> None:
    policy = load_default_policy()
    granted = _all_granted()
    consents = {pid(i): granted if i < 4 else None for i in range(6)}
    d = decide(policy, _req(cohort=True), consents, now=NOW)
    assert len(d.eligible) == 4 < policy.purposes["primary-analysis"].min_cohort
    assert not d.permit and d.cohort_reasons == (Reason.COHORT_TOO_SMALL,)
    assert d.included == () and d.counts == {"no-consent-for-purpose": 2}
    message = d.refusal_message()
    assert "cohort-too-small" in message and "no-consent-for-purpose: 2" in message
    assert not any(pid(i) in message for i in range(6))
    consents.update({pid(i): granted for i in range(6)})
    assert decide(policy, _req(cohort=True), consents, now=NOW).permit


def test_budget_exclude_and_refuse() -> None:
    policy = load_default_policy()
    granted = _all_granted()
    consents = {pid(i): granted for i in range(25)}
    affordable = {pid(i): True for i in range(25)}  # the exact accountant's verdicts
    affordable[pid(0)] = False
    del affordable[pid(1)]  # absent from the verdicts: cannot afford
    rec = _req(purpose="recommender-training", categories=frozenset({"scores-derived"}),
               export=True, epsilon=0.5, cohort=True)
    d = decide(policy, rec, consents, now=NOW, affordable=affordable)
    assert d.permit and len(d.included) == 23
    assert d.decisions[pid(0)].reasons == d.decisions[pid(1)].reasons == (
        Reason.BUDGET_EXHAUSTED,)
    share = _req(role="steward", purpose="external-sharing", export=True, epsilon=0.5,
                 categories=frozenset({"scores-derived"}), cohort=True,
                 recipient="Westbrook Institute of Food Design")
    d = decide(policy, share, consents, now=NOW, affordable=affordable)
    assert not d.permit and Reason.BUDGET_EXHAUSTED in d.cohort_reasons
    with pytest.raises(UsageError, match="verdict per participant"):
        decide(policy, rec, consents, now=NOW)


def test_misuse_is_a_usage_error() -> None:
    policy = load_default_policy()
    with pytest.raises(UsageError, match="time zone"):
        decide(policy, _req(), {}, now=dt.datetime(2026, 6, 15))
    with pytest.raises(UsageError, match="epsilon"):
        _req(epsilon=-1.0)
    with pytest.raises(UsageError, match="epsilon"):
        _req(epsilon=math.nan)
    with pytest.raises(UsageError, match="categories"):
        _req(categories=frozenset())
    with pytest.raises(UsageError, match="colour"):
        _req(colour="blue")


def test_decision_names_policy_version_and_consent_versions() -> None:
    policy = load_default_policy()
    granted = _all_granted()
    consents = {pid(0): granted, pid(1): None}
    d1 = decide(policy, _req(), consents, now=NOW)
    assert d1.policy_version == policy.version and d1.decided_at == NOW
    amended = granted.model_copy(update={"number": 2, "previous_digest": "0" * 64})
    d2 = decide(policy, _req(), {pid(0): amended, pid(1): None}, now=NOW)
    assert d1.consent_digest != d2.consent_digest
    assert d1.consent_digest == decide(policy, _req(), consents, now=NOW).consent_digest


def test_a_snapshot_of_an_earlier_version_still_loads_with_its_version_and_keeps_nothing() -> None:
    # What a vault made before event_codes existed stored: every category with an
    # `event_code_pattern` key (null except on recordings) and no `event_codes` key.
    doc = json.loads(load_default_policy().canonical_json())
    for cid, cat in doc["categories"].items():
        cat.pop("event_codes", None)
        cat["event_code_pattern"] = "^(stim|block)/[A-Za-z0-9_-]+$" if cid == "eeg-raw" else None
    old = json.dumps(doc, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()
    policy = parse_policy_json(old)
    assert policy.canonical_json() == old  # so the stored version still matches (vault opens)
    assert policy.digest == hashlib.sha256(DIGEST_DOMAIN + old).hexdigest()  # hashlib
    assert policy.categories["eeg-raw"].event_codes is None  # the regex is never used
    assert any("event_code_pattern" in w for w in policy.warnings())
    tables = default_tables()  # but a policy file may not use it
    tables["categories.toml"]["categories"]["eeg-raw"]["event_code_pattern"] = "^stim/.*$"
    with pytest.raises(InvalidInput, match="event_code_pattern is no longer accepted"):
        parse_policy_tables(tables)


def test_the_per_release_cap_is_compared_exactly() -> None:
    # amounts are exact: a float request reads as its shortest decimal (0.1 is 1/10, as the
    # policy's budgets and the accountant read them), and one part in 10**30 above the cap,
    # far inside one float's rounding, is refused
    policy = load_default_policy()
    purpose = policy.purposes["recommender-training"]
    cap = purpose.epsilon_per_release
    assert cap is not None
    exact_cap = Fraction(str(cap))

    def rec(epsilon: Any) -> Request:
        return _req(purpose="recommender-training", categories=frozenset({"scores-derived"}),
                    export=True, epsilon=epsilon)

    assert rec(0.1).epsilon == Fraction(1, 10) and rec("3/10").epsilon == Fraction(3, 10)
    for at_cap in (cap, exact_cap, str(exact_cap)):
        assert request_reasons(policy, rec(at_cap)) == ()
    above = rec(exact_cap + Fraction(1, 10**30))
    assert float(above.epsilon) == cap  # a float comparison could not tell them apart
    assert request_reasons(policy, above) == (Reason.RELEASE_EPSILON_EXCEEDS_CAP,)
    for bad in (0, -0.5, math.inf, math.nan, True, "x"):
        with pytest.raises(UsageError):
            rec(bad)
