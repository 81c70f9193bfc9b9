"""Filled consent forms (TOML, docs/examples format) for the demo study's invented people."""

from __future__ import annotations

import csv
import json
from pathlib import Path

from vault.policy.policyset import PolicySet

FORM_VERSION = "NSL-2026-DISH/1"


def _toml_list(items: list[str]) -> str:
    return "[" + ", ".join(f'"{i}"' for i in items) + "]"


def _categories(policy: PolicySet, purpose: str) -> list[str]:
    """What the form grants for a purpose: its categories plus the recordings they derive from."""
    cats = list(policy.purposes[purpose].categories)
    for cat in list(cats):
        source = policy.categories[cat].derived_from
        if source and source not in cats:
            cats.append(source)
    return sorted(cats)


def consent_form(plan: dict, person: dict, policy: PolicySet) -> str:
    lines = [
        "# Synthetic demo consent form: the person is invented.",
        f'form_version = "{FORM_VERSION}"',
        f"signed = {plan['signed']}",
        f"expires = {plan['expires']}",
        "",
        "[participant]",
        f'code = "{plan["participant_code"]}"',
        f'name = "{person["name"]}"',
        f'email = "{person["email"]}"',
        f'phone = "{person["phone"]}"',
        "",
        "[permissions]",
        f"recontact = {str(plan['grants']['re-contact']).lower()}",
        f"external_sharing = {str(plan['grants']['external-sharing']).lower()}",
    ]
    for purpose, granted in plan["grants"].items():
        cats = _categories(policy, purpose)
        lines += ["", f"[purposes.{purpose}]"]
        if granted:
            lines.append(f"granted = {_toml_list(cats)}")
            if policy.purposes[purpose].special_category_basis == "art9-2-a":
                lines.append("explicit = true")
        else:
            lines += ["granted = []", f"refused = {_toml_list(cats)}"]
    return "\n".join(lines) + "\n"


def write_forms(study_dir: Path, policy: PolicySet) -> dict[str, Path]:
    """One filled form per participant under study_dir/consent/; returns code -> path."""
    study = json.loads((study_dir / "study.json").read_text())
    with open(study_dir / "participants.csv", newline="") as fh:
        people = {row["lab_code"]: row for row in csv.DictReader(fh)}
    out = study_dir / "consent"
    out.mkdir(exist_ok=True)
    paths = {}
    for plan in study["consent_plan"]:
        code = plan["participant_code"]
        path = out / f"{code}.toml"
        path.write_text(consent_form(plan, people[code], policy))
        paths[code] = path
    return paths
