"""Text for people: the renderers of the command line (the library returns data, this prints it).

Each takes what a Vault call or verifier returned (dicts, or the policy set and a cohort
decision read by attribute) and returns text; none reads a vault or the clock.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any


def format_decision(summary: dict[str, Any]) -> str:
    """The text of `mindward access check`."""
    lines = [f"purpose {summary['purpose']} ({', '.join(summary['categories'])}): "
             f"{summary['included']} included" + ("" if summary["permit"] else " - REFUSED"),
             f"  {summary['message']}"]
    for reason, count in summary["refused_by_reason"].items():
        lines.append(f"  refused, {reason}: {count}")
    for pid, why in summary.get("participants", {}).items():
        lines.append(f"  {pid}  {why}")
    return "\n".join(lines)


def format_budget(rows: Iterable[Mapping[str, Any]]) -> str:
    """The text of `mindward budget`."""
    lines = []
    for r in rows:
        lines.append(f"{r['purpose']}: budget epsilon {r['budget_epsilon']} per participant "
                     f"(zCDP judged at delta {r['delta']})")
        lines.append(f"  {r['participants_charged']} of {r['participants']} participants charged, "
                     f"up to {r['releases_max']} release(s); spent min {r['spent_min']}, "
                     f"max {r['spent_max']}, total {r['spent_total']}; lowest remaining "
                     f"{r['remaining_min']}; exhausted {r['participants_exhausted']}")
        for p in r.get("by_participant", []):
            lines.append(f"  {p['participant_id']}  spent {p['spent']}  remaining {p['remaining']}  "
                         f"({p['releases']} release(s))")
    if not lines:
        lines.append("no purpose of the policy sets a per-participant privacy budget")
    lines.append("Caution: a budget bounds what differential privacy promises, no more; whether it "
                 "is enough is for your ethics board and DPO to decide.")
    return "\n".join(lines)


def report_markdown(record: dict[str, Any]) -> str:
    lines = [f"# Record of processing: {record['policy']['title']}", "",
             f"Generated {record['generated_at']} from vault `{record['vault_id']}`, policy "
             f"`{record['policy']['name']}` version `{record['policy']['version']}`.", "",
             f"> {record['caution']}", "", "## Purposes", "",
             "| purpose | DPV | lawful basis | categories | consent now | DP | budget spent (max) |",
             "|---|---|---|---|---|---|---|"]
    for p in record["purposes"]:
        lines.append(f"| {p['title']} (`{p['purpose']}`) | {p['dpv']} | {p['lawful_basis']} | "
                     f"{', '.join(p['categories'])} | {p['participants_with_consent_now']} | "
                     f"{'required' if p['dp_required'] else 'no'} | {p['max_epsilon_spent']:g} |")
    people = record["participants"]
    lines += ["", "## Data subjects and data", "",
              f"- participants enrolled: {people['enrolled']} (active {people['active']}, "
              f"erased {people['erased']}, consent expired {people['consent_expired']})",
              f"- recordings: {record['data']['recordings']}; score batches: "
              f"{record['data']['score_batches']}",
              "- categories: " + ", ".join(
                  c["title"] + (" (special category)" if c["special_category"] else "")
                  for c in record["categories"]),
              "", "## Recipients", ""]
    lines += [f"- {r['recipient']}: {r['exports']} {r['kind']} export(s) for {r['purpose']}, last "
              f"{r['last']}" for r in record["recipients"]] or ["- none"]
    w = record["withdrawals"]
    lines += ["", "## Retention and requests", "",
              f"- withdrawal requests are due within {record['retention']['withdrawal_deadline_days']} "
              f"days; open: {w['open']} (overdue {w['overdue']}), processed: {w['processed']}",
              f"- {record['retention']['consent_ends']}", "", "## Security measures", ""]
    lines += [f"- {m}" for m in record["security"]]
    return "\n".join(lines) + "\n"


def describe_policy(policy: Any) -> list[str]:
    """What `mindward policy check` and `policy show` print (the policy set's own lines, which the
    service serves too)."""
    return list(policy.lines())
