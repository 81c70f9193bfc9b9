"""The persisted privacy accountant: one exact ledger per participant and purpose.

Rows of `budget_ledger` hold what a participant's data has spent for a purpose:
the pure-DP epsilon and the zCDP rho as exact fractions written as text
("3/10"), and the number of releases. The arithmetic is `vault.privacy.accountant`'s
(`Ledger`, `Cost`, `Budget`, `within`): basic composition for pure DP, rho adds
up under zCDP, and a ledger holding both is judged at the vault's fixed delta.

Purpose hierarchy: a release under a narrower purpose is also processing under
each broader one ("consent for the parent covers the child"), so it is charged
to the requested purpose AND every ancestor, and it must fit every budget of
that chain. The parent's budget therefore caps the whole family. A ledger row
of a parent counts the releases of its children too.

Delta: the policy schema has no delta. zCDP spending is judged at
`ZCDP_DELTA` = 10**-6, a fixed constant of this vault written into every
manifest. Pure-DP spending never needs a delta.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from fractions import Fraction
from typing import TYPE_CHECKING, Any

from vault.errors import PolicyRefusal, UsageError
from vault.privacy.accountant import Budget, Cost, Ledger, remaining_epsilon, spent_epsilon, within
from vault.storage import budget_ledger, participants
from vault.storage import db as storage
from vault.times import iso_utc

if TYPE_CHECKING:
    from vault.policy.policyset import PolicySet
    from vault.services.context import Context

ZCDP_DELTA = Fraction(1, 10**6)
_AUDIT_CHUNK = 1000  # subjects per audit entry


def budgets(policy: PolicySet, purpose: str) -> dict[str, Budget]:
    """The per-participant budgets a release under `purpose` must fit: the purpose and
    each ancestor that sets `epsilon_per_participant` (narrowest first)."""
    if purpose not in policy.purposes:
        return {}
    out: dict[str, Budget] = {}
    for name in policy.chain(purpose):
        cap = policy.purposes[name].epsilon_per_participant
        if cap is not None:
            out[name] = Budget(Fraction(str(cap)), ZCDP_DELTA)
    return out


class _Memo:
    """Participants mostly share a few ledger states: each stored state is parsed once and each
    (ledger, cost, budget) judged once. Keys are values: the stored text, and the frozen
    `Ledger`, `Cost` and `Budget` (equal by their fields, hashed once at construction)."""

    def __init__(self) -> None:
        self.parsed: dict[tuple[str, str, int], Ledger] = {}
        self.fits: dict[tuple[Ledger, Cost, Budget], bool] = {}

    def ledger(self, epsilon: str, rho: str, releases: int) -> Ledger:
        key = (epsilon, rho, int(releases))
        found = self.parsed.get(key)
        if found is None:
            found = self.parsed[key] = Ledger(Fraction(epsilon), Fraction(rho), int(releases))
        return found

    def within(self, ledger: Ledger, cost: Cost, budget: Budget) -> bool:
        key = (ledger, cost, budget)
        found = self.fits.get(key)
        if found is None:
            found = self.fits[key] = within(ledger.spend(cost), budget)
        return found


def _ledgers(ctx: Context, purpose: str, pids: Sequence[str] | None = None,
            memo: _Memo | None = None) -> dict[str, Ledger]:
    """Stored ledgers for `purpose` (all rows, or those of `pids`); absent means nothing spent."""
    parse = (memo or _Memo()).ledger
    return {pid: parse(e, r, n) for pid, e, r, n in budget_ledger.rows(ctx.conn, purpose, pids)}


def _chain_ledgers(ctx: Context, purpose: str, pids: Sequence[str],
                  memo: _Memo | None = None) -> dict[str, dict[str, Ledger]]:
    """{budgeted purpose of the chain: {pid: ledger}} for `pids`."""
    return {name: _ledgers(ctx, name, pids, memo) for name in budgets(ctx.policy, purpose)}


def affordable(ctx: Context, purpose: str, costs: Mapping[str, Cost], memo: _Memo | None = None,
               held: Mapping[str, Mapping[str, Ledger]] | None = None) -> dict[str, bool]:
    """Exactly: would each participant's cost fit every budget of the purpose's chain?"""
    plan = budgets(ctx.policy, purpose)
    if not plan:
        return dict.fromkeys(costs, False)
    memo = memo or _Memo()
    held = held if held is not None else _chain_ledgers(ctx, purpose, list(costs), memo)
    empty = Ledger()
    return {pid: all(memo.within(held[name].get(pid, empty), costs[pid], budget)
                     for name, budget in plan.items()) for pid in costs}


def charge(ctx: Context, purpose: str, costs: Mapping[str, Cost], *, export_id: str) -> None:
    """Spend `costs` from every budgeted purpose of the chain, in one transaction (audited).

    Re-checks every participant inside the transaction and refuses the whole
    charge (PolicyRefusal, nothing written) if anyone would exceed a budget.
    Every call spends again: the same request twice is charged twice.
    """
    ctx.require_steward("budget.charge")
    now = ctx.now()
    at = iso_utc(now)
    with storage.transaction(ctx.conn):
        charge_in_transaction(ctx, purpose, costs, export_id=export_id, at=at)


def _require_transaction(ctx: Context) -> None:
    """Ledger writes and their audit entry commit together or not at all: never in autocommit."""
    if not ctx.conn.in_transaction:
        raise UsageError("the budget ledger is written only inside a transaction with its audit entry")


def charge_in_transaction(ctx: Context, purpose: str, costs: Mapping[str, Cost], *, export_id: str,
                          at: str) -> list[str]:
    """`charge` inside the caller's open transaction; returns the purposes charged."""
    _require_transaction(ctx)
    plan = budgets(ctx.policy, purpose)
    if not plan:
        raise PolicyRefusal(f"purpose {purpose} sets no per-participant privacy budget")
    pids = list(costs)
    updates: list[tuple[str, str, str, str, int]] = []
    memo = _Memo()
    after: dict[tuple[Ledger, Cost], tuple[str, str, int]] = {}
    empty = Ledger()
    for name, budget in plan.items():
        held = _ledgers(ctx, name, pids, memo)
        for pid in pids:
            old, cost = held.get(pid, empty), costs[pid]
            if not memo.within(old, cost, budget):
                raise PolicyRefusal("the release would exceed a participant's privacy budget; "
                                    "nothing was charged")
            known = after.get((old, cost))
            if known is None:
                spent = old.spend(cost)
                known = after[(old, cost)] = (str(spent.epsilon), str(spent.rho), spent.releases)
            updates.append((pid, name, *known))
    budget_ledger.upsert(ctx.conn, updates)
    entries, ordered = [], sorted(pids)
    for start in range(0, max(len(ordered), 1), _AUDIT_CHUNK):
        chunk = ordered[start : start + _AUDIT_CHUNK]
        distinct = {(c.epsilon, c.rho) for c in (costs[p] for p in chunk)}
        entries.append({"actor": ctx.member, "action": "budget.charge", "purpose": purpose,
                        "subjects": chunk, "decision": "done",
                        "details": {"export": export_id, "charged_purposes": list(plan),
                                    "costs": sorted([str(e), str(r)] for e, r in distinct)}})
    ctx.audit.append_many(entries, at)
    return list(plan)


