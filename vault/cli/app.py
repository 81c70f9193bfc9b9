"""The `mindward` command line: parse, make one library call, print.

Every command takes --json. Errors are one line on stderr (and a JSON object
on stdout under --json) with an exit code from the table in docs/cli.md;
no traceback for bad input. Set MINDWARD_DEBUG=1 to see tracebacks of bugs.
"""

from __future__ import annotations

import getpass
import json
import os
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Annotated, Any

import typer

import vault  # light: its names load on first use (vault/__init__.py)
from vault.cli import render
from vault.cli.hints import cli_message
from vault.errors import EXIT_CODES, AuthenticationFailed, VaultError

app = typer.Typer(
    name="mindward", no_args_is_help=True, add_completion=False,
    pretty_exceptions_enable=False,
    help="Keep EEG recordings and the preferences derived from them under participants' consent.",
    epilog="Exit codes: " + "; ".join(f"{k} {v.split(':')[0]}" for k, v in EXIT_CODES.items()),
)
audit_app = typer.Typer(no_args_is_help=True, help="Read, prove and verify the audit log.")
app.add_typer(audit_app, name="audit")

VaultOpt = Annotated[Path, typer.Option(
    "--vault", envvar="MINDWARD_VAULT", help="Vault directory (or MINDWARD_VAULT).")]
# member commands: a vault directory, or a service (--server; the token from MINDWARD_TOKEN only,
# never an option: command lines are visible to every user of the computer)
PlaceOpt = Annotated[Path | None, typer.Option(
    "--vault", envvar="MINDWARD_VAULT", help="Vault directory (or MINDWARD_VAULT); not with --server.")]
ServerOpt = Annotated[str | None, typer.Option(
    "--server", envvar="MINDWARD_SERVER",
    help="A mindward service's URL (or MINDWARD_SERVER); the token comes from MINDWARD_TOKEN.")]
MemberOpt = Annotated[str, typer.Option(
    "--member", envvar="MINDWARD_MEMBER", help="Act as this member (or MINDWARD_MEMBER).")]
JsonOpt = Annotated[bool, typer.Option("--json", help="Print machine-readable JSON.")]
KeyOpt = Annotated[str | None, typer.Option(
    "--key", help="The vault's public key (hex) as you hold it, e.g. from 'mindward info'.")]

CAUTION = ("Caution: this vault holds special-category data (GDPR Art. 9). Keep the passphrase "
           "and any backups safe; lost passphrases cannot be recovered. Follow your ethics "
           "board's, data-protection officer's and local law's rules.")


def _emit(as_json: bool, payload: Any, text: str | Callable[[], str]) -> None:
    if as_json:
        typer.echo(json.dumps(payload, indent=2, sort_keys=True, default=str))
    else:
        typer.echo(text() if callable(text) else text)


def _passphrase(prompt: str = "Passphrase: ", *, env: str = "MINDWARD_PASSPHRASE",
                confirm: bool = False) -> str:
    value = os.environ.get(env)
    if value is not None:
        return value
    if not sys.stdin.isatty():
        raise AuthenticationFailed(f"no passphrase: set {env} or run in a terminal")
    first = getpass.getpass(prompt)
    if confirm and getpass.getpass("Repeat: ") != first:
        raise AuthenticationFailed("the two passphrases differ")
    return first


def _open(path: Path | None, member: str, server: str | None = None) -> Any:
    """The vault to act on: a RemoteVault when a service is named (the token's member acts,
    --member is not used), else the local vault unlocked for `member`."""
    if server is not None:
        return _connect(server)
    v = vault.Vault.open(_local(path), _passphrase(), member=member)
    if (flag := v.audit_flagged) is not None:
        typer.echo(f"mindward: caution: audit entries {flag['first']}..{flag['last']} were written "
                   f"without the vault's key; flagged at entry {flag['flagged_at']} "
                   "('mindward audit verify' reports them from now on)", err=True)
    return v


def _connect(server: str) -> Any:
    from vault.remote import connect

    return connect(server, os.environ.get("MINDWARD_TOKEN", ""), ca=os.environ.get("MINDWARD_CA"),
                   key=os.environ.get("MINDWARD_KEY"))


def _local(path: Path | None) -> Path:
    if path is None:
        raise vault.UsageError("name a vault with --vault (or MINDWARD_VAULT) or a service with "
                               "--server (or MINDWARD_SERVER)")
    return path


def _no_server(server: str | None, command: str) -> None:
    """Commands that work on the vault's own files refuse a service (MINDWARD_SERVER too)."""
    if server is not None:
        raise vault.UsageError(f"'{command}' works on the vault's own files and takes no --server "
                               "(unset MINDWARD_SERVER)")


@app.command()
def init(path: VaultOpt, member: MemberOpt = "steward", as_json: JsonOpt = False,
         server: ServerOpt = None) -> None:
    """Create a new, empty vault; you become its first steward."""
    _no_server(server, "init")
    with vault.Vault.init(path, _passphrase(confirm=True), member=member) as v:
        facts = v.info()
    _emit(as_json, facts, lambda: (
        f"Created vault {facts['vault_id']} at {facts['path']}\n"
        f"Signing key fingerprint: {facts['fingerprint']}\n"
        f"Public key: {facts['public_key']}\n"
        "Keep a copy of the public key outside the vault: auditors verify against it.\n"
        + CAUTION))


@app.command()
def info(path: PlaceOpt = None, server: ServerOpt = None, as_json: JsonOpt = False) -> None:
    """Public facts about a vault: id, signing key fingerprint, counts. No passphrase needed
    (with --server: a token, and the answer also names its member and role)."""
    if server is not None:
        with _connect(server) as remote:
            facts = remote.info()
    else:
        facts = vault.describe(_local(path))
    _emit(as_json, facts, lambda: "\n".join(
        f"{k.replace('_', ' ')}: {v}" for k, v in facts.items()
        if k not in ("latest_tree_head", "key_slots"))
        + f"\nkey slots: {len(facts['key_slots'])} ("
        + (", ".join(f"{s['member']} {s['role']}" for s in facts["key_slots"]) or "none") + ")")


