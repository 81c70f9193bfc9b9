"""`mindward demo`: the whole job on an invented study, narrated step by step.

The study (demo_data/) is synthetic: the Tasting Lab rates photographs of plated
dishes for a canteen's menu recommender. Nobody real was recorded.
"""

from __future__ import annotations

import csv
import json
import shutil
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from vault import Vault, prove, verify_audit, verify_proof, verify_receipt_file
from vault.errors import Conflict, InvalidInput, PolicyRefusal

DEMO_PASSPHRASE = "tasting lab demo passphrase (demo only)"  # noqa: S105 (invented data)
ANALYST_PASSPHRASE = "tasting lab analyst passphrase (demo only)"  # noqa: S105 (invented data)
MARKER = ".mindward-demo"
EPSILON = 1.0
UTILITY_EPSILONS = [0.3, 1.0, 3.0, 10.0, 30.0, 100.0, 300.0]

Say = Callable[[str], None]


def _prepare(root: Path) -> None:
    if root.exists() and any(root.iterdir()):
        if not (root / MARKER).exists():
            raise Conflict(f"{root} is not empty and not an earlier demo; choose another --dir")
        shutil.rmtree(root)
    root.mkdir(parents=True)
    (root / MARKER).write_text("written by 'mindward demo'; safe to delete\n")


def run_demo(root: Path, *, n_participants: int = 30, say: Say = print,
             progress: Callable[[str, int], Callable[[], None]] | None = None) -> dict[str, Any]:
    """Run the demo in `root` (created, or replaced if it holds an earlier demo)."""
    from vault.demo_data.forms import write_forms  # demo-only dependency, loaded on demand
    from vault.demo_data.generate import generate

    started = time.perf_counter()
    root = Path(root)
    _prepare(root)
    say("1. The Tasting Lab's synthetic study: 60 dish photographs, EEG and ratings.")
    files = generate(root / "study", n_participants=n_participants)
    study = json.loads(files.study.read_text())
    say(f"   generated {len(files.eeg)} EDF+ recordings with invented identities in their headers")

    say("2. The data steward creates the vault (Argon2id passphrase, Ed25519 signing key).")
    vault_dir = root / "vault"
    summary: dict[str, Any] = {"participants": len(files.eeg)}
    with Vault.init(vault_dir, DEMO_PASSPHRASE) as v:
        public_key = v.public_key
        say(f"   vault {v.vault_id}, signing key {v.info()['fingerprint']}")
        say("3. Enrolment: each filled consent form is checked against the policy set; identity "
            "and contact details go only into a record encrypted under the participant's own key.")
        forms = write_forms(files.root, v.policy)
        pids, ended = {}, 0
        for code in files.eeg:
            try:
                pids[code] = v.enrol(forms[code].read_bytes())["participant_id"]
            except InvalidInput:
                ended += 1  # a form whose consent had ended before enrolment: not recorded
        check = v.access_check("recommender-training", ["scores-derived"])
        refused = ", ".join(f"{n} {r}" for r, n in sorted(check.counts.items()))
        say(f"   {len(pids)} enrolled ({ended} forms refused: consent ended already); for "
            f"recommender training {len(check.included)} would be included, refused: {refused}")
        summary["forms_refused"] = ended
        summary["recommender_cohort"] = len(check.included)
        summary["recommender_refused"] = dict(check.counts)
        say("4. Ingest: headers and free-text annotations are scrubbed, dates shifted, "
            "then everything is encrypted.")
        tick = progress("ingest", len(files.eeg)) if progress else (lambda: None)
        relabelled, refused_ingest, kept = 0, 0, {}
        for code, path in files.eeg.items():
            if code not in pids:
                tick()
                continue
            try:
                result = v.ingest_eeg(pids[code], path, keep_header_identity=True)
            except PolicyRefusal:
                refused_ingest += 1  # e.g. consent already expired: nothing is stored
            else:
                relabelled += result["deidentification"]["annotations_relabelled"]
                kept[code] = pids[code]
            tick()
        summary.update(annotations_relabelled=relabelled, ingest_refused=refused_ingest)
        stored = {kind: v.ingest_scores(_by_vault_id(src, kept, root / f"{kind}.csv"), kind)
                  for kind, src in (("explicit", files.ratings), ("derived", files.scores))}
        say(f"   {len(kept)} recordings stored, {refused_ingest} refused (no current consent "
            f"covering storage); {relabelled} free-text annotations replaced; "
            f"{stored['explicit']['rows']} ratings and {stored['derived']['rows']} derived scores stored")
        check = v.verify()
        say(f"5. Verification: {check['blobs_checked']} blobs authenticated, "
            f"{len(check['blobs_failed'])} failed")
        v.add_member("analyst", "analyst", ANALYST_PASSPHRASE)
    planted = [p["edf_identity"][k] for p in study["participants"]
               for k in ("name", "patient_code", "technician")]
    with open(files.participants, newline="") as fh:
        planted += [row[k] for row in csv.DictReader(fh) for k in ("name", "email", "phone")]
    leaks = _find_any(vault_dir, planted)
    say(f"6. No invented name, contact detail, patient code or technician appears in any byte "
        f"of the vault: {'confirmed' if not leaks else 'FAILED'}")

    say(f"7. An analyst (own passphrase, role 'analyst') asks for the explicit ratings for "
        f"recommender training, with participant-level differential privacy (epsilon {EPSILON}).")
    export_dir, plot = root / "export", root / "utility.png"
    with Vault.open(vault_dir, ANALYST_PASSPHRASE, member="analyst") as a:
        released = a.export_matrix("recommender-training", "ratings-explicit", export_dir,
                                   epsilon=EPSILON, items=_items(files.stimuli))
        refused = ", ".join(f"{n} {r}" for r, n in released["refused_by_reason"].items()) or "none"
        say(f"   released for {released['cohort_size']} participants x {released['items']} dishes "
            f"under pseudonyms (refused: {refused}); Parquet, CSV and a signed manifest in {export_dir}")
    with Vault.open(vault_dir, DEMO_PASSPHRASE) as v:  # the utility figures are not DP: stewards only
        utility = v.export_utility("recommender-training", "ratings-explicit", UTILITY_EPSILONS, plot,
                                   items=_items(files.stimuli))
    base = utility["report"]
    curve = dict(zip(base["epsilons"], base["noisy_rmse"], strict=True))
    say(f"8. The steward checks what the noise costs: a plain recommender (soft-impute matrix "
        f"completion) trained inside the vault on noised "
        f"ratings: held-out RMSE {curve.get(EPSILON, float('nan')):.2f} at epsilon {EPSILON:g}, "
        f"{curve.get(UTILITY_EPSILONS[-1], float('nan')):.2f} at epsilon {UTILITY_EPSILONS[-1]:g}; "
        f"no noise {base['no_noise_rmse']:.2f}, random baseline {base['random_baseline_rmse']:.2f} "
        f"(plot: {plot})")
    say("   Participant-level privacy over 60 dishes for 23 people is expensive: at small epsilon "
        "the noise swamps the signal; the plot shows what each budget buys.")

    say("9. A participant who was in that export withdraws; the steward processes it.")
    receipt_path = root / "receipt.json"
    with Vault.open(vault_dir, DEMO_PASSPHRASE) as v:
        members = _members(v, export_dir)
        leaving = next(pid for pid in kept.values() if pid in members)
        v.withdraw_request(leaving, received=v.now().date())  # the vault's own clock
        done = v.withdraw_process(leaving)
        receipt_path.write_text(json.dumps(done["receipt"], indent=2, sort_keys=True) + "\n")
        recall = v.check_export(_manifest(export_dir))
        readable = bool(v.blobs(leaving)) or not done["data_key_destroyed"]
    receipt_ok, _ = verify_receipt_file(receipt_path, public_key)
    say(f"   data key destroyed, {done['blobs_deleted']} blobs deleted; receipt verifies with the "
        f"public key alone: {receipt_ok}; recipients to notify: "
        f"{', '.join(done['recipients_to_notify']) or 'internal users of export ' + released['export_id']}")
    say(f"   'export check' on the earlier export: must be replaced = {recall['must_replace']} "
        f"({recall['withdrawn_or_erased']} withdrawn); their data readable afterwards: {readable}")
    gone = _find_any(vault_dir, [p for p in planted if p])
    report = verify_audit(vault_dir, public_key=public_key)
    bundle = prove(vault_dir, report.entries - 1 if report.entries else 0)
    say(f"10. The audit log verifies with the public key alone: {report.ok} "
        f"({report.entries} entries); the last entry's inclusion proof verifies: "
        f"{verify_proof(bundle, public_key)}")
    summary.update(
        export_cohort=released["cohort_size"], export_refused=released["refused_by_reason"],
        epsilon=EPSILON, rmse_at_epsilon=round(curve[EPSILON], 3),
        rmse_no_noise=round(base["no_noise_rmse"], 3), rmse_random=round(base["random_baseline_rmse"], 3),
        withdrawn=leaving, receipt_verifies=receipt_ok,
        export_flagged_for_recall=recall["must_replace"], withdrawn_data_readable=readable,
        audit_ok=report.ok, audit_entries=report.entries, identity_leaks=len(leaks) + len(gone),
        seconds=round(time.perf_counter() - started, 1), public_key=public_key.hex(),
        paths={"vault": str(vault_dir), "study": str(files.root), "export": str(export_dir),
               "receipt": str(receipt_path), "plot": str(plot)},
    )
    return summary


