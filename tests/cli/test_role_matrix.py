"""Every command that needs a member, run by every role: allowed, or refused with exit 4 and an
audit entry that names the member. The steward's run is the happy path through all of them.

(An earlier attack: `rekey` run by an analyst removed every steward.)"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pytest

from tests.conftest import ROOT, TEST_PASSPHRASE
from vault.cli.app import main

EXAMPLES = ROOT / "docs" / "examples"
ANALYST = "analyst passphrase long enough"
AUDITOR = "auditor passphrase long enough"
PASSPHRASES = {"steward": TEST_PASSPHRASE, "omar": ANALYST, "ines": AUDITOR}
COHORT = 22


def _form(code: str, name: str = "consent-all-granted.toml") -> str:
    return (EXAMPLES / name).read_text().replace('code = "TL-', f'code = "{code}-', 1)


@pytest.fixture(scope="module")
def lab(tmp_path_factory: pytest.TempPathFactory) -> dict[str, str]:
    """A vault with a cohort, a recording, ratings, an analyst and an auditor; files to feed."""
    import pyedflib.data

    from vault import Vault

    root = tmp_path_factory.mktemp("matrix")
    edf = Path(pyedflib.data.__file__).parent / "test_generator.edf"
    with Vault.init(root / "vault", TEST_PASSPHRASE) as v:
        pids = [v.enrol(_form(f"m{i}").encode())["participant_id"] for i in range(COHORT)]
        v.add_member("omar", "analyst", ANALYST)
        v.add_member("ines", "auditor", AUDITOR)
        (root / "ratings.csv").write_text("participant_id,item_id,value\n" + "".join(
            f"{p},dish-{j:02d},{(i + j) % 4}\n" for i, p in enumerate(pids) for j in range(4)))
        v.ingest_scores(root / "ratings.csv", "explicit")
        v.ingest_eeg(pids[0], edf)
    (root / "form.toml").write_text(_form("new"))
    (root / "amend.toml").write_text(
        (EXAMPLES / "amend-withdraw-recommender.toml").read_text().replace('code = "TL-', 'code = "m1-', 1))
    (root / "items.txt").write_text("".join(f"dish-{j:02d}\n" for j in range(4)))
    return {"root": str(root), "pid": pids[0], "pid1": pids[1], "pid2": pids[2], "edf": str(edf)}


def _run(member: str, argv: list[str], vault_dir: Path, monkeypatch, capsys) -> tuple[int, str]:
    monkeypatch.setenv("MINDWARD_VAULT", str(vault_dir))
    monkeypatch.setenv("MINDWARD_PASSPHRASE", PASSPHRASES[member])
    monkeypatch.setenv("MINDWARD_NEW_PASSPHRASE", "a new passphrase, long enough")
    code = main([*argv, "--member", member])
    _, err = capsys.readouterr()
    return code, err


# (command line, audit action of a refusal, roles that may run it). Order matters for the steward:
# it is the happy path (ingest before export, request before process, rekey last).
COMMANDS: list[tuple[str, str, set[str]]] = [
    ("member list", "", {"steward", "analyst"}),
    ("policy show", "", {"steward", "analyst"}),
    ("audit show --limit 5", "audit.show", {"steward", "auditor"}),
    ("access check --purpose primary-analysis --category eeg-raw", "", {"steward", "analyst"}),
    ("enrol {root}/form.toml", "participant.enrol", {"steward"}),
    ("consent amend {pid1} {root}/amend.toml", "consent.amend", {"steward"}),
    ("consent show {pid}", "consent.show", {"steward"}),
    ("ingest eeg {pid} {edf}", "ingest.eeg", {"steward"}),
    ("ingest scores {root}/ratings.csv --kind explicit", "ingest.scores", {"steward"}),
    ("policy apply {policies}", "policy.apply", {"steward"}),
    ("export eeg --purpose method-development --out {out}/eeg-{member}", "", {"steward", "analyst"}),
    ("export matrix --purpose recommender-training --category ratings-explicit --epsilon 0.5 "
     "--items {root}/items.txt --out {out}/matrix-{member}", "", {"steward", "analyst"}),
    ("export utility --purpose recommender-training --category ratings-explicit --epsilons 1 "
     "--plot {out}/utility-{member}.png", "export.utility", {"steward"}),
    ("budget", "", {"steward", "analyst"}),
    ("report", "report", {"steward"}),
    ("verify", "vault.verify", {"steward"}),
    ("audit head", "audit.head", {"steward"}),
    ("withdraw request {pid2} --received {today}", "withdraw.request", {"steward"}),
    ("withdraw pending", "withdraw.pending", {"steward"}),
    ("withdraw process {pid2} --receipt {out}/receipt-{member}.json", "withdraw.process", {"steward"}),
    ("withdraw receipt {pid2}", "withdraw.receipt", {"steward"}),
    ("sweep --dry-run", "sweep", {"steward"}),
    ("member add newcomer --role analyst", "member.add", {"steward"}),
    ("member remove newcomer", "member.remove", {"steward"}),
    ("rekey", "vault.rekey", {"steward"}),
]
ROLE_OF = {"steward": "steward", "omar": "analyst", "ines": "auditor"}


def _argv(template: str, lab: dict[str, str], member: str) -> list[str]:
    out = Path(lab["root"]) / "out"
    out.mkdir(exist_ok=True)
    text = template.format(**lab, member=member, out=out, policies=ROOT / "policies",
                           today=dt.datetime.now(dt.UTC).date().isoformat())
    return text.split()


def test_every_command_by_every_role(lab, monkeypatch, capsys) -> None:
    from vault import Vault

    outcomes: dict[tuple[str, str], int] = {}
    for member in ("omar", "ines", "steward"):
        for template, _, allowed in COMMANDS:
            code, err = _run(member, _argv(template, lab, member), Path(lab["root"]) / "vault",
                             monkeypatch, capsys)
            outcomes[(member, template)] = code
            if ROLE_OF[member] in allowed:
                assert code == 0, f"{member}: {template}: exit {code}: {err}"
            else:
                assert code == 4, f"{member}: {template}: exit {code}, wanted 4: {err}"
                assert err.count("\n") == 1 and "Traceback" not in err
    with Vault.open(Path(lab["root"]) / "vault", "a new passphrase, long enough") as v:
        log = v.audit_entries()
        stewards = [m for m in v.members() if m["role"] == "steward"]
    assert [m["member"] for m in stewards] == ["steward"]  # nobody locked the steward out
    refusals = [(e["actor"], e["action"]) for e in log if e["decision"] == "refuse"]
    for template, action, allowed in COMMANDS:
        if "analyst" not in allowed:
            assert ("omar", action) in refusals, f"analyst refusal of {template!r} not audited"
    auditor_refused = sum(1 for _, _, allowed in COMMANDS if "auditor" not in allowed)
    assert refusals.count(("ines", "vault.open")) == auditor_refused