@app.command()
def rekey(path: VaultOpt, member: MemberOpt = "steward", as_json: JsonOpt = False,
          server: ServerOpt = None) -> None:
    """New master key and passphrase (MINDWARD_NEW_PASSPHRASE); re-wraps keys, not data."""
    _no_server(server, "rekey")
    with _open(path, member) as v:
        new = _passphrase("New passphrase: ", env="MINDWARD_NEW_PASSPHRASE", confirm=True)
        result = v.rekey(new)
    _emit(as_json, result, lambda: (
        f"Rekeyed: {result['keys_rewrapped']} participant keys re-wrapped under a new master key."
        + (f" {result['member_slots_dropped']} other members must be re-added."
           if result["member_slots_dropped"] else "")))


@app.command("serve-setup")
def serve_setup(path: VaultOpt, member: MemberOpt = "steward", as_json: JsonOpt = False,
                server: ServerOpt = None) -> None:
    """Convert a vault for 'mindward serve': a fresh master key under a new passphrase
    (MINDWARD_NEW_PASSPHRASE) and every other key slot removed; members then use tokens."""
    _no_server(server, "serve-setup")
    with _open(path, member) as v:
        new = _passphrase("New passphrase: ", env="MINDWARD_NEW_PASSPHRASE", confirm=True)
        result = v.make_served(new)
    dropped = ", ".join(result["slots_dropped"]) or "none"
    _emit(as_json, result, lambda: (
        f"served since {result['served_at']}; key slots removed: {dropped}\n"
        "Give each member a token ('mindward member add NAME --role ROLE' or 'member token NAME').\n"
        "Copies of the vault's files made before now still open with the removed passphrases for "
        "what they held then; keep them as safe as the vault or destroy them."))


@app.command()
def verify(path: PlaceOpt = None, server: ServerOpt = None,
           member: MemberOpt = "steward", as_json: JsonOpt = False) -> None:
    """Verify the audit log and authenticate every stored blob (needs a passphrase)."""
    with _open(path, member, server) as v:
        result = v.verify()
    _emit(as_json, result, lambda: (
        f"audit log: {'ok' if result['audit']['ok'] else 'FAILED: ' + str(result['audit']['problem'])}"
        f"\nblobs: {result['blobs_checked']} checked, {len(result['blobs_failed'])} failed"))
    if not result["ok"]:
        raise typer.Exit(vault.IntegrityError.exit_code)


@audit_app.command("verify")
def audit_verify(
    path: PlaceOpt = None, server: ServerOpt = None, key: KeyOpt = None, as_json: JsonOpt = False,
    head: Annotated[list[Path] | None, typer.Option(
        "--head", help="An earlier signed tree head (JSON file) that the log must still contain.")
    ] = None,
) -> None:
    """Recompute the whole audit log against its signed tree heads. No passphrase needed."""
    trusted = [vault.read_tree_head(_read_text(p)) for p in head or []]
    public = vault.parse_public_key(key) if key else None
    if server is not None:
        with _connect(server) as remote:
            report = remote.verify_audit(public_key=public, trusted=trusted)
    else:
        report = vault.verify_audit(_local(path), public_key=public, trusted=trusted).as_dict()
    _emit(as_json, report, lambda: (
        f"audit log ok: {report['entries']} entries, {report['heads_checked']} signed heads match"
        if report["ok"] else f"audit log FAILED: {report['problem']}")
        + "".join(f"\nnote: {n}" for n in report["notes"]))
    if not report["ok"]:
        raise typer.Exit(vault.IntegrityError.exit_code)


@audit_app.command("show")
def audit_show(
    path: PlaceOpt = None, server: ServerOpt = None, member: MemberOpt = "steward",
    as_json: JsonOpt = False,
    start: Annotated[int, typer.Option(min=0, help="First entry to show.")] = 0,
    limit: Annotated[int, typer.Option(min=1, help="How many entries.")] = 50,
) -> None:
    """Show audit entries (actor, action, purpose, random ids, decision, reasons)."""
    if server is not None:
        with _connect(server) as remote:
            entries = remote.audit_entries(start, limit)
    else:
        entries = vault.read_audit_log(_local(path), _passphrase(), member=member, start=start,
                                       limit=limit)
    _emit(as_json, entries, lambda: "\n".join(
        f"{e['seq']:>6}  {e.get('at', '')}  {e.get('actor', '')}  {e.get('action', '')}  "
        f"{e.get('decision', '')}" + (f"  {','.join(e['reasons'])}" if e.get("reasons") else "")
        for e in entries) or "(no entries)")


@audit_app.command("prove")
def audit_prove(
    seq: Annotated[int, typer.Argument(min=0, help="Entry number.")],
    path: PlaceOpt = None, server: ServerOpt = None, as_json: JsonOpt = False,
) -> None:
    """Inclusion proof of entry N under the latest signed tree head (JSON). No passphrase."""
    if server is not None:
        with _connect(server) as remote:
            bundle = remote.prove(seq)
    else:
        bundle = vault.prove(_local(path), seq)
    _emit(True, bundle, "")
    del as_json  # a proof is always JSON


@audit_app.command("check-proof")
def audit_check_proof(
    proof: Annotated[Path, typer.Argument(help="A proof file written by 'mindward audit prove'.")],
    key: Annotated[str, typer.Option("--key", help="The vault's public key (hex).")],
    as_json: JsonOpt = False,
) -> None:
    """Check an inclusion proof offline with the vault's public key alone."""
    try:
        bundle = vault.load_json(_read_text(proof))
    except ValueError as exc:
        raise vault.InvalidInput(f"{proof} is not a JSON proof") from exc
    ok = isinstance(bundle, dict) and vault.verify_proof(bundle, vault.parse_public_key(key))
    _emit(as_json, {"ok": ok}, "proof ok" if ok else "proof FAILED")
    if not ok:
        raise typer.Exit(vault.IntegrityError.exit_code)


