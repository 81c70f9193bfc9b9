"""A policy set as lines of text, one per definition, then its warnings: what `policy check` and
`policy show` print and the service's GET /v1/policy returns (one wording for both)."""

from __future__ import annotations

from typing import Any


def _eps(p: Any) -> str:
    if p.epsilon_per_release is None:
        return "no privacy budget"
    return (f"epsilon {p.epsilon_per_release:g} per release, "
            f"{p.epsilon_per_participant:g} per participant ({p.on_budget_exceeded} when spent)")


def describe_policy(policy: Any) -> list[str]:
    """What `mindward policy check` and `policy show` print: one line per definition, then
    warnings."""
    m = policy.meta
    lines = [f"policy set '{m.name}' version {policy.version} (schema {m.schema_version}): "
             f"{m.title}",
             f"  consent form versions: {', '.join(m.form_versions)}; "
             f"withdrawal deadline {m.withdrawal_deadline_days} days",
             f"categories ({len(policy.categories)}):"]
    for cid, c in sorted(policy.categories.items()):
        flags = [c.kind]
        if c.special_category:
            flags.append("special category (GDPR Art. 9)")
        if c.derived_from:
            flags.append(f"derived from {c.derived_from}")
        if c.value_range is not None:
            flags.append(f"{c.value_type} in [{c.value_range[0]:g}, {c.value_range[1]:g}]")
        if c.kind == "recording":
            kept = ", ".join(c.event_codes) if c.event_codes else "none"
            flags.append(f"event codes kept: {kept} (every other annotation is relabelled)")
        if c.kind in ("scores", "ratings"):
            flags.append(f"catalogue of {len(c.items)} items" if c.items else
                         "no item catalogue: noised releases need a list of items")
        lines.append(f"  {cid}: {c.title} [{'; '.join(flags)}]")
    lines.append(f"roles ({len(policy.roles)}):")
    for rid, r in sorted(policy.roles.items()):
        reads = "reads data" if r.reads_data else "never reads data"
        audit = ", reads the audit log" if r.reads_audit else ""
        lines.append(f"  {rid}: {r.title} [{reads}{audit}]")
    lines.append(f"purposes ({len(policy.purposes)}):")
    for pid, p in sorted(policy.purposes.items()):
        parent = f" (narrower than {p.parent})" if p.parent else ""
        lines.append(f"  {pid}{parent}: {p.title} [{p.dpv}]")
        lines.append(f"    roles: {', '.join(p.roles)}; categories: {', '.join(p.categories)}")
        art9 = (f"; special category under {p.special_category_basis}" if p.special_category
                else "")
        lines.append(f"    basis: {p.lawful_basis_dpv}{art9}")
        dp = "DP noise required" if p.dp_required else "no DP noise required"
        extra = "; per-rating privacy unit allowed" if p.per_rating_unit_allowed else ""
        recipient = "; needs a named recipient" if p.requires_recipient else ""
        lines.append(f"    exports: {dp}, {_eps(p)}, min cohort {p.min_cohort}{extra}{recipient}")
    lines.extend(f"warning: {w}" for w in policy.warnings())
    return lines
