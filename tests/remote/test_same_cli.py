"""One table of member commands, run on a local vault and through a real `mindward serve` over
its served twin (tests/remote/conftest.py): the same exit codes and, but for the fields listed in
DIFFER, the same --json documents. Refusals (wrong role, unknown participant, unknown purpose) are
rows too, so their exit codes are compared."""

from __future__ import annotations

import datetime as dt
import json
import re
from pathlib import Path
from typing import Any

from tests.conftest import ROOT
from tests.remote.conftest import PASSPHRASES
from vault.cli.app import main

# Fields that must differ between a local vault and its served twin, and why; each is left out of
# the comparison wherever it appears in a document.
DIFFER: dict[str, str] = {
    # each side writes into its own folders
    "path": "the twins live in different folders", "out": "each side exports to its own folder",
    "manifest": "inside each side's own export folder",
    # drawn at random or read from the clock when the command runs
    "export_id": "random per export", "request_id": "random per withdrawal request",
    "receipt_id": "random per receipt", "last": "clock (the newest export to a recipient)",
    "consent_digest": "a digest over the consent version, which holds its recording time",
    "at": "clock", "created_at": "clock", "recorded_at": "clock", "processed_at": "clock",
    "signed_at": "clock", "generated_at": "clock", "expires_at": "clock", "served_at": "clock",
    "receipt": "signed over its own processing time",
    # the served twin's log also holds its conversion, the tokens issued and every token use
    "audit_entries": "served log is longer", "entries": "served log is longer",
    "heads_checked": "served log is longer", "latest_head": "served log is longer",
    "latest_tree_head": "served log is longer", "tree_size": "served log is longer",
    "root_hash": "served log is longer", "signature": "signs a different head",
    # the twin is served: its members hold tokens, not key slots
    "served": "one twin is served", "key_slots": "served vaults keep only the steward's slot",
    "token_members": "one twin is served", "key_slot": "one twin is served", "tokens": "one twin is served",
    "token": "only a served vault issues tokens", "token_id": "only a served vault issues tokens",
}

# (member, command line without --json, fields only this row may differ in, and why). Order matters:
# both sides run the rows in this order, so their states stay twins.
ROWS: list[tuple[str, str, dict[str, str]]] = [
    ("steward", "info", {"member": "only a service has a caller", "role": "only a service has a caller",
                         "sweep_every_hours": "only a service sweeps on a schedule"}),
    ("steward", "member list", {}),
    ("omar", "member list", {}),
    ("steward", "policy show", {}),
    ("omar", "policy show", {}),
    ("steward", "access check --purpose primary-analysis --category eeg-raw", {}),
    ("omar", "access check --purpose primary-analysis --category eeg-raw", {}),
    ("omar", "access check --purpose no-such-purpose --category eeg-raw", {}),
    ("steward", "consent show {pid}", {}),
    ("omar", "consent show {pid}", {}),
    ("steward", "consent show p-nobody-here", {}),
    ("steward", "enrol {root}/form.toml", {"participant_id": "a new random id on each side"}),
    ("steward", "enrol {root}/form.toml", {}),
    ("steward", "consent amend {pid1} {root}/amend.toml", {}),
    ("omar", "consent amend {pid1} {root}/amend.toml", {}),
    ("steward", "ingest eeg {pid} {edf}", {}),
    ("omar", "ingest eeg {pid} {edf}", {}),
    ("steward", "ingest scores {root}/ratings.csv --kind explicit", {}),
    ("steward", "ingest scores {root}/ratings.csv --kind nonsense", {}),
    ("steward", "policy apply {policies}", {}),
    ("omar", "policy apply {policies}", {}),
    ("omar", "export eeg --purpose method-development --out {out}/eeg", {}),
    ("omar", "export eeg --purpose method-development --out {out}/eeg", {}),
    ("omar", "export matrix --purpose recommender-training --category ratings-explicit "
             "--epsilon 0.5 --items {root}/items.txt --out {out}/matrix", {}),
    ("omar", "export eeg --purpose no-such-purpose --out {out}/eeg-refused", {}),
    ("omar", "export check {out}/matrix/manifest.json", {}),
    ("omar", "budget", {}),
    ("steward", "budget", {}),
    ("ines", "budget", {}),
    ("ines", "access check --purpose primary-analysis --category eeg-raw", {}),
    ("ines", "policy show", {}),
    ("ines", "member list", {}),
    ("ines", "consent show {pid}", {}),
    ("ines", "export eeg --purpose method-development --out {out}/eeg-ines", {}),
    ("ines", "report", {}),
    ("ines", "audit show --limit 3", {}),
    ("omar", "audit show --limit 3", {}),
    ("steward", "audit verify", {}),
    ("ines", "audit prove 1", {"proof": "under each side's latest head",
                               "inclusion": "under each side's latest head"}),
    ("steward", "report", {}),
    ("omar", "report", {}),
    ("steward", "verify", {}),
    ("omar", "verify", {}),
    ("steward", "withdraw request {pid2} --received {today}", {}),
    ("steward", "withdraw pending", {}),
    ("omar", "withdraw pending", {}),
    ("steward", "withdraw process {pid2}", {}),
    ("steward", "withdraw process {pid2}", {}),
    ("steward", "sweep --dry-run", {}),
    ("steward", "member add newcomer --role analyst", {}),
    ("omar", "member add intruder --role steward", {}),
    ("steward", "member remove newcomer", {}),
]