@audit_app.command("consistency")
def audit_consistency(
    head: Annotated[Path, typer.Argument(help="An earlier signed tree head (from 'audit head').")],
    key: Annotated[str, typer.Option("--key", help="The vault's public key (hex).")],
    path: PlaceOpt = None, server: ServerOpt = None, as_json: JsonOpt = False,
) -> None:
    """Prove (RFC 9162) that today's log extends an earlier head you kept. No passphrase."""
    earlier, public = vault.read_tree_head(_read_text(head)), vault.parse_public_key(key)
    if server is not None:
        with _connect(server) as remote:
            result = remote.check_consistency(earlier, public)
    else:
        result = vault.check_consistency(_local(path), earlier, public)
    _emit(as_json, result, "log extends the earlier head: ok" if result["ok"]
          else f"consistency FAILED: {result['problem']}")
    if not result["ok"]:
        raise typer.Exit(vault.IntegrityError.exit_code)


@audit_app.command("head")
def audit_head(path: PlaceOpt = None, server: ServerOpt = None,
               member: MemberOpt = "steward", as_json: JsonOpt = False) -> None:
    """Sign and print the current tree head; keep it to detect later rewriting."""
    with _open(path, member, server) as v:
        head = v.sign_head()
    _emit(True, head.to_dict(), "")
    del as_json  # a tree head is always JSON


consent_app = typer.Typer(no_args_is_help=True, help="Amend and show participants' consent.")
member_app = typer.Typer(no_args_is_help=True, help="Members of the vault and their roles.")
access_app = typer.Typer(no_args_is_help=True, help="What the policy engine would decide.")
policy_app = typer.Typer(no_args_is_help=True, help="Validate, show and apply policy sets.")
app.add_typer(consent_app, name="consent")
app.add_typer(member_app, name="member")
app.add_typer(access_app, name="access")
app.add_typer(policy_app, name="policy")
FormArg = Annotated[Path, typer.Argument(help="A filled consent form (TOML).")]
CategoryOpt = Annotated[list[str], typer.Option("--category", help="Data category (repeatable).")]
ExpiresOpt = Annotated[int, typer.Option("--expires-days", min=1, max=366,
                                         help="Served vaults: days until the token expires.")]


def _read_bytes(path: Path) -> bytes:
    try:
        return path.read_bytes()
    except OSError as exc:
        raise vault.NotFound(f"cannot read {path}") from exc


def _consent_text(result: dict[str, Any]) -> str:
    lines = [f"participant {result['participant_id']}: consent version {result['consent_version']}"]
    lines += [f"  {p}: {status}" for p, status in result["purposes"].items()]
    return "\n".join(lines)


@app.command()
def enrol(form: FormArg, path: PlaceOpt = None, server: ServerOpt = None,
          member: MemberOpt = "steward", as_json: JsonOpt = False) -> None:
    """Enrol a participant from a filled consent form; prints their random id."""
    raw = _read_bytes(form)
    with _open(path, member, server) as v:
        result = v.enrol(raw)
    _emit(as_json, result, lambda: _consent_text(result))


@consent_app.command("amend")
def consent_amend(participant: Annotated[str, typer.Argument(help="Participant id.")], form: FormArg,
                  path: PlaceOpt = None, server: ServerOpt = None,
                  member: MemberOpt = "steward", as_json: JsonOpt = False) -> None:
    """Add a consent version from a new filled form (a partial withdrawal is one)."""
    raw = _read_bytes(form)
    with _open(path, member, server) as v:
        result = v.amend_consent(participant, raw)
    _emit(as_json, result, lambda: _consent_text(result))


@consent_app.command("show")
def consent_show(participant: Annotated[str, typer.Argument(help="Participant id.")],
                 path: PlaceOpt = None, server: ServerOpt = None,
                 member: MemberOpt = "steward", as_json: JsonOpt = False) -> None:
    """Show a participant's consent history, oldest first."""
    with _open(path, member, server) as v:
        history = v.consent_history(participant)
    _emit(as_json, history, lambda: "\n".join(
        f"v{h['number']} {h['change']} {h['recorded_at']} signed {h['signed']} expires {h['expires']}: "
        + ", ".join(f"{p}={c['status']}" for p, c in sorted(h["purposes"].items())) for h in history))


@member_app.command("add")
def member_add(name: Annotated[str, typer.Argument(help="Member name.")],
               role: Annotated[str, typer.Option("--role", help="steward, analyst or auditor.")],
               path: PlaceOpt = None, server: ServerOpt = None,
               member: MemberOpt = "steward", as_json: JsonOpt = False,
               expires_days: ExpiresOpt = 30,
               key_slot: Annotated[bool, typer.Option(
                   "--key-slot", help="Served vaults: a steward who can unlock the service "
                                      "(passphrase from MINDWARD_NEW_PASSPHRASE or a prompt).")] = False,
               ) -> None:
    """Add a member. Locally their passphrase comes from MINDWARD_NEW_PASSPHRASE or a prompt; on
    a served vault they get a token, printed once (steward key slots need --key-slot)."""
    with _open(path, member, server) as v:
        new = None
        if not v.served or key_slot:
            new = _passphrase(f"Passphrase for {name}: ", env="MINDWARD_NEW_PASSPHRASE", confirm=True)
        result = v.add_member(name, role, new, expires_days=expires_days)
    _emit(as_json, result, lambda: f"added {result['member']} as {result['role']}"
          + (_token_text(result) if "token" in result else ""))


def _token_text(result: dict[str, Any]) -> str:
    return (f"\ntoken (shown only now; hand it over privately, it expires {result['expires_at']}):"
            f"\n{result['token']}")


