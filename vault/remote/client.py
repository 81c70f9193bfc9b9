"""RemoteVault: the local Vault's methods, answered by a mindward service.

Where the local Vault returns plain data the documents are the same; `sign_head` returns a
TreeHead as locally. What needs the vault's files (init, rekey, serving) is not here. Each
call is one request; the service's refusal comes back as the same VaultError subclass with
the same message, hint and param, and a service that cannot be reached or breaks off is
`Unreachable` (exit 11)."""

from __future__ import annotations

import os
from collections.abc import Iterable
from datetime import date
from pathlib import Path
from typing import Any

import vault
from vault.errors import IntegrityError, NotFound, UsageError
from vault.remote import receive
from vault.remote.transport import DEFAULT_TIMEOUT_S, Session, segment

UPLOAD_CHUNK = 1 << 20
AUDIT_PAGE = 10_000  # the most entries the service sends in one answer
NUMPY_SUFFIXES = (".npy", ".npz")
# the exports' request bodies: option of export_matrix -> key of the service's body
MATRIX_OPTIONS = {"epsilon": "epsilon", "rho": "rho", "release": "release", "unit": "unit",
                  "items": "items", "max_items_per_participant": "max_items",
                  "recipient": "recipient"}


def connect(url: str, token: str, *, ca: str | Path | None = None, key: bytes | str | None = None,
            timeout: float = DEFAULT_TIMEOUT_S) -> RemoteVault:
    """A RemoteVault for the token's member. `ca`: a CA or certificate file (PEM) to trust
    instead of the system's store; `key`: the vault's public key as you hold it (exports and
    proofs are checked with it; it must be the service's)."""
    return RemoteVault(Session(url, token, ca=ca, timeout=timeout), key=key)