def _items(stimuli: Path) -> list[str]:
    with open(stimuli, newline="") as fh:
        return [row["item_id"] for row in csv.DictReader(fh)]


def _manifest(export_dir: Path) -> dict[str, Any]:
    return json.loads((export_dir / "manifest.json").read_text())


def _members(v: Vault, export_dir: Path) -> set[str]:
    """The steward's view of an export's lineage (internal ids)."""
    export_id = _manifest(export_dir)["body"]["export_id"]
    return v.export_members(export_id)


def _still_readable(v: Vault, pid: str) -> bool:
    return v.readable(pid)


def _by_vault_id(source: Path, pids: dict[str, str], out: Path) -> Path:
    """The steward's step: the lab's participant codes replaced by the vault's random ids."""
    with open(source, newline="") as fh, open(out, "w", newline="") as dst:
        writer = csv.writer(dst)
        writer.writerow(["participant_id", "item_id", "value"])
        for row in csv.DictReader(fh):
            if row["participant_code"] in pids:
                writer.writerow([pids[row["participant_code"]], row["item_id"], row["value"]])
    return out


def _find_any(root: Path, needles: list[str]) -> list[str]:
    found = []
    blobs = [p.read_bytes() for p in root.rglob("*") if p.is_file()]
    for needle in needles:
        if any(needle.encode() in data for data in blobs):
            found.append(needle)
    return found