@member_app.command("token")
def member_token(name: Annotated[str, typer.Argument(help="Member name.")],
                 path: PlaceOpt = None, server: ServerOpt = None, member: MemberOpt = "steward",
                 as_json: JsonOpt = False, expires_days: ExpiresOpt = 30) -> None:
    """Issue a new token for a member of a served vault (printed once)."""
    with _open(path, member, server) as v:
        result = v.issue_token(name, expires_days=expires_days)
    _emit(as_json, result, lambda: f"new token for {result['member']} ({result['role']})"
          + _token_text(result))


@member_app.command("revoke")
def member_revoke(name: Annotated[str, typer.Argument(help="Member name.")],
                  path: PlaceOpt = None, server: ServerOpt = None, member: MemberOpt = "steward",
                  as_json: JsonOpt = False) -> None:
    """Revoke every token of a member at once (a token-only member is then gone; a steward keeps
    their key slot)."""
    with _open(path, member, server) as v:
        result = v.revoke_tokens(name)
    _emit(as_json, result, f"revoked {result['revoked']} token(s) of {name}")


@member_app.command("remove")
def member_remove(name: Annotated[str, typer.Argument(help="Member name.")],
                  path: PlaceOpt = None, server: ServerOpt = None,
                  member: MemberOpt = "steward", as_json: JsonOpt = False) -> None:
    """Remove a member's key slot; nobody else is rekeyed."""
    with _open(path, member, server) as v:
        result = v.remove_member(name)
    _emit(as_json, result, f"removed {name}")


@member_app.command("list")
def member_list(path: PlaceOpt = None, server: ServerOpt = None,
                member: MemberOpt = "steward", as_json: JsonOpt = False) -> None:
    """List members and their roles."""
    with _open(path, member, server) as v:
        rows = v.members()
    _emit(as_json, rows, lambda: "\n".join(
        f"{r['member']}  {r['role']}  since {r['created_at']}  "
        + ("key slot" if r["key_slot"] else "token only")
        + (f", {r['tokens']} token(s) until {r['expires_at']}" if r["tokens"] else "")
        for r in rows))


@access_app.command("check")
def access_check(
    *, path: PlaceOpt = None, server: ServerOpt = None,
    purpose: Annotated[str, typer.Option("--purpose", help="Purpose id from the policy set.")],
    category: CategoryOpt, member: MemberOpt = "steward", as_json: JsonOpt = False,
) -> None:
    """Who a request would include and why others are not, without reading any data."""
    with _open(path, member, server) as v:
        result = v.access_summary(purpose, category)
    _emit(as_json, result, lambda: render.format_decision(result))
    if not result["permit"]:
        raise typer.Exit(vault.PolicyRefusal.exit_code)


@policy_app.command("check")
def policy_check(directory: Annotated[Path, typer.Argument(help="A folder of policy TOML files.")],
                 as_json: JsonOpt = False) -> None:
    """Validate a policy folder and print what it defines. No vault needed."""
    policy = vault.load_policy_dir(directory)
    lines = render.describe_policy(policy)
    _emit(as_json, {"version": policy.version, "lines": lines}, "\n".join(lines))


@policy_app.command("show")
def policy_show(path: PlaceOpt = None, server: ServerOpt = None,
                member: MemberOpt = "steward", as_json: JsonOpt = False) -> None:
    """The policy set pinned in the vault."""
    with _open(path, member, server) as v:
        document = v.policy_document()
    _emit(as_json, document, "\n".join(document["lines"]))


@policy_app.command("apply")
def policy_apply(directory: Annotated[Path, typer.Argument(help="A folder of policy TOML files.")],
                 path: PlaceOpt = None, server: ServerOpt = None,
                 member: MemberOpt = "steward", as_json: JsonOpt = False) -> None:
    """Validate and pin a new policy set in the vault (stewards only; audited)."""
    with _open(path, member, server) as v:
        result = v.apply_policy(directory)
    _emit(as_json, result, f"policy {result['version']} applied (was {result['previous']})")


ingest_app = typer.Typer(no_args_is_help=True, help="Take recordings and scores into the vault.")
app.add_typer(ingest_app, name="ingest")
ParticipantArg = Annotated[str, typer.Argument(help="Participant id (as 'enrol' printed).")]


@ingest_app.command("eeg")
def ingest_eeg(
    participant: ParticipantArg,
    recording: Annotated[Path, typer.Argument(help="EDF, EDF+, BDF, or .npy/.npz with --sidecar.")],
    path: PlaceOpt = None, server: ServerOpt = None, member: MemberOpt = "steward", as_json: JsonOpt = False,
    sidecar: Annotated[Path | None, typer.Option(help="JSON sidecar for NumPy input.")] = None,
    event_codes: Annotated[str | None, typer.Option(
        help="Comma-separated event codes to keep, e.g. 'stim/\\d{1,3},block/start' (literal codes "
             "with digit runs \\d{N} or \\d{M,N}, N <= 4; default: the policy set's).")] = None,
    keep_sex: Annotated[bool, typer.Option(help="Keep the header's sex subfield.")] = False,
    age_band: Annotated[int | None, typer.Option(
        min=1, max=50, help="Replace the birthdate by an age band of this many years.")] = None,
    keep_header_identity: Annotated[bool, typer.Option(
        help="Keep the removed header fields in the participant's encrypted identity record.")] = False,
) -> None:
    """De-identify a recording and store it encrypted; prints what was changed."""
    with _open(path, member, server) as v:
        result = v.ingest_eeg(participant, recording, sidecar=sidecar, event_codes=event_codes,
                              keep_sex=keep_sex, age_band_years=age_band,
                              keep_header_identity=keep_header_identity)
    report = result["deidentification"]
    if result["already_stored"]:
        _emit(as_json, result, f"already stored as {result['blob_id']}: the same content was "
                               "ingested before for this participant; nothing new was stored")
        return
    _emit(as_json, result, lambda: (
        f"stored {result['blob_id']} ({result['recording']['format']}, "
        f"{len(result['recording']['channels'])} channels, {result['recording']['duration']:g} s)\n"
        f"  header fields removed or replaced: {', '.join(report['fields_changed']) or 'none'}\n"
        f"  signal labels replaced: {report['labels_replaced']}, units blanked: "
        f"{report['units_replaced']}\n"
        f"  annotations relabelled: {report['annotations_relabelled']} of {report['annotations']}\n"
        f"  start date shifted: {'yes' if report['date_shift_applied'] else 'no'}"
        f"{' (date clamped to 1985-2084)' if report['date_clamped'] else ''}\n"
        "  De-identification removes what the header and labels can name; EEG itself can still "
        "identify a person. Ask your ethics board and DPO before sharing."))


