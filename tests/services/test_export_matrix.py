"""`export matrix`: only permitted participants, keyed pseudonyms, DP noise, exact budgets, signed
manifests; `export utility`: RMSE figures only; `budget`: counts unless a steward asks.

Outside sources, named where they are used: pyarrow and pandas read the files back (independent
Parquet and CSV readers); Python's `hmac` module (RFC 2104) recomputes the pseudonyms; `cryptography`'s
Ed25519 (RFC 8032) checks the manifest signature as docs/formats.md defines the signed message;
scipy.stats.dlaplace is the reference distribution of the noise; matplotlib's PNG reader reads the plot.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import itertools
import json
import shutil
import tempfile
from fractions import Fraction
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st
from scipy import stats

from tests.clock import ManualClock, at, ctx_at
from tests.conftest import ROOT, TEST_PASSPHRASE
from vault import Conflict, PolicyRefusal, UsageError, Vault, verify_export
from vault.crypto import random_id
from vault.privacy.accountant import Cost
from vault.services import budget as ledger
from vault.services.export_matrix import (
    MANIFEST_NAME,
    PSEUDONYM_COLUMN,
    export_matrix,
    export_utility,
    read_items,
    verify_export_dir,
)
from vault.services.exports import check_export, pseudonyms

EXAMPLES = ROOT / "docs" / "examples"
T0 = dt.datetime(2026, 5, 1, 9, 0, tzinfo=dt.UTC)  # enrolment and ingest (every consent valid)
NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)  # export (the expired form has lapsed)
REC = "recommender-training"
MENU = "recommender-training/canteen-menu"
RATINGS = "ratings-explicit"
FORMS = {"all": "consent-all-granted.toml", "norec": "consent-no-recommender.toml",
         "expired": "consent-expired.toml", "withdrawn": "consent-all-granted.toml"}
CATALOGUE = [f"dish-{j:02d}" for j in range(40)] + [f"late-{j}" for j in range(5)]
REASON = {"norec": "consent-refused", "expired": "consent-expired", "withdrawn": "consent-withdrawn"}


def _form(name: str, code: str) -> bytes:
    return (EXAMPLES / name).read_text().replace('code = "TL-', f'code = "{code}-', 1).encode()


def make_policy(root: Path) -> Path:
    """The default policy set with min_cohort 3 instead of 20, per-rating units allowed for
    recommender training, and whole-release refusal on spent budgets for its child."""
    target = root / "policy"
    shutil.copytree(ROOT / "policies", target)
    path = target / "purposes.toml"
    text = path.read_text().replace("per_rating_unit_allowed = false",
                                    "per_rating_unit_allowed = true", 1)
    head, child = text.split('[purposes."recommender-training/canteen-menu"]', 1)
    child = child.replace('on_budget_exceeded = "exclude"', 'on_budget_exceeded = "refuse"', 1)
    text = (head + '[purposes."recommender-training/canteen-menu"]' + child).replace(
        "min_cohort = 20", "min_cohort = 3")
    assert text.count("min_cohort = 3") == 3 and 'on_budget_exceeded = "refuse"' in child
    path.write_text(text)
    categories = target / "categories.toml"  # the public item catalogue noised releases list
    listed = ", ".join(f'"{item}"' for item in CATALOGUE)
    text = categories.read_text()
    for line in ("value_range = [0, 3]\n", "value_range = [-1.0, 1.0]\n"):
        assert line in text
        text = text.replace(line, f"{line}items = [{listed}]\n", 1)
    categories.write_text(text)
    return target


@pytest.fixture(scope="module")
def policy_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return make_policy(tmp_path_factory.mktemp("policy"))


def make_lab(root: Path, policy: Path, counts: dict[str, int], *, n_items: int = 12,
             density: float = 0.7, seed: int = 0, category: str = "explicit"
             ) -> tuple[Vault, dict[str, list[str]], dict[tuple[str, str], float]]:
    """A vault with participants of each kind, each holding ratings; the withdrawn ones amend
    their consent (docs/examples/amend-withdraw-recommender.toml) after the ratings are in."""
    v = Vault.init(root / "vault", TEST_PASSPHRASE, policy_dir=policy, clock=ManualClock(T0))
    groups: dict[str, list[str]] = {kind: [] for kind in FORMS}
    for kind, n in counts.items():
        for i in range(n):
            groups[kind].append(at(v, T0).enrol(_form(FORMS[kind], f"{kind}{i}"))["participant_id"])
    rng = np.random.default_rng(seed)
    truth: dict[tuple[str, str], float] = {}
    lines = ["participant_id,item_id,value"]
    for pid in (p for ps in groups.values() for p in ps):
        chosen = [j for j in range(n_items) if rng.random() < density] or [0]
        for j in chosen:
            value = int(rng.integers(0, 4)) if category == "explicit" else round(rng.uniform(-1, 1), 2)
            truth[(pid, f"dish-{j:02d}")] = float(value)
            lines.append(f"{pid},dish-{j:02d},{value}")
    if len(lines) > 1:
        csv = root / "scores.csv"
        csv.write_text("\n".join(lines) + "\n")
        at(v, T0).ingest_scores(csv, category)
        csv.unlink()
    amended = (EXAMPLES / "amend-withdraw-recommender.toml").read_text()
    for i, pid in enumerate(groups["withdrawn"]):
        form = amended.replace('code = "TL-', f'code = "withdrawn{i}-', 1).encode()
        at(v, T0 + dt.timedelta(days=1)).amend_consent(pid, form)
    return v, groups, truth


@pytest.fixture
def lab(tmp_path: Path, policy_dir: Path):
    v, groups, truth = make_lab(tmp_path, policy_dir, {"all": 5, "norec": 1, "expired": 1,
                                                       "withdrawn": 1})
    yield v, groups, truth
    v.close()


def read_matrix(out: Path) -> tuple[pd.DataFrame, pd.DataFrame]:
    parquet = pq.read_table(out / "matrix.parquet").to_pandas()  # pyarrow, an independent reader
    csv = pd.read_csv(out / "matrix.csv")  # pandas' CSV parser, another
    return parquet, csv


def lineage(v: Vault, export_id: str) -> set[str]:
    return {r[0] for r in v._conn.execute("SELECT pid FROM export_members WHERE export_id = ?",
                                          (export_id,))}


def spent(v: Vault, purpose: str) -> dict[str, tuple[str, str, int]]:
    rows = v._conn.execute("SELECT pid, epsilon, rho, releases FROM budget_ledger WHERE purpose = ?",
                           (purpose,))
    return {pid: (e, r, n) for pid, e, r, n in rows}


# --------------------------------------------------------------------------- who is in an export


@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(all_=st.integers(0, 5), norec=st.integers(0, 2), expired=st.integers(0, 2),
       withdrawn=st.integers(0, 2), release=st.sampled_from(["matrix", "aggregate"]),
       unit=st.sampled_from(["participant", "rating"]), seed=st.integers(0, 2**16))
@example(all_=2, norec=2, expired=2, withdrawn=2, release="matrix", unit="participant", seed=1)
@example(all_=3, norec=2, expired=2, withdrawn=2, release="matrix", unit="rating", seed=2)
@example(all_=4, norec=1, expired=1, withdrawn=1, release="aggregate", unit="participant", seed=3)
def test_only_permitted_participants_are_ever_exported(all_: int, norec: int, expired: int,
                                                       withdrawn: int, release: str, unit: str,
                                                       seed: int) -> None:
    root = Path(tempfile.mkdtemp(prefix="mw-export-prop-"))
    try:
        counts = {"all": all_, "norec": norec, "expired": expired, "withdrawn": withdrawn}
        v, groups, _ = make_lab(root, make_policy(root), counts, seed=seed)
        unit = "participant" if release == "aggregate" else unit
        out = root / "out"
        with v:
            others = [p for kind in ("norec", "expired", "withdrawn") for p in groups[kind]]
            if all_ < 3:  # below the minimum cohort: nothing leaves, nothing is charged
                with pytest.raises(PolicyRefusal, match="cohort-too-small") as err:
                    export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.01,
                                  release=release,
                                  unit=unit, out=out)
                assert not any(p in str(err.value) for ps in groups.values() for p in ps)
                assert not out.exists() and not spent(v, REC)
                assert v._conn.execute("SELECT COUNT(*) FROM exports").fetchone()[0] == 0
                return
            result = export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.01,
                                   release=release,
                                   unit=unit, out=out)
            assert result["cohort_size"] == all_
            assert result["refused_by_reason"] == {REASON[k]: counts[k] for k in REASON if counts[k]}
            assert lineage(v, result["export_id"]) == set(groups["all"])
            assert set(spent(v, REC)) == set(groups["all"])
            permitted = pseudonyms(v._context(), REC, groups["all"])
            barred = set(pseudonyms(v._context(), REC, others).values())
            files = [p for p in out.iterdir() if p.is_file()]
            for path in files:
                data = path.read_bytes()
                for pid in (p for ps in groups.values() for p in ps):
                    assert pid.encode() not in data  # internal ids never leave
                for alias in barred:
                    assert alias.encode() not in data
            doc = json.loads((out / MANIFEST_NAME).read_text())
            assert doc["body"]["cohort_size"] == all_
            if release == "matrix":
                parquet, csv = read_matrix(out)
                assert sorted(parquet[PSEUDONYM_COLUMN]) == sorted(permitted.values())
                assert sorted(csv[PSEUDONYM_COLUMN]) == sorted(permitted.values())
                assert sorted(doc["body"]["pseudonyms"]) == sorted(permitted.values())
            else:  # the aggregate names nobody: no per-purpose pseudonym in any file
                for path in files:
                    assert not any(a.encode() in path.read_bytes() for a in permitted.values())
            assert verify_export_dir(out, v.public_key)["ok"]
    finally:
        shutil.rmtree(root, ignore_errors=True)


def test_withdrawal_after_an_export_excludes_from_the_next_and_is_flagged(lab, tmp_path: Path) -> None:
    v, groups, _ = lab
    first = export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.2, out=tmp_path / "a")
    leaver = groups["all"][0]
    amended = (EXAMPLES / "amend-withdraw-recommender.toml").read_text()
    at(v, NOW + dt.timedelta(hours=1)).amend_consent(
        leaver, amended.replace('code = "TL-', 'code = "all0-', 1).encode())
    later = NOW + dt.timedelta(hours=2)
    second = export_matrix(ctx_at(v, later), purpose=REC, category=RATINGS, epsilon=0.2, out=tmp_path / "b")
    assert leaver in lineage(v, first["export_id"]) and leaver not in lineage(v, second["export_id"])
    assert second["refused_by_reason"]["consent-withdrawn"] == 2
    alias = pseudonyms(v._context(), REC, [leaver])[leaver]
    assert alias not in read_matrix(tmp_path / "b")[0][PSEUDONYM_COLUMN].tolist()
    doc = json.loads((tmp_path / "a" / MANIFEST_NAME).read_text())
    assert check_export(ctx_at(v, later), doc)["must_replace"]  # the earlier export must be replaced


# --------------------------------------------------------------------------- pseudonyms and files


def test_pseudonyms_are_keyed_per_purpose_never_a_plain_hash(lab, tmp_path: Path) -> None:
    v, groups, _ = lab
    a = export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.2, out=tmp_path / "a")
    b = export_matrix(ctx_at(v, NOW), purpose=MENU, category=RATINGS, epsilon=0.2, out=tmp_path / "b")
    rows_a = set(read_matrix(tmp_path / "a")[0][PSEUDONYM_COLUMN])
    rows_b = set(read_matrix(tmp_path / "b")[0][PSEUDONYM_COLUMN])
    assert len(rows_a) == len(rows_b) == 5 and not rows_a & rows_b  # unlinkable across purposes
    for pid in groups["all"]:
        # Python's hmac module (RFC 2104) under the vault's per-purpose key: the same value
        key = v._door._ring.purpose_key("pseudonym", REC)
        assert hmac.new(key, pid.encode(), hashlib.sha256).hexdigest()[:20] in rows_a
        assert hashlib.sha256(pid.encode()).hexdigest()[:20] not in rows_a  # not a plain hash
    assert a["export_id"] != b["export_id"]


@pytest.mark.parametrize("category", ["explicit", "derived"])
def test_parquet_and_csv_hold_the_same_values(tmp_path: Path, policy_dir: Path, category: str) -> None:
    v, _, _ = make_lab(tmp_path, policy_dir, {"all": 4}, category=category, n_items=8)
    with v:
        name = RATINGS if category == "explicit" else "scores-derived"
        export_matrix(ctx_at(v, NOW), purpose=REC, category=name, epsilon=1.0, out=tmp_path / "out")
        parquet, csv = read_matrix(tmp_path / "out")
    assert list(parquet.columns) == list(csv.columns)
    assert parquet.columns[0] == PSEUDONYM_COLUMN and list(parquet.columns[1:]) == sorted(
        parquet.columns[1:])
    pd.testing.assert_frame_equal(parquet, csv, check_dtype=False, check_exact=True)
    step = 1.0 if category == "explicit" else 0.01
    grid = parquet.drop(columns=PSEUDONYM_COLUMN).to_numpy() / step
    np.testing.assert_allclose(grid, np.round(grid), atol=1e-9)  # released on the declared grid


def test_noise_in_the_file_has_the_scale_the_range_and_unit_imply(tmp_path: Path,
                                                                  policy_dir: Path) -> None:
    n_items = 40
    v, groups, truth = make_lab(tmp_path, policy_dir, {"all": 10}, n_items=n_items, density=0.5)
    with v:
        result = export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.5,
                               out=tmp_path / "out", items=[f"dish-{j:02d}" for j in range(n_items)])
        labels = pseudonyms(v._context(), REC, groups["all"])
    frame = read_matrix(tmp_path / "out")[0].set_index(PSEUDONYM_COLUMN)
    noise = []
    for pid, alias in labels.items():
        for j in range(n_items):
            item = f"dish-{j:02d}"
            noise.append(frame.loc[alias, item] - truth.get((pid, item), 1.0))  # unrated: mid 1
    # sensitivity from the range [0, 3] and the participant unit: 40 items x span 3 = 120
    scale = n_items * 3 / 0.5
    assert result["guarantee"]["components"][0]["noise_scale"] == str(int(scale))
    counts = np.abs(np.array(noise, dtype=np.int64))
    # reference: scipy.stats.dlaplace(a) has pmf proportional to exp(-a |k|), a = 1/scale
    ref = stats.dlaplace(1 / scale)
    edges = [0, 15, 35, 60, 90, 130, 190, 10**9]
    observed = np.histogram(counts, bins=edges)[0]
    expected = np.array([ref.cdf(hi - 1) - ref.cdf(-hi) - (ref.cdf(lo - 1) - ref.cdf(-lo))
                         if lo > 0 else ref.cdf(hi - 1) - ref.cdf(-hi)
                         for lo, hi in itertools.pairwise(edges)]) * counts.size
    assert stats.chisquare(observed, expected).pvalue > 1e-6


# --------------------------------------------------------------------------- the budget


def test_the_same_request_twice_spends_twice_exactly(lab, tmp_path: Path) -> None:
    v, groups, _ = lab
    for i in range(3):  # 0.1 three times is exactly 3/10 (a float sum would be 0.30000000000000004)
        export_matrix(ctx_at(v, NOW), purpose=MENU, category=RATINGS, epsilon=0.1, out=tmp_path / f"o{i}")
    for purpose in (MENU, REC):  # the child's spending counts against the parent's budget too
        assert spent(v, purpose) == {pid: ("3/10", "0", 3) for pid in groups["all"]}
    report = {r["purpose"]: r for r in ledger.budget_report(v._context())}
    assert report[MENU]["spent_total"] == "3/2" and report[MENU]["remaining_min"] == "17/10"
    assert report[REC]["remaining_min"] == "27/10" and "by_participant" not in report[REC]
    steward = ledger.budget_report(v._context(), MENU, show_participants=True)[0]["by_participant"]
    assert {row["participant_id"] for row in steward} == set(groups["all"])


@pytest.fixture(scope="module")
def ledger_vault(tmp_path_factory: pytest.TempPathFactory):
    with Vault.init(tmp_path_factory.mktemp("ledger") / "vault", TEST_PASSPHRASE,
                    clock=ManualClock(NOW)) as v:
        yield v


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(spent_hundredths=st.integers(0, 300), eps=st.sampled_from(
    ["0.01", "0.05", "0.1", "0.2", "0.25", "0.3", "0.33", "0.5", "0.7", "1.0"]),
    n_ratings=st.integers(1, 7))
@example(spent_hundredths=290, eps="0.1", n_ratings=1)  # 3 - 29/10 rounds above 1/10 in binary
@example(spent_hundredths=267, eps="0.33", n_ratings=1)
@example(spent_hundredths=240, eps="0.2", n_ratings=3)
def test_the_ledger_verdict_is_exact_at_the_boundary(ledger_vault: Vault, spent_hundredths: int,
                                                      eps: str, n_ratings: int) -> None:
    """Near the boundary a float comparison would be wrong either way (3 - 2.9 is not 0.1 in
    binary); the verdict the decision engine is given is the exact one, from Fractions."""
    v = ledger_vault
    pid = random_id(16)
    already = Fraction(spent_hundredths, 100)
    if already:
        ledger.charge(ctx_at(v, NOW), REC, {pid: Cost(epsilon=already)}, export_id="x-seed")
    for scale in (1, n_ratings):  # participant unit, and the rating unit with n ratings
        cost = Cost(epsilon=Fraction(eps) * scale)
        exact_fits = already + Fraction(eps) * scale <= 3  # recommender training: 3 per participant
        assert ledger.affordable(v._context(), REC, {pid: cost}) == {pid: exact_fits}


def test_gaussian_releases_spend_rho_and_state_the_delta(lab, tmp_path: Path) -> None:
    v, groups, _ = lab
    result = export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, rho=0.01, mechanism="gaussian",
                           out=tmp_path / "g")
    body = json.loads((tmp_path / "g" / MANIFEST_NAME).read_text())["body"]
    assert body["mechanism"] == "discrete-gaussian" and body["rho"] == "1/100"
    assert body["zcdp_delta"] == "1/1000000" == result["guarantee"]["approx_dp"]["delta"]
    assert spent(v, REC) == {pid: ("0", "1/100", 1) for pid in groups["all"]}
    with pytest.raises(UsageError):
        export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.1, mechanism="gaussian",
                      out=tmp_path / "x")


def test_spent_budgets_exclude_or_refuse_as_the_policy_says(lab, tmp_path: Path) -> None:
    v, groups, _ = lab
    tired, fresh = groups["all"][:2], groups["all"][2:]
    ledger.charge(ctx_at(v, NOW), REC, {p: Cost(epsilon=Fraction(29, 10)) for p in tired}, export_id="x-t")
    # parent purpose excludes: 0.1 more is exactly 3 (included), 0.2 is not
    a = export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.1, out=tmp_path / "a")
    assert a["cohort_size"] == 5 and spent(v, REC)[tired[0]] == ("3", "0", 2)
    b = export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.2, out=tmp_path / "b")
    assert b["cohort_size"] == 3 and b["refused_by_reason"]["budget-exhausted"] == 2
    assert lineage(v, b["export_id"]) == set(fresh) and spent(v, REC)[tired[0]] == ("3", "0", 2)
    # the child refuses the whole release, also when only the parent's budget is spent
    before = spent(v, REC), spent(v, MENU)
    with pytest.raises(PolicyRefusal, match="budget-exhausted") as err:
        export_matrix(ctx_at(v, NOW), purpose=MENU, category=RATINGS, epsilon=0.1, out=tmp_path / "c")
    assert not any(p in str(err.value) for p in groups["all"])
    assert (spent(v, REC), spent(v, MENU)) == before and not (tmp_path / "c").exists()


def test_rating_unit_costs_per_rating_and_says_what_it_leaves_open(lab, tmp_path: Path) -> None:
    v, groups, truth = lab
    result = export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.05, unit="rating",
                           out=tmp_path / "r")
    body = json.loads((tmp_path / "r" / MANIFEST_NAME).read_text())["body"]
    assert body["privacy_unit"] == "rating" and "NOT protected" in body["rating_unit_warning"]
    assert any("missingness" in line for line in body["privacy"]["not_protected"])
    rated = {pid: sum(1 for (p, _) in truth if p == pid) for pid in groups["all"]}
    assert spent(v, REC) == {pid: (str(Fraction(5, 100) * n), "0", 1) for pid, n in rated.items()}
    frame = read_matrix(tmp_path / "r")[0].set_index(PSEUDONYM_COLUMN)
    labels = pseudonyms(v._context(), REC, groups["all"])
    for pid, alias in labels.items():  # exactly the rated cells carry values
        assert int(frame.loc[alias].notna().sum()) == rated[pid]
    # an unrated cell is an empty CSV field (read as missing everywhere), never the text "nan"
    # (Python's csv module as an independent reader)
    import csv as pycsv

    with open(tmp_path / "r" / "matrix.csv", newline="") as fh:
        cells = [c for row in list(pycsv.reader(fh))[1:] for c in row[1:]]
    assert not any(c.lower() == "nan" for c in cells)
    assert sum(c == "" for c in cells) == len(cells) - sum(rated.values())
    assert result["guarantee"]["privacy_unit"] == "rating"
    with pytest.raises(PolicyRefusal, match="privacy-unit-not-allowed"):
        export_matrix(ctx_at(v, NOW), purpose=MENU, category=RATINGS, epsilon=0.01, unit="rating",
                      out=tmp_path / "m")


# --------------------------------------------------------------------------- refusals


def test_below_the_minimum_cohort_nothing_is_exported(tmp_path: Path) -> None:
    v, groups, _ = make_lab(tmp_path, ROOT / "policies", {"all": 6, "norec": 2})  # default: 20
    with v:
        with pytest.raises(PolicyRefusal) as err:
            export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.5, out=tmp_path / "o",
                          items=CATALOGUE)
        assert "cohort-too-small" in str(err.value) and "[6 eligible]" in str(err.value)
        assert "consent-refused: 2" in str(err.value)
        assert not any(p in str(err.value) for ps in groups.values() for p in ps)
        assert not (tmp_path / "o").exists() and not spent(v, REC)
        refusals = [e for e in v.audit_entries() if e["action"] == "access.grant"
                    and e["decision"] == "refuse"]
        # the audit states the request's epsilon as a JSON number, as it always has
        assert {e["details"]["epsilon"] for e in refusals} == {0.5}
        assert sum(len(e["subjects"]) for e in refusals) == 8


def test_request_wide_refusals(lab, tmp_path: Path) -> None:
    v, _, _ = lab
    out = tmp_path / "o"
    with pytest.raises(PolicyRefusal, match="release-epsilon-exceeds-cap"):
        export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=1.5, out=out)
    with pytest.raises(PolicyRefusal, match="no per-participant privacy budget"):
        export_matrix(ctx_at(v, NOW), purpose="primary-analysis", category=RATINGS, epsilon=0.5, out=out)
    with pytest.raises(PolicyRefusal, match="recipient-not-allowed"):
        export_matrix(ctx_at(v, NOW), purpose="external-sharing", category=RATINGS, epsilon=0.5, out=out,
                      recipient="Someone Else Ltd")
    with pytest.raises(PolicyRefusal, match="purpose-not-allowed-category"):
        export_matrix(ctx_at(v, NOW), purpose=REC, category="eeg-raw", epsilon=0.5, out=out)
    with pytest.raises(UsageError):
        export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, out=out)  # no epsilon, no rho
    catalogue = tmp_path / "items.txt"
    catalogue.write_text("# dishes\ndish-01\n\ndish-02\nnot an id\n")
    with pytest.raises(UsageError, match="item ids"):
        read_items(catalogue)
    catalogue.write_text("# dishes\ndish-02\n\ndish-01\n")
    assert read_items(catalogue) == ["dish-01", "dish-02"]
    out.mkdir()
    (out / "something").write_text("x")
    with pytest.raises(Conflict):
        export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.5, out=out)
    assert not spent(v, REC) and v._conn.execute("SELECT COUNT(*) FROM exports").fetchone()[0] == 0


def test_a_failed_write_leaves_no_files_and_no_lineage(lab, tmp_path: Path,
                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    v, groups, _ = lab
    import vault.services.export_matrix as em

    def broken(*args: object, **kwargs: object) -> None:
        raise OSError("disk went away")

    monkeypatch.setattr(em, "write_table", broken)
    with pytest.raises(OSError):
        export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.5, out=tmp_path / "o")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["vault"]  # no staging folder left
    assert v._conn.execute("SELECT COUNT(*) FROM exports").fetchone()[0] == 0
    # the budget was charged before any file existed: a failure over-charges, never under-charges
    assert spent(v, REC) == {pid: ("1/2", "0", 1) for pid in groups["all"]}


# --------------------------------------------------------------------------- the manifest


def test_manifest_states_the_release_and_is_signed(lab, tmp_path: Path) -> None:
    v, _, _ = lab
    result = export_matrix(ctx_at(v, NOW), purpose="external-sharing", category=RATINGS, epsilon=0.5,
                           recipient="Westbrook Institute of Food Design", out=tmp_path / "o")
    doc = json.loads((tmp_path / "o" / MANIFEST_NAME).read_text())
    body = doc["body"]
    assert body["recipient"] == "Westbrook Institute of Food Design" == result["recipient"]
    assert body["policy_version"] == v.policy.version and len(body["consent_digest"]) == 64
    assert (body["mechanism"], body["privacy_unit"], body["epsilon"]) == (
        "discrete-laplace", "participant", "1/2")
    assert body["cohort_size"] == 7  # external sharing: everyone but the expired consent
    assert body["expires_at"] == "2027-06-15T12:00:00Z"
    entry = next(e for e in v.audit_entries() if e["action"] == "export.preference-matrix")
    assert entry["seq"] < body["audit_tree_head"]["tree_size"]  # the head covers the export entry
    # RFC 8032 through `cryptography` directly, over the message docs/formats.md defines
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

    payload = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True).encode()
    Ed25519PublicKey.from_public_bytes(v.public_key).verify(
        bytes.fromhex(doc["signature"]), b"mindward/v1/signature/export-manifest\x00" + payload)
    for entry in body["files"]:  # hashlib's SHA-256 of each file
        assert hashlib.sha256((tmp_path / "o" / entry["path"]).read_bytes()).hexdigest() == entry["sha256"]


def test_tampering_with_any_file_or_field_is_detected(lab, tmp_path: Path) -> None:
    v, _, _ = lab
    src = tmp_path / "src"
    export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.5, out=src)
    clean = verify_export_dir(src, v.public_key)
    assert (clean["ok"], clean["problems"], clean["files"]) == (True, [], 2)
    assert verify_export(src, v.public_key)["ok"]  # the package's export verifier agrees

    def tampered(name: str, change) -> list[str]:
        copy = tmp_path / name
        shutil.copytree(src, copy)
        change(copy)
        result = verify_export_dir(copy, v.public_key)
        assert not result["ok"]
        return result["problems"]

    def flip(path: Path, offset: int) -> None:
        data = bytearray(path.read_bytes())
        data[offset] ^= 0x01
        path.write_bytes(bytes(data))

    def edit(field: str, value: object):
        def apply(root: Path) -> None:
            doc = json.loads((root / MANIFEST_NAME).read_text())
            doc["body"][field] = value
            (root / MANIFEST_NAME).write_text(json.dumps(doc))
        return apply

    assert tampered("parquet", lambda r: flip(r / "matrix.parquet", 100)) == ["altered matrix.parquet"]
    assert tampered("csv", lambda r: flip(r / "matrix.csv", 30)) == ["altered matrix.csv"]
    assert tampered("gone", lambda r: (r / "matrix.csv").unlink()) == ["missing matrix.csv"]
    assert tampered("extra", lambda r: (r / "more.csv").write_text("x")) == ["unlisted file more.csv"]
    for field, value in [("cohort_size", 50), ("epsilon", "5"), ("privacy_unit", "rating"),
                         ("recipient", "anyone"), ("expires_at", "2099-01-01T00:00:00Z")]:
        assert tampered(f"field-{field}", edit(field, value)) == ["bad signature"]
    problems = tampered("path", edit("files", [{"path": "../vault/vault.db", "size": 1, "sha256": "0"}]))
    assert "bad signature" in problems and "a listed file has no valid relative path" in problems
    with Vault.init(tmp_path / "other", TEST_PASSPHRASE, clock=ManualClock(NOW)) as other:
        assert verify_export_dir(src, other.public_key)["problems"] == [
            "bad signature", "the audit tree head's signature does not verify"]


# --------------------------------------------------------------------------- utility


def test_utility_releases_rmse_figures_only(tmp_path: Path, policy_dir: Path) -> None:
    import matplotlib.image

    v, groups, _ = make_lab(tmp_path, policy_dir, {"all": 12, "norec": 2}, n_items=15, density=0.8)
    with v:
        before = v._audit.size
        result = export_utility(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilons=[0.5, 4.0],
                                out_png=tmp_path / "u.png")
        assert not spent(v, REC)  # nothing released but the figures: no budget, no lineage
        assert v._conn.execute("SELECT COUNT(*) FROM exports").fetchone()[0] == 0
        assert any(e["action"] == "export.utility" for e in v.audit_entries(before))
        with pytest.raises(UsageError):
            export_utility(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilons=[1.0],
                           out_png=tmp_path / "u.jpg")
    report = result["report"]
    assert set(report) == {"metric", "epsilons", "noisy_rmse", "noisy_rmse_std", "no_noise_rmse",
                           "random_baseline_rmse", "rank", "test_fraction", "repeats",
                           "baseline_draws", "value_range"}
    assert report["epsilons"] == [0.5, 4.0] and all(x > 0 for x in report["noisy_rmse"])
    text = json.dumps(result) + result["table"]
    assert not any(p in text for ps in groups.values() for p in ps)
    image = matplotlib.image.imread(tmp_path / "u.png")  # matplotlib's PNG reader (Pillow)
    assert image.shape[:2] == (500, 800)


def test_budget_report_per_participant_rows_are_for_stewards_only(lab, tmp_path: Path) -> None:
    v, _, _ = lab
    export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.5, out=tmp_path / "o")
    at(v, NOW).add_member("omar", "analyst", "analyst passphrase long enough")
    path = v.path
    v.close()
    with Vault.open(path, "analyst passphrase long enough", member="omar") as analyst:
        rows = ledger.budget_report(analyst._context(), REC)
        assert rows[0]["participants_charged"] == 5 and rows[0]["spent_max"] == "1/2"
        with pytest.raises(PolicyRefusal, match="stewards only"):
            ledger.budget_report(analyst._context(), REC, show_participants=True)
    with Vault.open(path, TEST_PASSPHRASE) as steward, pytest.raises(UsageError):
        ledger.budget_report(steward._context(), "no-such-purpose")


def test_the_benchmark_runs_and_goes_through_the_door() -> None:
    """Smoke run of `bench_export` at a tiny size: no timing asserted, only that it exports the
    permitted cohort (the consent filter ran) and reports a ratio against its baseline."""
    from mindward_bench.export import bench_export, format_report

    figures = bench_export(n_participants=40, n_items=30, density=0.3, door_sample=5)
    assert figures["cohort"] == figures["granted"] < 40
    assert figures["ratio"] > 0
    assert figures["phases"]["read_through_door_s"] > 0 and "export matrix" in format_report(figures)


# --------------------------------------------------------------------------- several batches


def test_ratings_ingested_in_several_files_are_exported_as_one_row(lab, tmp_path: Path) -> None:
    # the rating unit leaves unrated cells empty, so the filled cells show exactly what was read
    v, groups, truth = lab
    extra = {pid: [f"late-{j}" for j in range(i + 1)] for i, pid in enumerate(groups["all"][:3])}
    csv = tmp_path / "late.csv"
    csv.write_text("participant_id,item_id,value\n" + "".join(
        f"{pid},{item},2\n" for pid, items in extra.items() for item in items))
    at(v, T0).ingest_scores(csv, "explicit")
    export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.01, unit="rating",
                  out=tmp_path / "r")
    frame = read_matrix(tmp_path / "r")[0].set_index(PSEUDONYM_COLUMN)
    for pid, alias in pseudonyms(v._context(), REC, groups["all"]).items():
        filled = set(frame.columns[frame.loc[alias].notna().to_numpy()])
        assert filled == {item for (p, item) in truth if p == pid} | set(extra.get(pid, []))


def test_two_stored_values_for_one_item_stop_the_export(lab, tmp_path: Path) -> None:
    # ingest refuses a second value for an item; a vault holding two anyway is damaged, and the
    # export must neither pick one silently nor charge anybody's budget
    from vault import IntegrityError
    from vault.formats import scores

    v, groups, truth = lab
    pid = groups["all"][0]
    item = next(i for (p, i) in truth if p == pid)
    body = scores.canonical([scores.ScoreRow(0, pid, item, 3.0)])
    info = v._door._blobs.write(v._door._ring.participant_key(v._conn, pid), pid, "b-" + random_id(12),
                          RATINGS, [body])
    with v._conn:
        v._context().insert_blob(info, "2026-05-01T09:00:00Z")
        v._conn.execute("INSERT INTO score_batches (blob_id, pid, category, batch_tag, rows) "
                        "VALUES (?, ?, ?, ?, 1)", (info.blob_id, pid, RATINGS, "forged"))
    with pytest.raises(IntegrityError, match="two stored values"):
        export_matrix(ctx_at(v, NOW), purpose=REC, category=RATINGS, epsilon=0.01, out=tmp_path / "x")
    assert not (tmp_path / "x").exists() and not spent(v, REC)


@settings(max_examples=60, deadline=None)
@given(n_rows=st.integers(1, 40), n_items=st.integers(1, 12), data=st.data())
def test_rating_unit_tables_put_each_value_in_its_cell_and_leave_the_rest_null(
        n_rows: int, n_items: int, data: st.DataObject) -> None:
    # reference: a plain dict of cells; reader: pyarrow's Parquet reader (independent of the writer's
    # bitmap arithmetic), and null, not NaN, is what an unrated cell must be
    from vault.services.export_matrix import _sparse_columns, write_table

    cells = data.draw(st.dictionaries(st.tuples(st.integers(0, n_rows - 1), st.integers(0, n_items - 1)),
                                      st.integers(-50, 50).map(float), max_size=n_rows * n_items))
    rows = np.array([r for r, _ in cells], dtype=np.int64)
    cols = np.array([c for _, c in cells], dtype=np.int64)
    labels = [f"p{i:03d}" for i in range(n_rows)]
    items = [f"dish-{j:02d}" for j in range(n_items)]
    columns = _sparse_columns(labels, items, rows, cols, np.array(list(cells.values())))
    with tempfile.TemporaryDirectory() as tmp:
        write_table(Path(tmp), "matrix", columns, ("parquet",))
        table = pq.read_table(Path(tmp) / "matrix.parquet")
    assert table.column(PSEUDONYM_COLUMN).to_pylist() == labels
    for j, item in enumerate(items):
        assert table.column(item).to_pylist() == [cells.get((i, j)) for i in range(n_rows)]