# commands that act as no member locally (they need no passphrase): no --member there
KEY_FREE = ("info", "audit verify", "audit prove")
# Errors name random ids, folders and times of their side; each is replaced before comparing.
MESSAGE_NOISE = [(re.compile(r"\b[0-9a-f]{32}\b"), "<vault id>"),
                 (re.compile(r"\bw-[0-9a-f]{16}\b"), "w-<id>"),
                 (re.compile(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ"), "<time>")]
# Rows where the service answers today where the local vault refuses: the gap is a finding, kept
# here so the table still runs; each entry must go when the two agree (the test says so).
# Locally an auditor's passphrase opens no key, so every Vault command refuses them (exit 4); the
# service's member view lets an auditor's token call these three (the library checks no role for
# them): reported to the lead (issue 15), to be refused in the library for roles that read no data.
KNOWN_GAPS: dict[tuple[str, str], str] = {
    ("ines", "budget"): "auditor reads budget totals through the service",
    ("ines", "policy show"): "auditor reads the pinned policy through the service",
    ("ines", "member list"): "auditor lists members through the service",
}


def _argv(template: str, lab: dict[str, Any], out: Path) -> list[str]:
    out.mkdir(exist_ok=True)
    text = template.format(**{k: v for k, v in lab.items() if isinstance(v, str)}, out=out,
                           policies=ROOT / "policies", today=dt.datetime.now(dt.UTC).date().isoformat())
    return [*text.split(), "--json"]


def _run(argv: list[str], env: dict[str, str], monkeypatch, capsys) -> tuple[int, Any, str]:
    for name in ("MINDWARD_VAULT", "MINDWARD_SERVER", "MINDWARD_TOKEN", "MINDWARD_PASSPHRASE",
                 "MINDWARD_MEMBER", "MINDWARD_KEY", "MINDWARD_CA"):
        monkeypatch.delenv(name, raising=False)
    for name, value in env.items():
        monkeypatch.setenv(name, value)
    monkeypatch.setenv("MINDWARD_NEW_PASSPHRASE", "a new passphrase, long enough")
    code = main(argv)
    out, err = capsys.readouterr()
    return code, json.loads(out) if out.strip() else None, err


def _without(document: Any, keys: set[str]) -> Any:
    if isinstance(document, dict):
        return {k: _without(v, keys) for k, v in document.items() if k not in keys}
    if isinstance(document, list):
        return [_without(v, keys) for v in document]
    return document


def test_every_member_command_answers_the_same_locally_and_through_the_service(
        lab, monkeypatch, capsys) -> None:
    twins = Path(lab["twins"])
    mismatches = []
    for member, template, extra in ROWS:
        local_env = {"MINDWARD_VAULT": str(twins / "local"), "MINDWARD_PASSPHRASE": PASSPHRASES[member]}
        remote_env = {"MINDWARD_SERVER": lab["server"].url, "MINDWARD_TOKEN": lab["tokens"][member]}
        as_member = [] if template.startswith(KEY_FREE) else ["--member", member]
        local = _run([*_argv(template, lab, twins / "out-local"), *as_member], local_env,
                     monkeypatch, capsys)
        remote = _run(_argv(template, lab, twins / "out-remote"), remote_env, monkeypatch, capsys)
        for code, _, err in (local, remote):  # a refusal is one line; a document may say "refused"
            assert "Traceback" not in err and err.count("\n") <= 1, (template, err)
        keys = set(DIFFER) | set(extra)
        if (member, template) in KNOWN_GAPS:
            assert local[0] != remote[0], f"{member}: {template} agrees now: take it off KNOWN_GAPS"
            continue
        if local[0] != remote[0]:
            mismatches.append(f"{member}: {template}: exit {local[0]} locally, {remote[0]} remotely "
                              f"({local[2].strip()} | {remote[2].strip()})")
        elif _is_error(local[1]):
            if not _local_only_refusal(local[1]) and _message(local[1], twins / "out-local") != _message(
                    remote[1], twins / "out-remote"):
                mismatches.append(f"{member}: {template}: errors differ: {local[1]} | {remote[1]}")
        elif _without(local[1], keys) != _without(remote[1], keys):
            mismatches.append(f"{member}: {template}: documents differ:\n  {_without(local[1], keys)}"
                              f"\n  {_without(remote[1], keys)}")
    assert not mismatches, "\n".join(mismatches)


def _message(error: dict[str, Any], out: Path) -> str:
    text = error["error"].replace(str(out), "<out>")
    for pattern, replacement in MESSAGE_NOISE:
        text = pattern.sub(replacement, text)
    return f"{error['exit_code']}: {text}"


def _is_error(document: Any) -> bool:
    return isinstance(document, dict) and set(document) == {"error", "exit_code"}


def _local_only_refusal(error: dict[str, Any]) -> bool:
    """Locally an auditor is refused when opening the vault (their passphrase opens no key); the
    service never opens a key for them, so its refusal comes from the call itself: same exit code,
    other words."""
    return "holds no key to participant data" in error["error"]


def test_the_table_covers_refusals_of_each_kind() -> None:
    """Guard against a table of happy paths only: it holds rows for wrong roles, unknown ids and
    unknown purposes (their exit codes are compared above)."""
    text = " ".join(t for _, t, _ in ROWS)
    assert "p-nobody-here" in text and "no-such-purpose" in text and "nonsense" in text
    assert {m for m, _, _ in ROWS} == {"steward", "omar", "ines"}


def test_the_comparison_sees_a_difference() -> None:
    """_without leaves everything not listed: a changed count is still a difference."""
    a = {"included": 3, "at": "x", "rows": [{"spent": 1.0, "created_at": "y"}]}
    b = {"included": 3, "at": "z", "rows": [{"spent": 2.0, "created_at": "w"}]}
    assert _without(a, set(DIFFER)) != _without(b, set(DIFFER))
    assert _without(a, set(DIFFER)) == _without({**a, "at": "q"}, set(DIFFER))


TEXT_ROWS = [("steward", "info"), ("steward", "member list"), ("omar", "policy show"),
             ("omar", "access check --purpose primary-analysis --category eeg-raw"),
             ("steward", "budget"), ("ines", "audit show --limit 3"), ("steward", "audit verify"),
             ("steward", "report"), ("steward", "withdraw pending"), ("steward", "audit head"),
             ("omar", "export matrix --purpose recommender-training --category ratings-explicit "
                      "--epsilon 0.1 --items {root}/items.txt --out {out}/matrix-text")]


def test_the_text_output_renders_the_services_documents(lab, monkeypatch, capsys) -> None:
    """Without --json the same renderers print the service's documents: what they print locally."""
    twins = Path(lab["twins"])
    for member, template in TEXT_ROWS:
        remote_env = {"MINDWARD_SERVER": lab["server"].url, "MINDWARD_TOKEN": lab["tokens"][member]}
        argv = _argv(template, lab, twins / "out-text")[:-1]  # no --json
        code, out, err = _text(argv, remote_env, monkeypatch, capsys)
        assert code == 0 and out.strip() and "Traceback" not in err, (template, code, err)


def _text(argv: list[str], env: dict[str, str], monkeypatch, capsys) -> tuple[int, str, str]:
    for name, value in env.items():
        monkeypatch.setenv(name, value)
    monkeypatch.delenv("MINDWARD_VAULT", raising=False)
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err