class RemoteVault:
    """A vault behind a service, for one member (the token's). Close when done."""

    served = True
    audit_flagged = None  # the service itself reports rows written without the key

    def __init__(self, session: Session, *, key: bytes | str | None = None) -> None:
        self._session = session
        try:
            facts = self.info()
            self._public_key = receive.check_public_key(key, facts["public_key"])
        except BaseException:
            session.close()
            raise
        self._member, self._role = facts["member"], facts["role"]
        self.vault_id = facts["vault_id"]

    # -- the session -----------------------------------------------------------------------------

    @property
    def url(self) -> str:
        return self._session.url

    @property
    def member(self) -> str:
        return self._member

    @property
    def role(self) -> str:
        return self._role

    @property
    def public_key(self) -> bytes:
        return self._public_key

    def close(self) -> None:
        self._session.close()

    def __enter__(self) -> RemoteVault:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __reduce__(self) -> object:
        raise TypeError("a remote vault session is not serialisable")

    def _get(self, path: str, **params: Any) -> Any:
        return self._session.call("GET", path, params=params)

    def _post(self, path: str, body: Any = None) -> Any:
        return self._session.call("POST", path, json_body=body if body is not None else {})

    # -- facts -----------------------------------------------------------------------------------

    def info(self) -> dict[str, Any]:
        """describe() of the served vault plus this member's name and role."""
        return self._session.call("GET", "/info")

    def access_summary(self, purpose: str, categories: Iterable[str]) -> dict[str, Any]:
        return self._post("/access/check", {"purpose": purpose, "categories": list(categories)})

    def budget(self, purpose: str | None = None) -> list[dict[str, Any]]:
        return self._get("/budget", purpose=purpose)

    def policy_document(self) -> dict[str, Any]:
        """The pinned policy set as {"version", "lines"} (what `policy show` prints)."""
        return self._get("/policy")

    def report(self) -> dict[str, Any]:
        return self._get("/report")

    # -- the audit log ---------------------------------------------------------------------------

    def audit_entries(self, start: int = 0, limit: int | None = None) -> list[dict[str, Any]]:
        """Entries from `start`: `limit` of them, or (None) all, fetched a page at a time."""
        if limit is not None:
            return self._get("/audit/entries", start=start, limit=limit)
        entries: list[dict[str, Any]] = []
        while True:
            page = self._get("/audit/entries", start=start + len(entries), limit=AUDIT_PAGE)
            entries += page
            if len(page) < AUDIT_PAGE:
                return entries

    def sign_head(self) -> Any:
        """Sign a tree head now; a TreeHead, checked with the vault's public key."""
        return self._head(self._post("/audit/head"))

    def latest_head(self) -> Any:
        return self._head(self._get("/audit/head"))

    def _head(self, document: Any) -> Any:
        head = vault.read_tree_head(_json_text(document))
        if not head.verify(self._public_key):
            raise IntegrityError("the tree head the service sent is not signed by the vault's key")
        return head

    def prove(self, seq: int) -> dict[str, Any]:
        """Inclusion proof of entry `seq` (checked here with the vault's public key)."""
        bundle = self._get(f"/audit/proof/{int(seq)}")
        if not (isinstance(bundle, dict) and vault.verify_proof(bundle, self._public_key)):
            raise IntegrityError(f"the service's proof of entry {seq} does not verify")
        return bundle

    def check_consistency(self, earlier: Any, public_key: bytes | None = None) -> dict[str, Any]:
        """Does the served log extend an earlier head you kept? The service builds the proof;
        it is checked here, with the key you pass (or the one given at connect)."""
        from vault.audit.log import verify_consistency_bundle

        key = self._key(public_key)
        result = self._post("/audit/consistency", {"head": earlier.to_dict()})
        bundle = result.get("bundle") if isinstance(result, dict) else None
        if bundle is None:
            return {"ok": False, "problem": result.get("problem") or "no proof", "bundle": None}
        ok = verify_consistency_bundle(bundle, earlier, key)
        return {"ok": ok, "problem": None if ok else "the log does not extend the earlier head",
                "bundle": bundle}

    def verify_audit(self, *, public_key: bytes | None = None, trusted: list[Any] | None = None
                     ) -> dict[str, Any]:
        """The service's verify_audit report; with `public_key` it must be the service's, and
        every `trusted` head must be extended by today's log (checked here)."""
        report = self._get("/audit/verify")
        if public_key is not None and bytes(public_key) != self._public_key:
            return {**report, "ok": False, "problem": "the service signs with another key than "
                    "the one you hold"}
        if public_key is not None:
            report = {**report, "notes": [n for n in report.get("notes", [])
                                          if "stored in the vault" not in n]}
        problem = self._untrusted(trusted, public_key)
        return {**report, "ok": False, "problem": problem} if problem else report

    def verify(self, *, trusted: list[Any] | None = None) -> dict[str, Any]:
        """The service's full verify; each `trusted` head must be extended by today's log."""
        result = self._post("/verify")
        problem = self._untrusted(trusted, None)
        if problem:
            return {**result, "ok": False, "audit": {**result.get("audit", {}), "ok": False,
                                                     "problem": problem}}
        return result

    def _untrusted(self, trusted: list[Any] | None, public_key: bytes | None) -> str | None:
        for head in trusted or []:
            if not self.check_consistency(head, public_key)["ok"]:
                return f"the log does not extend the trusted head of size {head.tree_size}"
        return None

    def _key(self, public_key: bytes | None) -> bytes:
        return self._public_key if public_key is None else bytes(public_key)

    # -- members ---------------------------------------------------------------------------------

    def members(self) -> list[dict[str, Any]]:
        return self._get("/members")

    def add_member(self, name: str, role: str, passphrase: str | None = None, *,
                   expires_days: int = 30) -> dict[str, Any]:
        """A token-only member (the token is in the result, shown once)."""
        if passphrase is not None:
            raise UsageError("a passphrase never travels to the service: key slots are added on "
                             "the vault's own computer", param="passphrase")
        return self._post("/members", {"name": name, "role": role, "expires_days": expires_days})

    def issue_token(self, member: str, *, expires_days: int = 30) -> dict[str, Any]:
        return self._post(f"/members/{segment(member)}/token", {"expires_days": expires_days})

    def revoke_tokens(self, member: str) -> dict[str, Any]:
        return self._post(f"/members/{segment(member)}/revoke")

    def remove_member(self, name: str) -> dict[str, Any]:
        return self._session.remove(f"/members/{segment(name)}")

    # -- enrolment and consent -------------------------------------------------------------------

    def enrol(self, form: bytes) -> dict[str, Any]:
        return self._session.call("POST", "/enrol", content=bytes(form), content_type="application/toml")

    def amend_consent(self, pid: str, form: bytes) -> dict[str, Any]:
        return self._session.call("POST", f"/consent/{segment(pid)}", content=bytes(form),
                                  content_type="application/toml")

    def consent_history(self, pid: str) -> list[dict[str, Any]]:
        return self._get(f"/consent/{segment(pid)}")

    # -- ingest ----------------------------------------------------------------------------------

    def ingest_eeg(self, pid: str, path: Path, *, sidecar: Path | None = None,
                   event_codes: str | list[str] | None = None, keep_sex: bool = False,
                   age_band_years: int | None = None, keep_header_identity: bool = False
                   ) -> dict[str, Any]:
        """Stream an EDF/EDF+/BDF recording to the service (never read whole into memory)."""
        path = Path(path)
        if sidecar is not None or path.suffix.lower() in NUMPY_SUFFIXES:
            raise UsageError("NumPy recordings are read on the vault's computer only; send an "
                             "EDF, EDF+ or BDF file to a service", param="sidecar")
        try:
            handle = path.open("rb")
        except OSError as exc:
            raise NotFound(f"cannot read {path}") from exc
        with handle:
            size = os.fstat(handle.fileno()).st_size
            codes = ",".join(event_codes) if isinstance(event_codes, list) else event_codes
            return self._session.call(
                "POST", f"/ingest/eeg/{segment(pid)}", content=_chunks(handle, size),
                content_type="application/octet-stream", length=size,
                params={"event_codes": codes, "keep_sex": keep_sex, "age_band": age_band_years,
                        "keep_header_identity": keep_header_identity})

    def ingest_scores(self, path: Path, kind: str) -> dict[str, Any]:
        try:
            data = Path(path).read_bytes()
        except OSError as exc:
            raise NotFound(f"cannot read {path}") from exc
        return self._session.call("POST", "/ingest/scores", content=data, content_type="text/csv",
                                  params={"kind": kind})

    # -- exports ---------------------------------------------------------------------------------

    def export_eeg(self, purpose: str, out: Path, *, recipient: str | None = None,
                   with_demographics: bool = False) -> dict[str, Any]:
        """The export is made on the service, then downloaded, verified and put at `out`."""
        receive.check_out(Path(out))
        result = self._post("/exports/eeg", {"purpose": purpose, "recipient": recipient,
                                              "demographics": with_demographics})
        return self._fetch(result, Path(out))

    def export_matrix(self, purpose: str, category: str, out: Path, **options: Any) -> dict[str, Any]:
        unknown = set(options) - set(MATRIX_OPTIONS)
        if unknown:
            raise UsageError(f"unknown export option {sorted(unknown)[0]}")
        receive.check_out(Path(out))
        body = {"purpose": purpose, "category": category,
                **{MATRIX_OPTIONS[k]: v for k, v in options.items()}}
        return self._fetch(self._post("/exports/matrix", body), Path(out))

    def _fetch(self, result: dict[str, Any], out: Path) -> dict[str, Any]:
        export_id = result["export_id"]
        try:
            receive.receive(out, export_id,
                            lambda: self._session.stream(f"/exports/{segment(export_id)}/archive"),
                            self._public_key)
        except vault.Unreachable as exc:
            raise vault.Unreachable(f"{exc.message}; export {export_id} was made on the service but "
                                    f"nothing was written to {out}") from None
        local = {k: v for k, v in result.items() if k != "archive"}
        local["out"] = str(out)
        if "manifest" in local:
            local["manifest"] = str(out / receive.MANIFEST)
        return local

    def export_utility(self, *args: Any, **options: Any) -> dict[str, Any]:
        """Not through a service: its figures are computed without noise from the real ratings."""
        raise UsageError("the utility figures are not differentially private: they are computed "
                         "on the vault's own computer only (Vault.export_utility there)", param="server")

    def check_export(self, document: dict[str, Any]) -> dict[str, Any]:
        return self._post("/exports/check", {"document": document})

    # -- policy ----------------------------------------------------------------------------------

    def apply_policy(self, policy_dir: Path) -> dict[str, Any]:
        """Send the folder's policy files (checked here first, as the service will)."""
        folder = Path(policy_dir)
        vault.load_policy_dir(folder)  # the same refusal as locally, before anything is sent
        files = {p.name: p.read_text(encoding="utf-8") for p in sorted(folder.glob("*.toml"))}
        return self._post("/policy", {"files": files})

    # -- withdrawal and erasure ------------------------------------------------------------------

    def withdraw_request(self, pid: str, *, received: date, scope: str = "full") -> dict[str, Any]:
        return self._post("/withdrawals", {"participant": pid, "received": received.isoformat(),
                                           "scope": scope})

    def withdraw_pending(self) -> list[dict[str, Any]]:
        return self._get("/withdrawals")

    def withdraw_process(self, target: str) -> dict[str, Any]:
        return self._post(f"/withdrawals/{segment(target)}/process")

    def withdraw_receipt(self, target: str) -> dict[str, Any]:
        return self._get(f"/withdrawals/{segment(target)}/receipt")

    def sweep(self, *, dry_run: bool = False) -> dict[str, Any]:
        return self._post("/sweep", {"dry_run": dry_run})


def _chunks(handle: Any, size: int) -> Iterable[bytes]:
    """The file's first `size` bytes (as announced), in chunks."""
    left = size
    while left > 0:
        chunk = handle.read(min(UPLOAD_CHUNK, left))
        if not chunk:
            raise vault.InvalidInput("the recording got shorter while it was being sent")
        left -= len(chunk)
        yield chunk


def _json_text(document: Any) -> str:
    import json

    return json.dumps(document)