@ingest_app.command("scores")
def ingest_scores(
    scores_file: Annotated[Path, typer.Argument(help="CSV: participant_id,item_id,value.")],
    kind: Annotated[str, typer.Option("--kind", help="derived or explicit.")],
    path: PlaceOpt = None, server: ServerOpt = None, member: MemberOpt = "steward", as_json: JsonOpt = False,
) -> None:
    """Store derived scores or explicit ratings (one transaction; re-ingest is a no-op)."""
    with _open(path, member, server) as v:
        result = v.ingest_scores(scores_file, kind)
    _emit(as_json, result, lambda: (
        f"{result['rows']} {result['category']} rows for {result['participants']} participants: "
        f"{result['batches_stored']} batches stored, {result['batches_already_stored']} already there"))


export_app = typer.Typer(no_args_is_help=True, help="Policy-checked exports, and checking them.")
app.add_typer(export_app, name="export")
RecipientOpt = Annotated[str | None, typer.Option(help="Who receives the export (audited).")]


@export_app.command("eeg")
def export_eeg(
    *, path: PlaceOpt = None, server: ServerOpt = None,
    purpose: Annotated[str, typer.Option("--purpose", help="Purpose id from the policy set.")],
    out: Annotated[Path, typer.Option("--out", help="New or empty folder for the dataset.")],
    recipient: RecipientOpt = None, member: MemberOpt = "steward", as_json: JsonOpt = False,
    demographics: Annotated[bool, typer.Option(
        "--demographics", help="Keep sex and age band (the grant must cover demographics).")] = False,
) -> None:
    """Granted, de-identified recordings as an EEG-BIDS dataset with a signed manifest."""
    with _open(path, member, server) as v:
        result = v.export_eeg(purpose, out, recipient=recipient, with_demographics=demographics)
    _emit(as_json, result, lambda: (
        f"exported {result['recordings']} recordings of {result['participants']} participants to "
        f"{result['out']} (export {result['export_id']}); manifest {result['manifest']}\n"
        "Pseudonymised EEG is still personal data: share it only under your data use agreement, "
        "as your ethics board and DPO allow."))


@export_app.command("matrix")
def export_matrix(
    *, path: PlaceOpt = None, server: ServerOpt = None,
    purpose: Annotated[str, typer.Option("--purpose", help="Purpose id from the policy set.")],
    category: Annotated[str, typer.Option("--category", help="scores-derived or ratings-explicit.")],
    out: Annotated[Path, typer.Option("--out", help="New or empty folder for the release.")],
    epsilon: Annotated[float | None, typer.Option(help="Pure DP budget (discrete Laplace).")] = None,
    rho: Annotated[float | None, typer.Option(help="zCDP budget (discrete Gaussian).")] = None,
    release: Annotated[str, typer.Option(help="matrix or aggregate.")] = "matrix",
    unit: Annotated[str, typer.Option(help="participant (default) or rating (if the policy allows).")]
    = "participant",
    items: Annotated[Path | None, typer.Option(help="Public item catalogue, one id per line.")] = None,
    max_items: Annotated[int | None, typer.Option(help="Contribution bound for aggregate releases.")]
    = None,
    recipient: RecipientOpt = None, member: MemberOpt = "steward", as_json: JsonOpt = False,
) -> None:
    """Pseudonymised preferences with exact DP noise, budget spent, signed manifest (Parquet + CSV)."""
    catalogue = vault.read_items(items) if items else None
    with _open(path, member, server) as v:
        result = v.export_matrix(purpose, category, out, epsilon=epsilon, rho=rho, release=release,
                                 unit=unit, recipient=recipient, items=catalogue,
                                 max_items_per_participant=max_items)
    refused = ", ".join(f"{k}: {n}" for k, n in result["refused_by_reason"].items()) or "none"
    _emit(as_json, result, lambda: (
        f"released {result['release']} of {result['category']} for {result['cohort_size']} "
        f"participants x {result['items']} items to {result['out']} (export {result['export_id']})\n"
        f"  refused by reason: {refused}\n"
        f"  guarantee: {result['guarantee'].get('mechanism')}, privacy unit "
        f"{result['guarantee'].get('unit', result['guarantee'].get('privacy_unit'))}, "
        f"epsilon {result['guarantee'].get('epsilon')}, rho {result['guarantee'].get('rho')}\n"
        + "".join(f"  not protected: {n}\n" for n in result["guarantee"].get("not_protected", []))
        +
        "  DP protects only what its privacy unit and budget state (see the manifest's "
        "'not_protected'); follow your data use agreement."))


@export_app.command("utility")
def export_utility(
    *, path: PlaceOpt = None, server: ServerOpt = None,
    purpose: Annotated[str, typer.Option("--purpose", help="Purpose id from the policy set.")],
    category: Annotated[str, typer.Option("--category", help="scores-derived or ratings-explicit.")],
    plot: Annotated[Path, typer.Option("--plot", help="Where to write the PNG.")],
    epsilons: Annotated[str, typer.Option(help="Comma-separated epsilons.")] = "0.1,0.3,1,3,10,30",
    unit: Annotated[str, typer.Option(help="participant or rating.")] = "participant",
    member: MemberOpt = "steward", as_json: JsonOpt = False,
) -> None:
    """What DP noise costs in recommender accuracy, per epsilon. Stewards only: the figures are
    computed without noise from the real ratings and are NOT differentially private."""
    try:
        values = [float(e) for e in epsilons.split(",") if e.strip()]
    except ValueError as exc:
        raise vault.UsageError("--epsilons takes numbers separated by commas") from exc
    with _open(path, member, server) as v:
        result = v.export_utility(purpose, category, values, plot, unit=unit)
    _emit(as_json, result, lambda: result.get("table", json.dumps(result, indent=2, default=str))
          + f"\nplot: {result.get('png', plot)}\n{result.get('caution', '')}")


