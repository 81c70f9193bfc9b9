"""What a use case is given instead of the Vault: the connection, the one door, the log, the
engine and who is acting, with the vault's clock as a callable (api.py alone reads the clock)."""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from vault import crypto
from vault.access.door import Door
from vault.audit.log import AuditLog
from vault.errors import PolicyRefusal
from vault.policy.decide import Request
from vault.policy.engine import Grant, PolicyEngine
from vault.policy.policyset import PolicySet
from vault.storage import db as storage
from vault.storage import participants, registry
from vault.storage.db import Connection
from vault.times import iso_utc


@dataclass(frozen=True)
class Context:
    """One use case's view of an open vault (built by `Vault` for each call)."""

    conn: Connection = field(repr=False)
    door: Door = field(repr=False)
    audit: AuditLog = field(repr=False)
    engine: PolicyEngine = field(repr=False)
    member: str
    role: str
    policy: PolicySet = field(repr=False)
    vault_id: str
    path: Path
    signer: crypto.SigningKey = field(repr=False)
    clock: Callable[[], dt.datetime] = field(repr=False)

    def __reduce__(self) -> object:
        raise TypeError("a vault context is not serialisable")

    @property
    def public_key(self) -> bytes:
        return self.signer.public_key

    def now(self) -> dt.datetime:
        """The vault's clock (see `Vault.now`)."""
        return self.clock()

    def stamp(self) -> str:
        return iso_utc(self.now())

    def audit_batch(self, entries: list[dict[str, Any]]) -> None:
        """Append entries in their own transaction, stamped by the vault's clock."""
        with storage.transaction(self.conn):
            self.audit.append_many(entries, self.stamp())

    def require_steward(self, action: str = "steward-only") -> None:
        """Refuse (audited) unless this member is a steward."""
        if self.role != "steward":
            self.refuse_role(action)

    def refuse_role(self, action: str) -> None:
        self.audit_batch([{"actor": self.member, "action": action, "decision": "refuse",
                           "reasons": ["role-not-allowed"], "details": {"role": self.role}}])
        raise PolicyRefusal(f"member '{self.member}' ({self.role}) may not do this: "
                            f"{action} is for stewards only")

    # -- grants and reads ---------------------------------------------------------------------

    def authorize_release(self, purpose: str, categories: Iterable[str], *,
                          affordable: Mapping[str, bool] | None = None,
                          **options: Any) -> Grant:
        """Export grants (cohort, noise, recipient rules); the export modules take
        `affordable` from the vault's own exact ledger (`budget.affordable`)."""
        request = Request(actor=self.member, role=self.role, purpose=purpose,
                          categories=frozenset(categories), **options)
        return self.engine.authorize(request, affordable=affordable)

    def grant_participants(self, grant: Grant) -> frozenset[str]:
        """The vault ids a grant covers (holders other than stewards see pseudonyms)."""
        return self.engine.record(grant).participants

    def read_for_release(self, grant: Grant, blob_ids: list[str]
                         ) -> Iterator[tuple[str, str, Iterator[bytes]]]:
        """The release mechanisms' read: (blob_id, participant id, chunks); the plaintext
        goes into noise or into pseudonymised files, never back to the caller."""
        return iter(self.door.read(grant, blob_ids, for_noise=True))

    # -- rows the door's keys tag ---------------------------------------------------------------

    def insert_blob(self, info: Any, at: str) -> None:
        participants.insert_blob(self.conn, info, at)

    def record_consent(self, version: Any) -> None:
        """Add a consent version and re-tag the participant's newest one (inside a transaction)."""
        registry.add_consent(self.conn, version)
        registry.set_consent_tag(self.conn, version.participant_id, self.door.consent_tag(
            version.participant_id, version.number, version.digest))