def refund_in_transaction(ctx: Context, purpose: str, purposes: Sequence[str],
                          costs: Mapping[str, Cost], *, export_id: str, at: str) -> None:
    """Credit back exactly what `charge_in_transaction` spent for a release that never left the
    vault (one release fewer; a ledger back at zero releases is removed). Audited."""
    _require_transaction(ctx)
    memo = _Memo()
    updates: list[tuple[str, str, int, str, str]] = []
    gone: list[tuple[str, str]] = []
    for name in purposes:
        held = _ledgers(ctx, name, list(costs), memo)
        for pid, cost in costs.items():
            old = held.get(pid)
            if old is None:  # erased since (withdrawal deletes ledger rows): nothing to credit
                continue
            epsilon, rho = old.epsilon - cost.epsilon, old.rho - cost.rho
            releases = old.releases - 1
            if epsilon < 0 or rho < 0 or releases < 0:  # the ledger was altered: credit nothing
                continue
            if releases == 0 and epsilon == 0 and rho == 0:
                gone.append((pid, name))
            else:
                updates.append((str(epsilon), str(rho), releases, pid, name))
    budget_ledger.set_totals(ctx.conn, updates)
    budget_ledger.delete(ctx.conn, gone)
    ordered = sorted(costs)
    ctx.audit.append_many([
        {"actor": ctx.member, "action": "budget.refund", "purpose": purpose,
         "subjects": ordered[start : start + _AUDIT_CHUNK], "decision": "done",
         "details": {"export": export_id, "refunded_purposes": list(purposes),
                     "reason": "the release never left the vault"}}
        for start in range(0, max(len(ordered), 1), _AUDIT_CHUNK)], at)


def budget_report(ctx: Context, purpose: str | None = None, *,
                  show_participants: bool = False) -> list[dict[str, Any]]:
    """Per budgeted purpose: how much of it the living participants have spent.

    Counts and exact totals only; per-participant rows (`show_participants`) for
    stewards only. "spent" is the epsilon the ledger amounts to at the vault's
    delta (pure epsilon plus the zCDP conversion of rho).
    """
    if show_participants and ctx.role != "steward":
        raise PolicyRefusal(f"member '{ctx.member}' ({ctx.role}) may not see per-participant budgets: "
                            "stewards only")
    names = [purpose] if purpose is not None else sorted(ctx.policy.purposes)
    if purpose is not None and purpose not in ctx.policy.purposes:
        raise UsageError(f"unknown purpose '{purpose}'")
    living = participants.living_pids(ctx.conn)
    out: list[dict[str, Any]] = []
    for name in names:
        cap = ctx.policy.purposes[name].epsilon_per_participant
        if cap is None:
            continue
        budget = Budget(Fraction(str(cap)), ZCDP_DELTA)
        held = _ledgers(ctx, name, living)
        spent = {pid: spent_epsilon(led, budget.delta) for pid, led in held.items()}
        left = {pid: remaining_epsilon(led, budget) for pid, led in held.items()}
        row: dict[str, Any] = {
            "purpose": name, "budget_epsilon": str(budget.epsilon), "delta": str(budget.delta),
            "participants": len(living), "participants_charged": len(held),
            "releases_max": max((led.releases for led in held.values()), default=0),
            "spent_min": _s(min(spent.values(), default=Fraction(0)) if len(held) == len(living)
                            else Fraction(0)),
            "spent_max": _s(max(spent.values(), default=Fraction(0))),
            "spent_total": _s(sum(spent.values(), Fraction(0))),
            "remaining_min": _s(min(left.values(), default=budget.epsilon)),
            "participants_exhausted": sum(1 for x in left.values() if x == 0),
        }
        if show_participants:
            row["by_participant"] = [
                {"participant_id": pid, "epsilon": str(held[pid].epsilon), "rho": str(held[pid].rho),
                 "releases": held[pid].releases, "spent": _s(spent[pid]), "remaining": _s(left[pid])}
                for pid in sorted(held)]
        out.append(row)
    return out


def _s(value: Fraction) -> str:
    return str(value)