@app.command()
def budget(
    path: PlaceOpt = None, server: ServerOpt = None, member: MemberOpt = "steward", as_json: JsonOpt = False,
    purpose: Annotated[str | None, typer.Option(help="One purpose only.")] = None,
) -> None:
    """Privacy budget spent per purpose (stewards also see each participant)."""
    with _open(path, member, server) as v:
        rows = v.budget(purpose)
    _emit(as_json, rows, lambda: render.format_budget(rows))


@export_app.command("verify")
def export_verify(
    directory: Annotated[Path, typer.Argument(help="An export folder (holds manifest.json).")],
    key: Annotated[str, typer.Option("--key", help="The vault's public key (hex).")],
    as_json: JsonOpt = False,
) -> None:
    """Check an export's manifest signature and every file's digest. No passphrase."""
    result = vault.verify_export(directory, vault.parse_public_key(key))
    _emit(as_json, result, lambda: "export ok" if result["ok"]
          else "export FAILED: " + "; ".join(result["problems"]))
    if not result["ok"]:
        raise typer.Exit(vault.IntegrityError.exit_code)


@export_app.command("check")
def export_check(
    manifest_file: Annotated[Path, typer.Argument(help="The manifest.json of an export you hold.")],
    path: PlaceOpt = None, server: ServerOpt = None, member: MemberOpt = "steward", as_json: JsonOpt = False,
) -> None:
    """Does an export you hold now contain withdrawn or expired participants? (counts only)"""
    try:
        document = vault.load_json(_read_text(manifest_file))
    except ValueError as exc:
        raise vault.InvalidInput(f"{manifest_file} is not JSON") from exc
    with _open(path, member, server) as v:
        result = v.check_export(document)
    _emit(as_json, result, lambda: (
        f"export {result['export_id']}: {result['participants']} participants; "
        f"{result['withdrawn_or_erased']} erased, {result['consent_no_longer_covers']} whose consent "
        f"no longer covers {result['purpose']}; export expired: {result['export_expired']}\n"
        + ("REPLACE this export: request a new one and delete this copy." if result["must_replace"]
           else "The export still stands.")))
    if result["must_replace"]:
        raise typer.Exit(vault.PolicyRefusal.exit_code)


withdraw_app = typer.Typer(no_args_is_help=True, help="Withdrawal requests, erasure and receipts.")
receipt_app = typer.Typer(no_args_is_help=True, help="Check deletion receipts offline.")
app.add_typer(withdraw_app, name="withdraw")
app.add_typer(receipt_app, name="receipt")
def _iso_date(text: str) -> Any:
    import datetime as dt

    try:
        return dt.date.fromisoformat(text)
    except ValueError as exc:
        raise vault.UsageError("--received takes a date as YYYY-MM-DD") from exc


@withdraw_app.command("request")
def withdraw_request(
    participant: ParticipantArg, *, path: PlaceOpt = None, server: ServerOpt = None,
    received: Annotated[str, typer.Option("--received", help="When the request arrived (YYYY-MM-DD).")],
    scope: Annotated[str, typer.Option("--scope", help="full, or purpose:P")] = "full",
    member: MemberOpt = "steward", as_json: JsonOpt = False,
) -> None:
    """Record a withdrawal request and its deadline (one month by default, GDPR Art. 12(3))."""
    day = _iso_date(received)
    with _open(path, member, server) as v:
        result = v.withdraw_request(participant, received=day, scope=scope)
    _emit(as_json, result, lambda: (f"request {result['request_id']} ({result['scope']}) recorded; "
                                    f"due by {result['deadline']}"))


@withdraw_app.command("pending")
def withdraw_pending(path: PlaceOpt = None, server: ServerOpt = None,
                     member: MemberOpt = "steward", as_json: JsonOpt = False) -> None:
    """Open withdrawal requests, overdue first."""
    with _open(path, member, server) as v:
        rows = v.withdraw_pending()
    _emit(as_json, rows, lambda: "\n".join(
        f"{r['request_id']}  {r['participant_id']}  {r['scope']}  due {r['deadline']}  "
        + ("OVERDUE" if r.get("overdue") else f"{r.get('days_left')} days left") for r in rows)
        or "no open requests")


@withdraw_app.command("process")
def withdraw_process(
    target: Annotated[str, typer.Argument(help="Participant id or request id (w-...).")],
    path: PlaceOpt = None, server: ServerOpt = None, member: MemberOpt = "steward", as_json: JsonOpt = False,
    receipt: Annotated[Path | None, typer.Option("--receipt", help="Write the signed receipt here.")] = None,
) -> None:
    """Carry out a withdrawal: cryptographic erase (full) or narrowing (purpose), with a receipt."""
    if receipt is not None:  # refuse a path that cannot be written before erasing anything
        vault.check_output_path(receipt, "--receipt")
    with _open(path, member, server) as v:
        result = v.withdraw_process(target)
    if receipt is not None:
        try:
            vault.write_output(receipt, _receipt_bytes(result["receipt"]), "--receipt")
        except vault.VaultError as exc:
            raise type(exc)(f"{cli_message(exc)}; the withdrawal WAS processed: get its receipt with "
                            f"'mindward withdraw receipt {result['request_id']} --out FILE'"
                            ) from exc
    _emit(as_json, result, lambda: _withdrawal_text(result, receipt))


def _kept_text(kept: list[dict[str, Any]]) -> str:
    """The categories a purpose withdrawal kept, each with the purposes that still grant it."""
    return "; ".join(f"{k['category']} ({k['blobs']} blobs, still granted for "
                     f"{', '.join(k['still_granted_for'])})" for k in kept) or "nothing"


def _withdrawal_text(result: dict[str, Any], receipt: Path | None) -> str:
    lines = [f"{result['scope']} withdrawal of {result['participant_id']} processed at "
             f"{result['processed_at']} ({'on time' if result['on_time'] else 'LATE'})",
             f"  data key destroyed: {'yes' if result['data_key_destroyed'] else 'no'}; "
             f"blobs deleted: {result['blobs_deleted']}; kept: {_kept_text(result['kept'])}",
             f"  stage the data had reached: {result['stage']}"]
    if result["notify"]:
        lines.append("  Notify (GDPR Art. 19): " + ", ".join(result["recipients_to_notify"] or
                                                            ["internal users only"]))
        lines += [f"    export {n['export_id']} ({n['kind']}, {n['purpose']}) to {n['recipient']} "
                  f"on {n['created_at']}" for n in result["notify"]]
    if result.get("warning"):
        lines.append(f"  warning: {result['warning']}")
    if receipt is not None:
        lines.append(f"  signed receipt written to {receipt}")
    lines += [f"  {c}" for c in result["cautions"]]
    return "\n".join(lines)


@withdraw_app.command("receipt")
def withdraw_receipt(
    target: Annotated[str, typer.Argument(help="Participant id or request id (w-...).")],
    path: PlaceOpt = None, server: ServerOpt = None, member: MemberOpt = "steward",
    out: Annotated[Path | None, typer.Option("--out", help="Write the receipt here.")] = None,
) -> None:
    """The signed deletion receipt of a processed withdrawal (JSON)."""
    if out is not None:
        vault.check_output_path(out, "--out")
    with _open(path, member, server) as v:
        doc = v.withdraw_receipt(target)
    if out is not None:
        vault.write_output(out, _receipt_bytes(doc), "--out")
    typer.echo(_receipt_bytes(doc).decode("ascii") if out is None else f"wrote {out}")


def _receipt_bytes(document: dict[str, Any]) -> bytes:
    return (json.dumps(document, indent=2, sort_keys=True) + "\n").encode("ascii")


@receipt_app.command("verify")
def receipt_verify(
    receipt_file: Annotated[Path, typer.Argument(help="A deletion receipt (JSON).")],
    key: Annotated[str, typer.Option("--key", help="The vault's public key (hex).")],
    as_json: JsonOpt = False,
) -> None:
    """Check a deletion receipt offline with the vault's public key alone. No passphrase."""
    ok, reasons = vault.verify_receipt_file(receipt_file, vault.parse_public_key(key))
    _emit(as_json, {"ok": ok, "problems": reasons},
          "receipt ok" if ok else "receipt FAILED: " + "; ".join(reasons))
    if not ok:
        raise typer.Exit(vault.IntegrityError.exit_code)


@app.command()
def sweep(
    path: PlaceOpt = None, server: ServerOpt = None, member: MemberOpt = "steward", as_json: JsonOpt = False,
    dry_run: Annotated[bool, typer.Option("--dry-run", help="Only list what would be erased.")] = False,
) -> None:
    """Erase, with receipts, data whose consent expired or retention ended (safe from cron)."""
    with _open(path, member, server) as v:
        result = v.sweep(dry_run=dry_run)
    _emit(as_json, result, lambda: json.dumps(result, indent=2, sort_keys=True, default=str))


@app.command()
def report(
    path: PlaceOpt = None, server: ServerOpt = None, member: MemberOpt = "steward", as_json: JsonOpt = False,
    out: Annotated[Path | None, typer.Option("--out", help="Write Markdown here.")] = None,
) -> None:
    """A record of processing (GDPR Art. 30 style) from the vault's state; counts only."""
    if out is not None:
        vault.check_output_path(out, "--out")
    with _open(path, member, server) as v:
        record = v.report()
    text = render.report_markdown(record)
    if out is not None:
        vault.write_output(out, text.encode("utf-8"), "--out")
    _emit(as_json, record, text if out is None else f"wrote {out}")


@app.command()
def serve(
    path: VaultOpt,
    host: Annotated[str, typer.Option(help="Address to listen on (loopback unless TLS is given).")]
    = "127.0.0.1",
    port: Annotated[int, typer.Option(min=0, max=65535, help="Port (0: any free port).")] = 8631,
    tls_cert: Annotated[Path | None, typer.Option(help="TLS certificate chain (PEM).")] = None,
    tls_key: Annotated[Path | None, typer.Option(help="The certificate's private key (PEM).")] = None,
    credentials: Annotated[Path | None, typer.Option(
        help="A file holding the steward's passphrase (yours alone: chmod 600).")] = None,
    max_exports: Annotated[int, typer.Option(min=1, help="Exports running at a time.")] = 2,
    max_upload_mb: Annotated[int, typer.Option(min=1, help="Largest recording upload, in MiB.")] = 4096,
    sweep_every_hours: Annotated[float, typer.Option(
        min=0, help="Run 'sweep' this often (0: never).")] = 24.0,
    as_json: JsonOpt = False,
) -> None:
    """Serve the vault over HTTP(S) to its members' tokens; the keys stay in this process."""
    from vault.server.options import ServeOptions, read_credentials
    from vault.server.run import serve as run_service
    from vault.server.run import start_json, start_line

    options = ServeOptions(vault=path, host=host, port=port, tls_cert=tls_cert, tls_key=tls_key,
                           max_exports=max_exports, max_upload_mb=max_upload_mb,
                           sweep_every_hours=sweep_every_hours)

    def secret() -> str:
        return read_credentials(credentials) if credentials is not None else _passphrase()

    def started(facts: dict[str, Any]) -> None:
        typer.echo(start_json(facts) if as_json else start_line(facts))
        if not as_json:
            typer.echo(CAUTION, err=True)

    run_service(options, secret, started)


@app.command()
def demo(
    directory: Annotated[Path, typer.Option("--dir", help="Where to write the demo (replaced if it "
                                            "holds an earlier demo).")] = Path("mindward-demo"),
    participants: Annotated[int, typer.Option(
        min=30, max=40, help="Cohort size (recommender training needs 20 consenting).")] = 30,
    as_json: JsonOpt = False,
) -> None:
    """Run the whole job on an invented study (synthetic people only), narrated."""
    from rich.console import Console
    from rich.progress import Progress

    from vault.cli.demo import run_demo

    console = Console(stderr=as_json, highlight=False, soft_wrap=True)
    with Progress(console=console, transient=True) as bar:
        def progress(label: str, total: int) -> Callable[[], None]:
            task = bar.add_task(label, total=total)
            return lambda: bar.advance(task)

        summary = run_demo(directory, n_participants=participants,
                           say=console.print, progress=progress)
    if as_json:
        _emit(True, summary, "")
        return
    from rich.table import Table

    table = Table(title="Summary", show_header=False)
    for key, value in summary.items():
        if key != "paths":
            table.add_row(key.replace("_", " "), str(value))
    console.print(table)
    for name, where in summary["paths"].items():
        console.print(f"  {name}: {where}")
    console.print("All people in this demo are invented. With real participants, follow your "
                  "ethics board's, data-protection officer's and local law's rules.")


BENCH_GROUP = "mindward.commands"  # entry points other distributions add commands through
BENCH_INSTALL = "pip install 'mindward[bench]' (from a source checkout: pip install -e '.[bench]')"


@app.command()
def bench(
    as_json: JsonOpt = False,
    quick: Annotated[bool, typer.Option("--quick", help="Small sizes (a smoke run).")] = False,
) -> None:
    """Measure the vault against limits measured in the same run; prints ratios.

    The benchmarks need what the library does not: pip install 'mindward\\[bench]'."""
    report, text = _bench_command()(quick=quick)
    _emit(as_json, report, text)


def _bench_command() -> Callable[..., tuple[dict[str, Any], str]]:
    """The `bench` entry point of the mindward.commands group, or a UsageError saying how to
    install it (entry point missing, or its dependencies: the [bench] extra)."""
    from importlib.metadata import entry_points

    found = [ep for ep in entry_points(group=BENCH_GROUP) if ep.name == "bench"]
    if not found:
        raise vault.UsageError(f"the benchmarks are not installed: {BENCH_INSTALL}")
    try:
        return found[0].load()
    except ImportError as exc:
        raise vault.UsageError(f"the benchmarks need the [bench] extra ({exc.name or 'a module'} is "
                               f"missing): {BENCH_INSTALL}") from exc


def _print_version(as_json: bool) -> int:
    number = _version()
    _emit(as_json, {"name": "mindward", "version": number}, f"mindward {number}")
    return 0


def _version() -> str:
    """The installed distribution's version: pyproject takes it from vault.__version__ (reading
    it through importlib.metadata would cost more than the rest of this start-up)."""
    return vault.__version__


@app.callback(invoke_without_command=True)
def _root(
    ctx: typer.Context,
    show_version: Annotated[bool, typer.Option(
        "--version", help="Print the installed version and exit.")] = False,
    as_json: Annotated[bool, typer.Option("--json", help="With --version: print JSON.")] = False,
) -> None:
    if show_version:
        raise typer.Exit(_print_version(as_json))
    if as_json:  # `mindward --json info` would otherwise print text to a script expecting JSON
        raise vault.UsageError("--json goes after the command (mindward COMMAND ... --json)")
    if ctx.invoked_subcommand is None:
        typer.echo(ctx.get_help())
        raise typer.Exit(0)


def _read_text(path: Path) -> str:
    try:
        return path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise vault.NotFound(f"cannot read {path}") from exc


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    if "--version" in args and set(args) <= {"--version", "--json"}:
        # answered before typer builds the parser of every command (about 0.3 s with typer's
        # per-parameter validators); the same answer as the --version option below
        return _print_version("--json" in args)
    try:
        result = app(args=args, prog_name="mindward", standalone_mode=False)
    except VaultError as exc:
        return _error(cli_message(exc), exc.exit_code, "--json" in args)
    except typer.Exit as exc:
        return int(exc.exit_code)
    except typer.Abort:
        return _error("aborted", 130, "--json" in args)
    except Exception as exc:
        if callable(getattr(exc, "show", None)) and isinstance(getattr(exc, "exit_code", None), int):
            return _parser_error(exc, args)  # a usage error found by the parser: exit code 2
        if os.environ.get("MINDWARD_DEBUG"):  # a bug: one line, never with data values
            raise
        return _error(f"internal error ({type(exc).__name__}); rerun with MINDWARD_DEBUG=1 "
                      "and report it", 1, "--json" in args)
    return result if isinstance(result, int) else 0


def _parser_error(exc: Any, args: list[str]) -> int:
    """The parser's own complaint as one line (a bare group name still shows its help)."""
    if type(exc).__name__ == "NoArgsIsHelpError" or not callable(getattr(exc, "format_message", None)):
        exc.show()
        return int(exc.exit_code)
    message = " ".join(str(exc.format_message()).split())
    ctx = getattr(exc, "ctx", None)
    where = f" (see '{ctx.command_path} --help')" if ctx is not None else ""
    return _error(_one_line(message, 300) + where, int(exc.exit_code), "--json" in args)


def _one_line(message: str, limit: int = 500) -> str:
    """Control characters (a newline in an id someone typed) escaped, long values cut."""
    text = "".join(c if c.isprintable() else repr(c)[1:-1] for c in message)
    return text if len(text) <= limit else text[:limit] + "..."


def _error(message: str, code: int, as_json: bool) -> int:
    message = _one_line(message)
    if as_json:
        typer.echo(json.dumps({"error": message, "exit_code": code}))
    typer.echo(f"mindward: error: {message}", err=True)
    return code


if __name__ == "__main__":
    sys.exit(main())
